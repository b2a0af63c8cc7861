"""Console tables and report.md, both built from the results dict (the content of results.json)."""

from __future__ import annotations

from typing import Optional

from benchmarks.comparison import FLOP_ESTIMATE_TEXT, describe_ratio, step_time_breakdown
from benchmarks.optimizers import BASELINES, HEADLINE
from benchmarks.report_format import contention_warning, format_number, format_table
from benchmarks.training import CURVATURE_PARTS
from benchmarks.verdict import HELD_OUT_HEADING, verdict_text

HELD_OUT_NOTE = (f"{HEADLINE}'s defaults are chosen on the built-in tasks and only checked on these: a default "
                 "change that makes one of them more than 10% slower to its target is not taken.")

TABLE_HEADERS = ["optimizer", "lr", "reached", "steps to target", "s to target",
                 "final train loss", "test {metric}", "step ms (median)"]


def lr_text(summary: dict) -> str:
    if summary["lr_tuned"]:
        return format_number(summary["best_lr"])
    return f"{format_number(summary['best_lr'])} (default)"


def metric_text(value: Optional[float], metric: Optional[str]) -> str:
    if value is None:
        return "-"
    return f"{100 * value:.1f}%" if metric == "accuracy" else format_number(value)


def task_rows(entry: dict) -> list[list[str]]:
    rows = []
    for name, summary in entry["summary"].items():
        rows.append([
            name,
            lr_text(summary),
            f"{summary['reached']}/{summary['runs']}",
            format_number(summary["steps_to_target"]),
            format_number(summary["seconds_to_target"]),
            format_number(summary["final_train_loss"]),
            metric_text(summary["final_test_metric"], entry["test_metric"]),
            format_number(summary["step_seconds_median"] * 1e3),
        ])
    return rows


def ratio_lines(entry: dict) -> list[str]:
    """Time-to-target and step-time ratios of fisher-descent over each baseline, with the flop-count estimate."""
    comparison = entry["comparison"]
    lines = []
    if comparison["time_to_target"]:
        best = comparison["best_baseline"]
        lines.append(f"best baseline: {best}; time to target {HEADLINE}/{best}: "
                     f"{describe_ratio(comparison['time_to_target'][best])}")
        lines.append("time to target, " + "; ".join(
            f"{HEADLINE}/{name}: {describe_ratio(value)}" for name, value in comparison["time_to_target"].items()))
        lines.append("steps to target, " + "; ".join(
            f"{HEADLINE}/{name}: {describe_ratio(value)}" for name, value in comparison["steps_to_target"].items()))
        step_parts = [f"{HEADLINE}/{name}: {value:.2f}" for name, value in comparison["step_time"].items()]
        line = "median step time, " + "; ".join(step_parts)
        if comparison["step_time_flop_estimate"] is not None:
            line += (f"  [flop-count estimate 1 + 2d/(3B) = {comparison['step_time_flop_estimate']:.2f} "
                     f"over sgd, with d = {comparison['estimate_width']} (widest hidden width) and B = "
                     f"{comparison['estimate_batch']}]")
        lines.append(line)
    return lines


def curvature_free_line(entry: dict) -> Optional[str]:
    """fisher-descent's time to target with its curvature work free, against the best baseline."""
    comparison = entry["comparison"]
    ratio = comparison.get("curvature_free_time")
    method = entry["summary"].get(HEADLINE)
    if ratio is None or ratio["relation"] != "measured":  # no baseline reached it: fisher-descent leads already
        return None
    free, whole = method["curvature_free_seconds_to_target"], method["seconds_to_target"]
    best = comparison["best_baseline"]
    verdict = ("cheaper curvature alone could not put it ahead here: only fewer steps or a cheaper rest of "
               "the step could" if ratio["ratio"] > 1 else "cheaper curvature could put it ahead here")
    return (f"with its curvature work free ({', '.join(CURVATURE_PARTS)}: {format_number(whole - free)} of its "
            f"{format_number(whole)} s to target), {HEADLINE} would have taken {format_number(free)} s, "
            f"{ratio['ratio']:.2f}× {best}'s time; {verdict}")


