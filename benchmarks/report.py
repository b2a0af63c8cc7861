"""Console tables and report.md, both built from the results dict (the content of results.json)."""

from __future__ import annotations

from typing import Optional

from benchmarks.goals import NGOPT, describe_ratio, explain_miss

TABLE_HEADERS = ["optimizer", "best lr", "reached", "steps to target", "s to target",
                 "final train loss", "test {metric}", "step ms (median)"]


def format_number(value: Optional[float], digits: int = 3) -> str:
    if value is None:
        return "-"
    if isinstance(value, int):
        return str(value)
    if value != 0 and (abs(value) < 1e-3 or abs(value) >= 1e5):
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


def format_table(headers: list[str], rows: list[list[str]], markdown: bool = False) -> str:
    """A plain aligned table for the console, or a GitHub markdown table."""
    if markdown:
        lines = ["| " + " | ".join(headers) + " |", "|" + "|".join("---" for _ in headers) + "|"]
        lines += ["| " + " | ".join(row) + " |" for row in rows]
        return "\n".join(lines)
    widths = [max(len(str(cell)) for cell in column) for column in zip(headers, *rows)]
    def line(cells):
        return "  ".join(str(cell).ljust(width) for cell, width in zip(cells, widths)).rstrip()
    return "\n".join([line(headers), line(["-" * width for width in widths])] + [line(r) for r in rows])


def task_rows(entry: dict) -> list[list[str]]:
    rows = []
    for name, summary in entry["summary"].items():
        metric = summary["final_test_metric"]
        rows.append([
            name,
            format_number(summary["best_lr"]),
            f"{summary['reached']}/{summary['runs']}",
            format_number(summary["steps_to_target"]),
            format_number(summary["seconds_to_target"]),
            format_number(summary["final_train_loss"]),
            "-" if metric is None else (f"{100 * metric:.1f}%" if entry["test_metric"] == "accuracy"
                                        else format_number(metric)),
            format_number(summary["step_seconds_median"] * 1e3),
        ])
    return rows


def ratio_lines(entry: dict) -> list[str]:
    """Time-to-target and step-time ratios of ngopt over each baseline, with the floor."""
    comparison = entry["comparison"]
    lines = []
    if comparison["time_to_target"]:
        lines.append("time to target, " + "; ".join(
            f"ngopt/{name}: {describe_ratio(value)}" for name, value in comparison["time_to_target"].items()))
        lines.append("steps to target, " + "; ".join(
            f"ngopt/{name}: {describe_ratio(value)}" for name, value in comparison["steps_to_target"].items()))
        step_parts = [f"ngopt/{name}: {value:.2f}" for name, value in comparison["step_time"].items()]
        line = "median step time, " + "; ".join(step_parts)
        if comparison["step_time_floor"] is not None:
            line += (f"  [floor 1 + 2d/(3B) = {comparison['step_time_floor']:.2f} over sgd, with d = "
                     f"{comparison['floor_width']} (widest hidden width) and B = {comparison['floor_batch']}]")
        lines.append(line)
    return lines


def split_line(entry: dict) -> Optional[str]:
    """ngopt's mean time per step by part, from its own timers."""
    summary = entry["summary"].get(NGOPT)
    split = summary and summary.get("time_split_per_step")
    if not split:
        return None
    total = sum(split.values())
    parts = ", ".join(f"{key} {value * 1e3:.2f} ms ({100 * value / total:.0f}%)"
                      for key, value in split.items() if total > 0)
    return f"ngopt time per step (median over seeds): {parts}; rest = forward/backward and untimed work"


