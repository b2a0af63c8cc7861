"""Plain data-parallel helpers for loops without DDP: gradient average, parameter sync, checks, saving."""
from __future__ import annotations

import os
from typing import Dict, Optional

import torch
import torch.distributed as dist
from torch import nn

from .collectives import _as_timedelta, _communication_device, _complete, _parameters


def average_gradients(params, process_group=None, timeout: Optional[float] = None) -> None:
    """Average ``.grad`` over the ranks in one all-reduce per dtype (for loops without DDP).

    ``params`` is a module or an iterable of parameters.  A parameter without a gradient
    on some rank counts as zero there; it keeps ``grad=None`` only if no rank has one.
    """
    params = [p for p in _parameters(params) if p.requires_grad]
    world = dist.get_world_size(process_group)
    device = _communication_device(process_group)
    by_dtype: Dict[torch.dtype, list] = {}
    for p in params:
        by_dtype.setdefault(p.dtype, []).append(p)
    for dtype, group in by_dtype.items():
        flats = [p.grad.reshape(-1).to(device) if p.grad is not None
                 else torch.zeros(p.numel(), dtype=dtype, device=device) for p in group]
        present = torch.tensor([p.grad is not None for p in group], dtype=dtype, device=device)
        buffer = torch.cat(flats + [present])
        _complete(lambda: dist.all_reduce(buffer, group=process_group, async_op=True), "gradient all-reduce",
                  _as_timedelta(timeout), process_group)
        offset = 0
        for p, seen in zip(group, buffer[-len(group):].tolist()):
            piece = buffer[offset:offset + p.numel()]
            offset += p.numel()
            if seen == 0:
                continue
            average = (piece / world).reshape(p.shape).to(p.device)
            if p.grad is None:
                p.grad = average
            else:
                p.grad.copy_(average)


def sync_parameters(module: nn.Module, src: int = 0, process_group=None,
                         timeout: Optional[float] = None) -> None:
    """Copy ``src``'s parameters and buffers to every rank (one broadcast per dtype), as DDP does at wrap time."""
    tensors = list(module.parameters()) + list(module.buffers())
    device = _communication_device(process_group)
    by_dtype: Dict[torch.dtype, list] = {}
    for t in tensors:
        by_dtype.setdefault(t.dtype, []).append(t)
    with torch.no_grad():
        for group in by_dtype.values():
            buffer = torch.cat([t.detach().reshape(-1).to(device) for t in group])
            _complete(lambda: dist.broadcast(buffer, src=src, group=process_group, async_op=True),
                      "parameter broadcast", _as_timedelta(timeout), process_group)
            offset = 0
            for t in group:
                t.copy_(buffer[offset:offset + t.numel()].reshape(t.shape))
                offset += t.numel()


def max_parameter_difference(module: nn.Module, process_group=None, timeout: Optional[float] = None) -> float:
    """Largest ``max_rank - min_rank`` over all parameter entries (0.0: every rank holds the same weights)."""
    device = _communication_device(process_group)
    values = torch.cat([p.detach().double().reshape(-1).to(device) for p in module.parameters()])
    both = torch.cat([values, -values])
    _complete(lambda: dist.all_reduce(both, op=dist.ReduceOp.MAX, group=process_group, async_op=True),
              "parameter comparison", _as_timedelta(timeout), process_group)
    high, low = both[:values.numel()], -both[values.numel():]
    return float((high - low).max()) if values.numel() else 0.0


def save_on_rank0(obj, path: str, process_group=None, timeout: Optional[float] = None) -> None:
    """``torch.save(obj, path)`` on rank 0 only (written to a temporary name, then renamed), then a barrier.

    The optimizer's state is the same on every rank (to within rounding), so rank 0's ``state_dict()`` is
    the whole state and loads into any world size, a single process included.
    """
    if dist.get_rank(process_group) == 0:
        temporary = f"{path}.tmp{os.getpid()}"
        torch.save(obj, temporary)
        os.replace(temporary, path)
    _complete(lambda: dist.barrier(group=process_group, async_op=True), "checkpoint barrier",
              _as_timedelta(timeout), process_group)
