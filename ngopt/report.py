"""Figures and a text summary from a diagnostics log.

    python -m ngopt.report run.jsonl --out DIR

writes into DIR (only the figures the log has data for):

=========================  ==========================================================
file                       message
=========================  ==========================================================
``spectra_<layer>.png``    each Kronecker factor's eigenvalue spectrum over training
                           (steps across, eigenvalues up, log colour for the count
                           per bin) against the damping added to that factor
``conditioning.png``       condition numbers per layer, damped block and raw factors
``damping.png``            lambda over steps and its split between the two factors
``update.png``             gradient and update norms, their cosine, trust scaling, KL
``loss.png``               loss and the quadratic model's reduction ratio
``time.png``               where the optimizer's time goes, per step and in total
``probe.png``              Fisher-probe errors and angles per layer (when logged)
``step_rule.png``          the quadratic step rule's multipliers alpha and mu, the
                           reduction ratio rho, the damping lambda, and the
                           predicted against the measured loss change (when logged)
``summary.txt``            plain-text summary with warnings
=========================  ==========================================================

A CSV log works too, without the spectra (CSV leaves lists out).
"""

from __future__ import annotations

import argparse
import math
import re
import sys
from numbers import Real
from pathlib import Path

import numpy as np

from .diagnostic_keys import STEP_TIME, STEP_TOTAL
from .diagnostics_log import read_log
from .fisher_probe import DAMPING_DOMINATES_SHARE, far_from_fisher

__all__ = ["write_report", "summarize", "main"]

CONDITION_WARNING = 1e8          # damped condition number called ill-conditioned
SKIPPED_WARNING_FRACTION = 0.05  # share of skipped steps called "many"
PROBE_ANGLE_WARNING_DEG = 45.0   # angle between directions called "far apart"
DAMPING_DOMINATES_FRACTION = 0.9  # share of a factor's eigenvalues under its damping called "dominated"
DAMPING_DOMINATES_SPREAD = 10.0   # ... while the largest is within this factor of the damping
STEP_RULE_KEYS = ("alpha", "mu", "reduction_ratio", "damping", "predicted_change", "actual_change")
LOSS_NOT_LOGGED = ("not logged (call handle.note_loss(loss) after loss.backward(), "
                   "or pass a closure to opt.step)")
# Display names of the parts timed outside step() (diagnostic_keys.PASS_TIME); others show their key.
OUTSIDE_STEP_LABELS = {"capture": "capture hooks (in forward/backward)",
                       "extra_backward": "extra backward (sampled/exact Fisher)",
                       "statistics_in_backward": "statistics formed in the extra backward"}


# --------------------------------------------------------------------------
# reading series out of records
# --------------------------------------------------------------------------

def _number(value) -> float:
    if isinstance(value, Real) and not isinstance(value, bool):
        return float(value)
    return math.nan


def _get(record: dict, path: tuple):
    node = record
    for key in path:
        if not isinstance(node, dict) or key not in node:
            return None
        node = node[key]
    return node


def series(records: list, *path: str) -> tuple[np.ndarray, np.ndarray]:
    """Steps and values of one key over the records (NaN where missing)."""
    steps = np.array([r["step"] for r in records], dtype=float)
    values = np.array([_number(_get(r, path)) for r in records], dtype=float)
    return steps, values


def one_record_per_step(records: list) -> list:
    """Keep the last record of each step (probe records repeat a step)."""
    by_step = {}
    for record in records:
        by_step[record["step"]] = record
    return [by_step[step] for step in sorted(by_step)]


def layer_names(records: list) -> list:
    names: dict = {}
    for record in records:
        for name in (record.get("layers") or {}):
            names.setdefault(name, None)
    return list(names)


def _text(value, spec: str = ".3g") -> str:
    number = _number(value)
    return "-" if math.isnan(number) else format(number, spec)


def _has_data(values: np.ndarray) -> bool:
    return bool(np.isfinite(values).any())


# --------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------

def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _layer_colours(names: list) -> dict:
    plt = _pyplot()
    cmap = plt.get_cmap("tab10" if len(names) <= 10 else "tab20")
    return {name: cmap(i % cmap.N) for i, name in enumerate(names)}


