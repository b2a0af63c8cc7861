"""The tuning protocol: the same budget for every optimizer, then medians over seeds.

For each task and optimizer:

1. run every learning rate of the optimizer's grid (same size for all tuned
   optimizers) on the first seed; an untuned row (FisherDescent at its defaults) has
   a single point, the optimizer's own default;
2. pick the learning rate with the lowest final training loss (a diverged run
   counts as +inf);
3. run that learning rate on the remaining seeds;
4. summarize the runs at the chosen rate (first seed included) by medians.

Seeds, batch size, step budget, initial weights and data order are shared by
all optimizers (see :mod:`benchmarks.training`). The runs of step 1 take turns,
:data:`TURN_STEPS` steps each, and so do those of step 3: on a shared machine
the same step can take half again as long from one spell of seconds to the next,
and runs one after the other would each land in a spell of their own, while
runs that take turns share them: over 8 rounds of the same three runs on the
language model (``python scripts/turn_taking.py``, a 2-core AMD EPYC),
fisher-descent's median step came to 1.04-1.64x Adam's and 0.96-1.73x SGD's
one after the other, 1.14-1.45x and 1.21-1.59x in turns. After every finished run the harness
hands the task's outcome so far to a callback, so that an interrupted benchmark
can still write what it measured: the runs of a group finish together.
"""

from __future__ import annotations

import dataclasses
import gc
import math
import statistics
import sys
from dataclasses import dataclass, field
from typing import Callable, Optional

from tqdm import tqdm

from benchmarks.evaluation import EvaluationSchedule, fastest_forward_chunk
from benchmarks.machine import memory_bytes
from benchmarks.optimizers import OptimizerSpec
from benchmarks.tasks import Task
from benchmarks.training import Attach, RunResult, TrainingRun, current_rss_bytes, train_runs_in_turns

# attach_for(task, spec, lr, seed) -> Attach or None
AttachFactory = Callable[[Task, OptimizerSpec, Optional[float], int], Optional[Attach]]


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
    schedule: EvaluationSchedule
    outcomes: dict[str, OptimizerOutcome] = field(default_factory=dict)
    finished_runs: int = 0
    planned_runs: int = 0
    last_run: Optional[RunResult] = None  # the run that finished last
    # Resident memory after each finished group of runs in turns (models and optimizers deleted, gc run)
    # less before it, summed over the groups; None where it could not be read.
    rss_growth_bytes: Optional[int] = None

    @property
    def complete(self) -> bool:
        return self.finished_runs == self.planned_runs


WARMUP_STEPS = 3
# Steps each run trains before the next one's turn: far shorter than the seconds-long spells in which
# a shared machine runs slow (20 steps take 15 ms to 0.3 s on the built-in tasks), and long enough that
# the first step of a turn, which finds the caches holding the other runs' models, costs little: on the
# digits MLP, 17 runs in turns of 21 steps, that step took 0.8 ms more than the others for
# fisher-descent (1.8% of its mean step) and 0.05-0.1 ms more for SGD (0.4-0.8%).
TURN_STEPS = 20
# A group of runs in turns holds every run's model, gradients and optimizer state at once.  A run is
# reckoned at this many times its model's parameter bytes (weights, gradients, and optimizer state up
# to fisher-descent's momentum, factors and inverses, which its cost budget keeps within the layers'
# sizes), and a group may fill this share of the machine's memory; larger groups are split, in order.
BYTES_PER_PARAMETER_BYTE = 8
GROUP_MEMORY_SHARE = 0.25


