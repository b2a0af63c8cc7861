"""What the optimizer hands a step rule, and what it gets back."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Dict, List, Optional, Tuple

import torch


@dataclass
class StepInputs:
    """The step's preconditioned proposals, grouped as the optimizer's param groups are.

    ``directions[block] = (g, p)``: the block's gradient matrix ``g`` (weight decay
    included) and its preconditioned gradient ``p = C^-1 g``; ``dots[block]`` holds
    ``(p.g, p.p, g.g)`` as Python floats (one host sync for all blocks).
    """

    groups: list
    blocks_by_group: Dict[int, list]
    directions: Dict[object, Tuple[torch.Tensor, torch.Tensor]]
    dots: Dict[object, Tuple[float, float, float]]
    step_index: int
    evaluator: Optional[object] = None               # quadratic_model.BatchEvaluator on solve steps
    # The loss of the step's batch minus loss_floor, when the step saw that loss (None: no loss bound).
    loss_gap: Optional[float] = None
    average: Callable[..., tuple] = lambda *values: values   # mean over ranks (identity in one process)
    # (pack, stack index) of the small blocks computed together (ngopt/packing.py): their gradient matrices
    # and proposals are regions of the pack's gradient stack and of its proposal stack at that index.
    packs: list = field(default_factory=list)


@dataclass
class StepResult:
    updates: Dict[object, torch.Tensor]              # block -> change added to its weights (matrix layout),
                                                     # times update_scale
    diagnostics: dict = field(default_factory=dict)
    loss_before: Optional[float] = None              # on the evaluator's rows, when the rule measured it
    predicted_change: Optional[float] = None         # M(delta) for the update returned; None: the blocks' model
    states: Dict[object, dict] = field(default_factory=dict)  # block -> state entries to keep if the step is written
    # Each update is applied times this factor (1 where absent): a rule whose update is a multiple of a
    # tensor it keeps anyway (the fixed rule's -lr * momentum buffer) hands over that tensor, so no
    # parameter-sized copy of it is made.
    update_scale: Dict[object, float] = field(default_factory=dict)
    # (pack, stack index) whose stack holds the updates of all the pack's blocks (one factor for all of
    # them): checked and written as whole stacks.
    packs: list = field(default_factory=list)


def group_of(inputs: StepInputs) -> Dict[object, dict]:
    return {block: inputs.groups[index] for index, blocks in inputs.blocks_by_group.items() for block in blocks}


def norms(inputs: StepInputs, scale_of: Dict[object, float]) -> dict:
    """Gradient norm, norm of the scaled preconditioned direction, and the cosine between them."""
    dot = sum(inputs.dots[b][0] for b in inputs.dots)
    grad_sq = sum(inputs.dots[b][2] for b in inputs.dots)
    direction_sq = sum(scale_of[b] ** 2 * inputs.dots[b][1] for b in inputs.dots)
    proposal_sq = sum(inputs.dots[b][1] for b in inputs.dots)
    denom = (proposal_sq * grad_sq) ** 0.5
    return {"grad_norm": grad_sq ** 0.5, "direction_norm": direction_sq ** 0.5,
            "cosine": dot / denom if denom > 0 else 0.0}


def blocks_in(inputs: StepInputs) -> List[object]:
    return [b for blocks in inputs.blocks_by_group.values() for b in blocks]


def as_parameters(matrices: Dict[object, torch.Tensor]) -> dict:
    """Block matrices as ``{parameter: tensor}`` for the evaluator's forward-mode products."""
    direction = {}
    for block, matrix in matrices.items():
        weight_part, bias_part = block.layer.split_matrix(matrix)
        direction[block.layer.weight] = weight_part
        if bias_part is not None:
            direction[block.layer.bias] = bias_part
    return direction
