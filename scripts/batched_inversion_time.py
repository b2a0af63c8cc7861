"""The inversion phase of a benchmark network: every block on its own against equal sizes batched together.

Trains each task's model with FisherDescent at its defaults (seed 0, the harness's batches) for
``--steps`` steps, takes the inversion jobs of that moment (every block, its running statistics and
damping) and times, in turns, two ways of inverting them all: each block's ``prepare_inverse`` in turn,
and :func:`ngopt.step_pipeline.invert_blocks`, which the optimizer uses in one process (the factors of
blocks that split their work, inverted by one :func:`ngopt.linalg.damped_inverses` call, factors of one
size and inversion dtype batched together).  Prints, per task: the whole factors and their distinct sizes,
the median time of each way over ``--repeats`` (the fitted thread count applied to both, as in a step),
their ratio, and the largest difference between the two ways' inverses relative to the largest entry::

    python scripts/batched_inversion_time.py
    python scripts/batched_inversion_time.py --tasks corpus_transformer,digits_resnet --threads 1 --repeats 50
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
import ngopt  # noqa: E402
from benchmarks.task_sets import resolve_tasks  # noqa: E402
from benchmarks.training import minibatches  # noqa: E402
from ngopt.linalg import inversion_threads  # noqa: E402
from ngopt.step_pipeline import invert_blocks  # noqa: E402


def inversion_jobs(task, steps: int, seed: int = 0) -> list:
    """``[(block, statistics, damping)]`` for every block with statistics after ``steps`` steps."""
    data = task.load_data()
    torch.manual_seed(seed)
    model, loss_fn = task.build_model(), task.make_loss()
    opt = ngopt.FisherDescent(model, loss_fn, seed=seed)
    batches = minibatches(len(data.train_x), task.batch_size, seed)
    for _ in range(steps):
        rows = next(batches)
        opt.zero_grad()
        loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
        opt.step()
    damping = opt.param_groups[0]["damping"]
    return [(block, {key: block.state[key] for key in block.statistic_keys}, damping)
            for block in opt.blocks.values() if block.has_statistics]


def one_by_one(jobs: list) -> dict:
    return {block: block.prepare_inverse(stats, damping, False) for block, stats, damping in jobs}


def largest_difference(first: dict, second: dict) -> float:
    """The largest entry of ``|a - b|`` over every inverse tensor, relative to that tensor's largest entry."""
    worst = 0.0
    for block, (tensors, _) in first.items():
        for key, value in tensors.items():
            other = second[block][0][key].double()
            scale = float(value.double().abs().max()) or 1.0
            worst = max(worst, float((value.double() - other).abs().max()) / scale)
    return worst


def timings(jobs: list, repeats: int) -> tuple:
    """Median seconds of each way, taken in turns, and their largest difference."""
    largest = max((t.shape[-1] for _, stats, _ in jobs for t in stats.values() if torch.is_tensor(t) and t.dim() > 1),
                  default=1)
    alone, batched = [], []
    with inversion_threads(largest):
        difference = largest_difference(one_by_one(jobs), invert_blocks(jobs))
        for _ in range(repeats):
            for way, times in ((one_by_one, alone), (invert_blocks, batched)):
                start = time.perf_counter()
                way(jobs)
                times.append(time.perf_counter() - start)
    return statistics.median(alone), statistics.median(batched), difference


def whole_factor_sizes(jobs: list) -> list:
    return [t.shape[0] for _, stats, _ in jobs for t in stats.values()
            if torch.is_tensor(t) and t.dim() == 2 and t.shape[0] == t.shape[1]]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tasks", default="built-in",
                        help="comma-separated task names or sets (built-in, held-out; default: built-in)")
    parser.add_argument("--steps", type=int, default=20, help="training steps before the jobs are taken")
    parser.add_argument("--repeats", type=int, default=30)
    parser.add_argument("--threads", type=int, default=None)
    args = parser.parse_args(argv)
    try:
        tasks = resolve_tasks([name for name in args.tasks.split(",") if name])
    except ValueError as error:
        parser.error(f"--tasks: {error}")
    if args.steps < 1 or args.repeats < 1:
        parser.error(f"--steps and --repeats must be at least 1, got {args.steps} and {args.repeats}")
    if args.threads:
        torch.set_num_threads(args.threads)
    print(f"{torch.get_num_threads()} torch threads, {args.repeats} repeats in turns, jobs after {args.steps} steps")
    print("| task | blocks | whole factors (distinct sizes) | one by one, ms | batched, ms | batched / one by one "
          "| largest relative difference |")
    print("|---|---|---|---|---|---|---|")
    for task in tasks:
        jobs = inversion_jobs(task, args.steps)
        sizes = whole_factor_sizes(jobs)
        alone, batched, difference = timings(jobs, args.repeats)
        print(f"| {task.name} | {len(jobs)} | {len(sizes)} ({len(set(sizes))}) | {alone * 1e3:.2f} | "
              f"{batched * 1e3:.2f} | {batched / alone:.2f} | {difference:.1e} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