def floor_line(entry: dict) -> Optional[str]:
    """fisher-descent's time to target had each step cost a baseline step plus its preconditioning."""
    floor = entry["comparison"].get("preconditioning_floor_time")
    if floor is None:  # fisher-descent did not reach the target, kept no timers, or no baseline ran
        return None
    method = entry["summary"][HEADLINE]
    step = entry["summary"][floor["step_of"]]["step_seconds_median"]
    best = entry["comparison"]["best_baseline"]
    if floor["relation"] == "at_most":
        return (f"had every step cost {floor['step_of']}'s median step ({format_number(step * 1e3)} ms) plus its "
                f"preconditioning products, {HEADLINE} would have taken {format_number(floor['seconds'])} s "
                "(no baseline reached the target)")
    verdict = ("no cheaper curvature, hooks or rules could put it ahead at these steps: only fewer steps could"
               if floor["ratio"] > 1 else "a cheaper rest of its step could put it ahead, or further ahead, here")
    return (f"had every step cost {floor['step_of']}'s median step ({format_number(step * 1e3)} ms) plus its "
            f"preconditioning products ({format_number(method['precondition_seconds_to_target'])} s in all), "
            f"{HEADLINE} would have taken {format_number(floor['seconds'])} s, {floor['ratio']:.2f}× {best}'s time; "
            f"{verdict}")


def split_line(entry: dict) -> Optional[str]:
    """fisher-descent's mean time per step by part, from FisherDescent's own timers."""
    summary = entry["summary"].get(HEADLINE)
    split = summary and summary.get("time_split_per_step")
    if not split:
        return None
    total = sum(split.values())
    parts = ", ".join(f"{key} {value * 1e3:.2f} ms ({100 * value / total:.0f}%)"
                      for key, value in split.items() if total > 0)
    return f"{HEADLINE} time per step (median over seeds): {parts}; rest = forward/backward and untimed work"


def coverage_line(entry: dict) -> Optional[str]:
    """The share of parameters that FisherDescent left to its fallback rule, where any."""
    for name, summary in entry["summary"].items():
        coverage = summary.get("parameter_coverage")
        if coverage and coverage.get("fallback_parameters"):
            reasons = coverage.get("fallback_reasons") or {}
            tensors = ", ".join(f"{t} ({reasons[t]})" if t in reasons else t for t in coverage["fallback_tensors"][:6])
            more = len(coverage["fallback_tensors"]) - 6
            return (f"{100 * coverage['fallback_share']:.1f}% of the parameters "
                    f"({coverage['fallback_parameters']} of {coverage['parameters']}) have no curvature block "
                    f"and took the fallback rule ({name}): {tensors}" + (f" and {more} more" if more > 0 else ""))
    return None


def parts_line(entry: dict) -> Optional[str]:
    """Which share of the parameters each part of a composite optimizer (the muon row) updates."""
    texts = []
    for name, summary in entry["summary"].items():
        coverage = summary.get("parameter_coverage") or {}
        if "parts" in coverage:
            total = coverage["parameters"]
            shares = ", ".join(f"{part} {count} ({100 * count / total:.1f}%)"
                               for part, count in coverage["parts"].items())
            texts.append(f"{name} updates {total} parameters: {shares}")
    return "; ".join(texts) or None


def memory_line(entry: dict) -> str:
    """Optimizer state size, resident memory left behind (per run alone, or by the task's runs in turns), and the
    process peak."""
    state = ", ".join(f"{name} {summary['optimizer_state_bytes'] / 1024:.1f} KiB"
                      for name, summary in entry["summary"].items())
    growth = ", ".join(f"{name} {summary['rss_growth_bytes'] / 2**20:+.0f} MiB"
                       for name, summary in entry["summary"].items()
                       if summary.get("rss_growth_bytes") is not None)
    peak = max(summary["process_peak_rss_bytes"] for summary in entry["summary"].values())
    line = f"optimizer state: {state}; process peak RSS so far {peak / 2**20:.0f} MiB"
    if growth:
        line += f"; resident memory left behind per run (median): {growth}"
    if entry.get("rss_growth_bytes") is not None:
        line += (f"; resident memory left behind by the task's {entry['finished_runs']} runs in turns: "
                 f"{entry['rss_growth_bytes'] / 2**20:+.0f} MiB")
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


def progress_line(entry: dict) -> Optional[str]:
    if entry.get("complete", True):
        return None
    return (f"unfinished: {entry['finished_runs']} of {entry['planned_runs']} runs finished; the figures "
            "above cover those runs only (an lr may be chosen from part of its grid)")


def task_header(entry: dict) -> str:
    seeds = max(summary["runs"] for summary in entry["summary"].values())
    held_out = " (held-out: defaults never tuned on it)" if entry.get("held_out") else ""
    return (f"{entry['task']}{held_out}: target training loss {entry['target_loss']:g}; {entry['steps']} steps, "
            f"batch {entry['batch_size']}, medians over {seeds} seed(s)")


