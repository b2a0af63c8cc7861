"""results.json (the schema documented in the README, with extra fields) and the CSV of loss curves.

Every file is written whole to a temporary name beside its final one and then
moved over it (``os.replace``, atomic on one file system), so a benchmark
interrupted while writing leaves the previous complete version, never half a file.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from pathlib import Path
from typing import Optional

from benchmarks.comparison import compare
from benchmarks.harness import TaskOutcome, summarize
from benchmarks.optimizers import HEADLINE
from benchmarks.training import RunResult

SCHEMA = "ngopt-benchmark-results/1"
# The fields every run carries per the README's results schema; more follow them.
RUN_FIELDS = ("optimizer", "lr", "seed", "steps_to_target", "seconds_to_target",
              "final_train_loss", "final_test_metric", "step_seconds_median")
# A run's "optimizer" in results.json is the schema's: the package's name for its headline row, the
# row's own name otherwise; "method" is always the row's name, as the report and the CSV show it.
SCHEMA_OPTIMIZER_NAMES = {HEADLINE: "ngopt"}
CURVE_COLUMNS = ("task", "optimizer", "lr", "seed", "selected", "step", "seconds", "train_loss")


def finite_or_none(value):
    """JSON has no NaN or infinity: write them as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {key: finite_or_none(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [finite_or_none(item) for item in value]
    return value


def run_entry(run: RunResult, role: str, selected: bool) -> dict:
    entry = {name: getattr(run, name) for name in RUN_FIELDS}
    entry["optimizer"] = SCHEMA_OPTIMIZER_NAMES.get(run.optimizer, run.optimizer)
    entry.update({
        "method": run.optimizer,
        "role": role,  # "tuning" (first seed, every lr of the grid) or "repeat" (other seeds)
        "selected": selected,  # at the optimizer's chosen lr: these runs make the medians
        "diverged": run.diverged,
        "steps_run": run.steps_run,
        "train_seconds": run.train_seconds,
        "step_seconds_mean": run.step_seconds_mean,
        "optimizer_state_bytes": run.optimizer_state_bytes,
        "process_peak_rss_bytes": run.process_peak_rss_bytes,
        "load_average": run.load_average,
        "rss_growth_bytes": run.rss_growth_bytes,
        "target_resolution": run.target_resolution,
    })
    if run.parameter_coverage is not None:
        entry["parameter_coverage"] = run.parameter_coverage
    if run.time_split is not None:
        entry["time_split_seconds"] = run.time_split
        entry["curvature_seconds_to_target"] = run.curvature_seconds_to_target
        entry["precondition_seconds_to_target"] = run.precondition_seconds_to_target
        entry["skipped_steps"] = run.skipped_steps
    return entry


def task_entry(outcome: TaskOutcome) -> dict:
    task = outcome.task
    runs, summaries = [], {}
    for name, result in outcome.outcomes.items():
        for run in result.tuning_runs:
            runs.append(run_entry(run, "tuning", run.lr == result.best_lr))
        runs.extend(run_entry(run, "repeat", True) for run in result.seed_runs)
        summaries[name] = summarize(result)
    return {
        "task": task.name,
        "target_loss": task.target_loss,
        "description": task.description,
        "target_reason": task.target_reason,
        "held_out": task.held_out,  # the defaults are checked on this task, never tuned on it
        "test_metric": task.metric,
        "test_metric_higher_is_better": task.higher_is_better,
        "reference": task.reference,
        "reference_band": list(task.reference_band) if task.reference_band else None,
        "batch_size": task.batch_size,
        "steps": outcome.steps,
        "evaluation": outcome.schedule.as_dict(),
        "complete": outcome.complete,
        "finished_runs": outcome.finished_runs,
        "planned_runs": outcome.planned_runs,
        "rss_growth_bytes": outcome.rss_growth_bytes,  # left behind by the task's groups of runs in turns
        "load_average_max": max((run["load_average"] for run in runs if run["load_average"] is not None),
                                default=None),
        "runs": runs,
        "summary": summaries,
        "comparison": compare(summaries, outcome.steps, task.widest_width, task.batch_size),
    }


def build_results(machine: dict, settings: dict, outcomes: list[TaskOutcome],
                  status: Optional[dict] = None) -> dict:
    """The whole results dict; ``status`` says whether the benchmark finished and, if not, where it stopped."""
    tasks = [task_entry(outcome) for outcome in outcomes if outcome.outcomes]
    return finite_or_none({
        "schema": SCHEMA,
        "status": status or {"complete": True},
        "machine": machine,
        "settings": settings,
        "tasks": tasks,
    })


def write_atomically(path: Path, write) -> None:
    """Call ``write(temporary_path)``, then move the result over ``path`` in one step."""
    temporary = path.with_name(f".{path.name}.partial")
    try:
        write(temporary)
        os.replace(temporary, path)
    finally:
        if temporary.exists():
            temporary.unlink()


def write_text(text: str, path: Path) -> None:
    write_atomically(path, lambda temporary: temporary.write_text(text))


def write_json(results: dict, path: Path) -> None:
    write_text(json.dumps(results, indent=2, allow_nan=False) + "\n", path)


def curve_rows(outcomes: list[TaskOutcome]):
    for outcome in outcomes:
        for name, result in outcome.outcomes.items():
            for run in result.tuning_runs + result.seed_runs:
                selected = run.lr == result.best_lr
                for step, seconds, loss in zip(run.curve_steps, run.curve_seconds, run.curve_losses):
                    yield (outcome.task.name, name, repr(run.lr), run.seed, int(selected),
                           step, f"{seconds:.6f}", "" if loss is None else repr(loss))


def write_curves(outcomes: list[TaskOutcome], path: Path) -> None:
    """Every evaluation of every run: task, optimizer, lr, seed, selected, step, seconds, train_loss.

    ``seconds`` is the summed training-step time up to that step; an empty
    ``train_loss`` marks a non-finite loss.
    """
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer)
    writer.writerow(CURVE_COLUMNS)
    writer.writerows(curve_rows(outcomes))
    write_atomically(path, lambda temporary: temporary.write_text(buffer.getvalue(), newline=""))


def read_curves(path: Path) -> list[dict]:
    """The rows of a curves CSV with numbers parsed (a missing loss becomes None)."""
    rows = []
    with path.open(newline="") as handle:
        for row in csv.DictReader(handle):
            loss: Optional[float] = float(row["train_loss"]) if row["train_loss"] else None
            rows.append({**row, "lr": float(row["lr"]), "seed": int(row["seed"]),
                         "selected": row["selected"] == "1", "step": int(row["step"]),
                         "seconds": float(row["seconds"]), "train_loss": loss})
    return rows
