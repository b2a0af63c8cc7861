"""A Kronecker factor kept whole, or block-diagonal when it is too large to keep whole.

A factor ``S = E[x x^T]`` of dimension ``d`` costs ``d^2`` numbers, ``d^3`` to invert and ``d^2``
per column it preconditions.  For a vocabulary of 128k (an output layer's output factor) or a
3x3 convolution with 512 channels (a 4,609-dimensional input factor) that is more memory or time
than the layer itself.  :class:`BlockDiagonal` keeps only the ``b x b`` blocks on the diagonal of
``S`` (the coordinates split into consecutive runs of ``b``; the last run padded with zeros): memory
``d b``, inversion ``d b^2``, products ``d b`` per column, all linear in ``d``.  Dropping the
off-diagonal blocks is the same approximation K-FAC makes between layers, applied within one
factor; ``b = 1`` is the factor's diagonal.  :class:`Whole` is the plain ``d x d`` matrix.

Both forms store a tensor (``[d, d]``, or ``[n, b, b]`` with ``n = ceil(d / b)``) and apply it to
matrices from either side, so a block needs no other knowledge of the form.
"""
from __future__ import annotations

import math
from typing import Optional, Tuple

import torch

from .linalg import (batched_cholesky_inverse, damped_inverse, inversion_dtype, inversion_input,
                     largest_eigenvalue_bound)


class Whole:
    """The factor as one ``d x d`` matrix."""

    def __init__(self, dim: int):
        self.dim = dim
        self.block = dim

    name = "whole"
    symmetric_matrix = True  # one symmetric matrix: sent as a triangle between ranks

    def describe(self) -> str:
        return f"{self.dim}"

    @property
    def shape(self) -> Tuple[int, ...]:
        return (self.dim, self.dim)

    def zeros(self, like: torch.Tensor) -> torch.Tensor:
        return torch.zeros(self.shape, dtype=like.dtype, device=like.device)

    def add_moment(self, factor: torch.Tensor, rows: torch.Tensor, alpha: float = 1.0) -> None:
        """``factor += alpha * rows^T rows`` for rows ``[R, d]``."""
        factor.addmm_(rows.T, rows, alpha=alpha)

    def trace(self, factor: torch.Tensor) -> torch.Tensor:
        """The trace, summed in float64 (a 0-d float64 tensor)."""
        return factor.diagonal(dim1=-2, dim2=-1).sum(dtype=torch.float64)

    def inverse(self, factor: torch.Tensor, shift: float, want_spectrum: bool,
                precision: Optional[torch.dtype] = None):
        """``(inverse of factor + shift I, ascending undamped eigenvalues or None, used the eigen fallback)``.

        ``factor`` is on the CPU; ``precision``: the statistics' own dtype (by default the factor's; single
        precision may be inverted in float32, see :mod:`ngopt.linalg`); the inverse comes back in float32
        where it was computed in float32, else in float64.
        """
        result = damped_inverse(factor, shift, want_spectrum, precision)
        return result.inverse, result.eigenvalues, result.used_fallback

    def eigenvalues(self, factor64: torch.Tensor) -> torch.Tensor:
        return torch.linalg.eigvalsh(0.5 * (factor64 + factor64.T))

    def eigh(self, factor64: torch.Tensor):
        """``(eigenvalues [d] ascending within each block, eigenvectors in this form's layout)``."""
        return torch.linalg.eigh(0.5 * (factor64 + factor64.T))

    def left(self, matrix: torch.Tensor, operand: torch.Tensor, transpose: bool = False) -> torch.Tensor:
        """``S @ M`` (``S^T @ M`` with ``transpose``) for ``M [d, k]``."""
        return (matrix.T if transpose else matrix) @ operand

    def right(self, operand: torch.Tensor, matrix: torch.Tensor, transpose: bool = False,
              out: Optional[torch.Tensor] = None) -> torch.Tensor:
        """``M @ S`` (``M @ S^T``) for ``M [k, d]``, written into ``out`` when given and contiguous."""
        matrix = matrix.T if transpose else matrix
        return torch.mm(operand, matrix, out=out) if out is not None and out.is_contiguous() else operand @ matrix

    def left_damped(self, factor: torch.Tensor, shift: float, operand: torch.Tensor) -> torch.Tensor:
        """``(S + shift I) @ M`` without forming the damped factor."""
        return torch.addmm(operand, factor, operand, beta=shift)

    def right_damped(self, operand: torch.Tensor, factor: torch.Tensor, shift: float) -> torch.Tensor:
        return torch.addmm(operand, operand, factor, beta=shift)

    def dense(self, factor: torch.Tensor) -> torch.Tensor:
        return factor


