"""Timed training runs: a task, an optimizer, a learning rate and a seed each, alone or in turns.

What is timed is the training step alone: the closure (zero_grad, forward,
loss, backward) and ``optimizer.step``, each step between two
``time.perf_counter`` calls. Drawing the minibatch and every evaluation happen
outside the timed region. When the training loss is evaluated, and how exact
steps to target therefore are, is :mod:`benchmarks.evaluation`'s business;
seconds to target is the summed step time up to and including the step at
which the target was first seen met.

The seed fixes the initial weights (``torch.manual_seed`` right before the
model is built, so every optimizer starts from the same weights) and the data
order (a separate generator for the minibatch permutations, so an optimizer
that draws random numbers, as a sampled Fisher does, cannot change the order).
An lr of ``None`` builds the optimizer without one (at its own default); the
run records the lr the optimizer then holds. A row with an lr schedule has it
built for the run's step budget and stepped after every optimizer step, inside
the timed region (it is part of what that row's training step costs).
"""

from __future__ import annotations

import gc
import math
import os
import resource
import statistics
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Optional

import torch

from benchmarks.coverage import parameter_coverage
from benchmarks.evaluation import EvaluationSchedule, evaluate, near_target, near_threshold, test_metric
from benchmarks.optimizers import OptimizerSpec
from benchmarks.tasks import Task

# attach(optimizer) -> detach(): a way to hang a logger on the optimizer of a run.
Attach = Callable[[torch.optim.Optimizer], Callable[[], None]]


@dataclass
class RunResult:
    """Everything measured in one run (losses are None where they were not finite)."""

    task: str
    optimizer: str
    lr: float
    seed: int
    target_loss: float
    steps_to_target: Optional[int]
    seconds_to_target: Optional[float]
    final_train_loss: Optional[float]
    final_test_metric: Optional[float]
    step_seconds_median: float
    step_seconds_mean: float
    steps_run: int
    train_seconds: float
    diverged: bool
    curve_steps: list[int] = field(default_factory=list)
    curve_seconds: list[float] = field(default_factory=list)
    curve_losses: list[Optional[float]] = field(default_factory=list)
    time_split: Optional[dict] = None
    skipped_steps: Optional[int] = None
    optimizer_state_bytes: int = 0
    process_peak_rss_bytes: int = 0
    load_average: Optional[float] = None  # 1-minute load of the machine when the run started
    rss_growth_bytes: Optional[int] = None  # resident memory after the run minus before it
    target_resolution: Optional[int] = None  # steps between the evaluation that met the target and the one before
    parameter_coverage: Optional[dict] = None  # FisherDescent only: parameters in blocks / under the fallback rule
    # FisherDescent only: of seconds_to_target, the seconds its curvature work took (CURVATURE_PARTS)
    curvature_seconds_to_target: Optional[float] = None
    # FisherDescent only: of seconds_to_target, the seconds its preconditioning products took
    precondition_seconds_to_target: Optional[float] = None


def load_average() -> Optional[float]:
    """The machine's 1-minute load average: above the thread count, other work competes."""
    try:
        return round(os.getloadavg()[0], 2)
    except OSError:
        return None


def minibatches(n_examples: int, batch_size: int, seed: int) -> Iterator[torch.Tensor]:
    """Endless minibatch indices: a new permutation each epoch, incomplete batches dropped.

    Dropping the remainder keeps every step at exactly ``batch_size`` examples,
    so step times are comparable; a batch size at or above the data size means
    full-batch training.
    """
    generator = torch.Generator().manual_seed(seed)
    if batch_size >= n_examples:
        everything = torch.arange(n_examples)
        while True:
            yield everything
    while True:
        order = torch.randperm(n_examples, generator=generator)
        for start in range(0, n_examples - batch_size + 1, batch_size):
            yield order[start:start + batch_size]


def _finite_or_none(value: float) -> Optional[float]:
    return value if math.isfinite(value) else None


def tensor_bytes(obj) -> int:
    """Bytes held by the tensors inside a nested structure of dicts, lists and tuples."""
    if isinstance(obj, torch.Tensor):
        return obj.numel() * obj.element_size()
    if isinstance(obj, dict):
        return sum(tensor_bytes(value) for value in obj.values())
    if isinstance(obj, (list, tuple)):
        return sum(tensor_bytes(value) for value in obj)
    return 0


