"""scripts/factor_conditions.py: one condition bound per inversion of every whole factor, and the share
of them within a limit.  The bound itself is checked against numpy's eigenvalues in tests/test_linalg.py
(its float32 path's limit) and the inversions' schedule in tests/test_schedule.py."""
from __future__ import annotations

import math
import runpy
from pathlib import Path

import pytest

from benchmarks.tasks import TASKS

SCRIPT = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "factor_conditions.py"),
                        run_name="factor_conditions")


def test_every_whole_factor_gets_one_bound_per_inversion():
    # The digits MLP (64-128-128-10): three layers, each with an input factor (inputs and a bias column)
    # and an output factor; at the defaults the first three steps each invert (interval warm-up 1, 1, 2).
    bounds = SCRIPT["inversion_bounds"](TASKS["digits_mlp"], steps=3)
    assert sorted(bounds) == sorted([(name, side, rows) for name, rows_in, rows_out in
                                     [("0", 65, 128), ("2", 129, 128), ("4", 129, 10)]
                                     for side, rows in (("in", rows_in), ("out", rows_out))])
    assert all(len(values) == 3 for values in bounds.values())
    # (bound + shift) / shift with a positive shift: finite and above 1
    assert all(math.isfinite(v) and v > 1.0 for values in bounds.values() for v in values)


@pytest.mark.parametrize("limit, share", [("1e30", "100%"), ("1", "0%")])
def test_the_share_column_counts_the_inversions_within_the_limit(capsys, limit, share):
    assert SCRIPT["main"](["--task", "digits_mlp", "--steps", "2", "--limit", limit]) == 0
    rows = [line for line in capsys.readouterr().out.splitlines() if line.startswith("| ") and line[2].isdigit()]
    assert len(rows) == 6 and all(row.split("|")[7].strip() == share for row in rows)


def test_too_few_steps_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as stopped:
        SCRIPT["main"](["--task", "digits_mlp", "--steps", "0"])
    assert stopped.value.code == 2 and "--steps must be at least 1" in capsys.readouterr().err
