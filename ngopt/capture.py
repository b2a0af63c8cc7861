"""Forward and backward hooks that record what the curvature blocks need.

On a forward pass of the whole model that is due a refresh (training mode,
gradients enabled), every supported layer records its input rows ``a`` and
keeps a handle on its own output.  The output gradients ``g`` then come from
one of three Fisher sources:

* ``empirical``: the gradients of the user's loss, caught by tensor hooks
  during the user's own ``backward()``;
* ``sampled``: when the user's ``backward()`` reaches the model output, a hook
  runs one extra backward pass from the output with ``c * grad_f l(f, y~)``
  for targets ``y~`` drawn from the model (one batched pass for several draws);
* ``exact``: the same extra pass with the columns of the output Fisher's square
  root, which gives the expectation over the predictive distribution exactly.

The extra pass asks ``torch.autograd.grad`` for the gradients of the layer
outputs only, so it neither accumulates into ``.grad`` nor changes what the
user's backward computes.  Each layer hands the rest of the network a copy of
its output, which keeps the tensor we differentiate with respect to safe from
in-place operations downstream (``ReLU(inplace=True)``).
"""
from __future__ import annotations

import time
import warnings
import weakref
from dataclasses import dataclass, field
from typing import Callable, Dict, Iterable, List, Optional

import torch
from torch import nn

from .blocks.base import LayerCurvature
from .likelihoods import OutputLikelihood, empirical_reduction_scale

_COLUMNS_PER_PASS = 32
# model -> weak reference to the capture hooks on it: keeps nothing alive, travels with no copy of a model
_HOOKED_MODELS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
# Above this many output-Fisher columns per example, fisher="exact" costs more than it is usually worth.
EXACT_COLUMNS_WARNING = 64


@dataclass
class LayerCall:
    block: LayerCurvature
    input_rows: torch.Tensor
    output: torch.Tensor
    grad_rows: Optional[torch.Tensor] = None
    scale: float = 1.0
    # Output gradients -> rows, when the call covers part of its layer (default: block.layer.output_rows).
    output_rows: Optional[Callable[[torch.Tensor], torch.Tensor]] = None

    def rows_of(self, grads: torch.Tensor) -> torch.Tensor:
        return (self.output_rows or self.block.layer.output_rows)(grads)


@dataclass
class ForwardRecord:
    calls: List[LayerCall] = field(default_factory=list)
    done: bool = False
    # Tensor hooks that refer back to tensors of this record: a cycle through autograd's C++ side
    # that Python's garbage collector cannot see, so they are removed by hand once the record is used.
    handles: list = field(default_factory=list)
    output: Optional[torch.Tensor] = None  # the model output, for the extra backward pass

    def drop_tensors(self) -> None:
        """Forget the outputs: breaks the cycles, and is safe inside a running hook."""
        self.output = None
        for call in self.calls:
            call.output = None

    def release(self) -> None:
        for handle in self.handles:
            handle.remove()
        self.handles.clear()
        self.drop_tensors()


class FisherSource:
    """Output-gradient vectors for the ``sampled`` and ``exact`` Fisher."""

    def __init__(self, mode: str, likelihood: OutputLikelihood, num_samples: int,
                 generator_for: Callable[[torch.device], torch.Generator]):
        self.mode = mode
        self.likelihood = likelihood
        self.num_samples = num_samples
        self.generator_for = generator_for
        self._warned_cost = False

    def output_vectors(self, output: torch.Tensor):
        """``(V, scale)``: vectors ``[K, *output.shape]`` and the factor ``s`` with ``G = s sum g g^T``."""
        c = self.likelihood.reduction_scale(output)
        if self.mode == "sampled":
            generator = self.generator_for(output.device)
            vectors = self.likelihood.sampled_output_grads(output, generator, self.num_samples)
            return vectors, 1.0 / (c * self.num_samples)
        columns = self.likelihood.exact_output_grad_columns(output)
        if columns.shape[0] > EXACT_COLUMNS_WARNING and not self._warned_cost:
            warnings.warn(f"fisher='exact' backpropagates {columns.shape[0]} vectors per refresh for this output "
                          f"{tuple(output.shape)}; fisher='sampled' costs one", stacklevel=2)
            self._warned_cost = True
        return columns, 1.0 / c


def batched_output_grads(output: torch.Tensor, targets: List[torch.Tensor],
                         vectors: torch.Tensor) -> List[Optional[torch.Tensor]]:
    """Backpropagate each of ``vectors`` from ``output`` to ``targets``; results ``[K, *target.shape]``."""
    pieces: List[List[Optional[torch.Tensor]]] = []
    for start in range(0, vectors.shape[0], _COLUMNS_PER_PASS):
        chunk = vectors[start:start + _COLUMNS_PER_PASS]
        if chunk.shape[0] == 1:  # one draw (the default): a plain pass is cheaper than a batched one
            grads = torch.autograd.grad(output, targets, grad_outputs=chunk[0], retain_graph=True,
                                        allow_unused=True)
            pieces.append([None if g is None else g.unsqueeze(0) for g in grads])
            continue
        try:
            grads = torch.autograd.grad(output, targets, grad_outputs=chunk, retain_graph=True,
                                        allow_unused=True, is_grads_batched=True)
        except RuntimeError:
            # Some operations have no batching rule: fall back to one pass per vector.
            per_vector = [torch.autograd.grad(output, targets, grad_outputs=v, retain_graph=True,
                                              allow_unused=True) for v in chunk]
            grads = [None if parts[0] is None else torch.stack(parts)
                     for parts in zip(*per_vector)]
        pieces.append(list(grads))
    merged = []
    for per_target in zip(*pieces):
        merged.append(None if per_target[0] is None else torch.cat(per_target))
    return merged


