"""The fixed rule's ceiling on a step's KL in the exact Fisher of the whole model (``max_exact_step_kl``,
measured every ``rule_interval`` steps).

Reference: the exact Fisher (generalized Gauss-Newton) of softmax cross-entropy,
``F = sum_n w_n J_n^T (diag(p) - p p^T) J_n`` (Martens & Grosse 2015, sec. 9), from torch.func
Jacobians in float64 (``fisher_reference.py``); the bound keeps the step's squared length in the
damped metric, ``u^T (F + lambda I) u``, at the ceiling (Ba, Grosse & Martens, ICLR 2017).
"""
from __future__ import annotations

import copy
import math
import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt.quadratic_model import BatchEvaluator

from fisher_reference import cross_entropy_fisher, flat_jacobian, loss_input_jacobian, model_loss_input

DTYPE = torch.float64
DAMPING = 1e-3
KAPPA = 1e-3


def problem(seed=4):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 8), nn.Tanh(), nn.Linear(8, 3)).to(DTYPE)
    x, y = torch.randn(32, 5, dtype=DTYPE), torch.randint(0, 3, (32,))
    return model, nn.CrossEntropyLoss(), x, y


def checked(model, loss_fn, **overrides):
    settings = dict(fisher="exact", damping=DAMPING, damping_rule="fixed", momentum=0.0, lr=1.0,
                    max_step_kl=KAPPA, max_exact_step_kl=KAPPA, stats_memory=0.0, stats_interval=1, inverse_interval=1,
                    rule_interval=1, rule_batch_fraction=1.0, seed=0)
    settings.update(overrides)
    return ngopt.FisherDescent(model, loss_fn, **settings)


def one_step(opt, model, loss_fn, x, y):
    before = [p.detach().clone() for p in model.parameters()]
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()
    return torch.cat([(p.detach() - b).reshape(-1) for p, b in zip(model.parameters(), before)])


def damped_length(model, x, y, update):
    """``u^T (F + lambda I) u`` with the exact Fisher of the mean cross-entropy at the model's weights."""
    names = [n for n, _ in model.named_parameters()]
    z, jac = loss_input_jacobian(model, names, model_loss_input(model, (x,)))
    fisher = cross_entropy_fisher(z, flat_jacobian(jac, z, names), torch.full((len(y),), 1.0 / len(y), dtype=DTYPE))
    return float(update @ fisher @ update + DAMPING * update @ update)


def test_the_checked_step_has_the_bounded_length_in_the_exact_fisher():
    model, loss_fn, x, y = problem()
    start = copy.deepcopy(model)
    opt = checked(model, loss_fn)
    update = one_step(opt, model, loss_fn, x, y)
    assert opt.diagnostics()["update"]["trust_scale"] < 1.0  # the bound decides this step
    assert damped_length(start, x, y, update) == pytest.approx(KAPPA, rel=1e-8)

    # Unchecked, the same step is bounded in the blocks' model only: here it is longer in the exact
    # Fisher (the three layers' moves of the logits add up where the blocks' model adds their squares;
    # 1.39 times for this seed), and the measured ratio says by how much.
    unchecked_model = copy.deepcopy(start)
    unchecked = checked(unchecked_model, loss_fn, rule_interval=0)
    long_update = one_step(unchecked, unchecked_model, loss_fn, x, y)
    ratio = opt.diagnostics()["update"]["fisher_length_ratio"]
    assert damped_length(start, x, y, long_update) == pytest.approx(KAPPA * ratio, rel=1e-8)
    assert ratio > 1.2
    assert unchecked.diagnostics()["update"]["fisher_length_ratio"] is None


def test_checks_run_every_rule_interval_steps_and_the_ratio_holds_in_between():
    model, loss_fn, x, y = problem(5)
    opt = checked(model, loss_fn, rule_interval=3)
    ratios = []
    for _ in range(7):
        one_step(opt, model, loss_fn, x, y)
        ratios.append(opt.diagnostics()["update"]["fisher_length_ratio"])
    assert opt.state_dict()["natural_gradient"]["step_rule"]["checks"] == 3  # steps 0, 3, 6
    assert ratios[0] == ratios[1] == ratios[2] != ratios[3] == ratios[4] == ratios[5] != ratios[6]


def test_the_check_runs_under_a_closure_too():
    # With step(closure) the damping rule measures the closure's loss; the check still replays the batch.
    model, loss_fn, x, y = problem(6)
    opt = checked(model, loss_fn, damping_rule="lm", damping_interval=1)

    def closure():
        opt.zero_grad()
        value = loss_fn(model(x), y)
        value.backward()
        return value

    opt.step(closure)
    update = opt.diagnostics()["update"]
    assert update["fisher_length_ratio"] is not None and update["reduction_ratio"] is not None


