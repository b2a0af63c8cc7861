"""The report's text: warnings found in a log, tables of the latest step, the summary."""
from __future__ import annotations

import math
from numbers import Real

import numpy as np

from .series import (CONDITION_WARNING, DAMPING_DOMINATES_FRACTION, DAMPING_DOMINATES_SPREAD, LOSS_NOT_LOGGED, PROBE_ANGLE_WARNING_DEG, SKIPPED_WARNING_FRACTION, _get, _number, _text, layer_names, series)
from ..fisher_probe import far_from_fisher

from .plots import time_split, last_probe, has_step_rule


def _condition_warnings(records: list) -> list:
    tail = records[-max(1, math.ceil(len(records) / 4)):]
    found = []
    for name in layer_names(records):
        values = [_number(_get(r, ("layers", name, "condition"))) for r in tail]
        values = [v for v in values if v == v]
        if values and min(values) > CONDITION_WARNING:
            lam = _number(_get(tail[-1], ("update", "damping")))
            found.append(f"layer {name}: the damped condition number stays above {CONDITION_WARNING:.0e} "
                         f"over the last {len(tail)} records (final {values[-1]:.3g}) with damping "
                         f"lambda = {lam:.3g}; raise the damping or check this layer's inputs")
    return found


def _skip_warnings(record: dict) -> list:
    steps = record.get("step", 0) or 0
    skipped = record.get("skipped_steps", 0) or 0
    if steps and skipped / steps > SKIPPED_WARNING_FRACTION:
        reasons = ", ".join(f"{k}: {v}" for k, v in (record.get("skip_reasons") or {}).items() if v)
        return [f"{skipped} of {steps} steps were skipped ({100 * skipped / steps:.1f}%; {reasons or 'no reason given'})"]
    return []


def _update_warnings(records: list) -> list:
    found = []
    _, cosine = series(records, "update", "cosine")
    bad = int(np.sum(np.nan_to_num(cosine, nan=1.0) <= 0))
    if bad:
        found.append(f"{bad} records have cosine <= 0 between gradient and update: the step did not "
                     "point downhill (the preconditioner should be positive definite)")
    _, trust = series(records, "update", "trust_scale")
    trust = trust[np.isfinite(trust)]
    if trust.size and np.median(trust) < 0.5:
        found.append(f"the KL trust bound shrinks most steps (median scale {np.median(trust):.3g}): "
                     "the effective step size is well below lr")
    return found


def _probe_warnings(records: list) -> list:
    found = last_probe(records)
    if found is None:
        return []
    step, probe = found
    messages = [f"at step {step}: {text}" for text in far_from_fisher(probe, PROBE_ANGLE_WARNING_DEG)]
    for name, entry in (probe.get("layers") or {}).items():
        block_angle = _number(entry.get("block_angle_deg"))
        if block_angle > PROBE_ANGLE_WARNING_DEG:
            messages.append(f"layer {name}: the optimizer's direction is {block_angle:.0f} degrees from the "
                            f"exact natural gradient at step {step}")
    return messages


def _damping_panels(entry: dict, lam: float) -> list:
    """(values, max, damping added, name) per curvature part that damping is added to."""
    kronecker = entry.get("structure") == "kfac"  # EKFAC adds lambda to its scales, not to A and G
    parts = []
    if kronecker:
        parts += [("in", _number(entry.get("in_damping")), "input factor A"),
                  ("out", _number(entry.get("out_damping")), "output-gradient factor G")]
    parts += [("diag", lam, "diagonal Fisher"), ("scale", lam, "EKFAC scales"),
              ("pair_eig", lam, "norm-layer (gamma, beta) blocks")]
    panels = []
    for prefix, shift, name in parts:
        values_key = f"{prefix}_eigenvalues" if prefix in ("in", "out") else f"{prefix}_values"
        largest_key = f"{prefix}_eig_max" if prefix in ("in", "out") else f"{prefix}_max"
        values = entry.get(values_key)
        largest = _number(entry.get(largest_key))
        if math.isfinite(largest) and math.isfinite(shift):
            panels.append((values if isinstance(values, list) and values else None, largest, shift, name))
    return panels


