"""Which share of a model's parameters each rule of an optimizer updates.

FisherDescent: parameters that no curvature block describes (an operation
without a handler, a parameter used in more ways than a block covers) are
updated by the optimizer's fallback rule (SGD or Adam), so a model with many of
them gains little from natural gradient: the report says how many, and why
(``FisherDescent.curvature_assignment``). A composite optimizer (the ``muon``
row): how many parameters each of its parts updates, since on a model without
hidden weight matrices Muon updates none and the row is AdamW alone.
"""

from __future__ import annotations

from typing import Optional

import torch
from torch import nn

from benchmarks.composite import CompositeOptimizer


def parameter_coverage(optimizer: torch.optim.Optimizer, model: nn.Module) -> Optional[dict]:
    """Trainable parameter counts inside curvature blocks and under the fallback rule, with their names;
    for a composite optimizer, the count each part updates."""
    if isinstance(optimizer, CompositeOptimizer):
        return part_counts(optimizer, model)
    assignment = getattr(optimizer, "curvature_assignment", None)
    if assignment is None:
        return None
    numel = {name: param.numel() for name, param in model.named_parameters() if param.requires_grad}
    total = sum(numel.values())
    fallback = {name: entry.reason for name, entry in assignment().items() if entry.fallback and name in numel}
    count = sum(numel[name] for name in fallback)
    return {"parameters": total, "fallback_parameters": count,
            "fallback_share": count / total if total else 0.0, "fallback_tensors": list(fallback),
            "fallback_reasons": fallback}


def part_counts(optimizer: CompositeOptimizer, model: nn.Module) -> dict:
    """The trainable parameter count of the model and of each part of the composite optimizer."""
    total = sum(param.numel() for param in model.parameters() if param.requires_grad)
    parts = {name: sum(param.numel() for group in part.param_groups for param in group["params"])
             for name, part in optimizer.parts.items()}
    return {"parameters": total, "parts": parts}