def _safe_name(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name) or "layer"


def _save(fig, path: Path) -> Path:
    fig.savefig(path, dpi=110, bbox_inches="tight")
    _pyplot().close(fig)
    return path


def _spectrum_columns(records: list, layer: str, values_key: str, damping_path: tuple):
    """(steps, spectra, damping) for one factor, one column per inversion."""
    by_inversion: dict = {}
    for record in records:
        entry = (record.get("layers") or {}).get(layer) or {}
        spectrum = entry.get(values_key)
        if isinstance(spectrum, list) and spectrum:
            key = entry.get("inversion_step", record["step"])
            if key is None:
                key = record["step"]
            damping = _number(_get(record, damping_path))
            by_inversion[key] = (np.asarray(spectrum, dtype=float), damping)
    steps = sorted(by_inversion)
    return (np.asarray(steps, dtype=float), [by_inversion[s][0] for s in steps],
            np.asarray([by_inversion[s][1] for s in steps], dtype=float))


def _column_edges(steps: np.ndarray) -> np.ndarray:
    """Edges so that each column spans from its step to the next one."""
    if steps.size == 1:
        return np.array([steps[0] - 0.5, steps[0] + 0.5])
    width = np.median(np.diff(steps))
    return np.concatenate([steps, [steps[-1] + width]])


def _spectrum_panels(layer: str) -> list:
    """(values key, damping path, panel title) for the Kronecker factors, the diagonal and EKFAC's scales."""
    return [("in_eigenvalues", ("layers", layer, "in_damping"), "input factor A"),
            ("out_eigenvalues", ("layers", layer, "out_damping"), "output-gradient factor G"),
            ("diag_values", ("update", "damping"), "diagonal Fisher entries"),
            ("scale_values", ("update", "damping"), "EKFAC scales (eigenbasis diagonal)"),
            ("pair_eig_values", ("update", "damping"), "norm-layer (gamma, beta) block eigenvalues")]


def _draw_spectrum(fig, ax, steps, spectra, damping, title):
    from matplotlib.colors import LogNorm
    from matplotlib.ticker import FuncFormatter

    top = max(float(s.max()) for s in spectra)
    floor = top * 1e-12 if top > 0 else 1e-12  # zero and round-off negative eigenvalues land here
    clipped = [np.clip(s, floor, None) for s in spectra]
    low = min(float(s.min()) for s in clipped)
    lo, hi = math.floor(math.log10(low)), math.ceil(math.log10(max(top, floor * 10)))
    decades = np.linspace(lo, hi, 6 * (hi - lo) + 1)  # six bins per decade
    counts = np.stack([np.histogram(np.log10(s), bins=decades)[0] for s in clipped], axis=1)
    counts = np.ma.masked_equal(counts, 0)
    mesh = ax.pcolormesh(_column_edges(steps), 10.0 ** decades, counts, cmap="viridis",
                         norm=LogNorm(vmin=1, vmax=max(int(counts.max()), 2)), shading="flat")
    ax.set_yscale("log")
    if _has_data(damping):
        # one level per column, across the whole column (the last one included)
        ax.stairs(damping, _column_edges(steps), baseline=None, color="crimson", linestyle="--", linewidth=1.8,
                  label="damping added to the diagonal")
        ax.legend(loc="lower left", fontsize=8)
    clipped_now = int(np.sum(spectra[-1] <= floor))
    note = f"\n{clipped_now} of them ~0 (below 1e-12 x max), drawn in the bottom row" if clipped_now else ""
    ax.set_title(f"{title} ({spectra[-1].size} values){note}", fontsize=10)
    ax.set_xlabel("optimizer step (inversion)")
    ax.set_ylabel("eigenvalue (factor units, log scale)")
    bar = fig.colorbar(mesh, ax=ax, label="eigenvalues per bin (log scale)")
    count_labels = FuncFormatter(lambda value, _: f"{value:g}")
    bar.ax.yaxis.set_major_formatter(count_labels)
    bar.ax.yaxis.set_minor_formatter(count_labels)


