"""Which step does what: every "is this work due at step t?" of the optimizer, in one place.

Steps are numbered from 0: step ``t`` is the ``step()`` call made after ``t`` earlier ones
(``opt.steps_taken`` while it runs).  Work that prepares a step is due at the start of each
interval, ``t % n == 0``, so the first step already has it: a statistics refresh
(``stats_interval``), an inversion (``inverse_interval``; a staggered block at its own phase
``o``: ``(t - o) % n == 0``), a solve of the quadratic step rule or a
check of the fixed rule's KL bound (``rule_interval``).  Work that
judges a step is due at the end of each interval, ``(t + 1) % n == 0``: the Levenberg-Marquardt
damping update (``damping_interval``, from the ratio of the interval's last step) and the
replicas' parameter resync (``resync_every``, after the step).

Refreshes and inversions ramp up to their intervals (``interval_warmup``): early in training the
weights, and with them the curvature, change fastest, so the first gaps are short and grow by one
step every ``interval_warmup`` refreshes, ``1, 1, 2, 2, ..., n-1, n-1`` for a warm-up of 2, after
which every gap is the interval ``n``.  The ramp costs about ``interval_warmup * (n - 1) / 2`` extra
refreshes or inversions, once; ``interval_warmup=0`` gives plain intervals from step 0.  A staggered
block's phase shifts its intervals from the end of the ramp on.
"""
from __future__ import annotations

from functools import lru_cache


def starts_interval(step_index: int, interval: int, phase: int = 0) -> bool:
    """Whether step ``step_index`` is the first of an interval of ``interval`` steps shifted by ``phase``."""
    return (step_index - phase) % interval == 0


def ends_interval(step_index: int, interval: int) -> bool:
    """Whether step ``step_index`` is the last of an interval of ``interval`` steps."""
    return (step_index + 1) % interval == 0


@lru_cache(maxsize=64)
def _ramp(interval: int, warmup: int) -> tuple:
    """``(steps of the ramp, the step it ends on)``: gaps ``1..interval-1``, each ``warmup`` times."""
    steps, step = [0], 0
    for gap in range(1, interval):
        for _ in range(warmup):
            step += gap
            steps.append(step)
    return frozenset(steps), step


def ramped_interval_due(step_index: int, interval: int, warmup: int, phase: int = 0) -> bool:
    """Whether step ``step_index`` starts an interval whose gaps ramp up to ``interval`` (module docstring).

    The ramp is the same for every phase (its gaps are short, so staggering would only delay the early
    refreshes); from its last step on, a ``phase`` in ``[0, interval)`` shifts the intervals.
    """
    ramp, end = _ramp(interval, warmup)
    if step_index < end:
        return step_index in ramp
    return (step_index - end - phase) % interval == 0 and step_index - end >= phase


def statistics_due(step_index: int, stats_interval: int, warmup: int = 0) -> bool:
    """The forward and backward of this step are recorded and their statistics refreshed."""
    return ramped_interval_due(step_index, stats_interval, warmup)


def inversion_due(step_index: int, inverse_interval: int, phase: int = 0, warmup: int = 0) -> bool:
    """A block (at ``phase`` in the interval when staggered) inverts its damped factors on this step."""
    return ramped_interval_due(step_index, inverse_interval, warmup, phase)


def rule_evaluation_due(step_index: int, rule_interval: int) -> bool:
    """The step rule evaluates on the recorded batch this step: the quadratic rule solves for its step
    size and momentum, the fixed rule checks its KL bound against the exact Fisher."""
    return starts_interval(step_index, rule_interval)


def damping_due(step_index: int, damping_interval: int) -> bool:
    """The Levenberg-Marquardt rule measures this step's reduction ratio and updates the damping."""
    return ends_interval(step_index, damping_interval)


def resync_due(step_index: int, resync_every: int) -> bool:
    """After this step the replicas take the first rank's parameters."""
    return ends_interval(step_index, resync_every)
