"""``step_rule="quadratic"``: step size and momentum chosen from the quadratic model of the loss.

Martens & Grosse 2015, sec. 7.  With the proposal ``Delta = -C_hat^-1 g`` (the
curvature blocks' natural-gradient direction) and the previous update ``delta_0``,
the update is ``delta = lr * (alpha Delta + mu delta_0)`` where ``(alpha, mu)``
minimize the damped quadratic model over their span,

    M(alpha, mu) = b^T [alpha, mu] + 1/2 [alpha, mu] K [alpha, mu]^T,
    K_ij = v_i^T (F + (lambda + weight_decay) I) v_j,   b_i = g^T v_i,

with the exact Fisher products ``v_i^T F v_j`` of the recorded batch
(:mod:`ngopt.quadratic_model`).  That is a 2x2 linear solve.  ``momentum`` caps
``mu`` (``mu`` in ``[0, momentum]``; 0 drops the previous update from the span).
``lr`` multiplies the chosen step, so schedules and warm-ups act on it as usual.
The KL bound, when set, caps ``lr^2 [alpha, mu] F [alpha, mu]^T`` at ``max_step_kl``.

Solving every ``interval`` steps amortizes the products; in between, the last
``alpha`` scales the new proposal, with ``mu = 0`` and the KL bound of the
blocks' own model (coefficients are tied to the directions they were computed
for, so momentum is not carried over blindly).
"""
from __future__ import annotations

import math
import warnings
from typing import List, Optional

from ..schedule import rule_evaluation_due
from .base import StepInputs, StepResult, as_parameters, blocks_in, group_of, norms
from .trust import kl_trust_scale


def solve_span(gram_damped: List[List[float]], linear: List[float], mu_cap: float):
    """``(alpha, mu)`` minimizing ``b^T c + c^T K c / 2`` with ``0 <= mu <= mu_cap``; None if no minimum.

    One direction: ``alpha = -b_0 / K_00``.  Two: the 2x2 solve, and when ``mu``
    falls outside ``[0, mu_cap]`` it is clipped and ``alpha`` re-solved for it.
    """
    k00 = gram_damped[0][0]
    if not (k00 > 0) or not math.isfinite(k00):
        return None
    if len(linear) == 1 or mu_cap <= 0:
        return -linear[0] / k00, 0.0
    k01, k11 = gram_damped[0][1], gram_damped[1][1]
    det = k00 * k11 - k01 * k01
    if det > 1e-12 * k00 * k11 and math.isfinite(det):
        alpha = (-linear[0] * k11 + linear[1] * k01) / det
        mu = (-linear[1] * k00 + linear[0] * k01) / det
        if 0.0 <= mu <= mu_cap:
            return alpha, mu
    else:
        mu = 0.0
    mu = min(max(mu, 0.0), mu_cap)
    return -(linear[0] + k01 * mu) / k00, mu


def quadratic_value(gram: List[List[float]], linear: List[float], coefficients: List[float]) -> float:
    quad = sum(coefficients[i] * gram[i][j] * coefficients[j] for i in range(len(linear))
               for j in range(len(linear)))
    return sum(b * c for b, c in zip(linear, coefficients)) + 0.5 * quad


