"""How much curvature a layer can afford: its structure and factor forms chosen from a cost budget.

A layer that maps ``d_in`` inputs to ``d_out`` outputs at ``R`` rows per step (examples times
positions: sequence positions, a convolution's output pixels) costs about ``6 R d_in d_out`` flops
forward and backward.  Its K-FAC block adds, per step and amortized over the refresh and inversion
intervals (Martens & Grosse 2015; the flop counts are the usual ones for dense products, common
practice):

* preconditioning ``G^-1 V A^-1``: ``2 (d_in b_in d_out + d_in d_out b_out)``, ``b`` the factor's block
  size (``b = d`` for a whole factor, ``ngopt/factors.py``);
* statistics every ``stats_interval`` steps: ``2 R_s (d_in b_in + d_out b_out)`` for the ``R_s`` rows
  kept (``stats_fraction``);
* inversions every ``inverse_interval`` steps: ``d_in b_in^2 + d_out b_out^2``.

An output factor larger than ``max_factor_size`` keeps only its diagonal (``b = 1``): over a
vocabulary its off-diagonal terms are about ``1/V`` of the diagonal; an input factor larger than it
keeps blocks of that size.

The exact diagonal (``structure="diag"``) costs ``2 R_s d_in d_out`` per refresh (per-example squares)
and a few elementwise passes over the weight per step.

:func:`choose` keeps the richest form within ``budget`` times the larger of the layer's own forward and
backward and the model's mean per layer (so a small layer beside large ones, an output layer over ten
classes, keeps its whole factors; the whole model's curvature then costs at most ``2 budget`` times its
forward and backward):
whole factors if they fit (or cost under :data:`FLOPS_FLOOR` in all), no factor exceeds
``max_factor_size`` and none keeps more numbers than the layer has parameters (above
:data:`MEMORY_FLOOR`); else block-diagonal factors,
halving the larger side's block until the cost fits; and the exact diagonal when the blocks would be
smaller than :data:`SMALLEST_BLOCK` (a Kronecker product of near-diagonal factors describes less than
the exact diagonal does, at about the same cost).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Optional, Tuple

SMALLEST_BLOCK = 16
# Factors of up to this many numbers (4 MB in float32) are never split for memory.
MEMORY_FLOOR = 2 ** 20
# Below this many flops per step a layer's curvature work costs less than the fixed overhead of any
# step (about a tenth of a millisecond on a laptop core): whole factors then, whatever the ratio.
FLOPS_FLOOR = 2.0 ** 22
# Layer kinds whose K-FAC factors may take the block-diagonal form.
BLOCKABLE_KINDS = ("linear", "conv1d", "conv2d", "attention_q", "attention_k", "attention_v", "attention_in",
                   "attention_out")


@dataclass(frozen=True)
class Plan:
    """What a layer gets: a structure, block sizes of its two factors (None: whole), and why."""

    structure: str
    blocks: Tuple[Optional[int], Optional[int]] = (None, None)
    why: str = ""
    rows: int = 0


@dataclass(frozen=True)
class Schedule:
    stats_interval: int
    inverse_interval: int
    stats_fraction: float


def forward_backward_flops(d_in: int, d_out: int, rows: int) -> float:
    return 6.0 * rows * d_in * d_out


def kronecker_flops(d_in: int, d_out: int, rows: int, b_in: int, b_out: int, schedule: Schedule) -> float:
    """Amortized per-step flops of a K-FAC block with factor blocks ``b_in``, ``b_out``."""
    kept = rows * schedule.stats_fraction
    precondition = 2.0 * (d_in * b_in * d_out + d_in * d_out * b_out)
    statistics = 2.0 * kept * (d_in * b_in + d_out * b_out) / schedule.stats_interval
    inversion = (d_in * b_in ** 2 + d_out * b_out ** 2) / schedule.inverse_interval
    return precondition + statistics + inversion


def diagonal_flops(d_in: int, d_out: int, rows: int, schedule: Schedule) -> float:
    return 2.0 * rows * schedule.stats_fraction * d_in * d_out / schedule.stats_interval + 4.0 * d_in * d_out


def _halve_until(block: int, fits) -> int:
    """The largest of ``block, block / 2, ...`` (not below :data:`SMALLEST_BLOCK`) for which ``fits``."""
    while not fits(block) and block >= 2 * SMALLEST_BLOCK:
        block //= 2
    return block


def choose(kind: str, d_in: int, d_out: int, rows: int, structure: str, budget: Optional[float],
           max_factor_size: Optional[int], schedule: Schedule, mean_layer_flops: float = 0.0) -> Plan:
    """The plan for one layer (see the module docstring); ``budget`` None: no limit on cost.

    ``mean_layer_flops``: the model's forward and backward per layer (linear maps and convolutions);
    a layer may spend ``budget`` times the larger of its own and that mean.
    """
    if structure == "diag" or kind not in BLOCKABLE_KINDS:
        return Plan(structure, rows=rows)
    reasons = []
    b_in, b_out = d_in, d_out
    if max_factor_size is not None and max(d_in, d_out) > max_factor_size:
        # An output factor larger than the limit keeps its diagonal: over a vocabulary (an output layer's
        # softmax) its off-diagonal terms p_i p_j are about 1/V of the diagonal's p_i, and blocks of
        # arbitrary index ranges buy little for their cost.  An input factor keeps blocks of the limit.
        b_in = min(b_in, max_factor_size)
        b_out = 1 if b_out > max_factor_size else b_out
        reasons.append(f"a factor is larger than max_factor_size={max_factor_size}")
    # Memory: no factor keeps more numbers than its layer has parameters (or MEMORY_FLOOR), as Adam's
    # two moments keep twice the parameters.
    numbers = max(d_in * d_out, MEMORY_FLOOR)
    capped = (_halve_until(b_in, lambda b: d_in * b <= numbers), _halve_until(b_out, lambda b: d_out * b <= numbers))
    if capped != (b_in, b_out):
        reasons.append("a whole factor would keep more numbers than the layer has parameters")
    b_in, b_out = capped
    if budget is not None and rows:
        own = forward_backward_flops(d_in, d_out, rows)
        allowed = max(budget * max(own, mean_layer_flops), FLOPS_FLOOR)
        whole_cost = kronecker_flops(d_in, d_out, rows, d_in, d_out, schedule)
        while kronecker_flops(d_in, d_out, rows, b_in, b_out, schedule) > allowed \
                and max(b_in, b_out) >= 2 * SMALLEST_BLOCK:
            if b_in >= b_out:
                b_in = max(SMALLEST_BLOCK, b_in // 2)
            else:
                b_out = max(SMALLEST_BLOCK, b_out // 2)
        if whole_cost > allowed:
            reasons.append(f"whole factors would cost {whole_cost / own:.1f}x the layer's forward and backward "
                           f"at {rows} rows (budget {budget:g}x)")
        cost = kronecker_flops(d_in, d_out, rows, b_in, b_out, schedule)
        if cost > allowed and diagonal_flops(d_in, d_out, rows, schedule) < cost:
            return Plan("diag", rows=rows, why="; ".join(reasons) + ": the exact diagonal")
    if (b_in, b_out) == (d_in, d_out):
        return Plan(structure, rows=rows)
    if b_in == 1 and b_out == 1:
        return Plan("diag", rows=rows, why="both factors would be diagonal: the exact diagonal instead")
    blocks = (b_in if b_in < d_in else None, b_out if b_out < d_out else None)
    return Plan("kfac", blocks=blocks, why="; ".join(reasons), rows=rows)
