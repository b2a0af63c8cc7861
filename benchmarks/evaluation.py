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

An evaluation's forward takes the whole set at once, or chunks of ``EVALUATION_CHUNK``
examples where that is faster (convolutions and attention over a whole set run out of cache:
1.2-1.5x faster in chunks of 256 on the digits CNNs and the corpus transformer, slower on the
MLPs); :func:`fastest_forward_chunk` times both once per task. The outputs are joined before one
call of the criterion, so the loss is the same function of the same outputs either way.

Steps to target is the first evaluated step at which the loss is at or below
the target, so it is exact to within the gap between that evaluation and the
one before it: ``fine`` steps when the crossing happens near the target, as it
does unless the minibatch losses run well above the whole-set loss, at most
``coarse`` steps otherwise. Each run records that gap (``target_resolution``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable, Optional

import torch

CURVE_POINTS = 100  # evaluations per run at the fine interval
# The coarse interval is this many fine ones.  Far from the target an evaluation is mostly a curve point
# (the crossings are found near it): every 10 fine intervals there instead of 5 took a quarter off a
# quick run's evaluations (3,828 against 5,086) and left every run's steps to target as they were.
COARSE_EVERY = 10
NEAR_SHARE = 0.25  # "near the target": within this share of the log-way from the initial loss to it
EVALUATION_CHUNK = 256  # examples per forward when an evaluation runs in chunks
CHUNKS_MUST_SAVE = 0.05  # chunks are used only where they take at least this share off the whole-set forward


@dataclass(frozen=True)
class EvaluationSchedule:
    fine: int
    coarse: int
    steps: int
    forward_chunk: Optional[int] = None  # examples per evaluation forward (None: the whole set at once)

    @classmethod
    def for_steps(cls, steps: int) -> "EvaluationSchedule":
        fine = max(1, steps // CURVE_POINTS)
        return cls(fine, fine * COARSE_EVERY, steps)

    def due(self, step: int, near: bool) -> bool:
        return step == self.steps or step % (self.fine if near else self.coarse) == 0

    def as_dict(self) -> dict:
        return {"fine_every": self.fine, "coarse_every": self.coarse, "near_share": NEAR_SHARE,
                "forward_chunk": self.forward_chunk}


def near_threshold(initial: float, target: float) -> float:
    """The loss below which a run counts as near the target (+inf: always, where no log scale applies)."""
    if not (target > 0 and initial > target and math.isfinite(initial)):
        return math.inf
    return target * (initial / target) ** NEAR_SHARE


def near_target(loss: Optional[float], threshold: float) -> bool:
    """Whether a loss is close enough to the target to evaluate densely (unknown counts as near)."""
    return loss is None or loss <= threshold


def outputs_in_chunks(model: torch.nn.Module, inputs: torch.Tensor, chunk: Optional[int]):
    """``model(inputs)``, computed ``chunk`` examples at a time when given (tensor outputs joined along dim 0)."""
    if chunk is None or len(inputs) <= chunk:
        return model(inputs)
    parts = [model(inputs[start:start + chunk]) for start in range(0, len(inputs), chunk)]
    if not all(isinstance(part, torch.Tensor) for part in parts):
        return model(inputs)  # outputs that cannot be joined: the whole set at once
    return torch.cat(parts)


@torch.no_grad()
def evaluate(model: torch.nn.Module, loss_fn: torch.nn.Module, inputs, targets,
             chunk: Optional[int] = None) -> float:
    """Loss on a whole data set, in eval mode and without autograd (the forward in chunks when given)."""
    model.eval()
    try:
        return loss_fn(outputs_in_chunks(model, inputs, chunk), targets).item()
    finally:
        model.train()


def fastest_forward_chunk(model: torch.nn.Module, loss_fn: torch.nn.Module, inputs, targets,
                          repeats: int = 5) -> Optional[int]:
    """``EVALUATION_CHUNK`` where evaluating in chunks is faster than one forward over the whole set by at
    least ``CHUNKS_MUST_SAVE``, else None: the fastest of ``repeats`` timings of each, taken in turns (so
    a stretch of load falls on both alike) after one untimed call of each."""
    if len(inputs) <= EVALUATION_CHUNK:
        return None
    choices = (None, EVALUATION_CHUNK)
    fastest = {chunk: math.inf for chunk in choices}
    for chunk in choices:
        evaluate(model, loss_fn, inputs, targets, chunk)
    for _ in range(repeats):
        for chunk in choices:
            start = time.perf_counter()
            evaluate(model, loss_fn, inputs, targets, chunk)
            fastest[chunk] = min(fastest[chunk], time.perf_counter() - start)
    return EVALUATION_CHUNK if fastest[EVALUATION_CHUNK] <= (1 - CHUNKS_MUST_SAVE) * fastest[None] else None


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
            "the fine interval unless a run's minibatch losses ran well above its whole-set loss); its forward "
            f"takes chunks of {EVALUATION_CHUNK} examples where a timing at the start of the task finds that at least "
            f"{CHUNKS_MUST_SAVE:.0%} faster than one pass over the whole set (forward_chunk in results.json), "
            "the criterion one call on the joined outputs")
