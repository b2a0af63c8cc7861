"""The Fisher probe: exact per-layer Fisher matrices and the comparisons built on them."""
import math
import warnings

import numpy as np
import pytest
import torch
from statsmodels.discrete.discrete_model import Logit
from torch import nn

import ngopt
from ngopt.fisher_probe import (direction_angle_deg, exact_layer_fisher, probe_fisher_quality,
                                relative_frobenius_error)


def with_ones(x):
    return np.hstack([x, np.ones((x.shape[0], 1))])


def exact_step_optimizer(model, loss_fn, **options):
    """An optimizer whose blocks hold the exact-expectation K-FAC of the last batch, weights unmoved."""
    settings = dict(lr=1e-12, momentum=0.0, fisher="exact", stats_memory=0.0, stats_interval=1, inverse_interval=1,
                    max_step_kl=None, damping=1e-3, step_rule="fixed", damping_rule="fixed")
    settings.update(options)
    return ngopt.FisherDescent(model, loss_fn, **settings)


def refresh(opt, model, loss_fn, x, y):
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()


def test_exact_fisher_of_linear_least_squares():
    torch.manual_seed(0)
    x, y = torch.randn(30, 3, dtype=torch.float64), torch.randn(30, 2, dtype=torch.float64)
    model = nn.Linear(3, 2).double()
    for reduction, c in (("mean", 1.0 / 60), ("sum", 1.0)):
        fisher = exact_layer_fisher(model, model, nn.MSELoss(reduction=reduction), x, y).numpy()
        x1 = with_ones(x.numpy())
        # Gauss-Newton of c * sum (y - W x)^2: 2 c (X^T X) (x) I, column-major vec (numpy.kron)
        np.testing.assert_allclose(fisher, 2 * c * np.kron(x1.T @ x1, np.eye(2)), rtol=1e-10, atol=1e-12)


def test_exact_fisher_of_logistic_regression_matches_statsmodels():
    torch.manual_seed(1)
    x = torch.randn(50, 3, dtype=torch.float64)
    y = (torch.rand(50, 1, dtype=torch.float64) < 0.5).to(torch.float64)
    model = nn.Linear(3, 1).double()
    fisher = exact_layer_fisher(model, model, nn.BCEWithLogitsLoss(), x, y).numpy()
    params = np.concatenate([model.weight.detach().numpy().ravel(), model.bias.detach().numpy()])
    # statsmodels Logit: the information matrix is minus the Hessian of the log-likelihood; the
    # mean-reduced loss divides it by n
    information = -Logit(y.numpy().ravel(), with_ones(x.numpy())).hessian(params)
    np.testing.assert_allclose(fisher, information / 50, rtol=1e-10)


def test_exact_fisher_of_softmax_is_the_expectation_over_classes():
    torch.manual_seed(2)
    x, y = torch.randn(12, 3, dtype=torch.float64), torch.randint(0, 4, (12,))
    model = nn.Sequential(nn.Linear(3, 5), nn.Tanh(), nn.Linear(5, 4)).double()
    loss_fn = nn.CrossEntropyLoss()
    fisher = exact_layer_fisher(model, model[0], loss_fn, x, y).numpy()
    # F = (1/N) sum_n sum_k p_k grad l(x_n, k) grad l(x_n, k)^T, per-example autograd by hand
    # (the definition of the Fisher as the expected outer product of the score)
    expected = np.zeros_like(fisher)
    layer = model[0]
    for n in range(12):
        p = torch.softmax(model(x[n:n + 1]), dim=1).detach().numpy()[0]
        for k in range(4):
            loss = loss_fn(model(x[n:n + 1]), torch.tensor([k]))
            gw, gb = torch.autograd.grad(loss, [layer.weight, layer.bias])
            grad = np.hstack([gw.numpy(), gb.numpy()[:, None]]).T.reshape(-1)  # column-major vec
            expected += p[k] * np.outer(grad, grad) / 12
    np.testing.assert_allclose(fisher, expected, rtol=1e-9, atol=1e-14)


def test_measures_against_numpy():
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(4, 4)), rng.normal(size=(4, 4))
    assert relative_frobenius_error(torch.tensor(a), torch.tensor(b)) == pytest.approx(
        np.linalg.norm(a - b) / np.linalg.norm(b), rel=1e-12)  # numpy.linalg.norm (Frobenius)
    u, v = rng.normal(size=5), rng.normal(size=5)
    expected = math.degrees(math.acos(u @ v / (np.linalg.norm(u) * np.linalg.norm(v))))
    assert direction_angle_deg(torch.tensor(u), torch.tensor(v)) == pytest.approx(expected, rel=1e-10)
    assert direction_angle_deg(torch.tensor(u), torch.tensor(-u)) == pytest.approx(180.0)


