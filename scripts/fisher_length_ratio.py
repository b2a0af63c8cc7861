"""How far the curvature blocks' model understates a step's length, task by task.

FisherDescent bounds each step's KL in its blocks' own model, ``sum_b p_b^T C_b p_b``, which drops
every product between layers and rests on statistics averaged over earlier batches.  With
``rule_interval=k`` the fixed step rule measures, every k steps, the proposal's squared length in the
exact damped Fisher of the whole model on a share of the recorded batch, divided by the blocks'
(``diagnostics()["update"]["fisher_length_ratio"]``).  This script trains each task at the defaults
(only the measurement switched on, no ceiling from it: ``max_exact_step_kl=None``, so the steps are
the defaults' own) and prints the spread of that ratio over the run.

    python scripts/fisher_length_ratio.py [--tasks built-in,held-out] [--steps 200] [--every 5] [--seed 0]
"""
from __future__ import annotations

import argparse
import statistics
import sys
import warnings
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the built-in tasks live beside ngopt/
import ngopt  # noqa: E402
from benchmarks.task_sets import resolve_tasks  # noqa: E402
from benchmarks.training import minibatches  # noqa: E402


def measured_ratios(task, steps: int, every: int, seed: int) -> list:
    """The exact / blocks' length ratio at every measurement of a run at the defaults."""
    data = task.load_data()
    torch.manual_seed(seed)
    model, loss_fn = task.build_model(), task.make_loss()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, seed=seed, rule_interval=every, max_exact_step_kl=None)
    batches = minibatches(len(data.train_x), task.batch_size, seed)
    ratios, checks = [], 0
    for _ in range(steps):
        rows = next(batches)
        opt.zero_grad()
        loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
        opt.step()
        measured = opt.rules.step.checks
        if measured > checks:  # a new measurement on this step
            checks = measured
            ratios.append(opt.diagnostics()["update"]["fisher_length_ratio"])
    return ratios


def summary_row(name: str, batch: int, ratios: list) -> str:
    if len(ratios) < 2:
        return f"| {name} | {batch} | {len(ratios)} | — | — | — | — |"
    deciles = statistics.quantiles(ratios, n=10)
    return (f"| {name} | {batch} | {len(ratios)} | {deciles[0]:.2f} | {statistics.median(ratios):.2f} "
            f"| {deciles[-1]:.2f} | {max(ratios):.2f} |")


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--tasks", default="built-in,held-out", help="task names or sets, comma-separated")
    parser.add_argument("--steps", type=int, default=200, help="steps per task (at most its quick budget)")
    parser.add_argument("--every", type=int, default=5, help="steps between measurements")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's)")
    args = parser.parse_args(argv)
    if args.steps < 1 or args.every < 1:
        parser.error("--steps and --every must be >= 1")
    if args.threads:
        torch.set_num_threads(args.threads)
    tasks = resolve_tasks(args.tasks.split(","))
    print("| task | batch | measurements | 10th percentile | median | 90th percentile | largest |")
    print("|---|---|---|---|---|---|---|")
    for task in tasks:
        ratios = measured_ratios(task, min(args.steps, task.quick_steps), args.every, args.seed)
        print(summary_row(task.name, task.batch_size, ratios), flush=True)


if __name__ == "__main__":
    main()
