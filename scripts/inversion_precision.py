"""Time a damped factor's Cholesky inverse in float64 and float32 (``ngopt/linalg.py``'s two paths),
and measure the float32 inverse's error.

For each dimension a random positive semi-definite factor (a Gram matrix of ``2 d`` Gaussian rows, or
with ``--rank-deficient`` of ``d / 4`` rows with decaying column scales and a common mean, as uncentred
activations give: one large eigenvalue and many zero ones) gets the shift that makes the bound on its
damped condition number, ``(bound on the largest eigenvalue + shift) / shift``, equal ``--condition``
(default 101; within :data:`ngopt.linalg.SINGLE_PRECISION_CONDITION`, so a single-precision factor
takes the float32 path).  It is inverted ``--repeats`` times by :func:`ngopt.linalg.damped_inverse`
with ``precision`` float64 and float32, alternating; the medians, their ratio, and the float32
inverse's relative error against the float64 one (Frobenius norm) are printed::

    python scripts/inversion_precision.py --dims 65 257 513 1025 2049 --threads 2
    python scripts/inversion_precision.py --dims 129 513 2049 --condition 10000 --rank-deficient
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from ngopt.linalg import damped_inverse, largest_eigenvalue_bound  # noqa: E402


def median_seconds(matrix, shift, precision, repeats):
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        damped_inverse(matrix, shift, precision=precision)
        times.append(time.perf_counter() - started)
    return statistics.median(times)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dims", type=int, nargs="+", default=[65, 257, 513, 1025, 2049])
    parser.add_argument("--repeats", type=int, default=9)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--condition", type=float, default=101.0,
                        help="the bound on the damped condition number that sets the shift (> 1)")
    parser.add_argument("--rank-deficient", action="store_true",
                        help="d / 4 rows with decaying column scales and a common mean, instead of 2 d Gaussian rows")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads")
    if not args.condition > 1.0:
        parser.error(f"--condition must be above 1, got {args.condition}")
    print(f"condition bound {args.condition:g}, {'rank-deficient' if args.rank_deficient else 'full-rank'} factors")
    print("| d | float64 ms | float32 ms | float64 / float32 | float32 inverse's relative error |")
    print("|---|---|---|---|---|")
    for dim in args.dims:
        matrix = example_factor(dim, args.rank_deficient)
        # Just inside the bound: the float32 copy's own bound may round a little above the float64 one's.
        shift = largest_eigenvalue_bound(matrix) / (args.condition - 1.0) * (1.0 + 1e-5)
        double = median_seconds(matrix, shift, torch.float64, args.repeats)
        single = median_seconds(matrix, shift, torch.float32, args.repeats)
        exact = damped_inverse(matrix, shift, precision=torch.float64).inverse
        fast = damped_inverse(matrix.to(torch.float32), shift).inverse
        if fast.dtype != torch.float32:
            raise SystemExit(f"d = {dim}: the float32 factor was inverted in {fast.dtype} at this condition bound")
        error = float(torch.linalg.matrix_norm(fast.double() - exact) / torch.linalg.matrix_norm(exact))
        print(f"| {dim} | {1e3 * double:.2f} | {1e3 * single:.2f} | {double / single:.2f} | {error:.1e} |")
    return 0


def example_factor(dim: int, rank_deficient: bool) -> torch.Tensor:
    generator = torch.Generator().manual_seed(dim)
    if not rank_deficient:
        rows = torch.randn(2 * dim, dim, generator=generator, dtype=torch.float64)
    else:
        scales = torch.arange(1, dim + 1, dtype=torch.float64) ** -0.5
        rows = torch.randn(max(1, dim // 4), dim, generator=generator, dtype=torch.float64) * scales
        rows[:, : dim // 4] += 3.0
    return rows.T @ rows / rows.shape[0]


if __name__ == "__main__":
    sys.exit(main())
