"""Linear maps: a parameter matrix applied to the last dimension of a tensor.

``F.linear(x, W, b)`` (``nn.Linear``), ``torch.addmm(b, x, W)`` with ``W`` stored
``[d_in, d_out]`` (transposed-weight projections), ``x @ W``, ``x @ W.T``,
``W @ x``, ``torch.mm`` and two-operand ``torch.einsum`` products with the
parameter as one operand are all ``s = M a (+ b)`` at every position: one linear
layer (Martens & Grosse 2015).  Which way round the parameter is stored decides
the orientation of the block's gradient matrix, which is always ``[d_out, d_in]``.

A call may apply rows ``[start, stop)`` of a packed parameter (``W[:E]``, a chunk
of a packed projection): the block then covers the whole parameter and the call's
rows carry zeros outside its part (for output rows: zero output gradients; for
input rows: zero inputs), which is the exact per-example gradient.
"""
from __future__ import annotations

import string
from typing import Optional

import torch
import torch.nn.functional as F

from ..blocks.layers import LinearLayer
from .base import UseCall, append_ones, padded_rows
from .layout import as_grad_rows, as_rows, example_layout
from .views import ParamView


def _bias_for(recorder, bias, out_range, out_full) -> Optional[object]:
    """The bias parameter of a call, ``None`` for none, ``NotImplemented`` if it cannot be one."""
    if bias is None:
        return None
    view = recorder.resolve(bias)
    if view is None:  # a computed tensor added as bias: not a parameter of this block
        return False
    if view.transposed or view.param.dim() != 1 or view.param.numel() != out_full or view.scale != 1.0:
        return NotImplemented
    if view.covered_rows() != out_range:
        return NotImplemented
    return view.param


def linear_use(recorder, x: torch.Tensor, view: ParamView, bias, output: torch.Tensor,
               matrix_is_weight: bool, kind: str = "linear", x_rows=None, out_rows=None, layout=None):
    """Record ``output = x M^T (+ b)`` at every leading position of ``x``.

    ``matrix_is_weight``: the view plays ``M`` (``[d_out, d_in]``, as in ``F.linear``); otherwise
    it plays ``M^T`` (the right operand of ``x @ M^T``).  ``x_rows``/``out_rows`` reorder ``x`` and
    the output gradients to ``[..., features]`` when the features are not last; ``layout`` fixes
    where the examples sit (``uses/layout.py``) when the caller knows it.  Returns what the
    network goes on with, or ``NotImplemented`` when the call is not a linear use of the parameter.
    """
    param = view.param
    if param.dim() != 2 or view.shape is not None:
        return NotImplemented
    # The parameter's orientation: its rows are outputs (F.linear's convention) unless the call
    # applies it the other way round.
    transposed = view.transposed != (not matrix_is_weight)
    out_full, in_full = (param.shape[1], param.shape[0]) if transposed else param.shape
    start, stop = view.covered_rows()
    out_range = (0, out_full) if transposed else (start, stop)
    in_range = (start, stop) if transposed else (0, in_full)
    bias_param = _bias_for(recorder, bias, out_range, out_full)
    if bias_param is NotImplemented:
        return NotImplemented
    if bias_param is False:
        bias_param = None
    if bias_param is not None and view.scale != 1.0:
        return NotImplemented  # a scaled weight beside an unscaled bias has no Kronecker form
    x = x_rows(x) if x_rows is not None else x
    features = x.shape[-1] if x.dim() else 1
    if features != in_range[1] - in_range[0]:
        return NotImplemented
    examples = recorder.examples
    layout = layout or example_layout(tuple(x.shape[:-1]), examples)
    rows = as_rows(x.detach(), features, layout, examples)
    if in_range != (0, in_full):
        rows = F.pad(rows, (in_range[0], in_full - in_range[1]))
    if bias_param is not None:
        rows = append_ones(rows)
    width = out_range[1] - out_range[0]

    def grad_rows(grads):
        grads = out_rows(grads) if out_rows is not None else grads
        return as_grad_rows(grads, width, layout, examples)

    use = UseCall(key=(kind, param, bias_param, transposed), weight=param, bias=bias_param,
                  make_layer=lambda name: LinearLayer(name, param, bias_param, transposed=transposed, kind=kind),
                  input_rows=rows, output_rows=padded_rows(grad_rows, out_range[0], width, out_full),
                  weight_scale=view.scale ** 2)
    return recorder.record(use, output)


# ----------------------------------------------------------------------------- the functions
def handle_linear(recorder, func, args, kwargs):
    """``F.linear(input, weight, bias=None)``."""
    names = ("input", "weight", "bias")
    a = dict(zip(names, args), **kwargs)
    x, weight, bias = a.get("input"), a.get("weight"), a.get("bias")
    view = recorder.resolve(weight)
    if view is None or not isinstance(x, torch.Tensor) or recorder.resolve(x) is not None:
        return NotImplemented
    if not linear_use_possible(view, x.shape[-1] if x.dim() else 1, matrix_is_weight=True):
        return NotImplemented
    return linear_use(recorder, x, view, bias, func(*args, **kwargs), matrix_is_weight=True)


def linear_use_possible(view: ParamView, features: int, matrix_is_weight: bool) -> bool:
    """Cheap check before running the operation: a 2-d parameter whose input side matches."""
    if view.param.dim() != 2 or view.shape is not None:
        return False
    transposed = view.transposed != (not matrix_is_weight)
    start, stop = view.covered_rows()
    in_size = stop - start if transposed else view.param.shape[1]
    return features == in_size


