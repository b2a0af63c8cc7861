"""Tests of the held-out benchmark tasks: their data, models, targets, a few training steps each,
the --tasks option that selects them and the report that sets them apart.

The data checks compare with what scikit-learn's and mnist1d's documentation
say of the data sets (sizes, feature counts, classes); the training checks run
a few steps of FisherDescent at its defaults and of Adam at the centre of its
grid, each in about a second.
"""

from __future__ import annotations

import json
import math
import socket

import numpy as np
import pytest
import torch
from torch import nn

from benchmarks import datasets
from benchmarks.cli import build_parser, main, make_config
from benchmarks.evaluation import EvaluationSchedule, accuracy
from benchmarks.held_out import HELD_OUT_TASKS
from benchmarks.optimizers import OPTIMIZERS, natural_gradient_available
from benchmarks.report import HELD_OUT_NOTE
from benchmarks.task_sets import DEFAULT_TASKS, resolve_tasks
from benchmarks.tasks import TASKS
from benchmarks.training import train_run
from benchmarks.verdict import HELD_OUT_HEADING

# task -> (train inputs, train targets, test inputs, test targets) shapes and the target dtype
SHAPES = {
    # sklearn.datasets.load_breast_cancer: 569 samples, 30 features; an 80/20 split
    "breast_cancer_mlp": ((455, 30), (455, 1), (114, 30), (114, 1), torch.float32),
    "friedman1_deep_mlp": ((2048, 10), (2048, 1), (512, 10), (512, 1), torch.float32),
    # mnist1d.data.get_dataset_args(): 4000 train / 1000 test sequences of length 40
    "mnist1d_conv1d": ((4000, 1, 40), (4000,), (1000, 1, 40), (1000,), torch.int64),
    # sklearn.datasets.load_digits: 1797 images, split 1437 / 360 (benchmarks.datasets)
    "digits_layernorm_mlp": ((1437, 64), (1437,), (360, 64), (360,), torch.int64),
    "many_class_wide_mlp": ((4000, 40), (4000,), (1000, 40), (1000,), torch.int64),
}
STANDARDIZED = ("breast_cancer_mlp", "friedman1_deep_mlp", "many_class_wide_mlp")
CACHED_LOADERS = (datasets.breast_cancer, datasets.friedman1, datasets.many_classes, datasets.mnist1d)


def test_every_held_out_task_has_its_shapes_stated_here():
    assert set(SHAPES) == set(HELD_OUT_TASKS)
    assert not set(HELD_OUT_TASKS) & set(TASKS)  # no name in both sets
    assert all(task.held_out for task in HELD_OUT_TASKS.values())
    assert not any(task.held_out for task in TASKS.values())


def refuse_network(*args, **kwargs):
    raise OSError("network access attempted while loading benchmark data")


@pytest.mark.parametrize("name", list(HELD_OUT_TASKS))
def test_data_loads_offline_with_the_stated_shapes(name, monkeypatch):
    for loader in CACHED_LOADERS:
        loader.cache_clear()  # build the data again, with the network refused
    monkeypatch.setattr(socket.socket, "connect", refuse_network)
    monkeypatch.setattr(socket, "create_connection", refuse_network)
    split = HELD_OUT_TASKS[name].load_data()
    *shapes, target_dtype = SHAPES[name]
    assert [tuple(t.shape) for t in (split.train_x, split.train_y, split.test_x, split.test_y)] == shapes
    assert split.train_x.dtype == split.test_x.dtype == torch.float32
    assert split.train_y.dtype == split.test_y.dtype == target_dtype
    assert all(torch.isfinite(t).all() for t in (split.train_x, split.test_x))
    if name in STANDARDIZED:  # scaled by the training set's own mean and standard deviation
        torch.testing.assert_close(split.train_x.mean(0), torch.zeros(shapes[0][1]), atol=1e-5, rtol=0)
        torch.testing.assert_close(split.train_x.std(0, unbiased=False), torch.ones(shapes[0][1]), atol=1e-4, rtol=0)


def test_labels_are_the_stated_classes():
    cancer = datasets.breast_cancer()
    assert set(cancer.train_y.unique().tolist()) == {0.0, 1.0}  # malignant / benign
    many = datasets.many_classes()
    assert set(many.train_y.unique().tolist()) == set(range(datasets.MANY_CLASSES))
    # the 1-D sequences are mnist1d's own, with a channel axis added
    assert torch.equal(datasets.mnist1d_sequences().train_x[:, 0], datasets.mnist1d().train_x)
    friedman = datasets.friedman1()
    assert abs(float(friedman.train_y.mean())) < 1e-5 and abs(float(friedman.train_y.std(unbiased=False)) - 1) < 1e-4


@pytest.mark.parametrize("name", list(HELD_OUT_TASKS))
def test_model_maps_a_batch_to_what_the_loss_takes(name):
    task = HELD_OUT_TASKS[name]
    split = task.load_data()
    torch.manual_seed(0)
    model, loss_fn = task.build_model(), task.make_loss()
    inputs, targets = split.train_x[:task.batch_size], split.train_y[:task.batch_size]
    outputs = model(inputs)
    assert outputs.shape[0] == task.batch_size
    loss = loss_fn(outputs, targets)
    assert loss.dim() == 0 and math.isfinite(loss.item())


def test_single_logit_accuracy_is_the_share_of_signs_that_match_the_labels():
    logits = torch.tensor([[2.0], [-1.0], [0.5], [-0.2]])
    labels = torch.tensor([[1.0], [1.0], [0.0], [0.0]])
    assert accuracy(logits, labels) == pytest.approx(0.5)  # right on the first and the last
    assert accuracy(torch.tensor([[0.1, 0.9], [0.8, 0.2]]), torch.tensor([1, 1])) == pytest.approx(0.5)


