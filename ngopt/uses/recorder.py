"""The use recorder: a torch function mode active only during a recorded training forward.

Every torch call of the forward passes through :meth:`UseRecorder.__torch_function__`.
A call that applies a tracked parameter (or a view of one, ``views.py``) goes to the
handler of its function (``uses/__init__.py``), which runs it and reports the use;
a call that merely re-expresses a parameter (a transpose, a cast) makes a new view;
any other call on a parameter is a use without a block, and the parameter takes the
fallback rule.  Loss calls inside the forward (a model that computes its own loss)
go to the capture.  Calls made with gradients disabled are nobody's use.

The mode is pushed by the model's forward pre-hook and popped by its forward hook
(which runs even when the forward raises), so it never outlives the forward.  It runs
eagerly under ``torch.compile`` (it keeps Python state).
"""
from __future__ import annotations

import contextlib
from typing import Dict, Optional, Tuple

import torch
from torch.overrides import TorchFunctionMode

from ..likelihoods import LOSS_FUNCTIONS
from .views import ParamView, derived_view, simplified, view_from_storage


def run_eagerly(fn):
    """Keep ``fn`` out of ``torch.compile``'s tracing: hooks and modes keep Python state and read clocks."""
    disable = getattr(getattr(torch, "compiler", None), "disable", None)
    return disable(fn) if disable is not None else fn


def remove_mode(mode: TorchFunctionMode) -> None:
    """Take ``mode`` off the torch function mode stack wherever it sits; modes above it stay, in order."""
    try:
        from torch._C import _len_torch_function_stack
        from torch.overrides import _pop_mode, _push_mode
    except ImportError:  # pragma: no cover - torch without a mode stack API: plain exit
        mode.__exit__(None, None, None)
        return
    above = []
    while _len_torch_function_stack() > 0:
        top = _pop_mode()
        if top is mode:
            break
        above.append(top)
    for top in reversed(above):
        _push_mode(top)


_gradient_edge = getattr(torch.autograd.graph, "get_gradient_edge", None)


def output_target(output: torch.Tensor):
    """``(what to differentiate with respect to, what the network goes on with)`` for a call's output.

    The gradient edge of ``output`` names the call's own result even after an in-place
    operation changes the tensor; without edges (torch < 2.3), a copy keeps the output itself untouched.
    """
    if _gradient_edge is not None:
        return _gradient_edge(output), output
    return output, output.clone()


def _tensors(args, kwargs):
    """The tensors among the arguments, one level into lists and tuples (``torch.cat([a, b])``)."""
    for value in list(args) + list(kwargs.values()):
        if isinstance(value, torch.Tensor):
            yield value
        elif isinstance(value, (list, tuple)):
            for item in value:
                if isinstance(item, torch.Tensor):
                    yield item


def _holds_gradient(result) -> bool:
    if isinstance(result, torch.Tensor):
        return result.requires_grad
    if isinstance(result, (list, tuple)):
        return any(isinstance(r, torch.Tensor) and r.requires_grad for r in result)
    return False


def _name(func) -> str:
    name = getattr(func, "__name__", None) or repr(func)
    owner = getattr(func, "__objclass__", None)
    if name == "__get__":
        return "an attribute of the tensor"
    return f"Tensor.{name}" if owner is not None else name


