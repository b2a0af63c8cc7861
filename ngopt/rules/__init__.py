"""Rules the optimizer composes after the curvature blocks have given their directions.

* a **step rule** turns the preconditioned proposals into the updates applied
  to the weights (``fixed``: lr, heavy-ball momentum and the KL bound as given;
  ``quadratic``: step size and momentum chosen from the quadratic model);
* a **damping rule** adapts the Tikhonov damping lambda (``fixed`` or ``lm``).

Each rule is a small object with its own state (``state_dict`` /
``load_state_dict``) and its own scalars for ``diagnostics()``; a new rule is a
new module registered in :data:`STEP_RULES` or :data:`DAMPING_RULES`.
"""
from .damping import DAMPING_RULES, FixedDamping, LevenbergMarquardt
from .fixed_step import FixedStep
from .quadratic_step import QuadraticStep
from .trust import kl_trust_scale

STEP_RULES = {"fixed": FixedStep, "quadratic": QuadraticStep}

__all__ = ["DAMPING_RULES", "STEP_RULES", "FixedDamping", "FixedStep", "LevenbergMarquardt", "QuadraticStep",
           "kl_trust_scale"]
