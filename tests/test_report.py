"""``python -m ngopt.report``: a short real run -> log -> figures and summary."""
import json
import subprocess
import sys
import warnings
from pathlib import Path

import matplotlib
import numpy as np

matplotlib.use("Agg")
import matplotlib.image  # noqa: E402
import pytest  # noqa: E402
import torch  # noqa: E402
from sklearn.datasets import load_digits  # noqa: E402
from torch import nn  # noqa: E402

import ngopt  # noqa: E402
from ngopt.diagnostics_log import log_diagnostics  # noqa: E402
from ngopt.fisher_probe import probe_fisher_quality  # noqa: E402
from ngopt.diagnostics_log import read_log  # noqa: E402
from ngopt.report import main, one_record_per_step, summarize, time_split, write_report  # noqa: E402

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
        options = {"step_rule": "fixed", "damping_rule": "fixed", **options}
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


def plain_logged_run(opt, model, loss_fn, x, y, path, steps, every):
    """The plain loop (no loss given to the log), logged to ``path``."""
    with log_diagnostics(opt, path, every=every):
        for _ in range(steps):
            opt.zero_grad()
            loss_fn(model(x), y).backward()
            opt.step()
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
    result = write_report(plain_logged_run(opt, model, loss_fn, x, y, tmp_path / "run.csv", 12, 3), tmp_path / "out")
    names = sorted(p.name for p in result["figures"])
    assert names == ["conditioning.png", "damping.png", "time.png", "update.png"]
    for path in result["figures"]:
        assert_png(path)


def test_ill_conditioned_factor_and_skipped_steps_are_warned(tmp_path):
    # the digits have pixels that are always 0, so A is singular; with a tiny damping the damped
    # block's condition number stays far above 1e8 (numbers from a run, see the summary)
    log = digits_run(tmp_path, damping=1e-12, probe=False, max_step_kl=None, momentum=0.0, interval_warmup=0,
                     loss_floor=None)
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


# --------------------------------------------------------------------------
# damping that dominates a factor, the missing loss, the probe's findings
# --------------------------------------------------------------------------

def write_jsonl(path: Path, records: list) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in records))
    return path


