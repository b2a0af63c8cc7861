"""Damping and inversion of curvature factors, in float64 on the CPU.

Factored Tikhonov damping (Martens & Grosse 2015, sec. 6.3): the damped
Kronecker block ``A (x) G + lambda I`` is approximated by

    (A + pi sqrt(lambda) I) (x) (G + sqrt(lambda) / pi I),
    pi = sqrt((tr A / dim A) / (tr G / dim G)),

which keeps the product's scale balanced between the two factors.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional

import torch

_TINY = 1e-30


def factored_damping(trace_in: float, dim_in: int, trace_out: float, dim_out: int,
                     damping: float) -> tuple[float, float]:
    """Amounts ``(pi sqrt(lambda), sqrt(lambda) / pi)`` to add to the input and output factors."""
    mean_in, mean_out = trace_in / dim_in, trace_out / dim_out
    if mean_in > _TINY and mean_out > _TINY and math.isfinite(mean_in / mean_out):
        pi = math.sqrt(mean_in / mean_out)
    else:
        # A dead factor (all zeros) has no scale to balance against; split evenly.
        pi = 1.0
    root = math.sqrt(damping)
    return pi * root, root / pi


@dataclass
class DampedInverse:
    """Inverse of ``matrix + shift I`` and, when asked for, the undamped spectrum."""

    inverse: torch.Tensor
    eigenvalues: Optional[torch.Tensor]  # ascending, undamped; None unless requested
    used_fallback: bool


def damped_inverse(matrix: torch.Tensor, shift: float, want_spectrum: bool = False) -> DampedInverse:
    """Invert ``matrix + shift I`` for a symmetric positive semi-definite ``matrix``.

    Cholesky is the fast path.  When the damped matrix is numerically indefinite
    (Cholesky fails) or the spectrum is wanted, an eigendecomposition is used
    instead; negative eigenvalues from round-off are clipped to zero before the
    shift, which is the nearest positive semi-definite matrix in Frobenius norm
    (Higham 1988).  A statistic that is symmetric only up to rounding is replaced
    by its symmetric part first (both factorizations would read one triangle only).
    """
    sym = torch.add(matrix, matrix.T).mul_(0.5)
    if not want_spectrum:
        damped = sym.clone()
        damped.diagonal().add_(shift)  # in place: no identity matrix is built
        chol, info = torch.linalg.cholesky_ex(damped)
        if int(info) == 0:
            return DampedInverse(torch.cholesky_inverse(chol), None, False)
    eigenvalues, vectors = torch.linalg.eigh(sym)
    clipped = eigenvalues.clamp(min=0.0) + shift
    inverse = (vectors / clipped) @ vectors.T
    return DampedInverse(inverse, eigenvalues if want_spectrum else None, not want_spectrum)


def to_cpu64(tensor: torch.Tensor) -> torch.Tensor:
    return tensor.detach().to(device="cpu", dtype=torch.float64)
