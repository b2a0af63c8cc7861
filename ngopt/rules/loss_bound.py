"""The loss bound on a step: its predicted decrease at most twice the loss's distance to its floor.

A step ``delta = -s p`` along a natural-gradient proposal ``p = C^-1 g`` predicts, to first order, a
decrease of the loss by ``D = s p^T g``.  A loss cannot fall below its floor ``L*`` (0 for
cross-entropy, squared error and the logistic loss), and on a quadratic loss whose minimum is ``L*``
the full Newton step predicts exactly ``D = g^T H^-1 g = 2 (L - L*)``.  The bound

    s <- s * min(1, 2 (L - L*) / D)

therefore never shortens a step that would at most land on the floor, and scales a longer one back to
it: the stochastic Polyak step size in its bounded form (Loizou, Vaswani, Laradji & Lacoste-Julien,
AISTATS 2021, "SPS_max" with c = 1/2), here for the preconditioned step, with ``L`` the loss of the
batch whose gradient ``g`` is.

It binds where the KL bound has stopped holding the step: once a classifier has fitted its data its
Fisher vanishes, the KL of even a long step looks small, and the loss is near its floor; a batch the
model does not fit then makes a proposal that predicts a decrease far beyond the loss itself
(README, *Cautions*: *Training on after the data are fitted*).
"""
from __future__ import annotations

import math
from typing import Optional


def loss_bound_scale(predicted_decrease: float, loss_gap: Optional[float]) -> float:
    """``min(1, 2 * loss_gap / predicted_decrease)``; 1 when either is unknown, not finite or the
    step predicts no decrease; 0 at the floor (``loss_gap <= 0``: nothing left to decrease)."""
    if loss_gap is None or not math.isfinite(loss_gap) or not math.isfinite(predicted_decrease) \
            or predicted_decrease <= 0:
        return 1.0
    if loss_gap <= 0:
        return 0.0
    return min(1.0, 2.0 * loss_gap / predicted_decrease)
