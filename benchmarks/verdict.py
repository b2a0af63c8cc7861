"""The one-screen verdict: per task, who reached the target first in wall-clock, and by how much,
and the untuned fisher-descent row against the best of the baselines (the first of them to the target).

Built from the results dict alone (the content of results.json), so the
console and report.md say the same thing.
"""

from __future__ import annotations

from typing import Optional

from benchmarks.comparison import best_baseline
from benchmarks.optimizers import HEADLINE
from benchmarks.report_format import contention_warning, format_number

HELD_OUT_HEADING = "Held-out problems (defaults never tuned on these)"
HEADING = ("Verdict: wall-clock time to the target training loss, medians over seeds "
           "(training steps only, evaluation excluded)")


def _seconds(summary: dict) -> Optional[float]:
    return summary["seconds_to_target"]


def _seeds_note(summary: dict) -> str:
    return "" if summary["reached"] == summary["runs"] else \
        f", reached on {summary['reached']} of {summary['runs']} seeds"


def _who(name: str, summary: dict) -> str:
    return name if summary["lr_tuned"] else f"{name} (untuned)"


def _against_best_baseline(summaries: dict, said: Optional[str]) -> str:
    """fisher-descent's time over the best baseline's, when both reached the target and the
    sentence has not set the two side by side already (``said``: the baseline it compared with)."""
    best = best_baseline(summaries)
    method = summaries.get(HEADLINE)
    if best is None or best == said or method is None or _seconds(method) is None or \
            _seconds(summaries[best]) is None:
        return ""
    return (f"; {HEADLINE} (untuned) took {_seconds(method) / _seconds(summaries[best]):.2f}× the time of "
            f"the best baseline, {best}")


def _first_to_target(reached: list[tuple[str, dict]], summaries: dict) -> str:
    """Who reached the target first, against the next fastest and fisher-descent against the best baseline."""
    winner, first = reached[0]
    text = f"{_who(winner, first)} reached the target first, in {_seconds(first):.3g} s{_seeds_note(first)}"
    said = None
    if len(reached) > 1:
        runner, second = reached[1]
        text += (f"; that is {_seconds(first) / _seconds(second):.2f}× {runner}'s time "
                 f"({_seconds(second):.3g} s), the next fastest")
        said = runner if winner == HEADLINE else None
    return text + _against_best_baseline(summaries, said)


def task_verdict(entry: dict, threads: Optional[int]) -> str:
    """One plain sentence (or two) on one task."""
    summaries = entry["summary"]
    reached = sorted(((name, s) for name, s in summaries.items() if _seconds(s) is not None),
                     key=lambda item: _seconds(item[1]))
    missed = [name for name, s in summaries.items() if _seconds(s) is None]
    head = f"{entry['task']} (target {entry['target_loss']:g}, {entry['steps']} steps): "
    if not reached:
        finals = [(name, s["final_train_loss"]) for name, s in summaries.items()
                  if s["final_train_loss"] is not None]
        text = head + "no optimizer reached the target"
        if finals:
            best_name, best_loss = min(finals, key=lambda item: item[1])
            text += f"; the lowest final training loss was {best_name}'s, {format_number(best_loss)}"
    else:
        text = head + _first_to_target(reached, summaries)
        if missed:
            text += f"; {', '.join(missed)} did not reach it"
    text += "."
    if not entry.get("complete", True):
        text += f" Unfinished: only {entry['finished_runs']} of {entry['planned_runs']} runs finished."
    if contention_warning(entry.get("load_average_max"), threads):
        text += f" [load {entry['load_average_max']:.1f}]"
    return text


def caution(results: dict) -> Optional[str]:
    """One warning for every task whose runs shared the CPU with other work (marked [load L])."""
    threads = results["settings"].get("threads")
    loads = [entry.get("load_average_max") for entry in results["tasks"]
             if contention_warning(entry.get("load_average_max"), threads)]
    if not loads:
        return None
    text = (f"Caution [load L]: the machine's load average reached L (up to {max(loads):.1f}) with {threads} "
            "torch thread(s): other processes competed for the CPU, so those wall-clock times are inflated "
            "and noisy; compare them only with the others of the same task.")
    if threads and threads > 1:
        # measured: digits_autoencoder SGD steps 33x slower at 2 threads than at 1 beside one busy process
        text += (" On a busy machine several torch threads wait for each other and can slow every step many "
                 "times over; --threads 1 suffers least.")
    return text


def verdict_lines(results: dict, held_out: bool = False) -> list[str]:
    """One line per task of the tuning set, or (``held_out``) per held-out task."""
    threads = results["settings"].get("threads")
    return [task_verdict(entry, threads) for entry in results["tasks"] if bool(entry.get("held_out")) == held_out]


def verdict_text(results: dict, markdown: bool = False) -> str:
    lines, held_out, warning = verdict_lines(results), verdict_lines(results, held_out=True), caution(results)
    if markdown:
        parts = ["## Verdict", "", HEADING + "."] + ([""] + [f"- {line}" for line in lines] if lines else [])
        if held_out:
            parts += ["", f"{HELD_OUT_HEADING}:", ""] + [f"- {line}" for line in held_out]
        return "\n".join(parts + (["", warning] if warning else []))
    parts = [HEADING] + [f"* {line}" for line in lines]
    if held_out:
        parts += [f"{HELD_OUT_HEADING}:"] + [f"* {line}" for line in held_out]
    return "\n".join(parts + ([warning] if warning else []))
