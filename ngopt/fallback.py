"""Update rules for parameters outside any curvature block (norm layers, embeddings, ...).

Plain functions over lists of tensors, in the manner of ``torch.optim``'s
functional cores, so they can be read and tested alone.  Both return the update
direction ``d``; the caller applies ``p -= lr * d``.
"""
from __future__ import annotations

from typing import List

import torch

ADAM_BETAS = (0.9, 0.999)
ADAM_EPS = 1e-8


def heavy_ball(states: List[dict], directions: List[torch.Tensor], momentum: float,
               scale: float = 1.0) -> List[torch.Tensor]:
    """``buf = momentum * buf + scale * direction`` per tensor, kept in ``state["momentum_buffer"]``
    (the first step sets ``buf = scale * direction``); returns the directions to take.  Fused
    foreach calls: on small layers the per-call overhead is most of the cost."""
    if not momentum:
        return torch._foreach_mul(directions, scale) if scale != 1.0 else list(directions)
    fresh = [i for i, state in enumerate(states) if state.get("momentum_buffer") is None]
    for i in fresh:
        states[i]["momentum_buffer"] = directions[i].mul(scale)
    fresh_set = set(fresh)
    old = [i for i in range(len(states)) if i not in fresh_set]
    if old:
        buffers = [states[i]["momentum_buffer"] for i in old]
        torch._foreach_mul_(buffers, momentum)
        torch._foreach_add_(buffers, [directions[i] for i in old], alpha=scale)
    return [state["momentum_buffer"] for state in states]


def sgd_directions(params: List[torch.Tensor], grads: List[torch.Tensor], states: List[dict],
                   *, momentum: float, weight_decay: float) -> List[torch.Tensor]:
    """Heavy-ball SGD: ``buf = momentum * buf + (grad + weight_decay * p)``."""
    directions = [grad.add(param, alpha=weight_decay) if weight_decay else grad.clone()
                  for param, grad in zip(params, grads)]
    return heavy_ball(states, directions, momentum)


def adam_directions(params: List[torch.Tensor], grads: List[torch.Tensor], states: List[dict],
                    *, weight_decay: float) -> List[torch.Tensor]:
    """Adam (Kingma & Ba 2015) with bias correction; weight decay as an L2 term."""
    beta1, beta2 = ADAM_BETAS
    directions = []
    for param, grad, state in zip(params, grads, states):
        grad = grad.add(param, alpha=weight_decay) if weight_decay else grad
        if "exp_avg" not in state:
            state["adam_step"] = torch.zeros((), dtype=torch.float64)
            state["exp_avg"] = torch.zeros_like(param)
            state["exp_avg_sq"] = torch.zeros_like(param)
        state["adam_step"] += 1
        step = float(state["adam_step"])
        state["exp_avg"].mul_(beta1).add_(grad, alpha=1 - beta1)
        state["exp_avg_sq"].mul_(beta2).addcmul_(grad, grad, value=1 - beta2)
        denom = (state["exp_avg_sq"] / (1 - beta2 ** step)).sqrt_().add_(ADAM_EPS)
        directions.append(state["exp_avg"] / (1 - beta1 ** step) / denom)
    return directions