class BlockDiagonal(Whole):
    """The ``b x b`` diagonal blocks of the factor, ``[n, b, b]``; coordinates ``[i b, (i + 1) b)`` per block."""

    name = "block_diagonal"
    symmetric_matrix = False

    def __init__(self, dim: int, block: int):
        super().__init__(dim)
        self.count = math.ceil(dim / max(1, min(block, dim)))
        # Blocks as equal as the count allows (513 in 3 blocks of 171, not 256, 256 and 1): the
        # padding, which costs products and memory for nothing, stays under one row per block.
        self.block = math.ceil(dim / self.count)
        self.padding = self.count * self.block - dim

    def describe(self) -> str:
        return f"{self.dim} in {self.count} blocks of {self.block}" if self.block > 1 else f"{self.dim} (diagonal)"

    @property
    def shape(self) -> Tuple[int, ...]:
        return (self.count, self.block, self.block)

    def _blocks(self, rows: torch.Tensor) -> torch.Tensor:
        """``[R, d]`` -> ``[n, R, b]`` (zero-padded)."""
        if self.padding:
            rows = torch.nn.functional.pad(rows, (0, self.padding))
        return rows.reshape(rows.shape[0], self.count, self.block).transpose(0, 1)

    def add_moment(self, factor, rows, alpha=1.0):
        blocks = self._blocks(rows)
        factor.baddbmm_(blocks.transpose(1, 2), blocks, alpha=alpha)

    def _pad_mask(self, factor64: torch.Tensor) -> torch.Tensor:
        """Ones on the padded coordinates' diagonal: they stay invertible and contribute nothing."""
        mask = torch.zeros(self.count * self.block, dtype=factor64.dtype, device=factor64.device)
        if self.padding:
            mask[self.dim:] = 1.0
        return torch.diag_embed(mask.reshape(self.count, self.block))

    def inverse(self, factor, shift, want_spectrum, precision=None):
        factor, precision = inversion_input(factor, precision)
        sym = 0.5 * (factor + factor.transpose(1, 2))
        padded = sym + self._pad_mask(sym)
        dtype = inversion_dtype(largest_eigenvalue_bound(sym), shift, precision)  # the worst block decides
        damped = (padded + shift * torch.eye(self.block, dtype=sym.dtype)).to(dtype)
        # One batched cholesky_inverse: 2-3x faster than triangular solves of the identity and a product
        # from 16 rows a block up, equal below (1 thread, AMD EPYC: 8 blocks of 256, 3.8 against 10.3 ms
        # in float32; 4 of 512 in float64, 21 against 70).
        inverse, failed = batched_cholesky_inverse(damped)
        if failed:
            # Numerically indefinite blocks only: their nearest positive semi-definite matrix, damped.
            inverse = inverse.to(torch.float64)
            eigenvalues, vectors = torch.linalg.eigh(padded[failed].to(torch.float64))
            clipped = eigenvalues.clamp(min=0.0) + shift
            inverse[failed] = (vectors / clipped.unsqueeze(1)) @ vectors.transpose(1, 2)
        return inverse, self.eigenvalues(sym.to(torch.float64)) if want_spectrum else None, bool(failed)

    def eigenvalues(self, factor64):
        """Ascending eigenvalues of the block-diagonal factor itself (the padding left out)."""
        sym = 0.5 * (factor64 + factor64.transpose(1, 2))
        last = self.block - self.padding
        values = [torch.linalg.eigvalsh(sym[:-1]).reshape(-1)] if self.count > 1 else []
        values.append(torch.linalg.eigvalsh(sym[-1, :last, :last]))
        return torch.cat(values).sort().values

    def eigh(self, factor64):
        raise NotImplementedError("an eigenbasis is kept only for whole factors")

    # With padding and up to this many blocks, one product per block written into its slice of the result
    # beats a batched product of a padded copy (a pass over the operand); otherwise, one batched product.
    LOOPED_BLOCKS = 64

    def _ranges(self):
        for index in range(self.count):
            start = index * self.block
            yield index, start, min(self.dim, start + self.block)

    def _looped(self) -> bool:
        return bool(self.padding) and self.count <= self.LOOPED_BLOCKS

    def _apply(self, blocks: torch.Tensor, operand: torch.Tensor, transpose: bool) -> torch.Tensor:
        """``blockdiag(B) @ M`` for ``M [d, k]``."""
        k = operand.shape[1]
        if self.block == 1:  # the diagonal
            return blocks.reshape(-1, 1) * operand
        if self._looped():
            result = torch.empty_like(operand)
            for index, start, stop in self._ranges():
                part = blocks[index, :stop - start, :stop - start]
                torch.mm(part.T if transpose else part, operand[start:stop], out=result[start:stop])
            return result
        padded = torch.nn.functional.pad(operand, (0, 0, 0, self.padding)) if self.padding else operand
        grouped = padded.reshape(self.count, self.block, k)
        result = torch.bmm(blocks.transpose(1, 2) if transpose else blocks, grouped).reshape(-1, k)
        return result[:self.dim] if self.padding else result

    def left(self, matrix, operand, transpose=False):
        return self._apply(matrix, operand, transpose)

    def right(self, operand, matrix, transpose=False, out=None):
        """``M @ blockdiag(B)`` for ``M [k, d]``: each block on its slice of columns (``out`` is not used).

        The result is contiguous: it becomes a proposal and a momentum buffer, and a transposed layout
        would make every later elementwise pass over it, and the reshape to the weight's shape, slow.
        """
        if self.block == 1:
            return operand * matrix.reshape(1, -1)
        if self._looped():
            result = torch.empty_like(operand)
            for index, start, stop in self._ranges():
                part = matrix[index, :stop - start, :stop - start]
                torch.mm(operand[:, start:stop], part.T if transpose else part, out=result[:, start:stop])
            return result
        k = operand.shape[0]
        padded = torch.nn.functional.pad(operand, (0, self.padding)) if self.padding else operand
        blocks = matrix.transpose(1, 2) if transpose else matrix
        result = torch.einsum("knb,nbc->knc", padded.reshape(k, self.count, self.block), blocks).reshape(k, -1)
        return result[:, :self.dim].contiguous() if self.padding else result

    def left_damped(self, factor, shift, operand):
        return self._apply(factor, operand, False) + shift * operand

    def right_damped(self, operand, factor, shift):
        return self.right(operand, factor) + shift * operand

    def dense(self, factor):
        return torch.block_diag(*factor)[:self.dim, :self.dim]


def factor_form(dim: int, block: Optional[int]):
    """:class:`Whole` when ``block`` is None or covers ``dim``, else :class:`BlockDiagonal` with that block size."""
    if block is None or block >= dim:
        return Whole(dim)
    return BlockDiagonal(dim, block)
