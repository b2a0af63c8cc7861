"""``python -m ngopt.report``: a short real run -> log -> figures and summary."""
import json
import subprocess
import sys
import warnings
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.image  # noqa: E402
import pytest  # noqa: E402
import torch  # noqa: E402
from sklearn.datasets import load_digits  # noqa: E402
from torch import nn  # noqa: E402

import ngopt  # noqa: E402
from ngopt.diagnostics_log import log_diagnostics  # noqa: E402
from ngopt.fisher_probe import probe_fisher_quality  # noqa: E402
from ngopt.report import main, write_report  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


def digits_run(tmp_path, name="run.jsonl", steps=40, damping=1e-2, probe=True, **options):
    """A short real training run on scikit-learn's digits, logged every 5 steps."""
    x, y = load_digits(return_X_y=True)
    x = torch.tensor(x / 16.0, dtype=torch.float32)
    y = torch.tensor(y)
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(64, 16), nn.Tanh(), nn.Linear(16, 10))
    loss_fn = nn.CrossEntropyLoss()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, lr=0.3, damping=damping, stats_interval=2, inverse_interval=5,
                                  **options)
    path = tmp_path / name
    generator = torch.Generator().manual_seed(0)
    with log_diagnostics(opt, path, every=5) as handle:
        for step in range(steps):
            batch = torch.randint(0, len(x), (128,), generator=generator)
            opt.zero_grad()
            loss = loss_fn(model(x[batch]), y[batch])
            loss.backward()
            handle.note_loss(loss)
            opt.step()
            if probe and step == steps // 2:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    handle.log_probe(probe_fisher_quality(opt, model, loss_fn, x[:128], y[:128]))
    return path


def assert_png(path: Path):
    assert path.is_file() and path.stat().st_size > 10_000, path
    image = matplotlib.image.imread(path)
    assert image.ndim == 3 and image.shape[0] > 300 and image.shape[1] > 500
    assert image[..., :3].std() > 0.01  # not a blank canvas


def test_report_command_writes_the_figures_and_summary(tmp_path):
    log = digits_run(tmp_path)
    out = tmp_path / "report"
    done = subprocess.run([sys.executable, "-m", "ngopt.report", str(log), "--out", str(out)], cwd=REPO,
                          capture_output=True, text=True, timeout=240)
    assert done.returncode == 0, done.stderr
    expected = ["spectra_0.png", "spectra_2.png", "conditioning.png", "damping.png", "update.png", "loss.png",
                "time.png", "probe.png"]
    for name in expected:
        assert_png(out / name)
        assert str(out / name) in done.stdout
    summary = (out / "summary.txt").read_text()
    assert "steps 5 .. 40" in summary
    assert "Fisher probe (step 21, 128 examples;" in summary
    assert "logging cost:" in summary and "time split" in summary


def test_csv_log_gives_the_figures_without_spectra(tmp_path):
    x, y = torch.randn(64, 5), torch.randn(64, 2)
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(5, 6), nn.Tanh(), nn.Linear(6, 2))
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.2)
    with log_diagnostics(opt, tmp_path / "run.csv", every=3):
        for _ in range(12):
            opt.zero_grad()
            loss_fn(model(x), y).backward()
            opt.step()
    result = write_report(tmp_path / "run.csv", tmp_path / "out")
    names = sorted(p.name for p in result["figures"])
    assert names == ["conditioning.png", "damping.png", "time.png", "update.png"]
    for path in result["figures"]:
        assert_png(path)


def test_ill_conditioned_factor_and_skipped_steps_are_warned(tmp_path):
    # the digits have pixels that are always 0, so A is singular; with a tiny damping the damped
    # block's condition number stays far above 1e8 (numbers from a run, see the summary)
    log = digits_run(tmp_path, damping=1e-12, probe=False, max_step_kl=None, momentum=0.0)
    records = [json.loads(line) for line in log.read_text().splitlines()]
    assert min(r["layers"]["0"]["condition"] for r in records[-2:]) > 1e8
    result = write_report(log, tmp_path / "out")
    assert any("layer 0: the damped condition number stays above 1e+08" in w for w in result["warnings"])
    assert "layer 0: the damped condition number" in (tmp_path / "out" / "summary.txt").read_text()


def test_many_skipped_steps_are_warned(tmp_path):
    torch.manual_seed(2)
    x, y = torch.randn(32, 4), torch.randn(32, 1)
    model = nn.Linear(4, 1)
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with log_diagnostics(opt, tmp_path / "run.jsonl", every=2):
            for step in range(10):
                opt.zero_grad()
                loss_fn(model(x), y).backward()
                if step % 3 == 2:
                    model.weight.grad[0, 0] = float("nan")
                opt.step()
    result = write_report(tmp_path / "run.jsonl", tmp_path / "out")
    assert any(w.startswith("3 of 10 steps were skipped (30.0%; nonfinite_gradient: 3)") for w in result["warnings"])


def test_bad_log_line_gives_a_clear_error(tmp_path, capsys):
    log = digits_run(tmp_path, steps=10, probe=False)
    lines = log.read_text().splitlines()
    lines.insert(1, '{"step": 7, "layers": ')
    log.write_text("\n".join(lines) + "\n")
    code = main([str(log), "--out", str(tmp_path / "out")])
    assert code == 2
    error = capsys.readouterr().err
    assert f"{log}: line 2 is not valid JSON" in error
    assert main([str(tmp_path / "missing.jsonl"), "--out", str(tmp_path / "out")]) == 2
    assert "diagnostics log not found" in capsys.readouterr().err
    empty = tmp_path / "empty.jsonl"
    empty.write_text("")
    assert main([str(empty), "--out", str(tmp_path / "out")]) == 2
    assert "holds no records" in capsys.readouterr().err


def test_clean_run_has_no_warnings(tmp_path):
    log = digits_run(tmp_path, steps=20, probe=False, max_step_kl=None)
    result = write_report(log, tmp_path / "out")
    assert result["warnings"] == []
    assert "warnings:\n  (none)" in (tmp_path / "out" / "summary.txt").read_text()


@pytest.mark.parametrize("structure", ["diag", "ekfac"])
def test_diagonal_curvature_spectra_figure(tmp_path, structure):
    log = digits_run(tmp_path, steps=10, probe=False, structure=structure)
    result = write_report(log, tmp_path / "out")
    assert_png(tmp_path / "out" / "spectra_0.png")
    assert tmp_path / "out" / "spectra_0.png" in result["figures"]


def test_reduction_ratio_figure_from_a_closure_run(tmp_path):
    torch.manual_seed(3)
    x, y = torch.randn(64, 4), torch.randn(64, 2)
    model = nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.Linear(8, 2))
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.5, momentum=0.5, damping_rule="lm", damping_interval=2)

    def closure():
        opt.zero_grad()
        loss = loss_fn(model(x), y)
        loss.backward()
        return loss

    with log_diagnostics(opt, tmp_path / "run.jsonl", every=2):
        for _ in range(12):
            opt.step(closure)
    records = [json.loads(line) for line in (tmp_path / "run.jsonl").read_text().splitlines()]
    assert all(isinstance(r["update"]["reduction_ratio"], float) for r in records)
    assert all(isinstance(r["update"]["loss"], float) for r in records)
    result = write_report(tmp_path / "run.jsonl", tmp_path / "out")
    assert tmp_path / "out" / "loss.png" in result["figures"]
    assert_png(tmp_path / "out" / "loss.png")
