"""How the step time of NaturalGradient and SGD grows with layer width and with batch size.

The network is three d x d linear layers with ReLU and a d -> 10 read-out,
trained with cross-entropy on one fixed random batch (timing does not depend
on the data). Per point, each optimizer takes a few untimed warm-up steps and
then ``steps`` timed ones; the median step time drops the rare steps that
refresh statistics or invert factors, the mean spreads them over all steps,
so both are reported. The measured ratio stands beside the arithmetic floor
1 + 2d/(3B) (:func:`benchmarks.goals.step_time_floor`).
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

from benchmarks.goals import step_time_floor
from benchmarks.optimizers import OptimizerSpec
from benchmarks.report import format_number, format_table

WIDTHS = [64, 128, 256, 512, 1024]
WIDTH_SWEEP_BATCH = 256
BATCHES = [64, 128, 256, 512, 1024, 2048]
BATCH_SWEEP_WIDTH = 256
LAYERS = 3
CLASSES = 10
COLUMNS = ("sweep", "width", "batch", "floor", "ngopt_step_seconds_median", "sgd_step_seconds_median",
           "ngopt_step_seconds_mean", "sgd_step_seconds_mean", "ratio", "ratio_of_means")


def scaling_model(width: int) -> nn.Sequential:
    layers: list[nn.Module] = []
    for _ in range(LAYERS):
        layers += [nn.Linear(width, width), nn.ReLU()]
    layers.append(nn.Linear(width, CLASSES))
    return nn.Sequential(*layers)


def time_steps(spec: OptimizerSpec, width: int, batch: int, warmup: int, steps: int,
               on_step: Optional[Callable[[], None]] = None) -> list[float]:
    """Seconds of each timed step (closure + step) after ``warmup`` untimed steps."""
    torch.manual_seed(0)
    model = scaling_model(width)
    loss_fn = nn.CrossEntropyLoss()
    inputs = torch.randn(batch, width)
    labels = torch.randint(0, CLASSES, (batch,))
    optimizer = spec.build(model, loss_fn, spec.lr_centre)

    def closure():
        optimizer.zero_grad()
        loss = loss_fn(model(inputs), labels)
        loss.backward()
        return loss

    seconds = []
    for index in range(warmup + steps):
        start = time.perf_counter()
        optimizer.step(closure)
        elapsed = time.perf_counter() - start
        if index >= warmup:
            seconds.append(elapsed)
        if on_step is not None:
            on_step()
    return seconds


def scaling_points() -> list[tuple[str, int, int]]:
    return ([("width", width, WIDTH_SWEEP_BATCH) for width in WIDTHS]
            + [("batch", BATCH_SWEEP_WIDTH, batch) for batch in BATCHES])


def run_scaling(specs: dict[str, OptimizerSpec], warmup: int, steps: int,
                progress: bool = True) -> list[dict]:
    """One row per (sweep, width, batch): median and mean step seconds per optimizer, ratios, floor."""
    points = scaling_points()
    rows = []
    with tqdm(total=len(points) * len(specs) * (warmup + steps), desc="scaling", unit="step",
              disable=not progress, dynamic_ncols=True) as bar:
        for sweep, width, batch in points:
            row: dict = {"sweep": sweep, "width": width, "batch": batch,
                         "floor": step_time_floor(width, batch)}
            for name, spec in specs.items():
                bar.set_postfix_str(f"{name} d={width} B={batch}")
                seconds = time_steps(spec, width, batch, warmup, steps, on_step=bar.update)
                row[f"{name}_step_seconds_median"] = statistics.median(seconds)
                row[f"{name}_step_seconds_mean"] = statistics.fmean(seconds)
            if "ngopt" in specs and "sgd" in specs:
                row["ratio"] = row["ngopt_step_seconds_median"] / row["sgd_step_seconds_median"]
                row["ratio_of_means"] = row["ngopt_step_seconds_mean"] / row["sgd_step_seconds_mean"]
            rows.append(row)
    return rows


def write_scaling_csv(rows: list[dict], path: Path) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=COLUMNS, extrasaction="ignore")
        writer.writeheader()
        writer.writerows(rows)


def scaling_table(rows: list[dict], markdown: bool = False) -> str:
    headers = ["sweep", "d", "B", "ngopt ms (median)", "sgd ms (median)", "ratio", "floor 1+2d/(3B)",
               "ngopt ms (mean)", "sgd ms (mean)", "ratio of means"]

    def ms(value):
        return format_number(None if value is None else value * 1e3)

    body = [[row["sweep"], str(row["width"]), str(row["batch"]),
             ms(row.get("ngopt_step_seconds_median")), ms(row.get("sgd_step_seconds_median")),
             format_number(row.get("ratio")), format_number(row["floor"]),
             ms(row.get("ngopt_step_seconds_mean")), ms(row.get("sgd_step_seconds_mean")),
             format_number(row.get("ratio_of_means"))] for row in rows]
    return format_table(headers, body, markdown)


def scaling_markdown(rows: list[dict], command: str, plot_file: str, warmup: int, steps: int) -> str:
    return "\n".join([
        "## Scaling study", "",
        f"Command: `{command}`. Network: {LAYERS} linear layers d x d with ReLU and a d -> {CLASSES} "
        f"read-out, cross-entropy, one fixed random batch; {warmup} warm-up steps, then {steps} timed "
        f"steps per point. Width sweep at B = {WIDTH_SWEEP_BATCH}, batch sweep at d = "
        f"{BATCH_SWEEP_WIDTH}.", "",
        scaling_table(rows, markdown=True), "",
        f"![step time against width and batch]({plot_file})",
    ])
