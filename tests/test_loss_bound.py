"""The loss bound on a step (ngopt/rules/loss_bound.py): its predicted decrease at most 2 (L - loss_floor).

References: numpy.linalg.lstsq for the least-squares minimizer that the bounded step lands on, and the
closed form of the bounded stochastic Polyak step (Loizou, Vaswani, Laradji & Lacoste-Julien, AISTATS
2021, with c = 1/2).
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import ngopt
from ngopt.rules.loss_bound import loss_bound_scale


def test_the_scale_is_the_closed_form_and_safe_at_its_edges():
    assert loss_bound_scale(10.0, 2.0) == pytest.approx(0.4)       # 2 * 2 / 10
    assert loss_bound_scale(3.0, 2.0) == 1.0                       # a step short of the floor is left alone
    assert loss_bound_scale(4.0, 2.0) == 1.0                       # one that lands on it too
    assert loss_bound_scale(5.0, 0.0) == 0.0                       # at the floor there is nothing to decrease
    for gap in (None, math.nan, math.inf):
        assert loss_bound_scale(5.0, gap) == 1.0                   # loss not seen (or not finite): no bound
    for decrease in (0.0, -1.0, math.nan, math.inf):
        assert loss_bound_scale(decrease, 1.0) == 1.0              # no predicted decrease to bound


def least_squares(noise: float, seed: int = 3):
    rng = np.random.default_rng(seed)
    n, d, outputs = 50, 4, 2
    x = rng.normal(size=(n, d)) + rng.normal(size=d)
    y = x @ rng.normal(size=(d, outputs)) + 0.5 + noise * rng.normal(size=(n, outputs))
    design = np.hstack([np.ones((n, 1)), x])
    solution = np.linalg.lstsq(design, y, rcond=None)[0].T                     # numpy.linalg.lstsq
    floor = float(np.mean((design @ solution.T - y) ** 2))                     # the least loss nn.MSELoss can reach
    return torch.as_tensor(x), torch.as_tensor(y), solution, floor


def one_long_step(x, y, lr, **options):
    """One exact-Fisher step of lr times the Newton step from a random start (no KL bound, no momentum)."""
    torch.manual_seed(0)
    model = nn.Linear(x.shape[1], y.shape[1]).double()
    start = np.hstack([model.bias.detach().numpy()[:, None], model.weight.detach().numpy()])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tiny damping is asked for on purpose
        opt = ngopt.FisherDescent(model, nn.MSELoss(), lr=lr, momentum=0.0, damping=1e-20, fisher="exact",
                                  stats_interval=1, inverse_interval=1, stats_memory=0.0, max_step_kl=None,
                                  damping_rule="fixed", **options)
    opt.zero_grad()
    nn.functional.mse_loss(model(x), y).backward()
    opt.step()
    end = np.hstack([model.bias.detach().numpy()[:, None], model.weight.detach().numpy()])
    return start, end, opt.diagnostics()["update"]["loss_bound_scale"]


@pytest.mark.parametrize("lr", [1.5, 3.0, 10.0])
def test_a_step_longer_than_newtons_is_scaled_back_onto_the_least_squares_solution(lr):
    # On a quadratic loss whose minimum is the floor (noise-free data: 0), the Newton step predicts a
    # first-order decrease of exactly 2 (L - 0); lr times it is scaled by 1/lr and lands on the minimizer.
    x, y, solution, floor = least_squares(noise=0.0)
    assert floor < 1e-25
    start, end, scale = one_long_step(x, y, lr)
    assert scale == pytest.approx(1.0 / lr, rel=1e-6)
    # damping 1e-20 adds sqrt(1e-20) ~ 1e-10 to factors of order 1 (factored Tikhonov damping), which moves
    # the scale and the step by about that much: measured 1.3e-10 and 2-3e-10 here; 1e-8 leaves room
    assert np.linalg.norm(end - solution) <= 1e-8 * np.linalg.norm(start - solution)
    # without the bound the same step overshoots to start + lr (solution - start)
    _, unbounded, none = one_long_step(x, y, lr, loss_floor=None)
    assert none is None
    assert np.linalg.norm(unbounded - (start + lr * (solution - start))) <= 1e-8 * lr * np.linalg.norm(
        start - solution)


def test_with_the_true_floor_a_noisy_problem_lands_on_its_solution_too():
    # The floor is the least-squares residual loss: 2 (L - floor) is again the Newton step's decrease.
    x, y, solution, floor = least_squares(noise=0.4)
    start, end, scale = one_long_step(x, y, 4.0, loss_floor=floor)
    assert scale == pytest.approx(0.25, rel=1e-6)
    assert np.linalg.norm(end - solution) <= 1e-8 * np.linalg.norm(start - solution)
    # with the default floor of 0 the bound allows more than the Newton step here: lr 4 is cut less
    _, _, loose = one_long_step(x, y, 4.0)
    assert 0.25 < loose < 1.0


def plain_steps(model, loss_of, steps=6, **options):
    """Steps with statistics every 5 steps and fixed damping, so most steps record nothing."""
    opt = ngopt.FisherDescent(model, seed=0, stats_interval=5, inverse_interval=5, interval_warmup=0,
                              damping_rule="fixed", **options)
    generator = torch.Generator().manual_seed(1)
    seen = []
    for _ in range(steps):
        inputs, labels = torch.randn(16, 5, generator=generator), torch.randint(0, 3, (16,), generator=generator)
        opt.zero_grad()
        loss_of(model, inputs, labels).backward()
        opt.step()
        seen.append(opt.diagnostics()["update"]["loss_bound_scale"])
    return opt, seen


def classifier():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 3))


class LossInside(nn.Module):
    """A model that computes its own loss and returns it with the logits."""

    def __init__(self):
        super().__init__()
        self.net = classifier()

    def forward(self, inputs, labels):
        logits = self.net(inputs)
        return {"loss": nn.functional.cross_entropy(logits, labels), "logits": logits}


@pytest.mark.parametrize("where", ["loop", "inside"])
def test_the_loss_is_seen_on_every_step_whether_recorded_or_not(where):
    if where == "loop":
        model, loss_of = classifier(), lambda m, x, y: nn.functional.cross_entropy(m(x), y)
    else:
        model, loss_of = LossInside(), lambda m, x, y: m(x, y)["loss"]
    _, seen = plain_steps(model, loss_of)
    assert all(isinstance(value, float) and 0.0 < value <= 1.0 for value in seen)


def test_accumulated_backward_passes_add_up_to_the_steps_loss():
    # Two half batches, each loss halved: the gradient is the whole batch's, and so is the loss the
    # bound compares the step with (the sum of the two roots).
    torch.manual_seed(0)
    model = nn.Linear(3, 2).double()
    x, y = torch.randn(20, 3, dtype=torch.float64), torch.randn(20, 2, dtype=torch.float64)
    opt = ngopt.FisherDescent(model, nn.MSELoss(), max_step_kl=None)
    opt.zero_grad()
    for rows in (slice(0, 10), slice(10, 20)):
        (0.5 * nn.functional.mse_loss(model(x[rows]), y[rows])).backward()
    whole = float(nn.functional.mse_loss(model(x), y))
    gap = opt._loss_gap(opt._capture.take_roots(), None, 1.0)
    assert gap == pytest.approx(whole, rel=1e-12)


def _cpu_grad_scaler_available() -> bool:
    try:
        torch.amp.GradScaler("cpu")
    except Exception:  # torch before 2.3 has no torch.amp.GradScaler
        return False
    return True


@pytest.mark.skipif(not _cpu_grad_scaler_available(), reason="this torch has no CPU GradScaler")
def test_a_loss_scaler_leaves_the_bound_as_without_it():
    # torch.amp.GradScaler multiplies the loss by its scale before backward() and unscales the gradients
    # before step(): the bound must see the loss itself, so the steps match those of a run without it.
    def run(scaled: bool):
        torch.manual_seed(0)
        model = classifier()
        opt = ngopt.FisherDescent(model, seed=0, lr=5.0, max_step_kl=None)
        scaler = torch.amp.GradScaler("cpu", init_scale=1024.0) if scaled else None
        generator = torch.Generator().manual_seed(1)
        scales = []
        for _ in range(4):
            inputs, labels = torch.randn(16, 5, generator=generator), torch.randint(0, 3, (16,), generator=generator)
            opt.zero_grad()
            loss = nn.functional.cross_entropy(model(inputs), labels)
            if scaled:
                scaler.scale(loss).backward()
                scaler.step(opt)
                scaler.update()
            else:
                loss.backward()
                opt.step()
            scales.append(opt.diagnostics()["update"]["loss_bound_scale"])
        return scales, [p.detach().clone() for p in model.parameters()]

    plain, plain_weights = run(False)
    scaled, scaled_weights = run(True)
    assert min(plain) < 0.5  # lr 5 without a KL bound: the loss bound holds these steps
    assert scaled == pytest.approx(plain, rel=1e-4)
    for a, b in zip(plain_weights, scaled_weights):
        assert torch.allclose(a, b, rtol=1e-4, atol=1e-6)


def test_a_loss_below_the_floor_turns_the_bound_off_with_a_warning():
    model = classifier()
    shifted = lambda m, x, y: nn.functional.cross_entropy(m(x), y) - 10.0  # a loss that goes below 0
    with pytest.warns(UserWarning, match="below loss_floor=0"):
        _, seen = plain_steps(model, shifted, steps=2)
    assert seen == [None, None]
    _, floored = plain_steps(classifier(), shifted, steps=2, loss_floor=-10.0)
    assert all(value is not None for value in floored)


def test_loss_floor_must_be_a_real_number_or_none():
    with pytest.raises(TypeError, match="loss_floor must be a real number or None"):
        ngopt.FisherDescent(classifier(), loss_floor="0")
    with pytest.raises(ValueError, match="loss_floor must be finite"):
        ngopt.FisherDescent(classifier(), loss_floor=math.inf)