def test_kfac_is_exact_for_one_linear_layer_with_squared_error():
    # K-FAC is exact for a single linear layer with Gaussian output (DESIGN.md reference checks)
    torch.manual_seed(4)
    x, y = torch.randn(40, 5, dtype=torch.float64), torch.randn(40, 3, dtype=torch.float64)
    model = nn.Linear(5, 3).double()
    loss_fn = nn.MSELoss()
    opt = exact_step_optimizer(model, loss_fn)
    refresh(opt, model, loss_fn, x, y)
    result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    entry = result["layers"]["Linear"]
    assert entry["params"] == 18
    assert entry["block_error"] < 1e-6
    assert entry["block_angle_deg"] < 1e-3
    assert entry["diag_error"] > 0.1  # the inputs are correlated with the bias column


def test_probe_numbers_against_numpy_for_a_hidden_layer():
    torch.manual_seed(5)
    x, y = torch.randn(64, 4, dtype=torch.float64), torch.randint(0, 3, (64,))
    model = nn.Sequential(nn.Linear(4, 6), nn.Tanh(), nn.Linear(6, 3)).double()
    loss_fn = nn.CrossEntropyLoss()
    damping = 1e-2
    opt = exact_step_optimizer(model, loss_fn, damping=damping)
    refresh(opt, model, loss_fn, x, y)
    result = probe_fisher_quality(opt, model, loss_fn, x, y, samples=4)
    entry = result["layers"]["0"]
    exact = exact_layer_fisher(model, model[0], loss_fn, x, y).numpy()
    approx = opt.blocks["0"].dense_curvature().numpy()
    assert entry["block_error"] == pytest.approx(np.linalg.norm(approx - exact) / np.linalg.norm(exact), rel=1e-8)
    assert entry["block_error"] > 1e-3  # K-FAC is an approximation for a hidden layer
    diagonal = np.diag(np.diag(exact))
    assert entry["diag_error"] == pytest.approx(np.linalg.norm(diagonal - exact) / np.linalg.norm(exact), rel=1e-8)
    model.zero_grad()
    loss_fn(model(x), y).backward()
    grad = np.hstack([model[0].weight.grad.numpy(), model[0].bias.grad.numpy()[:, None]]).T.reshape(-1)
    eye = np.eye(len(grad))

    def angle(u, v):
        return math.degrees(math.acos(np.clip(u @ v / (np.linalg.norm(u) * np.linalg.norm(v)), -1, 1)))

    exact_direction = np.linalg.solve(exact + damping * eye, grad)  # numpy.linalg.solve
    assert entry["block_angle_deg"] == pytest.approx(
        angle(np.linalg.solve(approx + damping * eye, grad), exact_direction), rel=1e-6, abs=1e-6)
    assert entry["diag_angle_deg"] == pytest.approx(
        angle(np.linalg.solve(diagonal + damping * eye, grad), exact_direction), rel=1e-6, abs=1e-6)
    damped = opt.blocks["0"].dense_curvature(damping).numpy()
    assert entry["step_angle_deg"] == pytest.approx(angle(np.linalg.solve(damped, grad), exact_direction),
                                                    rel=1e-6, abs=1e-6)


def test_empirical_fisher_and_its_warning():
    torch.manual_seed(6)
    x, y = torch.randn(32, 3, dtype=torch.float64), torch.randint(0, 2, (32,))
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 2)).double()
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_step_optimizer(model, loss_fn)
    refresh(opt, model, loss_fn, x, y)
    with pytest.warns(UserWarning, match="empirical Fisher turns the natural-gradient step"):
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=0.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning at all when the threshold is 180 degrees
        again = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    assert again["empirical_vs_sampled_angle_deg"] == result["empirical_vs_sampled_angle_deg"]  # same seed
    entry = result["layers"]["2"]
    assert 0.0 < entry["empirical_vs_sampled_angle_deg"] < 180.0
    assert entry["empirical_vs_sampled_error"] > 0.0


