"""Mean step time of FisherDescent under several settings, side by side on the benchmark's networks
(built-in and held-out tasks).

Each setting trains its own copy of a task's network (same initial weights, same random minibatches)
in rounds of 20 steps that take turns, so the machine's drift falls alike on all; the mean step
includes every refresh, inversion and damping check (the harness's step time is a median, which
leaves them out). The first setting is the reference of the ratios::

    python scripts/setting_step_time.py --tasks digits_autoencoder,digits_mlp --threads 1 \\
        --setting old="stats_interval=10 inverse_interval=20 stats_memory=0.9" --setting defaults=""
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
import warnings

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
import ngopt  # noqa: E402
from benchmarks.cli import parse_options  # noqa: E402
from benchmarks.held_out import HELD_OUT_TASKS  # noqa: E402
from benchmarks.tasks import TASKS  # noqa: E402

ROUND = 20


def mean_step_ms(task_name: str, settings: dict, steps: int) -> dict:
    makers = {name: (lambda model, loss_fn, options=options: ngopt.FisherDescent(model, loss_fn, **options))
              for name, options in settings.items()}
    return side_by_side(task_name, makers, steps)[0]


def side_by_side(task_name: str, makers: dict, steps: int) -> tuple:
    """``({name: mean step in ms}, {name: trained model})`` for ``makers = {name: make(model, loss_fn) ->
    optimizer}``, each on its own copy of the task's network (same initial weights) in turns."""
    task = {**TASKS, **HELD_OUT_TASKS}[task_name]
    data = task.load_data()
    runs = {}
    for name, make in makers.items():
        torch.manual_seed(0)
        model, loss_fn = task.build_model(), task.make_loss()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            runs[name] = (model, loss_fn, make(model, loss_fn), [])
    take_turns(task, data, runs, steps)
    means = {name: 1e3 * statistics.mean(run[3][5:]) for name, run in runs.items()}  # first steps: warm-up
    return means, {name: run[0] for name, run in runs.items()}


def take_turns(task, data, runs: dict, steps: int) -> None:
    """Train every ``(model, loss_fn, optimizer, times)`` of ``runs`` on the same random minibatches, in
    rounds of :data:`ROUND` steps that take turns; each step's seconds are appended to its ``times``."""
    generators = {name: torch.Generator().manual_seed(0) for name in runs}  # one each: the same minibatches
    for _ in range(max(1, steps // ROUND)):
        for name, (model, loss_fn, opt, times) in runs.items():
            for _ in range(ROUND):
                rows = torch.randint(0, len(data.train_x), (task.batch_size,), generator=generators[name])
                started = time.perf_counter()
                opt.zero_grad()
                loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
                opt.step()
                times.append(time.perf_counter() - started)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", default="digits_autoencoder,digits_mlp,mnist1d_mlp,digits_cnn")
    parser.add_argument("--setting", action="append", required=True,
                        help='NAME="KEY=VALUE KEY=VALUE" (repeatable; "" for the defaults)')
    parser.add_argument("--steps", type=int, default=100, help="steps per setting and task (default 100)")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    settings = {}
    for item in args.setting:
        name, _, options = item.partition("=")
        settings[name] = parse_options(options.split())
    print(f"{args.steps} steps per setting, {args.threads} threads, load average {os.getloadavg()[0]:.1f}")
    for task_name in args.tasks.split(","):
        means = mean_step_ms(task_name, settings, args.steps)
        first = next(iter(means.values()))
        print(task_name + ": " + " | ".join(f"{name} {ms:.2f} ms ({ms / first:.2f})" for name, ms in means.items()),
              flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