def factor_with_spectrum(eigenvalues, seed):
    """A symmetric matrix Q diag(eigenvalues) Q^T with a random orthogonal Q (numpy.linalg.qr)."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(len(eigenvalues), len(eigenvalues))))
    return q @ np.diag(eigenvalues) @ q.T


def kronecker_record(step, factor_in, shift_in, factor_out, shift_out, damping):
    eig_in, eig_out = np.linalg.eigvalsh(factor_in), np.linalg.eigvalsh(factor_out)  # numpy.linalg.eigvalsh
    entry = {"block": "linear", "structure": "kfac", "in_dim": len(eig_in), "out_dim": len(eig_out),
             "in_eigenvalues": eig_in.tolist(), "out_eigenvalues": eig_out.tolist(),
             "in_eig_max": float(eig_in[-1]), "out_eig_max": float(eig_out[-1]),
             "in_damping": shift_in, "out_damping": shift_out}
    return {"step": step, "update": {"damping": damping}, "layers": {"fc": entry}}


def test_damping_that_dominates_a_factor_is_warned_with_its_numbers(tmp_path):
    # A constructed input factor whose spectrum lies wholly under the damping added to it, and an output
    # factor whose spectrum lies above it: only the first is dominated.
    under = np.linspace(1e-4, 5e-3, 12)
    above = np.linspace(0.5, 2.0, 4)
    record = kronecker_record(30, factor_with_spectrum(under, 0), 1e-2, factor_with_spectrum(above, 1), 1e-2, 1e-4)
    from ngopt.report import damping_dominance

    found = damping_dominance([record])
    assert len(found) == 1
    assert found[0].startswith("layer fc: damping dominates the input factor A: 12 of 12 eigenvalues lie under "
                               "the damping added to it (0.01, lambda = 0.0001; largest eigenvalue 0.005)")
    summary, warned = summarize(read_log(write_jsonl(tmp_path / "run.jsonl", [record])))
    assert found[0] in warned and f"  - {found[0]}" in summary


def test_a_few_large_eigenvalues_above_the_damping_keep_the_factor_undominated():
    # 92% of the eigenvalues under the damping, but the largest 40 x above it: the damped factor still
    # shapes the step (the digits MLP's first layer looks like this)
    spectrum = np.concatenate([np.full(23, 1e-4), [0.4, 0.4]])
    record = kronecker_record(5, factor_with_spectrum(spectrum, 2), 1e-2, factor_with_spectrum(spectrum, 3), 1e-2,
                              1e-4)
    from ngopt.report import damping_dominance

    assert damping_dominance([record]) == []
    nearly = np.concatenate([np.full(23, 1e-4), [0.05, 0.05]])  # 92% under, largest 5 x the damping
    record = kronecker_record(5, factor_with_spectrum(nearly, 2), 1e-2, factor_with_spectrum(spectrum, 3), 1e-2,
                              1e-4)
    assert [f.split(":")[1] for f in damping_dominance([record])] == [" damping dominates the input factor A"]


def test_damping_of_a_real_run_dominates_every_factor(tmp_path):
    # damping 1e4 on the digits MLP: pi sqrt(lambda) and sqrt(lambda) / pi are each far above every
    # eigenvalue of A and G (their product is lambda; factors' eigenvalues below 12 in these runs)
    log = digits_run(tmp_path, steps=10, probe=False, damping=1e4)
    records = [json.loads(line) for line in log.read_text().splitlines()]
    final = records[-1]["layers"]
    _, found = summarize(records)  # the text alone: figures are tested elsewhere
    for name in ("0", "2"):
        for side, part in (("in", "input factor A"), ("out", "output-gradient factor G")):
            assert max(final[name][f"{side}_eigenvalues"]) < final[name][f"{side}_damping"]
            assert any(w.startswith(f"layer {name}: damping dominates the {part}") for w in found)


def test_summary_says_how_to_log_the_loss(tmp_path):
    torch.manual_seed(4)
    model, loss_fn = nn.Linear(4, 2), nn.MSELoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1)
    log = plain_logged_run(opt, model, loss_fn, torch.randn(32, 4), torch.randn(32, 2), tmp_path / "run.jsonl", 4, 2)
    summary, _ = summarize(read_log(log))
    assert "final: loss not logged (call handle.note_loss(loss) after loss.backward(), or pass a closure" in summary
    assert "loss -" not in summary


def test_logged_probe_findings_reach_the_summary(tmp_path):
    # statistics from inputs 10 x the probe's: for a bias-free linear layer with squared error K-FAC is
    # exact and its block is exactly 100 F (A = E[x x^T]); the report names the lag, not the structure
    torch.manual_seed(5)
    x, y = torch.randn(40, 3), torch.randn(40, 2)
    model = nn.Linear(3, 2, bias=False)
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=1e-12, fisher="exact", stats_memory=0.5, max_step_kl=None)
    with log_diagnostics(opt, tmp_path / "run.jsonl", every=1) as handle:
        opt.zero_grad()
        loss_fn(model(10 * x), y).backward()
        opt.step()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            handle.log_probe(probe_fisher_quality(opt, model, loss_fn, x, y))
    summary, found = summarize(one_record_per_step(read_log(tmp_path / "run.jsonl")))
    lag = [w for w in found if "far from the current Fisher" in w]
    assert len(lag) == 1 and "stats_memory=0.5" in lag[0] and "error 99" in lag[0]
    assert "fresh error" in summary and "stats gap" in summary and "trace C/F" in summary
    row = next(line for line in summary.splitlines() if line.startswith("  Linear ") and "deg" in line).split()
    assert row[2] == "99" and float(row[3]) < 1e-5 and row[4:6] == ["99", "100"]  # error, fresh, gap, C/F


def step_rule_records(steps=12):
    """A synthetic log of the quadratic step rule: alpha, mu, rho, lambda, predicted and actual change."""
    records = []
    for step in range(1, steps + 1):
        predicted = -0.5 / step
        actual = predicted * (0.6 + 0.05 * (step % 3)) if step % 2 == 0 else None
        records.append({"step": step, "update": {
            "alpha": 0.8 + 0.01 * step, "mu": 0.3 - 0.01 * step, "reduction_ratio": actual / predicted
            if actual is not None else None, "damping": 1e-2 * 1.5 ** (-(step // 4)),
            "predicted_change": predicted, "actual_change": actual, "loss": 1.0 / step}})
    return records


def test_step_rule_figure_from_a_synthetic_log(tmp_path):
    log = write_jsonl(tmp_path / "rule.jsonl", step_rule_records())
    code = main([str(log), "--out", str(tmp_path / "out")])
    assert code == 0
    assert_png(tmp_path / "out" / "step_rule.png")
    assert "step rule:" not in (tmp_path / "out" / "summary.txt").read_text()


def test_step_rule_figure_draws_the_logged_series(tmp_path, monkeypatch):
    from ngopt.report import plots as report

    drawn = {}
    monkeypatch.setattr(report, "_save", lambda fig, path: drawn.setdefault("axes", fig.axes) and path)
    records = step_rule_records()
    report.plot_step_rule(records, tmp_path / "step_rule.png")
    lines = {line.get_label(): line for ax in drawn["axes"] for line in ax.get_lines()}
    alpha = [r["update"]["alpha"] for r in records]
    np.testing.assert_allclose(lines[r"$\alpha$: on the new preconditioned proposal"].get_ydata(), alpha)
    # every change is a decrease here, drawn as -change on a log axis
    measured = lines[r"measured $-(L(\theta + \delta) - L(\theta))$"].get_ydata().astype(float)
    assert np.isnan(measured[0]) and measured[1] == pytest.approx(-records[1]["update"]["actual_change"])


def test_log_without_step_rule_keys_gets_a_one_line_note(tmp_path):
    records = [{"step": s, "update": {"damping": 1e-2, "loss": 1.0}} for s in (1, 2)]
    result = write_report(write_jsonl(tmp_path / "plain.jsonl", records), tmp_path / "out")
    assert not (tmp_path / "out" / "step_rule.png").exists()
    notes = [line for line in (tmp_path / "out" / "summary.txt").read_text().splitlines() if "step rule" in line]
    assert notes == ["step rule: no alpha/mu/reduction-ratio records (step_rule='quadratic' logs them); "
                     "step_rule.png not drawn"]
    assert result["warnings"] == []


def test_step_rule_figure_keeps_the_sign_when_a_step_went_up(tmp_path, monkeypatch):
    from ngopt.report import plots as report

    drawn = {}
    monkeypatch.setattr(report, "_save", lambda fig, path: drawn.setdefault("axes", fig.axes) and path)
    records = step_rule_records()
    records[3]["update"]["actual_change"] = 0.02  # a step that raised the loss
    report.plot_step_rule(records, tmp_path / "step_rule.png")
    changes = drawn["axes"][3]
    assert changes.get_yscale() == "symlog"
    lines = {line.get_label(): line for line in changes.get_lines()}
    assert lines[r"measured $(L(\theta + \delta) - L(\theta))$"].get_ydata()[3] == pytest.approx(0.02)


def test_time_split_counts_each_second_of_the_step_once(tmp_path):
    # A real run whose rules take time (Levenberg-Marquardt damping measures the loss again).
    path = digits_run(tmp_path, steps=12, probe=False, damping_rule="lm", damping_interval=2)
    record = read_log(path)[-1]
    times = record["time"]
    assert times["rules"] > 0
    split = time_split(record)
    inside = ("statistics", "inversion", "precondition", "rules", "fallback", "other step work")
    outside = [label for label in split if label not in inside]
    # The parts of step() add up to the whole step time; sums of a few doubles differ from it
    # only by rounding (relative 1e-12 is ~4500 ulps, far above a handful of additions).
    assert sum(split[key] for key in inside) == pytest.approx(times["step_total"], rel=1e-12, abs=1e-15)
    # And every measured second appears once: the step, the user's passes, the logger.
    measured = times["step_total"] + times["capture"] + times["extra_backward"] + \
        times["statistics_in_backward"] + record["log_seconds"]
    assert sum(split[key] for key in outside) + sum(split[key] for key in inside) == \
        pytest.approx(measured, rel=1e-12, abs=1e-15)
