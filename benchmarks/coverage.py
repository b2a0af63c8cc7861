"""Which share of a model's parameters FisherDescent preconditions, and which take its fallback rule.

Parameters that no curvature block describes (an operation without a handler, a
parameter used in more ways than a block covers) are updated by the optimizer's
fallback rule (SGD or Adam), so a model with many of them gains little from natural
gradient: the report says how many, and why (``FisherDescent.curvature_assignment``).
"""

from __future__ import annotations

from typing import Optional

import torch
from torch import nn


def parameter_coverage(optimizer: torch.optim.Optimizer, model: nn.Module) -> Optional[dict]:
    """Trainable parameter counts inside curvature blocks and under the fallback rule, with their names."""
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
