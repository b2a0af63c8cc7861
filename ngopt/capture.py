"""Forward and backward hooks that record what the curvature blocks need.

On a forward pass of the whole model that is due a refresh (training mode,
gradients enabled), every supported layer records its input rows ``a`` and
keeps a handle on its own output.  The output gradients ``g`` then come from
one of three Fisher sources:

* ``empirical``: the gradients of the user's loss, caught by tensor hooks
  during the user's own ``backward()``;
* ``sampled``: the criterion object ``loss_fn`` is hooked too, so every call
  ``loss_fn(z, y)`` made after the model's forward is seen with the tensor
  ``z`` it actually receives (the model output, or a reshaped, sliced, scaled
  or dict-picked version of it).  When the user's ``backward()`` reaches the
  loss, a hook runs one extra backward pass from ``z`` with ``c * grad_z l(z, y~)``
  for targets ``y~`` drawn from the model's distribution *at z*, through
  whatever the user's code did between the model and the loss;
* ``exact``: the same extra pass with the columns of the output Fisher's square
  root at ``z``, which gives the expectation over the predictive distribution.

Several criterion calls in one forward (two heads, an auxiliary loss) each get
their own pass; each call's statistics are weighted by ``dL/dl_i``, the gradient
the user's backward sends into that call's loss value, so ``L = l_1 + 0.3 l_2``
gets ``F_1 + 0.3 F_2``.  A call on a tensor that does not depend on any
supported layer contributes nothing.

The extra pass asks ``torch.autograd.grad`` for the gradients of the layer
outputs only, so it neither accumulates into ``.grad`` nor changes what the
user's backward computes.  It differentiates with respect to the layer's own
output even when an operation downstream modifies that tensor in place
(``ReLU(inplace=True)``): it holds the output's edge in the autograd graph
(``torch.autograd.graph.get_gradient_edge``), not the tensor, so no copy of the
activations is made.  (On a torch without gradient edges each layer hands the
network a copy of its output instead.)  The hooks run eagerly under
``torch.compile`` (they are excluded from tracing).
"""
from __future__ import annotations

import time
import warnings
import weakref
from dataclasses import dataclass, field
from typing import Callable, Dict, Iterable, List, Optional, Tuple

import torch
from torch import nn

from .blocks.base import LayerCurvature
from .likelihoods import OutputLikelihood, empirical_reduction_scale
from .output_gradients import batched_output_grads, stream_output_grads

# model -> weak reference to the capture hooks on it: keeps nothing alive, travels with no copy of a model
_HOOKED_MODELS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
# Above this many output-Fisher columns per example, fisher="exact" costs more than it is usually worth.
EXACT_COLUMNS_WARNING = 64


def run_eagerly(fn):
    """Keep ``fn`` out of ``torch.compile``'s tracing: hooks keep Python state and read clocks."""
    disable = getattr(getattr(torch, "compiler", None), "disable", None)
    return disable(fn) if disable is not None else fn


def _inside_function_transform() -> bool:
    """Under torch.func (vmap, grad, jvp: exact-Fisher probes, rules' products) nothing is recorded."""
    active = getattr(torch._C, "_are_functorch_transforms_active", None)
    return bool(active()) if active is not None else False


_gradient_edge = getattr(torch.autograd.graph, "get_gradient_edge", None)


def _streamable(targets) -> bool:
    """Whether the layer outputs are gradient edges (not tensors), which a streamed pass needs."""
    return _gradient_edge is not None and all(not isinstance(t, torch.Tensor) for t in targets)


def output_target(output: torch.Tensor):
    """``(what to differentiate with respect to, what the network goes on with)`` for a layer output.

    The gradient edge of ``output`` names the layer's own result even after an in-place
    operation changes the tensor; without edges, a copy keeps the output itself untouched.
    """
    if _gradient_edge is not None:
        return _gradient_edge(output), output
    return output, output.clone()


@dataclass
class LayerCall:
    block: LayerCurvature
    input_rows: torch.Tensor  # or a compact stand-in (blocks/rows.py)
    output: Optional[object]  # the output's gradient edge (or the output itself, see output_target)
    # (grad rows, scale, index of the criterion call they come from); one entry per Fisher pass
    grads: List[Tuple[torch.Tensor, float, int]] = field(default_factory=list)
    # Output gradients -> rows, when the call covers part of its layer (default: block.layer.output_rows).
    output_rows: Optional[Callable[[torch.Tensor], torch.Tensor]] = None

    def rows_of(self, grads: torch.Tensor) -> torch.Tensor:
        return (self.output_rows or self.block.layer.output_rows)(grads)


