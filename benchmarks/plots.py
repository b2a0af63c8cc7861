"""PNG figures: training loss against steps and against seconds, one figure per task."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # files only, no display
import matplotlib.pyplot as plt  # noqa: E402

from benchmarks.harness import TaskOutcome  # noqa: E402
from benchmarks.optimizers import HEADLINE  # noqa: E402
from benchmarks.results import write_atomically  # noqa: E402
from benchmarks.scaling import step_key  # noqa: E402

COLOURS = {HEADLINE: "#8e2c48", f"{HEADLINE}-ekfac": "#4b3f8e", f"{HEADLINE}-ekfac-gradient": "#2a8a86",
           f"{HEADLINE}-diag": "#c0607a", "sgd": "#3f7f5f",
           "adam": "#d08c1c", "adamw-cosine": "#2f6fa8", "muon": "#7a7a2a"}
FALLBACK_COLOUR = "#555555"


def _curve(run):
    """(steps, seconds, losses) of a run without its non-finite points."""
    points = [(s, t, loss) for s, t, loss in zip(run.curve_steps, run.curve_seconds, run.curve_losses)
              if loss is not None and loss > 0]
    return [p[0] for p in points], [p[1] for p in points], [p[2] for p in points]


def plot_task(outcome: TaskOutcome, path: Path) -> None:
    """Loss of every run at each optimizer's chosen lr (one line per seed), target dashed."""
    figure, (by_step, by_time) = plt.subplots(1, 2, figsize=(11, 4.2), sharey=True)
    for name, result in outcome.outcomes.items():
        colour = COLOURS.get(name, FALLBACK_COLOUR)
        for index, run in enumerate(result.selected_runs):
            steps, seconds, losses = _curve(run)
            label = f"{name} (lr {result.best_lr:.3g})" if index == 0 else None
            by_step.plot(steps, losses, color=colour, linewidth=1.3, alpha=0.85, label=label)
            by_time.plot(seconds, losses, color=colour, linewidth=1.3, alpha=0.85)
    for axes, xlabel in ((by_step, "training step"), (by_time, "training seconds (steps only)")):
        axes.axhline(outcome.task.target_loss, color="black", linestyle="--", linewidth=0.9)
        axes.set_yscale("log")
        axes.set_xlabel(xlabel)
        axes.grid(True, which="both", alpha=0.25)
    by_step.set_ylabel("training loss (whole training set)")
    by_step.legend(loc="upper right", fontsize=8, title="one line per seed", title_fontsize=8)
    figure.suptitle(f"{outcome.task.name}: target {outcome.task.target_loss:g} (dashed)")
    figure.tight_layout()
    save(figure, path)


def save(figure, path: Path) -> None:
    """Write the figure as PNG in one step (see :func:`benchmarks.results.write_atomically`)."""
    write_atomically(path, lambda temporary: figure.savefig(temporary, dpi=110, format="png"))
    plt.close(figure)


def plot_scaling(rows: list[dict], path: Path) -> None:
    """Median step time against width and against batch, fisher-descent and SGD, with the ratio."""
    figure, axes = plt.subplots(2, 2, figsize=(11, 7.5))
    for column, sweep in enumerate(("width", "batch")):
        sweep_rows = [row for row in rows if row["sweep"] == sweep]
        x = [row[sweep] for row in sweep_rows]
        times, ratio = axes[0][column], axes[1][column]
        for name in (HEADLINE, "sgd"):
            key = step_key(name, "median")
            if any(row.get(key) is not None for row in sweep_rows):
                times.plot(x, [row.get(key) for row in sweep_rows], marker="o",
                           color=COLOURS[name], label=name)
        times.set_xscale("log", base=2)
        times.set_yscale("log")
        times.set_ylabel("median step seconds")
        times.legend(fontsize=8)
        if any(row.get("ratio") is not None for row in sweep_rows):
            ratio.plot(x, [row.get("ratio") for row in sweep_rows], marker="o",
                       color=COLOURS[HEADLINE], label=f"measured {HEADLINE}/sgd")
        ratio.plot(x, [row["flop_estimate"] for row in sweep_rows], linestyle="--", color="black",
                   label="flop-count estimate 1 + 2d/(3B)")
        ratio.set_xscale("log", base=2)
        ratio.set_xlabel("layer width d" if sweep == "width" else "batch size B")
        ratio.set_ylabel("step-time ratio")
        ratio.legend(fontsize=8)
        fixed = sweep_rows[0]["batch"] if sweep == "width" else sweep_rows[0]["width"]
        times.set_title(f"growing {sweep} ({'batch' if sweep == 'width' else 'width'} {fixed})")
        for each in (times, ratio):
            each.grid(True, which="both", alpha=0.25)
    figure.text(0.5, 0.005, "flop-count estimate: forward+backward ~6Bd² flops per d×d layer for both, "
                "preconditioning ~4d³ more for FisherDescent; an estimate, not a bound (step time is not "
                "proportional to flops)", ha="center", va="bottom", fontsize=7.5)
    figure.tight_layout(rect=(0, 0.03, 1, 1))
    save(figure, path)
