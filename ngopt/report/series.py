"""Reading series out of a diagnostics log's records (one record per step), and the report's shared labels."""
from __future__ import annotations

import math
from numbers import Real

import numpy as np

from ..fisher_probe import DAMPING_DOMINATES_SHARE

CONDITION_WARNING = 1e8          # damped condition number called ill-conditioned
SKIPPED_WARNING_FRACTION = 0.05  # share of skipped steps called "many"
PROBE_ANGLE_WARNING_DEG = 45.0   # angle between directions called "far apart"
DAMPING_DOMINATES_FRACTION = DAMPING_DOMINATES_SHARE  # share of eigenvalues under the damping called "dominated"
DAMPING_DOMINATES_SPREAD = 10.0   # ... while the largest is within this factor of the damping
STEP_RULE_KEYS = ("alpha", "mu", "reduction_ratio", "damping", "predicted_change", "actual_change")
LOSS_NOT_LOGGED = ("not logged (call handle.note_loss(loss) after loss.backward(), "
                   "or pass a closure to opt.step)")
# Display names of the parts timed outside step() (diagnostic_keys.PASS_TIME); others show their key.
OUTSIDE_STEP_LABELS = {"capture": "capture hooks (in forward/backward)",
                       "extra_backward": "extra backward (sampled/exact Fisher)",
                       "statistics_in_backward": "statistics formed in the extra backward"}



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


