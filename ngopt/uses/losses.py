"""Finding the loss in the user's code, after the model's forward, and replaying how it was computed.

After a recorded forward, a light torch function mode (:class:`LossWatch`) stays on
until the user's ``backward()`` starts (or the next ``step()`` or forward).  It sees

* every supported loss call (``F.cross_entropy``, ``F.mse_loss``,
  ``F.binary_cross_entropy_with_logits``, and the criterion objects that call them),
  which it hands to the capture;
* the torch operations applied to the model's output on the way to each loss
  (a reshape, a slice that shifts the labels, a division by a temperature, a cast):
  a :class:`Program` that can recompute the loss's input from a new model output,
  so that a rule can evaluate the loss on the recorded batch at other weights;
* ``root.backward()``: if ``root`` is a loss multiplied by a constant tensor (what
  ``torch.amp.GradScaler.scale`` does), that factor, which the optimizer needs when the
  gradients were unscaled before ``step()``; and the root's value, the loss the step's gradient is
  of (the loss bound, ``rules/loss_bound.py``).

After a forward that records nothing, a lighter watch (:class:`BackwardWatch`) notes only that value.

The watch is pushed only when no other torch function mode is active, so that it
can never be popped by someone else's context manager; it then removes itself from
wherever it sits on the mode stack.
"""
from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Tuple

import torch
from torch.overrides import TorchFunctionMode

from ..likelihoods import LOSS_FUNCTIONS
from .recorder import remove_mode, run_eagerly

BACKWARD_FUNCTIONS = (torch.Tensor.backward, torch.autograd.backward, torch.autograd.grad)
TRAINING_BACKWARDS = (torch.Tensor.backward, torch.autograd.backward)  # those that fill .grad

try:  # the mode stack (torch >= 2.0)
    from torch._C import _get_function_stack_at, _len_torch_function_stack
    from torch.overrides import _push_mode
except ImportError:  # pragma: no cover - very old torch: no watch, losses found only inside the forward
    _len_torch_function_stack = None


def _stack() -> list:
    return [_get_function_stack_at(i) for i in range(_len_torch_function_stack())]


def sweep_closed_watches() -> None:
    """Remove watches that are done but stayed on the stack: those that saw their backward (a mode
    cannot pop itself while it runs) and those whose optimizer is gone."""
    if _len_torch_function_stack is None:
        return
    for mode in _stack():
        if isinstance(mode, LossWatch) and (mode.closed or mode.capture is None):
            remove_mode(mode)


def leaves(output: Any, path: Tuple = ()) -> List[Tuple[Tuple, torch.Tensor]]:
    """``[(path, tensor)]`` for every tensor in a model output (nested dicts, lists, tuples)."""
    if isinstance(output, torch.Tensor):
        return [(path, output)]
    items = output.items() if isinstance(output, dict) else enumerate(output) \
        if isinstance(output, (list, tuple)) else ()
    found = []
    for key, value in items:
        found += leaves(value, path + (key,))
    return found


def follow(output: Any, path: Tuple) -> torch.Tensor:
    for key in path:
        output = output[key]
    return output


@dataclass
class _Ref:
    kind: str       # "leaf": a model-output tensor by path; "node": a taped result
    key: Any        # the path, or (node index, element index or None)


@dataclass
class Program:
    """Taped operations that compute a tensor from the model's output; :meth:`run` repeats them."""

    nodes: List[Tuple[Any, Any, Any]]   # (func, args template, kwargs template), in call order
    result: _Ref

    def run(self, output: Any) -> torch.Tensor:
        values: Dict[int, Any] = {}
        for index, (func, args, kwargs) in enumerate(self.nodes):
            if func is not None:
                values[index] = func(*_filled(args, output, values),
                                     **{k: _filled(v, output, values) for k, v in kwargs.items()})
        return _value(self.result, output, values)


# Module functions, not closures: a recursive closure is a reference cycle, and the tensors it reaches
# (a vocabulary's logits) would then wait for the cyclic garbage collector instead of being freed.
def _value(ref: _Ref, output: Any, values: Dict[int, Any]):
    if ref.kind == "leaf":
        return follow(output, ref.key)
    index, element = ref.key
    result = values[index]
    return result if element is None else result[element]


def _filled(template, output: Any, values: Dict[int, Any]):
    if isinstance(template, _Ref):
        return _value(template, output, values)
    if isinstance(template, list):
        return [_filled(t, output, values) for t in template]
    if isinstance(template, tuple):
        return tuple(_filled(t, output, values) for t in template)
    return template


def _root(args, kwargs):
    """The one tensor a backward call starts from (None for several)."""
    roots = args[0] if args else kwargs.get("tensors", kwargs.get("outputs"))
    return roots[0] if isinstance(roots, (list, tuple)) and len(roots) == 1 else roots


