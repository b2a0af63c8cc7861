"""scripts/fisher_length_ratio.py: one measurement per ``--every`` steps, at the defaults' own steps.

The ratio itself is checked against the dense exact Fisher in tests/test_kl_check.py."""
from __future__ import annotations

import math
import runpy
import warnings
from pathlib import Path

import torch

from benchmarks.tasks import TASKS

SCRIPT = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "fisher_length_ratio.py"),
                        run_name="fisher_length_ratio")


def test_one_finite_positive_ratio_per_measurement_and_the_defaults_steps_unchanged():
    task = TASKS["ill_conditioned_regression"]
    ratios = SCRIPT["measured_ratios"](task, steps=10, every=5, seed=0)
    assert len(ratios) == 2 and all(math.isfinite(r) and r > 0 for r in ratios)
    # max_exact_step_kl=None: the measurement bounds nothing, so the weights follow the defaults' run
    # (a forward-mode pass on the recorded batch changes no state the step reads; rounding aside)
    import ngopt
    from benchmarks.training import minibatches
    data = task.load_data()
    finals = []
    for options in ({}, {"rule_interval": 5, "max_exact_step_kl": None}):
        torch.manual_seed(0)
        model, loss_fn = task.build_model(), task.make_loss()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the warning that the measurement bounds nothing: known here
            opt = ngopt.FisherDescent(model, loss_fn, seed=0, **options)
        batches = minibatches(len(data.train_x), task.batch_size, 0)
        for _ in range(10):
            rows = next(batches)
            opt.zero_grad()
            loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
            opt.step()
        finals.append(torch.cat([p.detach().flatten() for p in model.parameters()]))
    torch.testing.assert_close(finals[0], finals[1], rtol=1e-5, atol=1e-6)


def test_the_summary_row_gives_deciles_median_and_largest():
    row = SCRIPT["summary_row"]("t", 8, [float(v) for v in range(1, 12)])
    # statistics.quantiles(range(1, 12), n=10) (Python docs, 'exclusive' method): first 1.2, last 10.8
    assert row == "| t | 8 | 11 | 1.20 | 6.00 | 10.80 | 11.00 |"
    assert SCRIPT["summary_row"]("t", 8, [2.0]) == "| t | 8 | 1 | — | — | — | — |"