@dataclass
class CriterionCall:
    """One ``loss_fn(z, y)`` call after a recorded forward."""

    input: Optional[torch.Tensor]          # z, the tensor the criterion received
    weight: Optional[float] = None         # dL/dl for this call, known once the user's backward reaches it


@dataclass
class ForwardRecord:
    calls: List[LayerCall] = field(default_factory=list)
    criteria: List[CriterionCall] = field(default_factory=list)
    done: bool = False
    examples: int = 0  # the model's batch size (leading dimension of its first tensor input)
    # Tensor hooks that refer back to tensors of this record: a cycle through autograd's C++ side
    # that Python's garbage collector cannot see, so they are removed by hand once the record is used.
    handles: list = field(default_factory=list)
    # Blocks that were handed this record's captures during the backward already (see _extra_passes).
    handed: set = field(default_factory=set)

    def drop_tensors(self) -> None:
        """Forget the layer outputs: breaks the cycles, and is safe inside a running hook."""
        for call in self.calls:
            call.output = None

    def release(self) -> None:
        for handle in self.handles:
            handle.remove()
        self.handles.clear()
        self.drop_tensors()
        for criterion in self.criteria:  # a criterion call may be shared with a later record
            criterion.input = None


class FisherSource:
    """Output-gradient vectors for the ``sampled`` and ``exact`` Fisher at a criterion's input."""

    def __init__(self, mode: str, likelihood: OutputLikelihood, num_samples: int,
                 generator_for: Callable[[torch.device], torch.Generator]):
        self.mode = mode
        self.likelihood = likelihood
        self.num_samples = num_samples
        self.generator_for = generator_for
        self._warned_cost = False

    def output_vectors(self, criterion_input: torch.Tensor, examples: int = 0):
        """``(V, scale)``: vectors ``[K, *z.shape]`` and the factor ``s`` with ``G = s sum g g^T``.

        ``examples`` is the model's batch size: exact columns keep one example's terms apart.
        """
        c = self.likelihood.reduction_scale(criterion_input)
        if self.mode == "sampled":
            generator = self.generator_for(criterion_input.device)
            vectors = self.likelihood.sampled_output_grads(criterion_input, generator, self.num_samples)
            return vectors, 1.0 / (c * self.num_samples)
        columns = self.likelihood.exact_columns(criterion_input, examples)
        if columns.shape[0] > EXACT_COLUMNS_WARNING and not self._warned_cost:
            rows = criterion_input.shape[0]
            layout = criterion_input
            if examples and rows != examples and rows % examples == 0:
                layout = self.likelihood.group_positions(criterion_input, examples)
            warnings.warn(f"fisher='exact' backpropagates {columns.shape[0]} vectors per refresh for the "
                          f"criterion input of shape {tuple(criterion_input.shape)} "
                          f"({self.likelihood.describe_columns(layout)}); fisher='sampled' costs one",
                          stacklevel=2)
            self._warned_cost = True
        return columns, 1.0 / c


def _give(call: LayerCall, rows, scale: float, weight: Optional[float], key, receivers: set) -> bool:
    """Hand one call's output-gradient rows to its block, weighted by ``dL/dl`` of their criterion call.

    Rows the backward never reached, and losses the user ascends (weight <= 0), add nothing.  ``key``
    is (forward, criterion call): "reduce" joins calls of one pass only.  Returns whether it gave.
    """
    if rows is None or weight is None or weight <= 0:
        return False
    call.block.add_capture(call.input_rows, rows, scale * weight, key)
    receivers.add(call.block)
    return True


