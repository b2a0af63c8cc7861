"""Every value of ``opt.diagnostics()`` against an independent computation.

Factors, spectra and directions are recomputed in numpy (float64) from the
definitions; the KL, the model's predicted change and the reduction ratio are
checked on linear least squares, where the quadratic model is exact.
"""
import math
import time
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import ngopt


def with_ones(x):
    return np.hstack([x, np.ones((x.shape[0], 1))])


def factored_shifts(a, g, damping):
    # pi = sqrt((tr A / dim A) / (tr G / dim G)); A gets pi sqrt(lambda), G sqrt(lambda) / pi
    # (Martens & Grosse 2015, sec. 6.3)
    pi = math.sqrt((np.trace(a) / a.shape[0]) / (np.trace(g) / g.shape[0]))
    return pi * math.sqrt(damping), math.sqrt(damping) / pi


def gradient_matrix(layer):
    return np.hstack([layer.weight.grad.numpy(), layer.bias.grad.numpy()[:, None]])


def make_optimizer(model, loss_fn, **options):
    settings = dict(lr=0.5, momentum=0.0, fisher="exact", stats_memory=0.0, stats_interval=1, inverse_interval=1,
                    max_step_kl=None, damping=1e-3, step_rule="fixed", damping_rule="fixed")
    settings.update(options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tiny damping warns, on purpose here
        return ngopt.FisherDescent(model, loss_fn, **settings)


@pytest.fixture
def classifier():
    torch.manual_seed(0)
    x = torch.randn(48, 4, dtype=torch.float64)
    y = torch.randint(0, 3, (48,))
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 3)).double()
    loss_fn = nn.CrossEntropyLoss()
    opt = make_optimizer(model, loss_fn, damping=1e-2)
    opt.track_spectra = True
    opt.zero_grad()
    logits = model(x)
    loss_fn(logits, y).backward()
    opt.step()
    return x, logits.detach(), model, opt


