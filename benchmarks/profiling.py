"""Where FisherDescent's step time goes: one training run under cProfile (``--profile``)."""

from __future__ import annotations

import cProfile
import io
import pstats
from pathlib import Path
from typing import Optional

from benchmarks.optimizers import OptimizerSpec
from benchmarks.tasks import Task
from benchmarks.training import train_run

TOP_FUNCTIONS = 30


def profile_run(task: Task, spec: OptimizerSpec, lr: Optional[float], seed: int, steps: int) -> str:
    """cProfile text of one run: the functions with the most own time, then the most cumulative time.

    The profile covers evaluation too (cProfile cannot leave it out), but
    evaluation runs under no_grad in eval mode and is listed under its own name
    (``evaluate``), so it is easy to subtract.
    """
    profiler = cProfile.Profile()
    profiler.enable()
    run = train_run(task, spec, lr, seed, steps)
    profiler.disable()
    text = io.StringIO()
    stats = pstats.Stats(profiler, stream=text)
    text.write(f"# cProfile of {task.name}, {spec.name} lr={run.lr:.3g} seed={seed}, {steps} steps\n")
    text.write("\n## by own time (tottime)\n")
    stats.sort_stats("tottime").print_stats(TOP_FUNCTIONS)
    text.write("\n## by cumulative time\n")
    stats.sort_stats("cumulative").print_stats(TOP_FUNCTIONS)
    return text.getvalue()


def write_profile(task: Task, spec: OptimizerSpec, lr: Optional[float], seed: int, steps: int, directory: Path) -> Path:
    path = directory / f"profile_{task.name}_{spec.name}.txt"
    path.write_text(profile_run(task, spec, lr, seed, steps))
    return path