def memory_line(entry: dict) -> str:
    """Optimizer state size, resident memory left behind per run, and the process peak."""
    state = ", ".join(f"{name} {summary['optimizer_state_bytes'] / 1024:.1f} KiB"
                      for name, summary in entry["summary"].items())
    growth = ", ".join(f"{name} {summary['rss_growth_bytes'] / 2**20:+.0f} MiB"
                       for name, summary in entry["summary"].items()
                       if summary.get("rss_growth_bytes") is not None)
    peak = max(summary["process_peak_rss_bytes"] for summary in entry["summary"].values())
    line = f"optimizer state: {state}; process peak RSS so far {peak / 2**20:.0f} MiB"
    if growth:
        line += f"; resident memory left behind per run (median): {growth}"
    return line


def reference_line(entry: dict) -> Optional[str]:
    if not entry.get("reference"):
        return None
    low, high = entry["reference_band"]
    verdicts = []
    for name, summary in entry["summary"].items():
        metric = summary["final_test_metric"]
        if metric is not None:
            inside = "inside" if low <= metric <= high else "OUTSIDE"
            verdicts.append(f"{name} {100 * metric:.1f}% ({inside})")
    return (f"reference: {entry['reference']}; sanity band {100 * low:.0f}-{100 * high:.0f}%: "
            + ", ".join(verdicts))


def task_header(entry: dict) -> str:
    seeds = max(summary["runs"] for summary in entry["summary"].values())
    return (f"{entry['task']}: target training loss {entry['target_loss']:g}; {entry['steps']} steps, "
            f"batch {entry['batch_size']}, medians over {seeds} seed(s)")


def contention_line(entry: dict, threads: Optional[int]) -> Optional[str]:
    """A warning when other processes competed for the CPU while the task ran."""
    load = entry.get("load_average_max")
    if load is None or threads is None or load <= threads + 0.5:
        return None
    return (f"warning: the machine's load average reached {load:.1f} during these runs (with {threads} "
            "torch threads): other processes competed for the CPU, so wall-clock times are inflated "
            "and noisy; the runs were interleaved across optimizers to spread the effect")


def task_block(entry: dict, markdown: bool = False, threads: Optional[int] = None) -> str:
    headers = [h.format(metric=entry["test_metric"]) for h in TABLE_HEADERS]
    notes = ratio_lines(entry) + [line for line in (split_line(entry), memory_line(entry),
                                                    reference_line(entry),
                                                    contention_line(entry, threads)) if line]
    table = format_table(headers, task_rows(entry), markdown)
    if markdown:
        return table + "\n\n" + "\n".join(f"- {note}" for note in notes)
    return "\n".join([task_header(entry), table] + notes)


def _time_and_steps(summary: Optional[dict]) -> str:
    if summary is None:
        return "not run"
    if summary["seconds_to_target"] is None:
        return f"not reached ({summary['reached']}/{summary['runs']})"
    return f"{summary['seconds_to_target']:.3g} s ({format_number(summary['steps_to_target'])} steps)"


def overview_rows(results: dict) -> list[list[str]]:
    """One row per task: median time (steps) to target per optimizer, and ngopt's ratios."""
    rows = []
    for entry in results["tasks"]:
        summaries, comparison = entry["summary"], entry["comparison"]
        step_ratio = comparison["step_time"].get("sgd")
        floor = comparison["step_time_floor"]
        step_text = "-" if step_ratio is None else f"{step_ratio:.2f}"
        if step_ratio is not None and floor is not None:
            step_text += f" (floor {floor:.2f})"
        rows.append([
            entry["task"], f"{entry['target_loss']:g}",
            *[_time_and_steps(summaries.get(name)) for name in ("ngopt", "sgd", "adam")],
            *[describe_ratio(comparison["time_to_target"].get(name)).split(" (")[0]
              for name in ("sgd", "adam")],
            step_text,
        ])
    return rows


OVERVIEW_HEADERS = ["task", "target", "ngopt: time (steps) to target", "sgd", "adam",
                    "time ngopt/sgd", "time ngopt/adam", "step time ngopt/sgd"]


def overview(results: dict, markdown: bool = False) -> str:
    return format_table(OVERVIEW_HEADERS, overview_rows(results), markdown)


