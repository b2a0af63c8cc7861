"""Waiting on collectives with a timeout, and the error that names a failed exchange."""
from __future__ import annotations

import datetime
from typing import Iterable, Optional

import torch
import torch.distributed as dist
from torch import nn


class CurvatureSyncError(RuntimeError):
    """A collective of the curvature exchange failed or timed out (a peer exited, raised or stalls)."""


def _complete(start, what: str, timeout: Optional[datetime.timedelta], group) -> None:
    """Start a collective (``start()`` returns its work handle) and wait for it, or raise a clear error."""
    try:
        work = start()
        if timeout is None:
            work.wait()
        else:
            work.wait(timeout)
    except Exception as exc:
        raise CurvatureSyncError(
            f"ngopt.distributed: the {what} failed on rank {dist.get_rank(group)} of "
            f"{dist.get_world_size(group)}: a peer has probably exited, raised or stalled (see its log). "
            f"Cause: {exc}") from exc


def _as_timedelta(seconds: Optional[float]) -> Optional[datetime.timedelta]:
    if seconds is None:
        return None
    if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) or not seconds > 0:
        raise ValueError(f"timeout must be a positive number of seconds or None, got {seconds!r}")
    return datetime.timedelta(seconds=float(seconds))


def _communication_device(process_group) -> torch.device:
    """NCCL moves CUDA tensors only; every other backend here takes CPU tensors."""
    backend = str(dist.get_backend(process_group)).lower()
    if "nccl" in backend and torch.cuda.is_available():
        return torch.device("cuda", torch.cuda.current_device())
    return torch.device("cpu")


def _first_rank(group) -> int:
    """Global rank of the group's rank 0 (``broadcast`` takes global ranks)."""
    return 0 if group is None else dist.get_global_rank(group, 0)


def _parameters(params) -> Iterable[torch.Tensor]:
    if isinstance(params, nn.Module):
        return list(params.parameters())
    return list(params)
