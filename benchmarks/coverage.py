"""Which share of a model's parameters FisherDescent preconditions, and which take its fallback rule.

Parameters of layers that no curvature block supports (and tied ones) are
updated by the optimizer's fallback rule (SGD or Adam), so a model with many
of them gains little from natural gradient: the report says how many.
"""

from __future__ import annotations

from typing import Optional

import torch
from torch import nn


def preconditioned_parameters(optimizer: torch.optim.Optimizer) -> Optional[set]:
    """The parameters inside FisherDescent's curvature blocks (None for other optimizers)."""
    blocks = getattr(optimizer, "blocks", None)
    if not isinstance(blocks, dict):
        return None
    return {id(param) for block in blocks.values() for param in block.layer.params()}


def parameter_coverage(optimizer: torch.optim.Optimizer, model: nn.Module) -> Optional[dict]:
    """Trainable parameter counts inside curvature blocks and under the fallback rule, with module names."""
    inside = preconditioned_parameters(optimizer)
    if inside is None:
        return None
    total = fallback = 0
    fallback_names = []
    for name, param in model.named_parameters():
        if not param.requires_grad:
            continue
        total += param.numel()
        if id(param) not in inside:
            fallback += param.numel()
            fallback_names.append(name)
    return {"parameters": total, "fallback_parameters": fallback,
            "fallback_share": fallback / total if total else 0.0, "fallback_tensors": fallback_names}
