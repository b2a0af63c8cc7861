"""Damping and inversion of curvature factors on the CPU: float64, or float32 where that is safe.

Factored Tikhonov damping (Martens & Grosse 2015, sec. 6.3): the damped
Kronecker block ``A (x) G + lambda I`` is approximated by

    (A + pi sqrt(lambda) I) (x) (G + sqrt(lambda) / pi I),
    pi = sqrt((tr A / dim A) / (tr G / dim G)),

which keeps the product's scale balanced between the two factors.

A factor whose statistics are single precision is inverted in float32 when the damping keeps it well
conditioned: for a positive semi-definite ``S``, ``cond(S + shift I) <= (b + shift) / shift`` with ``b`` the
smaller of its trace and its largest absolute row sum (both bound its largest eigenvalue), and a
float32 Cholesky inverse is accurate to about ``cond * 6e-8`` relative (Higham, Accuracy and Stability
of Numerical Algorithms, 2nd ed., ch. 10 and 14), so up to :data:`SINGLE_PRECISION_CONDITION` = 1e4
the inverse is within about 6e-4 of the float64 one; measured on Gram matrices of uncentred,
rank-deficient rows at that bound, within 7e-5 up to d = 2049 (``python scripts/inversion_precision.py
--condition 10000 --rank-deficient``).  Either is far below what the approximation already leaves out
(a Monte Carlo Fisher from one batch, a running average that takes 0.3 of each refresh's new
statistics).  A bound of 1e3 sent the benchmark CNN's 513-row input factor of its last layer to float64
at 7 of its 12 inversions in the first 40 steps (bound median 1.04e3, at most 1.28e3; ``python
scripts/factor_conditions.py --task digits_cnn --steps 40 --limit 1000``).  Float32 Cholesky and inverse
ran 1.4x (d = 257) to 2.1x (d = 2049) faster than float64 on a 2-core AMD EPYC
(``python scripts/inversion_precision.py``), and a float32 factor on that path is
never copied to float64 at all (the copies there and back cost as much as the factorization below
d = 100).  Float64 statistics are always inverted in float64.
"""
from __future__ import annotations

import math
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Dict, Iterator, List, Optional, Sequence, Tuple

import torch

_TINY = 1e-30
SINGLE_PRECISION_CONDITION = 1e4
# One CPU thread per this many rows of the largest matrix an inversion phase factorizes (see
# :func:`inversion_threads`).
ROWS_PER_THREAD = 128


def inversion_dtype(largest_eigenvalue_bound: float, shift: float, precision: torch.dtype) -> torch.dtype:
    """float32 for single-precision statistics whose damped condition number is surely small, else float64."""
    if precision == torch.float64 or not shift > 0:
        return torch.float64
    bound = (largest_eigenvalue_bound + shift) / shift
    return torch.float32 if math.isfinite(bound) and bound <= SINGLE_PRECISION_CONDITION else torch.float64


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


def largest_eigenvalue_bound(sym: torch.Tensor) -> float:
    """An upper bound on the largest eigenvalue of each positive semi-definite matrix in ``sym`` (max over a
    batch): the smaller of its trace and its largest absolute row sum (Gershgorin), summed in float64."""
    return float(eigenvalue_bounds(sym).max())


def eigenvalue_bounds(sym: torch.Tensor) -> torch.Tensor:
    """The bound of :func:`largest_eigenvalue_bound` for each matrix of ``sym`` (``[...]``, float64)."""
    trace = sym.diagonal(dim1=-2, dim2=-1).sum(-1, dtype=torch.float64)
    rows = sym.abs().sum(-1, dtype=torch.float64).amax(-1)
    return torch.minimum(trace, rows)


def batched_cholesky_inverse(damped: torch.Tensor) -> Tuple[torch.Tensor, List[int]]:
    """``(inverses, failed)`` for a batch ``[n, d, d]`` of damped matrices: one batched Cholesky and one batched
    inverse; ``failed`` lists the positions whose Cholesky failed (numerically indefinite), whose entries in
    ``inverses`` mean nothing: the caller gives them its fallback."""
    chol, info = torch.linalg.cholesky_ex(damped)
    failed = [k for k, code in enumerate(info.tolist()) if code != 0]
    for k in failed:  # a zero pivot would stop cholesky_inverse
        chol[k] = torch.eye(chol.shape[-1], dtype=chol.dtype, device=chol.device)
    return torch.cholesky_inverse(chol), failed


