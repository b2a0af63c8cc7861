"""The benchmark's files, rewritten as runs finish so that a stopped benchmark keeps its results.

``results.json``, ``curves.csv`` and ``report.md`` with every finished run so
far (each file replaced in one step, see :func:`benchmarks.results.write_atomically`):
after a run when :data:`WRITE_EVERY` seconds have passed since the last write
(every file holds every run, so writing after each of a quick run's 154 runs
cost about 5 s in all), after each task (with its loss plot), and when the
benchmark ends, is interrupted or fails. Only a process killed outright can
lose the runs of the last few seconds.
Until the benchmark ends, ``results["status"]`` says it is unfinished and
where it stood; when it is interrupted or fails, the status names the reason.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Optional

from benchmarks import plots, report, results
from benchmarks.harness import TaskOutcome

RUNNING = "still running when this was written, or killed"
WRITE_EVERY = 10.0  # seconds between the files' rewrites after single runs


class ProgressiveOutputs:
    def __init__(self, out: Optional[Path], machine: dict, settings: dict, total_runs: int,
                 clock=time.monotonic):
        self.out, self.machine, self.settings, self.total = out, machine, settings, total_runs
        self.clock = clock
        self.last_write: Optional[float] = None
        self.outcomes: list[TaskOutcome] = []  # finished tasks
        self.current: Optional[TaskOutcome] = None  # the task in progress
        self.plot_files: dict[str, str] = {}
        self.written: list[str] = []
        if out is not None:
            out.mkdir(parents=True, exist_ok=True)

    @property
    def finished_count(self) -> int:
        return sum(outcome.finished_runs for outcome in self.all_outcomes())

    def all_outcomes(self) -> list[TaskOutcome]:
        return self.outcomes + ([self.current] if self.current is not None else [])

    def status(self, reason: Optional[str]) -> dict:
        if reason is None:
            return {"complete": True, "finished_runs": self.finished_count, "planned_runs": self.total}
        return {"complete": False, "reason": reason, "finished_runs": self.finished_count,
                "planned_runs": self.total, "at": self.where()}

    def where(self) -> str:
        """Where the benchmark stands, in words."""
        current = self.current
        if current is None:
            last = self.outcomes[-1].task.name if self.outcomes else None
            return f"after task {last}, before any run of the next one finished" if last else \
                "before the first run finished"
        text = f"in task {current.task.name}, after {current.finished_runs} of its {current.planned_runs} runs"
        run = current.last_run
        if run is not None:
            text += f" (the last finished: {run.optimizer} lr={run.lr:.3g} seed={run.seed})"
        return text

    def results(self, reason: Optional[str] = None) -> dict:
        return results.build_results(self.machine, self.settings, self.all_outcomes(), self.status(reason))

    def write(self, reason: Optional[str]) -> dict:
        payload = self.results(reason)
        self.last_write = self.clock()
        if self.out is not None:
            results.write_json(payload, self.out / "results.json")
            results.write_curves(self.all_outcomes(), self.out / "curves.csv")
            results.write_text(report.markdown_report(payload, self.plot_files), self.out / "report.md")
        return payload

    def plot(self, outcome: TaskOutcome) -> None:
        if self.out is None or not outcome.outcomes:
            return
        name = f"loss_{outcome.task.name}.png"
        plots.plot_task(outcome, self.out / name)
        self.plot_files[outcome.task.name] = name
        self.written.append(name)

    def run_finished(self, outcome: TaskOutcome) -> None:
        self.current = outcome
        if self.last_write is None or self.clock() - self.last_write >= WRITE_EVERY:
            self.write(RUNNING)

    def task_finished(self, outcome: TaskOutcome) -> None:
        self.current = None
        self.outcomes.append(outcome)
        self.plot(outcome)
        self.write(RUNNING)

    def stopped(self, reason: str) -> dict:
        if self.current is not None:
            self.plot(self.current)
        return self.write(reason)

    def finished(self) -> dict:
        return self.write(None)
