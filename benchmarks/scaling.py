"""How the step time of FisherDescent and SGD grows with layer width and with batch size.

The network is three d x d linear layers with ReLU and a d -> 10 read-out,
trained with cross-entropy on random inputs and labels (timing does not
depend on the data; random labels keep the loss from collapsing to zero). Per point, each optimizer takes a few untimed warm-up steps and
then ``steps`` timed ones, the optimizers taking turns in blocks; the median step time drops the rare steps that
refresh statistics or invert factors, the mean spreads them over all steps,
so both are reported. The measured ratio stands beside the flop-count estimate
1 + 2d/(3B) (:func:`benchmarks.comparison.step_time_flop_estimate`), which
counts multiply-adds only and is not a bound: measured ratios fall below it
at small batch.
"""

from __future__ import annotations

import csv
import statistics
import time
from pathlib import Path
from typing import Callable, Optional

import torch
from torch import nn
from tqdm import tqdm

from benchmarks.comparison import FLOP_ESTIMATE_TEXT, step_time_flop_estimate
from benchmarks.optimizers import HEADLINE, OptimizerSpec
from benchmarks.report_format import format_number, format_table
from benchmarks.training import load_average

WIDTHS = [64, 128, 256, 512, 1024]
WIDTH_SWEEP_BATCH = 256
BATCHES = [64, 128, 256, 512, 1024, 2048]
BATCH_SWEEP_WIDTH = 256
LAYERS = 3
CLASSES = 10


def step_key(name: str, statistic: str) -> str:
    """The row key of an optimizer's median or mean step seconds (an identifier: dashes become underscores)."""
    return f"{name.replace('-', '_')}_step_seconds_{statistic}"


COLUMNS = ("sweep", "width", "batch", "flop_estimate", step_key(HEADLINE, "median"), step_key("sgd", "median"),
           step_key(HEADLINE, "mean"), step_key("sgd", "mean"), "ratio", "ratio_of_means", "load_average")


def scaling_model(width: int) -> nn.Sequential:
    layers: list[nn.Module] = []
    for _ in range(LAYERS):
        layers += [nn.Linear(width, width), nn.ReLU()]
    layers.append(nn.Linear(width, CLASSES))
    return nn.Sequential(*layers)


class StepTimer:
    """One optimizer on the scaling network at one (width, batch), timing each step it takes."""

    def __init__(self, spec: OptimizerSpec, width: int, batch: int):
        torch.manual_seed(0)
        self.model = scaling_model(width)
        self.loss_fn = nn.CrossEntropyLoss()
        # Random labels on a pool of batches: the loss cannot collapse to zero, whose tiny
        # (subnormal) gradients would slow the arithmetic and distort the timings.
        self.batches = [(torch.randn(batch, width), torch.randint(0, CLASSES, (batch,)))
                        for _ in range(BATCH_POOL)]
        self.optimizer = spec.build(self.model, self.loss_fn, spec.lr_centre)
        self.seconds: list[float] = []
        self.taken = 0

    def run(self, steps: int, timed: bool, on_step: Optional[Callable[[], None]] = None) -> None:
        for _ in range(steps):
            inputs, labels = self.batches[self.taken % BATCH_POOL]
            self.taken += 1

            def closure():
                self.optimizer.zero_grad()
                loss = self.loss_fn(self.model(inputs), labels)
                loss.backward()
                return loss

            start = time.perf_counter()
            self.optimizer.step(closure)
            elapsed = time.perf_counter() - start
            if timed:
                self.seconds.append(elapsed)
            if on_step is not None:
                on_step()


BATCH_POOL = 8
ROUNDS = 4  # the optimizers take turns in this many blocks of timed steps


