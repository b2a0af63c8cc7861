"""Tensors that are a parameter seen another way: transposed, sliced, cast, reshaped or scaled.

Code that applies a weight rarely hands the parameter itself to the operation:
``x @ W.T``, ``W.to(x.dtype)``, ``gamma.reshape(1, -1, 1, 1)``, ``w_qkv[:E]`` or
``1.0 + weight`` all reach it through another tensor.  A :class:`ParamView`
says how such a tensor relates to its parameter, so that a use handler can read
the operation in the parameter's own layout.

Views are found from what the tensor *is*, not from the name of the function that
made it: a result that shares the parameter's storage is a reshape (same element
order), a transpose (strides swapped) or a slice of rows (an offset by whole rows)
of it; a cast (``to``, ``float``, ``type_as``, ...) keeps the view of its input; adding
a number keeps it (the gradient is the same); multiplying by a number scales it
(the gradient scales by that number).
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Optional, Tuple

import torch

# Functions that return their input's values in another dtype, device or memory layout.
CASTS = {torch.Tensor.to, torch.Tensor.float, torch.Tensor.double, torch.Tensor.half, torch.Tensor.bfloat16,
         torch.Tensor.type_as, torch.Tensor.contiguous, torch.Tensor.clone, torch.clone, torch.Tensor.type}
SHIFTS = {torch.Tensor.__add__, torch.Tensor.__radd__, torch.Tensor.add, torch.add,
          torch.Tensor.__sub__, torch.Tensor.sub, torch.sub}
# Functions that broadcast their input: an elementwise use reads them as the parameter broadcast.
EXPANSIONS = {torch.Tensor.expand, torch.Tensor.expand_as, torch.broadcast_to, torch.Tensor.broadcast_to}
SCALINGS = {torch.Tensor.__mul__, torch.Tensor.__rmul__, torch.Tensor.mul, torch.mul,
            torch.Tensor.__truediv__, torch.Tensor.div, torch.div}


@dataclass(frozen=True)
class ParamView:
    """A tensor that holds ``scale * param`` seen through ``transposed`` / ``rows`` / ``shape``.

    ``rows``: the view covers rows ``[start, stop)`` of a 1-d or 2-d parameter (before any transpose);
    ``transposed``: a 2-d view is ``param[rows].T``; ``shape``: an order-preserving reshape of the
    whole parameter.  ``scale`` is a number the values were multiplied by.
    """

    param: torch.nn.Parameter
    transposed: bool = False
    rows: Optional[Tuple[int, int]] = None
    shape: Optional[Tuple[int, ...]] = None
    scale: float = 1.0

    @property
    def whole(self) -> bool:
        """The view covers every element of the parameter in its own order (a plain reshape at most)."""
        return not self.transposed and self.rows is None

    def covered_rows(self) -> Tuple[int, int]:
        return self.rows if self.rows is not None else (0, self.param.shape[0])


def _same_storage(result: torch.Tensor, param: torch.Tensor) -> bool:
    try:
        return result.untyped_storage().data_ptr() == param.untyped_storage().data_ptr()
    except (RuntimeError, NotImplementedError):  # tensors without storage (meta, functional wrappers)
        return False


def view_from_storage(result: torch.Tensor, source: ParamView) -> Optional[ParamView]:
    """How ``result``, which shares ``source.param``'s storage, lays out the parameter; None if unknown."""
    param = source.param
    if not param.is_contiguous():
        return None
    offset = result.storage_offset() - param.storage_offset()
    if offset == 0 and result.numel() == param.numel() and result.is_contiguous():
        shape = None if result.shape == param.shape else tuple(result.shape)
        return ParamView(param, shape=shape, scale=source.scale)
    if param.dim() == 1 and result.dim() == 1 and result.stride() == (1,):
        return ParamView(param, rows=(offset, offset + result.shape[0]), scale=source.scale)
    if param.dim() != 2 or result.dim() != 2:
        return None
    row = param.stride(0)
    if offset % row:
        return None
    start = offset // row
    if result.stride() == param.stride() and result.shape[1] == param.shape[1]:
        return ParamView(param, rows=(start, start + result.shape[0]), scale=source.scale)
    if result.stride() == (param.stride(1), param.stride(0)) and result.shape[0] == param.shape[1]:
        return ParamView(param, transposed=True, rows=(start, start + result.shape[1]), scale=source.scale)
    return None


def simplified(view: ParamView) -> ParamView:
    """Drop a ``rows`` range that covers the whole parameter."""
    if view.rows is not None and view.rows == (0, view.param.shape[0]):
        return replace(view, rows=None)
    return view


def derived_view(func, args, kwargs, result, resolve) -> Optional[ParamView]:
    """The view ``result`` is of a parameter, if ``func`` only re-expresses one tracked tensor; else None.

    ``resolve(tensor)`` gives the :class:`ParamView` of a tracked tensor or None.
    """
    if not isinstance(result, torch.Tensor) or not result.requires_grad:
        return None
    tensors = [a for a in args if isinstance(a, torch.Tensor)] + \
        [v for v in kwargs.values() if isinstance(v, torch.Tensor)]
    tracked = [(t, resolve(t)) for t in tensors if resolve(t) is not None]
    if len(tracked) != 1:
        return None
    source_tensor, source = tracked[0]
    if func in CASTS:
        if result.shape != source_tensor.shape:
            return None
        return source
    if func in EXPANSIONS and source.whole:
        return replace(source, shape=tuple(source.shape or source.param.shape))
    numbers = [a for a in args if isinstance(a, (int, float)) and not isinstance(a, bool)]
    if len(tensors) == 1 and len(numbers) == 1 and not kwargs:
        if func in SHIFTS and args[0] is source_tensor:
            return source
        if func in SCALINGS:
            factor = float(numbers[0])
            if func in (torch.Tensor.__truediv__, torch.Tensor.div, torch.div):
                if args[0] is not source_tensor or factor == 0.0:
                    return None
                factor = 1.0 / factor
            return replace(source, scale=source.scale * factor)
        return None
    if len(tensors) != 1 or not _same_storage(result, source.param):
        return None
    found = view_from_storage(result, source)
    return None if found is None else simplified(found)