def plot_spectra(records: list, layer: str, path: Path):
    """Eigenvalue density of each factor over training, with the damping added to it."""
    panels = []
    for values_key, damping_path, title in _spectrum_panels(layer):
        steps, spectra, damping = _spectrum_columns(records, layer, values_key, damping_path)
        if spectra:
            panels.append((steps, spectra, damping, title))
    if not panels:
        return None
    plt = _pyplot()
    fig, axes = plt.subplots(1, len(panels), figsize=(6 * len(panels), 4.5), constrained_layout=True,
                             squeeze=False)
    for ax, (steps, spectra, damping, title) in zip(axes[0], panels):
        _draw_spectrum(fig, ax, steps, spectra, damping, title)
    fig.suptitle(f"Layer {layer}: spectra over training; values under the dashed line "
                 "are dominated by damping")
    return _save(fig, path)


def _plot_per_layer(ax, records, names, colours, key, **style):
    drawn = False
    for name in names:
        steps, values = series(records, "layers", name, key)
        if _has_data(values):
            ax.plot(steps, values, color=colours[name], **style)
            drawn = True
    return drawn


def _layer_legend(ax, names, colours, title="layer"):
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=colours[n], label=n) for n in names]
    return ax.legend(handles=handles, title=title, fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))


def _style_legend(ax, styles, loc="lower right"):
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color="0.3", linestyle=ls, label=label) for ls, label in styles]
    ax.add_artist(ax.legend(handles=handles, fontsize=8, loc=loc))


def plot_conditioning(records: list, path: Path):
    names = layer_names(records)
    if not names:
        return None
    plt = _pyplot()
    colours = _layer_colours(names)
    fig, (left, right) = plt.subplots(1, 2, figsize=(13, 4.5), constrained_layout=True)
    _plot_per_layer(left, records, names, colours, "condition", marker=".")
    left.axhline(CONDITION_WARNING, color="black", linestyle=":", linewidth=1)
    _style_legend(left, [(":", f"warning level {CONDITION_WARNING:.0e}")])
    left.set_title("damped curvature block")
    _plot_per_layer(right, records, names, colours, "in_condition", linestyle="-")
    _plot_per_layer(right, records, names, colours, "out_condition", linestyle="--")
    _style_legend(right, [("-", "input factor A"), ("--", "output-gradient factor G")])
    right.set_title("undamped factors (gaps: eigenvalue <= 0, condition infinite)")
    for ax in (left, right):
        ax.set_yscale("log")
        ax.set_xlabel("optimizer step")
        ax.set_ylabel("condition number (eig max / eig min)")
        ax.grid(True, which="major", alpha=0.3)
    _layer_legend(right, names, colours)
    fig.suptitle("Conditioning per layer: how far damping brings the raw factors' condition numbers down")
    return _save(fig, path)


def plot_damping(records: list, path: Path):
    steps, lam = series(records, "update", "damping")
    names = layer_names(records)
    if not _has_data(lam) and not names:
        return None
    plt = _pyplot()
    colours = _layer_colours(names)
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(10, 7), sharex=True, constrained_layout=True)
    top.plot(steps, lam, color="black", marker=".", label=r"$\lambda$")
    top.set_ylabel(r"damping $\lambda$ (curvature units)")
    top.set_title(r"Tikhonov damping $\lambda$")
    top.legend(fontsize=8)
    drawn = _plot_per_layer(bottom, records, names, colours, "in_damping", linestyle="-")
    drawn |= _plot_per_layer(bottom, records, names, colours, "out_damping", linestyle="--")
    if drawn:
        _style_legend(bottom, [("-", r"added to A: $\pi\sqrt{\lambda}$"), ("--", r"added to G: $\sqrt{\lambda}/\pi$")])
        _layer_legend(bottom, names, colours)
    bottom.set_title("split between the factors of each layer")
    bottom.set_ylabel("added to the diagonal (factor units)")
    bottom.set_xlabel("optimizer step")
    for ax in (top, bottom):
        if _has_data(lam) and (np.nan_to_num(lam) > 0).any():
            ax.set_yscale("log")
        ax.grid(True, alpha=0.3)
    fig.suptitle("Damping over training and how each layer splits it between A and G")
    return _save(fig, path)


