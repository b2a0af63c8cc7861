"""Loss scaling that the gradients' unscaling undoes changes nothing but the steps the scaler skips.

Reference: the same run without a scaler.  A loss scale that is a power of two multiplies every
gradient and every output gradient exactly (binary floating point, no overflow or subnormals), and
``torch.amp.GradScaler`` divides the parameter gradients by it exactly, so the two runs agree to
float32 rounding (relative 1e-6, common practice) step for step; an overflowing step is skipped by
the scaler, which is torch's documented behaviour for ``step()`` (it is not taken at all: no update,
no state change, no step counted).
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn

import ngopt

GradScaler = getattr(getattr(torch, "amp", None), "GradScaler", None)
try:
    GradScaler("cpu")
except Exception:  # torch without a CPU loss scaler
    GradScaler = None
pytestmark = pytest.mark.skipif(GradScaler is None, reason="this torch has no CPU GradScaler")


def classifier(seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(20, 64), nn.Tanh(), nn.Linear(64, 5))


def data(seed=1):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(128, 20, generator=generator)
    return x, (x[:, :5].argmax(dim=1) + (x[:, 5] > 1).long()) % 5


def optimizer(model, loss_fn=None, **overrides):
    options = dict(stats_interval=2, inverse_interval=4, seed=0, damping_interval=2)
    options.update(overrides)
    return ngopt.FisherDescent(model, loss_fn or nn.CrossEntropyLoss(), **options)


def plain_steps(model, opt, x, y, steps):
    for _ in range(steps):
        opt.zero_grad()
        opt.loss_fn(model(x), y).backward()
        opt.step()


@pytest.mark.parametrize("unscale_first", [False, True], ids=["scaler-step", "unscale-clip-step"])
@pytest.mark.parametrize("fisher", ["sampled", "exact", "empirical"])
@pytest.mark.parametrize("structure", ["kfac", "ekfac-gradient"])  # the latter: the term count at the true scale
def test_a_scaled_loss_trains_like_the_unscaled_one(fisher, unscale_first, structure):
    model, twin = classifier(), classifier()
    x, y = data()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empirical Fisher's note
        opt = optimizer(model, fisher=fisher, structure=structure)
        twin_opt = optimizer(twin, fisher=fisher, structure=structure)
    scaler = GradScaler("cpu", init_scale=1024.0, growth_interval=1000)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # in particular: the loss scale is never missed
        for _ in range(12):
            opt.zero_grad()
            scaler.scale(opt.loss_fn(model(x), y)).backward()
            if unscale_first:  # the usual pattern for gradient clipping
                scaler.unscale_(opt)
                torch.nn.utils.clip_grad_norm_(model.parameters(), 1e6)
            scaler.step(opt)
            scaler.update()
    plain_steps(twin, twin_opt, x, y, 12)
    for p, q in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=1e-6, atol=1e-7)
    for block, twin_block in zip(opt.blocks.values(), twin_opt.blocks.values()):
        torch.testing.assert_close(block.dense_curvature(), twin_block.dense_curvature(), rtol=1e-6, atol=1e-9)
    assert opt.param_groups[0]["damping"] == pytest.approx(twin_opt.param_groups[0]["damping"], rel=1e-5)


def test_overflowing_steps_are_skipped_as_the_scaler_decides():
    # A scale of 2^127 on a summed loss overflows float32 gradients: the scaler skips those steps and
    # halves its scale each time; nothing of them remains, so the run then follows the unscaled one.
    model, twin = classifier(), classifier()
    x, y = data()
    summed = nn.CrossEntropyLoss(reduction="sum")
    opt, twin_opt = optimizer(model, summed), optimizer(twin, summed)
    scaler = GradScaler("cpu", init_scale=2.0 ** 127, growth_interval=1000)
    before = copy.deepcopy(model.state_dict())
    calls = 0
    while opt.steps_taken < 8:
        opt.zero_grad()
        scaler.scale(opt.loss_fn(model(x), y)).backward()
        scaler.step(opt)
        scaler.update()
        calls += 1
        if calls == 1:
            assert opt.steps_taken == 0 and all(torch.equal(v, before[k]) for k, v in model.state_dict().items())
            assert all(len(opt.state[p]) == 0 for p in model.parameters())
    skipped = opt.diagnostics()["skip_reasons"]["loss_scale_overflow"]
    assert skipped == calls - 8 and skipped > 0
    assert scaler.get_scale() == 2.0 ** (127 - skipped)
    plain_steps(twin, twin_opt, x, y, 8)
    for p, q in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("dtype", [torch.bfloat16, torch.float16])
def test_autocast_with_the_scaler_trains(dtype):
    model = classifier(2)
    x, y = data(3)
    opt = optimizer(model)
    scaler = GradScaler("cpu", init_scale=256.0)
    start = float(nn.functional.cross_entropy(model(x), y))
    try:
        with torch.autocast("cpu", dtype=dtype):
            model(x)
    except RuntimeError as error:
        pytest.skip(f"no CPU autocast to {dtype}: {error}")
    for _ in range(30):
        opt.zero_grad()
        with torch.autocast("cpu", dtype=dtype):
            loss = opt.loss_fn(model(x), y)
        scaler.scale(loss).backward()
        scaler.step(opt)
        scaler.update()
    assert float(nn.functional.cross_entropy(model(x), y)) < 0.7 * start
    assert opt.diagnostics()["skipped_steps"] <= 3
