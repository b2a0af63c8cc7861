"""When each block's damped factors are inverted: all on one step, or staggered over the interval.

``"together"`` inverts every block on the steps ``t`` with ``t % inverse_interval == 0`` (after the
ramp of ``interval_warmup``, :mod:`ngopt.schedule`): the
cheapest bookkeeping, but that one step carries the whole cost (a stall of seconds for wide
layers).  ``"staggered"`` gives every block its own phase ``o`` in ``[0, inverse_interval)`` and
inverts it on the steps with ``(t - o) % inverse_interval == 0``; the phases split the blocks'
inversion costs (``sum d^3`` of their factors) as evenly as the longest-first rule can (Graham
1969), so each step of the interval carries a similar share.  Every block is still inverted once
per interval, from the statistics of the step it is inverted on; between two inversions it keeps
the inverse it has, exactly as under ``"together"``.  A block with statistics but no inverse yet
(the first refresh) is inverted at once under either schedule.
"""
from __future__ import annotations

from typing import Dict, List, Sequence

from .schedule import inversion_due


def longest_first(costs: Sequence[float], bins: int) -> List[int]:
    """Greedy longest-processing-time rule: largest job first, to the least-loaded bin (lowest on ties).

    Its largest load is at most ``(4/3 - 1/(3m))`` times the best possible for ``m`` bins (Graham 1969).
    Deterministic, so that every process computes the same assignment without talking.
    """
    if bins < 1:
        raise ValueError(f"bins must be >= 1, got {bins}")
    loads = [0.0] * bins
    owners = [0] * len(costs)
    for index in sorted(range(len(costs)), key=lambda i: (-costs[i], i)):
        target = min(range(bins), key=lambda b: (loads[b], b))
        owners[index] = target
        loads[target] += costs[index]
    return owners


def square_cost(shapes) -> float:
    """``d^3`` per square matrix (an inversion or eigendecomposition), the size of anything else."""
    total = 0.0
    for shape in shapes:
        if len(shape) == 2 and shape[0] == shape[1]:
            total += float(shape[0]) ** 3
        else:
            size = 1
            for n in shape:
                size *= int(n)
            total += float(size)
    return total


class TogetherSchedule:
    name = "together"

    def due(self, block, step_index: int, interval: int, blocks: Sequence, warmup: int = 0) -> bool:
        return inversion_due(step_index, interval, warmup=warmup)


class StaggeredSchedule:
    name = "staggered"

    def __init__(self):
        self._phases: Dict[object, int] = {}
        self._interval = None  # the interval the phases were computed for

    def phases(self, interval: int, blocks: Sequence) -> Dict[object, int]:
        """Each block's phase in ``[0, interval)``, balancing the inversion cost per step."""
        if self._interval != interval or len(self._phases) != len(blocks):
            costs = [square_cost(b.statistic_shapes().values()) for b in blocks]
            self._phases = dict(zip(blocks, longest_first(costs, interval)))
            self._interval = interval
        return self._phases

    def due(self, block, step_index: int, interval: int, blocks: Sequence, warmup: int = 0) -> bool:
        return inversion_due(step_index, interval, self.phases(interval, blocks)[block], warmup)


INVERSION_SCHEDULES = {"together": TogetherSchedule, "staggered": StaggeredSchedule}
