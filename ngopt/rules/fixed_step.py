"""``step_rule="fixed"``: the step the user sets, ``w -= lr * buf`` with ``buf = momentum * buf + nu * C^-1 g``.

``nu`` is the KL trust bound of each param group (:mod:`ngopt.rules.trust`).
"""
from __future__ import annotations

import torch

from ..fallback import heavy_ball
from .base import StepInputs, StepResult, norms
from .trust import kl_trust_scale


class FixedStep:
    name = "fixed"
    needs_batch = False            # evaluates nothing on the recorded batch
    keeps_previous_update = False  # heavy-ball momentum lives in its own buffer

    def __init__(self, interval: int = 1, batch_fraction: float = 1.0):
        pass

    def wants_batch(self, step_index: int) -> bool:
        return False

    def updates(self, inputs: StepInputs) -> StepResult:
        updates, scales, scale_of, states = {}, {}, {}, {}
        kl = predicted = 0.0
        for index, blocks in inputs.blocks_by_group.items():
            group = inputs.groups[index]
            dot = sum(inputs.dots[b][0] for b in blocks)
            nu = kl_trust_scale(dot, group["lr"], group["max_step_kl"])
            scales[index] = nu
            step = group["lr"] * nu
            kl += 0.5 * step * step * dot
            predicted += -step * dot + 0.5 * step * step * dot  # the blocks' model, momentum left out
            for block in blocks:
                scale_of[block] = nu
            proposals = [inputs.directions[block][1] for block in blocks]
            # One fused call per operation over the group's blocks (small layers are per-call overhead).
            buffers = [block.state.get("momentum_buffer") for block in blocks]
            directions = heavy_ball(buffers, proposals, group["momentum"], scale=nu)
            updates.update(zip(blocks, torch._foreach_mul(directions, -group["lr"])))
            if group["momentum"]:
                # Kept only if the step is written; a non-finite buffer makes its update non-finite
                # (lr is finite), so the optimizer's check of the updates covers the buffers too.
                states.update((block, {"momentum_buffer": d}) for block, d in zip(blocks, directions))
        diagnostics = norms(inputs, scale_of)
        diagnostics.update(trust_scale=min(scales.values()) if scales else 1.0, trust_scale_by_group=scales,
                           kl_estimate=kl, predicted_change=predicted)
        # No predicted_change: the damping rule measures the update actually applied, momentum included.
        return StepResult(updates, diagnostics, states=states)

    def state_dict(self) -> dict:
        return {}

    def load_state_dict(self, state: dict) -> None:
        pass
