"""Step time of FisherDescent with small blocks packed (the default) and with every block on its own.

Packing (``ngopt/packing.py``) changes no result, only how many calls a step makes, so it has no
public switch; this script turns it off through the optimizer's private ``_packer``. Each variant
trains its own copy of a task's network (same initial weights, same random minibatches) in rounds
of 20 steps that take turns (``scripts/setting_step_time.py``), so the machine's drift falls alike
on both. It prints the mean step (every refresh, inversion and damping check included) and the
median step, with the ratios::

    python scripts/packed_step_time.py --tasks friedman1_deep_mlp,breast_cancer_mlp --threads 1
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import warnings

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))  # the scripts beside it
import ngopt  # noqa: E402
from benchmarks.held_out import HELD_OUT_TASKS  # noqa: E402
from benchmarks.tasks import TASKS  # noqa: E402
from setting_step_time import take_turns  # noqa: E402

WARM_UP = 5  # the first steps of each variant: allocations, the first inversions


def step_times(task_name: str, steps: int) -> dict:
    """``{variant: (mean ms, median ms, pack sizes)}`` for ``packed`` and ``per-block``."""
    task = {**TASKS, **HELD_OUT_TASKS}[task_name]
    data = task.load_data()
    runs = {}
    for variant in ("packed", "per-block"):
        torch.manual_seed(0)
        model, loss_fn = task.build_model(), task.make_loss()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            opt = ngopt.FisherDescent(model, loss_fn)
        if variant == "per-block":
            opt._packer = None
        runs[variant] = (model, loss_fn, opt, [])
    take_turns(task, data, runs, steps)
    result = {}
    for variant, (_, _, opt, times) in runs.items():
        packs = [len(p.blocks) for p in opt._packer._packs] if opt._packer is not None else []
        result[variant] = (1e3 * statistics.mean(times[WARM_UP:]), 1e3 * statistics.median(times[WARM_UP:]), packs)
    return result


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", default="friedman1_deep_mlp,breast_cancer_mlp,corpus_transformer,digits_resnet")
    parser.add_argument("--steps", type=int, default=200, help="steps per variant and task (default 200)")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    print(f"{args.steps} steps per variant, {args.threads} threads, load average {os.getloadavg()[0]:.1f}")
    for task_name in args.tasks.split(","):
        times = step_times(task_name, args.steps)
        (mean, median, packs), (mean_own, median_own, _) = times["packed"], times["per-block"]
        print(f"{task_name}: packs of {packs or 'none'} blocks; mean step {mean:.2f} ms packed, {mean_own:.2f} ms "
              f"per block ({mean / mean_own:.2f}); median {median:.2f} against {median_own:.2f} ms "
              f"({median / median_own:.2f})", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
