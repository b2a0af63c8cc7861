"""Step-size control: the KL trust bound and Levenberg-Marquardt damping."""
from __future__ import annotations

import math
from typing import Optional, Tuple


def kl_trust_scale(direction_dot_grad: float, lr: float, max_step_kl: Optional[float]) -> float:
    """``nu = min(1, sqrt(kappa / (lr^2 * delta^T grad)))`` (Ba, Grosse & Martens, ICLR 2017).

    For a natural-gradient direction ``delta = C^-1 grad``, ``delta^T grad`` is
    ``delta^T C delta``, so ``lr^2 nu^2 delta^T grad`` is the step's squared length in the
    curvature's metric (twice its KL divergence under the quadratic model), and the
    scaling keeps it at most ``kappa``.  ``lr = 0`` moves nothing and needs no scaling;
    the comparison is made on square roots, so tiny or huge values cannot overflow.
    """
    if max_step_kl is None or lr <= 0 or direction_dot_grad <= 0 or not math.isfinite(direction_dot_grad):
        return 1.0
    length = lr * math.sqrt(direction_dot_grad)
    bound = math.sqrt(max_step_kl)
    return 1.0 if length <= bound else bound / length


def reduction_ratio(loss_before: float, loss_after: float, predicted_change: float) -> Optional[float]:
    """``rho = (L(theta + delta) - L(theta)) / M(delta)``; ``None`` when the model predicts no change."""
    if predicted_change >= 0 or not math.isfinite(predicted_change):
        return None
    return (loss_after - loss_before) / predicted_change


def levenberg_marquardt_damping(damping: float, rho: Optional[float], every: int,
                                damping_range: Tuple[float, float]) -> float:
    """Martens & Grosse 2015, sec. 6.5: shrink by ``omega = (19/20)^T`` when ``rho > 3/4``, grow when ``rho < 1/4``."""
    if rho is None:
        return damping
    omega = (19.0 / 20.0) ** every
    if rho > 0.75:
        damping *= omega
    elif rho < 0.25:
        damping /= omega
    low, high = damping_range
    return min(max(damping, low), high)
