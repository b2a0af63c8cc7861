"""Tests of the benchmark harness (python -m benchmarks) on tiny budgets.

The results.json checks follow the results schema in the README (the project's
binding contract); speed comparisons are reported by the harness, never asserted here.
"""

from __future__ import annotations

import csv
import json
import math
import runpy
import statistics
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch

from benchmarks import datasets
from benchmarks.attachments import diagnostics_available
from benchmarks.cli import main, parse_options, parse_seeds
from benchmarks.comparison import bounded_ratio, step_time_flop_estimate
from benchmarks.evaluation import EvaluationSchedule
from benchmarks.optimizers import (BASELINES, DEFAULT_OPTIMIZERS, HEADLINE, OPTIMIZERS,
                                   natural_gradient_available, resolve_optimizers)
from benchmarks.report import format_duration
from benchmarks.results import SCHEMA_OPTIMIZER_NAMES
from benchmarks.task_sets import resolve_tasks
from benchmarks.tasks import TASKS
from benchmarks.training import TrainingRun, minibatches, train_run, train_runs_in_turns

REPOSITORY = Path(__file__).resolve().parent.parent


def every_step(steps: int) -> EvaluationSchedule:
    """Evaluate after every step (the densest schedule: the reference for the adaptive one)."""
    return EvaluationSchedule(1, 1, steps)
NGOPT_AVAILABLE = natural_gradient_available()[0]
# every row the verdict weighs: the default rows (muon among them), each where it can run
OPTIMIZER_NAMES = [name for name in DEFAULT_OPTIMIZERS
                   if (NGOPT_AVAILABLE or name != HEADLINE) and OPTIMIZERS[name].why_unavailable() is None]
API_RUN_FIELDS = {  # the README's results schema
    "optimizer": str, "lr": float, "seed": int, "steps_to_target": (int, type(None)),
    "seconds_to_target": (float, type(None)), "final_train_loss": (float, type(None)),
    "final_test_metric": (float, type(None)), "step_seconds_median": float,
}
SMOKE_STEPS, SMOKE_GRID, SMOKE_SEEDS = 3, 2, 3
SMOKE_TASKS = ["digits_mlp", "ill_conditioned_regression"]  # the two cheapest tasks


@pytest.fixture(scope="module")
def smoke_run(tmp_path_factory):
    """One run of the whole harness (CLI to files) with a tiny budget."""
    out = tmp_path_factory.mktemp("bench")
    argv = ["--steps", str(SMOKE_STEPS), "--grid", str(SMOKE_GRID), "--seeds", str(SMOKE_SEEDS),
            "--tasks", ",".join(SMOKE_TASKS), "--optimizers", ",".join(OPTIMIZER_NAMES),
            "--out", str(out), "--no-progress"]
    threads = torch.get_num_threads()
    assert main(argv) == 0
    assert torch.get_num_threads() == threads  # main() leaves the process settings as it found them
    return out, json.loads((out / "results.json").read_text())


def test_memory_left_behind_is_measured_per_task_for_runs_in_turns(smoke_run):
    out, results = smoke_run
    report = (out / "report.md").read_text()
    for task in results["tasks"]:
        assert all(run["rss_growth_bytes"] is None for run in task["runs"])  # their memory overlapped
        growth = task["rss_growth_bytes"]
        if growth is None:  # a platform without /proc
            continue
        assert isinstance(growth, int)
        assert f"resident memory left behind by the task's {task['finished_runs']} runs in turns: " \
               f"{growth / 2**20:+.0f} MiB" in report


def test_results_json_follows_the_api_schema(smoke_run):
    _, results = smoke_run
    assert isinstance(results["machine"], dict) and results["machine"]["torch_threads"] >= 1
    assert [task["task"] for task in results["tasks"]] == SMOKE_TASKS
    for task in results["tasks"]:
        assert isinstance(task["target_loss"], float) and task["target_loss"] > 0
        assert task["target_loss"] == TASKS[task["task"]].target_loss
        for run in task["runs"]:
            for field, kind in API_RUN_FIELDS.items():
                assert isinstance(run[field], kind), (task["task"], field, run[field])
            assert run["method"] in OPTIMIZER_NAMES
            # the schema's optimizer names: the package for its headline row, the row's name otherwise
            assert run["optimizer"] == ("ngopt" if run["method"] == HEADLINE else run["method"])
            # "null when a run never reaches the target": both or neither
            assert (run["steps_to_target"] is None) == (run["seconds_to_target"] is None)
            if run["steps_to_target"] is not None:
                assert 1 <= run["steps_to_target"] <= SMOKE_STEPS
                assert run["final_train_loss"] is not None


def test_every_optimizer_gets_the_same_budget_and_the_stated_protocol(smoke_run):
    _, results = smoke_run
    for task in results["tasks"]:
        for name in OPTIMIZER_NAMES:
            runs = [run for run in task["runs"] if run["method"] == name]
            tuning = [run for run in runs if run["role"] == "tuning"]
            repeats = [run for run in runs if run["role"] == "repeat"]
            summary = task["summary"][name]
            # fisher-descent runs untuned (one point: its own default lr), the baselines over their grids
            assert summary["lr_tuned"] == (name != "fisher-descent")
            assert len(tuning) == (SMOKE_GRID if summary["lr_tuned"] else 1)
            assert {run["seed"] for run in tuning} == {0}
            assert [run["lr"] for run in tuning] == summary["lr_grid"]
            assert sorted(run["seed"] for run in repeats) == list(range(1, SMOKE_SEEDS))
            assert all(run["lr"] == summary["best_lr"] for run in repeats)
            assert all(run["steps_run"] == SMOKE_STEPS for run in runs if not run["diverged"])
            # the chosen lr has the lowest final training loss on the tuning seed (diverged = +inf)
            losses = {run["lr"]: math.inf if run["final_train_loss"] is None else run["final_train_loss"]
                      for run in tuning}
            assert losses[summary["best_lr"]] == min(losses.values())
            # medians over the runs at the chosen lr, one per seed (statistics.median)
            selected = [run for run in runs if run["selected"]]
            assert len(selected) == SMOKE_SEEDS
            assert summary["step_seconds_median"] == pytest.approx(
                statistics.median(run["step_seconds_median"] for run in selected))


def test_time_split_of_natural_gradient_adds_up(smoke_run):
    if not NGOPT_AVAILABLE:
        pytest.skip("ngopt.FisherDescent does not import")
    _, results = smoke_run
    for task in results["tasks"]:
        for run in task["runs"]:
            if run["method"] == "fisher-descent":
                split = run["time_split_seconds"]
                parts = sum(value for key, value in split.items() if key != "train_seconds")
                assert parts == pytest.approx(split["train_seconds"], rel=1e-9)
                assert split["train_seconds"] == pytest.approx(run["train_seconds"])
                assert split["rest"] > 0  # the model's own forward and backward take time


def test_whole_benchmark_wall_time_is_recorded_and_reported(smoke_run):
    out, results = smoke_run
    wall = results["settings"]["wall_seconds"]
    training = sum(run["train_seconds"] for task in results["tasks"] for run in task["runs"])
    # The wall clock covers every run's timed steps and more (evaluations, set-up); rounded to 0.1 s.
    assert wall >= training - 0.05 and wall > 0
    report = (out / "report.md").read_text()
    assert f"- the benchmark ran {format_duration(wall)} of wall-clock time in all" in report
    assert format_duration(training) in report


def test_format_duration():
    assert format_duration(42.44) == "42.4 s"
    assert format_duration(0.04) == "0.0 s"
    assert format_duration(59.96) == "1 min 0 s"
    assert format_duration(377.25) == "6 min 17 s"
    assert format_duration(60) == "1 min 0 s"


