"""Learning-rate schedules fitted to a run's step budget.

``warmup_cosine`` (the ``adamw-cosine`` row) multiplies the peak lr (the lr of the grid) by

    (i + 1) / W                                for the first W steps (i = 0 .. W - 1),
    (1 + cos(pi * (i - W) / (T - W))) / 2      for the remaining steps i = W .. T - 1,

over a run of T steps with W = max(1, round(WARMUP_SHARE * T)) warm-up steps.
The warm-up starts at 1/W of the peak, not at zero, so no step is spent with
lr 0; the decay reaches zero only after the last step. Both parts follow
torch's own schedulers: ``LinearLR`` from 1/W to 1 over the warm-up and
``CosineAnnealingLR`` with ``T_max = T - W`` and ``eta_min = 0`` after it.

``cosine`` (the ``fisher-descent-cosine`` row) is the decay alone, torch's ``CosineAnnealingLR`` with
``T_max = T``: FisherDescent's first steps are held by its KL bound, not by a small lr, and on a step the bound
holds, the product of lr and the bound's scale is fixed by the bound, whatever the lr
(``ngopt/rules/trust.py``); the decay acts where the bound has stopped binding, on the long steps
near a fitted minimum.
"""

from __future__ import annotations

import math

import torch
from torch.optim.lr_scheduler import CosineAnnealingLR, LambdaLR

# A warm-up of a few percent of the run (common practice): Adam's moment estimates rest on a
# handful of gradients in the first steps, and a small lr keeps those early updates small.
WARMUP_SHARE = 0.05


def warmup_steps(steps: int) -> int:
    """W, the number of warm-up steps in a run of ``steps`` steps (at least one)."""
    return max(1, round(WARMUP_SHARE * steps))


def warmup_cosine_factor(index: int, steps: int) -> float:
    """The multiplier of the peak lr on step ``index`` (counted from 0) of a run of ``steps`` steps."""
    warmup = warmup_steps(steps)
    if index < warmup:
        return (index + 1) / warmup
    progress = (index - warmup) / max(1, steps - warmup)
    return 0.5 * (1.0 + math.cos(math.pi * min(progress, 1.0)))


def _check_budget(steps) -> None:
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"steps must be a positive integer (the run's step budget), got {steps!r}")


def warmup_cosine(optimizer: torch.optim.Optimizer, steps: int) -> LambdaLR:
    """The schedule on ``optimizer`` for a run of ``steps`` steps; call its ``step()`` after each optimizer step."""
    _check_budget(steps)
    return LambdaLR(optimizer, lambda index: warmup_cosine_factor(index, steps))


def cosine(optimizer: torch.optim.Optimizer, steps: int) -> CosineAnnealingLR:
    """Cosine decay from the optimizer's lr at step 0 to zero after the last of ``steps`` steps."""
    _check_budget(steps)
    return CosineAnnealingLR(optimizer, T_max=steps, eta_min=0.0)


def describe() -> str:
    """The schedule in words, for the optimizer's label."""
    return (f"linear warm-up over the first {100 * WARMUP_SHARE:g}% of the steps, then cosine decay "
            "to 0 at the end of the run")


def describe_cosine() -> str:
    return "cosine decay of its lr to 0 at the end of the run"
