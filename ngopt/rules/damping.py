"""Damping rules: keep lambda as given, or adapt it by Levenberg-Marquardt."""
from __future__ import annotations

import math
from typing import Optional, Tuple

from ..schedule import damping_due


def reduction_ratio(loss_before: float, loss_after: float, predicted_change: Optional[float]) -> Optional[float]:
    """``rho = (L(theta + delta) - L(theta)) / M(delta)``; ``None`` when the model predicts no decrease."""
    if predicted_change is None or predicted_change >= 0 or not math.isfinite(predicted_change) \
            or not math.isfinite(loss_before) or not math.isfinite(loss_after):
        return None
    return (loss_after - loss_before) / predicted_change


class FixedDamping:
    """lambda stays what the param groups say (schedulers may still change it)."""

    name = "fixed"

    def __init__(self, interval: int = 1, damping_range: Tuple[float, float] = (1e-6, 1e2)):
        self.interval = interval

    def wants_ratio(self, step_index: int) -> bool:
        return False

    def adapt(self, damping: float, rho: Optional[float]) -> float:
        return damping

    def state_dict(self) -> dict:
        return {}

    def load_state_dict(self, state: dict) -> None:
        pass


class LevenbergMarquardt(FixedDamping):
    """Martens & Grosse 2015, sec. 6.5: every ``interval`` steps, from the reduction ratio rho,
    shrink lambda by ``omega = (19/20)^interval`` when ``rho > LOWER_ABOVE`` and grow it by
    ``1/omega`` when ``rho < RAISE_BELOW``; lambda stays within ``damping_range``.

    The band is narrower than the classic ``(1/4, 3/4)``.  Under the fixed rule's KL bound, which sets
    the step's length on most steps, lambda only shapes the direction, and rho stayed near 0.7 on a
    small transformer language model over a whole run, where the classic band left lambda at its
    start, and the narrower band took 7-16% fewer steps to the target (6 seeds); a lower bar of 0.4
    raises lambda again where a smaller one makes the quadratic model worse (a deep regression at
    batch 32: rho 0.59 at lambda = 1e-2, 0.35 at 1e-3, and twice the steps).  Measured on the
    benchmark's tasks (README *Results*).
    """

    name = "lm"
    RAISE_BELOW = 0.4
    LOWER_ABOVE = 0.65

    def __init__(self, interval: int = 5, damping_range: Tuple[float, float] = (1e-6, 1e2)):
        super().__init__(interval, damping_range)
        self.damping_range = tuple(float(x) for x in damping_range)

    def wants_ratio(self, step_index: int) -> bool:
        return damping_due(step_index, self.interval)

    def adapt(self, damping: float, rho: Optional[float]) -> float:
        if rho is None:
            return damping
        omega = (19.0 / 20.0) ** self.interval
        if rho > self.LOWER_ABOVE:
            damping *= omega
        elif rho < self.RAISE_BELOW:
            damping /= omega
        low, high = self.damping_range
        return min(max(damping, low), high)


DAMPING_RULES = {"fixed": FixedDamping, "lm": LevenbergMarquardt}
