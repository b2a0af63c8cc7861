"""``F.multi_head_attention_forward`` (``nn.MultiheadAttention``): its projections as linear maps.

torch's attention function applies its parameters inside one call: the packed
``in_proj_weight`` (or the separate ``q/k/v_proj_weight`` when ``kdim``/``vdim``
differ from ``embed_dim``) and ``out_proj``, whose own ``forward`` never runs.  On a
recorded forward the use recorder replaces that call by :func:`attention_forward`,
the same arithmetic in the same order with the projections as explicit
``F.linear`` calls it can record: outputs and gradients are bit for bit those of
torch's function.  Other forwards, and ``eval()`` with its fast path, are left alone.

Curvature (Eschenhagen et al., NeurIPS 2023, "expand" / "reduce"): every
projection is a linear layer shared over positions, rows ``a`` its inputs at
each position and ``g`` its output gradients there.

* ``attention_in``: the packed ``[3E, E]`` weight with its bias, one block.  In
  self-attention it is one linear map ``E -> 3E`` of the same rows, so its
  Kronecker factors are those of ``nn.Linear(E, 3E)``.  In cross-attention the
  query rows and the key/value rows see different inputs; each call then
  counts as positions of the packed layer with its output gradient zero
  outside its own rows, which gives the exact per-example gradient (hence the
  exact diagonal), a block-diagonal output factor and an input factor averaged
  over query and key/value positions.
* ``attention_q`` / ``attention_k`` / ``attention_v``: the separate weights
  (``kdim``/``vdim``), one block each; ``attention_in_bias``: the packed bias
  they share, a ``[3E, 1]`` layer on a constant input.
* ``attention_out``: ``out_proj`` on the attention context at every query
  position.

Inside the function tensors are sequence-first, ``[L, N, d]``.  ``bias_k`` and
``bias_v`` (``add_bias_kv``) are concatenated to the keys and values, a use with no
block: they take the fallback rule.
"""
from __future__ import annotations

import inspect
import math
from typing import Callable

import torch
import torch.nn.functional as F

from ..blocks.layers import LayerAdapter
from .base import UseCall, padded_rows
from .layout import as_grad_rows, as_rows
from .linear import linear_use
from .views import ParamView

_SIGNATURE = inspect.signature(F.multi_head_attention_forward)


class ConstantInputLayer(LayerAdapter):
    """The packed ``in_proj_bias`` of separate q/k/v weights: a ``[3E, 1]`` layer whose input is 1."""

    kind = "attention_in_bias"


def _whole(recorder, tensor):
    view = recorder.resolve(tensor) if tensor is not None else None
    return view if view is not None and view.whole and view.scale == 1.0 else None