def _line_panel(ax, steps, values, label, ylabel, colour, log=False):
    ax.plot(steps, values, marker=".", color=colour, label=label)
    if log and (np.nan_to_num(values) > 0).any():
        ax.set_yscale("log")
    ax.set_ylabel(ylabel)
    ax.legend(fontsize=8)
    ax.grid(True, alpha=0.3)


def plot_update(records: list, path: Path):
    steps, grad = series(records, "update", "grad_norm")
    _, upd = series(records, "update", "direction_norm")
    _, cosine = series(records, "update", "cosine")
    _, trust = series(records, "update", "trust_scale")
    _, kl = series(records, "update", "kl_estimate")
    if not any(_has_data(v) for v in (grad, upd, cosine, trust, kl)):
        return None
    plt = _pyplot()
    fig, axes = plt.subplots(4, 1, figsize=(10, 10), sharex=True, constrained_layout=True)
    axes[0].plot(steps, grad, marker=".", label="gradient norm")
    _line_panel(axes[0], steps, upd, "preconditioned update norm", "Euclidean norm", "tab:orange", log=True)
    _line_panel(axes[1], steps, cosine, "cos(gradient, update)", "cosine (1 = plain gradient)", "tab:green")
    axes[1].axhline(0.0, color="black", linewidth=0.8)
    axes[1].set_ylim(min(-0.05, float(np.nanmin(cosine)) - 0.05) if _has_data(cosine) else -0.05, 1.05)
    _line_panel(axes[2], steps, trust, "trust-bound scale", "scale (1 = bound inactive)", "tab:purple")
    axes[2].set_ylim(0.0, 1.05)
    _line_panel(axes[3], steps, kl, "KL estimate of the step", "KL (nats)", "tab:brown", log=True)
    axes[3].set_xlabel("optimizer step")
    fig.suptitle("The step against the gradient: size, direction, trust-bound scaling and KL")
    return _save(fig, path)


def plot_loss(records: list, path: Path):
    steps, loss = series(records, "update", "loss")
    _, ratio = series(records, "update", "reduction_ratio")
    if not any(_has_data(v) for v in (loss, ratio)):
        return None
    plt = _pyplot()
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(10, 7), sharex=True, constrained_layout=True)
    if _has_data(loss):
        top.plot(steps, loss, marker=".", label="training loss of the step")
        if (np.nan_to_num(loss) > 0).all():
            top.set_yscale("log")
        top.legend(fontsize=8)
    else:
        top.text(0.5, 0.5, "no loss recorded (use step(closure) or handle.note_loss(loss))", ha="center",
                 va="center", transform=top.transAxes)
    top.set_ylabel("loss (as defined by loss_fn)")
    top.set_title("loss")
    if _has_data(ratio):
        bottom.plot(steps, ratio, marker=".", color="tab:orange", label=r"reduction ratio $\rho$")
        bottom.axhspan(0.25, 0.75, color="tab:green", alpha=0.15, label=r"$1/4 \leq \rho \leq 3/4$: damping kept")
        bottom.axhline(1.0, color="black", linestyle=":", linewidth=1, label=r"model exact ($\rho = 1$)")
        bottom.legend(fontsize=8)
    else:
        bottom.text(0.5, 0.5, "no reduction ratio recorded (needs damping_rule='lm')", ha="center",
                    va="center", transform=bottom.transAxes)
    bottom.set_ylabel("actual / predicted change")
    bottom.set_xlabel("optimizer step")
    bottom.set_title("quadratic model's reduction ratio")
    for ax in (top, bottom):
        ax.grid(True, alpha=0.3)
    fig.suptitle("Loss and how well the quadratic model predicts each step")
    return _save(fig, path)