def task_block(entry: dict, markdown: bool = False, threads: Optional[int] = None) -> str:
    headers = [h.format(metric=entry["test_metric"] or "metric") for h in TABLE_HEADERS]
    warning = contention_warning(entry.get("load_average_max"), threads)
    notes = ratio_lines(entry) + [line for line in (
        step_time_breakdown(entry, "sgd"), curvature_free_line(entry), floor_line(entry), split_line(entry),
        coverage_line(entry), parts_line(entry), memory_line(entry),
        reference_line(entry), progress_line(entry),
        warning and f"warning: {warning}; the runs were interleaved across optimizers to spread the effect",
    ) if line]
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


def baselines_run(results: dict) -> list[str]:
    """The baselines this benchmark ran, in the registry's order."""
    chosen = results["settings"].get("optimizers", [])
    return [name for name in BASELINES if name in chosen]


def step_time_text(comparison: dict) -> str:
    step_ratio = comparison["step_time"].get("sgd")
    estimate = comparison["step_time_flop_estimate"]
    text = "-" if step_ratio is None else f"{step_ratio:.2f}"
    if step_ratio is not None and estimate is not None:
        text += f" (flop estimate {estimate:.2f})"
    return text


def overview_rows(results: dict, entries: list[dict]) -> list[list[str]]:
    """One row per task entry: median time (steps) to target per optimizer, the best baseline and
    fisher-descent's time ratio to it, and its step-time ratio to sgd."""
    rows = []
    for entry in entries:
        summaries, comparison = entry["summary"], entry["comparison"]
        best = comparison["best_baseline"]
        rows.append([
            entry["task"], f"{entry['target_loss']:g}",
            *[_time_and_steps(summaries.get(name)) for name in [HEADLINE] + baselines_run(results)],
            best or "-", describe_ratio(comparison["time_to_target"].get(best)).split(" (")[0],
            describe_ratio(comparison.get("curvature_free_time")).split(" (")[0],
            describe_ratio(comparison.get("preconditioning_floor_time")).split(" (")[0],
            step_time_text(comparison),
        ])
    return rows


def overview_headers(results: dict) -> list[str]:
    return ["task", "target", f"{HEADLINE} (untuned): time (steps) to target", *baselines_run(results),
            "best baseline", f"time {HEADLINE}/best", f"time {HEADLINE}/best, curvature work free",
            f"time {HEADLINE}/best, baseline step + preconditioning",
            f"step time {HEADLINE}/sgd"]


def overview(results: dict, entries: list[dict], markdown: bool = False) -> str:
    return format_table(overview_headers(results), overview_rows(results, entries), markdown)


def tuning_and_held_out(results: dict) -> tuple[list[dict], list[dict]]:
    """The task entries split into the tasks defaults may be tuned on and the held-out ones."""
    return ([entry for entry in results["tasks"] if not entry.get("held_out")],
            [entry for entry in results["tasks"] if entry.get("held_out")])


def stop_note(results: dict) -> Optional[str]:
    """Where an unfinished benchmark stopped (None when it finished)."""
    status = results.get("status", {})
    if status.get("complete", True):
        return None
    return (f"This benchmark is unfinished ({status['reason']}): {status['finished_runs']} of "
            f"{status['planned_runs']} runs finished, {status['at']}. Everything below comes from the "
            "finished runs.")


def console_summary(results: dict, with_tasks: bool = True) -> str:
    """The task tables (unless already printed), the overview, and the verdict last."""
    threads = results["settings"].get("threads")
    blocks = [task_block(entry, threads=threads) for entry in results["tasks"]] if with_tasks else []
    tuning, held_out = tuning_and_held_out(results)
    legend = (f"medians over seeds; {HEADLINE} at its defaults, the baselines at their chosen lr; "
              "best baseline: the first to the target")
    if tuning:
        blocks.append(f"Overview ({legend})\n" + overview(results, tuning))
    if held_out:
        blocks.append(f"{HELD_OUT_HEADING}: overview ({legend})\n" + overview(results, held_out) + "\n"
                      + HELD_OUT_NOTE)
    if results["tasks"]:
        blocks.append(verdict_text(results))
    blocks += wall_time_lines(results)
    note = stop_note(results)
    if note:
        blocks.append(note)
    return "\n\n".join(blocks)


