"""``step_rule="fixed"``: the step the user sets, ``w -= lr * buf`` with ``buf = momentum * buf + nu * C^-1 g``.

``nu`` is the KL trust bound of each param group (:mod:`ngopt.rules.trust`).

The change the quadratic model predicts for the applied update ``delta = -lr buf``,

    M(delta) = g^T delta + 1/2 delta^T C delta = -lr g^T buf + 1/2 lr^2 buf^T C buf,

is kept without any product with the curvature: with ``p = C^-1 g`` and ``C p = g``,

    buf_t^T C buf_t = m^2 buf_{t-1}^T C buf_{t-1} + 2 m nu buf_{t-1}^T g_t + nu^2 p_t^T g_t,

a recursion in dot products the step computes anyway (plus one, ``buf_{t-1}^T g_t``).  Each term uses
the curvature of the step that added it (the one its proposal was computed with), so across a refresh
or an inversion the quadratic form mixes the curvatures the buffer was built from.

Three bounds on ``nu``: the loss bound (:mod:`ngopt.rules.loss_bound`) keeps the whole step's
first-order predicted decrease, ``sum_groups lr nu p^T g``, at most twice the distance of the step's
loss to ``loss_floor``; and two bounds on the step's KL.  ``max_step_kl`` holds in the blocks' own
model on every step.  That model drops every product between blocks and rests on statistics of
earlier batches, so it can understate the step's true KL by one or two orders of magnitude: over the
benchmark's built-in and held-out tasks the median ratio runs from 0.7 to 26 and the 90th percentile
up to 83 (``scripts/fisher_length_ratio.py``), and on those tasks the longer steps it allows pay.
Every ``rule_interval = k`` steps (0: never) the rule measures the proposal's length in the exact
Fisher of the whole model on the recorded batch (:func:`ngopt.rules.trust.fisher_length_ratio`,
one forward-mode pass on ``rule_batch_fraction`` of the rows), and up to the next check it also keeps
the blocks' KL times the measured ratio at most ``max_exact_step_kl`` (a ceiling a few times the
first bound: it binds only where the blocks' model is far off).

Off by default: the measurements cost a forward-mode pass each, and the ratio does not tell the
long steps that pay from those that fit each batch's noise (a BERT-style classifier at batch 8,
README *Cautions*): a ceiling low enough for the second binds on the first too.
"""
from __future__ import annotations

import math
import warnings

import torch

from ..fallback import heavy_ball
from ..linalg import flat_dot
from ..schedule import rule_evaluation_due
from .base import StepInputs, StepResult, norms
from .loss_bound import loss_bound_scale
from .trust import fisher_length_ratio, kl_trust_scale


def _buffer_gradient_dots(blocks, buffers, inputs: StepInputs) -> list:
    """``buf_{t-1}^T g_t`` per block (0 without a buffer): one host sync for all."""
    present = [i for i, b in enumerate(buffers) if b is not None]
    values = [0.0] * len(blocks)
    if present:
        # No parameter-sized product or float64 copy: a large layer would pay both on every step.
        dots = torch.stack([flat_dot(buffers[i], inputs.directions[blocks[i]][0])
                            for i in present]).tolist()
        for i, value in zip(present, dots):
            values[i] = value
    return values


def _momentum(blocks: list, inputs: StepInputs, momentum: float, nu: float):
    """``(new buffers, buf^T g, packs used)``, the buffers and dots in ``blocks`` order: the new momentum
    buffers ``momentum * buf + nu * p`` written into the proposals, and each block's previous buffer
    times its gradient matrix.  A pack of small blocks (``ngopt/packing.py``) takes a few calls on its
    stacks; the other blocks one fused call per operation over all of them."""
    new, cross, used, members = {}, {}, [], set(blocks)
    for pack, index in inputs.packs:
        if pack.blocks[0] not in members:  # another param group's pack
            continue
        old = pack.buffers(index, [b.state.get("momentum_buffer") for b in pack.blocks]) if momentum else None
        dots = (old * pack.gradients).sum((1, 2)).tolist() if old is not None else [0.0] * len(pack.blocks)
        heavy_ball([old], [pack.stacks[index]], momentum, scale=nu, reuse_directions=True)  # into the stack
        new.update(zip(pack.blocks, pack.regions[index]))
        cross.update(zip(pack.blocks, dots))
        used.append((pack, index))
    rest = [block for block in blocks if block not in new]
    if rest:
        buffers = [block.state.get("momentum_buffer") for block in rest]
        # The proposals are this step's own tensors (step_pipeline.proposals): the new buffers reuse them.
        proposals = [inputs.directions[block][1] for block in rest]
        new.update(zip(rest, heavy_ball(buffers, proposals, momentum, scale=nu, reuse_directions=True)))
        cross.update(zip(rest, _buffer_gradient_dots(rest, buffers, inputs) if momentum else [0.0] * len(rest)))
    return [new[block] for block in blocks], [cross[block] for block in blocks], used