def damping_dominance(records: list) -> list:
    """Layers where (nearly) every eigenvalue of a factor lies under the damping added to it.

    Dominated: at least ``DAMPING_DOMINATES_FRACTION`` of the eigenvalues under
    the damping and the largest within ``DAMPING_DOMINATES_SPREAD`` times it, so
    the damped factor is close to a multiple of the identity in every direction
    (a few large eigenvalues above the damping still shape the step, and are
    not called dominated).  Reads the final record: the full spectra where
    logged (JSONL), else the largest eigenvalue (CSV: every eigenvalue under).
    """
    final = records[-1]
    lam = _number(_get(final, ("update", "damping")))
    found = []
    for name, entry in (final.get("layers") or {}).items():
        for values, largest, shift, part in _damping_panels(entry, lam):
            if values is not None:
                under, total = sum(1 for v in values if _number(v) < shift), len(values)
                dominated = under >= DAMPING_DOMINATES_FRACTION * total and largest < DAMPING_DOMINATES_SPREAD * shift
                count = f"{under} of {total} eigenvalues"
            else:
                dominated, count = largest < shift, "every eigenvalue"
            if dominated:
                found.append(f"layer {name}: damping dominates the {part}: {count} lie under the damping added to "
                             f"it ({shift:.3g}, lambda = {lam:.3g}; largest eigenvalue {largest:.3g}) at step "
                             f"{final['step']}; the step there is mostly the gradient scaled by 1/damping. Lower "
                             "damping (or use damping_rule='lm') if this persists")
    return found


def _format_table(rows: list) -> list:
    widths = [max(len(str(row[i])) for row in rows) for i in range(len(rows[0]))]
    return ["  " + "  ".join(str(cell).ljust(w) for cell, w in zip(row, widths)).rstrip() for row in rows]


def _layer_table(record: dict) -> list:
    rows = [("layer", "kind", "A dim", "G dim", "cond damped", "cond A", "cond G", "eig A min..max", "eig G min..max")]
    for name, e in (record.get("layers") or {}).items():
        rows.append((name, f"{e.get('block', '?')}/{e.get('structure', '?')}", e.get("in_dim", "-"),
                     e.get("out_dim", "-"), f"{_number(e.get('condition')):.3g}",
                     f"{_number(e.get('in_condition')):.3g}", f"{_number(e.get('out_condition')):.3g}",
                     f"{_number(e.get('in_eig_min')):.2e}..{_number(e.get('in_eig_max')):.2e}",
                     f"{_number(e.get('out_eig_min')):.2e}..{_number(e.get('out_eig_max')):.2e}"))
    return _format_table(rows) if len(rows) > 1 else ["  (no curvature blocks)"]


def _time_lines(record: dict) -> list:
    split = time_split(record)
    total = sum(split.values())
    if total <= 0:
        return ["  (no timing)"]
    width = max(len(key) for key in split)
    return [f"  {key:<{width}} {seconds:9.3f} s  {100 * seconds / total:5.1f}%" for key, seconds in split.items()]


def _logging_cost_line(records: list) -> str:
    final = records[-1]
    log_seconds = _number(final.get("log_seconds"))
    step_total = _number(_get(final, ("time", "step_total")))
    if not math.isfinite(log_seconds):
        return "logging cost: not recorded"
    per_record = log_seconds / max(len(records) - 1, 1)
    share = f", {100 * log_seconds / step_total:.2f}% of the time in step()" if step_total > 0 else ""
    return f"logging cost: {log_seconds:.4f} s in total, {1e3 * per_record:.2f} ms per record{share}"


PROBE_COLUMNS = (
    ("block error", "the optimizer's block (running statistics) against the exact Fisher F of the probe batch"),
    ("fresh error", "the same structure built from the probe batch alone (exact expectation): the structure's "
                    "own error"),
    ("stats gap", "the running statistics against the probe batch's (lag of the average, Monte Carlo noise)"),
    ("trace C/F", "trace of the optimizer's block over the trace of F"),
    ("block angle", "damped direction (C + lambda I)^-1 g against (F + lambda I)^-1 g"),
    ("diag error/angle", "the diagonal of F itself as the approximation"),
    ("F eig < lambda", "share of F's eigenvalues under the damping: near 100%, every damped direction is close "
                       "to g / lambda and small angles say little"),
)