def peak_rss_bytes() -> int:
    """High-water mark of this process's resident memory (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024




def current_rss_bytes() -> Optional[int]:
    """This process's resident memory now (Linux /proc; None elsewhere)."""
    try:
        pages = int(Path("/proc/self/statm").read_text().split()[1])
    except (OSError, IndexError, ValueError):
        return None
    return pages * os.sysconf("SC_PAGE_SIZE")


# The parts of FisherDescent's own timers that keep its curvature fresh: recording the layers' inputs,
# the statistics (in step() and inside the extra backward), the extra backward itself and the inversions.
# What is left of its time is what a step costs with that work free: forward and backward, the
# preconditioning products, the step and damping rules.
CURVATURE_PARTS = ("capture", "statistics", "statistics_in_backward", "extra_backward", "inversion")


def timer_seconds(optimizer: torch.optim.Optimizer, parts: tuple) -> Optional[float]:
    """The cumulative seconds of the optimizer's timers ``parts`` so far; None for an optimizer without
    timers."""
    if not hasattr(optimizer, "diagnostics"):
        return None
    times = optimizer.diagnostics().get("time", {})
    return sum(float(times.get(key, 0.0)) for key in parts) if times else None


def curvature_seconds(optimizer: torch.optim.Optimizer) -> Optional[float]:
    """The cumulative seconds of :data:`CURVATURE_PARTS` so far; None for an optimizer without those timers."""
    return timer_seconds(optimizer, CURVATURE_PARTS)


def time_split(optimizer: torch.optim.Optimizer, train_seconds: float) -> tuple[Optional[dict], Optional[int]]:
    """The optimizer's own time accounting, if it keeps one, completed to the measured total.

    From the cumulative seconds of its diagnostics: the parts inside step()
    (``ngopt.diagnostic_keys.STEP_TIME``), "step_other" (the rest of
    step_total), the parts it times inside forward and backward (capture hooks,
    extra backward), and "rest": the timed training seconds minus all of
    those, i.e. the model's own forward and backward plus untimed hook work.
    """
    if not hasattr(optimizer, "diagnostics"):
        return None, None
    from ngopt.diagnostic_keys import STEP_TIME, STEP_TOTAL  # imported late: the baselines run without ngopt

    snapshot = optimizer.diagnostics()
    reported = {key: float(value) for key, value in snapshot.get("time", {}).items()}
    step_total = reported.pop(STEP_TOTAL, None)
    split = dict(reported)
    if step_total is not None:
        split["step_other"] = step_total - sum(reported.get(key, 0.0) for key in STEP_TIME)
    split["rest"] = train_seconds - sum(split.values())
    split["train_seconds"] = train_seconds
    return split, snapshot.get("skipped_steps")


@dataclass
class Trace:
    """What the training loop measured: step times, the loss curve, when the target fell."""

    step_seconds: list[float] = field(default_factory=list)
    curve_steps: list[int] = field(default_factory=list)
    curve_seconds: list[float] = field(default_factory=list)
    curve_losses: list[Optional[float]] = field(default_factory=list)
    steps_to_target: Optional[int] = None
    seconds_to_target: Optional[float] = None
    curvature_seconds_to_target: Optional[float] = None
    precondition_seconds_to_target: Optional[float] = None
    target_resolution: Optional[int] = None
    diverged: bool = False
    near_below: float = math.inf  # losses below this count as near the target (set from the first one)

    def record(self, step: int, elapsed: float, loss: float, target: float) -> None:
        previous = self.curve_steps[-1] if self.curve_steps else step
        if not self.curve_steps:
            self.near_below = near_threshold(loss, target)
        self.curve_steps.append(step)
        self.curve_seconds.append(elapsed)
        self.curve_losses.append(_finite_or_none(loss))
        if not math.isfinite(loss):
            self.diverged = True
        elif self.steps_to_target is None and loss <= target:
            self.steps_to_target, self.seconds_to_target = step, elapsed
            self.target_resolution = step - previous

    def near(self, batch_loss: Optional[float]) -> bool:
        """Whether to evaluate densely: the target not yet met and a recent loss close to it."""
        if self.steps_to_target is not None:
            return False
        last = self.curve_losses[-1] if self.curve_losses else None
        return near_target(batch_loss, self.near_below) or (
            last is not None and near_target(last, self.near_below))


