"""``FisherDescent``: a ``torch.optim.Optimizer`` that preconditions by a per-layer Fisher.

The optimizer only schedules and composes: capture hooks (``capture.py``)
record layer inputs and output gradients, curvature blocks (``blocks/``) turn
them into statistics, inverses and preconditioned directions, and the step rule
(``step_control.py``, ``fallback.py``) scales and applies the update.

One ``step()``:

1. every ``stats_interval`` steps the forward/backward just run was recorded;
   its statistics are blended into the running averages (the first refresh
   sets them outright);
2. every ``inverse_interval`` steps the damped factors are inverted on the CPU in
   float64;
3. each block's gradient (plus ``weight_decay * w``) is preconditioned,
   ``delta = C^-1 grad``; the KL trust bound scales all blocks of a group by
   ``nu``; heavy-ball momentum ``buf = momentum * buf + nu * delta``;
   ``w -= lr * buf``;
4. parameters outside any block take the fallback rule.

Nothing is written until everything is known to be finite: a step with a
non-finite loss, gradient, statistic or update leaves weights and curvature
state untouched and is counted in ``diagnostics()["skipped_steps"]``.
"""
from __future__ import annotations

import contextlib
import math
import time
import warnings
from collections import ChainMap
from typing import Callable, Dict, List, Optional

import torch
from torch import nn

from . import fallback as fallback_rules
from .blocks.base import LayerCurvature
from .blocks.factory import STRUCTURES, make_block
from .blocks.layers import adapter_for
from .capture import CaptureHooks, FisherSource
from .likelihoods import likelihood_for
from .spectra import block_summary
from .step_control import kl_trust_scale, levenberg_marquardt_damping, reduction_ratio
from .validation import check_arguments

SKIP_REASONS = ("nonfinite_loss", "nonfinite_gradient", "nonfinite_statistics", "nonfinite_update")
TIME_KEYS = ("statistics", "inversion", "precondition", "fallback", "step_total")
DEFAULT_FALLBACK_LR_SCALE = {"sgd": 1.0, "adam": 1e-2}


