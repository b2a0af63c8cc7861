"""The exact Fisher of a loss as written, from torch.func Jacobians in float64 (test support).

For a loss ``L = sum_n w_n l_n(z_n)`` over terms ``n`` of a loss input ``z`` (rows of logits for
cross-entropy, elements for squared error), the Fisher in parameters ``theta`` is

    F = sum_n w_n J_n^T H_n J_n,     J_n = dz_n / dtheta,

with ``H_n`` the output Fisher of one term: ``diag(p) - p p^T`` for softmax cross-entropy, ``2`` for
squared error, ``s (1 - s)`` for sigmoid binary cross-entropy (Martens & Grosse 2015, sec. 9; Casella &
Berger for the one-parameter cases).  ``J`` comes from ``torch.func.jacrev`` of the code that computes
``z``, so every operation between the parameters and the loss is taken as written.
"""
from __future__ import annotations

from typing import Callable, Dict, Sequence

import torch
from torch.func import functional_call, jacrev


def loss_input_jacobian(model: torch.nn.Module, names: Sequence[str],
                        loss_input: Callable[[dict], torch.Tensor]):
    """``(z, {name: dz/dparam [*z.shape, *param.shape]})`` with the other parameters held fixed."""
    every = {n: p.detach() for n, p in model.named_parameters()}
    own = {n: every[n] for n in names}

    def z_of(chosen):
        return loss_input({**every, **chosen})

    return z_of(own).detach(), jacrev(z_of)(own)


def flat_jacobian(jac: Dict[str, torch.Tensor], z: torch.Tensor, names: Sequence[str]) -> torch.Tensor:
    """``[*z.shape, P]``: the parameters flattened one after another, each in its own (row-major) order."""
    return torch.cat([jac[n].reshape(z.shape + (-1,)) for n in names], dim=-1)


def cross_entropy_fisher(z: torch.Tensor, jacobian: torch.Tensor, weights: torch.Tensor) -> torch.Tensor:
    """``sum_n w_n J_n^T (diag(p) - p p^T) J_n`` for logits ``z [terms, C]`` and ``J [terms, C, P]``."""
    prob = torch.softmax(z, dim=1)
    hessian = torch.diag_embed(prob) - prob.unsqueeze(2) * prob.unsqueeze(1)
    return torch.einsum("t,tcp,tcd,tdq->pq", weights, jacobian, hessian, jacobian)


def squared_error_fisher(jacobian: torch.Tensor, weights: torch.Tensor) -> torch.Tensor:
    """``sum_n w_n J_n^T 2 J_n`` for elementwise terms, ``J [*z.shape, P]`` and ``w`` shaped like ``z``."""
    flat = jacobian.reshape(-1, jacobian.shape[-1])
    return 2.0 * torch.einsum("t,tp,tq->pq", weights.reshape(-1), flat, flat)


def model_loss_input(model: torch.nn.Module, args, transform=lambda out: out):
    """``loss_input(params)`` for :func:`loss_input_jacobian`: the model's output at ``params``, transformed."""
    return lambda params: transform(functional_call(model, params, args))
