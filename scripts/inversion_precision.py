"""Time a damped factor's Cholesky inverse in float64 and float32 (``ngopt/linalg.py``'s two paths).

For each dimension a random positive semi-definite factor plus a shift of a hundredth of its trace
(a condition number below 101, within :data:`ngopt.linalg.SINGLE_PRECISION_CONDITION`, so a
single-precision factor takes the float32 path) is inverted ``--repeats`` times by :func:`ngopt.linalg.damped_inverse` with
``precision`` float64 and float32, alternating; the medians and their ratio are printed::

    python scripts/inversion_precision.py --dims 65 257 513 1025 2049 --threads 2
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from ngopt.linalg import damped_inverse  # noqa: E402


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
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads")
    print("| d | float64 ms | float32 ms | float64 / float32 |")
    print("|---|---|---|---|")
    for dim in args.dims:
        rows = torch.randn(2 * dim, dim, generator=torch.Generator().manual_seed(dim), dtype=torch.float64)
        matrix = rows.T @ rows / rows.shape[0]
        shift = 0.01 * float(matrix.diagonal().sum())
        double = median_seconds(matrix, shift, torch.float64, args.repeats)
        single = median_seconds(matrix, shift, torch.float32, args.repeats)
        print(f"| {dim} | {1e3 * double:.2f} | {1e3 * single:.2f} | {double / single:.2f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