class CaptureHooks:
    """Installs the hooks on ``model`` (and ``loss_fn``) and collects finished records for the optimizer."""

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
        # Time spent inside the user's passes; statistics_in_backward: captures folded during the pass.
        self.seconds = {"capture": 0.0, "extra_backward": 0.0, "statistics_in_backward": 0.0}
        self.records: List[ForwardRecord] = []
        self.forwards_without_criterion = 0
        self._current: Optional[ForwardRecord] = None
        self._model = model
        other = _HOOKED_MODELS.get(model)
        if other is not None and other() is not None:
            # Two sets of capture hooks on one model interfere: the second misses its output gradients.
            warnings.warn("this model already carries the capture hooks of another FisherDescent; call "
                          "remove_hooks() on that optimizer first, or this one will miss curvature statistics",
                          stacklevel=4)
        _HOOKED_MODELS[model] = weakref.ref(self)
        self._handles = [model.register_forward_pre_hook(run_eagerly(self._model_pre_hook))]
        for module in self.blocks:
            self._handles.append(module.register_forward_hook(run_eagerly(self._layer_hook)))
        for owner, group in owned.items():
            self._handles += group[0].layer.install_capture(owner, group, self)
        # Last, so that it runs after the layer hooks even when the model is itself a layer.
        self._handles.append(model.register_forward_hook(run_eagerly(self._model_post_hook)))
        if isinstance(loss_fn, nn.Module):
            self._handles.append(loss_fn.register_forward_hook(run_eagerly(self._criterion_hook)))

    def remove(self) -> None:
        for handle in self._handles:
            handle.remove()
        self._handles.clear()
        mine = _HOOKED_MODELS.get(self._model)
        if mine is not None and mine() is self:
            del _HOOKED_MODELS[self._model]

    # -- hooks ------------------------------------------------------------------------------
    def _model_pre_hook(self, model, inputs):
        # Identity checks: a deep copy of the model carries these hooks along and must record nothing.
        if model is self._model and self.armed and model.training and torch.is_grad_enabled() \
                and self._current is None and not _inside_function_transform():
            first = next((x for x in inputs if isinstance(x, torch.Tensor)), None)
            self._current = ForwardRecord(examples=first.shape[0] if first is not None and first.dim() else 0)

    def _layer_hook(self, module, inputs, output):
        if self._current is None or module not in self.blocks or not module.training \
                or not isinstance(output, torch.Tensor) or not output.requires_grad:
            return None
        return self.record_call(self.blocks[module], inputs[0], output)

    @property
    def recording(self) -> bool:
        """Whether a forward due a refresh is being recorded (for layers that install their own hooks)."""
        return self._current is not None

    def record_call(self, block: LayerCurvature, layer_input: torch.Tensor, output: torch.Tensor,
                    output_rows=None) -> torch.Tensor:
        """Record one call of ``block``'s layer; returns what the network goes on with (``output``, or a copy)."""
        record = self._current
        started = time.perf_counter()
        target, handed_on = output_target(output)
        call = LayerCall(block, block.layer.recorded_rows(layer_input.detach()), target, output_rows=output_rows)
        record.calls.append(call)
        if self.source is None:
            # A tensor hook gets the gradient of the value it was registered on, in-place changes or not.
            record.handles.append(output.register_hook(lambda grad, call=call: self._empirical_grad(call, grad)))
        self.seconds["capture"] += time.perf_counter() - started
        return handed_on

    def _model_post_hook(self, model, inputs, output):
        if model is not self._model:
            return None
        record, self._current = self._current, None
        if record is None or not record.calls:
            return None
        self.records.append(record)
        if self.source is None:
            # Until the criterion is seen (or when it is not an nn.Module): the scale of a
            # mean over the batch, or of a sum.
            scale = 1.0 / empirical_reduction_scale(self.loss_fn, None, record.calls[0].input_rows.shape[0])
            for call in record.calls:
                call.grads = [(None, scale, 0)]
        elif isinstance(output, torch.Tensor) and output.requires_grad:
            # Reached only if no criterion call saw this forward (a functional loss, another instance).
            record.handles.append(output.register_hook(
                lambda grad, record=record, output=output: self._output_grad(record, output)))
        return None

    def _criterion_hook(self, criterion, inputs, loss):
        """``loss_fn(z, y)`` after a recorded forward: note ``z`` and hook the loss value."""
        if criterion is not self.loss_fn or _inside_function_transform():
            return None
        open_records = [record for record in self.records if not record.done]
        if not open_records or not inputs or not isinstance(inputs[0], torch.Tensor):
            return None
        z = inputs[0]
        if not torch.is_grad_enabled() or not z.requires_grad \
                or not isinstance(loss, torch.Tensor) or not loss.requires_grad:
            return None
        if self.source is None:
            scale = 1.0 / empirical_reduction_scale(self.loss_fn, z, z.shape[0] if z.dim() else 1)
            for record in open_records:
                for call in record.calls:
                    call.grads = [(rows, scale, index) for rows, _, index in call.grads]
            return None
        self.source.likelihood.check_input(z)
        criterion_call = CriterionCall(z)
        for record in open_records:
            record.criteria.append(criterion_call)
            record.handles.append(loss.register_hook(
                lambda grad, record=record, call=criterion_call: self._loss_grad(record, call, grad)))
        return None

    def _empirical_grad(self, call: LayerCall, grad: torch.Tensor):
        if call.grads and call.grads[0][0] is None:
            _, scale, index = call.grads[0]
            call.grads[0] = (call.rows_of(grad.detach().unsqueeze(0)), scale, index)
        return None

    def _loss_grad(self, record: ForwardRecord, criterion_call: CriterionCall, grad: torch.Tensor):
        """The user's backward reached a criterion call's loss: nothing below any loss has run yet."""
        criterion_call.weight = float(grad.sum()) if grad is not None else 0.0
        if record.done:
            return None
        record.done = True
        self._extra_passes(record)
        return None

    def _extra_passes(self, record: ForwardRecord) -> None:
        """One extra backward pass per criterion call, from its input to the layer outputs.

        When every criterion call's weight is known already (one criterion: always), each layer's
        output gradients go to its block during the pass, and blocks whose statistics are sums
        fold them at once: the pass never holds every layer's gradients together (they are as
        large as the activations).  Otherwise they wait in the record for :meth:`hand_over`.
        """
        started = time.perf_counter()
        outputs = [call.output for call in record.calls]
        forward = next((i for i, r in enumerate(self.records) if r is record), None)  # by identity
        early = forward is not None and all(c.weight is not None for c in record.criteria)
        calls_of: Dict[LayerCurvature, int] = {}
        for call in record.calls:
            calls_of[call.block] = calls_of.get(call.block, 0) + 1
        folding = 0.0
        for index, criterion in enumerate(record.criteria):
            z = criterion.input
            if z is None:
                continue
            vectors, scale = self.source.output_vectors(z.detach(), record.examples)

            def take(i, grads, index=index, scale=scale, weight=criterion.weight):
                nonlocal folding
                call = record.calls[i]
                rows = call.rows_of(grads.detach())
                if not early:
                    call.grads.append((rows, scale, index))
                    return
                tick = time.perf_counter()
                if _give(call, rows, scale, weight, (forward, index), record.handed) and calls_of[call.block] == 1:
                    call.block.fold_pending()  # per-forward sums need all calls of the layer first
                folding += time.perf_counter() - tick

            if vectors.shape[0] == 1 and _streamable(outputs):
                stream_output_grads(z, outputs, vectors[0], lambda i, g: take(i, g.unsqueeze(0)))
            else:
                for i, g in enumerate(batched_output_grads(z, outputs, vectors)):
                    if g is not None:
                        take(i, g)
        tick = time.perf_counter()
        for block in record.handed:  # layers with several calls: their per-forward sums are whole now
            block.fold_pending()
        folding += time.perf_counter() - tick
        self.seconds["statistics_in_backward"] += folding
        self.seconds["extra_backward"] += time.perf_counter() - started - folding
        record.drop_tensors()

    def _output_grad(self, record: ForwardRecord, output: torch.Tensor):
        """The backward reached the model output and no criterion call was seen: take the output as its input."""
        if record.done:
            return None
        self.forwards_without_criterion += 1
        record.criteria.append(CriterionCall(output, weight=1.0))
        record.done = True
        self._extra_passes(record)
        return None

    # -- hand-over ----------------------------------------------------------------------------
    def hand_over(self) -> Dict[LayerCurvature, int]:
        """Give every finished layer call to its block; returns forwards seen per block."""
        forwards: Dict[LayerCurvature, int] = {}
        for index, record in enumerate(self.records):
            seen = set(record.handed)
            for call in record.calls:
                for rows, scale, criterion_index in call.grads:
                    weight = 1.0 if self.source is None else record.criteria[criterion_index].weight
                    _give(call, rows, scale, weight, (index, criterion_index), seen)
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
