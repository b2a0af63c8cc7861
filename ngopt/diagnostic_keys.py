"""The keys of ``FisherDescent.diagnostics()``, each with its meaning and unit: the one list of them.

The optimizer builds its snapshot from these names, the diagnostics log lays out its columns and
documents them from here, and the report and the benchmark harness split the step time by
:data:`STEP_TIME`.  "Cumulative" means summed since the optimizer was built.  A layer's own keys
(``layers.<name>.*``) depend on its curvature block; ``ngopt.diagnostics_log`` documents them.
"""
from __future__ import annotations

from typing import Dict, List, NamedTuple


class Key(NamedTuple):
    """What a diagnostics value means, and its unit."""

    meaning: str
    unit: str


# The snapshot's top level.
SNAPSHOT: Dict[str, Key] = {
    "step": Key("optimizer steps taken, skipped ones included", "steps"),
    "skipped_steps": Key("steps whose update was skipped (all reasons)", "steps"),
    "skip_reasons": Key("skipped steps per reason (the skip_reasons.* keys)", "steps"),
    "layers": Key("one entry per curvature block, by block name (the layers.<name>.* keys)", "--"),
    "update": Key("the latest step's update (the update.* keys)", "--"),
    "time": Key("where the optimizer's time went, cumulative (the time.* keys)", "s"),
}

SKIP_REASONS: Dict[str, Key] = {
    "nonfinite_loss": Key("the closure's loss was not finite", "steps"),
    "nonfinite_gradient": Key("a gradient was not finite", "steps"),
    "nonfinite_statistics": Key("a new curvature statistic or inverse was not finite", "steps"),
    "nonfinite_update": Key("the update or a fallback rule's state would not have been finite", "steps"),
    "loss_scale_overflow": Key("a loss scaler found Inf/NaN gradients (the step count stays)", "steps"),
}

UPDATE: Dict[str, Key] = {
    "grad_norm": Key("norm of the gradient of the curvature-block parameters", "loss/param"),
    "direction_norm": Key("norm of the preconditioned update nu C^-1 g of those parameters (before lr and "
                          "momentum)", "param/lr"),
    "cosine": Key("cosine between the gradient and the preconditioned direction", "1"),
    "trust_scale": Key("factor the KL bound applied to the step (1 = not limited)", "1"),
    "loss_bound_scale": Key("fixed step rule: factor the loss bound applied to the step, which keeps its predicted "
                            "decrease at most twice the loss's distance to loss_floor (1 = not limited; null "
                            "when the step did not see its loss, with loss_floor=None and under other rules)", "1"),
    "kl_estimate": Key("KL divergence of the step under the quadratic model (null when not computed)", "nats"),
    "fisher_length_ratio": Key("fixed step rule with rule_interval > 0: the proposal's squared length in the "
                               "exact Fisher of the whole model over the blocks' model's, at the latest check; "
                               "the KL bound uses it (null before any check and under other rules)", "1"),
    "predicted_change": Key("quadratic model's predicted change of the loss, g^T delta + delta^T C delta / 2 "
                            "under step_rule='quadratic'", "loss"),
    "reduction_ratio": Key("rho = actual / predicted loss change on the steps where it is measured, else null",
                           "1"),
    "actual_change": Key("L(theta + delta) - L(theta) on the same batch when measured, else null", "loss"),
    "alpha": Key("quadratic step rule: multiplier on the new proposal C^-1 g (null under other rules)", "1"),
    "mu": Key("quadratic step rule: multiplier on the previous update, the momentum it chose (null under "
              "other rules)", "1"),
    "model_loss": Key("quadratic step rule: loss on the recorded rows it solved on (null when it did not "
                      "solve)", "loss"),
    "rule_solved": Key("quadratic step rule: whether this step solved for alpha and mu (null under other "
                       "rules)", "--"),
    "damping": Key("Tikhonov damping lambda in use (the first group's; adapted under damping_rule='lm')",
                   "curvature"),
    "lr": Key("step size (the first group's)", "1"),
    "loss": Key("loss of the step: step(closure)'s, else the one given to the log's note_loss, else null",
                "loss"),
}

# Parts of step(): they and the untimed rest make up ``STEP_TOTAL``.
STEP_TIME: Dict[str, Key] = {
    "statistics": Key("curvature statistics refreshes", "s"),
    "inversion": Key("inversions / eigendecompositions of the factors", "s"),
    "precondition": Key("applying the inverses to the gradients", "s"),
    "rules": Key("the step rule and the damping rule (their loss and curvature evaluations included)", "s"),
    "fallback": Key("fallback rule for parameters outside the blocks", "s"),
}
STEP_TOTAL = "step_total"
# Timed inside the user's forward and backward, outside step().
PASS_TIME: Dict[str, Key] = {
    "capture": Key("capture hooks inside the user's forward/backward", "s"),
    "extra_backward": Key("extra backward passes of the sampled/exact Fisher (inside the user's backward())",
                          "s"),
    "statistics_in_backward": Key("statistics formed inside those passes as gradients arrive (not in "
                                  "time.statistics)", "s"),
}
TIME: Dict[str, Key] = {**STEP_TIME, STEP_TOTAL: Key("whole step() calls (the step parts and the rest)", "s"),
                        **PASS_TIME}


_NESTED = {"skip_reasons": SKIP_REASONS, "update": UPDATE, "time": TIME}


def describe() -> Dict[str, Key]:
    """The snapshot's flattened keys apart from the layers' (``skip_reasons.nonfinite_loss``, ``time.rules``),
    in order, with their meanings and units."""
    described = {}
    for key, entry in SNAPSHOT.items():
        if key in _NESTED:
            described.update({f"{key}.{child}": meaning for child, meaning in _NESTED[key].items()})
        elif key != "layers":
            described[key] = entry
    return described


def columns() -> List[str]:
    """The flattened keys of :func:`describe`: the columns every diagnostics record has."""
    return list(describe())