def batch_loss_of(returned) -> Optional[float]:
    """The minibatch loss a step returned (None when the optimizer returns nothing usable)."""
    if isinstance(returned, torch.Tensor) and returned.numel() == 1:
        value = returned.item()
        return value if math.isfinite(value) else None
    return None


class TrainingRun:
    """One run that trains a stretch of steps at a time, so that several runs can take turns.

    Everything a run draws from torch's global generator (the initial weights, and dropout or other
    random layers while it trains) comes from its own saved generator state, restored for each
    stretch: runs that take turns train exactly as they would one after the other.  Only the
    closure and ``optimizer.step`` fall inside the timer; the evaluations happen between steps.
    """

    def __init__(self, task: Task, spec: OptimizerSpec, lr: Optional[float], seed: int, steps: int,
                 schedule: Optional[EvaluationSchedule] = None, on_step: Optional[Callable[[], None]] = None,
                 attach: Optional[Attach] = None):
        self.task, self.spec, self.seed, self.steps = task, spec, seed, steps
        self.schedule = schedule or EvaluationSchedule.for_steps(steps)
        self.on_step = on_step
        self.data = task.load_data()
        self.load, self.rss_before = load_average(), current_rss_bytes()
        torch.manual_seed(seed)
        self.model = task.build_model()
        self.loss_fn = task.make_loss()
        self.optimizer = spec.build(self.model, self.loss_fn, lr)
        self.lr = float(self.optimizer.param_groups[0]["lr"]) if lr is None else lr
        self.lr_schedule = spec.schedule(self.optimizer, steps) if spec.schedule is not None else None
        self.detach = attach(self.optimizer) if attach is not None else None
        self.batches = minibatches(len(self.data.train_x), task.batch_size, seed)
        self.trace = Trace()
        self.trace.record(0, 0.0, self._evaluate(), task.target_loss)
        self.step = 0
        self.elapsed = 0.0
        self.lowest_batch_loss: Optional[float] = None  # since the last evaluation
        self.random_state = torch.get_rng_state()

    @property
    def done(self) -> bool:
        return self.step >= self.steps or self.trace.diverged

    def _evaluate(self) -> float:
        return evaluate(self.model, self.loss_fn, self.data.train_x, self.data.train_y, self.schedule.forward_chunk)

    def advance(self, stretch: Optional[int] = None) -> bool:
        """Train up to ``stretch`` more steps (all that are left: None); returns whether the run is done."""
        others = torch.get_rng_state()
        torch.set_rng_state(self.random_state)
        try:
            last = self.steps if stretch is None else min(self.steps, self.step + stretch)
            while self.step < last and not self.trace.diverged:
                self._train_step()
        finally:
            self.random_state = torch.get_rng_state()
            torch.set_rng_state(others)
        return self.done

    def close(self) -> None:
        """Detach what ``attach`` hung on the optimizer (done by :meth:`finish`; call it for a run given up)."""
        if self.detach is not None:
            detach, self.detach = self.detach, None
            detach()

    def _train_step(self) -> None:
        self.step += 1
        index = next(self.batches)
        inputs, targets = self.data.train_x[index], self.data.train_y[index]
        model, loss_fn, optimizer = self.model, self.loss_fn, self.optimizer

        def closure():
            optimizer.zero_grad()
            loss = loss_fn(model(inputs), targets)
            loss.backward()
            return loss

        start = time.perf_counter()
        returned = optimizer.step(closure)
        if self.lr_schedule is not None:
            self.lr_schedule.step()
        seconds = time.perf_counter() - start
        trace = self.trace
        trace.step_seconds.append(seconds)
        self.elapsed += seconds
        if self.on_step is not None:
            self.on_step()
        batch_loss = batch_loss_of(returned)
        if batch_loss is not None:
            self.lowest_batch_loss = batch_loss if self.lowest_batch_loss is None \
                else min(self.lowest_batch_loss, batch_loss)
        if self.schedule.due(self.step, trace.near(self.lowest_batch_loss)):
            trace.record(self.step, self.elapsed, self._evaluate(), self.task.target_loss)
            if trace.steps_to_target == self.step:
                trace.curvature_seconds_to_target = curvature_seconds(optimizer)
                trace.precondition_seconds_to_target = timer_seconds(optimizer, ("precondition",))
            self.lowest_batch_loss = None

    def finish(self, measure_memory: bool = True) -> RunResult:
        """The run's result; its model and optimizer are released.  ``measure_memory``: whether the
        resident memory after the run, less before it, is this run's (not while other runs live)."""
        task, trace, optimizer = self.task, self.trace, self.optimizer
        try:
            coverage = parameter_coverage(optimizer, self.model)  # blocks are assigned by the training forwards
        finally:
            self.close()
        train_seconds = sum(trace.step_seconds)
        split, skipped = time_split(optimizer, train_seconds)
        state_bytes = tensor_bytes(optimizer.state_dict())
        metric = None if trace.diverged else test_metric(task.metric, self.model, self.loss_fn, self.data.test_x,
                                                         self.data.test_y)
        metric = None if metric is None else _finite_or_none(metric)
        del optimizer
        self.model = self.optimizer = self.lr_schedule = None  # what stays resident after this is held elsewhere
        growth = None
        if measure_memory:
            gc.collect()
            rss_after = current_rss_bytes()
            growth = None if self.rss_before is None or rss_after is None else rss_after - self.rss_before
        return RunResult(
            task=task.name,
            optimizer=self.spec.name,
            lr=self.lr,
            seed=self.seed,
            target_loss=task.target_loss,
            steps_to_target=trace.steps_to_target,
            seconds_to_target=trace.seconds_to_target,
            curvature_seconds_to_target=trace.curvature_seconds_to_target,
            precondition_seconds_to_target=trace.precondition_seconds_to_target,
            final_train_loss=None if trace.diverged else trace.curve_losses[-1],
            final_test_metric=metric,
            step_seconds_median=statistics.median(trace.step_seconds),
            step_seconds_mean=statistics.fmean(trace.step_seconds),
            steps_run=len(trace.step_seconds),
            train_seconds=train_seconds,
            diverged=trace.diverged,
            curve_steps=trace.curve_steps,
            curve_seconds=trace.curve_seconds,
            curve_losses=trace.curve_losses,
            time_split=split,
            skipped_steps=skipped,
            optimizer_state_bytes=state_bytes,
            process_peak_rss_bytes=peak_rss_bytes(),
            load_average=self.load,
            rss_growth_bytes=growth,
            target_resolution=trace.target_resolution,
            parameter_coverage=coverage,
        )


def train_run(
    task: Task,
    spec: OptimizerSpec,
    lr: float,
    seed: int,
    steps: int,
    schedule: Optional[EvaluationSchedule] = None,
    on_step: Optional[Callable[[], None]] = None,
    attach: Optional[Attach] = None,
) -> RunResult:
    """Train ``task`` with ``spec`` at ``lr`` for ``steps`` steps from the weights of ``seed``."""
    run = TrainingRun(task, spec, lr, seed, steps, schedule, on_step, attach)
    return train_runs_in_turns([run], stretch=max(1, steps))[0]


def train_runs_in_turns(runs: list[TrainingRun], stretch: int) -> list[RunResult]:
    """Train ``runs`` in turns, ``stretch`` steps each, until every one is done; their results, in order.

    On a shared machine the speed of the same step moves by tens of percent within seconds (a second
    core shared with other work, memory contention): runs one after the other can each land in a
    different spell, runs that take turns share them, so their times stay comparable.
    """
    pending = list(runs)
    try:
        while pending:
            pending = [run for run in pending if not run.advance(stretch)]
        return [run.finish(measure_memory=len(runs) == 1) for run in runs]
    except BaseException:
        for run in runs:
            run.close()  # an interrupted or failed group leaves no logger attached
        raise