def settings_lines(results: dict) -> list[str]:
    settings, machine = results["settings"], results["machine"]
    grids = "; ".join(f"{name}: {', '.join(format_number(lr) for lr in grid)}"
                      for name, grid in settings["lr_grids"].items() if grid != [None])
    untuned = [name for name, grid in settings["lr_grids"].items() if grid == [None]]
    lines = [
        f"- command: `{settings['command']}`",
        f"- machine: {machine['cpu_model']}, {machine['logical_cpus']} logical CPUs, torch "
        f"{machine['packages'].get('torch')}, {machine['torch_threads']} torch threads, Python "
        f"{machine['python']}, commit {machine.get('git_commit')}",
        f"- load average (1 min) at start and end: {settings.get('load_average_start')} / "
        f"{settings.get('load_average_end')} (other processes on the machine inflate wall-clock times)",
        *("- " + line for line in wall_time_lines(results)),
        "- optimizers: " + "; ".join(f"{name} = {label}" for name, label in
                                     settings["optimizer_labels"].items())
        + "".join(f"; skipped: {name} ({reason})" for name, reason in
                  settings.get("skipped_optimizers", {}).items()),
        f"- seeds {settings['seeds']}; lr grid of {settings['grid_size']} points per tuned optimizer, "
        f"{settings['grid_spacing_decades']:g} decade apart ({settings['grid_decades']:g} decades wide): "
        f"{grids or 'none'}"
        + (f"; not tuned (built without an lr, one run per seed): {', '.join(untuned)}" if untuned else ""),
        "- protocol: every lr of the grid on the first seed, the lr with the lowest final training "
        "loss on the remaining seeds, medians over the seeds at that lr; time is the training "
        "steps alone (closure + step, evaluation excluded), summed with time.perf_counter; "
        f"subnormal floats flushed to zero: {settings.get('flush_denormal')}",
        f"- evaluation: {settings['evaluation']}",
        f"- memory: {machine['memory_note']}",
    ]
    if any(entry["comparison"]["step_time_flop_estimate"] is not None for entry in results["tasks"]):
        lines.append(f"- step-time ratios: {FLOP_ESTIMATE_TEXT}")
    return lines


def format_duration(seconds: float) -> str:
    """``"6 min 17 s"``; under a minute ``"42.4 s"``."""
    if seconds < 59.95:
        return f"{seconds:.1f} s"
    minutes, rest = divmod(round(seconds), 60)
    return f"{minutes} min {rest} s"


def wall_time_lines(results: dict) -> list[str]:
    """How long the whole benchmark ran and how much of it the timed training steps took."""
    wall = results["settings"].get("wall_seconds")
    if wall is None:
        return []
    training = sum(run.get("train_seconds") or 0.0 for entry in results["tasks"] for run in entry["runs"])
    return [f"the benchmark ran {format_duration(wall)} of wall-clock time in all, of which the timed training steps "
            f"of all runs took {format_duration(training)}; the rest is the evaluations of the training loss, "
            "building the models and data, and writing the files"]


def markdown_report(results: dict, plot_files: dict[str, str]) -> str:
    parts = ["# Benchmark: FisherDescent against tuned baselines", ""]
    note = stop_note(results)
    if note:
        parts += [f"**{note}**", ""]
    parts += [verdict_text(results, markdown=True), "", "## Settings", "", *settings_lines(results), "",
              "## Overview", "", f"Medians over the seeds ({HEADLINE} at its defaults, the baselines at their "
              f"chosen lr); the best baseline is the one that reached the target first (the lowest final "
              f"training loss where none did); ratios below 1 favour {HEADLINE}; `<=` where the baseline never "
              "reached the target.",
              ""]
    tuning, held_out = tuning_and_held_out(results)
    if tuning:
        parts += [overview(results, tuning, markdown=True), ""]
    if held_out:
        parts += [f"## {HELD_OUT_HEADING}", "", HELD_OUT_NOTE, "", overview(results, held_out, markdown=True), ""]
    for entry in tuning + held_out:
        parts += [f"## {entry['task']}" + (" (held-out)" if entry.get("held_out") else ""), "",
                  entry["description"] + ".", "",
                  f"Target training loss {entry['target_loss']:g}: {entry['target_reason']}", "",
                  task_block(entry, markdown=True, threads=results["settings"].get("threads")), ""]
        if entry["task"] in plot_files:
            parts += [f"![{entry['task']} training loss]({plot_files[entry['task']]})", ""]
    return "\n".join(parts)
