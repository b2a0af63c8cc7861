"""How much the benchmark's step-time ratios move when runs go one after the other, and when they take turns.

On a shared machine the same training step can run half again as long from one spell of seconds to the
next. Each round here trains the same runs twice: one after the other (as the harness once did), then in
turns of ``--turn`` steps (as the harness does, ``benchmarks/harness.py``), and prints each optimizer's median
step time and its ratio to the first optimizer's; the summary gives the range of each ratio over the
rounds, per way of running. A narrow range is what makes a single benchmark's ratios trustworthy::

    python scripts/turn_taking.py --task corpus_transformer --optimizers fisher-descent,sgd:0.0949,adam:0.01 \\
        --rounds 6
"""
from __future__ import annotations

import argparse
import os
import sys
import warnings

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from benchmarks.harness import TURN_STEPS  # noqa: E402
from benchmarks.optimizers import OPTIMIZERS  # noqa: E402
from benchmarks.task_sets import ALL_TASKS  # noqa: E402
from benchmarks.training import TrainingRun, train_run, train_runs_in_turns  # noqa: E402


def parse_optimizers(text: str) -> list[tuple[str, float | None]]:
    """``"fisher-descent,sgd:0.1"`` -> ``[("fisher-descent", None), ("sgd", 0.1)]`` (None: the default lr)."""
    jobs = []
    for item in text.split(","):
        name, _, lr = item.partition(":")
        if name not in OPTIMIZERS:
            raise SystemExit(f"unknown optimizer {name!r}; known: {', '.join(OPTIMIZERS)}")
        jobs.append((name, float(lr) if lr else None))
    return jobs


def median_step_ms(task, jobs, steps: int, turn: int | None) -> list[float]:
    """Each job's median step in ms, the runs one after the other (``turn`` None) or in turns."""
    if turn is None:
        results = [train_run(task, OPTIMIZERS[name], lr, 0, steps) for name, lr in jobs]
    else:
        results = train_runs_in_turns([TrainingRun(task, OPTIMIZERS[name], lr, 0, steps) for name, lr in jobs], turn)
    return [1e3 * result.step_seconds_median for result in results]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--task", default="corpus_transformer")
    parser.add_argument("--optimizers", default="fisher-descent,sgd:0.0949,adam:0.01",
                        help="NAME[:LR],... (the first is the reference of the ratios; no lr: its default)")
    parser.add_argument("--rounds", type=int, default=6)
    parser.add_argument("--steps", type=int, default=150, help="steps per run (default 150)")
    parser.add_argument("--turn", type=int, default=TURN_STEPS,
                        help=f"steps per turn (default {TURN_STEPS}, the harness's)")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args(argv)
    for name in ("rounds", "steps", "turn", "threads"):
        if getattr(args, name) < 1:
            parser.error(f"--{name} must be at least 1, got {getattr(args, name)}")
    torch.set_num_threads(args.threads)
    task = ALL_TASKS[args.task]
    jobs = parse_optimizers(args.optimizers)
    names = [name for name, _ in jobs]
    ratios = {way: {name: [] for name in names[1:]} for way in ("one after the other", "in turns")}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for index in range(args.rounds):
            for way, turn in (("one after the other", None), ("in turns", args.turn)):
                times = median_step_ms(task, jobs, args.steps, turn)
                for name, value in zip(names[1:], times[1:]):
                    ratios[way][name].append(times[0] / value)
                steps = ", ".join(f"{name} {value:.2f} ms" for name, value in zip(names, times))
                print(f"round {index + 1}, {way}: median step {steps}", flush=True)
    for way, by_name in ratios.items():
        spans = "; ".join(f"{names[0]}/{name} {min(values):.2f}-{max(values):.2f}" for name, values in by_name.items())
        print(f"{way}: {spans}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