TRAINING_STEPS = 12
ROWS = (["fisher-descent"] if natural_gradient_available()[0] else []) + ["adam"]


@pytest.mark.parametrize("row", ROWS)
@pytest.mark.parametrize("name", list(HELD_OUT_TASKS))
def test_a_few_steps_lower_the_training_loss(name, row):
    spec = OPTIMIZERS[row]
    run = train_run(HELD_OUT_TASKS[name], spec, spec.lr_centre, seed=0, steps=TRAINING_STEPS,
                    schedule=EvaluationSchedule(TRAINING_STEPS, TRAINING_STEPS, TRAINING_STEPS))
    assert run.steps_run == TRAINING_STEPS and not run.diverged
    initial, final = run.curve_losses[0], run.curve_losses[-1]
    assert final < 0.9 * initial, (initial, final)


def test_targets_lie_between_the_start_and_the_best_possible_loss():
    tasks = HELD_OUT_TASKS
    # classifiers: well below the cross-entropy of chance, log(classes)
    assert tasks["breast_cancer_mlp"].target_loss < math.log(2) / 10
    for name in ("mnist1d_conv1d", "digits_layernorm_mlp"):
        assert tasks[name].target_loss < math.log(10) / 5
    assert tasks["many_class_wide_mlp"].target_loss < math.log(datasets.MANY_CLASSES) / 10
    # regression: above the noise variance (no model's expected error is below it) and below the
    # best linear fit's training error (numpy.linalg.lstsq), so the network must model the nonlinearity
    split = datasets.friedman1()
    x = np.hstack([split.train_x.double().numpy(), np.ones((len(split.train_x), 1))])
    y = split.train_y.double().numpy()
    linear = np.mean((x @ np.linalg.lstsq(x, y, rcond=None)[0] - y) ** 2)
    target = tasks["friedman1_deep_mlp"].target_loss
    assert 2 * datasets.friedman1_noise_floor() < target < linear / 2


def chosen_tasks(*argv: str) -> list[str]:
    return [task.name for task in make_config(build_parser().parse_args(list(argv))).tasks]


def test_tasks_option_selects_the_held_out_set_and_single_tasks():
    assert chosen_tasks() == list(DEFAULT_TASKS)  # the default run leaves the held-out tasks out
    assert not set(chosen_tasks()) & set(HELD_OUT_TASKS)
    assert chosen_tasks("--tasks", "held-out") == list(HELD_OUT_TASKS)
    assert chosen_tasks("--tasks", "mnist1d_conv1d,digits_mlp") == ["mnist1d_conv1d", "digits_mlp"]
    # sets and names mix; a task named twice runs once
    assert chosen_tasks("--tasks", "breast_cancer_mlp,held-out") == list(HELD_OUT_TASKS)
    assert chosen_tasks("--tasks", "built-in,held-out") == list(DEFAULT_TASKS) + list(HELD_OUT_TASKS)
    with pytest.raises(ValueError, match="valid tasks: .*many_class_wide_mlp.*or a set: built-in, held-out"):
        resolve_tasks(["held_out"])


def test_report_sets_the_held_out_tasks_apart(tmp_path, capsys):
    argv = ["--tasks", "digits_mlp,breast_cancer_mlp", "--optimizers", "sgd", "--steps", "2", "--grid", "1",
            "--seeds", "1", "--threads", "1", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    console = capsys.readouterr().out
    results = json.loads((tmp_path / "results.json").read_text())
    assert [(entry["task"], entry["held_out"]) for entry in results["tasks"]] == [
        ("digits_mlp", False), ("breast_cancer_mlp", True)]
    report = (tmp_path / "report.md").read_text()
    built_in, _, held_out = report.partition(f"## {HELD_OUT_HEADING}")
    # the built-in overview table (before the held-out heading) has digits_mlp only; the held-out one the other
    overview = built_in[built_in.index("## Overview"):]
    assert "| digits_mlp |" in overview and "breast_cancer_mlp" not in overview
    held_out_table = held_out[:held_out.index("\n## ")]
    assert HELD_OUT_NOTE in held_out_table and "| breast_cancer_mlp |" in held_out_table
    assert "digits_mlp" not in held_out_table
    assert "## breast_cancer_mlp (held-out)" in report and "## digits_mlp\n" in report
    # the verdict lists the held-out task under its own heading, after the built-in one
    verdict = report[report.index("## Verdict"):report.index("## Settings")]
    assert verdict.index("- digits_mlp") < verdict.index(HELD_OUT_HEADING) < verdict.index("- breast_cancer_mlp")
    summary = console[console.index("Overview ("):]
    assert summary.index("digits_mlp") < summary.index(f"{HELD_OUT_HEADING}: overview") < summary.index(
        "breast_cancer_mlp")
    assert "breast_cancer_mlp (held-out: defaults never tuned on it)" in console


def test_a_run_of_built_in_tasks_alone_has_no_held_out_heading(tmp_path, capsys):
    argv = ["--tasks", "ill_conditioned_regression", "--optimizers", "sgd", "--steps", "2", "--grid", "1",
            "--seeds", "1", "--threads", "1", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    assert HELD_OUT_HEADING not in capsys.readouterr().out
    assert HELD_OUT_HEADING not in (tmp_path / "report.md").read_text()


def test_breast_cancer_model_has_one_logit_per_example():
    model = HELD_OUT_TASKS["breast_cancer_mlp"].build_model()
    assert isinstance(HELD_OUT_TASKS["breast_cancer_mlp"].make_loss(), nn.BCEWithLogitsLoss)
    assert tuple(model(torch.zeros(3, 30)).shape) == (3, 1)