def runs_that_fit(task: Task) -> Optional[int]:
    """How many of ``task``'s runs one group in turns may hold (None: no limit known)."""
    memory = memory_bytes()
    if memory is None:
        return None
    model = task.build_model()
    per_run = BYTES_PER_PARAMETER_BYTE * sum(p.numel() * p.element_size() for p in model.parameters())
    return max(1, int(GROUP_MEMORY_SHARE * memory // max(per_run, 1)))


def warm_up(task: Task) -> Optional[int]:
    """A few untimed forward/backward passes so one-off costs (data loading, kernel set-up,
    allocator growth) are not charged to whichever optimizer happens to run first; returns the
    task's evaluation forward chunk (:func:`benchmarks.evaluation.fastest_forward_chunk`)."""
    data = task.load_data()
    model, loss_fn = task.build_model(), task.make_loss()
    inputs, targets = data.train_x[:task.batch_size], data.train_y[:task.batch_size]
    for _ in range(WARMUP_STEPS):
        model.zero_grad()
        loss_fn(model(inputs), targets).backward()
    return fastest_forward_chunk(model, loss_fn, data.train_x, data.train_y)


def set_aside_live_objects() -> None:
    """Collect garbage once, then exempt every live object from later collections (gc.freeze).

    Each run ends with a garbage collection so that its memory figures see only
    what outlives the run; with the libraries, data and earlier results set
    aside, that collection scans just the objects the run made (milliseconds,
    instead of a tenth of a second or more for a full scan). ``main`` undoes it
    at the end (gc.unfreeze).
    """
    gc.collect()
    gc.freeze()


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


def curvature_free_seconds(run: RunResult) -> Optional[float]:
    """The run's seconds to target less what its curvature work took of them (None: no target, no timers)."""
    if run.seconds_to_target is None or run.curvature_seconds_to_target is None:
        return None
    return run.seconds_to_target - run.curvature_seconds_to_target


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
        "lr_tuned": outcome.spec.tuned,
        "lr_grid": outcome.lr_grid,
        "best_lr": outcome.best_lr,
        "seeds": [run.seed for run in runs],
        "reached": sum(run.steps_to_target is not None for run in runs),
        "runs": len(runs),
        "steps_to_target": median_missing_last([run.steps_to_target for run in runs]),
        "seconds_to_target": median_missing_last([run.seconds_to_target for run in runs]),
        # With the optimizer's curvature work free (training.CURVATURE_PARTS); None for the baselines.
        "curvature_free_seconds_to_target": median_missing_last([curvature_free_seconds(run) for run in runs]),
        # Of its seconds to target, what its preconditioning products took; None for the baselines.
        "precondition_seconds_to_target": median_present([run.precondition_seconds_to_target for run in runs]),
        "target_resolution_max": max((run.target_resolution for run in runs
                                      if run.target_resolution is not None), default=None),
        "final_train_loss": median_missing_last([run.final_train_loss for run in runs]),
        "final_test_metric": median_present([run.final_test_metric for run in runs]),
        "step_seconds_median": statistics.median(run.step_seconds_median for run in runs),
        "step_seconds_mean": statistics.median(run.step_seconds_mean for run in runs),
        "train_seconds": statistics.median(run.train_seconds for run in runs),
        "diverged": sum(run.diverged for run in runs),
        "time_split_per_step": per_step_split(runs),
        "parameter_coverage": runs[0].parameter_coverage,
        "optimizer_state_bytes": max(run.optimizer_state_bytes for run in runs),
        "process_peak_rss_bytes": max(run.process_peak_rss_bytes for run in runs),
        "rss_growth_bytes": median_present([run.rss_growth_bytes for run in runs]),
    }


def planned_runs(specs: list[OptimizerSpec], grid_size: int, seeds: list[int]) -> int:
    """Runs of the protocol on one task: each grid on the first seed, the chosen lr on the others."""
    return sum(len(spec.lr_grid(grid_size)) + len(seeds) - 1 for spec in specs)


def run_line(task: Task, run: RunResult, index: int, total: int) -> str:
    """One plain line per finished run, for logs where a progress bar would be noise."""
    reached = (f"target at step {run.steps_to_target} ({run.seconds_to_target:.3g} s)"
               if run.steps_to_target is not None else "target not reached")
    final = "diverged" if run.diverged else f"final loss {run.final_train_loss:.4g}"
    return (f"{task.name} run {index}/{total}: {run.optimizer} lr={run.lr:.3g} seed={run.seed}, "
            f"{run.steps_run} steps in {run.train_seconds:.3g} s, {reached}, {final}")


class RunScheduler:
    """Runs one task's trainings in groups that take turns: a progress bar per group on a terminal, a plain
    line per finished run elsewhere."""

    def __init__(self, task: Task, steps: int, schedule: EvaluationSchedule, total: int,
                 progress: bool, attach_for: Optional[AttachFactory]):
        self.task, self.steps, self.schedule, self.total = task, steps, schedule, total
        self.progress, self.attach_for = progress, attach_for
        self.done = 0
        self.last: Optional[RunResult] = None
        self.rss_growth: Optional[int] = None  # see TaskOutcome.rss_growth_bytes
        self.group_limit = runs_that_fit(task)

    def run_in_turns(self, jobs: list[tuple[OptimizerSpec, Optional[float], int]],
                     on_result: Callable[[tuple, RunResult], None]) -> None:
        """Train every ``(spec, lr, seed)`` of ``jobs`` in turns of :data:`TURN_STEPS` steps, in groups of
        at most ``group_limit`` runs; each result goes to ``on_result(job, result)`` in the order of ``jobs``."""
        if not jobs:
            return
        size = len(jobs) if self.group_limit is None else max(1, self.group_limit)
        for start in range(0, len(jobs), size):
            self._run_group(jobs[start:start + size], on_result)

    def _run_group(self, jobs, on_result) -> None:
        first, last = self.done + 1, self.done + len(jobs)
        description = f"{self.task.name} runs {first}-{last}/{self.total} in turns"
        # disable=None: tqdm draws only on a terminal, so a redirected log gets no refresh lines
        before = current_rss_bytes()
        with tqdm(total=self.steps * len(jobs), desc=description, unit="step", leave=False, dynamic_ncols=True,
                  disable=None if self.progress else True, mininterval=0.5) as bar:
            runs = [self._start(spec, lr, seed, bar.update) for spec, lr, seed in jobs]
            results = train_runs_in_turns(runs, TURN_STEPS)
        del runs
        gc.collect()
        after = current_rss_bytes()
        if before is not None and after is not None:
            self.rss_growth = (self.rss_growth or 0) + after - before
        for job, result in zip(jobs, results):
            self.done += 1
            self.last = result
            if self.progress and not _stderr_is_terminal():
                print(run_line(self.task, result, self.done, self.total), file=sys.stderr, flush=True)
            on_result(job, result)

    def _start(self, spec: OptimizerSpec, lr: Optional[float], seed: int, on_step) -> TrainingRun:
        attach = self.attach_for(self.task, spec, lr, seed) if self.attach_for is not None else None
        return TrainingRun(self.task, spec, lr, seed, self.steps, self.schedule, on_step=on_step, attach=attach)


def _stderr_is_terminal() -> bool:
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):
        return False


