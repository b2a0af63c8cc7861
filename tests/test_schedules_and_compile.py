"""Learning-rate schedules down to zero, and compiled models (API behaviours 2, 9 and 10).

A schedule's value 0 (the first step of a linear warm-up, the end of cosine annealing with
eta_min=0) is a legal learning rate: nothing moves, nothing divides by zero, no step is counted as
skipped, diagnostics stay finite (common practice: torch.optim.SGD accepts lr=0 the same way).
"""
from __future__ import annotations

import copy
import math
import warnings

import pytest
import torch
from torch import nn
from torch.optim import lr_scheduler

import ngopt
from ngopt.rules import kl_trust_scale


def problem(seed=0):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(6, 12), nn.Tanh(), nn.Linear(12, 3))
    x, y = torch.randn(64, 6), torch.randint(0, 3, (64,))
    return model, nn.CrossEntropyLoss(), x, y


def finite_numbers(tree, allow_inf=False):
    if isinstance(tree, dict):
        return all(finite_numbers(v, allow_inf) for v in tree.values())
    if isinstance(tree, (list, tuple)):
        return all(finite_numbers(v, allow_inf) for v in tree)
    if isinstance(tree, float):
        return not math.isnan(tree) if allow_inf else math.isfinite(tree)
    return True


SCHEDULES = {
    "linear_warmup_from_0": lambda opt: lr_scheduler.LambdaLR(opt, lambda s: min(1.0, s / 5)),
    "cosine_to_0": lambda opt: lr_scheduler.CosineAnnealingLR(opt, T_max=6, eta_min=0.0),
    "one_cycle": lambda opt: lr_scheduler.OneCycleLR(opt, max_lr=0.3, total_steps=12),
    "warmup_then_decay": lambda opt: lr_scheduler.SequentialLR(
        opt, [lr_scheduler.LambdaLR(opt, lambda s: s / 4), lr_scheduler.ExponentialLR(opt, gamma=0.8)],
        milestones=[4]),
}


@pytest.mark.parametrize("step_rule", ["fixed", "quadratic"])
@pytest.mark.parametrize("name", list(SCHEDULES))
def test_schedules_that_reach_zero(name, step_rule):
    model, loss_fn, x, y = problem()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.3, step_rule=step_rule, stats_interval=2, inverse_interval=2)
    schedule = SCHEDULES[name](opt)
    zero_steps = 0
    first_loss = None
    for _ in range(12):
        lr = opt.param_groups[0]["lr"]
        before = copy.deepcopy(model.state_dict())
        opt.zero_grad()
        loss = loss_fn(model(x), y)
        loss.backward()
        first_loss = float(loss) if first_loss is None else first_loss
        opt.step()
        schedule.step()
        if lr == 0.0:
            zero_steps += 1
            for key, value in model.state_dict().items():
                assert torch.equal(value, before[key]), key
        snap = opt.diagnostics()
        assert snap["skipped_steps"] == 0
        # A singular undamped factor (softmax output: G has a zero eigenvalue) has condition inf
        # honestly; nothing may be NaN, and the update's scalars must all be finite.
        assert finite_numbers(snap["update"]) and finite_numbers(snap["layers"], allow_inf=True)
    assert zero_steps >= (1 if name in ("linear_warmup_from_0", "warmup_then_decay") else 0)
    assert float(loss_fn(model(x), y)) < first_loss


def test_zero_lr_everywhere_moves_nothing_and_counts_every_step():
    model, loss_fn, x, y = problem(1)
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.0, momentum=0.9)
    start = copy.deepcopy(model.state_dict())
    for _ in range(5):
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        opt.step()
    assert opt.steps_taken == 5 and opt.diagnostics()["skipped_steps"] == 0
    for key, value in model.state_dict().items():
        assert torch.equal(value, start[key])


@pytest.mark.parametrize("lr", [0.0, 1e-300, 1e-12, 1.0, 1e150])
def test_kl_bound_neither_divides_by_zero_nor_overflows(lr):
    # The bound keeps lr^2 nu^2 d <= kappa (Ba, Grosse & Martens, ICLR 2017); checked in exact
    # arithmetic on the square roots, for values whose square under- or overflows a double.
    for dot in (1e-300, 1.0, 1e300):
        nu = kl_trust_scale(dot, lr, 1e-2)
        assert 0.0 < nu <= 1.0 and math.isfinite(nu)
        if lr > 0 and lr * math.sqrt(dot) > 0.1:
            assert math.isclose(lr * nu * math.sqrt(dot), 0.1, rel_tol=1e-12)


@pytest.mark.slow
def test_a_compiled_model_trains_like_the_eager_one_under_its_own_names():
    # API behaviour 10: same blocks under the same names as the eager model, no warning from
    # ngopt's code, and the same loss after a few steps (compiled kernels may round differently:
    # 1e-4 relative is far above float32 rounding of this small network, common practice).
    results = {}
    for compiled in (False, True):
        model, loss_fn, x, y = problem(2)
        trained = torch.compile(model) if compiled else model
        opt = ngopt.FisherDescent(trained, loss_fn, fisher="exact", stats_interval=2, inverse_interval=2)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            for _ in range(6):
                opt.zero_grad()
                loss = loss_fn(trained(x), y)
                loss.backward()
                opt.step()
        ours = [w for w in caught if "ngopt" in w.filename]
        assert not ours, [str(w.message) for w in ours]
        results[compiled] = (float(loss.detach()), list(opt.blocks), repr(opt), list(opt.diagnostics()["layers"]))
    eager, compiled = results[False], results[True]
    assert compiled[1] == eager[1] == ["0", "2"]
    assert compiled[3] == eager[3]
    assert "_orig_mod" not in compiled[2]
    assert compiled[0] == pytest.approx(eager[0], rel=1e-4)
