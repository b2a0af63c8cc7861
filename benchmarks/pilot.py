"""A target training loss for a task that gives none, proposed from a short pilot run.

The pilot trains the two baselines, SGD (momentum 0.9) and Adam, at the
centres of their lr grids on the first seed, for the task's step budget. The
lowest training loss either reached, L_low, and the loss at the start, L_0,
fix the target a tenth of the way back from L_low towards L_0 on a log scale:

    target = L_low * (L_0 / L_low) ** 0.1

so that the pilot itself reached it before its last evaluation while the
target still asks for nine tenths (in log terms) of the progress the pilot
made. Only baselines run in the pilot, so the target does not lean towards
natural gradient. For a loss that is not positive, the same tenth is taken on
a linear scale.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Optional

from benchmarks.optimizers import OPTIMIZERS
from benchmarks.tasks import Task
from benchmarks.training import train_run

PILOT_OPTIMIZERS = ("sgd", "adam")
BACK_SHARE = 0.1  # how far back from the lowest loss towards the initial one


class PilotError(ValueError):
    """The pilot could not propose a target (no run made progress)."""


def back_off(lowest: float, initial: float) -> float:
    """The loss ``BACK_SHARE`` of the way from ``lowest`` back to ``initial`` (log scale when both are positive)."""
    if lowest > 0 and initial > 0:
        return lowest * (initial / lowest) ** BACK_SHARE
    return lowest + BACK_SHARE * (initial - lowest)


def lowest_loss(losses: list[Optional[float]]) -> Optional[float]:
    present = [loss for loss in losses if loss is not None and math.isfinite(loss)]
    return min(present) if present else None


def propose_target(task: Task, steps: int, seed: int, source: str) -> Task:
    """The task with a target from the pilot and a reason that says how it was chosen."""
    probe = replace(task, target_loss=-math.inf)  # never "reached": the pilot runs its whole budget
    runs = {name: train_run(probe, OPTIMIZERS[name], OPTIMIZERS[name].lr_centre, seed, steps)
            for name in PILOT_OPTIMIZERS}
    initial = next(run.curve_losses[0] for run in runs.values())
    lows = {name: lowest_loss(run.curve_losses) for name, run in runs.items()}
    progressed = {name: low for name, low in lows.items()
                  if low is not None and initial is not None and low < initial}
    if not progressed:
        raise PilotError(f"{source} gives no target_loss and the pilot run could not propose one: neither "
                         f"{' nor '.join(PILOT_OPTIMIZERS)} lowered the training loss from {initial} in {steps} "
                         "steps at the centre of its lr grid; set target_loss in the file")
    best = min(progressed, key=progressed.get)
    target = back_off(progressed[best], initial)
    low = progressed[best]
    if low > 0:
        rule = f"on a log scale: {low:.4g} x ({initial:.4g} / {low:.4g})^{BACK_SHARE:g} = {target:.4g}"
    else:
        rule = f"on a linear scale: {low:.4g} + {BACK_SHARE:g} x ({initial:.4g} - {low:.4g}) = {target:.4g}"
    reason = (f"proposed by the harness ({source} sets none): in a pilot run of {steps} steps on seed {seed}, "
              f"{' and '.join(f'{name} (lr {OPTIMIZERS[name].lr_centre:g})' for name in PILOT_OPTIMIZERS)} "
              f"took the training loss from {initial:.4g} down to "
              + ", ".join(f"{lows[name]:.4g} ({name})" if lows[name] is not None else f"nowhere ({name} diverged)"
                          for name in PILOT_OPTIMIZERS)
              + f"; the target is a tenth of the way back from the lowest towards the start, {rule}. "
              "Set target_loss in the file to choose your own")
    return replace(task, target_loss=target, target_reason=reason)