def handle_addmm(recorder, func, args, kwargs):
    """``torch.addmm(bias, x, W)``: ``bias + x @ W`` (``beta = alpha = 1`` only)."""
    if len(args) < 3 or kwargs.get("beta", 1) != 1 or kwargs.get("alpha", 1) != 1:
        return NotImplemented
    bias, x, matrix = args[:3]
    view = recorder.resolve(matrix)
    if view is None or not isinstance(x, torch.Tensor) or recorder.resolve(x) is not None \
            or not linear_use_possible(view, x.shape[-1], matrix_is_weight=False):
        return NotImplemented
    return linear_use(recorder, x, view, bias, func(*args, **kwargs), matrix_is_weight=False)


def handle_matmul(recorder, func, args, kwargs):
    """``x @ M``, ``M @ x``, ``torch.matmul``, ``torch.mm`` with a parameter matrix ``M`` on either side."""
    if len(args) != 2 or kwargs:
        return NotImplemented
    left, right = args
    if not isinstance(left, torch.Tensor) or not isinstance(right, torch.Tensor):
        return NotImplemented
    left_view, right_view = recorder.resolve(left), recorder.resolve(right)
    if (left_view is None) == (right_view is None):
        return NotImplemented
    if right_view is not None:  # x @ M: the view is M^T of the linear map
        if left.dim() < 1 or right.dim() != 2 or not linear_use_possible(right_view, left.shape[-1], False):
            return NotImplemented
        return linear_use(recorder, left, right_view, None, func(*args), matrix_is_weight=False)
    # M @ x with x [..., d_in, n]: the positions are x's last dimension.
    if right.dim() < 2 or left.dim() != 2 or not linear_use_possible(left_view, right.shape[-2], True):
        return NotImplemented
    return linear_use(recorder, right, left_view, None, func(*args), matrix_is_weight=True,
                      x_rows=lambda t: t.transpose(-1, -2), out_rows=lambda g: g.transpose(-1, -2))


def _einsum_arguments(args):
    equation, operands = args[0], args[1:]
    if len(operands) == 1 and isinstance(operands[0], (list, tuple)):
        operands = tuple(operands[0])
    return equation.replace(" ", ""), operands


def _ellipsis_dims(spec: str, rank: int) -> Optional[int]:
    """How many dimensions ``...`` stands for in ``spec`` of a ``rank``-d operand (0 without one)."""
    if "..." not in spec:
        return 0 if len(spec) == rank else None
    extra = rank - (len(spec) - 3)
    return None if extra < 0 else extra


def handle_einsum(recorder, func, args, kwargs):
    """Two-operand ``torch.einsum`` where a 2-d parameter maps one index of the other operand to another.

    The parameter's indices must be one contracted with the other operand (its inputs) and one
    that appears in the output only (its outputs); every other index of the other operand must
    appear in the output, and the output must hold nothing else.
    """
    if kwargs or not args or not isinstance(args[0], str):
        return NotImplemented
    equation, operands = _einsum_arguments(args)
    if len(operands) != 2 or "->" not in equation:
        return NotImplemented
    views = [recorder.resolve(t) if isinstance(t, torch.Tensor) else None for t in operands]
    if (views[0] is None) == (views[1] is None):
        return NotImplemented
    p = 0 if views[0] is not None else 1
    view, x = views[p], operands[1 - p]
    inputs, output = equation.split("->")
    specs = inputs.split(",")
    if len(specs) != 2:
        return NotImplemented
    extra = _ellipsis_dims(specs[1 - p], x.dim())
    w_spec = specs[p]
    if extra is None or len(w_spec) != 2 or len(set(w_spec)) != 2 or "..." in w_spec:
        return NotImplemented
    filler = "".join(c for c in string.ascii_uppercase + string.ascii_lowercase if c not in equation)[:extra]
    x_spec, out_spec = specs[1 - p].replace("...", filler), output.replace("...", filler)
    if len(set(x_spec)) != len(x_spec) or len(set(out_spec)) != len(out_spec):
        return NotImplemented
    contracted = [c for c in w_spec if c in x_spec and c not in out_spec]
    produced = [c for c in w_spec if c in out_spec and c not in x_spec]
    kept = [c for c in x_spec if c not in contracted]
    if len(contracted) != 1 or len(produced) != 1 or sorted(kept + produced) != sorted(out_spec):
        return NotImplemented
    # As F.linear: M [out, in] is the parameter when its first index is the output one.
    matrix_is_weight = w_spec[0] == produced[0]
    kept_in_output_order = [c for c in out_spec if c in kept]
    x_order = [x_spec.index(c) for c in kept_in_output_order] + [x_spec.index(contracted[0])]
    out_order = [out_spec.index(c) for c in kept_in_output_order] + [out_spec.index(produced[0])]
    if not linear_use_possible(view, x.shape[x_spec.index(contracted[0])], matrix_is_weight):
        return NotImplemented
    result = func(*args)
    grad_order = [0] + [i + 1 for i in out_order]
    return linear_use(recorder, x, view, None, result, matrix_is_weight=matrix_is_weight,
                      x_rows=lambda t: t.permute(x_order), out_rows=lambda g: g.permute(grad_order))


HANDLERS = {
    F.linear: handle_linear,
    torch.addmm: handle_addmm, torch.Tensor.addmm: handle_addmm,
    torch.matmul: handle_matmul, torch.Tensor.matmul: handle_matmul, torch.Tensor.__matmul__: handle_matmul,
    torch.mm: handle_matmul, torch.Tensor.mm: handle_matmul,
    torch.einsum: handle_einsum,
}
