"""``FisherDescent``: a ``torch.optim.Optimizer`` that preconditions by a per-layer Fisher.

The optimizer only schedules and composes: capture hooks (``capture.py``)
record layer inputs and output gradients, curvature blocks (``blocks/``) turn
them into statistics, inverses and preconditioned directions, the step and damping
rules (``rules/``) scale the update and adapt lambda, and ``fallback.py`` moves the
parameters outside every block; ``step_pipeline.py`` holds the stages of one step
and the check-then-write of everything it changes.

One ``step()``:

1. every ``stats_interval`` steps the forward/backward just run was recorded;
   its statistics are blended into the running averages (the first refresh
   sets them outright);
2. every ``inverse_interval`` steps the damped factors are inverted on the CPU, in float64 or,
   where the damping keeps single-precision statistics well conditioned, float32 (``linalg.py``;
   all blocks on one step, or each on its own: ``inversion_schedule.py``);
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
from types import SimpleNamespace
from typing import Callable, Dict, List, Optional

import torch
from torch import nn

from . import diagnostic_keys
from . import schedule
from .assignment import CurvatureAssignment, ParameterCurvature
from .blocks.base import LayerCurvature
from .capture import CaptureHooks, FisherSource
from .inversion_schedule import INVERSION_SCHEDULES
from .likelihoods import likelihood_for
from .loss_scaling import UNSCALED_WITHOUT_SEEN_SCALE, step_loss_scale
from .loss_trend import LossTrend
from .packing import BlockPacker
from .batch_evaluation import evaluator_for, loss_change, not_replayable_message
from .rules import DAMPING_RULES, STEP_RULES
from .rules.damping import reduction_ratio
from .spectra import block_summary
from .step_pipeline import (PendingStep, add_gradient_scales, add_projected_statistics, all_finite,
                            fallback_changes, new_inverses, new_statistics, proposals)
from .validation import check_arguments

DEFAULT_FALLBACK_LR_SCALE = {"sgd": 1.0, "adam": 1e-2}
# Defaults that depend on the step rule: under "quadratic" lr multiplies the step the model chooses
# and momentum caps mu; under "fixed" they are the step size and heavy-ball coefficient themselves.
# rule_interval: steps between the quadratic rule's solves, or the fixed rule's measurements of the step's
# length in the exact Fisher for max_exact_step_kl (0: never; rules/fixed_step.py says why that is its default).
RULE_DEFAULTS = {"quadratic": {"lr": 1.0, "momentum": 0.9, "rule_interval": 1},
                 "fixed": {"lr": 0.3, "momentum": 0.5, "rule_interval": 0}}


class _PartTimer:
    """Adds the seconds its ``with`` block takes (exceptions included) to ``times[part]``.

    A class rather than a generator-based context manager: a step enters seven of these, at 1.0 us each
    against 2.4 (AMD EPYC, Python 3.11), about 10 us of a small network's half-millisecond plain step."""

    __slots__ = ("times", "part", "started")

    def __init__(self, times: dict, part: str):
        self.times, self.part, self.started = times, part, 0.0

    def __enter__(self) -> None:
        self.started = time.perf_counter()

    def __exit__(self, *exception) -> bool:
        self.times[self.part] += time.perf_counter() - self.started
        return False


