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
                    max_step_kl=None, damping=1e-3, step_rule="fixed", damping_rule="fixed", stats_fraction=1.0)
    settings.update(options)
    return ngopt.FisherDescent(model, loss_fn, **settings)


def refresh(opt, model, loss_fn, x, y):
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()


def refreshed_tanh_classifier(seed, n, d_in, hidden, classes, **options):
    """A float64 Linear-Tanh-Linear softmax classifier whose blocks hold its batch's exact K-FAC."""
    torch.manual_seed(seed)
    x, y = torch.randn(n, d_in, dtype=torch.float64), torch.randint(0, classes, (n,))
    model = nn.Sequential(nn.Linear(d_in, hidden), nn.Tanh(), nn.Linear(hidden, classes)).double()
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_step_optimizer(model, loss_fn, **options)
    refresh(opt, model, loss_fn, x, y)
    return x, y, model, loss_fn, opt


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
    x, y, model, loss_fn, opt = refreshed_tanh_classifier(6, 32, 3, 4, 2)
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


# --------------------------------------------------------------------------
# the fresh block, and the warnings that tell statistics from structure
# --------------------------------------------------------------------------

def tanh_mlp_kfac_by_hand(model, x, c):
    """Exact-expectation K-FAC of both layers of Linear-Tanh-Linear under softmax cross-entropy, in numpy.

    Martens & Grosse 2015, sec. 3: F_l ~ E[a a^T] (x) E[g g^T] with g = ds-gradients; the expectation
    over the model's classes is taken exactly with H = diag(p) - p p^T (the softmax output Fisher).
    """
    w1, b1 = model[0].weight.detach().numpy(), model[0].bias.detach().numpy()
    w2, b2 = model[2].weight.detach().numpy(), model[2].bias.detach().numpy()
    xs = x.numpy()
    hidden = np.tanh(xs @ w1.T + b1)
    logits = hidden @ w2.T + b2
    p = np.exp(logits - logits.max(1, keepdims=True))
    p /= p.sum(1, keepdims=True)
    hessians = np.stack([np.diag(q) - np.outer(q, q) for q in p])          # [N, D, D]
    through = np.einsum("od,nd->nod", w2, 1 - hidden ** 2)                  # ds2/ds1 = W2 diag(1 - h^2)
    # G = (1/c) sum_n c^2 J^T H J = c sum_n J^T H J (the blocks' scale, DEVELOPERS.md)
    g_out = c * hessians.sum(0)
    g_hidden = c * np.einsum("nod,noe,nef->df", through, hessians, through)
    a_in = with_ones(xs).T @ with_ones(xs) / len(xs)
    a_hidden = with_ones(hidden).T @ with_ones(hidden) / len(xs)
    return {"0": np.kron(a_in, g_hidden), "2": np.kron(a_hidden, g_out)}   # numpy.kron, column-major vec


def test_fresh_block_is_the_exact_expectation_kfac_of_the_probe_batch():
    torch.manual_seed(11)
    x, y = torch.randn(40, 4, dtype=torch.float64), torch.randint(0, 3, (40,))
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 3)).double()
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1, stats_memory=0.9, max_step_kl=None)
    refresh(opt, model, loss_fn, torch.randn(40, 4, dtype=torch.float64) * 3, y)  # statistics of another batch
    expected = tanh_mlp_kfac_by_hand(model, x, c=1 / 40)
    from ngopt.fisher_probe import evaluation_mode, fresh_blocks

    with evaluation_mode(model):
        fresh = fresh_blocks(opt.blocks, model, loss_fn, x, {"0": 1e-2, "2": 1e-2})
    result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0, warn_error=1e9)
    for name in ("0", "2"):
        np.testing.assert_allclose(fresh[name].dense_curvature().numpy(), expected[name], rtol=1e-9, atol=1e-14)
        exact = exact_layer_fisher(model, model[int(name)], loss_fn, x, y).numpy()
        entry = result["layers"][name]
        block = opt.blocks[name].dense_curvature().numpy()
        assert entry["fresh_error"] == pytest.approx(
            np.linalg.norm(expected[name] - exact) / np.linalg.norm(exact), rel=1e-8)
        assert entry["statistics_gap"] == pytest.approx(
            np.linalg.norm(block - expected[name]) / np.linalg.norm(expected[name]), rel=1e-8)
        assert entry["fresh_trace"] == pytest.approx(np.trace(expected[name]), rel=1e-9)
        assert entry["block_trace"] == pytest.approx(np.trace(block), rel=1e-9)
        eigenvalues = np.linalg.eigvalsh(exact)  # numpy.linalg.eigvalsh
        assert entry["exact_eig_max"] == pytest.approx(eigenvalues[-1], rel=1e-8)
        assert entry["exact_below_damping"] == pytest.approx(np.mean(eigenvalues < 1e-2))
    assert opt.blocks["0"].state["factor_in"].shape == (5, 5)  # the optimizer's own blocks untouched


