"""What the rules evaluate on the recorded batch: whether a step needs it, on which rows, and the
quadratic model's predicted change for the Levenberg-Marquardt ratio.

A step rule may want the batch (the quadratic rule's solves, the fixed rule's KL checks: the rule's
``wants_batch``) and the damping rule may want the loss change on it (``wants_ratio``).  The batch is
replayed from the training forward's recording (:mod:`ngopt.quadratic_model`); when it cannot be,
:func:`evaluator_for` says why, and the optimizer warns once.
"""
from __future__ import annotations

import math
from typing import Callable, Dict, Optional, Tuple

import torch

from .quadratic_model import BatchEvaluator, replayable


def evaluator_for(rules, model, batch, step_index: int, has_closure: bool,
                  rule_batch_fraction: float) -> Tuple[Optional[BatchEvaluator], str]:
    """``(evaluator or None, why the batch could not be replayed or "")`` for step ``step_index``.

    The problem is reported only where someone would miss the evaluation: a step rule that wants the
    batch, or the damping rule without a closure (with one, the closure's loss serves it).
    """
    steered = rules.step.needs_batch
    rule_wants = rules.step.wants_batch(step_index)
    ratio_wanted = rules.damping.wants_ratio(step_index)
    if not (rule_wants or ratio_wanted):
        return None, ""
    problem = replayable(batch)
    if problem:
        # With a closure and only the damping rule asking, the closure's loss serves: nothing is missed.
        return None, problem if (not has_closure or steered or rule_wants) else ""
    # The rule's products need only a share of the rows; the damping rule's ratio compares the loss on
    # the rows the step's prediction was made for: the whole batch, or the quadratic rule's share.
    whole = ratio_wanted and not steered
    return BatchEvaluator(model, batch, 1.0 if whole else rule_batch_fraction), ""


def not_replayable_message(problem: str, step_rule: str, damping_rule: str, rule_interval: int,
                           steered: bool, rule_wants: bool) -> str:
    if steered or rule_wants:
        rule = f"step_rule={step_rule!r}" + ("" if steered else f" with rule_interval={rule_interval}")
        fallback = "the step falls back to the blocks' own model with the KL bound"
    else:
        rule, fallback = f"damping_rule={damping_rule!r}", "lambda stays as it is"
    return (f"{rule} evaluates the loss on the recorded batch, but {problem}, so {fallback}. Compute the loss "
            "with F.cross_entropy/F.mse_loss/F.binary_cross_entropy_with_logits (or their criterion objects) "
            "from the model's output, or pass step(closure) for the damping rule.")


def loss_change(result, evaluator, closure, loss, no_capture: Callable,
                damping_of: Callable[[object], float],
                all_agree: Callable[[bool], bool] = lambda flag: flag) -> Optional[Tuple[float, float, float]]:
    """``(loss before, loss after, predicted change)`` of the step just written, on the same rows; None
    when there is nothing to measure it on.

    With a closure the closure defines the loss and is evaluated again (inside ``no_capture()``), unless
    the recorded batch's replay gives the same loss (:func:`replay_measures_closure_loss`): a forward
    without gradients then does, instead of the closure's forward and backward.  Without a closure the
    evaluator replays the recorded batch.  The prediction is the rule's own, or the blocks'
    quadratic model of the applied updates.  ``all_agree(flag)``: whether every data-parallel rank
    says ``flag`` (a closure's backward under DDP is a collective: all ranks must call it, or none).
    """
    # Before any re-evaluation: a closure's backward overwrites the gradients the model uses.
    predicted = result.predicted_change if result.predicted_change is not None \
        else model_change(result.updates, result.update_scale, damping_of)
    if closure is not None and loss is not None and all_agree(
            evaluator is not None and replay_measures_closure_loss(evaluator, float(loss))):
        closure = None  # the replay's forward without gradients measures the same loss as the closure's
    if closure is not None and loss is not None:
        before = float(loss)
        with no_capture(), torch.enable_grad():
            after = float(closure().detach())
    elif evaluator is not None:
        before = result.loss_before if result.loss_before is not None else evaluator.recorded_loss()
        after = evaluator.loss()
    else:
        return None
    return before, after, predicted


def replay_measures_closure_loss(evaluator, closure_loss: float) -> bool:
    """Whether replaying the recorded batch gives the closure's loss: every row evaluated, and the recorded
    loss calls add up to the closure's value (no penalty or other term beside them; a relative 1e-5
    covers float32 rounding of one loss value summed in float64, common practice)."""
    if evaluator.subsampled:
        return False
    recorded = evaluator.recorded_loss()
    return recorded is not None and math.isfinite(closure_loss) \
        and abs(recorded - closure_loss) <= 1e-5 * max(abs(closure_loss), 1e-12)


def model_change(applied: Dict[object, torch.Tensor], scale: Dict[object, float],
                 damping_of: Callable[[object], float]) -> float:
    """``M(delta) = grad^T delta + delta^T C delta / 2`` for the block updates just applied,
    ``delta = scale * u`` (``scale`` 1 where absent)."""
    terms = []
    for block, update in applied.items():
        s = scale.get(block, 1.0)
        layer = block.layer
        grad = layer.gradient_matrix(layer.weight.grad, layer.bias.grad if layer.has_bias else None)
        curved = block.damped_product(update, damping_of(block))
        terms.append(s * (grad * update).sum(dtype=torch.float64)
                     + 0.5 * s * s * (update * curved).sum(dtype=torch.float64))
    return float(torch.stack(terms).sum()) if terms else 0.0  # one host sync for all blocks
