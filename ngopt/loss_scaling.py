"""The loss scale a ``torch.amp.GradScaler`` put on this step's backward, read the way torch's optimizers do.

``GradScaler.step(opt)`` sees ``opt._step_supports_amp_scaling`` and hands the optimizer its overflow
flag (``found_inf``) and the scale (``grad_scale``) instead of unscaling the gradients itself.  The
curvature statistics of a scaled backward carry the scale too, so the optimizer needs it either way:
from the scaler, or as the multiplier seen on the backward's root (the capture hooks) when the user
unscaled the gradients before ``step()``.
"""
from __future__ import annotations

from typing import Callable, List, Optional

import torch

UNSCALED_WITHOUT_SEEN_SCALE = (
    "the loss scaler's gradients were unscaled before step() (scaler.unscale_(opt)), and the loss scale was "
    "not seen on the backward (scaler.scale(loss).backward()): the curvature statistics keep that scale. Call "
    "scaler.scale(loss).backward() right after the forward, without a torch function mode around it.")


def step_loss_scale(found_inf, grad_scale, grads: Callable[[], List[torch.Tensor]],
                    seen: Callable[[], Optional[float]], warn_if_needed: Callable[[], None]) -> Optional[float]:
    """The factor the loss was scaled by (1 without a scaler); None when the scaler found an overflow.

    With the scaler's ``grad_scale`` the gradients are still scaled: they are unscaled here as
    ``GradScaler.unscale_`` would (a float64 reciprocal).  ``grads`` and ``seen`` (the multiplier seen on
    the backward's root) are asked only when needed; ``warn_if_needed`` is called when the gradients
    were unscaled already and no scale was seen.
    """
    if found_inf is None:
        return 1.0
    if float(found_inf) > 0:
        return None
    if grad_scale is not None:
        scale = float(grad_scale)
        scaled = grads()
        if scaled:
            torch._foreach_mul_(scaled, float(1.0 / torch.tensor(scale, dtype=torch.float64)))
        return scale
    multiplier = seen()
    if multiplier is None:
        warn_if_needed()
        return 1.0
    return multiplier
