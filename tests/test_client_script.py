"""The client-model script's own machinery, on a small model of ours (the script's models need
transformers and timm, which the test suite does not install): side-by-side training, seeds, the summary.
"""
from __future__ import annotations

import runpy
from pathlib import Path

import pytest
import torch
from torch import nn

SCRIPT = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "client_models.py"),
                        run_name="client_models")


def small_client():
    def build():
        return nn.Sequential(nn.Linear(6, 16), nn.Tanh(), nn.Linear(16, 3))

    def batch(generator):
        inputs = torch.randn(32, 6, generator=generator)
        return {"inputs": inputs, "labels": (inputs[:, 0] > 0).long() + (inputs[:, 1] > 0).long()}

    def loss(model, inputs):  # a functional loss in the loop, as the image clients compute theirs
        return nn.functional.cross_entropy(model(inputs["inputs"]), inputs["labels"])

    return SCRIPT["Client"]("small classifier", build, batch, loss)


def test_side_by_side_rows_per_seed_and_the_summary_counts_them():
    client = small_client()
    rows = [SCRIPT["train_side_by_side"](client, steps=6, seed=seed, options={}) for seed in (0, 1)]
    assert [row["seed"] for row in rows] == [0, 1]
    assert rows[0]["first_loss"] != rows[1]["first_loss"]  # other initial weights and batches
    for row in rows:
        assert row["fallback_share"] == 0.0 and row["skipped"] == 0
        assert all(torch.isfinite(torch.tensor(row[key])) for key in
                   ("fisher_descent_loss", "adamw_loss", "fisher_descent_held_out", "adamw_held_out"))
    # the summary counts what the rows say, measure by measure
    expected = [sum(row[ours] < row[theirs] for row in rows) for _, ours, theirs in SCRIPT["MEASURES"]]
    line = SCRIPT["summary"](rows).splitlines()[2]
    assert line.startswith("| small classifier | 0, 1 | ")
    assert " / ".join(f"{k} of 2" for k in expected) in line
    table = SCRIPT["table"](rows)
    assert "| small classifier, seed 0 |" in table and "| small classifier, seed 1 |" in table
    assert "seed" not in SCRIPT["table"](rows[:1]).splitlines()[2]  # one seed: the plain model name


def test_summary_counts_hand_made_rows():
    rows = [{"model": "m", "seed": seed, "fisher_descent_loss": ours, "adamw_loss": 1.0,
             "fisher_descent_last5": 0.5, "adamw_last5": 1.0, "fisher_descent_held_out": 2.0,
             "adamw_held_out": 1.0, "step_ratio": ratio}
            for seed, ours, ratio in [(0, 0.9, 1.2), (1, 1.1, 1.4), (2, 0.8, 1.3)]]
    assert SCRIPT["summary"](rows).splitlines()[2] == "| m | 0, 1, 2 | 2 of 3 / 3 of 3 / 0 of 3 | 1.30 |"


def test_seeds_take_a_count_or_a_list_and_refuse_the_rest():
    parse = SCRIPT["parse_seeds"]  # the benchmark's own parser
    assert parse("3") == [0, 1, 2]
    assert parse("1") == [0]
    assert parse("0,5") == [0, 5]
    assert parse("4,2") == [4, 2]
    with pytest.raises(ValueError, match="comma-separated list of integers"):
        parse("a,b")
    with pytest.raises(ValueError, match="at least 1"):
        parse("0")
    with pytest.raises(ValueError, match="distinct"):
        parse("1,1")


def test_the_default_is_one_run_from_seed_0():
    assert SCRIPT["parse_seeds"](SCRIPT["argument_parser"]().get_default("seeds")) == [0]


def test_a_bad_seeds_value_stops_the_script_before_any_model_is_built(capsys):
    with pytest.raises(SystemExit) as stopped:
        SCRIPT["main"](["--seeds", "x"])
    assert stopped.value.code == 2 and "--seeds" in capsys.readouterr().err


def test_the_held_out_loss_is_the_mean_over_its_own_batches():
    client = small_client()
    drawn, held_out_values = [], []
    make_batch, loss = client.batch, client.loss

    def counted_batch(generator):
        drawn.append(1)
        return make_batch(generator)

    def recorded_loss(model, inputs):
        value = loss(model, inputs)
        if not torch.is_grad_enabled():  # the held-out evaluation runs under no_grad
            held_out_values.append(float(value))
        return value

    steps = 4
    row = SCRIPT["train_side_by_side"](SCRIPT["Client"](client.name, client.build, counted_batch, recorded_loss),
                                       steps=steps, seed=0, options={})
    batches = SCRIPT["HELD_OUT_BATCHES"]
    assert len(drawn) == steps + batches and len(held_out_values) == 2 * batches  # both models, the same batches
    fisher_descent, adamw = held_out_values[:batches], held_out_values[batches:]
    assert row["fisher_descent_held_out"] == pytest.approx(sum(fisher_descent) / batches, rel=1e-12)
    assert row["adamw_held_out"] == pytest.approx(sum(adamw) / batches, rel=1e-12)
    assert len(set(fisher_descent)) == batches  # distinct batches, not one batch eight times


def test_a_bad_device_stops_the_script_before_any_model_is_built(capsys):
    with pytest.raises(SystemExit) as stopped:
        SCRIPT["main"](["--device", "nowhere"])
    assert stopped.value.code == 2 and "--device" in capsys.readouterr().err


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device")
def test_side_by_side_on_the_device_trains_on_the_cpus_batches():
    client = small_client()
    on_cpu = SCRIPT["train_side_by_side"](client, steps=6, seed=0, options={})
    on_gpu = SCRIPT["train_side_by_side"](client, steps=6, seed=0, options={}, device=torch.device("cuda"))
    # the same weights and batches: the first loss agrees to float32 rounding (common practice)
    assert on_gpu["first_loss"] == pytest.approx(on_cpu["first_loss"], rel=1e-5)
    assert on_gpu["skipped"] == 0 and on_gpu["fisher_descent_loss"] < on_gpu["first_loss"]