def test_files_written(smoke_run):
    out, results = smoke_run
    for name in ["results.json", "curves.csv", "report.md"]:
        assert (out / name).stat().st_size > 0
    for task in SMOKE_TASKS:
        png = (out / f"loss_{task}.png").read_bytes()
        assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
    report = (out / "report.md").read_text()
    for task in SMOKE_TASKS:
        assert f"## {task}" in report and f"(loss_{task}.png)" in report
    assert report.index("## Verdict") < report.index("## Settings") < report.index("## Overview")
    assert "goal" not in report.lower()  # measurements and comparisons only


def test_overview_sets_fisher_descent_against_the_best_of_every_baseline(smoke_run):
    from benchmarks.report import overview_headers, overview_rows

    _, results = smoke_run
    baselines = [name for name in OPTIMIZER_NAMES if name in BASELINES]
    headers = overview_headers(results)
    assert headers[3:3 + len(baselines)] == baselines
    for entry, row in zip(results["tasks"], overview_rows(results, results["tasks"])):
        summaries = entry["summary"]
        # a few steps reach no target: the best baseline is the one with the lowest final training loss
        finals = {name: summaries[name]["final_train_loss"] for name in baselines}
        best = entry["comparison"]["best_baseline"]
        assert row[headers.index("best baseline")] == best
        assert finals[best] == min(value for value in finals.values() if value is not None)


def test_best_baseline_is_the_first_to_the_target_else_the_lowest_final_loss():
    from benchmarks.comparison import best_baseline

    summaries = {HEADLINE: summary_of(0.1, tuned=False), "sgd": summary_of(2.0),
                 "adam": summary_of(None, reached=0, final=0.02), "adamw-cosine": summary_of(1.0)}
    assert best_baseline(summaries) == "adamw-cosine"  # fisher-descent itself is no baseline
    summaries.update(sgd=summary_of(None, 0, final=None), **{"adamw-cosine": summary_of(None, 0, final=0.5)})
    assert best_baseline(summaries) == "adam"  # none reached it; a diverged run (final None) ranks last
    assert best_baseline({HEADLINE: summary_of(0.1)}) is None


def test_curves_csv_matches_results_json(smoke_run):
    out, results = smoke_run
    with (out / "curves.csv").open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    for task in results["tasks"]:
        for run in task["runs"]:
            curve = [row for row in rows if row["task"] == task["task"] and row["optimizer"] == run["method"]
                     and float(row["lr"]) == run["lr"] and int(row["seed"]) == run["seed"]]
            steps = [int(row["step"]) for row in curve]
            assert steps[0] == 0 and steps == sorted(set(steps)) and steps[-1] == run["steps_run"]
            if run["diverged"]:
                continue
            assert float(curve[-1]["train_loss"]) == run["final_train_loss"]
            assert float(curve[-1]["seconds"]) == pytest.approx(run["train_seconds"], abs=1e-6)
        # same seed, same initial weights and data: the step-0 loss is the same for every optimizer
        for seed in range(SMOKE_SEEDS):
            initial = {row["train_loss"] for row in rows if row["task"] == task["task"]
                       and int(row["seed"]) == seed and row["step"] == "0"}
            assert len(initial) == 1


@pytest.mark.parametrize("task_name", list(TASKS))
def test_every_task_trains_with_every_optimizer(task_name):
    task = TASKS[task_name]
    for name in OPTIMIZER_NAMES:
        spec = OPTIMIZERS[name]
        run = train_run(task, spec, spec.lr_grid(1)[0], seed=0, steps=2, schedule=every_step(2))
        assert run.steps_run == 2 and len(run.curve_losses) == 3
        assert all(loss is not None and loss > 0 for loss in run.curve_losses)
        assert run.final_test_metric is not None


@pytest.mark.parametrize("optimizer", OPTIMIZER_NAMES)
def test_same_seed_gives_the_same_losses(optimizer):
    task, spec = TASKS["digits_mlp"], OPTIMIZERS[optimizer]
    lr = spec.lr_grid(1)[0]
    first = train_run(task, spec, lr, seed=4, steps=8)
    second = train_run(task, spec, lr, seed=4, steps=8)
    other = train_run(task, spec, lr, seed=5, steps=8)
    assert first.curve_losses == second.curve_losses
    assert first.final_test_metric == second.final_test_metric
    assert first.curve_losses != other.curve_losses  # the seed does change the run


def dropout_mlp_task():
    """The digits MLP with dropout: its training draws from torch's global generator at every step."""
    base = TASKS["digits_mlp"]
    return replace(base, name="digits_dropout_mlp", build_model=lambda: torch.nn.Sequential(
        torch.nn.Linear(64, 32), torch.nn.Tanh(), torch.nn.Dropout(0.3), torch.nn.Linear(32, 10)))


def test_runs_in_turns_train_as_they_would_one_after_the_other():
    # Every run restores its own global-generator state for each of its turns, so dropout draws the same
    # masks as alone: the same losses up to float rounding (same process, same threads: common practice
    # allows 1e-6 relative for summation order in the library's kernels).
    task = dropout_mlp_task()
    jobs = [(OPTIMIZERS["sgd"], 0.3, 0), (OPTIMIZERS[HEADLINE], None, 1), (OPTIMIZERS["adam"], 0.01, 0)]
    alone = [train_run(task, spec, lr, seed, steps=12, schedule=every_step(12)) for spec, lr, seed in jobs]
    turns = train_runs_in_turns([TrainingRun(task, spec, lr, seed, 12, every_step(12)) for spec, lr, seed in jobs],
                                stretch=5)
    for one, other in zip(alone, turns):
        assert (other.optimizer, other.lr, other.seed, other.steps_run) == (one.optimizer, one.lr, one.seed, 12)
        assert other.curve_steps == one.curve_steps
        assert other.curve_losses == pytest.approx(one.curve_losses, rel=1e-6)
        assert other.rss_growth_bytes is None and one.rss_growth_bytes is not None  # others live beside it
    assert alone[0].curve_losses != pytest.approx(alone[2].curve_losses, rel=1e-3)  # the optimizer matters


def test_runs_take_turns_a_stretch_of_steps_at_a_time_until_each_is_done():
    order = []
    task = TASKS["digits_mlp"]
    runs = [TrainingRun(task, OPTIMIZERS["sgd"], 0.1, 0, steps, every_step(steps),
                        on_step=lambda name=name: order.append(name))
            for name, steps in (("a", 5), ("b", 3))]
    results = train_runs_in_turns(runs, stretch=2)
    assert "".join(order) == "aabbaaba"
    assert [result.steps_run for result in results] == [5, 3]


def test_a_failing_run_leaves_no_logger_attached_to_any_run_of_its_group(monkeypatch):
    task, detached = TASKS["digits_mlp"], []
    train_step = TrainingRun._train_step

    def fail_on_seed_one(self):
        if self.seed == 1:
            raise RuntimeError("the model failed")
        train_step(self)

    monkeypatch.setattr(TrainingRun, "_train_step", fail_on_seed_one)
    runs = [TrainingRun(task, OPTIMIZERS["sgd"], 0.1, seed, 6, every_step(6),
                        attach=lambda optimizer, seed=seed: lambda: detached.append(seed)) for seed in (0, 1)]
    with pytest.raises(RuntimeError, match="the model failed"):
        train_runs_in_turns(runs, stretch=2)
    assert sorted(detached) == [0, 1]  # each once
    runs[0].close()
    assert sorted(detached) == [0, 1]


def test_a_group_in_turns_holds_as_many_runs_as_a_quarter_of_the_memory_fits(monkeypatch):
    from benchmarks import harness
    task = TASKS["digits_mlp"]
    per_run = harness.BYTES_PER_PARAMETER_BYTE * sum(p.numel() * p.element_size()
                                                     for p in task.build_model().parameters())
    monkeypatch.setattr(harness, "memory_bytes", lambda: int(3 * per_run / harness.GROUP_MEMORY_SHARE))
    assert harness.runs_that_fit(task) == 3
    monkeypatch.setattr(harness, "memory_bytes", lambda: 1)
    assert harness.runs_that_fit(task) == 1  # never fewer than one
    monkeypatch.setattr(harness, "memory_bytes", lambda: None)
    assert harness.runs_that_fit(task) is None