@contextmanager
def inversion_threads(largest_dim: int) -> Iterator[None]:
    """Run the enclosed CPU factorizations on at most one intra-op thread per :data:`ROWS_PER_THREAD` rows of
    ``largest_dim`` (never more than the process already uses), and restore the count afterwards.

    A factorization of a few hundred rows gains nothing from more threads and can lose badly to waking
    them: on a 16-core machine beside a GPU, at torch's default of one thread per core, a 257-row float64
    Cholesky inverse took 95-96 ms against 0.7-1.3 on one thread (two runs), while from about 500 rows on
    more threads pay (513 rows: 2.9-3.7 ms on 8 threads, 6.4-6.9 on one;
    ``python scripts/inversion_threads.py --cuda``).  The count
    is the process's (``torch.set_num_threads``): other Python threads running torch CPU work at the same
    moment see it too.
    """
    current = torch.get_num_threads()
    wanted = max(1, min(current, round(largest_dim / ROWS_PER_THREAD)))
    if wanted == current:
        yield
        return
    torch.set_num_threads(wanted)
    try:
        yield
    finally:
        torch.set_num_threads(current)


def damped_inverse(matrix: torch.Tensor, shift: float, want_spectrum: bool = False,
                   precision: Optional[torch.dtype] = None) -> DampedInverse:
    """Invert ``matrix + shift I`` for a symmetric positive semi-definite ``matrix`` on the CPU.

    Cholesky is the fast path.  When the damped matrix is numerically indefinite
    (Cholesky fails) or the spectrum is wanted, an eigendecomposition in float64 is used
    instead; negative eigenvalues from round-off are clipped to zero before the
    shift, which is the nearest positive semi-definite matrix in Frobenius norm
    (Higham 1988).  A statistic that is symmetric only up to rounding is replaced
    by its symmetric part first (both factorizations would read one triangle only).
    ``precision`` is the statistics' own dtype (by default ``matrix``'s): the Cholesky path runs in
    float32 where :func:`inversion_dtype` allows, on single-precision statistics without any float64
    copy, and the inverse comes back in the precision it was computed in (float32 there, else float64).
    """
    matrix, precision = inversion_input(matrix, precision)
    if not want_spectrum:
        sym = torch.add(matrix, matrix.T).mul_(0.5)
        dtype = inversion_dtype(largest_eigenvalue_bound(sym), shift, precision)
        damped = sym if sym.dtype == dtype else sym.to(dtype)  # sym is this call's own tensor
        damped.diagonal().add_(shift)  # in place: no identity matrix is built
        chol, info = torch.linalg.cholesky_ex(damped)
        if int(info) == 0:
            return DampedInverse(torch.cholesky_inverse(chol), None, False)
    return _eigen_inverse(matrix, shift, want_spectrum)


def _eigen_inverse(matrix: torch.Tensor, shift: float, want_spectrum: bool) -> DampedInverse:
    """The damped inverse of the nearest positive semi-definite matrix, from an eigendecomposition in float64."""
    sym = matrix.to(torch.float64)
    sym = torch.add(sym, sym.T).mul_(0.5)
    eigenvalues, vectors = torch.linalg.eigh(sym)
    clipped = eigenvalues.clamp(min=0.0) + shift
    inverse = (vectors / clipped) @ vectors.T
    return DampedInverse(inverse, eigenvalues if want_spectrum else None, not want_spectrum)


# Factors batched together are at most this many rows (above it LAPACK's own work is the inversion and a
# batch saves nothing: 256-row factors took 0.96-1.00x the one-by-one time), and one batch holds at most
# this many entries (32 MB in float32), so that a model with many wide layers of one size never holds a
# second copy of all their factors at once.
BATCHED_MAX_ROWS = 256
BATCHED_MAX_ENTRIES = 8 * 2 ** 20


