"""The KL trust bound on a step (Ba, Grosse & Martens, ICLR 2017)."""
from __future__ import annotations

import math
from typing import Optional


def kl_trust_scale(direction_dot_grad: float, lr: float, max_step_kl: Optional[float]) -> float:
    """``nu = min(1, sqrt(kappa / (lr^2 * delta^T grad)))``.

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