def test_fresh_ekfac_block_has_the_projected_scales_of_the_probe_batch():
    # EKFAC's scales are the diagonal of Q^T F Q in the Kronecker eigenbasis Q (George et al. 2018)
    x, y, model, loss_fn, opt = refreshed_tanh_classifier(12, 30, 3, 4, 2, structure="ekfac")
    result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    for name, entry in result["layers"].items():
        # the optimizer refreshed on this very batch with the exact expectation: the fresh block is its block
        assert entry["statistics_gap"] < 1e-6
        assert entry["fresh_error"] == pytest.approx(entry["block_error"], rel=1e-6)


def scaled_input_run(fisher="exact", scale=10.0, **options):
    """One bias-free linear layer, squared error: statistics from inputs ``scale`` times the probe's."""
    torch.manual_seed(13)
    x, y = torch.randn(50, 4, dtype=torch.float64), torch.randn(50, 3, dtype=torch.float64)
    model = nn.Linear(4, 3, bias=False).double()
    loss_fn = nn.MSELoss()
    opt = exact_step_optimizer(model, loss_fn, fisher=fisher, **options)
    refresh(opt, model, loss_fn, scale * x, y)
    return opt, model, loss_fn, x, y


def test_statistics_of_other_inputs_are_warned_as_lagging_statistics():
    # For a linear layer with squared error K-FAC is exact, F = A (x) 2c(N) I, and A = E[x x^T] grows
    # with the square of the input scale: statistics from inputs 10 x the probe's are exactly 100 F,
    # a relative error of 99 (closed form), while the structure built fresh is exact.
    opt, model, loss_fn, x, y = scaled_input_run(stats_memory=0.9)
    with pytest.warns(UserWarning, match="lag a fast-changing Fisher") as caught:
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    entry = result["layers"]["Linear"]
    assert entry["block_error"] == pytest.approx(99.0, rel=1e-6)
    assert entry["statistics_gap"] == pytest.approx(99.0, rel=1e-6)
    assert entry["block_trace"] / entry["exact_trace"] == pytest.approx(100.0, rel=1e-6)
    assert entry["fresh_error"] < 1e-6
    messages = [str(w.message) for w in caught if "layer Linear" in str(w.message)]
    assert len(messages) == 1 and "stats_memory=0.9" in messages[0] and "structure itself" not in messages[0]
    assert result["findings"] == messages


def test_fresh_statistics_of_the_probe_batch_give_no_warning():
    opt, model, loss_fn, x, y = scaled_input_run(scale=1.0, stats_memory=0.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    assert result["findings"] == []
    assert result["layers"]["Linear"]["block_error"] < 1e-6  # K-FAC exact here (linear-Gaussian)


def test_one_draw_of_a_confident_model_is_warned_as_an_undershooting_sampled_fisher():
    # A confident softmax classifier: p_max = 1 - O(1e-8). One draw per example rarely leaves the
    # predicted class, so the sampled G is far below its expectation c * sum_n tr(diag(p) - p p^T)
    # = mean_n sum_k p_k (1 - p_k) (closed form of the softmax output Fisher).
    torch.manual_seed(14)
    x = torch.randn(32, 3, dtype=torch.float64)
    model = nn.Linear(3, 4).double()
    with torch.no_grad():
        model.weight.zero_()
        model.bias.copy_(torch.tensor([20.0, 0.0, 0.0, 0.0], dtype=torch.float64))
    y = torch.zeros(32, dtype=torch.long)
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_step_optimizer(model, loss_fn, fisher="sampled", stats_memory=0.0)
    refresh(opt, model, loss_fn, x, y)
    with pytest.warns(UserWarning, match="sampled Fisher undershoots"):
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0)
    entry = result["layers"]["Linear"]
    p = torch.softmax(model.bias.detach(), 0).numpy()
    mean_a_sq = float((with_ones(x.numpy()) ** 2).sum(1).mean())
    assert entry["fresh_trace"] == pytest.approx(mean_a_sq * float((p * (1 - p)).sum()), rel=1e-9)
    assert entry["block_trace"] < 0.1 * entry["fresh_trace"]
    assert entry["block_error"] == pytest.approx(1.0, abs=0.1)  # about the zero matrix's error