class CaptureHooks:
    """Installs the hooks on ``model`` and collects finished records for the optimizer."""

    def __init__(self, model: nn.Module, blocks: Iterable[LayerCurvature],
                 source: Optional[FisherSource], loss_fn=None):
        # Layers a module hook sees, by module; layers applied inside another module's forward
        # (attention projections, blocks/attention.py) by that owner, which installs its own hooks.
        self.blocks: Dict[nn.Module, LayerCurvature] = {}
        owned: Dict[nn.Module, List[LayerCurvature]] = {}
        for block in blocks:
            owner = getattr(block.layer, "owner", None)
            if owner is None:
                self.blocks[block.layer.module] = block
            else:
                owned.setdefault(owner, []).append(block)
        self._all_blocks = list(self.blocks.values()) + [b for group in owned.values() for b in group]
        self.source = source          # None means the empirical Fisher
        self.loss_fn = loss_fn
        self.armed = True
        self.seconds = {"capture": 0.0, "extra_backward": 0.0}  # time spent inside the user's passes
        self.records: List[ForwardRecord] = []
        self._current: Optional[ForwardRecord] = None
        self._model = model
        other = _HOOKED_MODELS.get(model)
        if other is not None and other() is not None:
            # Two sets of capture hooks on one model interfere: the second misses its output gradients.
            warnings.warn("this model already carries the capture hooks of another FisherDescent; call "
                          "remove_hooks() on that optimizer first, or this one will miss curvature statistics",
                          stacklevel=4)
        _HOOKED_MODELS[model] = weakref.ref(self)
        self._handles = [model.register_forward_pre_hook(self._model_pre_hook)]
        for module in self.blocks:
            self._handles.append(module.register_forward_hook(self._layer_hook))
        for owner, group in owned.items():
            self._handles += group[0].layer.install_capture(owner, group, self)
        # Last, so that it runs after the layer hooks even when the model is itself a layer.
        self._handles.append(model.register_forward_hook(self._model_post_hook))

    def remove(self) -> None:
        for handle in self._handles:
            handle.remove()
        self._handles.clear()
        mine = _HOOKED_MODELS.get(self._model)
        if mine is not None and mine() is self:
            del _HOOKED_MODELS[self._model]

    # -- hooks ------------------------------------------------------------------------------
    def _model_pre_hook(self, model, inputs):
        if self.armed and model.training and torch.is_grad_enabled() and self._current is None:
            self._current = ForwardRecord()

    def _layer_hook(self, module, inputs, output):
        if self._current is None or not module.training or not isinstance(output, torch.Tensor) \
                or not output.requires_grad:
            return None
        return self.record_call(self.blocks[module], inputs[0], output)

    @property
    def recording(self) -> bool:
        """Whether a forward due a refresh is being recorded (for layers that install their own hooks)."""
        return self._current is not None

    def record_call(self, block: LayerCurvature, layer_input: torch.Tensor, output: torch.Tensor,
                    output_rows=None) -> torch.Tensor:
        """Record one call of ``block``'s layer; returns the copy of ``output`` the network goes on with."""
        record = self._current
        started = time.perf_counter()
        call = LayerCall(block, block.layer.input_rows(layer_input.detach()), output, output_rows=output_rows)
        record.calls.append(call)
        if self.source is None:
            record.handles.append(output.register_hook(lambda grad, call=call: self._empirical_grad(call, grad)))
        copy = output.clone()
        self.seconds["capture"] += time.perf_counter() - started
        return copy

    def _model_post_hook(self, model, inputs, output):
        record, self._current = self._current, None
        if record is None or not record.calls:
            return None
        self.records.append(record)
        if self.source is None:
            c = empirical_reduction_scale(self.loss_fn, output, record.calls[0].input_rows.shape[0])
            for call in record.calls:
                call.scale = 1.0 / c
        elif not isinstance(output, torch.Tensor):
            raise TypeError(f"fisher={self.source.mode!r} needs the model to return the tensor the loss "
                            f"is applied to; it returned {type(output).__name__}. "
                            "Use fisher='empirical' or wrap the model so it returns that tensor.")
        elif output.requires_grad:
            record.output = output
            record.handles.append(output.register_hook(lambda grad, record=record: self._extra_backward(record)))
        return None

    def _empirical_grad(self, call: LayerCall, grad: torch.Tensor):
        if call.grad_rows is None:
            call.grad_rows = call.rows_of(grad.detach().unsqueeze(0))
        return None

    def _extra_backward(self, record: ForwardRecord):
        if record.done:  # the extra pass itself reaches the output too
            return None
        record.done = True
        output = record.output
        started = time.perf_counter()
        vectors, scale = self.source.output_vectors(output.detach())
        grads = batched_output_grads(output, [call.output for call in record.calls], vectors)
        for call, grad in zip(record.calls, grads):
            if grad is not None:
                call.grad_rows = call.rows_of(grad.detach())
                call.scale = scale
        self.seconds["extra_backward"] += time.perf_counter() - started
        record.drop_tensors()
        return None

    # -- hand-over ----------------------------------------------------------------------------
    def hand_over(self) -> Dict[LayerCurvature, int]:
        """Give every finished layer call to its block; returns forwards seen per block."""
        forwards: Dict[LayerCurvature, int] = {}
        for index, record in enumerate(self.records):
            seen = set()
            for call in record.calls:
                if call.grad_rows is None:
                    continue
                call.block.add_capture(call.input_rows, call.grad_rows, call.scale, index)
                seen.add(call.block)
            for block in seen:
                forwards[block] = forwards.get(block, 0) + 1
            record.release()
        self.records.clear()
        return forwards

    def discard(self) -> None:
        for record in self.records:
            record.release()
        self.records.clear()
        for block in self._all_blocks:
            block.clear_pending()