class FisherDescent(torch.optim.Optimizer):
    """Natural-gradient descent with Kronecker-factored (or diagonal) Fisher blocks.

    See the README for every option; the short version:

    Args:
        model: the ``nn.Module`` being trained.  Every trainable parameter gets the curvature block
            of the operation that applies it in the training forward (a linear map in either weight
            orientation, a convolution, an embedding lookup, a normalization, an elementwise scale or
            shift; ``uses/``), whatever module makes the call; blocks are built at the first recorded
            training forward.  Other parameters use ``fallback`` (``curvature_assignment()`` says which).
        loss_fn: optional: the training criterion object.  Loss calls are found wherever they are
            made (this object, ``F.cross_entropy``/``F.mse_loss``/``F.binary_cross_entropy_with_logits``
            in the user's code or inside the model); without any, the curvature is taken at the
            model's output as if ``loss_fn`` were applied to it.
        lr: step size on the preconditioned direction (per group).
        momentum: heavy-ball momentum on the preconditioned update (per group).
        weight_decay: L2 term added to the gradient before preconditioning (per group).
        damping: Tikhonov damping ``lambda`` added to the curvature (per group).
        fisher: ``'sampled'``, ``'exact'`` or ``'empirical'``.
        structure: ``'kfac'``, ``'ekfac'``, ``'ekfac-gradient'`` (EKFAC's eigenbases with scales that
            follow every step's gradient, ``blocks/gradient_scales.py``) or ``'diag'``.
        stats_interval: steps between curvature-statistics refreshes.
        inverse_interval: steps between inversions of the factors.
        interval_warmup: the gaps between refreshes and between inversions start at one step and
            grow by one every ``interval_warmup`` of them until they reach their intervals (early
            training moves the curvature fastest); 0: fixed intervals from step 0.
        inverse_schedule: ``'together'`` (every block on the same step) or ``'staggered'``
            (each block on its own step of the interval, the cost spread evenly; see
            ``inversion_schedule.py``).
        stats_memory: weight of the old statistics in the running average.
        scale_memory: ``structure='ekfac-gradient'``: weight of the old gradient moment in its running
            average over steps (each step adds the squared gradient in the eigenbasis).
        max_step_kl: bound on the step's KL divergence in the curvature blocks' own model (None: off).
        max_exact_step_kl: ``step_rule='fixed'``: ceiling on the step's KL in the exact Fisher of the
            whole model, measured every ``rule_interval`` steps (None: off; per group; no effect with
            ``rule_interval=0``).  The blocks' model drops every product between blocks and can
            understate a step's KL tens of times over; the ceiling binds where it does.
        step_rule: ``'fixed'`` (lr, momentum and the KL bound as given) or ``'quadratic'`` (step size
            and momentum chosen on the exact Fisher of the recorded batch; ``rules/``).
        rule_interval: steps between the step rule's evaluations on the recorded batch: the
            quadratic rule's solves (default 1), or the fixed rule's measurements of the proposal's
            length in the exact Fisher for ``max_exact_step_kl`` (default 0: never; 5 is a good
            choice for small noisy batches, see ``rules/fixed_step.py``).
        rule_batch_fraction: share of the recorded batch (its first rows) those evaluations use.
        damping_rule: ``'fixed'``, or ``'lm'``: Levenberg-Marquardt adaptation of ``damping``
            from the reduction ratio, measured on the recorded batch (or through ``step(closure)``).
        fallback: ``'adam'`` (default: scale-free, safe where nothing tells a parameter's scale) or
            ``'sgd'`` for parameters outside any block (per group).
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
        stats_fraction: share of each recorded batch's examples the statistics are formed from
            (drawn uniformly, weighted to stay unbiased; 1.0 uses them all); None (default):
            0.25 for convolutions, whose input factors dominate a refresh, 1.0 for every other layer.
        cost_budget: each layer's curvature work per step (preconditioning, amortized statistics and
            inversions) is kept within this multiple of the larger of its own forward and backward
            and the model's mean layer's, at the batch seen: factors too costly become
            block-diagonal or the layer takes the exact diagonal (``ngopt/budget.py``); chosen again
            when the batch changes by more than 2x. None: whole factors wherever they fit in memory.
        max_factor_size: the largest factor kept whole (an input factor above it is split into
            blocks of this size, an output factor keeps its diagonal); None: no limit.
        pinned_structures: ``{block name: structure}`` fixing the structure of the named blocks
            (names as in ``print(opt)``) whatever the budget says.
        loss_floor: the lowest value the training loss can take (0 for cross-entropy, squared error
            and the logistic loss, also when they are summed or averaged).  ``step_rule='fixed'``
            keeps each step's first-order predicted decrease at most twice the loss's distance to it
            (``rules/loss_bound.py``), using the loss that ``backward()`` started from (or the
            closure's).  None: no such bound, for a loss that can go below 0 (a Gaussian
            log-likelihood with learned variance, say) or whose floor is not known.
    """

    # GradScaler hands this optimizer the loss scale and its overflow check (torch.optim's convention),
    # because the curvature statistics of a scaled backward carry the scale too.
    _step_supports_amp_scaling = True

    def __init__(self, model: nn.Module, loss_fn=None, *, lr: Optional[float] = None,
                 momentum: Optional[float] = None, weight_decay: float = 0.0, damping: float = 1e-2,
                 fisher: str = "sampled", structure: str = "kfac", stats_interval: int = 5,
                 inverse_interval: int = 10, stats_memory: float = 0.7, max_step_kl: Optional[float] = 1e-2,
                 max_exact_step_kl: Optional[float] = 5e-2,
                 damping_rule: str = "lm", damping_interval: int = 5, step_rule: str = "fixed",
                 rule_interval: Optional[int] = None, rule_batch_fraction: float = 0.25, fallback: str = "adam",
                 fallback_lr_scale: Optional[float] = None, fisher_samples: int = 1, damping_range=(1e-6, 1e2),
                 param_groups=None, seed: Optional[int] = None, weight_sharing: str = "expand",
                 stats_fraction: Optional[float] = None, inverse_schedule: str = "together",
                 cost_budget: Optional[float] = 1.0, max_factor_size: Optional[int] = 4096,
                 pinned_structures: Optional[dict] = None, interval_warmup: int = 2,
                 loss_floor: Optional[float] = 0.0, scale_memory: float = 0.9):
        check_arguments(step_rule=step_rule)
        lr = RULE_DEFAULTS[step_rule]["lr"] if lr is None else lr
        momentum = RULE_DEFAULTS[step_rule]["momentum"] if momentum is None else momentum
        rule_interval = RULE_DEFAULTS[step_rule]["rule_interval"] if rule_interval is None else rule_interval
        check_arguments(model=model, loss_fn=loss_fn, lr=lr, momentum=momentum, weight_decay=weight_decay,
                        damping=damping, fisher=fisher, structure=structure, stats_interval=stats_interval,
                        inverse_interval=inverse_interval, stats_memory=stats_memory, max_step_kl=max_step_kl,
                        max_exact_step_kl=max_exact_step_kl,
                        damping_rule=damping_rule, fallback=fallback, fallback_lr_scale=fallback_lr_scale,
                        fisher_samples=fisher_samples, damping_range=damping_range, damping_interval=damping_interval,
                        seed=seed, param_groups=param_groups, weight_sharing=weight_sharing,
                        rule_interval=rule_interval, rule_batch_fraction=rule_batch_fraction,
                        stats_fraction=stats_fraction, inverse_schedule=inverse_schedule,
                        cost_budget=cost_budget, max_factor_size=max_factor_size,
                        pinned_structures=pinned_structures, interval_warmup=interval_warmup,
                        loss_floor=loss_floor, scale_memory=scale_memory)
        if step_rule == "quadratic" and rule_interval == 0:
            raise ValueError("rule_interval must be >= 1 with step_rule='quadratic' (it sets the steps between "
                             "its solves), got 0")
        if loss_fn is not None and isinstance(loss_fn, nn.Module) and (fisher != "empirical"
                                                                       or STEP_RULES[step_rule].needs_batch):
            likelihood_for(loss_fn)  # a clear ValueError for a criterion without a closed form
        if fisher == "empirical":
            warnings.warn("fisher='empirical' uses the loss gradients themselves: it is not the curvature in "
                          "general and can point steps the wrong way near and far from a minimum "
                          "(Kunstner et al. 2019). Prefer fisher='sampled'.", stacklevel=2)
        if damping < 1e-6:
            warnings.warn(f"damping={damping:g} is very small: near-singular factors then make huge steps; "
                          "values around 1e-3..1e-1 are the usual range", stacklevel=2)
        _refuse_sparse_embeddings(model)

        self._new_parameters = False  # a group added after the first training forward awaits its blocks
        defaults = dict(lr=lr, momentum=momentum, weight_decay=weight_decay, damping=damping,
                        max_step_kl=max_step_kl, max_exact_step_kl=max_exact_step_kl, fallback=fallback,
                        fallback_lr_scale=fallback_lr_scale)
        self.model = _unwrapped(model)
        self._seed = int(torch.initial_seed() if seed is None else seed)
        self.structure = structure
        self.weight_sharing = weight_sharing
        self.stats_fraction = stats_fraction
        self._capture = None
        self.stats_interval = stats_interval
        self.inverse_interval = inverse_interval
        self.interval_warmup = interval_warmup
        self.loss_floor = loss_floor
        self.cost_budget, self.max_factor_size = cost_budget, max_factor_size
        self._assignment = CurvatureAssignment(self.model, self, structure, weight_sharing, stats_fraction,
                                               self._seed, cost_budget, max_factor_size, pinned_structures)
        groups = param_groups if param_groups is not None else [{"params": list(model.parameters())}]
        super().__init__(groups, defaults)  # every group goes through add_param_group
        if step_rule == "fixed" and rule_interval and all(g["max_exact_step_kl"] is None for g in self.param_groups):
            warnings.warn(f"rule_interval={rule_interval} measures each proposal's length in the exact Fisher for "
                          "max_exact_step_kl, which is None in every group: the forward-mode passes are wasted. "
                          "Pass rule_interval=0 with max_exact_step_kl=None.", stacklevel=2)

        self.fisher = fisher
        self.stats_memory = stats_memory
        self.scale_memory = scale_memory
        # 1 / mean w_n of the latest recorded loss (its term count for a mean), at its true scale: the
        # blocks whose scales follow the gradient weigh its square by it (blocks/gradient_scales.py).
        self._term_count: Optional[float] = None
        self.damping_rule = damping_rule
        self.damping_range = tuple(float(x) for x in damping_range)
        self.damping_interval = damping_interval
        self.step_rule = step_rule
        self.rule_interval = rule_interval
        self.rule_batch_fraction = rule_batch_fraction
        self.inverse_schedule = inverse_schedule
        self._inversions = INVERSION_SCHEDULES[inverse_schedule]()
        self.loss_fn = loss_fn
        self.rules = SimpleNamespace(step=STEP_RULES[step_rule](rule_interval),
                                     damping=DAMPING_RULES[damping_rule](damping_interval, damping_range))
        # Small Kronecker blocks computed together (ngopt/packing.py), for a step rule that takes them.
        self._packer = BlockPacker() if getattr(self.rules.step, "packs_blocks", False) else None
        self.track_spectra = False
        # Set by ngopt.distributed to share statistics and inversions across ranks; None = one process.
        self.communicator = None
        self._generator: Optional[torch.Generator] = None
        self._steps = 0
        self._skipped = {reason: 0 for reason in diagnostic_keys.SKIP_REASONS}
        self._times = {key: 0.0 for key in (*diagnostic_keys.STEP_TIME, diagnostic_keys.STEP_TOTAL)}
        self._last_update: dict = {}
        self._warned = set()
        self._warned_fallback_share = False
        self._loss_trend = LossTrend()

        source = None if fisher == "empirical" else FisherSource(fisher, fisher_samples, self._generator_for)
        self._capture = CaptureHooks(self.model, self._trainable(), source, loss_fn, on_forward=self._on_forward)
        self._capture.want_loss_value = loss_floor is not None  # only the loss bound reads it
        self._plan_capture()
        if isinstance(model, nn.parallel.DistributedDataParallel) and self.attach_data_parallel is not None:
            # Share statistics and inversions over DDP's own group, so that the user's loop needs
            # nothing beyond the DDP wrapping; ngopt.distributed.share_curvature(opt, ...) replaces it.
            self.attach_data_parallel(self, model.process_group)

    # ------------------------------------------------------------------ parameters and their blocks
    def add_param_group(self, param_group: dict) -> None:
        """Add a group as ``torch.optim.Optimizer`` does; it trains as if given at construction.

        The constructor's groups come through here too.  Settings the group leaves out take the
        optimizer's defaults; every setting is checked before anything is added (``ValueError`` or
        ``TypeError`` naming the key), and a parameter already in another group is a ``ValueError``.
        Parameters added after the first training forward get their curvature blocks from the next
        recorded forward, which refreshes the statistics (as the first step does) so that the new
        blocks precondition from their first step.
        """
        if not isinstance(param_group, dict) or "params" not in param_group:
            raise TypeError("param_group must be a dict with a 'params' entry, like {'params': [...], 'lr': 0.1}; "
                            f"got {param_group!r:.60}")
        check_arguments(**{key: param_group.get(key, default) for key, default in self.defaults.items()})
        super().add_param_group(param_group)
        group = self.param_groups[-1]
        if group["fallback_lr_scale"] is None:
            group["fallback_lr_scale"] = DEFAULT_FALLBACK_LR_SCALE[group["fallback"]]
        self._group_of = {p: i for i, g in enumerate(self.param_groups) for p in g["params"]}
        if self._capture is not None:
            trainable = [p for p in group["params"] if p.requires_grad]
            self._capture.track(trainable)
            if trainable and self._assignment.seen_forward:
                self._new_parameters = True
                self._plan_capture()

    def group_index(self, param: torch.Tensor) -> int:
        """The index of the param group holding ``param``."""
        return self._group_of[param]

    def _trainable(self) -> List[nn.Parameter]:
        return [p for g in self.param_groups for p in g["params"] if p.requires_grad]

    @property
    def blocks(self) -> Dict[str, LayerCurvature]:
        """The curvature blocks by name (empty until the first recorded training forward)."""
        return self._assignment.blocks

    def _block_group(self, block: LayerCurvature) -> dict:
        return self.param_groups[self._group_of[block.layer.weight]]

    def _on_forward(self, record) -> None:
        """A recorded forward ended: give its calls their blocks (building those of parameters seen first)."""
        before = len(self.blocks)
        self._assignment.assign(record)
        if len(self.blocks) != before or not self._warned_fallback_share:
            if self._assignment.seen_forward and not self._warned_fallback_share:
                self._warned_fallback_share = True
                self._assignment.warn_fallback_share(self._trainable())
                self._warn_if_no_block_follows_the_gradient()

    def _warn_if_no_block_follows_the_gradient(self) -> None:
        """``structure='ekfac-gradient'`` where no block can take it: the run silently is plain EKFAC."""
        if self.structure == "ekfac-gradient" and self.blocks and not self._follows_gradient():
            self._warn_once("no_gradient_scales", "structure='ekfac-gradient': no block takes its scales from the "
                            "gradient (only linear maps and ungrouped convolutions in whole Kronecker factors "
                            "do; embeddings and grouped convolutions keep EKFAC's sampled scales, norm layers "
                            "their exact blocks, large layers the budget's form): this run is structure='ekfac'")

    def assign_curvature(self, *args, **kwargs) -> Dict[str, ParameterCurvature]:
        """Assign the curvature blocks now, from one forward of the model on ``args``/``kwargs``.

        The first recorded training forward does this by itself; call it to see (or print) what each
        parameter gets before training.  The forward runs in ``eval()`` mode under the current RNG
        state, restored afterwards, so running statistics, dropout draws and the curvature
        statistics are untouched.  Returns :meth:`curvature_assignment`.
        """
        modes = {m: m.training for m in self.model.modules()}
        self.model.eval()
        try:
            with torch.random.fork_rng(devices=[]), torch.enable_grad():
                self._capture.record_uses_of(self.model, args, kwargs)
        finally:
            for module, mode in modes.items():
                module.train(mode)
        return self.curvature_assignment()

    def use_keys_of(self, block: LayerCurvature) -> list:
        """The uses a block was built for, in the order of its terms (one entry unless tied)."""
        return list(self._assignment.use_keys.get(block, []))

    def curvature_assignment(self) -> Dict[str, ParameterCurvature]:
        """Every trainable parameter by name: its block (name, use kind, structure), or the fallback rule and why.

        Blocks are assigned at the first recorded training forward; before it, every entry says so.
        """
        return self._assignment.parameters(self._trainable())

    def _generator_for(self, device: torch.device) -> torch.Generator:
        if self._generator is None or self._generator.device != device:
            self._generator = torch.Generator(device=device)
            self._generator.manual_seed(self._seed)
        return self._generator

    def __repr__(self) -> str:
        lines = [f"FisherDescent(fisher={self.fisher!r}, structure={self.structure!r}, "
                 f"stats_interval={self.stats_interval}, inverse_interval={self.inverse_interval}, "
                 f"interval_warmup={self.interval_warmup}, "
                 f"inverse_schedule={self.inverse_schedule!r}, "
                 f"stats_memory={self.stats_memory}, "
                 + (f"scale_memory={self.scale_memory}, " if self._follows_gradient() else "")
                 + f"step_rule={self.step_rule!r}, "
                 f"damping_rule={self.damping_rule!r})"]
        for i, group in enumerate(self.param_groups):
            settings = ", ".join(f"{k}={group[k]}" for k in ("lr", "momentum", "weight_decay", "damping",
                                                               "max_step_kl", "max_exact_step_kl", "fallback"))
            lines.append(f"  group {i}: {settings}")
        assignment = self.curvature_assignment()
        if not self._assignment.seen_forward:
            lines.append("  curvature blocks: assigned at the first training forward (how each parameter is used)")
        for name, block in self.blocks.items():
            members = ", ".join(n for n, a in assignment.items() if a.block == name)
            why = f"; {block.plan.why}" if block.plan is not None and block.plan.why else ""
            lines.append(f"  {name}: {block.describe()}  <- {members}{why}")
        fallback = [(name, a) for name, a in assignment.items() if a.fallback]
        if fallback and self._assignment.seen_forward:
            count = sum(self._numel[name] for name, _ in fallback)
            lines.append(f"  fallback rule ({self.param_groups[0]['fallback']}): {len(fallback)} tensors, "
                         f"{count} parameters")
            for name, a in fallback:
                lines.append(f"    {name} ({self._numel[name]}): {a.reason}")
        return "\n".join(lines)

    @property
    def _numel(self) -> Dict[str, int]:
        return {self._assignment.names.get(p, "(outside the model)"): p.numel() for p in self._trainable()}

    # ------------------------------------------------------------------ the step
    @torch.no_grad()
    def step(self, closure: Optional[Callable[[], torch.Tensor]] = None):
        """One natural-gradient step; returns ``closure()``'s loss when a closure is given.

        Driven by ``torch.amp.GradScaler.step``, it reads the scaler's ``found_inf`` and
        ``grad_scale``: an overflow step is no step at all (nothing changes, the step count
        included, as for torch's own optimizers), and the statistics are divided by the loss scale.
        """
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        roots = self._capture.take_roots()  # the losses this step's gradient is of; closes the loss watch
        started = time.perf_counter()
        scale = self._loss_scale()
        if scale is None:  # the scaler found Inf/NaN gradients: it skips this step and lowers its scale
            self._capture.discard()
            self._restore_generators()  # draws made in the overflowed backward are taken back
            self._skipped["loss_scale_overflow"] += 1
            return loss
        if not self._assignment.seen_forward and any(p.grad is not None for p in self._trainable()):
            self._capture.discard()
            raise RuntimeError("step() before any recorded training forward: ngopt assigns curvature blocks by how "
                               "the model uses its parameters, seen in a training forward (model.train(), "
                               "gradients enabled, outside opt.no_capture()); this step's forward ran in eval() "
                               "mode, under torch.no_grad(), inside opt.no_capture() or after remove_hooks()")
        step_index = self._steps
        # The statistics were kept per unit of the multiplier seen on the backward's root; the loss's
        # true scale is ``scale`` (1 without a scaler, where a seen multiplier is part of the loss).
        relative = scale / (self._capture.loss_scale_seen() or 1.0)
        # Per unit of the seen scale, before the rescaling below; read only where a block uses it.
        seen_terms = self._capture.term_count() if self._follows_gradient() else None
        if seen_terms is not None:
            self._term_count = seen_terms * relative
        # Before the rescaling below, which covers one record only.
        loss_climbed = self._loss_climbed(loss, relative)
        loss_gap = self._loss_gap(roots, loss, scale)
        batch = self._capture.latest_batch()
        if batch is not None and relative != 1.0:
            for call in batch.losses:
                call.rescale(1.0 / relative)
        warning = self._capture.check_losses(self.fisher, self.loss_fn)
        if warning:
            self._warn_once("output", warning)
        reason = self._attempt(loss, step_index, batch, closure, relative, loss_gap)
        if loss is not None and self._last_update:
            self._last_update["loss"] = float(loss)
        if reason is not None:
            self._skip(reason)
        if loss_climbed:
            self._warn_once("loss_rising", self._loss_trend.message())
        self._steps += 1
        self._new_parameters = False
        self._plan_capture()
        self._times["step_total"] += time.perf_counter() - started
        return loss

    def _loss_climbed(self, loss, relative: float) -> bool:
        """Feed the loss trend the closure's loss, else the recorded forward's at its true scale (a step that
        recorded none adds nothing); whether the loss has now climbed above its start.  Nothing once warned:
        the check costs tens of microseconds, and the warning is given once."""
        if "loss_rising" in self._warned:
            return False
        if loss is not None:
            value = _as_float(loss)
        else:
            recorded = self._capture.recorded_loss()
            value = None if recorded is None else recorded / relative
        return self._loss_trend.add(value) and self._loss_trend.rising()

    def _loss_gap(self, roots: list, loss, scale: float) -> Optional[float]:
        """The step's loss minus ``loss_floor`` (the mean over ranks), or None: no floor, or the loss was
        not seen on this step (on every rank).  The loss is the sum of ``roots``, the values this step's
        backward passes started from, at its true scale (a loss scaler's factor taken out), else the
        closure's."""
        if self.loss_floor is None:
            return None
        if roots:
            total = roots[0] if len(roots) == 1 else torch.stack([r.to(torch.float64) for r in roots]).sum()
            value = float(total) / scale
        else:
            value = None if loss is None else _as_float(loss)
        gap = None if value is None or not math.isfinite(value) else value - self.loss_floor
        if gap is not None and gap < 0:
            self._warn_once("loss_floor", f"the training loss ({value:.4g}) is below loss_floor={self.loss_floor:g}: "
                            "the bound on a step's predicted decrease (rules/loss_bound.py) is off while it is. "
                            "Pass the loss's true minimum, or loss_floor=None for a loss without a known one.")
            gap = None
        if self.communicator is not None:  # one bound for the global batch, the same on every rank
            total, seen = self.communicator.average_scalars(0.0 if gap is None else gap, float(gap is not None))
            gap = total if seen == 1.0 else None
        return gap

    def _loss_scale(self) -> Optional[float]:
        """The factor the loss was scaled by (1 without a scaler); None when the scaler found an overflow."""
        def warn_if_needed():
            if self._statistics_due(self._steps) or self._batch_due(self._steps):
                self._warn_once("scale", UNSCALED_WITHOUT_SEEN_SCALE)

        return step_loss_scale(getattr(self, "found_inf", None), getattr(self, "grad_scale", None),
                               lambda: [p.grad for p in self._trainable() if p.grad is not None],
                               self._capture.loss_scale_seen, warn_if_needed)

    def _warn_once(self, key: str, message: str) -> None:
        if key not in self._warned:
            self._warned.add(key)
            warnings.warn(message, stacklevel=4)

    def _plan_capture(self) -> None:
        """What the forwards before the next step record: statistics, uses, the batch."""
        self._capture.plan(statistics=self._statistics_due(self._steps),
                           uses=not self._assignment.seen_forward, batch=self._batch_due(self._steps))
        sampling = None if self._generator is None else self._generator.get_state()
        self._generator_states = (sampling, self._assignment.subsample_generator.get_state())

    def _restore_generators(self) -> None:
        """The private generators as they were after the last step (a step the scaler skips draws nothing)."""
        sampling, subsample = self._generator_states
        if sampling is None:
            self._generator = None  # made on the first draw, from the seed
        elif self._generator is not None:
            self._generator.set_state(sampling)
        self._assignment.subsample_generator.set_state(subsample)

    def _statistics_due(self, step_index: int) -> bool:
        return schedule.statistics_due(step_index, self.stats_interval, self.interval_warmup) \
            or self._new_parameters \
            or not all(b.has_statistics for b in self.blocks.values())

    def _batch_due(self, step_index: int) -> bool:
        """Whether a rule will evaluate the loss on the batch of step ``step_index``."""
        return self.rules.step.wants_batch(step_index) or self.rules.damping.wants_ratio(step_index)

    def _attempt(self, loss, step_index: int, batch, closure, loss_scale: float = 1.0,
                 loss_gap: Optional[float] = None) -> Optional[str]:
        """Compute the whole step (``step_pipeline.py``), then write it; return a skip reason instead of writing.

        The gradients get no check of their own: a non-finite one makes a statistic, a dot product of
        the proposals or an update non-finite, each checked before anything is written, and only then
        are the gradients looked at, to name the cause.  (A pass over every gradient on every step
        costs a small network a tenth of its step.)"""
        if loss is not None and not self._finite_everywhere(loss):
            self._capture.discard()
            return "nonfinite_loss"
        reason = self._compute_and_write(step_index, batch, closure, loss, loss_scale, loss_gap)
        if reason is not None and not all_finite([p.grad for p in self._trainable() if p.grad is not None]):
            return "nonfinite_gradient"
        return reason

    def _compute_and_write(self, step_index: int, batch, closure, loss, loss_scale: float,
                           loss_gap: Optional[float]) -> Optional[str]:
        blocks = list(self.blocks.values())
        pending = PendingStep()
        try:
            with self._timed("statistics"):
                forwards = self._capture.hand_over()
                pending.statistics = new_statistics(blocks, forwards, self.stats_memory, loss_scale,
                                                    self._statistics_sharing(blocks))
            if pending.statistics is None:
                return "nonfinite_statistics"
            with self._timed("inversion"):
                pending.inverses = new_inverses(self._inversion_jobs(blocks, pending.statistics, step_index),
                                                self._inversion_sharing(blocks), self.track_spectra)
            if pending.inverses is None:
                return "nonfinite_statistics"
            with self._timed("statistics"):
                if not add_projected_statistics(blocks, pending.statistics, pending.inverses, forwards,
                                                self.stats_memory, loss_scale,
                                                self._statistics_sharing(blocks, projected=True)):
                    return "nonfinite_statistics"
        finally:
            for block in blocks:
                block.clear_pending()
        refreshed, rotated = bool(pending.statistics), None
        if self._follows_gradient():
            with self._timed("statistics"):
                rotated = add_gradient_scales(blocks, pending.statistics, pending.inverses, self._gradient_terms(),
                                              self.scale_memory)
            if rotated is None:
                return "nonfinite_statistics"

        with self._timed("precondition"):
            average = self.communicator.average_scalars if self.communicator is not None else (lambda *v: v)
            inputs, missing = proposals(blocks, self.param_groups, self.group_index, pending.statistics,
                                        pending.inverses, step_index, average, packer=self._packer,
                                        rotated=rotated)
            if inputs is None:
                return "nonfinite_update"
            inputs.loss_gap = loss_gap
            self._refuse_blocks_without_statistics(missing, refreshed)
        with self._timed("rules"):
            evaluator = self._evaluator(batch, step_index, closure)
            inputs.evaluator = evaluator if self.rules.step.wants_batch(step_index) else None
            pending.result = self.rules.step.updates(inputs)
        with self._timed("fallback"):
            pending.fallback = fallback_changes(self.param_groups, self._assignment.block_of, self.state)
        # One check of everything the step would write; nothing is written before it passes.
        if not pending.finite():
            return "nonfinite_update"

        pending.write_curvature(step_index)
        pending.write_block_updates(keep_previous=self.rules.step.keeps_previous_update)
        with self._timed("fallback"):
            pending.write_fallback(self.state)
        self._record_update(pending.result)
        if self.rules.damping.wants_ratio(step_index):
            with self._timed("rules"):
                self._adapt_damping(pending.result, evaluator, closure, loss)
        return None

    def _follows_gradient(self) -> bool:
        """Whether a block updates its scales from every step's gradient."""
        return any(block.follows_gradient for block in self.blocks.values())

    def _gradient_terms(self) -> float:
        """The term count of the loss whose gradient ``.grad`` holds: over every rank's batch when the
        gradients are averaged over ranks (DDP, ``ngopt.distributed.average_gradients``)."""
        terms = 1.0 if self._term_count is None else self._term_count  # None only before any record
        return terms * (self.communicator.world_size if self.communicator is not None else 1)

    def _timed(self, part: str) -> "_PartTimer":
        """A ``with`` block that adds the seconds spent inside to ``diagnostics()["time"][part]``."""
        return _PartTimer(self._times, part)

    def _finite_everywhere(self, loss) -> bool:
        """Whether the loss is finite on every rank: a skip must be a joint decision."""
        return self._all_ranks_agree(bool(torch.isfinite(torch.as_tensor(loss)).all()))

    def _all_ranks_agree(self, flag: bool) -> bool:
        """``flag`` on every rank (one process: ``flag`` itself)."""
        if self.communicator is None:
            return flag
        return self.communicator.average_scalars(float(flag))[0] == 1.0

    def _statistics_sharing(self, blocks, projected: bool = False) -> Optional[Callable]:
        """Averages batch statistics over the ranks (None in one process)."""
        if self.communicator is None:
            return None
        due = self.statistics_due()
        return lambda batches: self.communicator.average_statistics(blocks, batches, due, projected=projected)

    def _inversion_sharing(self, blocks) -> Optional[Callable]:
        """Shares the inversions over the ranks (None in one process)."""
        if self.communicator is None:
            return None
        return lambda jobs: self.communicator.invert(blocks, jobs, self.track_spectra)

    def _inversion_jobs(self, blocks, statistics, step_index: int) -> list:
        """``[(block, statistics, damping)]`` for the blocks whose inversion the schedule makes due now,
        and for those with their first statistics."""
        jobs = []
        for block in blocks:
            due = self._inversions.due(block, step_index, self.inverse_interval, blocks, self.interval_warmup)
            fresh = block in statistics
            if (due and (fresh or block.has_statistics)) or (fresh and not block.has_inverse):
                jobs.append((block, statistics[block] if fresh else block.state, self._block_group(block)["damping"]))
        return jobs

    def _record_update(self, result) -> None:
        group0 = self.param_groups[0]
        update = dict(result.diagnostics)
        update.update(damping=group0["damping"], lr=group0["lr"], loss=None, reduction_ratio=None,
                      actual_change=None)
        self._last_update = update if result.updates else {}

    def _refuse_blocks_without_statistics(self, blocks: List[LayerCurvature], recorded: bool) -> None:
        """A nonzero gradient on a block that a due refresh left without statistics is an error.

        Raised before anything is written, so the step leaves weights and state as they were.
        """
        if not blocks:
            return
        names = ", ".join(f"{b.layer.name} ({b.layer.kind})" for b in blocks)
        if recorded:
            why = ("the recorded forward did not apply these parameters, or their outputs do not reach "
                   "the loss (their gradient then comes from elsewhere, e.g. a penalty in your loss)")
        else:
            why = ("no forward of this step was recorded: the model ran in eval() mode, under "
                   "torch.no_grad() or opt.no_capture(), or after remove_hooks()")
        raise RuntimeError(f"{names}: a gradient but no curvature statistics after a refresh was due; {why}. "
                           "Train such parameters with another optimizer (leave them out of this one's "
                           "param_groups), or apply them in the recorded training forward.")

    def _skip(self, reason: str) -> None:
        self._skipped[reason] += 1
        if sum(self._skipped.values()) == 1:
            warnings.warn(f"step {self._steps} skipped ({reason.replace('_', ' ')}); weights and curvature "
                          "state left unchanged. Further skips are counted in diagnostics()['skipped_steps'].",
                          stacklevel=3)

    # ------------------------------------------------------------------ evaluations on the batch
    def _evaluator(self, batch, step_index: int, closure):
        """A :class:`BatchEvaluator` on this step's recorded batch when a rule needs one, else None."""
        evaluator, problem = evaluator_for(self.rules, self.model, batch, step_index, closure is not None,
                                           self.rule_batch_fraction)
        if problem:
            self._warn_once("replay", not_replayable_message(
                problem, self.step_rule, self.damping_rule, self.rule_interval, self.rules.step.needs_batch,
                self.rules.step.wants_batch(step_index)))
        return evaluator

    def _adapt_damping(self, result, evaluator, closure, loss) -> None:
        """Levenberg-Marquardt: the loss change on the same rows against the quadratic model's prediction."""
        measured = loss_change(result, evaluator, closure, loss, self.no_capture,
                               lambda block: self._block_group(block)["damping"], self._all_ranks_agree)
        if measured is None:
            return
        before, after, predicted = measured
        if self.communicator is not None:  # the ratio of the global batch, the same on every rank
            before, after = self.communicator.average_scalars(before, after)
        rho = reduction_ratio(before, after, predicted)
        for group in self.param_groups:
            group["damping"] = self.rules.damping.adapt(group["damping"], rho)
        self._last_update.update(reduction_ratio=rho, actual_change=after - before,
                                 damping=self.param_groups[0]["damping"])

    # ------------------------------------------------------------------ hooks, diagnostics, state
    @contextlib.contextmanager
    def no_capture(self):
        """Within this block, forward passes record nothing (e.g. evaluation or probing in train mode)."""
        armed, self._capture.armed = self._capture.armed, False  # nor is the recorded batch replaced
        try:
            yield
        finally:
            self._capture.armed = armed

    @property
    def steps_taken(self) -> int:
        """Number of ``step()`` calls so far, skipped ones included."""
        return self._steps

    def diagnostics(self) -> dict:
        """A plain-dict snapshot of the latest curvature diagnostics (keys: ``ngopt/diagnostic_keys.py``)."""
        layers = {name: block_summary(block, self._block_group(block)["damping"],
                                      with_spectra=self.track_spectra)
                  for name, block in self.blocks.items()}
        # Every key in every snapshot; those the latest step did not measure are None.
        update = {key: self._last_update.get(key) for key in diagnostic_keys.UPDATE}
        return {"step": self._steps, "skipped_steps": sum(self._skipped.values()),
                "skip_reasons": dict(self._skipped), "layers": layers, "update": update,
                "time": dict(self._times, **self._capture.seconds)}

    def state_dict(self) -> dict:
        state = super().state_dict()
        state["natural_gradient"] = {
            "steps": self._steps, "skipped": dict(self._skipped), "seed": self._seed,
            "generator_state": None if self._generator is None else self._generator.get_state(),
            "generator_device": None if self._generator is None else str(self._generator.device),
            "step_rule": self.rules.step.state_dict(), "damping_rule": self.rules.damping.state_dict(),
            "term_count": self._term_count,
        }
        state["natural_gradient"]["subsample_generator_state"] = self._assignment.subsample_generator.get_state()
        return state

    def load_state_dict(self, state_dict: dict) -> None:
        state_dict = dict(state_dict)
        extra = state_dict.pop("natural_gradient", None)
        super().load_state_dict(state_dict)
        for block in self.blocks.values():
            block.rebind(self.state[block.layer.weight])
        if extra is not None:
            self._steps = int(extra["steps"])
            self._skipped.update(extra["skipped"])
            self._seed = int(extra["seed"])
            self._generator = None
            if extra["generator_state"] is not None:
                self._generator = torch.Generator(device=extra["generator_device"])
                self._generator.set_state(extra["generator_state"].to(torch.uint8).cpu())
            self.rules.step.load_state_dict(extra.get("step_rule", {}))
            self.rules.damping.load_state_dict(extra.get("damping_rule", {}))
            self._term_count = extra.get("term_count")
            if extra.get("subsample_generator_state") is not None:
                self._assignment.subsample_generator.set_state(
                    extra["subsample_generator_state"].to(torch.uint8).cpu())
        self._plan_capture()

    def remove_hooks(self) -> None:
        """Detach the capture and recording hooks from the model (the optimizer then only preconditions)."""
        self._capture.remove()

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
        if self._capture.source is not None:
            self._capture.source.generator_for = self._generator_for if generator_for is None else generator_for


def _as_float(loss) -> float:
    """A closure's loss (a tensor or a number) as a Python float."""
    return float(loss.detach() if isinstance(loss, torch.Tensor) else loss)


def _refuse_sparse_embeddings(model: nn.Module) -> None:
    """Sparse gradients are refused at the door: the finiteness checks and fallback rules need dense ones."""
    for name, module in model.named_modules():
        if isinstance(module, (nn.Embedding, nn.EmbeddingBag)) and module.sparse and module.weight.requires_grad:
            raise ValueError(f"{name}: {type(module).__name__}(sparse=True) is not supported (sparse gradients); "
                             "use sparse=False, or freeze it (weight.requires_grad_(False))")


def _unwrapped(model: nn.Module) -> nn.Module:
    """The user's own network inside DDP / DataParallel / ``torch.compile`` wrappers (any nesting).

    Blocks, diagnostics and logs then carry the eager model's layer names, and the
    hooks sit on the modules that the wrapped call runs.
    """
    while True:
        if isinstance(model, (nn.DataParallel, nn.parallel.DistributedDataParallel)):
            model = model.module
        elif isinstance(getattr(model, "_orig_mod", None), nn.Module):  # torch.compile's OptimizedModule
            model = model._orig_mod
        else:
            return model