def test_runs_one_at_a_time_where_memory_is_short_give_the_same_results(tmp_path, monkeypatch):
    from benchmarks import harness
    argv = ["--tasks", "digits_mlp", "--optimizers", "sgd,adam", "--steps", "6", "--grid", "2", "--seeds", "2",
            "--no-progress", "--out"]
    assert main(argv + [str(tmp_path / "turns")]) == 0
    monkeypatch.setattr(harness, "memory_bytes", lambda: 1)  # groups of one run
    assert main(argv + [str(tmp_path / "alone")]) == 0
    turns, alone = ([(run["method"], run["lr"], run["seed"], run["steps_to_target"], run["final_train_loss"],
                      run["rss_growth_bytes"])
                     for run in json.loads((tmp_path / way / "results.json").read_text())["tasks"][0]["runs"]]
                    for way in ("turns", "alone"))
    assert [run[:4] for run in turns] == [run[:4] for run in alone] and len(turns) == 6
    assert [run[4] for run in turns] == pytest.approx([run[4] for run in alone], rel=1e-6)
    assert all(run[5] is None for run in turns)  # runs in turns: memory overlaps
    if harness.current_rss_bytes() is not None:
        assert all(isinstance(run[5], int) for run in alone)  # alone: each run's own


def test_a_diverged_run_stops_while_the_others_go_on():
    task = TASKS["digits_mlp"]
    runs = [TrainingRun(task, OPTIMIZERS["sgd"], lr, 0, 20, every_step(20)) for lr in (1e6, 0.1)]
    diverged, healthy = train_runs_in_turns(runs, stretch=3)
    assert diverged.diverged and diverged.steps_run < 20
    assert not healthy.diverged and healthy.steps_run == 20


def test_data_order_is_a_fixed_permutation_per_epoch():
    first = [batch.tolist() for batch, _ in zip(minibatches(10, 3, seed=7), range(6))]
    again = [batch.tolist() for batch, _ in zip(minibatches(10, 3, seed=7), range(6))]
    assert first == again
    epoch = sorted(sum(first[:3], []))  # three batches of 3 from 10 examples, the last one dropped
    assert len(set(epoch)) == 9 and set(epoch) <= set(range(10))
    assert all(len(batch) == 3 for batch in first)
    torch.manual_seed(0)  # global RNG draws (as a sampled Fisher makes) do not move the order
    torch.rand(100)
    assert [batch.tolist() for batch, _ in zip(minibatches(10, 3, seed=7), range(6))] == first


