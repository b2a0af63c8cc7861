"""Per-block curvature summaries for ``FisherDescent.diagnostics()``.

Eigenvalues come from the inversion when spectra tracking is on (the
inversion then uses an eigendecomposition, so they cost nothing extra);
otherwise they are computed here on demand, once per inversion.
"""
from __future__ import annotations

import math

import torch

from .linalg import factored_damping, to_cpu64


def condition_number(smallest: float, largest: float) -> float:
    return largest / smallest if smallest > 0 else math.inf


def factor_spectra(block) -> tuple:
    """Ascending eigenvalues of a block's two Kronecker factors, cached until its next inversion."""
    # Each inversion replaces block.info, so spectra cached here live exactly until the next one;
    # with spectra tracking on (or for EKFAC, always), the inversion has already put them there.
    info = block.info
    if info.get("in_eigenvalues") is None:
        info["in_eigenvalues"] = block.form_in.eigenvalues(to_cpu64(block.state["factor_in"]))
        info["out_eigenvalues"] = block.form_out.eigenvalues(to_cpu64(block.state["factor_out"]))
    return info["in_eigenvalues"], info["out_eigenvalues"]


def kronecker_summary(block, damping, with_spectra) -> dict:
    """Spectra, traces, factored damping and condition numbers of the two factors."""
    eig_in, eig_out = factor_spectra(block)
    trace_in, trace_out = float(eig_in.sum()), float(eig_out.sum())
    shift_in, shift_out = factored_damping(trace_in, eig_in.numel(), trace_out, eig_out.numel(), damping)
    summary = {}
    for side, eig, shift, trace in (("in", eig_in, shift_in, trace_in), ("out", eig_out, shift_out, trace_out)):
        low, high = float(eig[0]), float(eig[-1])
        summary.update({
            f"{side}_eig_min": low, f"{side}_eig_max": high,
            f"{side}_condition": condition_number(low, high),
            f"{side}_condition_damped": condition_number(max(low, 0.0) + shift, max(high, 0.0) + shift),
            f"{side}_trace": trace, f"{side}_damping": shift,
        })
        if with_spectra:
            summary[f"{side}_eigenvalues"] = eig.tolist()
    summary["condition"] = summary["in_condition_damped"] * summary["out_condition_damped"]
    return summary


def diagonal_summary(values: torch.Tensor, damping, with_spectra, prefix: str = "diag") -> dict:
    """Range and damped condition number of a curvature that is diagonal in some basis."""
    values = values.detach().double().cpu().flatten()
    low, high = float(values.min()), float(values.max())
    summary = {f"{prefix}_min": low, f"{prefix}_max": high, f"{prefix}_mean": float(values.mean()),
               "condition": condition_number(max(low, 0.0) + damping, max(high, 0.0) + damping)}
    if with_spectra:
        summary[f"{prefix}_values"] = values.sort().values.tolist()
    return summary


def block_summary(block, damping: float, with_spectra: bool = False) -> dict:
    """Plain-number summary of one block: sizes, spectra, damping and condition numbers."""
    summary = {"block": block.layer.kind, "structure": block.structure,
               "in_dim": block.layer.in_dim, "out_dim": block.layer.out_dim,
               "condition": math.nan, "inversion_step": block.info.get("inversion_step")}
    if not block.has_statistics:
        return summary
    summary.update(block.summary(damping, with_spectra))
    return summary