def time_split(record: dict) -> dict:
    """Cumulative seconds per category.

    The parts of ``step()`` plus "other step work" (the rest of ``step_total``),
    then the time spent in the user's forward/backward passes (capture hooks,
    extra backward) and in this logger.
    """
    times = record.get("time") or {}
    split = {key: _number(times[key]) for key in STEP_TIME if math.isfinite(_number(times.get(key)))}
    total = _number(times.get(STEP_TOTAL))
    if math.isfinite(total):
        split["other step work"] = max(total - sum(split.values()), 0.0)
    for key, value in times.items():
        if key not in STEP_TIME and key != STEP_TOTAL and math.isfinite(_number(value)):
            split[OUTSIDE_STEP_LABELS.get(key, key)] = _number(value)
    log_seconds = _number(record.get("log_seconds"))
    if math.isfinite(log_seconds):
        split["diagnostics logging"] = log_seconds
    return split


def plot_time(records: list, path: Path):
    if not records or not time_split(records[-1]):
        return None
    # probe records fall between the regular ones; their short intervals would show as spikes
    records = [r for r in records[:-1] if "probe" not in r] + records[-1:]
    plt = _pyplot()
    final = time_split(records[-1])
    keys = list(final)
    steps = np.array([r["step"] for r in records], dtype=float)
    cumulative = np.array([[time_split(r).get(k, math.nan) for k in keys] for r in records])
    fig, (left, right) = plt.subplots(1, 2, figsize=(13, 4.5), constrained_layout=True,
                                      gridspec_kw={"width_ratios": [3, 2]})
    cmap = plt.get_cmap("tab10")
    colours = [cmap(i) for i in range(len(keys))]
    if len(records) > 1:
        per_step = np.diff(np.nan_to_num(cumulative), axis=0) / np.diff(steps)[:, None]
        left.stackplot(steps[1:], np.clip(per_step, 0, None).T * 1e3, labels=keys, colors=colours, step="pre")
        left.set_xlabel("optimizer step")
        left.set_ylabel("milliseconds per step (between records)")
        left.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.15), ncol=3)
        left.grid(True, alpha=0.3)
    else:
        left.text(0.5, 0.5, "one record: no per-step rate", ha="center", va="center", transform=left.transAxes)
    left.set_title("time per step")
    totals = np.array([final[k] for k in keys])
    grand = totals.sum() if totals.sum() > 0 else 1.0
    right.barh(keys, totals, color=colours)
    for y, seconds in enumerate(totals):
        right.text(seconds, y, f" {seconds:.3g} s ({100 * seconds / grand:.0f}%)", va="center", fontsize=8)
    right.invert_yaxis()
    right.set_xlabel("cumulative seconds")
    right.set_xlim(0, totals.max() * 1.4 if totals.max() > 0 else 1)
    right.set_title(f"total up to step {records[-1]['step']}")
    largest = keys[int(np.argmax(totals))]
    fig.suptitle(f"Where the optimizer's time goes: most in {largest} ({100 * final[largest] / grand:.0f}%)")
    return _save(fig, path)


def has_step_rule(records: list) -> bool:
    """Whether the log holds the quadratic step rule's multipliers (``update.alpha``, ``update.mu``)."""
    return any(_has_data(series(records, "update", key)[1]) for key in ("alpha", "mu"))


STEP_RULE_COLOURS = {"alpha": "#1f6f8b", "mu": "#d1495b", "rho": "#66a182", "lambda": "#3d3b30",
                     "predicted": "#edae49", "actual": "#5c4d7d"}


def _step_rule_multipliers(ax, steps, alpha, mu):
    ax.plot(steps, alpha, color=STEP_RULE_COLOURS["alpha"], marker="o", markersize=3,
            label=r"$\alpha$: on the new preconditioned proposal")
    ax.plot(steps, mu, color=STEP_RULE_COLOURS["mu"], marker="s", markersize=3,
            label=r"$\mu$: on the previous update")
    ax.axhline(0.0, color="0.5", linewidth=0.8)
    ax.set_ylabel("multiplier (1)")
    ax.set_title(r"step multipliers $\delta = \alpha\, C^{-1} g + \mu\, \delta_{prev}$", fontsize=10)
    ax.legend(fontsize=8, loc="best")