def test_a_structure_far_from_the_fisher_is_warned_as_such():
    # warn_error set between the two layers' K-FAC errors, both computed in numpy
    x, y, model, loss_fn, opt = refreshed_tanh_classifier(15, 40, 4, 5, 3)
    expected = tanh_mlp_kfac_by_hand(model, x, c=1 / 40)
    errors = {}
    for name in ("0", "2"):
        exact = exact_layer_fisher(model, model[int(name)], loss_fn, x, y).numpy()
        errors[name] = np.linalg.norm(expected[name] - exact) / np.linalg.norm(exact)
    worse, better = sorted(errors, key=errors.get, reverse=True)
    assert errors[worse] > 1.05 * errors[better]
    threshold = 0.5 * (errors[worse] + errors[better])
    with pytest.warns(UserWarning, match="structure itself is far from the exact Fisher"):
        result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0, warn_error=threshold)
    assert [f for f in result["findings"] if "structure itself" in f] == [
        f for f in result["findings"] if f.startswith(f"layer {worse}:")]
    assert not any("far from the current Fisher" in f for f in result["findings"])  # fresh statistics


def test_exact_layer_fisher_leaves_an_armed_optimizer_alone():
    # In training mode the optimizer's hooks would record the probe's forwards (and, for the sampled
    # Fisher, draw targets inside jacrev); exact_layer_fisher runs the model in eval mode.
    torch.manual_seed(16)
    x, y = torch.randn(16, 3), torch.randint(0, 2, (16,))
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 2))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.1, stats_memory=0.0, stats_interval=1)
    refresh(opt, model, loss_fn, x, y)
    fisher = exact_layer_fisher(model, model[0], loss_fn, x * 7, y)
    assert fisher.shape == (16, 16) and model.training
    refresh(opt, model, loss_fn, x, y)
    x1 = with_ones(x.numpy().astype(np.float64))  # A = E[a a^T] of the training batch alone
    np.testing.assert_allclose(opt.blocks["0"].state["factor_in"].numpy(), x1.T @ x1 / 16, rtol=1e-5, atol=1e-6)


class EveryLayerKind(nn.Module):
    """Embedding, Conv1d, batch norm on batch statistics, LayerNorm and Linear in one small model."""

    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(7, 4)
        self.conv = nn.Conv1d(4, 3, 2)
        self.bn = nn.BatchNorm1d(3, track_running_stats=False)  # the same function in train and eval mode
        self.ln = nn.LayerNorm(6)
        self.fc = nn.Linear(6, 3)

    def forward(self, idx):
        h = torch.tanh(self.bn(self.conv(self.emb(idx).transpose(1, 2))))
        return self.fc(self.ln(h.flatten(1)))


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_fresh_blocks_of_every_layer_kind_match_a_refresh_on_the_probe_batch(structure):
    # Consistency by definition: the optimizer refreshed with fisher='exact', stats_memory=0 on the probe
    # batch at (practically) the probe's weights holds exactly what the fresh block holds.
    torch.manual_seed(17)
    model = EveryLayerKind().double()
    loss_fn = nn.CrossEntropyLoss()
    x, y = torch.randint(0, 7, (20, 3)), torch.randint(0, 3, (20,))
    opt = exact_step_optimizer(model, loss_fn, structure=structure)
    refresh(opt, model, loss_fn, x, y)
    result = probe_fisher_quality(opt, model, loss_fn, x, y, warn_angle_deg=180.0, warn_error=1e9)
    assert sorted(result["layers"]) == ["bn", "conv", "emb", "fc", "ln"]
    for name, entry in result["layers"].items():
        assert entry["statistics_gap"] < 1e-6, name  # float64 round-off and a 1e-12 step
        assert entry["fresh_error"] == pytest.approx(entry["block_error"], rel=1e-5, abs=1e-9)