def test_empirical_fisher_is_the_mean_outer_product_of_example_gradients():
    # the empirical Fisher at the loss's scale, (1/c) sum_n (J_n^T u_n)(J_n^T u_n)^T, against
    # per-example gradients taken one example at a time
    torch.manual_seed(7)
    x, y = torch.randn(10, 2, dtype=torch.float64), torch.randint(0, 3, (10,))
    model = nn.Linear(2, 3).double()
    loss_fn = nn.CrossEntropyLoss()
    from ngopt.fisher_probe import _outer_fisher, layer_jacobian, output_gradients

    outputs, jac = layer_jacobian(model, model, x)
    empirical = _outer_fisher(loss_fn, outputs, jac, output_gradients(loss_fn, outputs, y)).numpy()
    expected = np.zeros_like(empirical)
    for n in range(10):  # (1/N) sum_n grad l_n grad l_n^T with per-example autograd
        gw, gb = torch.autograd.grad(loss_fn(model(x[n:n + 1]), y[n:n + 1]), [model.weight, model.bias])
        grad = np.hstack([gw.numpy(), gb.numpy()[:, None]]).T.reshape(-1)
        expected += np.outer(grad, grad) / 10
    np.testing.assert_allclose(empirical, expected, rtol=1e-10, atol=1e-14)


def test_probe_leaves_training_state_alone_and_skips_big_layers():
    torch.manual_seed(8)
    x, y = torch.randn(16, 3), torch.randint(0, 2, (16,))
    probe_x, probe_y = torch.randn(24, 3) * 5, torch.randint(0, 2, (24,))
    model = nn.Sequential(nn.Linear(3, 40), nn.Dropout(0.1), nn.Linear(40, 2))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1, stats_memory=0.0, stats_interval=1, inverse_interval=1)
    refresh(opt, model, loss_fn, x, y)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = probe_fisher_quality(opt, model, loss_fn, probe_x, probe_y, max_params=100)
    assert result["skipped_layers"] == {"0": "160 parameters > max_params=100"}
    assert list(result["layers"]) == ["2"] and result["layers"]["2"]["params"] == 82
    assert all(m.training for m in model.modules())  # train mode restored
    refresh(opt, model, loss_fn, x, y)
    # had the probe's forward passes been captured, A would mix in the probe inputs:
    # A = E[a a^T] over the training batch only (bias as 1)
    x1 = with_ones(x.numpy().astype(np.float64))
    np.testing.assert_allclose(opt.blocks["0"].state["factor_in"].numpy(), x1.T @ x1 / 16, rtol=1e-5, atol=1e-6)


def test_bad_arguments_are_named():
    model = nn.Linear(2, 2)
    opt = ngopt.FisherDescent(model, nn.MSELoss(), lr=0.1)
    x, y = torch.randn(4, 2), torch.randn(4, 2)
    with pytest.raises(ValueError, match="loss_fn must be one of"):
        probe_fisher_quality(opt, model, nn.L1Loss(), x, y)
    with pytest.raises(ValueError, match="reduction must be 'mean' or 'sum'"):
        probe_fisher_quality(opt, model, nn.MSELoss(reduction="none"), x, y)
    with pytest.raises(ValueError, match="max_params must be >= 1"):
        probe_fisher_quality(opt, model, nn.MSELoss(), x, y, max_params=0)
    with pytest.raises(TypeError, match="samples must be an int"):
        probe_fisher_quality(opt, model, nn.MSELoss(), x, y, samples=1.5)
    with pytest.raises(ValueError, match="layers: unknown block names"):
        probe_fisher_quality(opt, model, nn.MSELoss(), x, y, layers=["nope"])
    with pytest.raises(TypeError, match="opt must be an ngopt.FisherDescent"):
        probe_fisher_quality(torch.optim.SGD(model.parameters(), lr=0.1), model, nn.MSELoss(), x, y)
    result = probe_fisher_quality(opt, model, nn.MSELoss(), x, y)
    assert result["skipped_layers"] == {"Linear": "no curvature statistics yet"}


def test_probe_shows_what_ekfac_buys_over_kfac():
    # EKFAC is the Frobenius-closest curvature diagonal in K-FAC's eigenbasis (George et al. 2018),
    # so on the probe batch itself its block error is at most K-FAC's, layer by layer.
    torch.manual_seed(6)
    x = torch.randn(32, 6, dtype=torch.float64)
    y = torch.randint(0, 4, (32,))
    errors = {}
    for structure in ("kfac", "ekfac"):
        torch.manual_seed(7)
        model = nn.Sequential(nn.Linear(6, 5), nn.Tanh(), nn.Linear(5, 4)).double()
        loss_fn = nn.CrossEntropyLoss()
        opt = exact_step_optimizer(model, loss_fn, structure=structure)
        refresh(opt, model, loss_fn, x, y)
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
        errors[structure] = {name: entry["block_error"] for name, entry in result["layers"].items()}
        assert all(entry["structure"] == structure for entry in result["layers"].values())
    print(errors)
    for name in errors["kfac"]:
        assert errors["ekfac"][name] <= errors["kfac"][name] + 1e-9
    assert errors["ekfac"]["0"] < 0.95 * errors["kfac"]["0"]  # a hidden layer: a strict gain here