def _step_rule_ratio(ax, steps, rho):
    ax.axhspan(0.25, 0.75, color=STEP_RULE_COLOURS["rho"], alpha=0.12, label=r"$1/4 \leq \rho \leq 3/4$")
    measured = np.isfinite(rho)  # rho exists only on the steps where the loss change was measured
    ax.plot(steps[measured], rho[measured], color=STEP_RULE_COLOURS["rho"], marker="D", markersize=3,
            linestyle="-", label=r"$\rho$ = actual / predicted")
    ax.axhline(1.0, color="0.3", linestyle=":", linewidth=1, label="model exact")
    ax.set_ylabel(r"reduction ratio $\rho$ (1)")
    ax.set_title("how well the quadratic model predicted the step", fontsize=10)
    ax.legend(fontsize=8, loc="best")


def _step_rule_damping(ax, steps, lam):
    ax.step(steps, lam, where="post", color=STEP_RULE_COLOURS["lambda"], linewidth=1.6, label=r"$\lambda$")
    if (np.nan_to_num(lam) > 0).any():
        ax.set_yscale("log")
    ax.set_ylabel(r"damping $\lambda$ (curvature units)")
    ax.set_title(r"damping $\lambda$ (adapted by Levenberg-Marquardt when on)", fontsize=10)
    ax.legend(fontsize=8, loc="best")


def _step_rule_changes(ax, steps, predicted, actual):
    both = np.concatenate([predicted[np.isfinite(predicted)], actual[np.isfinite(actual)]])
    decreases = both.size > 0 and bool((both < 0).all())
    sign, minus = (-1.0, "-") if decreases else (1.0, "")  # every step went down: the decrease on a log axis
    ax.plot(steps, sign * predicted, color=STEP_RULE_COLOURS["predicted"], linewidth=2.0,
            label=rf"predicted ${minus}M(\delta)$")
    ax.plot(steps, sign * actual, color=STEP_RULE_COLOURS["actual"], linestyle="none", marker="x", markersize=5,
            label=rf"measured ${minus}(L(\theta + \delta) - L(\theta))$")
    if decreases:
        ax.set_yscale("log")
        ax.set_ylabel("loss decrease on the batch, -change (loss units)")
    else:
        ax.axhline(0.0, color="0.5", linewidth=0.8)
        if both.size and np.abs(both).max() > 0:
            # changes of both signs spanning decades: linear near zero, logarithmic beyond
            ax.set_yscale("symlog", linthresh=max(1e-3 * float(np.abs(both).max()), 1e-12))
        ax.set_ylabel("loss change on the batch (loss units)")
    ax.set_title("predicted against measured change", fontsize=10)
    ax.legend(fontsize=8, loc="best")


def plot_step_rule(records: list, path: Path):
    """alpha and mu, rho, lambda, and predicted against actual change, over steps (quadratic step rule)."""
    if not has_step_rule(records):
        return None
    steps = series(records, "update", "alpha")[0]
    values = {key: series(records, "update", key)[1] for key in STEP_RULE_KEYS}
    plt = _pyplot()
    fig, axes = plt.subplots(2, 2, figsize=(12, 7.5), sharex=True, constrained_layout=True)
    _step_rule_multipliers(axes[0, 0], steps, values["alpha"], values["mu"])
    _step_rule_ratio(axes[0, 1], steps, values["reduction_ratio"])
    _step_rule_damping(axes[1, 0], steps, values["damping"])
    _step_rule_changes(axes[1, 1], steps, values["predicted_change"], values["actual_change"])
    for ax in axes.flat:
        ax.grid(True, alpha=0.3)
    for ax in axes[1]:
        ax.set_xlabel("optimizer step")
    fig.suptitle("Quadratic step rule: the chosen multipliers, the model's accuracy and the damping it sets")
    return _save(fig, path)


def last_probe(records: list):
    for record in reversed(records):
        if isinstance(record.get("probe"), dict):
            return record["step"], record["probe"]
    return None


