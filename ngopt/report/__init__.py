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
import sys
from pathlib import Path

from ..diagnostics_log import read_log
from .findings import damping_dominance, summarize
from .plots import (plot_conditioning, plot_damping, plot_loss, plot_probe, plot_spectra, plot_step_rule,
                    plot_time, plot_update, time_split)
from .plots import _safe_name
from .series import layer_names, one_record_per_step

__all__ = ["write_report", "summarize", "main", "one_record_per_step", "time_split", "damping_dominance"]



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


