"""The tuning protocol: the same budget for every optimizer, then medians over seeds.

For each task and optimizer:

1. run every learning rate of the optimizer's grid (same size for all) on the
   first seed;
2. pick the learning rate with the lowest final training loss (a diverged run
   counts as +inf);
3. run that learning rate on the remaining seeds;
4. summarize the runs at the chosen rate (first seed included) by medians.

Seeds, batch size, step budget, initial weights and data order are shared by
all optimizers (see :mod:`benchmarks.training`).
"""

from __future__ import annotations

import math
import statistics
from dataclasses import dataclass, field
from typing import Callable, Optional

import torch
from tqdm import tqdm

from benchmarks.optimizers import OptimizerSpec
from benchmarks.tasks import Task
from benchmarks.training import Attach, RunResult, train_run

CURVE_POINTS = 100  # evaluations of the full training loss per run (at most)

# attach_for(task, spec, lr, seed) -> Attach or None
AttachFactory = Callable[[Task, OptimizerSpec, float, int], Optional[Attach]]


@dataclass
class OptimizerOutcome:
    """The tuning runs of one optimizer on one task and the runs at its chosen lr."""

    spec: OptimizerSpec
    lr_grid: list[float]
    best_lr: float
    tuning_runs: list[RunResult]
    seed_runs: list[RunResult]  # runs at best_lr on the other seeds

    @property
    def selected_runs(self) -> list[RunResult]:
        """Runs at the chosen learning rate, one per seed, first seed first."""
        first = [run for run in self.tuning_runs if run.lr == self.best_lr][:1]
        return first + self.seed_runs


@dataclass
class TaskOutcome:
    task: Task
    steps: int
    eval_every: int
    outcomes: dict[str, OptimizerOutcome] = field(default_factory=dict)


WARMUP_STEPS = 3


def warm_up(task: Task) -> None:
    """A few untimed forward/backward passes so one-off costs (data loading, kernel set-up,
    allocator growth) are not charged to whichever optimizer happens to run first."""
    data = task.load_data()
    model, loss_fn = task.build_model(), task.make_loss()
    inputs, targets = data.train_x[:task.batch_size], data.train_y[:task.batch_size]
    for _ in range(WARMUP_STEPS):
        model.zero_grad()
        loss_fn(model(inputs), targets).backward()
    with torch.no_grad():
        loss_fn(model(data.train_x), data.train_y)


def eval_interval(steps: int) -> int:
    return max(1, steps // CURVE_POINTS)


def selection_key(run: RunResult) -> float:
    """Final training loss, with diverged or non-finite runs ranked last."""
    if run.final_train_loss is None or run.diverged:
        return math.inf
    return run.final_train_loss


def median_missing_last(values: list[Optional[float]]) -> Optional[float]:
    """Median where a missing value (never reached, diverged) counts as +inf; None if that is the median."""
    if not values:
        return None
    result = statistics.median([math.inf if value is None else value for value in values])
    return None if math.isinf(result) else result


def median_present(values: list[Optional[float]]) -> Optional[float]:
    """Median of the values that exist (None when none do)."""
    present = [value for value in values if value is not None]
    return statistics.median(present) if present else None


def per_step_split(runs: list[RunResult]) -> Optional[dict]:
    """Median over runs of each time-split part divided by that run's step count."""
    splits = [(run.time_split, run.steps_run) for run in runs if run.time_split and run.steps_run]
    if not splits:
        return None
    keys = [key for key in splits[0][0] if key != "train_seconds"]
    return {key: statistics.median(split[key] / steps for split, steps in splits) for key in keys}


def summarize(outcome: OptimizerOutcome) -> dict:
    """Medians over the selected runs of everything the report shows."""
    runs = outcome.selected_runs
    return {
        "optimizer": outcome.spec.name,
        "label": outcome.spec.label,
        "lr_grid": outcome.lr_grid,
        "best_lr": outcome.best_lr,
        "seeds": [run.seed for run in runs],
        "reached": sum(run.steps_to_target is not None for run in runs),
        "runs": len(runs),
        "steps_to_target": median_missing_last([run.steps_to_target for run in runs]),
        "seconds_to_target": median_missing_last([run.seconds_to_target for run in runs]),
        "final_train_loss": median_missing_last([run.final_train_loss for run in runs]),
        "final_test_metric": median_present([run.final_test_metric for run in runs]),
        "step_seconds_median": statistics.median(run.step_seconds_median for run in runs),
        "step_seconds_mean": statistics.median(run.step_seconds_mean for run in runs),
        "train_seconds": statistics.median(run.train_seconds for run in runs),
        "diverged": sum(run.diverged for run in runs),
        "time_split_per_step": per_step_split(runs),
        "optimizer_state_bytes": max(run.optimizer_state_bytes for run in runs),
        "process_peak_rss_bytes": max(run.process_peak_rss_bytes for run in runs),
        "rss_growth_bytes": median_present([run.rss_growth_bytes for run in runs]),
    }


class RunScheduler:
    """Runs one task's trainings, reporting each to a progress bar."""

    def __init__(self, task: Task, steps: int, bar: tqdm, attach_for: Optional[AttachFactory]):
        self.task, self.steps, self.bar, self.attach_for = task, steps, bar, attach_for
        self.done_steps = 0

    def run(self, spec: OptimizerSpec, lr: float, seed: int) -> RunResult:
        self.bar.set_postfix_str(f"{spec.name} lr={lr:.3g} seed={seed}")
        attach = self.attach_for(self.task, spec, lr, seed) if self.attach_for is not None else None
        result = train_run(self.task, spec, lr, seed, self.steps, eval_interval(self.steps),
                           on_step=self.bar.update, attach=attach)
        self.done_steps += self.steps  # a diverged run stops early: count its unused steps too
        self.bar.n = self.done_steps
        self.bar.refresh()
        return result


def benchmark_task(
    task: Task,
    specs: list[OptimizerSpec],
    seeds: list[int],
    grid_size: int,
    steps: int,
    progress: bool = True,
    attach_for: Optional[AttachFactory] = None,
) -> TaskOutcome:
    """The whole protocol on one task, with one progress bar over all its steps.

    The optimizers take turns run by run (first every optimizer's smallest lr,
    then the next lr, ...; then each repeat seed for every optimizer), so that a
    stretch of heavy load from other processes falls on all of them alike
    instead of on whichever happened to run then.
    """
    warm_up(task)
    grids = {spec.name: spec.lr_grid(grid_size) for spec in specs}
    total = len(specs) * (grid_size + len(seeds) - 1) * steps
    with tqdm(total=total, desc=task.name, unit="step", disable=not progress, leave=True,
              dynamic_ncols=True) as bar:
        scheduler = RunScheduler(task, steps, bar, attach_for)
        tuning: dict[str, list[RunResult]] = {spec.name: [] for spec in specs}
        for index in range(grid_size):
            for spec in specs:
                tuning[spec.name].append(scheduler.run(spec, grids[spec.name][index], seeds[0]))
        best = {name: min(runs, key=selection_key).lr for name, runs in tuning.items()}
        repeats: dict[str, list[RunResult]] = {spec.name: [] for spec in specs}
        for seed in seeds[1:]:
            for spec in specs:
                repeats[spec.name].append(scheduler.run(spec, best[spec.name], seed))
    result = TaskOutcome(task, steps, eval_interval(steps))
    for spec in specs:
        result.outcomes[spec.name] = OptimizerOutcome(
            spec, grids[spec.name], best[spec.name], tuning[spec.name], repeats[spec.name])
    return result