def time_point(specs: dict[str, OptimizerSpec], width: int, batch: int, warmup: int, steps: int,
               on_step: Optional[Callable[[], None]] = None) -> dict[str, list[float]]:
    """Seconds of each timed step per optimizer, the optimizers taking turns in blocks.

    Taking turns spreads any burst of load from other processes over all of
    them instead of charging it to whichever optimizer was running.
    """
    timers = {name: StepTimer(spec, width, batch) for name, spec in specs.items()}
    for timer in timers.values():
        timer.run(warmup, timed=False, on_step=on_step)
    blocks = [steps // ROUNDS + (1 if index < steps % ROUNDS else 0) for index in range(ROUNDS)]
    for block in blocks:
        for timer in timers.values():
            timer.run(block, timed=True, on_step=on_step)
    return {name: timer.seconds for name, timer in timers.items()}


def scaling_points() -> list[tuple[str, int, int]]:
    return ([("width", width, WIDTH_SWEEP_BATCH) for width in WIDTHS]
            + [("batch", BATCH_SWEEP_WIDTH, batch) for batch in BATCHES])


def run_scaling(specs: dict[str, OptimizerSpec], warmup: int, steps: int,
                progress: bool = True) -> list[dict]:
    """One row per (sweep, width, batch): median and mean step seconds per optimizer, ratios, flop estimate."""
    points = scaling_points()
    rows = []
    with tqdm(total=len(points) * len(specs) * (warmup + steps), desc="scaling", unit="step",
              disable=not progress, dynamic_ncols=True) as bar:
        for sweep, width, batch in points:
            row: dict = {"sweep": sweep, "width": width, "batch": batch,
                         "flop_estimate": step_time_flop_estimate(width, batch), "load_average": load_average()}
            bar.set_postfix_str(f"d={width} B={batch}")
            for name, seconds in time_point(specs, width, batch, warmup, steps, bar.update).items():
                row[step_key(name, "median")] = statistics.median(seconds)
                row[step_key(name, "mean")] = statistics.fmean(seconds)
            if HEADLINE in specs and "sgd" in specs:
                row["ratio"] = row[step_key(HEADLINE, "median")] / row[step_key("sgd", "median")]
                row["ratio_of_means"] = row[step_key(HEADLINE, "mean")] / row[step_key("sgd", "mean")]
            rows.append(row)
    return rows


def write_scaling_csv(rows: list[dict], path: Path) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=COLUMNS, extrasaction="ignore")
        writer.writeheader()
        writer.writerows(rows)


def scaling_table(rows: list[dict], markdown: bool = False) -> str:
    headers = ["sweep", "d", "B", f"{HEADLINE} ms (median)", "sgd ms (median)", "ratio", "flop estimate 1+2d/(3B)",
               f"{HEADLINE} ms (mean)", "sgd ms (mean)", "ratio of means"]

    def ms(value):
        return format_number(None if value is None else value * 1e3)

    body = [[row["sweep"], str(row["width"]), str(row["batch"]),
             ms(row.get(step_key(HEADLINE, "median"))), ms(row.get(step_key("sgd", "median"))),
             format_number(row.get("ratio")), format_number(row["flop_estimate"]),
             ms(row.get(step_key(HEADLINE, "mean"))), ms(row.get(step_key("sgd", "mean"))),
             format_number(row.get("ratio_of_means"))] for row in rows]
    return format_table(headers, body, markdown)


def contention_note(rows: list[dict], threads: int) -> str:
    loads = [row["load_average"] for row in rows if row.get("load_average") is not None]
    if not loads or max(loads) <= threads + 0.5:
        return ""
    return (f"Warning: the load average reached {max(loads):.1f} with {threads} torch threads; "
            "other processes competed for the CPU and the times above are inflated.")


def scaling_markdown(rows: list[dict], command: str, plot_file: str, warmup: int, steps: int,
                     threads: int) -> str:
    return "\n".join([
        "## Scaling study", "",
        f"Command: `{command}`. Network: {LAYERS} linear layers d x d with ReLU and a d -> {CLASSES} "
        f"read-out, cross-entropy, random inputs and labels; {warmup} warm-up steps, then {steps} timed "
        f"steps per point. Width sweep at B = {WIDTH_SWEEP_BATCH}, batch sweep at d = "
        f"{BATCH_SWEEP_WIDTH}.", "",
        scaling_table(rows, markdown=True), "",
        f"The last ratio columns stand beside {FLOP_ESTIMATE_TEXT}.", "",
        *([contention_note(rows, threads), ""] if contention_note(rows, threads) else []),
        f"![step time against width and batch]({plot_file})",
    ])