def test_a_model_without_forward_mode_rules_warns_once_and_keeps_the_blocks_bound(monkeypatch):
    model, loss_fn, x, y = problem(7)
    twin = copy.deepcopy(model)

    def fails(self, directions):
        raise NotImplementedError("no forward-mode rule for this operation")

    monkeypatch.setattr(BatchEvaluator, "curvature_products", fails)
    opt = checked(model, loss_fn)
    with pytest.warns(UserWarning, match="Jacobian-vector products failed") as caught:
        for _ in range(3):
            one_step(opt, model, loss_fn, x, y)
    assert sum("Jacobian-vector" in str(w.message) for w in caught) == 1
    plain = checked(twin, loss_fn, rule_interval=0)
    for _ in range(3):
        one_step(plain, twin, loss_fn, x, y)
    for p, q in zip(model.parameters(), twin.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-12)  # the same arithmetic; float64


def test_the_measured_ratio_survives_a_checkpoint():
    model, loss_fn, x, y = problem(8)
    opt = checked(model, loss_fn, rule_interval=4)
    for _ in range(2):
        one_step(opt, model, loss_fn, x, y)
    resumed_model = copy.deepcopy(model)
    resumed = checked(resumed_model, loss_fn, rule_interval=4)
    resumed.load_state_dict(copy.deepcopy(opt.state_dict()))
    for _ in range(2):  # steps 2 and 3 reuse the ratio measured at step 0
        one_step(opt, model, loss_fn, x, y)
        one_step(resumed, resumed_model, loss_fn, x, y)
    assert resumed.diagnostics()["update"]["fisher_length_ratio"] == opt.diagnostics()["update"]["fisher_length_ratio"]
    for p, q in zip(model.parameters(), resumed_model.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-12)


@pytest.mark.parametrize("settings, error", [
    (dict(step_rule="quadratic", rule_interval=0), "rule_interval must be >= 1 with step_rule='quadratic'"),
    (dict(rule_interval=-1), "rule_interval"),
])
def test_rule_interval_is_checked(settings, error):
    model, loss_fn, _, _ = problem()
    with pytest.raises(ValueError, match=error):
        ngopt.FisherDescent(model, loss_fn, **settings)


def test_the_ceiling_binds_only_where_the_exact_length_exceeds_it():
    model, loss_fn, x, y = problem()
    start = copy.deepcopy(model)
    # Blocks' bound off: the ceiling alone sets the length in the exact Fisher.
    update = one_step(checked(model, loss_fn, max_step_kl=None), model, loss_fn, x, y)
    assert damped_length(start, x, y, update) == pytest.approx(KAPPA, rel=1e-8)

    # A ceiling above the exact length the blocks' bound allows (ratio 1.39 for this seed): the
    # blocks' bound decides and the step is the unchecked one.
    loose_model, plain_model = copy.deepcopy(start), copy.deepcopy(start)
    loose = one_step(checked(loose_model, loss_fn, max_exact_step_kl=2 * KAPPA), loose_model, loss_fn, x, y)
    plain = one_step(checked(plain_model, loss_fn, rule_interval=0), plain_model, loss_fn, x, y)
    assert torch.allclose(loose, plain, rtol=0, atol=1e-14)


def test_measuring_for_no_ceiling_warns():
    model, loss_fn, _, _ = problem()
    with pytest.warns(UserWarning, match="max_exact_step_kl"):
        ngopt.FisherDescent(model, loss_fn, max_exact_step_kl=None, rule_interval=5).remove_hooks()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ngopt.FisherDescent(model, loss_fn, max_exact_step_kl=None)


@pytest.mark.parametrize("value", [0.0, -1e-3])
def test_max_exact_step_kl_is_checked(value):
    model, loss_fn, _, _ = problem()
    with pytest.raises(ValueError, match="max_exact_step_kl"):
        ngopt.FisherDescent(model, loss_fn, max_exact_step_kl=value)


def test_measurements_run_every_rule_interval_steps_and_not_by_default(monkeypatch):
    model, loss_fn, x, y = problem(9)
    calls = []
    monkeypatch.setattr(BatchEvaluator, "curvature_products",
                        lambda self, directions: calls.append(1) or (math.nan, [[math.nan]]))
    opt = ngopt.FisherDescent(model, loss_fn, rule_interval=5)
    for _ in range(6):
        one_step(opt, model, loss_fn, x, y)
    assert len(calls) == 2  # steps 0 and 5
    # A non-finite measurement is no measurement: no ratio, the blocks' bound alone.
    assert opt.diagnostics()["update"]["fisher_length_ratio"] is None
    opt.remove_hooks()
    calls.clear()
    off = ngopt.FisherDescent(model, loss_fn)
    for _ in range(6):
        one_step(off, model, loss_fn, x, y)
    assert not calls
