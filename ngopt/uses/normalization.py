"""Normalization functions: ``y = gamma x_hat + beta`` per channel (``blocks/norm.py``).

``F.layer_norm``, ``F.rms_norm``, ``F.batch_norm``, ``F.group_norm`` and
``F.instance_norm``, whatever module calls them (a subclass that adds an
activation, a channels-first layer norm that permutes around the call, a
hand-made module): the call's own arguments say how ``x_hat`` is formed, so the
rows are the normalized input recomputed from the call's input, ``[N, T, C]``.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F

from ..blocks.layers import ChannelLayer
from ..blocks.rows import HeldRows
from .base import UseCall
from .layout import as_grad_rows, as_rows, example_layout


def _affine(recorder, weight, bias, size: int):
    """``(weight param, bias param or None)`` of a norm call, or NotImplemented."""
    view = recorder.resolve(weight) if weight is not None else None
    if view is None or not view.whole or view.param.numel() != size or view.scale != 1.0:
        return NotImplemented
    bias_param = None
    if bias is not None:
        bias_view = recorder.resolve(bias)
        if bias_view is not None:
            if not bias_view.whole or bias_view.param.numel() != size or bias_view.scale != 1.0:
                return NotImplemented
            bias_param = bias_view.param
    return view.param, bias_param


def _record(recorder, kind, weight, bias, rows, grad_rows, output):
    use = UseCall(key=(kind, weight, bias), weight=weight, bias=bias,
                  make_layer=lambda name: ChannelLayer(name, weight, bias, kind=kind),
                  input_rows=rows, output_rows=grad_rows)
    return recorder.record(use, output)


def _last_dims_use(recorder, kind, x, shape, weight, bias, normalized, output):
    """Norms over the last dimensions (layer and RMS norm): channels are those dimensions."""
    channels = math.prod(shape)
    examples = recorder.examples
    layout = example_layout(tuple(x.shape[:x.dim() - len(shape)]), examples)
    rows = as_rows(normalized, channels, layout, examples)
    return _record(recorder, kind, weight, bias, rows,
                   lambda grads: as_grad_rows(grads, channels, layout, examples), output)


def _channel_rows(normalized):
    """``[N, C, *spatial]`` as ``[N, positions, C]``."""
    return normalized.reshape(normalized.shape[0], normalized.shape[1], -1).transpose(1, 2)


def _channel_grad_rows(grads):
    k, n, c = grads.shape[:3]
    return grads.reshape(k, n, c, -1).transpose(2, 3)


def handle_layer_norm(recorder, func, args, kwargs):
    a = dict(zip(("input", "normalized_shape", "weight", "bias", "eps"), args), **kwargs)
    x, shape = a["input"], tuple(a["normalized_shape"])
    params = _affine(recorder, a.get("weight"), a.get("bias"), math.prod(shape))
    if params is NotImplemented or recorder.resolve(x) is not None:
        return NotImplemented
    output = func(*args, **kwargs)
    normalized = F.layer_norm(x.detach(), shape, eps=a.get("eps", 1e-5))
    return _last_dims_use(recorder, "layer_norm", x, shape, *params, normalized, output)


def handle_rms_norm(recorder, func, args, kwargs):
    a = dict(zip(("input", "normalized_shape", "weight", "eps"), args), **kwargs)
    x, shape = a["input"], tuple(a["normalized_shape"])
    params = _affine(recorder, a.get("weight"), None, math.prod(shape))
    if params is NotImplemented or recorder.resolve(x) is not None:
        return NotImplemented
    output = func(*args, **kwargs)
    normalized = F.rms_norm(x.detach(), shape, eps=a.get("eps"))
    return _last_dims_use(recorder, "rms_norm", x, shape, *params, normalized, output)


def channel_moments(x: torch.Tensor):
    """Mean and (biased) variance per channel (dim 1) over every other dim, as batch norm takes them.

    Two passes (the textbook stable way), the second in place: on a CPU about ten times faster than
    ``torch.var_mean``, which took 3.6 ms of each recorded forward of the benchmark's residual CNN, 0.34
    ms now (``python scripts/batch_norm_moments.py``, 2-core AMD EPYC, torch 2.14)."""
    dims = [0] + list(range(2, x.dim()))
    mean = x.mean(dim=dims, keepdim=True)
    centred = x - mean
    return mean.reshape(-1), centred.mul_(centred).mean(dim=dims)


def handle_batch_norm(recorder, func, args, kwargs):
    names = ("input", "running_mean", "running_var", "weight", "bias", "training", "momentum", "eps")
    a = dict(zip(names, args), **kwargs)
    x = a["input"]
    if x.dim() < 2:
        return NotImplemented
    params = _affine(recorder, a.get("weight"), a.get("bias"), x.shape[1])
    if params is NotImplemented or recorder.resolve(x) is not None:
        return NotImplemented
    eps = a.get("eps", 1e-5)
    source = x.detach()
    shape = (1, -1) + (1,) * (x.dim() - 2)
    if a.get("training", False) or a.get("running_mean") is None:
        # The batch's moments, read before the call updates any running statistics.
        mean, variance = channel_moments(source)
    else:
        mean, variance = a["running_mean"].detach().clone(), a["running_var"].detach().clone()
    mean, scale = mean.reshape(shape), torch.rsqrt(variance + eps).reshape(shape)
    output = func(*args, **kwargs)
    # The input and its moments, not a second input-sized x_hat: rows are normalized a chunk at a time.
    rows = HeldRows(lambda part: _channel_rows((part - mean) * scale), source)
    return _record(recorder, "batch_norm", *params, rows, _channel_grad_rows, output)


def handle_group_norm(recorder, func, args, kwargs):
    a = dict(zip(("input", "num_groups", "weight", "bias", "eps"), args), **kwargs)
    x = a["input"]
    params = _affine(recorder, a.get("weight"), a.get("bias"), x.shape[1] if x.dim() > 1 else 0)
    if params is NotImplemented or recorder.resolve(x) is not None:
        return NotImplemented
    output = func(*args, **kwargs)
    normalized = F.group_norm(x.detach(), a["num_groups"], eps=a.get("eps", 1e-5))
    return _record(recorder, "group_norm", *params, _channel_rows(normalized), _channel_grad_rows, output)


def handle_instance_norm(recorder, func, args, kwargs):
    names = ("input", "running_mean", "running_var", "weight", "bias", "use_input_stats", "momentum", "eps")
    a = dict(zip(names, args), **kwargs)
    x = a["input"]
    params = _affine(recorder, a.get("weight"), a.get("bias"), x.shape[1] if x.dim() > 1 else 0)
    if params is NotImplemented or recorder.resolve(x) is not None:
        return NotImplemented
    eps = a.get("eps", 1e-5)
    source = x.detach()
    if a.get("use_input_stats", True) or a.get("running_mean") is None:
        normalized = F.instance_norm(source, eps=eps)
    else:
        shape = (1, -1) + (1,) * (x.dim() - 2)
        normalized = (source - a["running_mean"].reshape(shape)) * \
            torch.rsqrt(a["running_var"].reshape(shape) + eps)
    output = func(*args, **kwargs)
    return _record(recorder, "instance_norm", *params, _channel_rows(normalized), _channel_grad_rows, output)


HANDLERS = {F.layer_norm: handle_layer_norm, F.batch_norm: handle_batch_norm, F.group_norm: handle_group_norm,
            F.instance_norm: handle_instance_norm}
if hasattr(F, "rms_norm"):  # torch >= 2.4
    HANDLERS[F.rms_norm] = handle_rms_norm