class LossWatch(TorchFunctionMode):
    """See the module docstring; one per recorded forward."""

    def __init__(self, capture, record, output):
        super().__init__()
        # Weak: a watch left on the stack must not keep an optimizer (and its model) alive.
        self._capture = weakref.ref(capture)
        self._record = weakref.ref(record)
        self.closed = False
        # id(tensor) -> (tensor, _Ref): the model output's tensors and everything computed from them.
        self.derived: Dict[int, Tuple[torch.Tensor, _Ref]] = {
            id(t): (t, _Ref("leaf", path)) for path, t in leaves(output)}
        self.nodes: List[Tuple[Any, Any, Any]] = []
        self._multipliers: Dict[int, Tuple[torch.Tensor, float]] = {}

    @property
    def capture(self):
        return self._capture()

    @property
    def record(self):
        return self._record()

    # -- the mode stack ---------------------------------------------------------------------
    @classmethod
    def can_push(cls) -> bool:
        """Whether no mode but other watches is on the stack (done watches are swept first).

        Another mode below this one could be popped by its owner's context manager while this one
        sits on top, which would pop this one instead; watches remove themselves wherever they sit.
        """
        if _len_torch_function_stack is None:
            return False
        sweep_closed_watches()
        return all(isinstance(mode, LossWatch) for mode in _stack())

    def push(self) -> None:
        _push_mode(self)

    def remove(self) -> None:
        """Take this mode off the stack, wherever it sits (modes pushed above it stay, in order)."""
        self.closed = True
        if _len_torch_function_stack is not None:
            remove_mode(self)

    # -- references -------------------------------------------------------------------------
    def ref(self, tensor) -> Optional[_Ref]:
        entry = self.derived.get(id(tensor)) if isinstance(tensor, torch.Tensor) else None
        return entry[1] if entry is not None and entry[0] is tensor else None

    def program_for(self, tensor) -> Optional[Program]:
        """The operations that compute ``tensor`` from the model output, or None if it is not computed so."""
        result = self.ref(tensor)
        if result is None:
            return None
        needed, pending = set(), [result]
        while pending:  # a stack, not a recursive closure (see _value)
            ref = pending.pop()
            if ref.kind == "node" and ref.key[0] not in needed:
                needed.add(ref.key[0])
                _, args, kwargs = self.nodes[ref.key[0]]
                for template in list(args) + list(kwargs.values()):
                    for inner in (template if isinstance(template, (list, tuple)) else [template]):
                        if isinstance(inner, _Ref):
                            pending.append(inner)
        nodes = [node if index in needed else (None, (), {}) for index, node in enumerate(self.nodes)]
        return Program(nodes, result)

    def _template(self, value):
        ref = self.ref(value)
        if ref is not None:
            return ref
        if isinstance(value, (list, tuple)):
            items = [self._template(v) for v in value]
            return items if isinstance(value, list) else tuple(items)
        return value

    def _derives(self, args, kwargs) -> bool:
        for value in list(args) + list(kwargs.values()):
            if self.ref(value) is not None:
                return True
            if isinstance(value, (list, tuple)) and any(self.ref(v) is not None for v in value):
                return True
        return False

    def tape(self, func, args, kwargs, result) -> None:
        """Remember ``result = func(*args, **kwargs)`` if it is computed from the model output."""
        if not self._derives(args, kwargs):
            return
        index = len(self.nodes)
        self.nodes.append((func, self._template(args), {k: self._template(v) for k, v in kwargs.items()}))
        if isinstance(result, torch.Tensor):
            self.derived[id(result)] = (result, _Ref("node", (index, None)))
        elif isinstance(result, (list, tuple)):
            for element, item in enumerate(result):
                if isinstance(item, torch.Tensor):
                    self.derived[id(item)] = (item, _Ref("node", (index, element)))

    # -- the mode ---------------------------------------------------------------------------
    @run_eagerly
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if self.closed:
            return func(*args, **kwargs)
        capture, record = self.capture, self.record
        if capture is None or record is None:  # the optimizer or its record is gone
            self.closed = True
            return func(*args, **kwargs)
        if func in BACKWARD_FUNCTIONS:
            self.closed = True  # the loss is complete; the step removes the watch
            root = _root(args, kwargs)
            if func in TRAINING_BACKWARDS:
                capture.note_root(root)
            entry = self._multipliers.get(id(root)) if isinstance(root, torch.Tensor) else None
            if entry is not None and entry[0] is root:
                record.root_scale = entry[1]
            return func(*args, **kwargs)
        if func in LOSS_FUNCTIONS and torch.is_grad_enabled():
            result = capture.loss_call(func, args, kwargs, inside_forward=False, watch=self)
        else:
            result = func(*args, **kwargs)
        self.tape(func, args, kwargs, result)
        self._note_multiplier(func, args, result)
        return result

    def _note_multiplier(self, func, args, result) -> None:
        """``loss * s`` with ``s`` a one-element constant tensor: remember ``s`` for ``result``."""
        if func not in (torch.Tensor.mul, torch.mul, torch.Tensor.__mul__) or len(args) != 2 \
                or not isinstance(result, torch.Tensor) or not result.requires_grad:
            return
        for factor in args:
            if isinstance(factor, torch.Tensor) and not factor.requires_grad and factor.numel() == 1:
                self._multipliers[id(result)] = (result, float(factor))
                return


class BackwardWatch(LossWatch):
    """The watch after a forward that records nothing: it only hands the capture the tensor that
    ``backward()`` starts from (the loss the step's gradient is of), and passes every other call through.

    A ``LossWatch`` so that the mode-stack rules (:meth:`LossWatch.can_push`, :func:`sweep_closed_watches`)
    treat both alike; it keeps no record."""

    def __init__(self, capture):
        TorchFunctionMode.__init__(self)
        self._capture = weakref.ref(capture)
        self._record = lambda: None
        self.closed = False

    @run_eagerly
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if not self.closed and func in BACKWARD_FUNCTIONS:
            self.closed = True
            capture = self.capture
            if capture is not None and func in TRAINING_BACKWARDS:
                capture.note_root(_root(args, kwargs))
        return func(*args, **kwargs)