def test_diagnostics_option_logs_every_natural_gradient_run(tmp_path, capsys):
    if not diagnostics_available():
        pytest.skip("ngopt.log_diagnostics is not available")
    argv = ["--tasks", "digits_mlp", "--optimizers", "fisher-descent,sgd", "--steps", "6", "--grid", "1",
            "--seeds", "1", "--diagnostics", "2", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    closing = capsys.readouterr().out.strip().splitlines()[-1]
    assert closing.startswith(f"results written to {tmp_path}/") and "diagnostics/" in closing
    logs = list((tmp_path / "diagnostics").iterdir())
    assert [path.name for path in logs] == ["digits_mlp_fisher-descent_lrdefault_seed0.jsonl"]  # none for sgd
    records = [json.loads(line) for line in logs[0].read_text().splitlines()]
    # API.md: a record every `every` steps, each a diagnostics() snapshot
    assert [record["step"] for record in records] == [2, 4, 6]
    assert all("layers" in record and "time" in record for record in records)


def test_scaling_study_writes_its_table_and_plot(tmp_path, monkeypatch):
    from benchmarks import scaling

    monkeypatch.setattr(scaling, "WIDTHS", [16, 32])  # tiny sizes: the study's code, not its cost
    monkeypatch.setattr(scaling, "BATCHES", [16, 32])
    names = ",".join(name for name in OPTIMIZER_NAMES if name in (HEADLINE, "sgd"))
    argv = ["--scaling", "--optimizers", names, "--steps", "4", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    payload = json.loads((tmp_path / "scaling.json").read_text())
    rows = payload["rows"]
    assert [(row["sweep"], row["width"], row["batch"]) for row in rows] == [
        ("width", 16, scaling.WIDTH_SWEEP_BATCH), ("width", 32, scaling.WIDTH_SWEEP_BATCH),
        ("batch", scaling.BATCH_SWEEP_WIDTH, 16), ("batch", scaling.BATCH_SWEEP_WIDTH, 32)]
    for row in rows:
        # forward+backward 6*B*d^2, preconditioning 4*d^3 per d x d layer: common practice
        assert row["flop_estimate"] == pytest.approx(1 + 4 * row["width"] ** 3 / (6 * row["batch"] * row["width"] ** 2))
        assert row["sgd_step_seconds_median"] > 0
        if NGOPT_AVAILABLE:
            assert row["ratio"] == pytest.approx(row["fisher_descent_step_seconds_median"]
                                                 / row["sgd_step_seconds_median"])
    assert (tmp_path / "scaling.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "scaling.csv").read_text().startswith("sweep,width,batch,flop_estimate")
    markdown = (tmp_path / "scaling.md").read_text()
    assert "## Scaling study" in markdown and "not a bound" in markdown and "floor" not in markdown


@pytest.mark.parametrize("option, bad", [("--tasks", "digits_mlp,no_such_task"), ("--optimizers", "lbfgs")])
def test_unknown_names_fail_with_the_valid_names(option, bad):
    completed = subprocess.run([sys.executable, "-m", "benchmarks", option, bad, "--steps", "1"],
                               cwd=REPOSITORY, capture_output=True, text=True, timeout=120)
    assert completed.returncode == 2  # argparse's usage-error status
    valid = TASKS if option == "--tasks" else OPTIMIZERS
    assert bad.split(",")[-1] in completed.stderr
    for name in valid:
        assert name in completed.stderr
    assert "Traceback" not in completed.stderr


def test_resolvers_raise_value_error_naming_the_option():
    with pytest.raises(ValueError, match="tasks.*valid tasks: digits_autoencoder"):
        resolve_tasks(["nope"])
    with pytest.raises(ValueError, match="optimizers.*valid optimizers: fisher-descent, sgd, adam"):
        resolve_optimizers(["nope"])
    with pytest.raises(ValueError, match="seeds"):
        parse_seeds("0")


def test_natural_gradient_options_parse_as_python_literals():
    assert parse_options(["momentum=0.9", "max_step_kl=None", "structure=kfac", "damping_rule=lm"]) == {
        "momentum": 0.9, "max_step_kl": None, "structure": "kfac", "damping_rule": "lm"}
    with pytest.raises(ValueError, match="KEY=VALUE"):
        parse_options(["momentum"])


def test_seed_option_takes_a_count_or_a_list():
    assert parse_seeds("3") == [0, 1, 2]
    assert parse_seeds("4,9") == [4, 9]
    with pytest.raises(ValueError):
        parse_seeds("1,1")


def test_lr_grids_are_log_spaced_half_a_decade_apart_around_their_centre():
    # decades from the centre to the lowest and the highest point, by hand: odd counts symmetric,
    # even ones with the extra point above the centre
    ends = {1: (0.0, 0.0), 2: (0.0, 0.5), 3: (-0.5, 0.5), 4: (-0.5, 1.0), 5: (-1.0, 1.0)}
    for spec in OPTIMIZERS.values():
        if not spec.tuned:
            assert spec.lr_grid(5) == [None]  # built without an lr: the optimizer's own default
            continue
        if spec.natural_gradient_options is not None and not NGOPT_AVAILABLE:
            continue
        centre = spec.grid_centre()
        for size, (low, high) in ends.items():
            expected = np.logspace(np.log10(centre) + low, np.log10(centre) + high, size)  # numpy.logspace
            np.testing.assert_allclose(spec.lr_grid(size), expected, rtol=1e-12)
            assert min(abs(lr / centre - 1) for lr in spec.lr_grid(size)) < 1e-12  # the centre is a point
    with pytest.raises(ValueError, match="lr grid size must be at least 1"):
        OPTIMIZERS["sgd"].lr_grid(0)


@pytest.mark.parametrize("quick", [False, True])
def test_default_grids_have_points_half_a_decade_apart_quick_or_full(quick):
    from benchmarks.cli import build_parser, make_config, settings_of

    config = make_config(build_parser().parse_args(["--quick"] if quick else []))
    settings = settings_of(config, [])
    points, span = (4, 1.5) if quick else (5, 2.0)
    assert (settings["grid_size"], settings["grid_decades"], len(config.seeds)) == (points, span, 2 if quick else 3)
    for spec in config.specs:
        grid = spec.lr_grid(config.grid_size)
        if spec.tuned:
            assert np.diff(np.log10(grid)) == pytest.approx([0.5] * (points - 1), rel=1e-12)


def test_step_time_flop_estimate_counts_the_flops():
    # forward+backward 6*B*d^2 flops, preconditioning two d x d products 2*(2*d^3): common practice
    d, batch = 256, 512
    sgd_flops = 6 * batch * d * d
    assert step_time_flop_estimate(d, batch) == pytest.approx((sgd_flops + 4 * d ** 3) / sgd_flops)


def test_ratios_bounded_by_the_budget_when_one_side_misses():
    assert bounded_ratio(2.0, 10.0, 8.0, 20.0) == {"ratio": 0.25, "relation": "measured"}
    # the baseline never got there within 20 s, so fisher-descent/baseline < 2/20
    assert bounded_ratio(2.0, 10.0, None, 20.0) == {"ratio": 0.1, "relation": "at_most"}
    assert bounded_ratio(None, 10.0, 4.0, 20.0) == {"ratio": 2.5, "relation": "at_least"}
    assert bounded_ratio(None, 10.0, None, 20.0)["relation"] == "neither"


def test_mnist1d_comes_from_the_package_generator_with_default_arguments():
    split = datasets.mnist1d()
    # mnist1d.data.get_dataset_args(): 5000 samples, train_split 0.8, final_seq_length 40
    assert tuple(split.train_x.shape) == (4000, 40) and tuple(split.test_x.shape) == (1000, 40)
    assert set(split.train_y.unique().tolist()) == set(range(10))
    state = np.random.get_state()[1].copy()
    datasets.mnist1d.cache_clear()
    datasets.mnist1d()
    np.testing.assert_array_equal(np.random.get_state()[1], state)  # numpy's global RNG left alone


def test_digits_split_sizes():
    split = datasets.digits_vectors()
    # sklearn.datasets.load_digits: 1797 images of 8 x 8 pixels valued 0..16
    assert len(split.train_x) + len(split.test_x) == 1797
    assert float(split.train_x.max()) == 1.0 and float(split.train_x.min()) == 0.0
    assert tuple(datasets.digits_images().train_x.shape[1:]) == (1, 8, 8)


def test_targets_lie_between_the_trivial_and_the_best_possible_loss():
    # classifiers: chance-level cross-entropy is log(10) (ten classes)
    for name in ("digits_mlp", "digits_cnn", "digits_resnet", "mnist1d_mlp"):
        assert TASKS[name].target_loss < math.log(10) / 10
    # language model: above the grammar's own cross-entropy on the training sequences (the Bayes
    # floor; only memorizing gets below it) and below the best training loss of any predictor that
    # sees just the current token and its position: the maximum-likelihood table of those counts
    # (the empirical conditional entropy, Cover & Thomas, Elements of Information Theory, sec. 2.2)
    source, n_train = datasets.token_corpus(), datasets.CORPUS_TRAIN
    inputs, targets = source.inputs[:n_train], source.targets[:n_train]
    keys = inputs * inputs.shape[1] + np.arange(inputs.shape[1])  # (token, position) as one index
    joint = np.zeros((keys.max() + 1, targets.max() + 1))
    np.add.at(joint, (keys.ravel(), targets.ravel()), 1)
    seen, rows = joint > 0, np.broadcast_to(joint.sum(axis=1, keepdims=True), joint.shape)
    context_free = -np.sum(joint[seen] * np.log(joint[seen] / rows[seen])) / targets.size
    floor = -source.log_prob[:n_train].mean()
    assert floor < TASKS["corpus_transformer"].target_loss < context_free
    # autoencoder: well below the error of answering the mean image (numpy)
    pixels = datasets.digits_reconstruction().train_x.double().numpy()
    mean_image_error = np.mean((pixels - pixels.mean(axis=0)) ** 2)
    assert TASKS["digits_autoencoder"].target_loss < mean_image_error / 3
    # regression: reachable, since least squares (numpy.linalg.lstsq) gets below it, but only
    # by fitting the small-scale features: dropping the 8 smallest ones misses it
    split = datasets.ill_conditioned_regression()
    x = np.hstack([split.train_x.double().numpy(), np.ones((len(split.train_x), 1))])
    y = split.train_y.double().numpy()
    best = np.mean((x @ np.linalg.lstsq(x, y, rcond=None)[0] - y) ** 2)
    assert best < TASKS["ill_conditioned_regression"].target_loss
    kept = np.hstack([x[:, :-9], x[:, -1:]])
    without_small = np.mean((kept @ np.linalg.lstsq(kept, y, rcond=None)[0] - y) ** 2)
    assert without_small > TASKS["ill_conditioned_regression"].target_loss
    assert np.linalg.cond(x.T @ x) > 1e6  # numpy.linalg.cond: badly conditioned on purpose


def test_ngopt_options_reach_every_natural_gradient_row_and_keep_its_curvature():
    from benchmarks.cli import build_parser, make_config
    args = build_parser().parse_args(["--optimizers", "fisher-descent,fisher-descent-ekfac,sgd",
                                      "--ngopt-option", "damping=0.001"])
    specs = {spec.name: spec for spec in make_config(args).specs}
    assert specs["fisher-descent"].natural_gradient_options["damping"] == 0.001
    assert specs["fisher-descent-ekfac"].natural_gradient_options == {"damping": 0.001, "structure": "ekfac"}
    assert specs["sgd"].natural_gradient_options is None


def test_variants_are_untuned_fisher_descent_rows_with_their_own_options_on_top():
    from benchmarks.cli import build_parser, make_config
    args = build_parser().parse_args(["--optimizers", "fisher-descent,sgd", "--ngopt-option", "damping=0.02",
                                      "--ngopt-option", "stats_memory=0.9", "--variant", "memory-0.8",
                                      "stats_memory=0.8", "--variant", "no-bound", "max_step_kl=None"])
    specs = {spec.name: spec for spec in make_config(args).specs}
    assert list(specs) == ["fisher-descent", "sgd", "memory-0.8", "no-bound"]
    assert specs["memory-0.8"].natural_gradient_options == {"damping": 0.02, "stats_memory": 0.8}
    assert specs["no-bound"].natural_gradient_options == {"damping": 0.02, "stats_memory": 0.9,
                                                          "max_step_kl": None}
    assert specs["memory-0.8"].lr_grid(4) == [None]  # untuned: one run per seed at the default lr
    if NGOPT_AVAILABLE:
        optimizer = specs["memory-0.8"].build(torch.nn.Linear(3, 2), torch.nn.MSELoss(), None)
        assert optimizer.stats_memory == 0.8 and optimizer.param_groups[0]["damping"] == 0.02


@pytest.mark.parametrize("variant, words", [
    (["sgd", "stats_memory=0.8"], "taken"),
    (["fisher-descent-ekfac", "damping=0.1"], "taken"),
    (["memory"], "at least one KEY=VALUE"),
    (["stats_memory=0.8"], "row name"),
    (["memory", "0.8"], "KEY=VALUE"),
    (["ngopt", "damping=0.1"], "taken"),  # results.json's name of the headline row
    (["a b", "damping=0.1"], "row name"),
])
def test_a_malformed_variant_is_a_usage_error_naming_the_option(variant, words):
    from benchmarks.cli import build_parser, make_config
    args = build_parser().parse_args(["--variant", *variant])
    with pytest.raises(ValueError, match=words):
        make_config(args)


@pytest.mark.skipif(not NGOPT_AVAILABLE, reason="ngopt.FisherDescent does not import")
def test_a_variant_named_twice_or_with_a_rejected_keyword_stops_before_any_run():
    from benchmarks.cli import build_parser, check_ready, make_config
    twice = build_parser().parse_args(["--variant", "a", "damping=0.1", "--variant", "a", "damping=0.2"])
    with pytest.raises(ValueError, match="taken"):
        make_config(twice)
    rejected = build_parser().parse_args(["--tasks", "digits_mlp", "--variant", "bad", "stats_memory=2"])
    with pytest.raises(ValueError, match=r"FisherDescent \(bad\) rejects"):
        check_ready(make_config(rejected))  # as main() runs them, before any training


@pytest.mark.skipif(not NGOPT_AVAILABLE, reason="ngopt.FisherDescent does not import")
def test_a_variant_with_the_default_settings_trains_as_the_headline_row(tmp_path):
    # The variant's row runs in turns with the headline's, from the same seed: with every keyword at its
    # default it must take the same steps (same process and thread count, so rel 1e-6 is generous).
    import inspect

    import ngopt
    default = inspect.signature(ngopt.FisherDescent.__init__).parameters["stats_memory"].default
    argv = ["--tasks", "digits_mlp", "--optimizers", "fisher-descent", "--variant", "same",
            f"stats_memory={default}", "--variant", "fresh", "stats_memory=0.0", "--steps", "12",
            "--seeds", "1", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    runs = {run["optimizer"]: run for run in json.loads((tmp_path / "results.json").read_text())["tasks"][0]["runs"]}
    headline = runs[SCHEMA_OPTIMIZER_NAMES[HEADLINE]]  # results.json's name for the headline row
    assert set(runs) == {SCHEMA_OPTIMIZER_NAMES[HEADLINE], "same", "fresh"}
    assert runs["same"]["steps_run"] == headline["steps_run"] == 12
    assert runs["same"]["final_train_loss"] == pytest.approx(headline["final_train_loss"], rel=1e-6)
    assert runs["fresh"]["final_train_loss"] != pytest.approx(headline["final_train_loss"], rel=1e-6)


def test_adaptive_evaluation_finds_the_target_step_within_its_stated_resolution():
    # Reference: the same run evaluated after every step. Evaluation runs in eval mode under no_grad
    # and does not touch the training state, so within one process both runs train identically.
    task = replace(TASKS["digits_mlp"], target_loss=0.3)
    spec, steps = OPTIMIZERS["sgd"], 60
    dense = train_run(task, spec, 0.3, seed=0, steps=steps, schedule=every_step(steps))
    sparse = train_run(task, spec, 0.3, seed=0, steps=steps, schedule=EvaluationSchedule(1, 10, steps))
    assert dense.curve_losses[-1] == sparse.curve_losses[-1]  # same training either way
    assert dense.steps_to_target is not None and dense.target_resolution == 1
    assert sparse.steps_to_target - sparse.target_resolution < dense.steps_to_target <= sparse.steps_to_target
    assert sparse.target_resolution == 1  # crossed while near the target: evaluated at the fine interval
    assert len(sparse.curve_steps) < len(dense.curve_steps) / 2
    assert sparse.curve_steps[-1] == steps


def test_fisher_descent_row_is_built_without_an_lr_unless_one_is_given(monkeypatch):
    if not NGOPT_AVAILABLE:
        pytest.skip("ngopt.FisherDescent does not import")
    import ngopt
    from benchmarks.cli import build_parser, make_config

    library = ngopt.FisherDescent
    keywords = []

    class Recording(library):
        def __init__(self, *args, **kwargs):
            keywords.append(kwargs)
            super().__init__(*args, **kwargs)

    monkeypatch.setattr(ngopt, "FisherDescent", Recording)
    optimizer = OPTIMIZERS["fisher-descent"].build(torch.nn.Linear(3, 2), torch.nn.MSELoss(), None)
    assert keywords[-1] == {}  # ngopt.FisherDescent(model, loss_fn) as a user writes it
    default = library(torch.nn.Linear(3, 2), torch.nn.MSELoss()).param_groups[0]["lr"]
    assert optimizer.param_groups[0]["lr"] == default
    # --ngopt-option keys go through unchecked, lr included when the user asks for one
    args = build_parser().parse_args(["--ngopt-option", "lr=0.05", "--ngopt-option", "stats_interval=5"])
    spec = make_config(args).specs[0]
    spec.build(torch.nn.Linear(3, 2), torch.nn.MSELoss(), None)
    assert spec.name == "fisher-descent" and keywords[-1] == {"lr": 0.05, "stats_interval": 5}
    # the tuned row centres its grid at the library's default, whatever it is
    tuned = OPTIMIZERS["fisher-descent-tuned"]
    assert tuned.grid_centre() == default
    assert math.prod(tuned.lr_grid(3)) == pytest.approx(default ** 3)  # geometric centre


def test_an_interrupted_benchmark_keeps_its_finished_runs(tmp_path, monkeypatch):
    from benchmarks.training import TrainingRun

    advance = TrainingRun.advance

    def ctrl_c_in_the_repeat_seed(self, stretch=None):
        if self.seed == 1:  # the second group: the chosen lrs on the second seed
            raise KeyboardInterrupt
        return advance(self, stretch)

    monkeypatch.setattr(TrainingRun, "advance", ctrl_c_in_the_repeat_seed)
    argv = ["--tasks", "digits_mlp", "--optimizers", "sgd,adam", "--steps", "3", "--grid", "2", "--seeds", "2",
            "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 130  # the shell's status after SIGINT
    results = json.loads((tmp_path / "results.json").read_text())
    status = results["status"]
    assert status["complete"] is False and "interrupted" in status["reason"]
    assert status["finished_runs"] == 4 and status["planned_runs"] == 2 * (2 + 1)
    assert "in task digits_mlp, after 4 of its 6 runs" in status["at"]
    entry = results["tasks"][0]
    assert entry["complete"] is False
    grids = {name: OPTIMIZERS[name].lr_grid(2) for name in ("sgd", "adam")}
    tuned = {(name, lr) for name, grid in grids.items() for lr in grid}
    assert {(run["method"], run["lr"]) for run in entry["runs"]} == tuned
    assert all(run["seed"] == 0 for run in entry["runs"])
    with (tmp_path / "curves.csv").open(newline="") as handle:
        curve_runs = {(row["optimizer"], float(row["lr"])) for row in csv.DictReader(handle)}
    assert curve_runs == tuned
    report = (tmp_path / "report.md").read_text()
    assert "This benchmark is unfinished (interrupted" in report and "4 of 6 runs finished" in report
    assert results["settings"]["wall_seconds"] > 0 and "- the benchmark ran " in report  # up to the stop
    assert (tmp_path / "loss_digits_mlp.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not list(tmp_path.glob(".*partial"))  # no temporary file left behind


def test_a_crashed_benchmark_keeps_its_finished_runs_and_names_the_error(tmp_path, monkeypatch):
    from benchmarks.training import TrainingRun

    advance = TrainingRun.advance

    def fail_in_the_repeat_seed(self, stretch=None):
        if self.seed == 1:
            raise RuntimeError("out of memory in the model")
        return advance(self, stretch)

    monkeypatch.setattr(TrainingRun, "advance", fail_in_the_repeat_seed)
    argv = ["--tasks", "digits_mlp", "--optimizers", "sgd", "--steps", "3", "--grid", "2", "--seeds", "2",
            "--out", str(tmp_path), "--no-progress"]
    with pytest.raises(RuntimeError, match="out of memory"):
        main(argv)
    results = json.loads((tmp_path / "results.json").read_text())
    assert results["status"]["reason"] == "error: RuntimeError: out of memory in the model"
    assert len(results["tasks"][0]["runs"]) == 2  # the two lrs of the first seed


def test_files_are_replaced_whole_or_not_at_all(tmp_path):
    # os.replace is atomic on one file system (Python docs, os.replace): a writer that fails
    # leaves the previous file as it was and no temporary file behind
    from benchmarks.results import write_atomically, write_text

    path = tmp_path / "results.json"
    write_text("first\n", path)

    def half_then_fail(temporary):
        temporary.write_text("half")
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        write_atomically(path, half_then_fail)
    assert path.read_text() == "first\n" and sorted(p.name for p in tmp_path.iterdir()) == ["results.json"]


def test_progress_is_one_plain_line_per_run_when_stderr_is_not_a_terminal(tmp_path, capsys):
    argv = ["--tasks", "ill_conditioned_regression", "--optimizers", "sgd", "--steps", "4", "--grid", "2",
            "--seeds", "2", "--out", str(tmp_path)]
    assert main(argv) == 0
    err = capsys.readouterr().err
    assert "\r" not in err  # no progress-bar refreshes in a redirected log
    lines = [line for line in err.splitlines() if line.startswith("ill_conditioned_regression run ")]
    assert [line.split(":")[0] for line in lines] == [f"ill_conditioned_regression run {k}/3" for k in (1, 2, 3)]
    assert main(argv + ["--no-progress"]) == 0
    assert capsys.readouterr().err == ""


def test_step_overhead_script_refuses_steps_off_the_inversion_period(capsys):
    if not NGOPT_AVAILABLE:
        pytest.skip("ngopt.FisherDescent does not import")
    script = runpy.run_path(str(REPOSITORY / "scripts" / "step_overhead.py"), run_name="step_overhead")
    with pytest.raises(SystemExit) as stopped:
        script["main"](["--steps", "55"])
    assert stopped.value.code == 2  # argparse's usage-error status
    assert "--steps must be a positive multiple of inverse_interval" in capsys.readouterr().err


def summary_of(seconds, reached=3, tuned=True, final=0.01):
    return {"seconds_to_target": seconds, "reached": reached, "runs": 3, "lr_tuned": tuned, "final_train_loss": final}


def test_verdict_names_the_first_to_the_target_and_the_time_ratio():
    from benchmarks.verdict import caution, task_verdict

    entry = {"task": "t", "target_loss": 0.01, "steps": 100, "load_average_max": 1.0,
             "summary": {"fisher-descent": summary_of(0.58, tuned=False), "sgd": summary_of(None, reached=0),
                         "adam": summary_of(1.0)}}
    text = task_verdict(entry, threads=2)
    assert "fisher-descent (untuned) reached the target first, in 0.58 s" in text
    assert "0.58× adam's time (1 s), the next fastest" in text and "sgd did not reach it" in text
    assert "best baseline" not in text  # adam, the best baseline, is the next fastest: said once
    assert "[load" not in text
    entry["load_average_max"] = 5.0  # above the 2 threads: other processes competed
    assert task_verdict(entry, threads=2).endswith(". [load 5.0]")
    assert "load average reached L (up to 5.0) with 2" in caution({"settings": {"threads": 2}, "tasks": [entry]})
    entry["summary"]["fisher-descent"] = summary_of(1.5, tuned=False)
    text = task_verdict(entry, threads=2)
    assert "adam reached the target first" in text
    assert "fisher-descent (untuned) took 1.50× the time of the best baseline, adam" in text
    # a faster baseline beside adam: fisher-descent is set against the best of all of them
    entry["summary"]["adamw-cosine"] = summary_of(0.5)
    assert "took 3.00× the time of the best baseline, adamw-cosine" in task_verdict(entry, threads=2)
    entry["summary"] = {"sgd": summary_of(None, 0, final=0.2), "adam": summary_of(None, 0, final=0.1)}
    assert "no optimizer reached the target; the lowest final training loss was adam's, 0.1" in \
        task_verdict(entry, threads=2)


def test_near_the_target_means_the_last_quarter_of_the_way_on_a_log_scale():
    from benchmarks.evaluation import near_threshold

    # from chance-level cross-entropy log 10 to 0.01: 0.01 * (log(10) / 0.01) ** 0.25, by hand
    assert near_threshold(math.log(10), 0.01) == pytest.approx(0.01 * (100 * math.log(10)) ** 0.25, rel=1e-12)
    assert near_threshold(0.5, 1.0) == math.inf  # already below the target: evaluate densely
    assert near_threshold(1.0, 0.0) == near_threshold(1.0, -math.inf) == math.inf  # no log scale


def test_step_overhead_schedule_estimate_counts_every_amortized_part(capsys):
    if not NGOPT_AVAILABLE:
        pytest.skip("ngopt.FisherDescent does not import")
    script = runpy.run_path(str(REPOSITORY / "scripts" / "step_overhead.py"), run_name="step_overhead")
    estimate = script["schedule_flop_estimate"]
    intervals = {"stats_interval": 10, "inverse_interval": 20, "damping_interval": 5}
    # One d x d layer at batch B = d, counted by hand in units of d^3 (common practice: a d x d by d x B
    # product is 2 B d^2 flops): forward+backward 6; preconditioning 4 per step; the check, a forward (2)
    # and the model change (4), every 5 steps; the factor statistics (2 + 2, no extra backward below the
    # lowest layer) every 10; Cholesky and inverse of both factors (1 + 1) every 20.
    expected = 1 + (4 + 6 / 5 + 4 / 10 + 2 / 20) / 6
    assert estimate([64, 64], 64, "kfac", intervals) == pytest.approx(expected, rel=1e-12)
    assert estimate([64, 64], 64, "kfac", intervals) > script["flop_count_estimate"]([64, 64], 64, 2)
    longer = dict(intervals, damping_interval=10)
    assert estimate([64, 64, 64], 64, "kfac", longer) < estimate([64, 64, 64], 64, "kfac", intervals)
    script["main"](["--width", "8", "--batches", "8", "--steps", "20", "--warmup", "1", "--rounds", "1"])
    out = capsys.readouterr().out
    assert "precond. est." in out and "schedule est." in out


def test_an_evaluation_in_chunks_is_the_whole_set_evaluation():
    from benchmarks.evaluation import EVALUATION_CHUNK, evaluate

    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Conv2d(1, 4, 3), torch.nn.BatchNorm2d(4), torch.nn.ReLU(),
                                torch.nn.Flatten(), torch.nn.Linear(4 * 6 * 6, 5))
    model(torch.randn(64, 1, 8, 8))  # running statistics away from their initial values
    inputs, labels = torch.randn(2 * EVALUATION_CHUNK + 37, 1, 8, 8), torch.randint(0, 5, (2 * EVALUATION_CHUNK + 37,))
    loss_fn = torch.nn.CrossEntropyLoss()
    whole = evaluate(model, loss_fn, inputs, labels)
    # The same per-example arithmetic in other batch shapes: float32 rounding only (common practice: 1e-6 relative).
    assert evaluate(model, loss_fn, inputs, labels, chunk=EVALUATION_CHUNK) == pytest.approx(whole, rel=1e-6)
    assert model.training  # eval mode only for the evaluation


def test_outputs_that_cannot_be_joined_are_evaluated_whole():
    from benchmarks.evaluation import outputs_in_chunks

    calls = []

    def model(x):
        calls.append(len(x))
        return x.sum(dim=1), x.mean(dim=1)

    outputs = outputs_in_chunks(model, torch.ones(10, 3), chunk=4)
    assert calls == [4, 4, 2, 10] and torch.equal(outputs[0], torch.full((10,), 3.0))


@pytest.mark.parametrize("chunked_cost, expected", [(0.5, "chunk"), (0.94, "chunk"), (0.96, None), (2.0, None)])
def test_chunks_are_used_only_where_they_save_a_twentieth(monkeypatch, chunked_cost, expected):
    from benchmarks import evaluation

    clock = [0.0]
    monkeypatch.setattr(evaluation.time, "perf_counter", lambda: clock[0])

    def timed_evaluate(model, loss_fn, inputs, targets, chunk=None):  # a clock that advances by the cost
        clock[0] += 1.0 if chunk is None else chunked_cost

    monkeypatch.setattr(evaluation, "evaluate", timed_evaluate)
    inputs = torch.zeros(evaluation.EVALUATION_CHUNK + 1, 2)
    chosen = evaluation.fastest_forward_chunk(None, None, inputs, None)
    assert chosen == (evaluation.EVALUATION_CHUNK if expected == "chunk" else None)
    assert evaluation.fastest_forward_chunk(None, None, inputs[:evaluation.EVALUATION_CHUNK], None) is None


def test_files_are_rewritten_after_a_run_only_once_the_write_interval_has_passed(tmp_path, monkeypatch):
    # Every file holds every finished run, so rewriting them after each run grows with the square of
    # the runs; after single runs they wait WRITE_EVERY seconds, after a task and at the end they do not.
    from benchmarks import outputs as outputs_module
    from benchmarks.evaluation import EvaluationSchedule
    from benchmarks.harness import TaskOutcome

    written = []
    monkeypatch.setattr(outputs_module.results, "write_json", lambda payload, path: written.append(payload))
    monkeypatch.setattr(outputs_module.results, "write_curves", lambda outcomes, path: None)
    monkeypatch.setattr(outputs_module.results, "write_text", lambda text, path: None)
    monkeypatch.setattr(outputs_module.report, "markdown_report", lambda payload, plots: "")
    now = [100.0]
    outputs = outputs_module.ProgressiveOutputs(tmp_path, {}, {}, total_runs=4, clock=lambda: now[0])
    outcome = TaskOutcome(TASKS["ill_conditioned_regression"], 10, EvaluationSchedule.for_steps(10), planned_runs=4)
    outputs.run_finished(outcome)
    assert len(written) == 1  # the first run is written at once
    now[0] += outputs_module.WRITE_EVERY / 2
    outputs.run_finished(outcome)
    assert len(written) == 1
    now[0] += outputs_module.WRITE_EVERY / 2
    outputs.run_finished(outcome)
    assert len(written) == 2
    outputs.task_finished(outcome)  # at once, whatever the clock says
    assert len(written) == 3
    outputs.finished()
    assert len(written) == 4 and written[-1]["status"]["complete"] is True


def test_curvature_seconds_to_target_are_the_curvature_timers_when_the_target_fell():
    # The run's own timers at the evaluation that met the target: a share of its seconds to target,
    # and nothing for an optimizer without them.
    if not NGOPT_AVAILABLE:
        pytest.skip("ngopt.FisherDescent does not import")
    from benchmarks.harness import curvature_free_seconds
    from benchmarks.training import CURVATURE_PARTS

    task = replace(TASKS["digits_mlp"], target_loss=0.3)
    natural = train_run(task, OPTIMIZERS[HEADLINE], None, seed=0, steps=30, schedule=every_step(30))
    assert natural.steps_to_target is not None
    assert 0 < natural.curvature_seconds_to_target < natural.seconds_to_target
    # the timers only grow: at the target they are at most the whole run's
    whole = sum(natural.time_split[key] for key in CURVATURE_PARTS)
    assert natural.curvature_seconds_to_target <= whole * (1 + 1e-12)
    assert curvature_free_seconds(natural) == pytest.approx(natural.seconds_to_target
                                                            - natural.curvature_seconds_to_target)
    # the preconditioning products' timer the same way, a part of the step outside the curvature work
    assert 0 < natural.precondition_seconds_to_target < natural.seconds_to_target - natural.curvature_seconds_to_target
    assert natural.precondition_seconds_to_target <= natural.time_split["precondition"] * (1 + 1e-12)
    plain = train_run(task, OPTIMIZERS["sgd"], 0.3, seed=0, steps=30, schedule=every_step(30))
    assert plain.steps_to_target is not None and plain.curvature_seconds_to_target is None
    assert plain.precondition_seconds_to_target is None
    assert curvature_free_seconds(plain) is None


def test_curvature_free_ratio_and_its_line_say_whether_cheaper_curvature_could_lead():
    from benchmarks.comparison import compare
    from benchmarks.report import curvature_free_line, overview_headers, overview_rows

    def entry(free):
        method = dict(summary_of(2.0, tuned=False), curvature_free_seconds_to_target=free, train_seconds=5.0)
        summaries = {HEADLINE: method, "sgd": dict(summary_of(1.0), train_seconds=3.0),
                     "adam": dict(summary_of(None, reached=0), train_seconds=3.0)}
        for summary in summaries.values():
            summary.update(steps_to_target=10, step_seconds_median=0.01)
        return {"task": "t", "target_loss": 0.1, "summary": summaries,
                "comparison": compare(summaries, 100, None, 32)}

    slow, fast = entry(1.5), entry(0.8)
    assert slow["comparison"]["curvature_free_time"] == {"ratio": 1.5, "relation": "measured"}
    assert "would have taken 1.5 s, 1.50× sgd's time" in curvature_free_line(slow)
    assert "0.5 of its 2 s to target" in curvature_free_line(slow)
    assert "could not put it ahead" in curvature_free_line(slow)
    assert "0.80× sgd's time; cheaper curvature could put it ahead" in curvature_free_line(fast)
    results = {"settings": {"optimizers": [HEADLINE, "sgd", "adam"]}}
    headers = overview_headers(results)
    row = overview_rows(results, [slow])[0]
    assert row[headers.index(f"time {HEADLINE}/best")] == "2.00"
    assert row[headers.index(f"time {HEADLINE}/best, curvature work free")] == "1.50"
    unreached = entry(None)
    assert unreached["comparison"]["curvature_free_time"] is None and curvature_free_line(unreached) is None


def test_preconditioning_floor_counts_the_cheapest_baseline_step_and_says_whether_only_fewer_steps_help():
    # floor = steps to target x the cheapest baseline's median step + the preconditioning's seconds to target
    from benchmarks.comparison import compare
    from benchmarks.report import floor_line, overview_headers, overview_rows

    def entry(preconditioning, best_seconds=1.0, steps=40):
        method = dict(summary_of(2.0, tuned=False), steps_to_target=steps, step_seconds_median=0.05,
                      precondition_seconds_to_target=preconditioning, train_seconds=5.0)
        summaries = {HEADLINE: method,
                     "sgd": dict(summary_of(best_seconds), steps_to_target=100, step_seconds_median=0.01,
                                 train_seconds=3.0),
                     "adam": dict(summary_of(3.0), steps_to_target=100, step_seconds_median=0.02, train_seconds=3.0)}
        return {"task": "t", "target_loss": 0.1, "summary": summaries,
                "comparison": compare(summaries, 100, None, 32)}

    slow = entry(0.8)  # 40 x 0.01 s (sgd's step, the cheaper) + 0.8 s = 1.2 s against sgd's 1 s
    floor = slow["comparison"]["preconditioning_floor_time"]
    assert floor["relation"] == "measured" and floor["step_of"] == "sgd"
    assert floor["seconds"] == pytest.approx(1.2) and floor["ratio"] == pytest.approx(1.2)
    assert "would have taken 1.2 s, 1.20× sgd's time; no cheaper curvature" in floor_line(slow)
    assert "sgd's median step (10 ms)" in floor_line(slow) and "(0.8 s in all)" in floor_line(slow)
    fast = entry(0.3)  # 0.7 s against 1 s
    assert fast["comparison"]["preconditioning_floor_time"]["ratio"] == pytest.approx(0.7)
    assert "0.70× sgd's time; a cheaper rest of its step could put it ahead" in floor_line(fast)
    results = {"settings": {"optimizers": [HEADLINE, "sgd", "adam"]}}
    row = overview_rows(results, [slow])[0]
    assert row[overview_headers(results).index(f"time {HEADLINE}/best, baseline step + preconditioning")] == "1.20"
    # no baseline reached the target: the floor bounds the ratio from above, as the time ratio does
    unreached = entry(0.8)
    for name in ("sgd", "adam"):
        unreached["summary"][name].update(seconds_to_target=None, reached=0)
    unreached["comparison"] = compare(unreached["summary"], 100, None, 32)
    assert unreached["comparison"]["preconditioning_floor_time"]["relation"] == "at_most"
    assert "(no baseline reached the target)" in floor_line(unreached)
    # fisher-descent did not reach it, or kept no timers: no floor
    for missing in (dict(steps_to_target=None, seconds_to_target=None), dict(precondition_seconds_to_target=None)):
        other = entry(0.8)
        other["summary"][HEADLINE].update(missing)
        other["comparison"] = compare(other["summary"], 100, None, 32)
        assert other["comparison"]["preconditioning_floor_time"] is None and floor_line(other) is None


def test_setting_step_time_times_every_setting_on_built_in_and_held_out_tasks():
    import runpy
    script = runpy.run_path(str(REPOSITORY / "scripts" / "setting_step_time.py"), run_name="setting_step_time")
    settings = {"defaults": {}, "rarer": {"stats_interval": 10, "inverse_interval": 20}}
    for task in ("ill_conditioned_regression", "friedman1_deep_mlp"):  # built-in, held-out
        means = script["mean_step_ms"](task, settings, 20)
        assert set(means) == {"defaults", "rarer"} and all(value > 0 for value in means.values())


def test_settings_compared_side_by_side_see_the_same_minibatches():
    # Two runs of the same setting must end with equal weights: same start, same batches, same arithmetic.
    import runpy
    script = runpy.run_path(str(REPOSITORY / "scripts" / "setting_step_time.py"), run_name="setting_step_time")
    import ngopt
    task = TASKS["ill_conditioned_regression"]
    runs = {}
    for name in ("one", "two"):
        torch.manual_seed(0)
        model, loss_fn = task.build_model(), task.make_loss()
        runs[name] = (model, loss_fn, ngopt.FisherDescent(model, loss_fn, seed=0), [])
    script["take_turns"](task, task.load_data(), runs, 40)
    assert all(len(run[3]) == 40 for run in runs.values())
    for p, q in zip(runs["one"][0].parameters(), runs["two"][0].parameters()):
        assert torch.equal(p, q)


def test_turn_taking_script_prints_both_ways_and_the_ratio_ranges(capsys):
    import runpy
    script = runpy.run_path(str(REPOSITORY / "scripts" / "turn_taking.py"), run_name="turn_taking")
    assert script["main"](["--task", "digits_mlp", "--optimizers", "fisher-descent,sgd:0.1", "--rounds", "2",
                           "--steps", "4", "--turn", "2", "--threads", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 2 * 2 + 2
    assert lines[0].startswith("round 1, one after the other: median step fisher-descent ")
    assert lines[1].startswith("round 1, in turns: median step fisher-descent ")
    for line in lines[-2:]:
        way, _, span = line.partition(": ")
        assert way in ("one after the other", "in turns") and span.startswith("fisher-descent/sgd ")
        low, high = (float(value) for value in span.split(" ")[1].split("-"))
        assert 0 < low <= high
    with pytest.raises(SystemExit, match="unknown optimizer 'sgdd'"):
        script["parse_optimizers"]("sgdd:0.1")
    with pytest.raises(SystemExit):
        script["main"](["--task", "digits_mlp", "--rounds", "0"])
    assert "--rounds must be at least 1, got 0" in capsys.readouterr().err


def _git_checkout() -> bool:
    try:
        return subprocess.run(["git", "-C", str(REPOSITORY), "rev-parse", "HEAD"], capture_output=True).returncode == 0
    except OSError:
        return False


@pytest.mark.skipif(not _git_checkout(), reason="not a git checkout with git installed")
def test_revision_step_time_compares_a_revision_with_the_checkout(capsys):
    import runpy
    script = runpy.run_path(str(REPOSITORY / "scripts" / "revision_step_time.py"), run_name="revision_step_time")
    assert script["main"](["--base", "HEAD", "--tasks", "ill_conditioned_regression", "--steps", "20",
                           "--threads", "1"]) == 0
    line = capsys.readouterr().out.strip().splitlines()[-1]
    assert line.startswith("ill_conditioned_regression: HEAD ") and " | ratio " in line and "weights equal: " in line
    assert "ngopt_at_revision" not in sys.modules  # nothing of the revision stays behind
    with pytest.raises(SystemExit) as refused:  # a revision that does not exist: status 2, as argparse
        script["main"](["--base", "no-such-revision-anywhere", "--tasks", "ill_conditioned_regression"])
    assert refused.value.code == 2
    with pytest.raises(SystemExit) as refused:
        script["main"](["--tasks", "no_such_task"])
    assert refused.value.code == 2


def test_revision_step_time_without_git_is_a_clear_refusal(monkeypatch, capsys):
    import runpy
    import types
    script = runpy.run_path(str(REPOSITORY / "scripts" / "revision_step_time.py"), run_name="revision_step_time")

    def no_git(*args, **kwargs):
        raise FileNotFoundError(2, "No such file or directory", "git")

    monkeypatch.setitem(script["import_revision"].__globals__, "subprocess", types.SimpleNamespace(run=no_git))
    with pytest.raises(SystemExit) as refused:
        script["main"](["--tasks", "ill_conditioned_regression", "--steps", "20"])
    assert refused.value.code == 2 and "git could not run" in capsys.readouterr().err


def test_gpu_timing_splits_fisher_descents_timed_steps_and_refuses_without_a_gpu(capsys):
    # scripts/gpu_timing.py runs only with CUDA; its timing core runs on any device.
    import runpy
    import ngopt
    script = runpy.run_path(str(REPOSITORY / "scripts" / "gpu_timing.py"), run_name="gpu_timing")
    task = TASKS["ill_conditioned_regression"]
    data = task.load_data()
    torch.manual_seed(0)
    model, loss_fn = task.build_model(), task.make_loss()
    opt = ngopt.FisherDescent(model, loss_fn)
    mean, slowest, peak, split = script["timed"](model, opt, loss_fn, data.train_x, data.train_y, task.batch_size,
                                                 steps=10, warmup=3, device=torch.device("cpu"))
    assert 0 < mean <= slowest and peak is None
    # the split covers the timed steps only: its parts add up to no more than the measured mean step
    assert split["step_total"] > 0 and split["step_total"] <= 1e3 * mean * 1.01
    assert "inversion" in script["split_line"]("t", split)
    adam = torch.optim.AdamW(model.parameters(), lr=1e-3)
    assert script["timed"](model, adam, loss_fn, data.train_x, data.train_y, task.batch_size, steps=2, warmup=1,
                           device=torch.device("cpu"))[3] is None
    if not torch.cuda.is_available():
        assert script["main"]([]) == 2 and "no CUDA device" in capsys.readouterr().err
