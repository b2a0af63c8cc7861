"""Writers of the diagnostics log: what is written reads back the same.

The records here are snapshot dicts laid out as ``opt.diagnostics()`` lays
them out; the end-to-end tests with a real optimizer are in
test_diagnostics_logging.py.
"""
import csv
import json
import logging
import math

import pytest

from ngopt.diagnostics_log import (CsvWriter, JsonLinesWriter, flatten_record, make_writer, read_csv_log,
                                   read_jsonl_log, read_log, unflatten_record)


def snapshot(step, with_spectra=True, extra_key=False):
    layer = {"block": "linear", "structure": "kfac", "in_dim": 3, "out_dim": 2,
             "condition": 12.5 + step, "in_eig_min": 0.0, "in_condition": math.inf,
             "out_eig_min": 1e-3, "inversion_step": step}
    if with_spectra:
        layer["in_eigenvalues"] = [0.0, 0.25, 2.0 + step]
        layer["out_eigenvalues"] = [1e-3, 0.5]
    if extra_key:
        layer["in_corrected_scale"] = 0.75
    return {"step": step, "skipped_steps": 0, "skip_reasons": {"nonfinite_gradient": 0},
            "layers": {"encoder.0": layer, "head": dict(layer, block="conv2d")},
            "update": {"grad_norm": 0.5 / step, "cosine": 0.25, "reduction_ratio": None, "loss": float("nan")},
            "time": {"statistics": 0.01 * step, "step_total": 0.1 * step},
            "wall_time": 1.7e9 + step, "log_seconds": 1e-4 * step}


def same(a, b):
    """Equality that takes nan == nan (the logs keep nan)."""
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    return a == b and type(a) is type(b)


def test_jsonl_round_trip_keeps_infinities_nan_and_spectra(tmp_path):
    path = tmp_path / "run.jsonl"
    writer = JsonLinesWriter(path)
    records = [snapshot(10), snapshot(20)]
    for record in records:
        writer.write(record)
    writer.close()
    # strict JSON (json.loads with no Infinity/NaN tokens) must parse every line
    for line in path.read_text().splitlines():
        json.loads(line, parse_constant=lambda token: pytest.fail(f"non-standard JSON token {token}"))
    back = read_jsonl_log(path)
    assert len(back) == 2
    assert all(same(a, b) for a, b in zip(records, back))


def test_jsonl_is_flushed_after_each_record(tmp_path):
    path = tmp_path / "run.jsonl"
    writer = JsonLinesWriter(path)
    writer.write(snapshot(10))
    # read while the writer is still open: a crash now would keep this record
    assert [r["step"] for r in read_jsonl_log(path)] == [10]
    writer.write(snapshot(20))
    assert [r["step"] for r in read_jsonl_log(path)] == [10, 20]
    writer.close()


def test_jsonl_torn_last_line_is_skipped_with_warning(tmp_path):
    path = tmp_path / "run.jsonl"
    writer = JsonLinesWriter(path)
    writer.write(snapshot(10))
    writer.close()
    with open(path, "a") as f:
        f.write(json.dumps(snapshot(20))[:40])  # a crash in the middle of the second record
    with pytest.warns(UserWarning, match="line 2 is incomplete"):
        back = read_jsonl_log(path)
    assert [r["step"] for r in back] == [10]


def test_jsonl_bad_line_names_the_line(tmp_path):
    path = tmp_path / "run.jsonl"
    path.write_text(json.dumps(snapshot(10)) + "\n" + "{not json\n" + json.dumps(snapshot(30)) + "\n")
    with pytest.raises(ValueError, match=r"run.jsonl: line 2 is not valid JSON"):
        read_jsonl_log(path)
    path.write_text(json.dumps(snapshot(10)) + "\n" + json.dumps({"no_step": 1}) + "\n")
    with pytest.raises(ValueError, match="line 2 is not a diagnostics record"):
        read_jsonl_log(path)


def test_flatten_and_unflatten_keep_dotted_module_names():
    record = snapshot(10, with_spectra=False)
    flat = flatten_record(record)
    assert flat["layers.encoder.0.condition"] == 22.5
    assert "layers.encoder.0.in_eigenvalues" not in flatten_record(snapshot(10))  # lists are left out
    assert same(unflatten_record(flat), record)


