"""A watch on the training loss: one warning when it climbs above where it started.

On small or noisy batches the KL bound, taken in the blocks' model, can let every step fit its own
batch: the loss of each new batch then rises instead of falling (README, *Cautions*: the BERT-style
classifier at batch 8).  And once a classifier has fitted its data, its Fisher vanishes and a long
step can throw the loss far up (README, *Training on after the data are fitted*); the message tells
the two apart by whether the loss had come near zero first.  Nothing is evaluated for this: the
values are the closure's loss, or the loss of the forwards the optimizer records anyway (statistics
refreshes and rule evaluations).
"""
from __future__ import annotations

import math
import statistics
from collections import deque
from typing import Optional

OPENING = 3   # the first values, averaged: where the loss started
WINDOW = 8    # the latest values, averaged: where it is now
MARGIN = 0.1  # "above where it started": by more than this share of the start's size,
SPREAD = 1.0  # and by more than this many standard errors of the difference of the two means (values of
              # single examples or tiny batches scatter widely: a few high ones are not a trend)
FITTED = 0.01  # a loss that had come below this share of its start had fitted the data before it climbed


def _sample_variance(values, mean: float) -> float:
    """Unbiased sample variance in plain floats (``statistics.variance`` works in exact fractions:
    about 0.1 ms a call, noticeable on a 1 ms step)."""
    return sum((v - mean) ** 2 for v in values) / (len(values) - 1)


class LossTrend:
    """The first :data:`OPENING` finite loss values and the latest :data:`WINDOW` after them."""

    def __init__(self):
        self.opening: list = []
        self.recent: deque = deque(maxlen=WINDOW)
        self.lowest = math.inf

    def add(self, value: Optional[float]) -> bool:
        """Keep a finite value; whether it was kept (only then can :meth:`rising` change)."""
        if value is None or not math.isfinite(value):
            return False
        self.lowest = min(self.lowest, value)
        if len(self.opening) < OPENING:
            self.opening.append(value)
        else:
            self.recent.append(value)
        return True

    def rising(self) -> bool:
        if len(self.recent) < WINDOW:
            return False
        start, now = statistics.fmean(self.opening), statistics.fmean(self.recent)
        error = math.sqrt(_sample_variance(self.opening, start) / OPENING
                          + _sample_variance(self.recent, now) / WINDOW)
        return now - start > max(MARGIN * abs(start), SPREAD * error)

    def after_fitting(self) -> bool:
        """Whether the loss had come near zero (below :data:`FITTED` of its start) before it climbed."""
        start = statistics.fmean(self.opening)
        return start > 0 and self.lowest < FITTED * start

    def message(self) -> str:
        start, now = statistics.fmean(self.opening), statistics.fmean(self.recent)
        text = (f"the training loss has risen above where it started: {now:.4g} over the last {WINDOW} recorded "
                f"values against {start:.4g} over the first {OPENING}")
        if self.after_fitting():
            return (text + f", after it had come down to {self.lowest:.3g}. Near-certain predictions have a "
                    "vanishing Fisher, so the KL bound allows long steps while damping adapts downwards; keep the "
                    "loss bound on (loss_floor, the loss's minimum), decay lr to 0 over the run "
                    "(torch.optim.lr_scheduler.CosineAnnealingLR with T_max the number of steps) or stop training "
                    "once the data are fitted. README, Cautions.")
        return (text + ". On small or noisy batches the KL bound (taken in the blocks' model) can let every step "
                "fit its own batch; try a smaller max_step_kl (a tenth of it, say). README, Cautions.")