def test_factors_and_their_spectra(classifier):
    x, _, model, opt = classifier
    snap = opt.diagnostics()
    first = snap["layers"]["0"]
    a_np = with_ones(x.numpy()).T @ with_ones(x.numpy()) / x.shape[0]  # A = E[a a^T], bias as 1
    np.testing.assert_allclose(opt.blocks["0"].state["factor_in"].numpy(), a_np, rtol=1e-10, atol=1e-12)
    assert (first["in_dim"], first["out_dim"]) == (5, 5)
    for name, entry in snap["layers"].items():
        state = opt.blocks[name].state
        a, g = state["factor_in"].numpy(), state["factor_out"].numpy()
        eig_a, eig_g = np.linalg.eigvalsh(a), np.linalg.eigvalsh(g)  # numpy.linalg.eigvalsh
        np.testing.assert_allclose(entry["in_eigenvalues"], eig_a, rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(entry["out_eigenvalues"], eig_g, rtol=1e-8, atol=1e-12)
        assert entry["in_eig_min"] == pytest.approx(eig_a[0], abs=1e-12)
        assert entry["in_eig_max"] == pytest.approx(eig_a[-1], rel=1e-10)
        assert entry["out_eig_max"] == pytest.approx(eig_g[-1], rel=1e-10)
        assert entry["in_trace"] == pytest.approx(np.trace(a), rel=1e-10)
        assert entry["out_trace"] == pytest.approx(np.trace(g), rel=1e-10)
        shift_a, shift_g = factored_shifts(a, g, 1e-2)
        assert entry["in_damping"] == pytest.approx(shift_a, rel=1e-10)
        assert entry["out_damping"] == pytest.approx(shift_g, rel=1e-10)
        # numpy.linalg.cond: ratio of extreme singular values, = eigenvalues for an SPD matrix
        cond_a = np.linalg.cond(a + shift_a * np.eye(a.shape[0]))
        cond_g = np.linalg.cond(g + shift_g * np.eye(g.shape[0]))
        assert entry["in_condition_damped"] == pytest.approx(cond_a, rel=1e-6)
        assert entry["out_condition_damped"] == pytest.approx(cond_g, rel=1e-6)
        assert entry["condition"] == pytest.approx(cond_a * cond_g, rel=1e-6)
        # the condition number of a Kronecker product is the product of the conditions (numpy.kron)
        assert entry["condition"] == pytest.approx(
            np.linalg.cond(np.kron(a + shift_a * np.eye(len(a)), g + shift_g * np.eye(len(g)))), rel=1e-6)
        for side, eig in (("in", eig_a), ("out", eig_g)):
            if eig[0] > 1e-8 * eig[-1]:  # otherwise eig_min is round-off (softmax G is singular)
                assert entry[f"{side}_condition"] == pytest.approx(eig[-1] / eig[0], rel=1e-6)
        assert entry["inversion_step"] == 0


def test_output_factor_of_the_last_layer_is_the_mean_output_fisher(classifier):
    _, logits, _, opt = classifier
    logits = logits.numpy()  # the statistics were taken before the step moved the weights
    p = np.exp(logits - logits.max(1, keepdims=True))
    p /= p.sum(1, keepdims=True)
    # G of the output layer = (1/N) sum_n (diag p_n - p_n p_n^T) for softmax cross-entropy,
    # mean reduction (Martens & Grosse 2015, sec. 5: the output layer's g is the output gradient)
    expected = np.mean([np.diag(pn) - np.outer(pn, pn) for pn in p], axis=0)
    np.testing.assert_allclose(opt.blocks["2"].state["factor_out"].numpy(), expected, rtol=1e-8, atol=1e-12)


def least_squares(seed=0, n=40, d=4, out=2):
    torch.manual_seed(seed)
    x = torch.randn(n, d, dtype=torch.float64)
    y = torch.randn(n, out, dtype=torch.float64)
    model = nn.Linear(d, out).double()
    return x, y, model, nn.MSELoss()


def one_step(model, loss_fn, x, y, opt, closure=False):
    with torch.no_grad():
        before = model(x).clone()
        loss_before = float(loss_fn(before, y))
    params_before = torch.cat([p.detach().flatten().clone() for p in model.parameters()])
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    grad = gradient_matrix(model)
    if closure:
        def evaluate():
            opt.zero_grad()
            value = loss_fn(model(x), y)
            value.backward()
            return value
        opt.zero_grad()
        opt.step(evaluate)
    else:
        opt.step()
    with torch.no_grad():
        after = model(x)
        loss_after = float(loss_fn(after, y))
    moved = torch.cat([p.detach().flatten() for p in model.parameters()]) - params_before
    return dict(before=before.numpy(), after=after.numpy(), loss_before=loss_before, loss_after=loss_after,
                grad=grad, moved=moved.numpy())


def numpy_direction(opt, name, grad, damping):
    state = opt.blocks[name].state
    a, g = state["factor_in"].numpy(), state["factor_out"].numpy()
    shift_a, shift_g = factored_shifts(a, g, damping)
    # (A_d (x) G_d)^-1 vec(V) = vec(G_d^-1 V A_d^-1)   (numpy.linalg.inv)
    return np.linalg.inv(g + shift_g * np.eye(len(g))) @ grad @ np.linalg.inv(a + shift_a * np.eye(len(a)))


def test_update_norms_cosine_kl_and_predicted_change():
    x, y, model, loss_fn = least_squares()
    # negligible: factored damping adds sqrt(lambda) = 1e-8 to the factors, so the damped
    # model is the exact quadratic to about 1e-8
    damping = 1e-16
    opt = make_optimizer(model, loss_fn, lr=0.5, damping=damping)
    seen = one_step(model, loss_fn, x, y, opt)
    update = opt.diagnostics()["update"]
    grad = seen["grad"]
    delta = numpy_direction(opt, "Linear", grad, damping)
    assert update["grad_norm"] == pytest.approx(np.linalg.norm(grad), rel=1e-10)  # numpy.linalg.norm
    assert update["direction_norm"] == pytest.approx(np.linalg.norm(delta), rel=1e-8)
    cosine = np.sum(delta * grad) / (np.linalg.norm(delta) * np.linalg.norm(grad))
    assert update["cosine"] == pytest.approx(cosine, rel=1e-8)
    # the weights moved by lr * update (momentum 0, no trust bound)
    assert np.linalg.norm(seen["moved"]) == pytest.approx(0.5 * update["direction_norm"], rel=1e-8)
    assert update["trust_scale"] == 1.0
    assert update["lr"] == 0.5 and update["damping"] == damping
    # KL of the step by hand: for N(f, 1/2) per element, KL = (f_after - f_before)^2, averaged
    # by the mean reduction (closed form of the Gaussian KL with equal variances)
    kl_by_hand = np.mean((seen["after"] - seen["before"]) ** 2)
    assert update["kl_estimate"] == pytest.approx(kl_by_hand, rel=1e-6)
    # least squares: the quadratic model is the loss, so the predicted change is the actual one
    assert update["predicted_change"] == pytest.approx(seen["loss_after"] - seen["loss_before"], rel=1e-6)


def test_trust_scale_holds_the_kl_at_the_bound():
    x, y, model, loss_fn = least_squares(seed=1)
    kappa = 1e-4
    opt = make_optimizer(model, loss_fn, lr=1.0, damping=1e-16, max_step_kl=kappa)
    seen = one_step(model, loss_fn, x, y, opt)
    update = opt.diagnostics()["update"]
    delta = numpy_direction(opt, "Linear", seen["grad"], 1e-16)
    # nu = min(1, sqrt(kappa / (lr^2 delta^T g)))  (Ba, Grosse & Martens 2017)
    nu = min(1.0, math.sqrt(kappa / np.sum(delta * seen["grad"])))
    assert nu < 1.0
    assert update["trust_scale"] == pytest.approx(nu, rel=1e-8)
    kl_by_hand = np.mean((seen["after"] - seen["before"]) ** 2)  # Gaussian KL, as above
    assert kl_by_hand == pytest.approx(kappa / 2, rel=1e-6)
    assert update["kl_estimate"] == pytest.approx(kl_by_hand, rel=1e-6)
    assert update["direction_norm"] == pytest.approx(nu * np.linalg.norm(delta), rel=1e-8)


def test_reduction_ratio_from_a_closure():
    x, y, model, loss_fn = least_squares(seed=2)
    # momentum > 0 so the update sits in the momentum buffer the model change is computed from
    opt = make_optimizer(model, loss_fn, lr=0.5, damping=1e-16, momentum=0.5, damping_rule="lm",
                         damping_interval=1)
    seen = one_step(model, loss_fn, x, y, opt, closure=True)
    update = opt.diagnostics()["update"]
    # rho = (L(theta + delta) - L(theta)) / M(delta); least squares: M is exact, rho = 1
    actual = seen["loss_after"] - seen["loss_before"]
    assert update["reduction_ratio"] == pytest.approx(actual / update["predicted_change"], rel=1e-6)
    assert update["reduction_ratio"] == pytest.approx(1.0, rel=1e-5)


def test_skipped_step_is_counted_with_its_reason():
    x, y, model, loss_fn = least_squares(seed=3)
    opt = make_optimizer(model, loss_fn)
    one_step(model, loss_fn, x, y, opt)
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    model.weight.grad[0, 0] = float("nan")
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    snap = opt.diagnostics()
    assert snap["step"] == 2
    assert snap["skipped_steps"] == 1
    assert snap["skip_reasons"]["nonfinite_gradient"] == 1
    assert sum(snap["skip_reasons"].values()) == 1


def test_times_add_up_and_stay_within_the_wall_clock():
    x, y, model, loss_fn = least_squares(seed=4)
    opt = make_optimizer(model, loss_fn)
    spent = passes = 0.0
    for _ in range(5):
        opt.zero_grad()
        started = time.perf_counter()
        loss_fn(model(x), y).backward()
        passes += time.perf_counter() - started
        started = time.perf_counter()
        opt.step()
        spent += time.perf_counter() - started
    times = opt.diagnostics()["time"]
    in_passes = ("capture", "extra_backward", "statistics_in_backward")  # inside the user's forward/backward
    parts = sum(v for k, v in times.items() if k != "step_total" and k not in in_passes)
    assert all(v >= 0.0 for v in times.values())
    assert parts <= times["step_total"] <= spent  # step_total is measured inside step()
    assert sum(times[k] for k in in_passes) <= passes
    assert times["inversion"] > 0.0 and times["statistics"] > 0.0 and times["statistics_in_backward"] > 0.0


def test_diagonal_block_values():
    x, y, model, loss_fn = least_squares(seed=5)
    damping = 1e-3
    opt = make_optimizer(model, loss_fn, structure="diag", damping=damping)
    opt.track_spectra = True
    one_step(model, loss_fn, x, y, opt)
    entry = opt.diagnostics()["layers"]["Linear"]
    x1 = with_ones(x.numpy())
    # exact Fisher of mean squared error for a linear layer: (2 / (N D)) (X^T X) (x) I_D (numpy.kron)
    fisher = 2.0 / y.numel() * np.kron(x1.T @ x1, np.eye(y.shape[1]))
    diagonal = np.diag(fisher)
    assert entry["diag_min"] == pytest.approx(diagonal.min(), rel=1e-8)
    assert entry["diag_max"] == pytest.approx(diagonal.max(), rel=1e-8)
    assert entry["diag_mean"] == pytest.approx(diagonal.mean(), rel=1e-8)
    np.testing.assert_allclose(entry["diag_values"], np.sort(diagonal), rtol=1e-8)
    assert entry["condition"] == pytest.approx((diagonal.max() + damping) / (diagonal.min() + damping), rel=1e-8)


def test_ekfac_block_values():
    # One linear layer with squared error: the exact Fisher is (2 / (N D)) (X^T X) (x) I_D, K-FAC is
    # exact, so EKFAC's scales are the eigenvalues of that matrix (numpy.linalg.eigvalsh).
    x, y, model, loss_fn = least_squares(seed=6)
    damping = 1e-3
    opt = make_optimizer(model, loss_fn, structure="ekfac", damping=damping)
    opt.track_spectra = True
    one_step(model, loss_fn, x, y, opt)
    entry = opt.diagnostics()["layers"]["Linear"]
    x1 = with_ones(x.numpy())
    eigenvalues = np.linalg.eigvalsh(2.0 / y.numel() * np.kron(x1.T @ x1, np.eye(y.shape[1])))
    assert entry["structure"] == "ekfac"
    np.testing.assert_allclose(entry["scale_values"], eigenvalues, rtol=1e-7, atol=1e-12)
    assert entry["scale_min"] == pytest.approx(eigenvalues.min(), rel=1e-7, abs=1e-12)
    assert entry["scale_max"] == pytest.approx(eigenvalues.max(), rel=1e-7)
    expected_condition = (eigenvalues.max() + damping) / (max(eigenvalues.min(), 0.0) + damping)
    assert entry["condition"] == pytest.approx(expected_condition, rel=1e-6)
