"""When and how a run's training loss and test metric are measured.

The training loss is the loss on the whole training set, in ``eval()`` mode
under ``torch.no_grad()`` (so no optimizer hook records anything). Evaluating
it costs a forward pass over every training example, as much as several
training steps on the larger tasks, so it is done densely only where it
decides something:

- every ``fine`` steps while the run is near the target: the smallest
  minibatch loss since the last evaluation, or the last evaluated loss, has
  covered the last ``NEAR_SHARE`` of the way from the initial loss L_0 down to
  the target on a log scale, i.e. is at most target * (L_0 / target) **
  NEAR_SHARE (the minibatch losses come free with the training steps; a log
  scale, because a cross-entropy target sits far from zero on some tasks and
  decades below the start on others);
- every ``coarse`` steps otherwise (far above the target, or after reaching it),
  and at the last step.

Steps to target is the first evaluated step at which the loss is at or below
the target, so it is exact to within the gap between that evaluation and the
one before it: ``fine`` steps when the crossing happens near the target, as it
does unless the minibatch losses run well above the whole-set loss, at most
``coarse`` steps otherwise. Each run records that gap (``target_resolution``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Optional

import torch

CURVE_POINTS = 100  # evaluations per run at the fine interval
COARSE_EVERY = 5  # the coarse interval is this many fine ones
NEAR_SHARE = 0.25  # "near the target": within this share of the log-way from the initial loss to it


@dataclass(frozen=True)
class EvaluationSchedule:
    fine: int
    coarse: int
    steps: int

    @classmethod
    def for_steps(cls, steps: int) -> "EvaluationSchedule":
        fine = max(1, steps // CURVE_POINTS)
        return cls(fine, fine * COARSE_EVERY, steps)

    def due(self, step: int, near: bool) -> bool:
        return step == self.steps or step % (self.fine if near else self.coarse) == 0

    def as_dict(self) -> dict:
        return {"fine_every": self.fine, "coarse_every": self.coarse, "near_share": NEAR_SHARE}


def near_threshold(initial: float, target: float) -> float:
    """The loss below which a run counts as near the target (+inf: always, where no log scale applies)."""
    if not (target > 0 and initial > target and math.isfinite(initial)):
        return math.inf
    return target * (initial / target) ** NEAR_SHARE


def near_target(loss: Optional[float], threshold: float) -> bool:
    """Whether a loss is close enough to the target to evaluate densely (unknown counts as near)."""
    return loss is None or loss <= threshold


@torch.no_grad()
def evaluate(model: torch.nn.Module, loss_fn: torch.nn.Module, inputs, targets) -> float:
    """Loss on a whole data set, in eval mode and without autograd."""
    model.eval()
    try:
        return loss_fn(model(inputs), targets).item()
    finally:
        model.train()


def accuracy(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Share of argmax predictions over class dim 1 that match; for sequences, over every position.

    A single output column is one logit of a binary label (0 or 1, as nn.BCEWithLogitsLoss takes it):
    the prediction is 1 where the logit is positive.
    """
    if outputs.dim() == 2 and outputs.shape[1] == 1:
        return ((outputs > 0).to(labels.dtype) == labels).float().mean().item()
    return (outputs.argmax(dim=1) == labels).float().mean().item()


def mean_squared_error(outputs: torch.Tensor, targets: torch.Tensor) -> float:
    return torch.mean((outputs - targets) ** 2).item()


METRICS: dict[str, Callable[[torch.Tensor, torch.Tensor], float]] = {
    "accuracy": accuracy, "mse": mean_squared_error}
METRIC_NAMES = (*METRICS, "loss")  # "loss": the training criterion on the test set


@torch.no_grad()
def test_metric(metric: Optional[str], model: torch.nn.Module, loss_fn: torch.nn.Module,
                inputs, targets) -> Optional[float]:
    """The task's test metric (None when the task has none)."""
    if metric is None:
        return None
    model.eval()
    try:
        outputs = model(inputs)
        return loss_fn(outputs, targets).item() if metric == "loss" else METRICS[metric](outputs, targets)
    finally:
        model.train()


def describe_rule() -> str:
    """The evaluation rule in words, for any budget (each task's intervals are in its results entry)."""
    return (f"the training loss is the loss on the whole training set (eval mode, no autograd), evaluated "
            f"every max(1, steps // {CURVE_POINTS}) steps while a run is near the target (its minibatch losses "
            f"or last evaluation below target x (initial loss / target)^{NEAR_SHARE:g}, the last "
            f"{NEAR_SHARE:.0%} of the way on a log scale), {COARSE_EVERY} times less often otherwise, "
            "and at the last step; steps to target are exact to within the gap between the "
            "evaluation that first met the target and the one before it (target_resolution in results.json, "
            "the fine interval unless a run's minibatch losses ran well above its whole-set loss)")