def test_csv_round_trip(tmp_path):
    path = tmp_path / "run.csv"
    writer = CsvWriter(path)
    records = [snapshot(10), snapshot(20)]
    for record in records:
        writer.write(record)
    writer.close()
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    assert rows[0].count("step") == 1 and len(rows) == 3  # one header, one row per record
    back = read_csv_log(path)
    expected = [unflatten_record(flatten_record(r)) for r in records]
    # None (reduction_ratio) becomes an empty cell and is absent when read back
    for e in expected:
        del e["update"]["reduction_ratio"]
    assert all(same(a, b) for a, b in zip(expected, back))
    assert math.isinf(back[0]["layers"]["head"]["in_condition"])


def test_csv_new_key_later_extends_the_header_once(tmp_path):
    path = tmp_path / "run.csv"
    writer = CsvWriter(path)
    writer.write(snapshot(10))
    writer.write(snapshot(20, extra_key=True))
    writer.write(snapshot(30, extra_key=True))
    writer.close()
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    header = rows[0]
    assert header[-2:] == ["layers.encoder.0.in_corrected_scale", "layers.head.in_corrected_scale"]
    assert all(len(row) == len(header) for row in rows)
    back = read_csv_log(path)
    assert "in_corrected_scale" not in back[0]["layers"]["head"]
    assert back[2]["layers"]["head"]["in_corrected_scale"] == 0.75
    assert [r["step"] for r in back] == [10, 20, 30]


def test_csv_append_continues_the_header(tmp_path):
    path = tmp_path / "run.csv"
    first = CsvWriter(path)
    first.write(snapshot(10))
    first.close()
    second = CsvWriter(path, append=True)
    second.write(snapshot(20))
    second.close()
    assert [r["step"] for r in read_csv_log(path)] == [10, 20]


def test_csv_bad_row_names_the_line(tmp_path):
    path = tmp_path / "run.csv"
    path.write_text("step,update.cosine\n10,0.5\n20\n30,0.25\n")
    with pytest.raises(ValueError, match="line 3 has 1 cells, the header has 2"):
        read_csv_log(path)


def test_logger_target_writes_one_line(caplog):
    logger = logging.getLogger("ngopt.test.diagnostics")
    writer = make_writer(logger)
    record = snapshot(10)
    record["update"]["loss"] = 0.125
    with caplog.at_level(logging.INFO, logger=logger.name):
        writer.write(record)
    assert len(caplog.records) == 1
    line = caplog.records[0].getMessage()
    assert "\n" not in line
    assert "step 10" in line and "loss 0.125" in line
    assert "worst cond 2.25e+01 (encoder.0)" in line  # 12.5 + 10 for both layers; the first wins


def test_make_writer_rejects_bad_targets(tmp_path):
    with pytest.raises(ValueError, match="must end in .jsonl or .csv"):
        make_writer(tmp_path / "run.txt")
    with pytest.raises(TypeError, match="target: give a .jsonl or .csv path, .* or a non-empty list"):
        make_writer(42)
    with pytest.raises(ValueError, match="must end in .jsonl or .csv"):
        read_log(tmp_path / "run.txt")


def test_tensorboard_scalars_and_histograms_read_back(tmp_path):
    pytest.importorskip("tensorboard")
    from torch.utils.tensorboard import SummaryWriter
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    summary_writer = SummaryWriter(log_dir=str(tmp_path))
    writer = make_writer(summary_writer)
    writer.write(snapshot(10))
    writer.write(snapshot(20))
    writer.close()
    summary_writer.close()
    events = EventAccumulator(str(tmp_path), size_guidance={"scalars": 0, "histograms": 0})
    events.Reload()
    tags = events.Tags()
    assert "layers/encoder.0/condition" in tags["scalars"]
    assert "update/grad_norm" in tags["scalars"]
    assert "layers/head/in_eigenvalues_log10" in tags["histograms"]
    conditions = [(e.step, e.value) for e in events.Scalars("layers/encoder.0/condition")]
    assert conditions == [(10, pytest.approx(22.5)), (20, pytest.approx(32.5))]
    histogram = events.Histograms("layers/head/in_eigenvalues_log10")[-1].histogram_value
    # two positive eigenvalues 0.25 and 22 (the zero has no logarithm)
    assert histogram.num == 2
    assert histogram.max == pytest.approx(math.log10(22.0))
