"""What a use handler reports for one application of a parameter on a recorded forward."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional, Tuple

import torch
from torch import nn

from ..blocks.layers import LayerAdapter


@dataclass
class UseCall:
    """One call that applies ``weight`` (and ``bias``) the way ``key`` describes.

    ``key`` is the same for every call of one use (kind, parameters, orientation,
    geometry): calls with equal keys are positions of one layer, calls with
    different keys of one parameter are different uses (a tied weight).
    ``make_layer(name)`` builds the layer adapter of the use; ``input_rows`` are the
    call's rows ``a``; ``output_rows`` maps output gradients ``[K, *output.shape]``
    to rows ``g``; ``weight_scale`` multiplies the call's statistics (a weight used as
    ``alpha * W`` has ``alpha^2`` times the curvature of the effective weight).
    """

    key: Tuple
    weight: nn.Parameter
    bias: Optional[nn.Parameter]
    make_layer: Callable[[str], LayerAdapter]
    input_rows: object
    output_rows: Callable[[torch.Tensor], torch.Tensor]
    weight_scale: float = 1.0


def padded_rows(rows: Callable[[torch.Tensor], torch.Tensor], offset: int, width: int, full: int):
    """Output-gradient rows of a call that covers features ``[offset, offset + width)`` of ``full``.

    The features the call does not produce get zero gradients: the exact per-example
    gradient of the whole parameter.
    """
    if offset == 0 and width == full:
        return rows
    pad = (offset, full - offset - width)
    return lambda grads: torch.nn.functional.pad(rows(grads), pad)


def append_ones(rows: torch.Tensor) -> torch.Tensor:
    """Rows with a trailing 1: the bias's input."""
    ones = torch.ones(rows.shape[:-1] + (1,), dtype=rows.dtype, device=rows.device)
    return torch.cat([rows, ones], dim=-1)
