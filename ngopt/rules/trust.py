"""The KL trust bound on a step (Ba, Grosse & Martens, ICLR 2017), and its check against the exact Fisher.

The bound is computed in the curvature blocks' own model, ``sum_b p_b^T C_b p_b`` for the proposals
``p_b = C_b^-1 g_b``.  That model drops every product between blocks and each block's statistics are
a running average of earlier batches, so it can understate the step's true length: when many layers
push the same outputs the same way, or a small batch's gradient lies where the averaged statistics
saw little.  :func:`fisher_length_ratio` measures by how much, on the recorded batch.
"""
from __future__ import annotations

import math
from typing import Optional

from .base import StepInputs, as_parameters, blocks_in, group_of


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


def fisher_length_ratio(inputs: StepInputs) -> float:
    """``p^T (F + eta I) p / sum_b p_b^T C_b p_b`` over every block's proposal ``p_b = C_b^-1 g_b``.

    ``F`` is the exact Fisher (generalized Gauss-Newton) of the whole model on the evaluator's rows,
    one forward-mode pass (:meth:`ngopt.quadratic_model.BatchEvaluator.curvature_products`), and
    ``eta`` each block's damping plus weight decay, the terms the damped blocks carry too; the
    denominator is the blocks' ``p_b^T g_b``.  Averaged over ranks when data-parallel.  NaN when
    either side is not finite; raises what the forward-mode pass raises.
    """
    blocks = blocks_in(inputs)
    groups = group_of(inputs)
    _, gram = inputs.evaluator.curvature_products([as_parameters({b: inputs.directions[b][1] for b in blocks})])
    (exact,) = inputs.average(gram[0][0])
    damped = exact + sum((groups[b]["damping"] + groups[b]["weight_decay"]) * inputs.dots[b][1] for b in blocks)
    modelled = sum(inputs.dots[b][0] for b in blocks)
    if not (math.isfinite(damped) and math.isfinite(modelled)) or modelled <= 0:
        return math.nan
    return damped / modelled