class QuadraticStep:
    name = "quadratic"
    needs_batch = True             # its 2x2 system is built on the recorded batch
    keeps_previous_update = True   # delta_0, the second direction of the span

    def __init__(self, interval: int = 1):
        self.interval = interval
        self.alpha: Optional[float] = None   # from the latest solve, reused between solves
        self.solves = 0
        self.unavailable = False             # the model has an operation without forward-mode rules

    def wants_batch(self, step_index: int) -> bool:
        if self.unavailable:
            return False
        return rule_evaluation_due(step_index, self.interval) or self.alpha is None

    def _give_up(self, error: Exception) -> None:
        self.unavailable = True
        warnings.warn(f"step_rule='quadratic': the model's Jacobian-vector products failed ({error}); the step "
                      "falls back to the blocks' own model with the KL bound from now on. "
                      "step_rule='fixed' avoids the attempt.", stacklevel=6)

    # -- the step ------------------------------------------------------------------------
    def updates(self, inputs: StepInputs) -> StepResult:
        if inputs.evaluator is not None and self.wants_batch(inputs.step_index):
            result = self._solve(inputs)
            if result is not None:
                return result
        return self._reuse(inputs)

    def _solve(self, inputs: StepInputs) -> Optional[StepResult]:
        blocks = blocks_in(inputs)
        groups = group_of(inputs)
        proposals = {b: inputs.directions[b][1].neg() for b in blocks}
        previous = {b: b.state["previous_update"] for b in blocks if "previous_update" in b.state}
        mu_cap = min(g["momentum"] for g in groups.values())
        span = [proposals]
        if mu_cap > 0 and len(previous) == len(blocks) and blocks:
            span.append(previous)
        try:
            loss, gram = inputs.evaluator.curvature_products([as_parameters(v) for v in span])
        except (NotImplementedError, RuntimeError) as error:  # an operation without a forward-mode rule
            self._give_up(error)
            return None
        flat = [gram[i][j] for i in range(len(span)) for j in range(len(span))]
        averaged = inputs.average(loss, *flat)
        loss = averaged[0]
        gram = [[averaged[1 + i * len(span) + j] for j in range(len(span))] for i in range(len(span))]
        if not all(math.isfinite(v) for v in averaged):
            # Non-finite products: the optimizer skips the whole step on these diagnostics.
            return StepResult({}, {"alpha": math.nan, "model_loss": loss})
        damped = [[gram[i][j] + sum((groups[b]["damping"] + groups[b]["weight_decay"]) *
                                    float((span[i][b] * span[j][b]).sum()) for b in blocks)
                   for j in range(len(span))] for i in range(len(span))]
        linear = [sum(float((inputs.directions[b][0] * v[b]).sum()) for b in blocks) for v in span]
        solution = solve_span(damped, linear, mu_cap)
        if solution is None or not all(math.isfinite(x) for x in solution) or solution[0] <= 0:
            return None
        alpha, mu = solution
        lr = max(g["lr"] for g in groups.values())
        kappa = next(iter(groups.values()))["max_step_kl"]
        coefficients = [alpha, mu][:len(span)]
        fisher_length = quadratic_value(gram, [0.0] * len(span), coefficients) * 2.0  # c^T F c
        cap = kl_trust_scale(fisher_length, lr, kappa)
        self.alpha, self.solves = alpha * cap, self.solves + 1
        updates = {}
        for block in blocks:
            group = groups[block]
            update = proposals[block].mul(alpha * cap * group["lr"])
            if len(span) == 2 and mu:
                update.add_(previous[block], alpha=mu * cap * group["lr"])
            updates[block] = update
        taken = [c * cap * lr for c in coefficients]
        predicted = quadratic_value(damped, linear, taken)
        scale_of = {b: alpha * cap for b in blocks}
        diagnostics = norms(inputs, scale_of)
        diagnostics.update(alpha=alpha * cap, mu=mu * cap if len(span) == 2 else 0.0, trust_scale=cap,
                           kl_estimate=0.5 * lr * lr * fisher_length * cap * cap, predicted_change=predicted,
                           model_loss=loss, rule_solved=True)
        return StepResult(updates, diagnostics, loss_before=loss, predicted_change=predicted)

    def _reuse(self, inputs: StepInputs) -> StepResult:
        """Between solves: the latest alpha on the new proposal, no momentum, the blocks' KL bound."""
        alpha = 1.0 if self.alpha is None else self.alpha
        updates, scale_of, scales = {}, {}, {}
        predicted = 0.0
        for index, blocks in inputs.blocks_by_group.items():
            group = inputs.groups[index]
            dot = sum(inputs.dots[b][0] for b in blocks)
            nu = kl_trust_scale(dot, group["lr"] * alpha, group["max_step_kl"])
            scales[index] = nu
            step = group["lr"] * alpha * nu
            predicted += -step * dot + 0.5 * step * step * dot
            for block in blocks:
                scale_of[block] = alpha * nu
                updates[block] = inputs.directions[block][1].mul(-step)
        diagnostics = norms(inputs, scale_of)
        diagnostics.update(alpha=alpha * min(scales.values(), default=1.0), mu=0.0,
                           trust_scale=min(scales.values(), default=1.0), predicted_change=predicted,
                           rule_solved=False)
        return StepResult(updates, diagnostics, predicted_change=predicted)

    # -- state ---------------------------------------------------------------------------
    def state_dict(self) -> dict:
        return {"alpha": self.alpha, "solves": self.solves}

    def load_state_dict(self, state: dict) -> None:
        self.alpha = state.get("alpha")
        self.solves = int(state.get("solves", 0))

