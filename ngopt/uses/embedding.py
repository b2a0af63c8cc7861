"""Embedding lookups (``F.embedding``): a linear map of one-hot inputs (``blocks/embedding.py``).

The call's input rows are the index tensor itself, ``[N, T]``, the output-gradient
rows ``[K, N, T, d]``.  ``scale_grad_by_freq`` rescales gradients by counts within
the batch, which no block describes: such a lookup is left to the fallback rule.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F

from ..blocks.layers import EmbeddingLayer
from .base import UseCall
from .layout import as_grad_rows, as_rows, example_layout

_NAMES = ("input", "weight", "padding_idx", "max_norm", "norm_type", "scale_grad_by_freq", "sparse")


def handle_embedding(recorder, func, args, kwargs):
    a = dict(zip(_NAMES, args), **kwargs)
    indices, weight = a.get("input"), a.get("weight")
    view = recorder.resolve(weight)
    if a.get("scale_grad_by_freq"):
        recorder.refuse("embedding with scale_grad_by_freq=True (gradients rescaled by counts within the batch)")
        return NotImplemented
    if view is None or not view.whole or view.shape not in (None, tuple(weight.shape)) \
            or not isinstance(indices, torch.Tensor) or a.get("sparse"):
        return NotImplemented
    param = view.param
    padding_idx = a.get("padding_idx")
    if padding_idx is not None and padding_idx < 0:
        padding_idx += param.shape[0]
    output = func(*args, **kwargs)
    examples = recorder.examples
    layout = example_layout(tuple(indices.shape), examples)
    rows = as_rows(indices.detach().unsqueeze(-1), 1, layout, examples).squeeze(-1)
    dim = param.shape[1]
    use = UseCall(key=("embedding", param, None, padding_idx), weight=param, bias=None,
                  make_layer=lambda name: EmbeddingLayer(name, param, padding_idx),
                  input_rows=rows, output_rows=lambda grads: as_grad_rows(grads, dim, layout, examples),
                  weight_scale=view.scale ** 2)
    return recorder.record(use, output)


HANDLERS = {F.embedding: handle_embedding}