def _percent(share) -> str:
    number = _number(share)
    return "-" if math.isnan(number) else f"{100 * number:.0f}%"


def _probe_row(name: str, e: dict) -> tuple:
    ratio = _number(e.get("block_trace")) / _number(e.get("exact_trace")) if _number(e.get("exact_trace")) else math.nan
    return (name, e.get("params", "-"), _text(e.get("block_error")), _text(e.get("fresh_error")),
            _text(e.get("statistics_gap")), _text(ratio), f"{_text(e.get('block_angle_deg'), '.1f')} deg",
            f"{_text(e.get('diag_error'))} / {_text(e.get('diag_angle_deg'), '.1f')} deg",
            _percent(e.get("exact_below_damping")),
            f"{_text(e.get('empirical_vs_sampled_angle_deg'), '.1f')} deg")


def _probe_lines(records: list) -> list:
    found = last_probe(records)
    if found is None:
        return []
    step, probe = found
    lines = [f"Fisher probe (step {step}, {probe.get('batch_size', '?')} examples; errors are relative "
             "Frobenius errors of the undamped matrices, 1 = as far as the zero matrix):"]
    rows = [("layer", "params") + tuple(title for title, _ in PROBE_COLUMNS) + ("emp/sampled angle",)]
    rows += [_probe_row(name, e) for name, e in (probe.get("layers") or {}).items()]
    if len(rows) > 1:
        lines += _format_table(rows)
        lines += [f"    {title}: {meaning}" for title, meaning in PROBE_COLUMNS]
    skipped = probe.get("skipped_layers") or {}
    lines += [f"  {name}: not probed ({why})" for name, why in skipped.items()]
    angle = _number(probe.get("empirical_vs_sampled_angle_deg"))
    if angle == angle:
        lines.append(f"  all probed layers together: optimizer's direction {_number(probe.get('block_angle_deg')):.1f} "
                     f"deg from the exact natural gradient; empirical vs sampled Fisher {angle:.1f} deg apart")
    return lines


def _loss_text(records: list) -> str:
    steps, loss = series(records, "update", "loss")
    logged = np.flatnonzero(np.isfinite(loss))
    if not logged.size:
        return LOSS_NOT_LOGGED
    last = logged[-1]
    at = "" if last == len(records) - 1 else f" (step {int(steps[last])}, the latest logged)"
    return _text(loss[last], ".4g") + at


def summarize(records: list, source: str = "log") -> tuple[str, list]:
    """The text summary and the list of warnings."""
    if not records:
        raise ValueError(f"{source}: the log holds no records")
    final = records[-1]
    warnings_found = (_condition_warnings(records) + damping_dominance(records) + _skip_warnings(final)
                      + _update_warnings(records) + _probe_warnings(records))
    update = final.get("update") or {}
    wall = [r.get("wall_time") for r in records if isinstance(r.get("wall_time"), Real)]
    lines = [f"ngopt diagnostics report for {source}",
             f"records: {len(records)} (steps {records[0]['step']} .. {final['step']})"
             + (f", {wall[-1] - wall[0]:.1f} s of wall time between first and last" if len(wall) > 1 else ""),
             f"final: loss {_loss_text(records)}, damping {_text(update.get('damping'))}, "
             f"lr {_text(update.get('lr'))}",
             f"skipped steps: {final.get('skipped_steps', 0)} of {final['step']}",
             _logging_cost_line(records), "",
             f"curvature blocks at step {final['step']}:", *_layer_table(final), "",
             "time split (cumulative):", *_time_lines(final)]
    probe = _probe_lines(records)
    if probe:
        lines += ["", *probe]
    if not has_step_rule(records):
        lines += ["", "step rule: no alpha/mu/reduction-ratio records (step_rule='quadratic' logs them); "
                      "step_rule.png not drawn"]
    lines += ["", "warnings:"] + ([f"  - {w}" for w in warnings_found] or ["  (none)"])
    return "\n".join(lines) + "\n", warnings_found