def outcome_so_far(task: Task, steps: int, schedule: EvaluationSchedule, specs: list[OptimizerSpec],
                   grids: dict, tuning: dict, repeats: dict, scheduler: RunScheduler) -> TaskOutcome:
    """The task's outcome from the runs finished so far (every optimizer with at least one run)."""
    result = TaskOutcome(task, steps, schedule, finished_runs=scheduler.done, planned_runs=scheduler.total,
                         last_run=scheduler.last, rss_growth_bytes=scheduler.rss_growth)
    for spec in specs:
        runs = tuning[spec.name]
        if not runs:
            continue
        best = min(runs, key=selection_key).lr
        result.outcomes[spec.name] = OptimizerOutcome(
            spec, [run.lr for run in runs] if not spec.tuned else grids[spec.name], best, runs,
            repeats[spec.name])
    return result


def benchmark_task(
    task: Task,
    specs: list[OptimizerSpec],
    seeds: list[int],
    grid_size: int,
    steps: int,
    progress: bool = True,
    attach_for: Optional[AttachFactory] = None,
    on_run: Optional[Callable[[TaskOutcome], None]] = None,
) -> TaskOutcome:
    """The whole protocol on one task; ``on_run`` gets the outcome so far after every finished run.

    Every lr of every grid trains in turns with the others, then every repeat seed of every
    optimizer, :data:`TURN_STEPS` steps at a time, so that a stretch of heavy load from other
    processes, or a slow spell of the machine, falls on all of them alike instead of on whichever
    happened to run then.
    """
    chunk = warm_up(task)
    set_aside_live_objects()
    schedule = dataclasses.replace(EvaluationSchedule.for_steps(steps), forward_chunk=chunk)
    grids = {spec.name: spec.lr_grid(grid_size) for spec in specs}
    total = planned_runs(specs, grid_size, seeds)
    scheduler = RunScheduler(task, steps, schedule, total, progress, attach_for)
    tuning: dict[str, list[RunResult]] = {spec.name: [] for spec in specs}
    repeats: dict[str, list[RunResult]] = {spec.name: [] for spec in specs}

    def finished() -> TaskOutcome:
        outcome = outcome_so_far(task, steps, schedule, specs, grids, tuning, repeats, scheduler)
        if on_run is not None:
            on_run(outcome)
        return outcome

    def keep(into: dict):
        def on_result(job, result: RunResult) -> None:
            into[job[0].name].append(result)
            finished()
        return on_result

    scheduler.run_in_turns([(spec, grids[spec.name][index], seeds[0]) for index in range(grid_size) for spec in specs
                            if index < len(grids[spec.name])], keep(tuning))
    # an untuned row repeats as it was built: without an lr, at the optimizer's default
    best = {spec.name: min(tuning[spec.name], key=selection_key).lr if spec.tuned else None for spec in specs}
    scheduler.run_in_turns([(spec, best[spec.name], seed) for seed in seeds[1:] for spec in specs], keep(repeats))
    return outcome_so_far(task, steps, schedule, specs, grids, tuning, repeats, scheduler)
