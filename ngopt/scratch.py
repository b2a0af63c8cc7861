"""Memory a large layer's block reuses from one step to the next.

A tensor of more than a few hundred kilobytes gets fresh pages from the operating system, and the first
write to each page costs a fault: on a 32,000 x 513 output layer (one timing on a 2-core Intel Xeon) a
fresh product with the input factor took 75 ms where the same product into memory already written took
59 ms, and the gradient matrix (weight and bias joined) 18.5 ms fresh against 6.7 ms reused. So a large
block keeps its gradient matrix's memory between steps, and takes the momentum buffer a step replaces as
the memory of the next step's proposal (the buffer is then no longer part of the optimizer's state; as
with torch's own optimizers, which update their buffers in place, a reference kept to an earlier state
tensor does not keep its values: copy a ``state_dict()`` to keep it). The kept proposal memory lives
through the next forward and backward too, so it adds one such tensor per large layer where those set
the peak (a convolutional network's activations); where the step sets it (a vocabulary's output layer)
the peak is unchanged, as both tensors are alive during the step anyway.
"""
from __future__ import annotations

from typing import Optional

import torch

# Only layers of at least this many elements (16 MB in float32: a vocabulary's output layer, not a
# ResNet-18's largest convolution at 2.4M) keep memory: below, the faults saved are a few percent of a
# step and the memory kept would raise a convolutional network's peak by one tensor per layer.
MIN_ELEMENTS = 2 ** 22


def fits(tensor: Optional[torch.Tensor], shape, dtype: torch.dtype, device: torch.device) -> bool:
    """Whether ``tensor`` has this shape, dtype and device (its layout is for the user to check: a block
    writes into kept memory only where its result's layout is the kept tensor's)."""
    return tensor is not None and tensor.shape == torch.Size(shape) and tensor.dtype == dtype \
        and tensor.device == device


def take(scratch: dict, key: str, like: torch.Tensor, avoid: Optional[torch.Tensor] = None) -> Optional[torch.Tensor]:
    """The kept tensor under ``key`` (removed from ``scratch``) if it has ``like``'s shape, dtype and device
    and shares no memory with ``avoid`` (a tensor the step still reads), else None."""
    tensor = scratch.pop(key, None)
    if not fits(tensor, like.shape, like.dtype, like.device):
        return None
    shared = avoid is not None and tensor.untyped_storage().data_ptr() == avoid.untyped_storage().data_ptr()
    return None if shared else tensor


def set_aside(scratch: dict, key: str, replaced: Optional[torch.Tensor], new: Optional[torch.Tensor]) -> None:
    """Keep ``replaced`` under ``key`` when a step has just replaced it by ``new`` and it is large enough."""
    if replaced is not None and replaced is not new and worth_keeping(replaced):
        scratch[key] = replaced


def worth_keeping(tensor: torch.Tensor) -> bool:
    return tensor.numel() >= MIN_ELEMENTS