class FixedStep:
    name = "fixed"
    packs_blocks = True            # small blocks may come as packs (ngopt/packing.py): _momentum works on them
    needs_batch = False            # evaluates nothing on the recorded batch
    keeps_previous_update = False  # heavy-ball momentum lives in its own buffer

    def __init__(self, interval: int = 0):
        self.interval = interval            # steps between checks of the KL bound; 0: never
        self.length_ratio = 1.0             # exact / blocks' length of the proposal at the latest check
        self.checks = 0
        self.unavailable = False            # the model has an operation without forward-mode rules

    def wants_batch(self, step_index: int) -> bool:
        return self.interval > 0 and not self.unavailable and rule_evaluation_due(step_index, self.interval)

    def _check(self, inputs: StepInputs) -> None:
        try:
            ratio = fisher_length_ratio(inputs)
        except (NotImplementedError, RuntimeError) as error:  # an operation without a forward-mode rule
            self.unavailable = True
            warnings.warn(f"step_rule='fixed' with rule_interval={self.interval}: the model's Jacobian-vector "
                          f"products failed ({error}); the KL bound rests on the blocks' own model from now on.",
                          stacklevel=6)
            return
        if math.isfinite(ratio) and ratio > 0:  # else the last measurement stands
            self.length_ratio = ratio
            self.checks += 1

    def _kl_scales(self, inputs: StepInputs, group_dots: dict) -> dict:
        """``nu`` of each param group from its KL bounds, given its ``p^T g``."""
        scales = {}
        for index, dot in group_dots.items():
            group = inputs.groups[index]
            nu = kl_trust_scale(dot, group["lr"], group["max_step_kl"])
            if self.checks:  # the ceiling on the KL in the exact Fisher, through the latest measured ratio
                nu = min(nu, kl_trust_scale(dot * self.length_ratio, group["lr"], group["max_exact_step_kl"]))
            scales[index] = nu
        return scales

    def updates(self, inputs: StepInputs) -> StepResult:
        if inputs.evaluator is not None and self.wants_batch(inputs.step_index):
            self._check(inputs)
        group_dots = {i: sum(inputs.dots[b][0] for b in blocks) for i, blocks in inputs.blocks_by_group.items()}
        scales = self._kl_scales(inputs, group_dots)
        # The loss bound acts on the whole step: its first-order predicted decrease, over every group.
        decrease = sum(inputs.groups[i]["lr"] * scales[i] * dot for i, dot in group_dots.items())
        bound = loss_bound_scale(decrease, inputs.loss_gap)
        updates, update_scale, scale_of, states, used_packs = {}, {}, {}, {}, []
        kl = predicted = 0.0
        for index, blocks in inputs.blocks_by_group.items():
            group = inputs.groups[index]
            lr, momentum = group["lr"], group["momentum"]
            dot = group_dots[index]
            nu = scales[index] * bound
            step = lr * nu
            kl += 0.5 * step * step * dot * self.length_ratio
            for block in blocks:
                scale_of[block] = nu
            directions, cross, packs = _momentum(blocks, inputs, momentum, nu)
            used_packs += packs
            # w -= lr * buf: the new buffer itself with its factor, not a scaled copy of it.
            updates.update(zip(blocks, directions))
            update_scale.update((block, -lr) for block in blocks)
            curvatures = []
            for block, buffer_dot in zip(blocks, cross):
                previous = float(block.state["buffer_curvature"]) if momentum and "buffer_curvature" in block.state \
                    else 0.0
                curvature = momentum ** 2 * previous + 2 * momentum * nu * buffer_dot + nu ** 2 * inputs.dots[block][0]
                predicted += -lr * (momentum * buffer_dot + nu * inputs.dots[block][0]) + 0.5 * lr * lr * curvature
                curvatures.append(curvature)
            if momentum:
                # Kept only if the step is written; a non-finite buffer makes its update non-finite
                # (lr is finite), so the optimizer's check of the updates covers the buffers too.
                # The curvatures stay Python floats (a tensor for them cost a call per group and step).
                for block, d, curvature in zip(blocks, directions, curvatures):
                    states[block] = {"buffer_curvature": curvature, "momentum_buffer": d}
        diagnostics = norms(inputs, scale_of)
        diagnostics.update(trust_scale=min(scales.values()) if scales else 1.0, trust_scale_by_group=scales,
                           loss_bound_scale=None if inputs.loss_gap is None else bound,
                           kl_estimate=kl, predicted_change=predicted,
                           fisher_length_ratio=self.length_ratio if self.checks else None)
        return StepResult(updates, diagnostics, predicted_change=predicted, states=states, update_scale=update_scale,
                          packs=used_packs)

    def state_dict(self) -> dict:
        return {"length_ratio": self.length_ratio, "checks": self.checks}

    def load_state_dict(self, state: dict) -> None:
        self.length_ratio = float(state.get("length_ratio", 1.0))
        self.checks = int(state.get("checks", 0))
