"""The report's figures, one function per file it writes (``python -m ngopt.report``)."""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from ..diagnostic_keys import STEP_TIME, STEP_TOTAL
from ..rules.damping import LevenbergMarquardt
from .series import (CONDITION_WARNING, OUTSIDE_STEP_LABELS, PROBE_ANGLE_WARNING_DEG, STEP_RULE_KEYS, _get, _has_data, _number, layer_names, series)

# The band of rho in which the Levenberg-Marquardt rule keeps lambda.
_KEPT = (LevenbergMarquardt.RAISE_BELOW, LevenbergMarquardt.LOWER_ABOVE)
_KEPT_LABEL = rf"${_KEPT[0]:g} \leq \rho \leq {_KEPT[1]:g}$"


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


def _note(ax, text: str) -> None:
    """A panel with nothing to draw says why, in its middle."""
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes)


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
        _note(top, "no loss recorded (use step(closure) or handle.note_loss(loss))")
    top.set_ylabel("loss (as defined by loss_fn)")
    top.set_title("loss")
    if _has_data(ratio):
        bottom.plot(steps, ratio, marker=".", color="tab:orange", label=r"reduction ratio $\rho$")
        bottom.axhspan(*_KEPT, color="tab:green", alpha=0.15, label=_KEPT_LABEL + ": damping kept")
        bottom.axhline(1.0, color="black", linestyle=":", linewidth=1, label=r"model exact ($\rho = 1$)")
        bottom.legend(fontsize=8)
    else:
        _note(bottom, "no reduction ratio recorded (needs damping_rule='lm')")
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
    ax.axhspan(*_KEPT, color=STEP_RULE_COLOURS["rho"], alpha=0.12, label=_KEPT_LABEL)
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


