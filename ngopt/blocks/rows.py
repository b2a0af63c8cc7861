"""Layer input rows held compactly and read a bounded chunk of examples at a time.

A convolution's rows are its input patches at every output position,
``[N, L, C*prod(kernel) (+1)]``: ``prod(kernel)`` times (9 for 3x3) the layer
input itself.  Instead of unfolding them all when the layer is recorded, the
capture keeps the layer input and a :class:`HeldRows` that unfolds any slice of
examples on demand.  Blocks read rows through :func:`example_chunks`, which
yields slices of at most :data:`CHUNK_ELEMENTS` floats (at least one example),
so the statistics of a refresh never hold more than one chunk of patches.
Sums over chunks equal the whole-batch sums up to float rounding.

Plain tensors pass through the same functions: small rows come back as one chunk.
"""
from __future__ import annotations

import math
from typing import Callable, Iterator, List, Tuple, Union

import torch

# Floats per chunk of rows (32 MB in float32): large enough that the chunk's GEMMs run at full speed.
CHUNK_ELEMENTS = 2 ** 23


class HeldRows:
    """Rows ``make(source[start:stop])`` of a held ``source``, made a slice of examples at a time."""

    def __init__(self, make: Callable[[torch.Tensor], torch.Tensor], source: torch.Tensor):
        self.make = make
        self.source = source
        self.version = source._version  # shared with the layer's input: in-place changes show
        first = make(source[:1])  # one example fixes the row shape per example
        self.shape = torch.Size((source.shape[0],) + tuple(first.shape[1:]))
        self.dtype = first.dtype

    def _checked_source(self) -> torch.Tensor:
        if self.source._version != self.version:
            raise RuntimeError("a recorded layer input was modified in place after the layer ran; its "
                               "curvature statistics would be wrong (use an out-of-place operation there)")
        return self.source

    def examples(self, start: int, stop: int) -> torch.Tensor:
        return self.make(self._checked_source()[start:stop])

    def select(self, indices: torch.Tensor) -> "HeldRows":
        """The rows of the examples ``indices`` (a copy of their part of the input)."""
        source = self._checked_source()
        return HeldRows(self.make, source.index_select(0, indices.to(source.device)))

    def numel(self) -> int:
        return math.prod(self.shape)


class JoinedRows:
    """Several calls' rows of the same examples, joined along positions (dim 1) slice by slice."""

    def __init__(self, parts: List["Rows"]):
        self.parts = parts
        self.shape = torch.Size((parts[0].shape[0], sum(p.shape[1] for p in parts)) + tuple(parts[0].shape[2:]))
        self.dtype = parts[0].dtype

    def examples(self, start: int, stop: int) -> torch.Tensor:
        return torch.cat([example_slice(part, start, stop) for part in self.parts], dim=1)

    def numel(self) -> int:
        return math.prod(self.shape)


Rows = Union[torch.Tensor, HeldRows, JoinedRows]


def example_slice(rows: Rows, start: int, stop: int) -> torch.Tensor:
    """Rows of examples ``start:stop`` as a tensor."""
    if isinstance(rows, torch.Tensor):
        return rows[start:stop]
    return rows.examples(start, stop)


def example_chunks(rows: Rows, limit: int = None) -> Iterator[Tuple[int, int, torch.Tensor]]:
    """``(start, stop, rows[start:stop])`` over all examples, each chunk at most ``limit`` floats."""
    limit = CHUNK_ELEMENTS if limit is None else limit
    examples = rows.shape[0]
    per_example = max(1, rows.numel() // max(1, examples))
    step = max(1, limit // per_example)
    for start in range(0, examples, step):
        stop = min(examples, start + step)
        yield start, stop, example_slice(rows, start, stop)


def materialize(rows: Rows) -> torch.Tensor:
    return rows if isinstance(rows, torch.Tensor) else rows.examples(0, rows.shape[0])


def join_positions(parts: List[Rows]) -> Rows:
    """Rows of the same examples from several calls, as one set of rows (positions concatenated)."""
    if all(isinstance(part, torch.Tensor) for part in parts):
        return torch.cat(parts, dim=1)
    return JoinedRows(parts)


def mean_over_positions(rows: Rows) -> torch.Tensor:
    """``[N, 1, ...]``: each example's mean row, computed chunk by chunk."""
    if isinstance(rows, torch.Tensor):
        return rows.mean(dim=1, keepdim=True)
    return torch.cat([chunk.mean(dim=1, keepdim=True) for _, _, chunk in example_chunks(rows)])
