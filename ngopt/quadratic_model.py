"""The loss and its exact curvature products on a recorded batch.

For the rules that steer a step by the quadratic model of the loss (Martens &
Grosse 2015, secs. 6-7),

    M(delta) = grad^T delta + 1/2 delta^T (F + eta I) delta,

the products ``u^T F v`` use the exact Fisher / generalized Gauss-Newton matrix
of the loss as defined, ``F = sum_calls sum_n w_n J_n^T H_n J_n``: ``J v`` is a
forward-mode Jacobian-vector product through the model
(``torch.autograd.forward_ad``), ``H_n`` a loss call's closed-form output Hessian and
``w_n`` its term weights from the user's backward (``likelihoods.py``), so
``u^T F v = sum w_n (J u)_n^T H_n (J v)_n`` costs one forward-mode pass per direction.

The batch is replayed from what the step recorded (``capture.ForwardRecord``): the
forward's arguments, and for every loss call where its input comes from: the k-th
loss call inside the model's forward (a model that computes its own loss), or the
operations the user's code applied to the model's output (``uses/losses.Program``).
The loss is ``sum_calls sum_n w_n l_n``, the user's loss to first order in the loss
values (exact for sums, means, masks and divisions by constants).

Evaluations run on the first ``fraction`` of the recorded batch's examples (a
subsample is enough for a handful of scalars; sums over it are scaled to the whole
batch).  The model's own running statistics, buffers and the global RNG are left
exactly as they were: batch-norm layers use the batch's statistics without
updating theirs, and dropout repeats the training forward's RNG stream.
"""
from __future__ import annotations

import contextlib
import math
from typing import Dict, List, Optional, Sequence

import torch
import torch.autograd.forward_ad as forward_ad
from torch import nn
from torch.func import functional_call
from torch.overrides import TorchFunctionMode

from .likelihoods import LOSS_FUNCTIONS, likelihood_from_arguments, recorded_total
from .uses.losses import leaves


def replayable(batch) -> str:
    """Why the recorded batch cannot be replayed ("" when it can)."""
    if batch is None:
        return "no training forward was recorded on this step"
    calls = [c for c in batch.losses if c.weights is not None]
    if not calls:
        return "no loss call with a closed form was seen in this step's backward"
    for call in calls:
        if call.origin and call.origin[0] == "after" and call.origin[1] is None:
            return "a loss's input is not computed from the model's output"
    return ""


def _rows(value, examples: int, keep: int):
    """The first ``keep`` of ``examples`` rows of every batch-shaped tensor in ``value``."""
    if isinstance(value, torch.Tensor):
        return value[:keep] if value.dim() and value.shape[0] == examples else value
    if isinstance(value, (list, tuple)):
        return type(value)(_rows(v, examples, keep) for v in value)
    if isinstance(value, dict):
        return {k: _rows(v, examples, keep) for k, v in value.items()}
    return value


def _composite_attention():
    """Scaled dot-product attention by its composite (math) form: fused kernels lack forward-mode rules."""
    try:
        from torch.nn.attention import SDPBackend, sdpa_kernel
    except ImportError:  # older torch: nothing to switch
        return contextlib.nullcontext()
    return sdpa_kernel([SDPBackend.MATH])


def _running_statistics(model: nn.Module) -> Dict[str, None]:
    """Batch-norm buffers to hide during evaluations: train-mode layers then use batch statistics only."""
    hidden = {}
    for name, module in model.named_modules():
        if isinstance(module, nn.modules.batchnorm._BatchNorm) and module.training and module.track_running_stats:
            prefix = f"{name}." if name else ""
            for buffer in ("running_mean", "running_var", "num_batches_tracked"):
                hidden[prefix + buffer] = None
    return hidden


class _LossInputs(TorchFunctionMode):
    """Collects the input of every supported loss call inside a replayed forward, in order."""

    def __init__(self):
        super().__init__()
        self.inputs: List[torch.Tensor] = []

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if func in LOSS_FUNCTIONS:
            try:
                _, z, _ = likelihood_from_arguments(func, args, kwargs)
                self.inputs.append(z)
            except ValueError:
                self.inputs.append(None)
        return func(*args, **kwargs)


