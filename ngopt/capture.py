"""What a recorded training forward and the user's backward tell the curvature blocks.

On a forward pass of the whole model that is due a refresh (training mode,
gradients enabled), the use recorder (``uses/recorder.py``) sees every operation
that applies a parameter and records, per call, its input rows ``a`` and a handle on
its output.  Supported loss calls are found wherever they are made: inside the
model's forward (the recorder), in the user's code after it (``uses/losses.py``), or
through the hook of the criterion object passed as ``loss_fn``.  The output
gradients ``g`` then come from one of three Fisher sources:

* ``empirical``: the gradients of the user's loss, caught by tensor hooks during
  the user's own ``backward()``;
* ``sampled``: when the user's backward reaches a loss call's value, a hook runs
  one extra backward pass from that call's input ``z`` with ``grad_z l(z, y~)`` for
  targets ``y~`` drawn from the model's distribution at ``z``, through whatever the
  code did between the layers and the loss;
* ``exact``: the same extra pass with the columns of the output Fisher's square
  root at ``z``, which gives the expectation over the predictive distribution.

Each loss call's terms are weighted by ``w_n = dL/dl_n``, the gradient the user's
backward sends into them (``likelihoods.LossCall``): a mean, a sum, a mask, a
division by a token count or a loss scale all reach the statistics this way, and
only this way.  Several loss calls (two heads, an auxiliary loss) each get their
own pass with their own weights; terms the loss ignores carry no curvature.

The extra pass asks ``torch.autograd.grad`` for the gradients of the layer
outputs only, so it neither accumulates into ``.grad`` nor changes what the
user's backward computes.  It differentiates with respect to each call's own
output even when an operation downstream modifies that tensor in place: it holds
the output's edge in the autograd graph (``torch.autograd.graph.get_gradient_edge``),
not the tensor, so no copy of the activations is made.  (On a torch without
gradient edges each call hands the network a copy of its output instead.)
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
from .diagnostic_keys import PASS_TIME
from .likelihoods import (CRITERIA, LossCall, UnsupportedLoss, criterion_arguments, likelihood_from_arguments,
                          recorded_total)
from .output_gradients import batched_output_grads, stream_output_grads
from .uses import ParamView, UseRecorder, run_eagerly
from .uses.recorder import output_target, remove_mode
from .uses.losses import BackwardWatch, LossWatch, leaves, sweep_closed_watches

# model -> weak reference to the capture hooks on it: keeps nothing alive, travels with no copy of a model
_HOOKED_MODELS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
# Above this many output-Fisher columns per example, fisher="exact" costs more than it is usually worth.
EXACT_COLUMNS_WARNING = 64


def inside_function_transform() -> bool:
    """Under torch.func (vmap, grad, jvp: exact-Fisher probes, rules' products) nothing is recorded."""
    active = getattr(torch._C, "_are_functorch_transforms_active", None)
    return bool(active()) if active is not None else False


def _streamable(targets) -> bool:
    """Whether the layer outputs are gradient edges (not tensors), which a streamed pass needs."""
    return all(not isinstance(t, torch.Tensor) for t in targets)


def _device_rng_states(model: nn.Module) -> dict:
    """The generators' states of the accelerators the model lives on (dropout there draws from them)."""
    if not torch.cuda.is_initialized():  # no tensor can be on a GPU yet: no walk over the parameters
        return {}
    devices = {p.device.index or 0 for p in model.parameters() if p.device.type == "cuda"}
    return {index: torch.cuda.get_rng_state(index) for index in devices}


def batch_size(args, kwargs) -> int:
    """The leading dimension of the model's first tensor argument (0 when there is none)."""
    first = next((x for x in list(args) + list(kwargs.values()) if isinstance(x, torch.Tensor)), None)
    return int(first.shape[0]) if first is not None and first.dim() else 0


@dataclass
class LayerCall:
    """One recorded call of a use; ``block`` and ``term`` are set when the forward ends."""

    use: object                      # uses.UseCall
    input_rows: object
    output: Optional[object]         # the output's gradient edge (or the output itself, see output_target)
    block: Optional[LayerCurvature] = None
    term: int = 0
    # Empirical Fisher: the user's own output gradients, as rows, until the step gives them a scale.
    empirical_rows: Optional[torch.Tensor] = None

    def rows_of(self, grads: torch.Tensor) -> torch.Tensor:
        return self.use.output_rows(grads)

    @property
    def scale(self) -> float:
        return self.use.weight_scale


@dataclass
class ForwardRecord:
    examples: int = 0                # the model's batch size
    statistics: bool = False         # rows go to the blocks (a refresh is due)
    calls: List[LayerCall] = field(default_factory=list)
    losses: List[LossCall] = field(default_factory=list)
    unsupported_losses: List[str] = field(default_factory=list)
    # The forward's arguments for replaying it (only on steps a rule evaluates the batch).
    inputs: Optional[dict] = None
    watch: Optional[LossWatch] = None
    output_fallback: bool = False    # the loss was taken at the model output (no loss call was found)
    # The constant the loss was multiplied by before backward() (a loss scaler's factor): the term
    # weights are kept per unit of it, so that huge scales never reach the statistics' sums.
    root_scale: Optional[float] = None
    unrecognized: Dict = field(default_factory=dict)   # parameter -> functions with no block
    # Tensor hooks that refer back to tensors of this record: a cycle through autograd's C++ side
    # that Python's garbage collector cannot see, so they are removed by hand once the record is used.
    handles: list = field(default_factory=list)
    # Blocks that were handed this record's captures during the backward already.
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
        for call in self.losses:
            call.release()
        self.watch = None


class FisherSource:
    """Output-gradient vectors for the ``sampled`` and ``exact`` Fisher at a loss call's input."""

    def __init__(self, mode: str, num_samples: int, generator_for: Callable[[torch.device], torch.Generator]):
        self.mode = mode
        self.num_samples = num_samples
        self.generator_for = generator_for
        self._warned_cost = False

    def output_vectors(self, call: LossCall, examples: int = 0):
        """``(V, scale)``: vectors ``[K, *z.shape]`` and the factor ``s`` with ``G = s sum g g^T``."""
        z = call.input
        generator = self.generator_for(z.device) if self.mode == "sampled" else None
        vectors, scale = call.fisher_vectors(self.mode, generator, self.num_samples, examples)
        if self.mode == "exact" and vectors is not None and vectors.shape[0] > EXACT_COLUMNS_WARNING \
                and not self._warned_cost:
            self._warned_cost = True
            layout = z
            rows = z.shape[0] if z.dim() else 1
            if examples and rows != examples and rows % examples == 0:
                layout = call.likelihood.group_positions(z, examples)
            warnings.warn(f"fisher='exact' backpropagates {vectors.shape[0]} vectors per refresh for the loss "
                          f"input of shape {tuple(z.shape)} ({call.likelihood.describe_columns(layout)}); "
                          "fisher='sampled' costs one", stacklevel=2)
        return vectors, scale


def _give(call: LayerCall, rows, scale: float, key, receivers: set) -> bool:
    """Hand one call's output-gradient rows to its block.  ``key`` is (forward, loss call)."""
    if rows is None or call.block is None or not scale > 0:
        return False
    call.block.add_capture(call.input_rows, rows, scale * call.scale, key, term=call.term)
    receivers.add(call.block)
    return True


class CaptureHooks:
    """Installs the hooks on ``model`` (and ``loss_fn``) and collects finished records for the optimizer.

    ``on_forward(record)`` runs when a recorded forward ends: the optimizer gives each call its block.
    """

    def __init__(self, model: nn.Module, params: Iterable[nn.Parameter], source: Optional[FisherSource],
                 loss_fn=None, on_forward: Callable[[ForwardRecord], None] = None):
        self.source = source          # None means the empirical Fisher
        self.loss_fn = loss_fn
        self.on_forward = on_forward
        self.views = {id(p): ParamView(p) for p in params}
        # What the next forwards record (the optimizer sets it for each step).
        self.want_statistics = True
        self.want_uses = True
        self.want_batch = False
        self.want_loss_value = True   # the value each backward starts from (the loss bound's input)
        self.armed = True             # False inside no_capture()
        # Time spent inside the user's passes; statistics_in_backward: captures folded during the pass.
        self.seconds = {key: 0.0 for key in PASS_TIME}
        self.records: List[ForwardRecord] = []
        self.forwards_without_loss = 0
        self._current: Optional[ForwardRecord] = None
        self._recorder: Optional[UseRecorder] = None
        self.last_call: Optional[LayerCall] = None
        self._opened_by_hook = False
        self._watch: Optional[LossWatch] = None
        self._roots: List[torch.Tensor] = []  # the loss values backward() started from since the last step
        self._model = model
        other = _HOOKED_MODELS.get(model)
        if other is not None and other() is not None:
            # Two sets of capture hooks on one model interfere: the second misses its output gradients.
            warnings.warn("this model already carries the capture hooks of another FisherDescent; call "
                          "remove_hooks() on that optimizer first, or this one will miss curvature statistics",
                          stacklevel=4)
        _HOOKED_MODELS[model] = weakref.ref(self)
        self._handles = [model.register_forward_pre_hook(run_eagerly(self._model_pre_hook), with_kwargs=True),
                         model.register_forward_hook(run_eagerly(self._model_post_hook), always_call=True)]
        if isinstance(loss_fn, nn.Module):
            self._handles.append(loss_fn.register_forward_hook(run_eagerly(self._criterion_hook)))

    def track(self, params: Iterable[nn.Parameter]) -> None:
        """Record the uses of these parameters too (a param group added after construction)."""
        self.views.update({id(p): ParamView(p) for p in params})

    def loss_scale_seen(self) -> Optional[float]:
        """The constant the last recorded loss was multiplied by before ``backward()`` (a loss scaler's).

        The statistics of this step's records are kept per unit of it (1 when none was seen)."""
        for record in reversed(self.records):
            if record.root_scale is not None:
                return record.root_scale
        return None

    def plan(self, statistics: bool, uses: bool, batch: bool) -> None:
        """What the next recorded forwards keep: statistics for the blocks, uses to discover, the batch."""
        self.want_statistics, self.want_uses, self.want_batch = statistics, uses or statistics, batch

    def remove(self) -> None:
        self.close_watch()
        for handle in self._handles:
            handle.remove()
        self._handles.clear()
        mine = _HOOKED_MODELS.get(self._model)
        if mine is not None and mine() is self:
            del _HOOKED_MODELS[self._model]

    @property
    def recording(self) -> bool:
        return self._current is not None

    # -- the model's forward ----------------------------------------------------------------
    def _model_pre_hook(self, model, args, kwargs):
        self.close_watch()  # a new forward: the previous one's loss has been computed
        sweep_closed_watches()
        if self._current is not None or not self._training_forward(model):
            return None
        losses = self.want_statistics or self.want_batch
        if not (self.want_uses or losses):
            return None
        record = ForwardRecord(examples=batch_size(args, kwargs), statistics=self.want_statistics)
        if self.want_batch:
            record.inputs = {"args": args, "kwargs": dict(kwargs), "rng_state": torch.get_rng_state(),
                             "device_rng_states": _device_rng_states(model)}
        self._current = record
        self._recorder = UseRecorder(self, self.views, record.examples, uses=self.want_uses, losses=losses)
        self._recorder.__enter__()
        self._opened_by_hook = True
        return None

    def _training_forward(self, model) -> bool:
        """Whether this forward of ``model`` trains it with capture armed.  Identity check: a deep copy of the
        model carries these hooks along and must record nothing."""
        return model is self._model and self.armed and model.training and torch.is_grad_enabled() \
            and not inside_function_transform()

    def _model_post_hook(self, model, args, output):
        if self.want_loss_value and self._current is None and self._training_forward(model) \
                and LossWatch.can_push():
            self._watch = BackwardWatch(self)  # a forward that records nothing: its loss value only
            self._watch.push()
            return None
        if model is not self._model or self._current is None or not self._opened_by_hook:
            return None
        record, recorder = self._current, self._recorder
        self._current = self._recorder = None
        self._opened_by_hook = False
        remove_mode(recorder)  # on top, unless a mode entered inside the forward was left open
        record.unrecognized = recorder.unrecognized
        if output is None:  # the forward raised: nothing of it is kept
            record.release()
            return None
        if self.on_forward is not None:
            self.on_forward(record)
        self.records.append(record)
        if self.source is not None and record.statistics:
            # Reached only if no loss call is seen for this forward: the output is then taken as the loss input.
            for _, tensor in leaves(output)[:1]:
                if tensor.requires_grad:
                    record.handles.append(tensor.register_hook(
                        lambda grad, record=record, tensor=tensor: self._output_grad(record, tensor)))
        if (record.statistics or record.inputs is not None) and LossWatch.can_push():
            self._watch = record.watch = LossWatch(self, record, output)
            self._watch.push()
        return None

    def record_uses_of(self, model, args, kwargs) -> None:
        """One forward that only finds uses (for ``assign_curvature``): nothing reaches the statistics."""
        record = ForwardRecord(examples=batch_size(args, kwargs))
        recorder = UseRecorder(self, self.views, record.examples, uses=True, losses=False)
        self._current, self._recorder = record, recorder
        armed, self.armed = self.armed, False  # the model's own hooks stay out of it
        try:
            with recorder:
                model(*args, **kwargs)
        finally:
            self.armed = armed
            self._current = self._recorder = None
        record.unrecognized = recorder.unrecognized
        if self.on_forward is not None:
            self.on_forward(record)
        record.release()

    def note_root(self, root) -> None:
        """Keep the value a training backward started from (one element; other roots are no loss)."""
        if isinstance(root, torch.Tensor) and root.numel() == 1:
            self._roots.append(root.detach().reshape(()))

    def take_roots(self) -> List[torch.Tensor]:
        """The loss values of this step's backward passes, handed over once; the watch is taken off the
        mode stack first, so that the step's own operations do not pass through it."""
        self.close_watch()
        roots, self._roots = self._roots, []
        return roots

    def close_watch(self) -> None:
        """Take the loss watch off the mode stack (the loss of the last forward is complete)."""
        if self._watch is not None:
            self._watch.remove()
            self._watch = None

    def record_use(self, use, output: torch.Tensor) -> torch.Tensor:
        """Record one call of a use (from the use recorder); returns what the network goes on with."""
        record = self._current
        started = time.perf_counter()
        target, handed_on = output_target(output)
        call = LayerCall(use, use.input_rows, target)
        record.calls.append(call)
        self.last_call = call
        if self.source is None and record.statistics:
            # A tensor hook gets the gradient of the value it was registered on, in-place changes or not.
            record.handles.append(output.register_hook(lambda grad, call=call: self._empirical_grad(call, grad)))
        self.seconds["capture"] += time.perf_counter() - started
        return handed_on

    def spread_call(self, call: LayerCall, expanded: torch.Tensor, examples: int) -> None:
        """A call's one shared row was expanded over the examples: its rows and output are the expanded ones."""
        call.input_rows = call.input_rows.expand((examples,) + tuple(call.input_rows.shape[1:]))
        call.output, _ = output_target(expanded)
        if self.source is None and self._current is not None and self._current.statistics:
            self._current.handles.append(expanded.register_hook(
                lambda grad, call=call: self._empirical_grad(call, grad)))

    # -- loss calls -------------------------------------------------------------------------
    def _open_record(self, inside_forward: bool, watch=None) -> Optional[ForwardRecord]:
        if inside_forward:
            return self._current
        if watch is not None:
            return watch.record
        return self.records[-1] if self.records and self.records[-1].watch is None else None

    def loss_call(self, func, args, kwargs, inside_forward: bool, watch=None):
        """A supported loss function is called on a recorded forward's output: note it, hook its value."""
        record = self._open_record(inside_forward, watch)
        value = func(*args, **kwargs)
        if record is not None and not inside_function_transform():
            self._note_loss(record, func, args, kwargs, value, inside_forward, watch)
        return value

    def _note_loss(self, record, func, args, kwargs, value, inside_forward, watch) -> None:
        try:
            likelihood, z, target = likelihood_from_arguments(func, args, kwargs)
        except UnsupportedLoss as reason:
            record.unsupported_losses.append(str(reason))
            return
        if not isinstance(z, torch.Tensor) or not z.requires_grad or not isinstance(value, torch.Tensor) \
                or not value.requires_grad:
            return
        if self.source is not None:
            likelihood.check_input(z)
        index = sum(1 for c in record.losses if c.origin and c.origin[0] == "forward")
        origin = ("forward", index) if inside_forward else \
            ("after", watch.program_for(z) if watch is not None else None)
        call = LossCall(likelihood, z, target, float(value.detach().sum()), origin=origin)
        call.extra["value"] = value
        record.losses.append(call)
        record.handles.append(value.register_hook(
            lambda grad, record=record, call=call: self._loss_grad(record, call, grad)))

    def _criterion_hook(self, criterion, inputs, loss):
        """``loss_fn(z, y)`` seen by neither mode (another mode was active): read it from the object."""
        if criterion is not self.loss_fn or self._current is not None or inside_function_transform() \
                or len(inputs) < 2 or type(criterion) not in CRITERIA:
            return None
        record = self._open_record(False)
        if record is None or any(c.extra.get("value") is loss for c in record.losses):
            return None
        function, args, kwargs = criterion_arguments(criterion, inputs[0], inputs[1])
        self._note_loss(record, function, args, kwargs, loss, False, None)
        return None

    def _loss_grad(self, record: ForwardRecord, call: LossCall, grad: torch.Tensor):
        """The user's backward reached a loss call's value: its weights are known, nothing below it has run."""
        if record.root_scale is not None:
            grad = grad / record.root_scale  # per unit of the loss scale (the step settles the scale)
        call.set_weights(grad, call.extra.get("value"))
        if record.statistics and self.source is not None and call.input is not None and not call.extra.get("done"):
            call.extra["done"] = True
            self._extra_pass(record, call)
        return None

    def _output_grad(self, record: ForwardRecord, output: torch.Tensor):
        """The backward reached the model output and no loss call was seen: take the output as the loss input."""
        if record.losses or record.output_fallback or self.source is None or self.loss_fn is None \
                or type(self.loss_fn) not in CRITERIA:
            return None
        record.output_fallback = True
        self.forwards_without_loss += 1
        function, args, kwargs = criterion_arguments(self.loss_fn, output, None)
        likelihood, _, _ = likelihood_from_arguments(function, args, kwargs)
        call = LossCall(likelihood, output, None, 0.0, origin=("output",))
        call.set_weights(torch.ones((), dtype=output.dtype, device=output.device))
        record.losses.append(call)
        self._extra_pass(record, call)
        return None

    # -- the extra pass -----------------------------------------------------------------------
    def _extra_pass(self, record: ForwardRecord, loss: LossCall) -> None:
        """One extra backward pass from a loss call's input to every recorded call's output.

        Each call's output gradients go to its block during the pass, and blocks whose
        statistics are sums fold them at once: the pass never holds every call's gradients
        together (they are as large as the activations).
        """
        started = time.perf_counter()
        calls = [c for c in record.calls if c.block is not None and c.output is not None]
        if not calls:
            return
        vectors, scale = self.source.output_vectors(loss, record.examples)
        if vectors is None:
            return
        forward = next((i for i, r in enumerate(self.records) if r is record), len(self.records))
        key = (forward, record.losses.index(loss))
        calls_of: Dict[LayerCurvature, int] = {}
        for call in calls:
            calls_of[call.block] = calls_of.get(call.block, 0) + 1
        folding = 0.0

        def take(i, grads):
            nonlocal folding
            call = calls[i]
            rows = call.rows_of(grads.detach())
            tick = time.perf_counter()
            if _give(call, rows, scale, key, record.handed) and calls_of[call.block] == 1:
                call.block.fold_pending()  # per-forward sums need all calls of the block first
            folding += time.perf_counter() - tick

        outputs = [call.output for call in calls]
        z = loss.input
        if vectors.shape[0] == 1 and _streamable(outputs):
            stream_output_grads(z, outputs, vectors[0], lambda i, g: take(i, g.unsqueeze(0)))
        else:
            for i, g in enumerate(batched_output_grads(z, outputs, vectors)):
                if g is not None:
                    take(i, g)
        tick = time.perf_counter()
        for block in record.handed:  # blocks with several calls: their per-forward sums are whole now
            block.fold_pending()
        folding += time.perf_counter() - tick
        self.seconds["statistics_in_backward"] += folding
        self.seconds["extra_backward"] += time.perf_counter() - started - folding

    def _empirical_grad(self, call: LayerCall, grad: torch.Tensor):
        if call.empirical_rows is None:
            call.empirical_rows = call.rows_of(grad.detach().unsqueeze(0))
        return None

    # -- hand-over ----------------------------------------------------------------------------
    def _empirical_scale(self, record: ForwardRecord) -> float:
        """``1 / mean w_n`` of the record's first weighted loss call, or the criterion's convention."""
        for call in record.losses:
            if call.weights is not None:
                return call.empirical_scale()
        reduction = getattr(self.loss_fn, "reduction", "mean") if self.loss_fn is not None else "mean"
        return 1.0 if reduction == "sum" else float(max(record.examples, 1))

    def hand_over(self) -> Dict[LayerCurvature, int]:
        """Give every finished call to its block; returns forwards seen per block."""
        forwards: Dict[LayerCurvature, int] = {}
        self.close_watch()
        for index, record in enumerate(self.records):
            seen = set(record.handed)
            if record.statistics and self.source is None:
                scale = self._empirical_scale(record)
                unit = record.root_scale or 1.0  # the user's gradients carry the loss scale
                for call in record.calls:
                    rows = call.empirical_rows
                    _give(call, rows if rows is None or unit == 1.0 else rows / unit, scale, (index, 0), seen)
            if record.statistics:
                for block in seen:
                    forwards[block] = forwards.get(block, 0) + 1
            record.release()
        self.records.clear()
        return forwards

    def term_count(self) -> Optional[float]:
        """``1 / mean w_n`` of the latest recorded forward's loss, per unit of a seen loss scale (the
        batch's term count for a mean, 1 for a sum); None when no forward since the last step was recorded."""
        return self._empirical_scale(self.records[-1]) if self.records else None

    def recorded_loss(self) -> Optional[float]:
        """The user's loss of the latest forward whose loss calls were recorded, as its backward saw it
        (``sum_n w_n l_n`` over its calls); None when no forward since the last step recorded one."""
        for record in reversed(self.records):
            if record.losses:
                return recorded_total(record.losses)
        return None

    def latest_batch(self) -> Optional[ForwardRecord]:
        """The last recorded forward whose inputs were kept (the one its loss belongs to), or None."""
        for record in reversed(self.records):
            if record.inputs is not None:
                return record
        return None

    def discard(self) -> None:
        """Drop every record and what its passes handed to the blocks already (a skipped step)."""
        self.close_watch()
        self._roots.clear()
        blocks = {call.block for record in self.records for call in record.calls if call.block is not None}
        for record in self.records:
            record.release()
        self.records.clear()
        for block in blocks:
            block.clear_pending()

    def check_losses(self, fisher: str, loss_fn) -> Optional[str]:
        """Before a refresh with the sampled or exact Fisher: every recorded forward needs a loss call
        (or ``loss_fn`` to assume one).  Raises (after :meth:`discard`) where none can be had; returns a
        warning when the curvature was taken at the model's output for want of a loss call, else None."""
        if fisher == "empirical":
            return None
        for record in self.records:
            if not record.statistics or record.losses:
                continue
            if record.unsupported_losses:
                self.discard()
                raise RuntimeError(f"fisher={fisher!r}: the training loss has no closed-form curvature: "
                                   f"{record.unsupported_losses[0]}. Use fisher='empirical'.")
            if record.calls and loss_fn is None:
                self.discard()
                raise RuntimeError(f"fisher={fisher!r} found no loss call after the recorded forward "
                                   "(F.cross_entropy, F.mse_loss, F.binary_cross_entropy_with_logits or their "
                                   "criterion objects, in your code or inside the model); pass loss_fn=... to "
                                   "say which likelihood the model's output has, or use fisher='empirical'")
        if not self.forwards_without_loss:
            return None
        self.forwards_without_loss = 0
        return (f"fisher={fisher!r}: no loss call was seen after a recorded training forward, so the curvature "
                f"was taken at the model's output as if {type(loss_fn).__name__} were applied to it directly. "
                "That is wrong if your code reshapes, slices or scales the output first, or computes the loss "
                "with a function ngopt does not know.")
