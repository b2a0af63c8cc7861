"""The loss and its exact curvature products on a recorded batch.

For the rules that steer a step by the quadratic model of the loss (Martens &
Grosse 2015, secs. 6-7),

    M(delta) = grad^T delta + 1/2 delta^T (F + eta I) delta,

the products ``u^T F v`` use the exact Fisher / generalized Gauss-Newton matrix
of the loss as defined, ``F = J^T H J``: ``J v`` is a forward-mode
Jacobian-vector product through the model (``torch.autograd.forward_ad``) and
``H`` the criterion's closed-form output Hessian (``likelihoods.py``), so
``u^T F v = (J u)^T H (J v)`` costs one forward-mode pass per direction.

Evaluations run on the first ``fraction`` of the recorded batch's examples (a
subsample of the batch is enough for a handful of scalars; the model's own
running statistics, buffers and the global RNG are left exactly as they were:
batch-norm layers use the batch's statistics without updating theirs, and
dropout repeats the training forward's RNG stream).
"""
from __future__ import annotations

import contextlib
import math
from typing import Dict, List, Optional, Sequence

import torch
import torch.autograd.forward_ad as forward_ad
from torch import nn
from torch.func import functional_call

from .likelihoods import OutputLikelihood
from .recording import RecordedBatch, follow


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


class BatchEvaluator:
    """Loss values and exact curvature products on (a subsample of) one recorded batch."""

    def __init__(self, model: nn.Module, loss_fn, likelihood: Optional[OutputLikelihood], batch: RecordedBatch,
                 fraction: float = 1.0):
        self.model, self.loss_fn, self.likelihood, self.batch = model, loss_fn, likelihood, batch
        examples = batch.examples
        keep = max(1, math.ceil(fraction * examples)) if examples else 0
        self.subsampled = bool(examples) and keep < examples and self._targets_divide(examples, keep)
        keep = keep if self.subsampled else examples
        self.args = _rows(batch.args, examples, keep) if self.subsampled else batch.args
        self.kwargs = _rows(batch.kwargs, examples, keep) if self.subsampled else batch.kwargs
        self.targets = [self._target_rows(c.target, examples, keep) for c in batch.criteria]
        # A sum-reduced loss over a subsample is a fraction of the whole; a mean is not.
        self.loss_scale = examples / keep if self.subsampled and getattr(loss_fn, "reduction", "mean") == "sum" \
            else 1.0
        self.forwards = 0
        # Fused attention kernels lack forward-mode rules: once a product pass has used the composite
        # form, later loss values use it too, so that values compared with each other share kernels.
        self._composite = False

    def _targets_divide(self, examples: int, keep: int) -> bool:
        for criterion in self.batch.criteria:
            target = criterion.target
            if isinstance(target, torch.Tensor) and target.dim() and (target.shape[0] * keep) % examples:
                return False
        return True

    def _target_rows(self, target, examples: int, keep: int):
        if not self.subsampled or not isinstance(target, torch.Tensor) or not target.dim():
            return target
        return target[:target.shape[0] * keep // examples]

    def _criterion_inputs(self, overrides: Dict[str, torch.Tensor]) -> List[torch.Tensor]:
        """The criterion's inputs on the evaluated rows, with ``overrides`` for some parameters."""
        buffers = {n: b.clone() for n, b in self.model.named_buffers()}
        buffers.update(_running_statistics(self.model))
        self.forwards += 1
        kernels = _composite_attention() if self._composite else contextlib.nullcontext()
        with torch.random.fork_rng(devices=[]), kernels:
            torch.set_rng_state(self.batch.rng_state)
            if overrides or buffers:
                output = functional_call(self.model, {**overrides, **buffers}, self.args, self.kwargs)
            else:  # nothing to swap in or to protect: the plain call skips functional_call's overhead
                output = self.model(*self.args, **self.kwargs)
        return [follow(output, c.path, c.shape) for c in self.batch.criteria]

    def loss(self) -> float:
        """The loss at the model's current weights (criterion calls summed), on the evaluated rows."""
        with torch.no_grad():
            inputs = self._criterion_inputs({})
            total = sum(float(self.loss_fn(z, y)) for z, y in zip(inputs, self.targets))
        return total * self.loss_scale

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
                duals = {names[p]: forward_ad.make_dual(p.detach(), v.to(p.dtype))
                         for p, v in direction.items()}
                inputs = self._criterion_inputs(duals)
                unpacked = [forward_ad.unpack_dual(z) for z in inputs]
                if loss is None:
                    loss = sum(float(self.loss_fn(u.primal, y)) for u, y in zip(unpacked, self.targets))
                tangents.append([(u.primal, torch.zeros_like(u.primal) if u.tangent is None else u.tangent)
                                 for u in unpacked])
        gram = [[0.0] * len(directions) for _ in directions]
        for i, left in enumerate(tangents):
            curved = [self.likelihood.hessian_product(z, jv) for z, jv in left]
            for j in range(i, len(directions)):
                value = sum(float((h * jv).sum()) for h, (_, jv) in zip(curved, tangents[j]))
                gram[i][j] = gram[j][i] = value * self.loss_scale
        return loss * self.loss_scale, gram
