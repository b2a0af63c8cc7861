"""Update rules for parameters outside any curvature block (norm layers, embeddings, ...).

Plain functions over lists of tensors, in the manner of ``torch.optim``'s
functional cores, so they can be read and tested alone.  Both return the update
direction ``d`` and the new state entries without writing anything; the caller
applies ``p -= lr * d`` and keeps the states once every update of the step is
known to be finite.
"""
from __future__ import annotations

from typing import List, Optional, Tuple

import torch

ADAM_BETAS = (0.9, 0.999)
ADAM_EPS = 1e-8


def with_weight_decay(grad: Optional[torch.Tensor], param: torch.Tensor, weight_decay: float):
    """``grad + weight_decay * param`` (a new tensor), the L2 term every rule adds; ``grad`` itself without
    decay or gradient."""
    return grad.add(param, alpha=weight_decay) if weight_decay and grad is not None else grad


def heavy_ball(buffers: List[Optional[torch.Tensor]], directions: List[torch.Tensor], momentum: float,
               scale: float = 1.0, reuse_directions: bool = False) -> List[torch.Tensor]:
    """New momentum buffers ``momentum * buf + scale * direction`` (``scale * direction`` where ``buf`` is
    None, the first step); without momentum, the scaled directions themselves.  The old buffers are only
    read: the caller keeps the new ones once the whole step is known to be finite.  With
    ``reuse_directions`` the new buffers are written into the directions' own storage (they must be the
    caller's scratch tensors, not gradients): no parameter-sized allocation per layer.  Fused foreach
    calls: on small layers the per-call overhead is most of the cost."""
    if reuse_directions:
        if scale != 1.0:
            torch._foreach_mul_(directions, scale)
        old = [i for i, buffer in enumerate(buffers) if buffer is not None]
        if momentum and old:
            torch._foreach_add_([directions[i] for i in old], [buffers[i] for i in old], alpha=momentum)
        return list(directions)
    if not momentum:
        return torch._foreach_mul(directions, scale) if scale != 1.0 else list(directions)
    new: List[Optional[torch.Tensor]] = [None] * len(directions)
    fresh = [i for i, buffer in enumerate(buffers) if buffer is None]
    old = [i for i, buffer in enumerate(buffers) if buffer is not None]
    if fresh:
        for i, buffer in zip(fresh, torch._foreach_mul([directions[i] for i in fresh], scale)):
            new[i] = buffer
    if old:
        decayed = torch._foreach_mul([buffers[i] for i in old], momentum)
        torch._foreach_add_(decayed, [directions[i] for i in old], alpha=scale)
        for i, buffer in zip(old, decayed):
            new[i] = buffer
    return new


def sgd_directions(params: List[torch.Tensor], grads: List[torch.Tensor], states: List[dict],
                   *, momentum: float, weight_decay: float) -> Tuple[List[torch.Tensor], List[dict]]:
    """Heavy-ball SGD: ``buf = momentum * buf + (grad + weight_decay * p)``.

    Returns the directions and each parameter's new state entries; ``states`` is only read.
    """
    directions = [with_weight_decay(grad, param, weight_decay) for param, grad in zip(params, grads)]
    directions = heavy_ball([state.get("momentum_buffer") for state in states], directions, momentum)
    new_states = [{"momentum_buffer": d} for d in directions] if momentum else [{} for _ in directions]
    return directions, new_states


def adam_directions(params: List[torch.Tensor], grads: List[torch.Tensor], states: List[dict],
                    *, weight_decay: float) -> Tuple[List[torch.Tensor], List[dict]]:
    """Adam (Kingma & Ba 2015) with bias correction; weight decay as an L2 term.

    Returns the directions and each parameter's new state entries; ``states`` is only read.
    """
    beta1, beta2 = ADAM_BETAS
    directions, new_states = [], []
    for param, grad, state in zip(params, grads, states):
        grad = with_weight_decay(grad, param, weight_decay)
        steps = state["adam_step"] + 1 if "adam_step" in state else torch.ones((), dtype=torch.float64)
        exp_avg = state["exp_avg"].mul(beta1) if "exp_avg" in state else torch.zeros_like(param)
        exp_avg.add_(grad, alpha=1 - beta1)
        exp_avg_sq = state["exp_avg_sq"].mul(beta2) if "exp_avg_sq" in state else torch.zeros_like(param)
        exp_avg_sq.addcmul_(grad, grad, value=1 - beta2)
        step = float(steps)
        denom = (exp_avg_sq / (1 - beta2 ** step)).sqrt_().add_(ADAM_EPS)
        directions.append(exp_avg / (1 - beta1 ** step) / denom)
        new_states.append({"adam_step": steps, "exp_avg": exp_avg, "exp_avg_sq": exp_avg_sq})
    return directions, new_states
