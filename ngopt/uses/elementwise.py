"""Elementwise uses: a parameter broadcast over the examples and multiplied with, or added to, a tensor.

``weight * x`` (a hand-written RMS norm, a layer scale ``x * gamma.reshape(1, -1, 1, 1)``)
is a *scale*; ``x + table`` (a learned position table, a bias added by hand) a *shift*.
Both are the ``gamma`` or ``beta`` of a per-channel affine map whose channels are the
parameter's elements and whose positions are the dimensions it is broadcast over, so
their curvature is the exact diagonal of the per-layer Fisher (``blocks/norm.py``):

    scale: per-example gradient u_nc = sum_t g_ntc x_ntc,      shift: v_nc = sum_t g_ntc.

The parameter must be broadcast along the examples' dimension (a parameter with one
slice per example is not shared by them, and has no such structure).
"""
from __future__ import annotations

import math

import torch

from ..blocks.layers import ChannelLayer
from .base import UseCall
from .layout import example_layout

MULTIPLICATIONS = {torch.mul, torch.Tensor.mul, torch.Tensor.__mul__, torch.Tensor.__rmul__,
                   torch.Tensor.mul_, torch.Tensor.__imul__}
ADDITIONS = {torch.add, torch.Tensor.add, torch.Tensor.__add__, torch.Tensor.__radd__,
             torch.Tensor.add_, torch.Tensor.__iadd__}
SUBTRACTIONS = {torch.sub, torch.Tensor.sub, torch.Tensor.__sub__, torch.Tensor.sub_, torch.Tensor.__isub__}
IN_PLACE = {torch.Tensor.mul_, torch.Tensor.__imul__, torch.Tensor.add_, torch.Tensor.__iadd__,
            torch.Tensor.sub_, torch.Tensor.__isub__}


def _permutation(view_shape, out_shape, examples):
    """``(order, layout)``: output dims as [examples, broadcast positions..., parameter dims...]; None if none."""
    aligned = (1,) * (len(out_shape) - len(view_shape)) + tuple(view_shape)
    if len(aligned) != len(out_shape) or not out_shape:
        return None
    if any(v not in (1, o) for v, o in zip(aligned, out_shape)):
        return None
    example_dim = 0
    if example_layout(tuple(out_shape), examples) == "second" and aligned[1] == 1:
        example_dim = 1
    if aligned[example_dim] != 1:
        return None  # one parameter slice per example: not shared by the examples
    broadcast = [d for d in range(len(out_shape)) if d != example_dim and aligned[d] == 1]
    own = [d for d in range(len(out_shape)) if d != example_dim and aligned[d] != 1]
    return [example_dim] + broadcast + own


def _rows(tensor, order, channels, examples):
    """``tensor`` (output-shaped) as ``[N, T, channels]``, examples regrouped if flattened."""
    arranged = tensor.permute(order)
    lead = arranged.shape[0]
    if examples > 0 and lead != examples and lead % examples == 0:
        return arranged.reshape(examples, -1, channels)
    return arranged.reshape(lead, -1, channels)


def _grad_rows(grads, order, channels, examples):
    arranged = grads.permute([0] + [d + 1 for d in order])
    k, lead = arranged.shape[:2]
    if examples > 0 and lead != examples and lead % examples == 0:
        return arranged.reshape(k, examples, -1, channels)
    return arranged.reshape(k, lead, -1, channels)


def _operands(recorder, args, kwargs):
    """``(parameter view, its tensor, the other tensor, parameter position)`` or None."""
    if len(args) != 2 or any(k not in ("alpha",) for k in kwargs) or kwargs.get("alpha", 1) != 1:
        return None
    first, second = args
    if not isinstance(first, torch.Tensor) or not isinstance(second, torch.Tensor):
        return None
    views = recorder.resolve(first), recorder.resolve(second)
    if (views[0] is None) == (views[1] is None):
        return None
    position = 0 if views[0] is not None else 1
    view = views[position]
    if not view.whole or view.param.numel() != math.prod(view.shape or view.param.shape):
        return None
    return view, args[position], args[1 - position], position


def _elementwise_use(recorder, func, args, kwargs, kind):
    found = _operands(recorder, args, kwargs)
    if found is None:
        return NotImplemented
    view, _, other, position = found
    if func in IN_PLACE and position == 0:
        return NotImplemented  # an in-place change of the parameter itself
    view_shape = tuple(view.shape or view.param.shape)
    out_shape = torch.broadcast_shapes(view_shape, tuple(other.shape))
    examples = recorder.examples
    order = _permutation(view_shape, out_shape, examples)
    if order is None:
        return NotImplemented
    channels = view.param.numel()
    if kind == "scale":
        # The other operand before the call (an in-place call overwrites it).
        source = other.detach().expand(out_shape)
        rows = _rows(source.clone() if func in IN_PLACE else source, order, channels, examples)
    else:
        rows = torch.ones((), dtype=other.dtype, device=other.device).expand(
            _rows(torch.empty(out_shape, device="meta"), order, channels, examples).shape)
    output = func(*args, **kwargs)
    param = view.param
    use = UseCall(key=(kind, param, None), weight=param, bias=None,
                  make_layer=lambda name: ChannelLayer(name, param, None, kind=kind), input_rows=rows,
                  output_rows=lambda grads: _grad_rows(grads, order, channels, examples),
                  weight_scale=view.scale ** 2)
    return recorder.record(use, output)


def handle_multiplication(recorder, func, args, kwargs):
    return _elementwise_use(recorder, func, args, kwargs, "scale")


def handle_addition(recorder, func, args, kwargs):
    return _elementwise_use(recorder, func, args, kwargs, "shift")


HANDLERS = {**{f: handle_multiplication for f in MULTIPLICATIONS},
            **{f: handle_addition for f in ADDITIONS | SUBTRACTIONS}}
