"""``ngopt.log_diagnostics`` on a real optimizer: when records are written and what they hold."""
import csv
import logging
import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt import diagnostic_keys, diagnostics_log
from ngopt.diagnostics_log import log_diagnostics, read_csv_log, read_jsonl_log


def small_run_setup(seed=0):
    torch.manual_seed(seed)
    x = torch.randn(64, 6)
    y = torch.randint(0, 3, (64,))
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 3))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1, stats_interval=2, inverse_interval=4)
    return x, y, model, loss_fn, opt


def train(x, y, model, loss_fn, opt, steps, handle=None):
    loss = None
    for _ in range(steps):
        opt.zero_grad()
        loss = loss_fn(model(x), y)
        loss.backward()
        if handle is not None:
            handle.note_loss(loss)
        opt.step()
    return loss


def test_records_every_n_steps_and_a_final_one_on_close(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup()
    path = tmp_path / "run.jsonl"
    handle = log_diagnostics(opt, path, every=5)
    train(x, y, model, loss_fn, opt, 12, handle)
    assert [r["step"] for r in read_jsonl_log(path)] == [5, 10]  # flushed while training
    handle.close()
    records = read_jsonl_log(path)
    assert [r["step"] for r in records] == [5, 10, 12]
    assert handle.records_written == 3
    # after close the hook is gone: more steps write nothing
    train(x, y, model, loss_fn, opt, 5)
    assert len(read_jsonl_log(path)) == 3
    final = records[-1]
    snap = opt.diagnostics()
    assert final["skipped_steps"] == snap["skipped_steps"] == 0
    assert set(final["layers"]) == set(snap["layers"]) == {"0", "2"}
    assert isinstance(final["wall_time"], float) and final["log_seconds"] >= 0.0
    assert records[0]["wall_time"] <= records[1]["wall_time"] <= final["wall_time"]


def test_record_is_the_snapshot_plus_wall_time(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup(1)
    path = tmp_path / "run.jsonl"
    with log_diagnostics(opt, path, every=3):
        train(x, y, model, loss_fn, opt, 3)
        snap = opt.diagnostics()
    (record,) = read_jsonl_log(path)
    extra = set(record) - set(snap)
    assert extra == {"wall_time", "log_seconds"}
    for name, entry in snap["layers"].items():
        for key, value in entry.items():
            logged = record["layers"][name][key]
            if isinstance(value, (str, bool)) or value is None:  # labels and flags: exactly as given
                assert logged == value, (name, key)
            else:  # numbers through JSON: a float64 round trip is exact, 1e-15 leaves room for the text form
                assert logged == pytest.approx(value, rel=1e-15), (name, key)
    assert record["update"]["grad_norm"] == pytest.approx(snap["update"]["grad_norm"], rel=1e-15)


def test_noted_loss_fills_update_loss(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup(2)
    path = tmp_path / "run.jsonl"
    handle = log_diagnostics(opt, path, every=4)
    last_loss = train(x, y, model, loss_fn, opt, 4, handle)
    handle.close()
    (record,) = read_jsonl_log(path)
    assert record["update"]["loss"] == last_loss.item()


def test_spectra_tracking_is_switched_on_and_restored(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup(3)
    assert opt.track_spectra is False
    handle = log_diagnostics(opt, tmp_path / "run.jsonl", every=4)
    assert opt.track_spectra is True
    train(x, y, model, loss_fn, opt, 4)
    handle.close()
    assert opt.track_spectra is False
    (record,) = read_jsonl_log(tmp_path / "run.jsonl")
    entry = record["layers"]["0"]
    assert len(entry["in_eigenvalues"]) == entry["in_dim"] == 7
    assert len(entry["out_eigenvalues"]) == entry["out_dim"] == 8
    handle = log_diagnostics(opt, tmp_path / "plain.jsonl", every=4, spectra=False)
    train(x, y, model, loss_fn, opt, 4)
    handle.close()
    assert "in_eigenvalues" not in read_jsonl_log(tmp_path / "plain.jsonl")[0]["layers"]["0"]


def test_several_targets_at_once(tmp_path, caplog):
    x, y, model, loss_fn, opt = small_run_setup(4)
    logger = logging.getLogger("ngopt.test.run")
    with caplog.at_level(logging.INFO, logger=logger.name):
        with log_diagnostics(opt, [tmp_path / "run.jsonl", tmp_path / "run.csv", logger], every=2):
            train(x, y, model, loss_fn, opt, 6)
    jsonl = read_jsonl_log(tmp_path / "run.jsonl")
    csv_records = read_csv_log(tmp_path / "run.csv")
    assert [r["step"] for r in jsonl] == [r["step"] for r in csv_records] == [2, 4, 6]
    for a, b in zip(jsonl, csv_records):
        assert b["layers"]["2"]["condition"] == pytest.approx(a["layers"]["2"]["condition"], rel=1e-15)
        assert b["update"]["cosine"] == pytest.approx(a["update"]["cosine"], rel=1e-15)
    lines = [r.getMessage() for r in caplog.records if r.name == logger.name]
    assert len(lines) == 3 and lines[-1].startswith("ngopt diagnostics: step 6 |")


def test_resumed_run_appends(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup(5)
    path = tmp_path / "run.csv"
    with log_diagnostics(opt, path, every=2):
        train(x, y, model, loss_fn, opt, 2)
    with log_diagnostics(opt, path, every=2, append=True):
        train(x, y, model, loss_fn, opt, 2)
    assert [r["step"] for r in read_csv_log(path)] == [2, 4]


def test_bad_arguments_are_named():
    x, y, model, loss_fn, opt = small_run_setup(6)
    with pytest.raises(ValueError, match="every must be >= 1"):
        log_diagnostics(opt, "run.jsonl", every=0)
    with pytest.raises(TypeError, match="every must be an int"):
        log_diagnostics(opt, "run.jsonl", every=2.5)
    with pytest.raises(TypeError, match="opt must provide diagnostics"):
        log_diagnostics(torch.optim.SGD(model.parameters(), lr=0.1), "run.jsonl")
    with pytest.raises(ValueError, match="target path must end in .jsonl or .csv"):
        log_diagnostics(opt, "run.txt")
    accepted = ("target: give a .jsonl or .csv path, a TensorBoard SummaryWriter, a logging.Logger, "
                "or a non-empty list or tuple of these; got ")
    with pytest.raises(ValueError) as empty:
        log_diagnostics(opt, [])
    assert str(empty.value) == accepted + "an empty list"  # the README calls a list a sink: say so
    with pytest.raises(ValueError, match="got an empty tuple"):
        log_diagnostics(opt, ())
    with pytest.raises(TypeError) as wrong:
        log_diagnostics(opt, [42])
    assert str(wrong.value) == accepted + "int"


def test_skipped_steps_reach_the_log(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup(7)
    path = tmp_path / "run.jsonl"
    with log_diagnostics(opt, path, every=2):
        train(x, y, model, loss_fn, opt, 1)
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        model[0].weight.grad.fill_(float("inf"))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            opt.step()
    (record,) = read_jsonl_log(path)
    assert record["step"] == 2 and record["skipped_steps"] == 1
    assert record["skip_reasons"]["nonfinite_gradient"] == 1


def _keys(snapshot):
    """The snapshot's keys in the schema's flattened form, layers left out."""
    flat = [key for key in snapshot if key != "layers" and not isinstance(snapshot[key], dict)]
    for parent in ("skip_reasons", "update", "time"):
        flat += [f"{parent}.{child}" for child in snapshot[parent]]
    return flat


@pytest.mark.parametrize("options", [{}, {"step_rule": "quadratic"}, {"damping_rule": "fixed", "momentum": 0.0}])
def test_diagnostics_keys_are_the_schema_after_a_real_step(options):
    torch.manual_seed(0)
    x, y = torch.randn(32, 6), torch.randint(0, 3, (32,))
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 3))
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), **options)
    for _ in range(3):
        train(x, y, model, nn.CrossEntropyLoss(), opt, 1)
        snapshot = opt.diagnostics()
        assert list(snapshot) == list(diagnostic_keys.SNAPSHOT)
        assert sorted(_keys(snapshot)) == sorted(diagnostic_keys.columns())
    assert set(snapshot["time"]) == set(diagnostic_keys.STEP_TIME) | {diagnostic_keys.STEP_TOTAL} | \
        set(diagnostic_keys.PASS_TIME)


def test_csv_log_columns_come_from_the_schema(tmp_path):
    x, y, model, loss_fn, opt = small_run_setup()
    path = tmp_path / "run.csv"
    with log_diagnostics(opt, path, every=2):
        train(x, y, model, loss_fn, opt, 4)
    with open(path, newline="") as f:
        header = next(csv.reader(f))
    schema = diagnostic_keys.columns()
    assert header[:len(schema)] == schema
    rest = header[len(schema):]
    assert all(key.startswith("layers.") for key in rest if key not in ("wall_time", "log_seconds"))


def test_the_log_documents_every_schema_key():
    documented = diagnostics_log.__doc__
    for key, entry in diagnostic_keys.describe().items():
        assert f"``{key}``" in documented and entry.meaning in documented
