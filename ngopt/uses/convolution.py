"""Convolutions (``F.conv1d``, ``F.conv2d``): KFC rows from input patches (Grosse & Martens 2016).

A convolution is a linear map of the input patch at every output position:
rows ``a`` are the patches ``[N, L, C_in k (+1)]`` (``k`` the kernel's size), rows
``g`` the output gradients ``[K, N, L, C_out]``.  The patches are ``k`` times
larger than the input, so a call keeps the input and unfolds a bounded chunk of
examples at a time when the statistics are formed (``blocks/rows.py``).  With
``groups > 1`` the rows are kept per group (``blocks/grouped.py``).
Padding modes other than zeros reach this function already padded (``nn.Conv2d``
pads first and calls it with ``padding=0``).
"""
from __future__ import annotations

from typing import Sequence, Tuple

import torch
import torch.nn.functional as F

from ..blocks.layers import ConvolutionLayer
from ..blocks.rows import HeldRows
from .base import UseCall, append_ones

_NAMES = ("input", "weight", "bias", "stride", "padding", "dilation", "groups")


def _pair(value, dims: int) -> Tuple[int, ...]:
    return tuple(value) if isinstance(value, (list, tuple)) else (int(value),) * dims


def explicit_padding(padding, kernel: Sequence[int], dilation: Sequence[int]) -> Tuple[int, ...]:
    """Padding as ``F.pad`` takes it (last dimension first), for ints, tuples, ``'same'`` and ``'valid'``."""
    dims = len(kernel)
    if padding == "valid":
        return (0, 0) * dims
    if padding == "same":
        pads = []
        for d, k in zip(reversed(dilation), reversed(kernel)):
            total = d * (k - 1)
            pads += [total // 2, total - total // 2]
        return tuple(pads)
    pads = []
    for p in reversed(_pair(padding, dims)):
        pads += [p, p]
    return tuple(pads)


def patch_maker(kernel, stride, padding, dilation, groups: int, with_bias: bool):
    """``make(x [n, C, *spatial]) -> rows``: ``[n, L, C k (+1)]``, or ``[n, L, groups, d (+1)]`` when grouped."""
    dims = len(kernel)
    pads = explicit_padding(padding, kernel, dilation)
    if dims == 1:
        kernel, stride, dilation = (1,) + tuple(kernel), (1,) + tuple(stride), (1,) + tuple(dilation)

    def make(part):
        padded = F.pad(part, pads)
        if dims == 1:
            padded = padded.unsqueeze(2)
        patches = F.unfold(padded, kernel, dilation=dilation, stride=stride).transpose(1, 2)
        if groups > 1:
            patches = patches.reshape(patches.shape[0], patches.shape[1], groups, -1)
        return append_ones(patches) if with_bias else patches
    return make


def handle_convolution(recorder, func, args, kwargs):
    a = dict(zip(_NAMES, args), **kwargs)
    x, weight, bias = a.get("input"), a.get("weight"), a.get("bias")
    view = recorder.resolve(weight)
    if view is None or not view.whole or view.shape not in (None, tuple(weight.shape)) \
            or not isinstance(x, torch.Tensor) or recorder.resolve(x) is not None:
        return NotImplemented
    param = view.param
    dims = param.dim() - 2
    bias_param = None
    if bias is not None:
        bias_view = recorder.resolve(bias)
        if bias_view is not None:
            if not bias_view.whole or bias_view.scale != 1.0 or view.scale != 1.0 or bias_view.param.dim() != 1:
                return NotImplemented
            bias_param = bias_view.param
    groups = int(a.get("groups", 1))
    stride, dilation = _pair(a.get("stride", 1), dims), _pair(a.get("dilation", 1), dims)
    padding = a.get("padding", 0)
    output = func(*args, **kwargs)
    source = x.detach()
    batched = source.dim() == dims + 2
    if not batched:
        source = source.unsqueeze(0)
    rows = HeldRows(patch_maker(tuple(param.shape[2:]), stride, padding, dilation, groups, bias_param is not None),
                    source)

    def grad_rows(grads):
        if not batched:  # [K, C, *spatial] -> [K, 1, C, *spatial]
            grads = grads.unsqueeze(1)
        k, n, c = grads.shape[:3]
        flat = grads.reshape(k, n, c, -1).transpose(2, 3)
        return flat.reshape(flat.shape[:-1] + (groups, -1)) if groups > 1 else flat

    use = UseCall(key=("convolution", param, bias_param, groups), weight=param, bias=bias_param,
                  make_layer=lambda name: ConvolutionLayer(name, param, bias_param, groups=groups),
                  input_rows=rows, output_rows=grad_rows, weight_scale=view.scale ** 2)
    return recorder.record(use, output)


HANDLERS = {F.conv1d: handle_convolution, F.conv2d: handle_convolution}
