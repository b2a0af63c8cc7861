"""Which Kronecker factors of a benchmark network the float32 inversion path takes (``ngopt/linalg.py``).

Trains a benchmark task's model with FisherDescent at its defaults (seed 0, the harness's batches) and,
at every inversion of every whole factor, computes the bound on its damped condition number that
decides the path, ``(bound on the largest eigenvalue + shift) / shift``, from the factor and the shift
the inversion used.  Prints, per factor: its rows, the inversions seen, the bound's median and largest
value, and the share of inversions at or below ``--limit`` (by default
:data:`ngopt.linalg.SINGLE_PRECISION_CONDITION`: those run in float32 when the statistics are single
precision)::

    python scripts/factor_conditions.py --task digits_cnn --steps 40
    python scripts/factor_conditions.py --task digits_cnn --steps 40 --limit 1000     # a lower limit's share
    python scripts/factor_conditions.py --task mnist1d_mlp --steps 60 --threads 1
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
from typing import Dict, List, Tuple

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
import ngopt  # noqa: E402
from benchmarks.task_sets import ALL_TASKS  # noqa: E402
from benchmarks.training import minibatches  # noqa: E402
from ngopt.linalg import SINGLE_PRECISION_CONDITION, largest_eigenvalue_bound  # noqa: E402

SIDES = (("in", "factor_in", "in_damping"), ("out", "factor_out", "out_damping"))


def inversion_bounds(task, steps: int, seed: int = 0) -> Dict[Tuple[str, str, int], List[float]]:
    """``{(layer, "in" / "out", rows): [the condition bound at each inversion]}`` over ``steps`` steps."""
    data = task.load_data()
    torch.manual_seed(seed)
    model, loss_fn = task.build_model(), task.make_loss()
    opt = ngopt.FisherDescent(model, loss_fn, seed=seed)
    batches = minibatches(len(data.train_x), task.batch_size, seed)
    bounds: Dict[Tuple[str, str, int], List[float]] = {}
    for _ in range(steps):
        rows = next(batches)
        opt.zero_grad()
        loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
        opt.step()
        for name, block in opt.blocks.items():
            if block.info.get("inversion_step") != opt.steps_taken - 1:
                continue
            for side, factor_key, shift_key in SIDES:
                factor, shift = block.state.get(factor_key), block.info.get(shift_key)
                if factor is None or factor.dim() != 2 or factor.shape[0] != factor.shape[1] or not shift:
                    continue  # a diagonal or block-diagonal form, or an EKFAC block (no shift at inversion)
                sym = 0.5 * (factor + factor.T)  # as the inversion reads it
                bound = (largest_eigenvalue_bound(sym) + shift) / shift
                bounds.setdefault((name, side, factor.shape[0]), []).append(bound)
    return bounds


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--task", required=True, choices=sorted(ALL_TASKS))
    parser.add_argument("--steps", type=int, default=40)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--limit", type=float, default=SINGLE_PRECISION_CONDITION,
                        help="the bound whose share is reported (default: the float32 path's)")
    args = parser.parse_args(argv)
    if args.steps < 1:
        parser.error(f"--steps must be at least 1, got {args.steps}")
    if args.threads:
        torch.set_num_threads(args.threads)
    bounds = inversion_bounds(ALL_TASKS[args.task], args.steps)
    print(f"{args.task}, {args.steps} steps at the defaults; the float32 path takes a bound of at most "
          f"{SINGLE_PRECISION_CONDITION:g}")
    print(f"| layer | factor | rows | inversions | median bound | largest bound | share at most {args.limit:g} |")
    print("|---|---|---|---|---|---|---|")
    for (name, side, rows), values in bounds.items():
        share = sum(value <= args.limit for value in values) / len(values)
        print(f"| {name} | {side} | {rows} | {len(values)} | {statistics.median(values):.3g} | "
              f"{max(values):.3g} | {share:.0%} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