class FisherDescent(torch.optim.Optimizer):
    """Natural-gradient descent with Kronecker-factored (or diagonal) Fisher blocks.

    See the README for every option; the short version:

    Args:
        model: the ``nn.Module`` being trained. Its ``nn.Linear``, ``nn.Conv1d``/``nn.Conv2d``
            (groups=1), ``nn.Embedding``, ``nn.LayerNorm`` and ``nn.BatchNorm*`` layers get
            curvature blocks; other parameters use ``fallback``.
        loss_fn: the training criterion object with its own reduction (needed for
            ``fisher='sampled'`` and ``'exact'``).
        lr: step size on the preconditioned direction (per group).
        momentum: heavy-ball momentum on the preconditioned update (per group).
        weight_decay: L2 term added to the gradient before preconditioning (per group).
        damping: Tikhonov damping ``lambda`` added to the curvature (per group).
        fisher: ``'sampled'``, ``'exact'`` or ``'empirical'``.
        structure: ``'kfac'``, ``'ekfac'`` or ``'diag'``.
        stats_interval: steps between curvature-statistics refreshes.
        inverse_interval: steps between inversions of the factors.
        stats_memory: weight of the old statistics in the running average.
        max_step_kl: bound on the step's KL divergence under the quadratic model (None: off).
        damping_rule: ``'fixed'``, or ``'lm'``: Levenberg-Marquardt adaptation of ``damping``
            from the reduction ratio; needs ``step(closure)``.
        fallback: ``'sgd'`` or ``'adam'`` for parameters outside any block (per group).
        fallback_lr_scale: the fallback rule's step is ``lr * fallback_lr_scale``
            (default 1 for ``'sgd'``, 1e-2 for ``'adam'``; per group).
        fisher_samples: Monte Carlo draws per example for ``fisher='sampled'``.
        damping_range: bounds for ``damping_rule='lm'``.
        damping_interval: steps between Levenberg-Marquardt updates of ``damping``.
        param_groups: optional list of dicts as in ``torch.optim`` (``{"params": [...], "lr": ...}``)
            over the model's parameters; by default one group holds them all.
        seed: seed of the private generator used for sampled targets
            (default ``torch.initial_seed()``; the global RNG is never consumed).
        weight_sharing: how the Kronecker factors treat a layer applied at many
            positions (sequences, convolutions): ``'expand'`` (positions as
            examples) or ``'reduce'`` (summed per example first).
    """

    def __init__(self, model: nn.Module, loss_fn=None, *, lr: float = 0.3, momentum: float = 0.5,
                 weight_decay: float = 0.0, damping: float = 1e-2, fisher: str = "sampled",
                 structure: str = "kfac", stats_interval: int = 10, inverse_interval: int = 20,
                 stats_memory: float = 0.9, max_step_kl: Optional[float] = 1e-2, damping_rule: str = "fixed",
                 fallback: str = "sgd", fallback_lr_scale: Optional[float] = None, fisher_samples: int = 1,
                 damping_range=(1e-6, 1e2), damping_interval: int = 5, param_groups=None,
                 seed: Optional[int] = None, weight_sharing: str = "expand"):
        check_arguments(model=model, loss_fn=loss_fn, lr=lr, momentum=momentum, weight_decay=weight_decay,
                        damping=damping, fisher=fisher, structure=structure, stats_interval=stats_interval,
                        inverse_interval=inverse_interval, stats_memory=stats_memory, max_step_kl=max_step_kl,
                        damping_rule=damping_rule, fallback=fallback, fallback_lr_scale=fallback_lr_scale,
                        fisher_samples=fisher_samples, damping_range=damping_range, damping_interval=damping_interval,
                        seed=seed, param_groups=param_groups, weight_sharing=weight_sharing)
        source = None
        if fisher != "empirical":
            if loss_fn is None:
                raise ValueError(f"loss_fn: fisher={fisher!r} needs the training criterion "
                                 "(e.g. nn.CrossEntropyLoss()); pass loss_fn or use fisher='empirical'")
            source = FisherSource(fisher, likelihood_for(loss_fn), fisher_samples, self._generator_for)
        else:
            warnings.warn("fisher='empirical' uses the loss gradients themselves: it is not the curvature in "
                          "general and can point steps the wrong way near and far from a minimum "
                          "(Kunstner et al. 2019). Prefer fisher='sampled'.", stacklevel=2)
        if damping < 1e-6:
            warnings.warn(f"damping={damping:g} is very small: near-singular factors then make huge steps; "
                          "values around 1e-3..1e-1 are the usual range", stacklevel=2)

        defaults = dict(lr=lr, momentum=momentum, weight_decay=weight_decay, damping=damping,
                        max_step_kl=max_step_kl, fallback=fallback, fallback_lr_scale=fallback_lr_scale)
        groups = param_groups if param_groups is not None else [{"params": list(model.parameters())}]
        super().__init__(groups, defaults)
        for group in self.param_groups:
            check_arguments(**{key: group[key] for key in defaults})
            if group["fallback_lr_scale"] is None:
                group["fallback_lr_scale"] = DEFAULT_FALLBACK_LR_SCALE[group["fallback"]]

        self.model = getattr(model, "module", model) if _is_wrapper(model) else model
        self.fisher = fisher
        self.structure = structure
        self.weight_sharing = weight_sharing
        self.stats_interval = stats_interval
        self.inverse_interval = inverse_interval
        self.stats_memory = stats_memory
        self.damping_rule = damping_rule
        self.damping_range = tuple(float(x) for x in damping_range)
        self.damping_interval = damping_interval
        self.track_spectra = False
        # Set by ngopt.distributed to share statistics and inversions across ranks; None = one process.
        self.communicator = None
        self._seed = int(torch.initial_seed() if seed is None else seed)
        self._generator: Optional[torch.Generator] = None
        self._steps = 0
        self._skipped = {reason: 0 for reason in SKIP_REASONS}
        self._times = {key: 0.0 for key in TIME_KEYS}
        self._last_update: dict = {}
        self._warned_uninitialised = False
        self._applied: dict = {}

        self.blocks: Dict[str, LayerCurvature] = self._build_blocks()
        self._hooks = CaptureHooks(self.model, {b.layer.module: b for b in self.blocks.values()}, source,
                                   loss_fn)
        self._hooks.armed = True
        if isinstance(model, nn.parallel.DistributedDataParallel) and self.attach_data_parallel is not None:
            # Share statistics and inversions over DDP's own group, so that the user's loop needs
            # nothing beyond the DDP wrapping; ngopt.distributed.share_curvature(opt, ...) replaces it.
            self.attach_data_parallel(self, model.process_group)

    # ------------------------------------------------------------------ construction
    def _build_blocks(self) -> Dict[str, LayerCurvature]:
        group_of = {p: i for i, g in enumerate(self.param_groups) for p in g["params"]}
        layers = []
        for name, module in self.model.named_modules():
            if isinstance(module, nn.EmbeddingBag) and module.sparse and module.weight in group_of \
                    and module.weight.requires_grad:
                # The finiteness checks and the fallback rules work on dense gradients only.
                raise ValueError(f"{name}: nn.EmbeddingBag(sparse=True) is not supported (sparse gradients); "
                                 "use sparse=False or freeze it")
            layer = adapter_for(module, name or type(module).__name__)
            if layer is None or not layer.weight.requires_grad or layer.weight not in group_of:
                continue
            if layer.has_bias and not layer.bias.requires_grad:
                layer.bias = None  # a frozen bias is left alone; the block covers the weight only
            if layer.has_bias and group_of.get(layer.bias) != group_of[layer.weight]:
                raise ValueError(f"param_groups: {name}.weight and {name}.bias must be in the same group")
            layers.append(layer)
        blocks: Dict[str, LayerCurvature] = {}
        for layer in _without_tied_parameters(layers):
            blocks[layer.name] = make_block(layer, self.structure, self.state[layer.weight],
                                            self.weight_sharing)
        self._block_group = {b: group_of[b.layer.weight] for b in blocks.values()}
        self._block_params = {p for b in blocks.values() for p in b.layer.params()}
        return blocks

    def _generator_for(self, device: torch.device) -> torch.Generator:
        if self._generator is None or self._generator.device != device:
            self._generator = torch.Generator(device=device)
            self._generator.manual_seed(self._seed)
        return self._generator

    def __repr__(self) -> str:
        lines = [f"FisherDescent(fisher={self.fisher!r}, structure={self.structure!r}, "
                 f"stats_interval={self.stats_interval}, inverse_interval={self.inverse_interval}, "
                 f"stats_memory={self.stats_memory}, damping_rule={self.damping_rule!r})"]
        for i, group in enumerate(self.param_groups):
            settings = ", ".join(f"{k}={group[k]}" for k in ("lr", "momentum", "weight_decay", "damping",
                                                               "max_step_kl", "fallback"))
            lines.append(f"  group {i}: {settings}")
        for name, block in self.blocks.items():
            lines.append(f"  {name}: {block.describe()}")
        others = [p for g in self.param_groups for p in g["params"] if p not in self._block_params]
        if others:
            count = sum(p.numel() for p in others)
            lines.append(f"  fallback rule: {len(others)} tensors, {count} parameters")
        return "\n".join(lines)

    # ------------------------------------------------------------------ the step
    @torch.no_grad()
    def step(self, closure: Optional[Callable[[], torch.Tensor]] = None):
        """One natural-gradient step; returns ``closure()``'s loss when a closure is given."""
        if self.damping_rule == "lm" and closure is None:
            self._hooks.discard()  # the refused step must not leave its batch behind for the next one
            raise ValueError("damping_rule='lm' needs step(closure): the closure re-evaluates the loss on the "
                             "same batch to measure the reduction ratio")
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        started = time.perf_counter()
        step_index = self._steps
        reason = self._attempt(loss, step_index)
        if loss is not None and self._last_update:
            self._last_update["loss"] = float(loss)
        if reason is not None:
            self._skip(reason)
        elif self.damping_rule == "lm" and (step_index + 1) % self.damping_interval == 0:
            self._adapt_damping(closure, loss)
        self._steps += 1
        self._hooks.armed = self._statistics_due(self._steps)
        self._times["step_total"] += time.perf_counter() - started
        return loss

    def _statistics_due(self, step_index: int) -> bool:
        return step_index % self.stats_interval == 0 or not all(b.has_statistics for b in self.blocks.values())

    def _attempt(self, loss, step_index: int) -> Optional[str]:
        """Compute the whole step, then write it; return a skip reason instead of writing."""
        if loss is not None and not self._finite_everywhere(loss):
            self._hooks.discard()
            return "nonfinite_loss"
        grads = [p.grad for g in self.param_groups for p in g["params"] if p.grad is not None]
        if not _all_finite(grads):
            self._hooks.discard()
            return "nonfinite_gradient"

        try:
            tick = time.perf_counter()
            statistics, forwards = self._new_statistics()
            self._times["statistics"] += time.perf_counter() - tick
            if statistics is None:
                return "nonfinite_statistics"
            tick = time.perf_counter()
            inverses = self._new_inverses(statistics, step_index)
            self._times["inversion"] += time.perf_counter() - tick
            if inverses is None:
                return "nonfinite_statistics"
            tick = time.perf_counter()
            if not self._add_projected_statistics(statistics, inverses, forwards):
                return "nonfinite_statistics"
            self._times["statistics"] += time.perf_counter() - tick
        finally:
            for block in self.blocks.values():
                block.clear_pending()

        tick = time.perf_counter()
        directions = self._block_directions(statistics, inverses)
        self._times["precondition"] += time.perf_counter() - tick
        if directions is None:
            return "nonfinite_update"

        for block, tensors in statistics.items():
            block.commit(tensors)
        for block, (tensors, info) in inverses.items():
            block.commit(tensors)
            block.info = dict(info, inversion_step=step_index)
        self._apply_block_updates(directions)
        tick = time.perf_counter()
        self._apply_fallback()
        self._times["fallback"] += time.perf_counter() - tick
        return None

    def _finite_everywhere(self, loss) -> bool:
        """Whether the loss is finite on every rank: a skip must be a joint decision."""
        finite = bool(torch.isfinite(torch.as_tensor(loss)).all())
        if self.communicator is not None:
            finite = self.communicator.average_scalars(float(finite))[0] == 1.0
        return finite

    def _new_statistics(self):
        """``({block: blended statistics}, {block: forwards seen})``; statistics None if non-finite.

        The captures stay pending: blocks with projected statistics need them once more.
        """
        forwards = self._hooks.hand_over()
        batches = {}
        for block in self.blocks.values():
            if block in forwards:
                batch = block.batch_statistics(forwards[block])
                if batch is not None:
                    batches[block] = batch
        if self.communicator is not None:
            batches = self.communicator.average_statistics(self, batches)
        statistics = {block: block.blend(batch, self.stats_memory) for block, batch in batches.items()}
        tensors = [t for stats in statistics.values() for t in stats.values()]
        if not _all_finite(tensors):
            return None, forwards
        return statistics, forwards

    def _add_projected_statistics(self, statistics, inverses, forwards) -> bool:
        """Second phase for blocks whose statistics live in a basis the inversion makes (EKFAC).

        Adds them to ``statistics``; False if any is non-finite.
        """
        blocks = [b for b in self.blocks.values() if b.projected_keys and (b in statistics or b in inverses)]
        if not blocks:
            return True
        views = {b: self._tentative_view(b, statistics, inverses) for b in blocks}
        batches = {}
        for block in blocks:
            if block in statistics and block in forwards:
                batch = block.projected_batch_statistics(views[block], forwards[block])
                if batch is not None:
                    batches[block] = batch
        if self.communicator is not None:
            batches = self.communicator.average_statistics(self, batches, projected=True)
        new = {}
        for block in blocks:
            new[block] = block.blend_projected(batches.get(block), views[block], block in inverses,
                                               self.stats_memory)
        if not _all_finite([t for tensors in new.values() for t in tensors.values()]):
            return False
        for block, tensors in new.items():
            if tensors:
                statistics.setdefault(block, {}).update(tensors)
        return True

    @staticmethod
    def _tentative_view(block, statistics, inverses):
        """The block's tensors as this step will leave them: new ones first, then the committed state."""
        if block not in inverses and block not in statistics:
            return block.state
        return ChainMap(inverses[block][0] if block in inverses else {}, statistics.get(block, {}), block.state)

    def _new_inverses(self, statistics, step_index: int):
        """``{block: (tensors, info)}`` for the blocks due an inversion, or None if non-finite."""
        due = step_index % self.inverse_interval == 0
        jobs = []
        for block in self.blocks.values():
            fresh = block in statistics
            if (due and (fresh or block.has_statistics)) or (fresh and not block.has_inverse):
                damping = self.param_groups[self._block_group[block]]["damping"]
                jobs.append((block, statistics[block] if fresh else block.state, damping))
        if self.communicator is not None:
            inverses = self.communicator.invert(self, jobs)
        else:
            inverses = {block: block.prepare_inverse(stats, damping, self.track_spectra)
                        for block, stats, damping in jobs}
        tensors = [t for new, _ in inverses.values() for t in new.values()]
        if not _all_finite(tensors):
            return None
        return inverses

    def _block_directions(self, statistics, inverses):
        """``{block: (grad_matrix, nu * delta)}`` for every block with a gradient, or None if non-finite."""
        directions = {}
        per_group: Dict[int, List] = {}
        for block in self.blocks.values():
            layer = block.layer
            if layer.weight.grad is None:
                continue
            group = self.param_groups[self._block_group[block]]
            weight_grad = layer.weight.grad
            bias_grad = layer.bias.grad if layer.has_bias else None
            if group["weight_decay"]:
                weight_grad = weight_grad.add(layer.weight, alpha=group["weight_decay"])
                if bias_grad is not None:
                    bias_grad = bias_grad.add(layer.bias, alpha=group["weight_decay"])
            grad_matrix = layer.gradient_matrix(weight_grad, bias_grad)
            view = self._tentative_view(block, statistics, inverses)
            if all(key in view for key in block.inverse_keys):
                delta = block.precondition(grad_matrix, group["damping"], view)
            else:
                self._warn_uninitialised(layer.name)
                delta = grad_matrix
            directions[block] = (grad_matrix, delta)
            per_group.setdefault(self._block_group[block], []).append(block)
        if not directions:
            self._last_update = {}
            return directions

        # One reduction for all the scalars the step needs: <delta, g>, |delta|^2, |g|^2 per block.
        order = list(directions)
        scalars = []
        for grad_matrix, delta in (directions[b] for b in order):
            g, d = grad_matrix.reshape(-1), delta.reshape(-1)
            scalars += [torch.dot(d, g), torch.dot(d, d), torch.dot(g, g)]
        sums = torch.stack(scalars).double().cpu()
        if not bool(torch.isfinite(sums).all()):
            return None
        values = sums.tolist()
        per_block = {block: values[3 * i:3 * i + 3] for i, block in enumerate(order)}
        self._record_update(per_group, per_block)
        scaled = {}
        for index, blocks in per_group.items():
            nu = self._last_update["trust_scale_by_group"][index]
            for block in blocks:
                grad_matrix, delta = directions[block]
                scaled[block] = (grad_matrix, delta.mul_(nu) if nu != 1.0 else delta)
        return scaled

    def _record_update(self, per_group, per_block) -> None:
        dot = sum(v[0] for v in per_block.values())
        delta_sq = sum(v[1] for v in per_block.values())
        grad_sq = sum(v[2] for v in per_block.values())
        scales, kl, predicted, update_sq = {}, 0.0, 0.0, 0.0
        for index, blocks in per_group.items():
            group = self.param_groups[index]
            group_dot = sum(per_block[b][0] for b in blocks)
            nu = kl_trust_scale(group_dot, group["lr"], group["max_step_kl"])
            scales[index] = nu
            step = group["lr"] * nu
            kl += 0.5 * step * step * group_dot
            predicted += -step * group_dot + 0.5 * step * step * group_dot
            update_sq += nu * nu * sum(per_block[b][1] for b in blocks)
        denom = math.sqrt(delta_sq * grad_sq)
        group0 = self.param_groups[0]
        self._last_update = {
            "grad_norm": math.sqrt(grad_sq), "direction_norm": math.sqrt(update_sq),
            "cosine": dot / denom if denom > 0 else 0.0,
            "trust_scale": min(scales.values()), "trust_scale_by_group": scales,
            "kl_estimate": kl, "predicted_change": predicted, "reduction_ratio": None,
            "damping": group0["damping"], "lr": group0["lr"], "loss": None,
        }

    def _apply_block_updates(self, directions) -> None:
        self._applied = {}
        for block, (_, delta) in directions.items():
            group = self.param_groups[self._block_group[block]]
            weight_part, bias_part = block.layer.split_matrix(delta)
            moved = []
            for param, part in ((block.layer.weight, weight_part), (block.layer.bias, bias_part)):
                if part is None or param.grad is None:
                    moved.append(None)
                    continue
                moved.append(self._momentum_step(param, part, group["momentum"], group["lr"]))
            if self.damping_rule == "lm":  # the reduction ratio needs the change actually made
                self._applied[block] = block.layer.gradient_matrix(*moved).mul(-group["lr"])

    def _momentum_step(self, param, direction, momentum, lr) -> torch.Tensor:
        """``p -= lr * d`` with heavy-ball ``d``; returns ``d``."""
        direction = fallback_rules.heavy_ball(self.state[param], direction, momentum)
        param.add_(direction, alpha=-lr)
        return direction

    def _apply_fallback(self) -> None:
        for group in self.param_groups:
            params = [p for p in group["params"] if p.grad is not None and p not in self._block_params]
            if not params:
                continue
            grads = [p.grad for p in params]
            states = [self.state[p] for p in params]
            if group["fallback"] == "adam":
                directions = fallback_rules.adam_directions(params, grads, states,
                                                            weight_decay=group["weight_decay"])
            else:
                directions = fallback_rules.sgd_directions(params, grads, states, momentum=group["momentum"],
                                                           weight_decay=group["weight_decay"])
            step = group["lr"] * group["fallback_lr_scale"]
            torch._foreach_add_(params, directions, alpha=-step)

    def _warn_uninitialised(self, name: str) -> None:
        if not self._warned_uninitialised:
            warnings.warn(f"{name}: no curvature statistics yet (no recorded training forward/backward); "
                          "taking a plain gradient step for it", stacklevel=4)
            self._warned_uninitialised = True

    def _skip(self, reason: str) -> None:
        self._skipped[reason] += 1
        if sum(self._skipped.values()) == 1:
            warnings.warn(f"step {self._steps} skipped ({reason.replace('_', ' ')}); weights and curvature "
                          "state left unchanged. Further skips are counted in diagnostics()['skipped_steps'].",
                          stacklevel=3)

    # ------------------------------------------------------------------ damping adaptation
    def _adapt_damping(self, closure, loss_before) -> None:
        """Levenberg-Marquardt: compare the loss change with the quadratic model's prediction."""
        predicted = self._model_change()
        with self.no_capture(), torch.enable_grad():
            loss_after = closure()
        before, after = float(loss_before), float(loss_after)
        if self.communicator is not None:  # the ratio of the global batch, the same on every rank
            before, after = self.communicator.average_scalars(before, after)
        rho = reduction_ratio(before, after, predicted)
        for group in self.param_groups:
            group["damping"] = levenberg_marquardt_damping(group["damping"], rho, self.damping_interval,
                                                           self.damping_range)
        self._last_update["reduction_ratio"] = rho
        self._last_update["damping"] = self.param_groups[0]["damping"]

    def _model_change(self) -> float:
        """``M(delta) = grad^T delta + delta^T C delta / 2`` for the update just applied (blocks only)."""
        total = 0.0
        for block, delta in self._applied.items():
            layer = block.layer
            group = self.param_groups[self._block_group[block]]
            grad = layer.gradient_matrix(layer.weight.grad, layer.bias.grad if layer.has_bias else None)
            curved = block.damped_product(delta, group["damping"])
            total += float((grad * delta).sum() + 0.5 * (delta * curved).sum())
        return total

    # ------------------------------------------------------------------ hooks, diagnostics, state
    @contextlib.contextmanager
    def no_capture(self):
        """Within this block, forward passes record nothing (e.g. evaluation or probing in train mode)."""
        armed, self._hooks.armed = self._hooks.armed, False
        try:
            yield
        finally:
            self._hooks.armed = armed

    @property
    def steps_taken(self) -> int:
        """Number of ``step()`` calls so far, skipped ones included."""
        return self._steps

    def diagnostics(self) -> dict:
        """A plain-dict snapshot of the latest curvature diagnostics (keys documented in the README)."""
        layers = {name: block_summary(block, self.param_groups[self._block_group[block]]["damping"],
                                      with_spectra=self.track_spectra)
                  for name, block in self.blocks.items()}
        update = {k: v for k, v in self._last_update.items() if k != "trust_scale_by_group"}
        update.setdefault("reduction_ratio", None)
        return {"step": self._steps, "skipped_steps": sum(self._skipped.values()),
                "skip_reasons": dict(self._skipped), "layers": layers, "update": update,
                "time": dict(self._times, **self._hooks.seconds)}

    def state_dict(self) -> dict:
        state = super().state_dict()
        state["natural_gradient"] = {
            "steps": self._steps, "skipped": dict(self._skipped), "seed": self._seed,
            "generator_state": None if self._generator is None else self._generator.get_state(),
            "generator_device": None if self._generator is None else str(self._generator.device),
        }
        return state

    def load_state_dict(self, state_dict: dict) -> None:
        state_dict = dict(state_dict)
        extra = state_dict.pop("natural_gradient", None)
        super().load_state_dict(state_dict)
        for block in self.blocks.values():
            block.state = self.state[block.layer.weight]
        if extra is not None:
            self._steps = int(extra["steps"])
            self._skipped.update(extra["skipped"])
            self._seed = int(extra["seed"])
            self._generator = None
            if extra["generator_state"] is not None:
                self._generator = torch.Generator(device=extra["generator_device"])
                self._generator.set_state(extra["generator_state"].to(torch.uint8).cpu())
        self._hooks.armed = self._statistics_due(self._steps)

    def remove_hooks(self) -> None:
        """Detach the capture hooks from the model (the optimizer then only preconditions)."""
        self._hooks.remove()

    # ------------------------------------------------------------------ what a communicator needs
    #: ``attach_data_parallel(opt, process_group)`` runs at construction for a DistributedDataParallel
    #: model; ``ngopt.distributed`` sets it (``import ngopt`` imports that module), so that this module
    #: never imports the one that uses it.
    attach_data_parallel: Optional[Callable] = None

    @property
    def seed(self) -> int:
        """Seed of the generator for sampled targets (``seed=`` or ``torch.initial_seed()``; in ``state_dict``)."""
        return self._seed

    def statistics_due(self) -> bool:
        """Whether step number ``steps_taken`` (the one running, or the next) refreshes the statistics."""
        return self._statistics_due(self._steps)

    def sample_targets_with(self, generator_for: Optional[Callable[[torch.device], torch.Generator]]) -> None:
        """Draw sampled targets from ``generator_for(device)`` from now on; ``None`` restores the own generator.

        Nothing is drawn with ``fisher='empirical'``, so there it has no effect.
        """
        if self._hooks.source is not None:
            self._hooks.source.generator_for = self._generator_for if generator_for is None else generator_for


def _all_finite(tensors: List[torch.Tensor]) -> bool:
    """Whether every entry of every tensor is finite: one fused reduction and one host sync."""
    return not tensors or bool(torch.isfinite(torch.stack(torch._foreach_norm(tensors))).all())


def _without_tied_parameters(layers):
    """Layers whose parameters no other layer uses; tied ones go to the fallback rule, with a warning.

    A tied weight (e.g. an embedding reused as the output layer) gets gradients
    from two layer kinds at once, which neither block's curvature describes.
    """
    users: Dict[nn.Parameter, List[str]] = {}
    for layer in layers:
        for param in layer.params():
            users.setdefault(param, []).append(layer.name)
    kept = []
    for layer in layers:
        shared = sorted({name for p in layer.params() for name in users[p] if name != layer.name})
        if shared:
            warnings.warn(f"{layer.name}: its parameters are shared with {', '.join(shared)}; tied parameters "
                          "get no curvature block and use the fallback rule", stacklevel=4)
            continue
        kept.append(layer)
    return kept


def _is_wrapper(model: nn.Module) -> bool:
    return isinstance(model, (nn.DataParallel, nn.parallel.DistributedDataParallel))