def plot_probe(records: list, path: Path):
    found = last_probe(records)
    if found is None or not (found[1].get("layers") or {}):
        return None
    step, probe = found
    layers = probe["layers"]
    names = list(layers)
    plt = _pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(12, 4.5), constrained_layout=True)
    x = np.arange(len(names))
    width = 0.27
    kinds = {layers[n].get("structure") for n in names}
    block_label = "optimizer's block (Kronecker A (x) G)" if kinds == {"kfac"} else "optimizer's block"
    bars = ((-width, "block", block_label),
            (0.0, "fresh", "same structure, from the probe batch alone"),
            (width, "diag", "diagonal of the exact Fisher"))
    for offset, kind, label in bars:
        errors = [_number(layers[n].get(f"{kind}_error")) for n in names]
        angles = [_number(layers[n].get(f"{kind}_angle_deg")) for n in names]
        left.bar(x + offset, errors, width, label=label)
        right.bar(x + offset, angles, width, label=label)
    left.axhline(1.0, color="black", linestyle="--", linewidth=1, label="error of the zero matrix")
    if any(_number(layers[n].get("block_error")) > 10 for n in names):
        left.set_yscale("log")
    left.set_ylabel("relative Frobenius error ||F_approx - F|| / ||F||")
    left.set_title("curvature block error")
    right.set_ylabel("angle to the exact natural gradient (degrees)")
    right.set_title("natural-gradient direction error")
    right.axhline(PROBE_ANGLE_WARNING_DEG, color="black", linestyle=":", linewidth=1,
                  label=f"warning level {PROBE_ANGLE_WARNING_DEG:.0f} deg")
    shares = [_number(layers[n].get("exact_below_damping")) for n in names]
    # near 100%, every damped direction is about g / lambda and the angles say little
    angle_ticks = [f"{n}\n({100 * share:.0f}% of F's eigenvalues < lambda)" if share == share else n
                   for n, share in zip(names, shares)]
    left.set_xticks(x, names, rotation=30, ha="right")
    right.set_xticks(x, angle_ticks, fontsize=8)
    for ax in (left, right):
        ax.set_xlabel("layer")
        ax.legend(fontsize=8)
        ax.grid(True, axis="y", alpha=0.3)
    fig.suptitle(f"Fisher probe at step {step}: how close each approximation is to the exact per-layer Fisher")
    return _save(fig, path)


# --------------------------------------------------------------------------
# text summary
# --------------------------------------------------------------------------

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


# --------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------

def write_report(log_path, out_dir) -> dict:
    """Write all figures and summary.txt; returns {"figures": [...], "summary": path, "warnings": [...]}."""
    log_path = Path(log_path)
    if not log_path.is_file():
        raise FileNotFoundError(f"diagnostics log not found: {log_path}")
    all_records = read_log(log_path)
    records = one_record_per_step(all_records)
    text, found = summarize(records, str(log_path))
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    figures = [plot_spectra(records, name, out_dir / f"spectra_{_safe_name(name)}.png")
               for name in layer_names(records)]
    figures += [plot_conditioning(records, out_dir / "conditioning.png"),
                plot_damping(records, out_dir / "damping.png"),
                plot_update(records, out_dir / "update.png"),
                plot_loss(records, out_dir / "loss.png"),
                plot_time(records, out_dir / "time.png"),
                plot_probe(all_records, out_dir / "probe.png"),
                plot_step_rule(records, out_dir / "step_rule.png")]
    summary_path = out_dir / "summary.txt"
    summary_path.write_text(text, encoding="utf-8")
    return {"figures": [p for p in figures if p is not None], "summary": summary_path, "warnings": found}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m ngopt.report",
                                     description="Plots and a text summary from an ngopt diagnostics log.")
    parser.add_argument("log", help="diagnostics log written by ngopt.log_diagnostics (.jsonl or .csv)")
    parser.add_argument("--out", required=True, help="directory for the PNG figures and summary.txt")
    args = parser.parse_args(argv)
    try:
        result = write_report(args.log, args.out)
    except (ValueError, FileNotFoundError) as error:
        print(f"error: {error}", file=sys.stderr)
        return 2
    for figure in result["figures"]:
        print(figure)
    print(result["summary"])
    for warning in result["warnings"]:
        print(f"warning: {warning}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
