"""Recording the training batch, so that rules can evaluate the loss on it without a closure.

On the steps a rule asks for it, a forward pre-hook on the model keeps the
training forward's arguments (and the RNG state it started from), and a forward
hook on the criterion object keeps its target and where its input ``z`` sits in
the model's output.  :meth:`BatchRecorder.take` hands that over as a
:class:`RecordedBatch`; references are dropped at every step, so nothing
outlives the step that used it.

A batch can be replayed when ``z`` *is* the model output, an element of the
dict/tuple/list the model returns, or a reshape of one of those that keeps its
elements in order (``logits.view(-1, V)``).  Anything else (a slice, a scaling,
a loss computed with a functional call) cannot be replayed from the model alone:
the rule then says so once and uses the closure when ``step(closure)`` gives one.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, List, Optional, Tuple

import torch
from torch import nn

from .capture import _inside_function_transform, run_eagerly


def _locate(output: Any, z: torch.Tensor, path: Tuple = ()) -> Optional[Tuple]:
    """The key path to ``z`` (or to the tensor ``z`` reshapes) inside ``output``; None if absent."""
    if isinstance(output, torch.Tensor):
        if output is z:
            return path
        if z._base is not None and (z._base is output or z._base is output._base) and output.is_contiguous() \
                and z.is_contiguous() and z.numel() == output.numel() and z.data_ptr() == output.data_ptr():
            return path + ("reshape",)
        return None
    items = output.items() if isinstance(output, dict) else enumerate(output) \
        if isinstance(output, (list, tuple)) else ()
    for key, value in items:
        found = _locate(value, z, path + (key,))
        if found is not None:
            return found
    return None


def follow(output: Any, path: Tuple, shape: Tuple[int, ...]) -> torch.Tensor:
    """Apply a path found by :func:`_locate` to a new model output."""
    for key in path:
        output = output.reshape((-1,) + tuple(shape[1:])) if key == "reshape" else output[key]
    return output


@dataclass
class CriterionInput:
    path: Tuple
    shape: Tuple[int, ...]
    target: Any
    loss_value: float


@dataclass
class RecordedBatch:
    """One training forward and the criterion calls on its output."""

    args: tuple
    kwargs: dict
    rng_state: torch.Tensor
    examples: int
    criteria: List[CriterionInput]
    replayable: bool

    @property
    def loss_value(self) -> float:
        """The user's loss on this batch, as the criterion calls computed it (their sum)."""
        return sum(c.loss_value for c in self.criteria)


def _batch_size(args, kwargs) -> int:
    first = next((x for x in list(args) + list(kwargs.values()) if isinstance(x, torch.Tensor)), None)
    return int(first.shape[0]) if first is not None and first.dim() else 0


class BatchRecorder:
    """Hooks that keep the training batch on the steps a rule asks for it."""

    def __init__(self, model: nn.Module, loss_fn):
        self.model = model
        self.loss_fn = loss_fn
        self.armed = False
        self._forward: Optional[dict] = None
        self._output = None
        self._criteria: List[CriterionInput] = []
        self._unreplayable = False
        self._handles = [model.register_forward_pre_hook(run_eagerly(self._pre_hook), with_kwargs=True),
                         model.register_forward_hook(run_eagerly(self._post_hook))]
        if isinstance(loss_fn, nn.Module):
            self._handles.append(loss_fn.register_forward_hook(run_eagerly(self._criterion_hook)))

    def remove(self) -> None:
        for handle in self._handles:
            handle.remove()
        self._handles.clear()

    def _pre_hook(self, model, args, kwargs):
        if model is not self.model or not self.armed or not model.training or not torch.is_grad_enabled() \
                or _inside_function_transform():
            return None
        # The latest training forward of the step is the one its loss belongs to.
        self._forward = {"args": args, "kwargs": dict(kwargs), "rng_state": torch.get_rng_state()}
        self._criteria, self._unreplayable, self._output = [], False, None
        return None

    def _post_hook(self, model, args, output):
        if model is self.model and self.armed and self._forward is not None and self._output is None:
            self._output = output
        return None

    def _criterion_hook(self, criterion, inputs, loss):
        if criterion is not self.loss_fn or not self.armed or self._output is None or len(inputs) < 2 \
                or not isinstance(inputs[0], torch.Tensor) or not torch.is_grad_enabled() \
                or _inside_function_transform():
            return None
        z = inputs[0]
        path = _locate(self._output, z)
        if path is None:
            self._unreplayable = True
            return None
        self._criteria.append(CriterionInput(path, tuple(z.shape), inputs[1], float(loss.detach())))
        return None

    def take(self) -> Optional[RecordedBatch]:
        """The batch of this step (None if none was recorded); forgets it."""
        forward, criteria, unreplayable = self._forward, self._criteria, self._unreplayable
        self._forward, self._output, self._criteria, self._unreplayable = None, None, [], False
        if forward is None:
            return None
        return RecordedBatch(forward["args"], forward["kwargs"], forward["rng_state"],
                             _batch_size(forward["args"], forward["kwargs"]), criteria,
                             replayable=bool(criteria) and not unreplayable)