def goal_rows(results: dict) -> list[list[str]]:
    return [[goal["goal"], goal["measured"], goal["status"].upper() if goal["status"] == "missed"
             else goal["status"]] for goal in results["goals"]]


def closing_notes(results: dict) -> list[str]:
    """For every goal not met: what the measurements say limits it."""
    by_task = {entry["task"]: entry for entry in results["tasks"]}
    notes = []
    for goal in results["goals"]:
        if goal["status"] in ("missed", "undecided"):
            notes.append(f"{goal['goal']} -- {goal['status']}: "
                         f"{explain_miss(goal, by_task[goal['task']])}")
    return notes


def console_summary(results: dict, with_tasks: bool = True) -> str:
    """The task tables (unless already printed), the goals and what limits the missed ones."""
    threads = results["settings"].get("threads")
    blocks = [task_block(entry, threads=threads) for entry in results["tasks"]] if with_tasks else []
    blocks.append("Overview (medians over seeds at each optimizer's chosen lr)\n" + overview(results))
    if results["goals"]:
        blocks.append("Goals\n" + format_table(["goal", "measured ngopt/baseline", "status"],
                                               goal_rows(results)))
        notes = closing_notes(results)
        if notes:
            blocks.append("What limits the goals not met\n" + "\n".join(f"* {n}" for n in notes))
    return "\n\n".join(blocks)


def settings_lines(results: dict) -> list[str]:
    settings, machine = results["settings"], results["machine"]
    grids = "; ".join(f"{name}: {', '.join(format_number(lr) for lr in grid)}"
                      for name, grid in settings["lr_grids"].items())
    return [
        f"- command: `{settings['command']}`",
        f"- machine: {machine['cpu_model']}, {machine['logical_cpus']} logical CPUs, torch "
        f"{machine['packages'].get('torch')}, {machine['torch_threads']} torch threads, Python "
        f"{machine['python']}, commit {machine.get('git_commit')}",
        f"- load average (1 min) at start and end: {settings.get('load_average_start')} / "
        f"{settings.get('load_average_end')} (other processes on the machine inflate wall-clock times)",
        "- optimizers: " + "; ".join(f"{name} = {label}" for name, label in
                                     settings["optimizer_labels"].items()),
        f"- seeds {settings['seeds']}; lr grid of {settings['grid_size']} points per optimizer, "
        f"{settings['grid_decades']:g} decades wide: {grids}",
        "- protocol: every lr of the grid on the first seed, the lr with the lowest final training "
        "loss on the remaining seeds, medians over the seeds at that lr; time is the training "
        "steps alone (closure + step, evaluation excluded), summed with time.perf_counter; "
        f"subnormal floats flushed to zero: {settings.get('flush_denormal')}",
        f"- memory: {machine['memory_note']}",
    ]


def markdown_report(results: dict, plot_files: dict[str, str]) -> str:
    parts = ["# Benchmark: FisherDescent against SGD and Adam", "", *settings_lines(results), "",
             "## Overview", "", "Medians over the seeds at each optimizer's chosen lr; ratios below 1 "
             "favour ngopt; `<=` where the baseline never reached the target.", "",
             overview(results, markdown=True), ""]
    for entry in results["tasks"]:
        parts += [f"## {entry['task']}", "", entry["description"] + ".", "",
                  f"Target training loss {entry['target_loss']:g}: {entry['target_reason']}", "",
                  task_block(entry, markdown=True, threads=results["settings"].get("threads")), ""]
        if entry["task"] in plot_files:
            parts += [f"![{entry['task']} training loss]({plot_files[entry['task']]})", ""]
    if results["goals"]:
        parts += ["## Goals", "", format_table(["goal", "measured ngopt/baseline", "status"],
                                               goal_rows(results), markdown=True), ""]
        notes = closing_notes(results)
        if notes:
            parts += ["## What limits the goals not met", ""] + [f"- {note}" for note in notes] + [""]
    return "\n".join(parts)