def damped_inverses(requests: Sequence[Tuple[torch.Tensor, float, Optional[torch.dtype]]]) -> List[DampedInverse]:
    """:func:`damped_inverse` (no spectrum) of every ``(matrix, shift, precision)`` in ``requests``, in order.

    Factors of one size (at most :data:`BATCHED_MAX_ROWS` rows; larger ones go alone) and statistics
    precision are symmetrized and bounded together, in batches of at most :data:`BATCHED_MAX_ENTRIES`
    entries, and those that then invert in the same dtype go through one batched Cholesky and one batched
    inverse: on factors of a few dozen rows the dozen calls around each factorization cost more than LAPACK
    itself (a small transformer's 28 factors of 32-65 rows: 1.8 against 2.7 ms on a 2-core AMD EPYC,
    ``python scripts/batched_inversion_time.py``).  Each factor gets the dtype, the inverse (up to rounding) and
    the fallback that :func:`damped_inverse` would give it alone; a factor whose Cholesky fails takes
    the eigendecomposition path alone, and the others of its batch are not affected.
    """
    prepared = []
    for matrix, shift, precision in requests:
        matrix, precision = inversion_input(matrix, precision)
        prepared.append((matrix, precision, float(shift)))
    groups: Dict[tuple, List[int]] = {}
    for index, (matrix, precision, _) in enumerate(prepared):
        alone = matrix.shape[-1] > BATCHED_MAX_ROWS
        key = (index,) if alone else (tuple(matrix.shape), matrix.dtype, precision, matrix.device)
        groups.setdefault(key, []).append(index)
    results: List[Optional[DampedInverse]] = [None] * len(prepared)
    for indices in groups.values():
        size = max(1, BATCHED_MAX_ENTRIES // prepared[indices[0]][0].numel())
        for start in range(0, len(indices), size):
            batch = indices[start:start + size]
            if len(batch) == 1:  # alone: no stacked copy
                matrix, precision, shift = prepared[batch[0]]
                results[batch[0]] = damped_inverse(matrix, shift, False, precision)
            else:
                _invert_group(prepared, batch, results)
    return results


def _invert_group(prepared: list, indices: List[int], results: list) -> None:
    """Fill ``results`` for ``indices``: factors of one shape, dtype and precision."""
    stack = torch.stack([prepared[i][0] for i in indices])
    sym = torch.add(stack, stack.mT).mul_(0.5)
    bounds = eigenvalue_bounds(sym).tolist()  # one host sync for the whole group
    precision = prepared[indices[0]][1]
    by_dtype: Dict[torch.dtype, List[int]] = {}
    for position, index in enumerate(indices):
        dtype = inversion_dtype(bounds[position], prepared[index][2], precision)
        by_dtype.setdefault(dtype, []).append(position)
    for dtype, positions in by_dtype.items():
        members = sym if len(positions) == len(indices) else sym[positions]
        damped = members if members.dtype == dtype else members.to(dtype)  # sym and its rows are this call's own
        shifts = torch.tensor([prepared[indices[p]][2] for p in positions], dtype=dtype, device=damped.device)
        damped.diagonal(dim1=-2, dim2=-1).add_(shifts.unsqueeze(-1))
        batch, failed = batched_cholesky_inverse(damped)
        # Each inverse is copied out of the batch: a view would keep (and save) the whole batch's storage.
        inverses = batch.unbind(0)
        for k, position in enumerate(positions):
            index = indices[position]
            if k in failed:
                matrix, _, shift = prepared[index]
                results[index] = _eigen_inverse(matrix, shift, False)
            else:
                results[index] = DampedInverse(inverses[k].clone(), None, False)


def inversion_input(matrix: torch.Tensor, precision: Optional[torch.dtype]):
    """``(matrix, precision)`` as an inversion takes them: a half-precision statistic in float32 (LAPACK has
    no half types, and its sums would round again); the statistics' precision, by default the matrix's."""
    precision = matrix.dtype if precision is None else precision
    if matrix.dtype not in (torch.float32, torch.float64):
        matrix = matrix.to(torch.float32)
    return matrix, precision


def to_cpu(tensor: torch.Tensor) -> torch.Tensor:
    """The tensor on the CPU in its own dtype (no copy when it is there already)."""
    return tensor.detach().to(device="cpu")


def to_cpu64(tensor: torch.Tensor) -> torch.Tensor:
    return tensor.detach().to(device="cpu", dtype=torch.float64)


# Up to this many entries, one product of the stacked pair beats three dot products (the fixed cost of
# each call dominates); above it the copy into the stack costs more than the calls it saves.
PAIR_PRODUCT_MAX_NUMEL = 8192


def pair_gram(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """The 2x2 Gram matrix ``[[<a, a>, <a, b>], [<b, a>, <b, b>]]`` of two tensors of one shape, in their dtype.

    A small pair is stacked and multiplied by its transpose, one product for all three sums (the
    fixed cost of three calls outweighs a small layer's arithmetic); a large one takes three dot products.
    """
    if a.numel() <= PAIR_PRODUCT_MAX_NUMEL:
        pair = torch.stack((a, b)).view(2, -1)
        return pair @ pair.T
    cross = flat_dot(a, b)
    return torch.stack((flat_dot(a, a), cross, cross, flat_dot(b, b))).view(2, 2)


def flat_dot(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """``sum(a * b)`` over all entries of two tensors of one shape, as a 0-d tensor of their dtype.

    No copy of either where both share a dense layout: contiguous, or a transposed contiguous 2-d
    view (an embedding's gradient matrix is the transpose of its weight's gradient); other layouts
    are copied once.  Accumulated in the tensors' precision, as ``torch.dot`` does.
    """
    if a.dim() == 2 and not (a.is_contiguous() and b.is_contiguous()) and a.T.is_contiguous() \
            and b.T.is_contiguous():
        a, b = a.T, b.T
    return torch.dot(a.reshape(-1), b.reshape(-1))
