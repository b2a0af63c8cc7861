"""Time a damped factor's CPU inversion against the intra-op thread count, per factor size.

For each dimension a random positive definite float64 factor is inverted by
:func:`ngopt.linalg.damped_inverse` (Cholesky and inverse) on each thread count in turn, the median of
several repeats printed per count, with the count :func:`ngopt.linalg.inversion_threads` picks for that
size marked ``*``; then the cost of changing the count and back.  ``--cuda`` first starts CUDA and runs a
kernel on it, as training beside a GPU does::

    python scripts/inversion_threads.py                      # this machine's thread counts 1, 2, 4, ... all
    python scripts/inversion_threads.py --cuda --dims 257 1025
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from ngopt.linalg import damped_inverse, inversion_threads  # noqa: E402


def factor(dim: int, seed: int = 0) -> torch.Tensor:
    rows = torch.randn(2 * dim, dim, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)
    return rows.T @ rows / (2 * dim)


def median_ms(matrix: torch.Tensor, threads: int, repeats: int) -> float:
    """Median milliseconds of one inversion on ``threads`` threads (the count restored afterwards)."""
    before = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        damped_inverse(matrix, 0.01)  # warm: the first call on a new count starts its threads
        times = []
        for _ in range(repeats):
            started = time.perf_counter()
            damped_inverse(matrix, 0.01)
            times.append(time.perf_counter() - started)
    finally:
        torch.set_num_threads(before)
    return 1e3 * statistics.median(times)


def picked_threads(dim: int) -> int:
    with inversion_threads(dim):
        return torch.get_num_threads()


def default_counts() -> list:
    full = torch.get_num_threads()
    return sorted({1, full} | {2 ** k for k in range(1, 8) if 2 ** k < full})


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--dims", type=int, nargs="+", default=[33, 65, 129, 257, 513, 1025, 2049, 4097])
    parser.add_argument("--threads", type=int, nargs="+", default=None,
                        help="thread counts to time (default 1, 2, 4, ... up to torch's count)")
    parser.add_argument("--budget", type=float, default=4e9,
                        help="repeats per size: about this many multiply-adds over d^3, 3 to 50 (default 4e9)")
    parser.add_argument("--cuda", action="store_true", help="start CUDA first, as training beside a GPU does")
    args = parser.parse_args(argv)
    if any(d < 1 for d in args.dims):
        parser.error("--dims: every size must be at least 1")
    counts = args.threads or default_counts()
    if any(n < 1 for n in counts):
        parser.error("--threads: every count must be at least 1")
    if args.cuda:
        if not torch.cuda.is_available():
            parser.error("--cuda: torch sees no CUDA device")
        torch.ones(1, device="cuda").sum().item()
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads by default; ms per inversion "
          f"(median), * the count ngopt picks")
    print("| d | " + " | ".join(f"{n} threads" for n in counts) + " |")
    print("|---|" + "---|" * len(counts))
    for dim in args.dims:
        matrix = factor(dim)
        repeats = max(3, min(50, int(args.budget / dim ** 3)))
        picked = picked_threads(dim)
        cells = [f"{median_ms(matrix, n, repeats):.3f}{'*' if n == picked else ''}" for n in counts]
        print(f"| {dim} | " + " | ".join(cells) + " |", flush=True)
    full, times = torch.get_num_threads(), []
    for _ in range(200):
        started = time.perf_counter()
        torch.set_num_threads(1)
        torch.set_num_threads(full)
        times.append(time.perf_counter() - started)
    print(f"changing the thread count to 1 and back: median {1e6 * statistics.median(times):.1f} us")
    return 0


if __name__ == "__main__":
    sys.exit(main())