class BatchEvaluator:
    """Loss values and exact curvature products on (a subsample of) one recorded batch."""

    def __init__(self, model: nn.Module, batch, fraction: float = 1.0):
        self.model, self.batch = model, batch
        self.calls = [c for c in batch.losses if c.weights is not None]
        examples = batch.examples
        keep = max(1, math.ceil(fraction * examples)) if examples else 0
        self.subsampled = bool(examples) and keep < examples and self._divides(examples, keep)
        keep = keep if self.subsampled else examples
        inputs = batch.inputs
        self.args = _rows(inputs["args"], examples, keep) if self.subsampled else inputs["args"]
        self.kwargs = _rows(inputs["kwargs"], examples, keep) if self.subsampled else inputs["kwargs"]
        self.rng_state = inputs["rng_state"]
        self.device_rng_states = inputs.get("device_rng_states", {})
        self.targets = [self._first_rows(c.target, examples, keep) for c in self.calls]
        self.weights = [self._first_rows(c.weights, examples, keep) for c in self.calls]
        # Sums over a subsample are a share of the whole batch's.
        self.loss_scale = examples / keep if self.subsampled else 1.0
        self.forwards = 0
        # Fused attention kernels lack forward-mode rules: once a product pass has used the composite
        # form, later loss values use it too, so that values compared with each other share kernels.
        self._composite = False

    def _divides(self, examples: int, keep: int) -> bool:
        for call in self.calls:
            for tensor in (call.target, call.weights):
                if isinstance(tensor, torch.Tensor) and tensor.dim() and (tensor.shape[0] * keep) % examples:
                    return False
        return True

    def _first_rows(self, tensor, examples: int, keep: int):
        if not self.subsampled or not isinstance(tensor, torch.Tensor) or not tensor.dim():
            return tensor
        return tensor[:tensor.shape[0] * keep // examples]

    def _loss_inputs(self, overrides: Dict[str, torch.Tensor]) -> List[torch.Tensor]:
        """Every loss call's input on the evaluated rows, with ``overrides`` for some parameters."""
        buffers = {n: b.clone() for n, b in self.model.named_buffers()}
        buffers.update(_running_statistics(self.model))
        self.forwards += 1
        kernels = _composite_attention() if self._composite else contextlib.nullcontext()
        collector = _LossInputs()
        with torch.random.fork_rng(devices=list(self.device_rng_states)), kernels:
            torch.set_rng_state(self.rng_state)
            for index, state in self.device_rng_states.items():
                torch.cuda.set_rng_state(state, index)
            with collector:
                if overrides or buffers:
                    output = functional_call(self.model, {**overrides, **buffers}, self.args, self.kwargs)
                else:  # nothing to swap in or to protect: the plain call skips functional_call's overhead
                    output = self.model(*self.args, **self.kwargs)
            inputs = []
            for call in self.calls:
                origin = call.origin
                if origin[0] == "forward":
                    inputs.append(collector.inputs[origin[1]])
                elif origin[0] == "after":
                    inputs.append(origin[1].run(output))
                else:  # the model output itself
                    inputs.append(leaves(output)[0][1])
        return inputs

    def _weighted_loss(self, inputs) -> float:
        total = 0.0
        for call, z, target, weights in zip(self.calls, inputs, self.targets, self.weights):
            total += float((weights.double() * call.likelihood.term_losses(z, target).double()).sum())
        return total * self.loss_scale

    def recorded_loss(self) -> Optional[float]:
        """The user's loss as the training backward saw it, ``sum_n w_n l_n`` (every row)."""
        return recorded_total(self.calls)

    def loss(self) -> float:
        """The loss at the model's current weights, on the evaluated rows (scaled to the whole batch)."""
        with torch.no_grad():
            return self._weighted_loss(self._loss_inputs({}))

    def curvature_products(self, directions: Sequence[Dict[nn.Parameter, torch.Tensor]]):
        """``(loss, gram)``: the loss at the current weights and ``gram[i][j] = v_i^T F v_j``.

        Each direction maps parameters to tensors of their shape; parameters it leaves out
        do not move.  One forward-mode pass per direction.
        """
        tangents = []
        loss = None
        self._composite = True
        names = {p: n for n, p in self.model.named_parameters()}
        with torch.no_grad(), forward_ad.dual_level():
            for direction in directions:
                duals = {names[p]: forward_ad.make_dual(p.detach(), v.to(p.dtype)) for p, v in direction.items()}
                unpacked = [forward_ad.unpack_dual(z) for z in self._loss_inputs(duals)]
                if loss is None:
                    loss = self._weighted_loss([u.primal for u in unpacked])
                tangents.append([(u.primal, torch.zeros_like(u.primal) if u.tangent is None else u.tangent)
                                 for u in unpacked])
        gram = [[0.0] * len(directions) for _ in directions]
        for i, left in enumerate(tangents):
            curved = [call.likelihood.hessian_product(z, jv) * call.likelihood.spread(weights.to(z.dtype), z)
                      for call, weights, (z, jv) in zip(self.calls, self.weights, left)]
            for j in range(i, len(directions)):
                value = sum(float((h * jv).sum()) for h, (_, jv) in zip(curved, tangents[j]))
                gram[i][j] = gram[j][i] = value * self.loss_scale
        return loss, gram