def handle_attention(recorder, func, args, kwargs):
    bound = _SIGNATURE.bind(*args, **kwargs)
    bound.apply_defaults()
    a = bound.arguments
    if a["static_k"] is not None or a["static_v"] is not None:
        return NotImplemented
    separate = a["use_separate_proj_weight"]
    weights = [a[f"{letter}_proj_weight"] for letter in "qkv"] if separate else [a["in_proj_weight"]]
    if any(w is not None and recorder.resolve(w) is not None and _whole(recorder, w) is None for w in weights):
        return NotImplemented
    examples = recorder.examples
    in_bias = _whole(recorder, a["in_proj_bias"])

    def project_in(inputs, weight, bias, offset):
        """One in-projection call; ``offset``: its first row in the packed ``[3E, ...]`` layout."""
        output = F.linear(inputs, weight, bias)
        width = output.shape[-1]
        if not separate:
            view = _whole(recorder, a["in_proj_weight"])
            if view is None:
                return output
            view = ParamView(view.param, rows=(offset, offset + width))
            bias_view = None if in_bias is None else ParamView(in_bias.param, rows=(offset, offset + width))
            with recorder.tracking({bias: bias_view} if bias_view is not None else {}):
                return linear_use(recorder, inputs, view, bias if bias_view is not None else None, output,
                                  matrix_is_weight=True, kind="attention_in", layout="second")
        letter = "qkv"[offset // width]
        view = _whole(recorder, weight)
        if view is not None:
            output = linear_use(recorder, inputs, view, None, output, matrix_is_weight=True,
                                kind=f"attention_{letter}", layout="second")
        if in_bias is None:
            return output
        return _record_packed_bias(recorder, in_bias.param, inputs, output, offset, examples)

    def project_out(context, weight, bias, tgt_len, bsz):
        output = F.linear(context, weight, bias)
        view = _whole(recorder, weight)
        if view is None:
            return output
        recorded = linear_use(recorder, context.view(tgt_len, bsz, -1), view, bias,
                              output.view(tgt_len, bsz, -1), matrix_is_weight=True, kind="attention_out",
                              layout="second")
        return recorded.view(tgt_len * bsz, -1)

    return attention_forward(a, project_in, project_out)


def _record_packed_bias(recorder, param, inputs, output, offset, examples):
    """The shared bias of separate q/k/v weights: a ``[3E, 1]`` layer on a constant input of 1."""
    width, full = output.shape[-1], param.shape[0]
    ones = torch.ones(inputs.shape[:-1] + (1,), dtype=inputs.dtype, device=inputs.device)
    rows = as_rows(ones, 1, "second", examples)
    use = UseCall(key=("attention_in_bias", param, None), weight=param, bias=None,
                  make_layer=lambda name: ConstantInputLayer(name, param),
                  input_rows=rows, output_rows=padded_rows(lambda g: as_grad_rows(g, width, "second", examples),
                                                           offset, width, full))
    return recorder.record(use, output)


HANDLERS = {F.multi_head_attention_forward: handle_attention}


# ----------------------------------------------------------------------------- the arithmetic
def _packed_projections(q, k, v, w, b, project):
    """``F._in_projection_packed`` with every ``linear`` call through ``project``."""
    e = q.size(-1)
    if k is v:
        if q is k:  # self-attention
            proj = project(q, w, b, 0)
            proj = proj.unflatten(-1, (3, e)).unsqueeze(0).transpose(0, -2).squeeze(-2).contiguous()
            return proj[0], proj[1], proj[2]
        w_q, w_kv = w.split([e, e * 2])
        b_q, b_kv = (None, None) if b is None else b.split([e, e * 2])
        q_proj = project(q, w_q, b_q, 0)
        kv_proj = project(k, w_kv, b_kv, e)
        kv_proj = kv_proj.unflatten(-1, (2, e)).unsqueeze(0).transpose(0, -2).squeeze(-2).contiguous()
        return q_proj, kv_proj[0], kv_proj[1]
    w_q, w_k, w_v = w.chunk(3)
    b_q, b_k, b_v = (None, None, None) if b is None else b.chunk(3)
    return project(q, w_q, b_q, 0), project(k, w_k, b_k, e), project(v, w_v, b_v, 2 * e)


def _masks(a, query, tgt_len, src_len):
    """``(key_padding_mask, attn_mask, is_causal)`` canonicalised as torch's function does."""
    key_padding_mask = F._canonical_mask(mask=a["key_padding_mask"], mask_name="key_padding_mask",
                                         other_type=F._none_or_dtype(a["attn_mask"]), other_name="attn_mask",
                                         target_type=query.dtype)
    attn_mask, is_causal = a["attn_mask"], a["is_causal"]
    if is_causal and attn_mask is None:
        raise RuntimeError("Need attn_mask if specifying the is_causal hint.")
    if is_causal and key_padding_mask is None and not a["need_weights"]:
        attn_mask = None
    else:
        attn_mask = F._canonical_mask(mask=attn_mask, mask_name="attn_mask", other_type=None, other_name="",
                                      target_type=query.dtype, check_other=False)
        if key_padding_mask is not None:
            is_causal = False
    if attn_mask is not None and attn_mask.dim() == 2:
        if attn_mask.shape != (tgt_len, src_len):
            raise RuntimeError(f"The shape of the 2D attn_mask is {attn_mask.shape}, but should be "
                               f"{(tgt_len, src_len)}.")
        attn_mask = attn_mask.unsqueeze(0)
    return key_padding_mask, attn_mask, is_causal


def attention_forward(a: dict, project_in: Callable, project_out: Callable):
    """``F.multi_head_attention_forward`` (arguments ``a`` by name) with its projections through the callables.

    The same operations in the same order as torch's function, so that results
    and gradients are identical; ``project_in(x, w, b, offset)`` and
    ``project_out(context, w, b, tgt_len, bsz)`` must compute ``F.linear``.
    """
    query, key, value, num_heads = a["query"], a["key"], a["value"], a["num_heads"]
    is_batched = F._mha_shape_check(query, key, value, a["key_padding_mask"], a["attn_mask"], num_heads)
    padding = a["key_padding_mask"]
    if not is_batched:
        query, key, value = query.unsqueeze(1), key.unsqueeze(1), value.unsqueeze(1)
        if padding is not None:
            a = dict(a, key_padding_mask=padding.unsqueeze(0))
    tgt_len, bsz, embed_dim = query.shape
    key_padding_mask, attn_mask, is_causal = _masks(a, query, tgt_len, key.shape[0])
    head_dim = embed_dim // num_heads
    if a["use_separate_proj_weight"]:
        bias = a["in_proj_bias"]
        b_q, b_k, b_v = (None, None, None) if bias is None else bias.chunk(3)
        q = project_in(query, a["q_proj_weight"], b_q, 0)
        k = project_in(key, a["k_proj_weight"], b_k, embed_dim)
        v = project_in(value, a["v_proj_weight"], b_v, 2 * embed_dim)
    else:
        q, k, v = _packed_projections(query, key, value, a["in_proj_weight"], a["in_proj_bias"], project_in)

    if a["bias_k"] is not None and a["bias_v"] is not None:
        k = torch.cat([k, a["bias_k"].repeat(1, bsz, 1)])
        v = torch.cat([v, a["bias_v"].repeat(1, bsz, 1)])
        attn_mask = None if attn_mask is None else F.pad(attn_mask, (0, 1))
        key_padding_mask = None if key_padding_mask is None else F.pad(key_padding_mask, (0, 1))
    q = q.view(tgt_len, bsz * num_heads, head_dim).transpose(0, 1)
    k = k.view(k.shape[0], bsz * num_heads, head_dim).transpose(0, 1)
    v = v.view(v.shape[0], bsz * num_heads, head_dim).transpose(0, 1)
    if a["add_zero_attn"]:
        zero_attn_shape = (bsz * num_heads, 1, head_dim)
        k = torch.cat([k, torch.zeros(zero_attn_shape, dtype=k.dtype, device=k.device)], dim=1)
        v = torch.cat([v, torch.zeros(zero_attn_shape, dtype=v.dtype, device=v.device)], dim=1)
        attn_mask = None if attn_mask is None else F.pad(attn_mask, (0, 1))
        key_padding_mask = None if key_padding_mask is None else F.pad(key_padding_mask, (0, 1))
    src_len = k.size(1)
    if key_padding_mask is not None:
        key_padding_mask = key_padding_mask.view(bsz, 1, 1, src_len).expand(-1, num_heads, -1, -1) \
            .reshape(bsz * num_heads, 1, src_len)
        attn_mask = key_padding_mask if attn_mask is None else attn_mask + key_padding_mask
    dropout_p = a["dropout_p"] if a["training"] else 0.0

    if a["need_weights"]:
        q_scaled = q * math.sqrt(1.0 / float(q.shape[-1]))
        if attn_mask is not None:
            weights = torch.baddbmm(attn_mask, q_scaled, k.transpose(-2, -1))
        else:
            weights = torch.bmm(q_scaled, k.transpose(-2, -1))
        weights = F.softmax(weights, dim=-1)
        if dropout_p > 0.0:
            weights = F.dropout(weights, p=dropout_p)
        output = torch.bmm(weights, v).transpose(0, 1).reshape(tgt_len * bsz, embed_dim)
        output = project_out(output, a["out_proj_weight"], a["out_proj_bias"], tgt_len, bsz)
        output = output.view(tgt_len, bsz, output.size(1))
        weights = weights.view(bsz, num_heads, tgt_len, src_len)
        if a["average_attn_weights"]:
            weights = weights.mean(dim=1)
        if not is_batched:
            output, weights = output.squeeze(1), weights.squeeze(0)
        return output, weights

    if attn_mask is not None:
        if attn_mask.size(0) == 1 and attn_mask.dim() == 3:
            attn_mask = attn_mask.unsqueeze(0)
        else:
            attn_mask = attn_mask.view(bsz, num_heads, -1, src_len)
    q = q.view(bsz, num_heads, tgt_len, head_dim)
    k = k.view(bsz, num_heads, src_len, head_dim)
    v = v.view(bsz, num_heads, src_len, head_dim)
    output = F.scaled_dot_product_attention(q, k, v, attn_mask, dropout_p, is_causal)
    output = output.permute(2, 0, 1, 3).reshape(bsz * tgt_len, embed_dim)
    output = project_out(output, a["out_proj_weight"], a["out_proj_bias"], tgt_len, bsz)
    output = output.view(tgt_len, bsz, output.size(1))
    if not is_batched:
        output = output.squeeze(1)
    return output, None