class UseRecorder(TorchFunctionMode):
    """Records the uses of ``params`` (and the loss calls) seen in one forward; see the module docstring."""

    def __init__(self, capture, params: Dict[int, ParamView], examples: int, uses: bool, losses: bool):
        super().__init__()
        self.capture = capture
        self.params = params            # id(parameter) -> its own view; built once per optimizer
        self.examples = examples        # the model's batch size (0 when unknown)
        self.uses = uses                # record parameter uses
        self.losses = losses            # record loss calls inside the forward
        self.views: Dict[int, Tuple[torch.Tensor, ParamView]] = {}
        # parameter -> why its calls have no block ("prelu, which has no curvature block", ...)
        self.unrecognized: Dict[torch.nn.Parameter, set] = {}
        self._refusal: Optional[str] = None
        # Outputs of one row shared by the whole batch (a position table looked up with [1, T] indices):
        # id -> (output, its recorded call), until an operation broadcasts them over the examples.
        self.shared_rows: Dict[int, tuple] = {}

    # -- what handlers use ------------------------------------------------------------------
    def resolve(self, tensor) -> Optional[ParamView]:
        """The :class:`ParamView` of a tracked tensor, or None."""
        if not isinstance(tensor, torch.Tensor):
            return None
        view = self.params.get(id(tensor))
        if view is not None and view.param is tensor:
            return view
        entry = self.views.get(id(tensor))
        if entry is not None and entry[0] is tensor:
            return entry[1]
        return self._view_made_elsewhere(tensor)

    def _view_made_elsewhere(self, tensor: torch.Tensor) -> Optional[ParamView]:
        """A view of a parameter this mode did not see made: one taken before the forward (kept by a
        module), or a slice of a parameter, which torch before 2.3 does not pass through the mode."""
        base = tensor._base
        if base is None or not tensor.requires_grad:
            return None
        source = self.params.get(id(base))
        if source is None or source.param is not base:
            return None
        found = view_from_storage(tensor, source)
        if found is None:
            return None
        found = simplified(found)
        self.views[id(tensor)] = (tensor, found)
        return found

    def record(self, use, output: torch.Tensor) -> torch.Tensor:
        """Hand one use to the capture; returns what the network goes on with."""
        if not isinstance(output, torch.Tensor) or not output.requires_grad:
            return output
        handed_on = self.capture.record_use(use, output)
        rows = use.input_rows
        if self.examples > 1 and output.dim() > 1 and output.shape[0] == 1 and isinstance(rows, torch.Tensor) \
                and rows.dim() > 0 and rows.shape[0] == 1:
            self.shared_rows[id(handed_on)] = (handed_on, self.capture.last_call)
        return handed_on

    def _spread_shared_rows(self, args):
        """Broadcast over the examples made explicit: one row shared by the batch, expanded to each example.

        ``x + table`` with ``table [1, T, d]`` gives every example the same rows, and the gradient
        autograd forms for the table is already summed over the examples; expanding the table to
        ``[N, T, d]`` first computes the same values and lets the capture see each example's gradient.
        """
        sized = any(isinstance(a, torch.Tensor) and a.dim() and a.shape[0] == self.examples for a in args)
        if not sized:
            return args
        spread = list(args)
        for index, value in enumerate(args):
            entry = self.shared_rows.get(id(value)) if isinstance(value, torch.Tensor) else None
            if entry is None or entry[0] is not value:
                continue
            expanded = value.expand((self.examples,) + tuple(value.shape[1:]))
            self.capture.spread_call(entry[1], expanded, self.examples)
            del self.shared_rows[id(value)]
            spread[index] = expanded
        return tuple(spread)

    @contextlib.contextmanager
    def tracking(self, extra: Dict[torch.Tensor, ParamView]):
        """Treat the given tensors as views for the duration (slices a handler made itself)."""
        added = [id(t) for t in extra if id(t) not in self.views]
        self.views.update({id(t): (t, v) for t, v in extra.items()})
        try:
            yield
        finally:
            for key in added:
                self.views.pop(key, None)

    # -- the mode ---------------------------------------------------------------------------
    @run_eagerly
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if self.shared_rows:
            args = self._spread_shared_rows(args)
        if self.uses and torch.is_grad_enabled():
            views = [v for v in map(self.resolve, _tensors(args, kwargs)) if v is not None]
            if views:
                return self._use(func, args, kwargs, views)
        if self.losses and func in LOSS_FUNCTIONS:
            return self.capture.loss_call(func, args, kwargs, inside_forward=True)
        return func(*args, **kwargs)

    def refuse(self, why: str) -> None:
        """A handler's reason for not describing the call it was given (said in the fallback reason)."""
        self._refusal = why

    def _use(self, func, args, kwargs, views):
        from . import HANDLERS  # the registry imports the handler modules, which import this one
        handler = HANDLERS.get(func)
        self._refusal = None
        if handler is not None:
            result = handler(self, func, args, kwargs)
            if result is not NotImplemented:
                return result
        why = self._refusal or f"{_name(func)}, which has no curvature block"
        result = func(*args, **kwargs)
        if self._follow(func, args, kwargs, result):
            return result
        if _holds_gradient(result):
            for view in views:
                self.unrecognized.setdefault(view.param, set()).add(why)
        return result

    def _follow(self, func, args, kwargs, result) -> bool:
        """Track ``result`` as a view of a parameter if it is one; True if it was."""
        if isinstance(result, (tuple, list)) and len(views := [v for v in map(self.resolve, _tensors(args, kwargs))
                                                              if v is not None]) == 1:
            found = [view_from_storage(r, views[0]) if isinstance(r, torch.Tensor) and r.requires_grad else None
                     for r in result]
            if found and all(f is not None for f in found):
                for r, f in zip(result, found):
                    self.views[id(r)] = (r, simplified(f))
                return True
            return False
        view = derived_view(func, args, kwargs, result, self.resolve)
        if view is None:
            return False
        self.views[id(result)] = (result, view)
        return True


class _Collector:
    """The capture side of a recording made outside any optimizer: keeps every use call."""

    def __init__(self):
        self.calls = []
        self.last_call = None

    def record_use(self, use, output):
        target, handed_on = output_target(output)
        self.calls.append((use, target))
        self.last_call = len(self.calls) - 1
        return handed_on

    def spread_call(self, index, expanded, examples):
        use, _ = self.calls[index]
        use.input_rows = use.input_rows.expand((examples,) + tuple(use.input_rows.shape[1:]))
        self.calls[index] = (use, output_target(expanded)[0])

    def loss_call(self, func, args, kwargs, inside_forward=True, watch=None):
        return func(*args, **kwargs)


def record_uses(model, args, kwargs, params, examples: int = 0):
    """``(output, [(UseCall, output edge)], unrecognized)`` of one forward of ``model`` with gradients on.

    For tools that need the rows of a batch outside training (the Fisher probe).
    """
    collector = _Collector()
    recorder = UseRecorder(collector, {id(p): ParamView(p) for p in params}, examples, uses=True, losses=False)
    with torch.enable_grad():
        with recorder:
            output = model(*args, **kwargs)
    return output, collector.calls, recorder.unrecognized
