"""Natural-gradient steps on regression problems against numpy, statsmodels and scikit-learn.

All runs: a single ``nn.Linear`` in float64, full batch, ``fisher='exact'``,
``lr=1``, ``momentum=0``, ``weight_decay=0``, ``max_step_kl=None``, ``stats_memory=0``,
``stats_interval=1``, ``inverse_interval=1`` (API.md, behaviour 4).
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
import torch
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from torch import nn

import ngopt


def exact_newton_like(model, loss_fn, damping, structure="kfac"):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tiny damping is asked for on purpose
        return ngopt.FisherDescent(model, loss_fn, lr=1.0, momentum=0.0, weight_decay=0.0, damping=damping,
                                   fisher="exact", structure=structure, stats_interval=1, inverse_interval=1,
                                   stats_memory=0.0, max_step_kl=None, step_rule="fixed", damping_rule="fixed")


def train(model, loss_fn, opt, inputs, targets, steps):
    for _ in range(steps):
        opt.zero_grad()
        loss = loss_fn(model(inputs), targets)
        loss.backward()
        opt.step()
    with torch.no_grad():
        return float(loss_fn(model(inputs), targets))


def zero_linear(inputs, outputs):
    """A float64 ``nn.Linear`` starting from zero weights and bias (every p = 1/2 or 1/K)."""
    model = nn.Linear(inputs, outputs).double()
    with torch.no_grad():
        model.weight.zero_()
        model.bias.zero_()
    return model


def coefficients(layer):
    """``[bias, weights...]`` per output row, the column order of ``statsmodels.add_constant``."""
    weight = layer.weight.detach().numpy()
    if layer.bias is None:
        return weight
    return np.hstack([layer.bias.detach().numpy()[:, None], weight])


# ----------------------------------------------------------------------------- least squares
def factored_shifts(factor_in, factor_out, damping):
    """``(pi sqrt(lambda), sqrt(lambda)/pi)``, ``pi^2 = (tr A / dim A) / (tr G / dim G)`` (Martens & Grosse 2015, sec. 6.3)."""
    pi = math.sqrt((np.trace(factor_in) / len(factor_in)) / (np.trace(factor_out) / len(factor_out)))
    return pi * math.sqrt(damping), math.sqrt(damping) / pi


@pytest.mark.parametrize("reduction", ["mean", "sum"])
@pytest.mark.parametrize("outputs", [1, 3])
@pytest.mark.parametrize("bias", [True, False])
def test_one_exact_step_lands_on_least_squares_solution(reduction, outputs, bias):
    # API.md behaviour 4; reference numpy.linalg.lstsq.  L = c sum ||y - W x||^2 is quadratic with
    # Hessian = its Fisher (Gaussian output), so one undamped natural-gradient step with lr=1 is a
    # Newton step onto the minimizer.
    rng = np.random.default_rng(20 + outputs + 2 * bias)
    n, d = 60, 4
    x = rng.normal(size=(n, d)) + rng.normal(size=d)   # an offset makes the bias direction matter
    y = x @ rng.normal(size=(d, outputs)) + 0.7 + 0.3 * rng.normal(size=(n, outputs))
    model = nn.Linear(d, outputs, bias=bias).double()
    start = coefficients(model).copy()
    loss_fn = nn.MSELoss(reduction=reduction)
    damping = 1e-14
    opt = exact_newton_like(model, loss_fn, damping)
    train(model, loss_fn, opt, torch.as_tensor(x), torch.as_tensor(y), steps=1)

    design = np.hstack([np.ones((n, 1)), x]) if bias else x
    solution = np.linalg.lstsq(design, y, rcond=None)[0].T          # numpy.linalg.lstsq
    # How far damping may move the step: the damped curvature (A + dA)(x)(g + dG) I has the eigenvalues
    # (a_i + dA)(g + dG) of the exact g a_i, relative excess r <= dA/a_min + dG/g + dA dG/(a_min g); the
    # step error is (1 - 1/(1+r)) |start - solution| <= r |start - solution|.  Factors as the block
    # docstring defines them: A = mean x x^T, G = (2 c N) I for c = 1/(N outputs) or 1.
    factor_in = design.T @ design / n
    c = 1.0 / (n * outputs) if reduction == "mean" else 1.0
    g = 2.0 * c * n
    shift_in, shift_out = factored_shifts(factor_in, g * np.eye(outputs), damping)
    a_min = np.linalg.eigvalsh(factor_in)[0]
    excess = shift_in / a_min + shift_out / g + shift_in * shift_out / (a_min * g)
    error = np.linalg.norm(coefficients(model) - solution)
    # Measured relative errors |W - W_lstsq| / |W_lstsq| over the 8 cases: 1.4e-8 .. 1.3e-6, each 1.1x to
    # 3.4x below its bound, so the bound is tight and any scale error in the step would break it.
    assert error <= excess * np.linalg.norm(start - solution) + 1e-12 * np.linalg.norm(solution)
    assert excess < 1e-5  # the bound itself is tight enough to mean something


# ----------------------------------------------------------------------------- logistic regression
def logistic_data(seed, n=400):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    logits = x @ np.array([1.0, -2.0, 0.5]) + 0.3
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-logits))).astype(np.float64)
    return x, y


def statsmodels_logit(x, y):
    return sm.Logit(y, sm.add_constant(x)).fit(method="newton", tol=1e-12, maxiter=100, disp=False)


def test_logistic_regression_converges_to_statsmodels_maximum_likelihood():
    # statsmodels.api.Logit (Newton, tol 1e-12): maximum-likelihood coefficients.
    x, y = logistic_data(seed=30)
    fit = statsmodels_logit(x, y)
    model = zero_linear(3, 1)
    loss_fn = nn.BCEWithLogitsLoss()
    opt = exact_newton_like(model, loss_fn, damping=1e-10)
    inputs, targets = torch.as_tensor(x), torch.as_tensor(y)[:, None]

    def error():
        return np.linalg.norm(coefficients(model).ravel() - fit.params) / np.linalg.norm(fit.params)

    train(model, loss_fn, opt, inputs, targets, steps=45)
    error_45 = error()
    train(model, loss_fn, opt, inputs, targets, steps=5)
    error_50 = error()
    # Measured 4.9e-10 after 45 steps, 4.9e-11 after 50.
    assert error_50 <= 1e-9

    # The rate is the one theory predicts.  Near the fit the iteration is
    # theta <- theta - P^-1 grad L with the Kronecker curvature P = mean(x x^T) * mean(p(1-p)) (one
    # output, so G is a scalar), whose Jacobian at the fixed point is I - P^-1 H, H = statsmodels'
    # -Logit.hessian / n.  Its spectral radius rho (0.63 here, second eigenvalue 0.06) sets the
    # error ratio over 5 steps to rho^5; measured ratio 0.098845 vs rho^5 = 0.098830.
    design = sm.add_constant(x)
    weights = fit.predict() * (1.0 - fit.predict())
    hessian = -fit.model.hessian(fit.params) / len(y)
    kronecker = design.T @ design / len(y) * weights.mean()
    rho = np.max(np.abs(np.linalg.eigvals(np.eye(4) - np.linalg.solve(kronecker, hessian))))
    assert error_50 / error_45 == pytest.approx(rho ** 5, rel=0.01)


# Each step is another single example at the same weights (reset before it), not training: their losses
# differ by example, which the rising-loss warning would read as a trend.
@pytest.mark.filterwarnings("ignore:the training loss has risen")
def test_logistic_fisher_block_matches_statsmodels_information():
    # statsmodels Logit: information = inverse of cov_params() = -hessian = sum_i p_i(1-p_i) x_i x_i^T
    # at the fit; the exact Fisher of the mean loss is that divided by n.
    x, y = logistic_data(seed=31, n=150)
    fit = statsmodels_logit(x, y)
    n = len(y)
    information = np.linalg.inv(fit.cov_params())
    # ngopt orders the block as vec of [weights..., bias]: move statsmodels' constant to the end.
    order = [1, 2, 3, 0]
    information = information[np.ix_(order, order)]
    inputs, targets = torch.as_tensor(x), torch.as_tensor(y)[:, None]

    def block_at_fit(structure, rows):
        model = nn.Linear(3, 1).double()
        with torch.no_grad():
            model.weight.copy_(torch.as_tensor(fit.params[1:])[None])
            model.bias.fill_(fit.params[0])
        loss_fn = nn.BCEWithLogitsLoss(reduction="sum")
        opt = exact_newton_like(model, loss_fn, damping=1e-3, structure=structure)
        total = 0.0
        for chunk in rows:
            with torch.no_grad():  # the step moves the weights; measure every chunk at the fit
                model.weight.copy_(torch.as_tensor(fit.params[1:])[None])
                model.bias.fill_(fit.params[0])
            opt.zero_grad()
            loss_fn(model(inputs[chunk]), targets[chunk]).backward()
            opt.step()
            total = total + opt.blocks["Linear"].dense_curvature().numpy()
        return total

    # The diagonal block is the exact diagonal of the Fisher.
    diagonal = block_at_fit("diag", [slice(None)])
    np.testing.assert_allclose(np.diag(diagonal), np.diag(information), rtol=1e-10)
    # One example at a time the Kronecker block is exact (the per-example Fisher p(1-p) x x^T is a
    # Kronecker product), so the blocks of the n examples sum to the information matrix.
    summed = block_at_fit("kfac", [slice(i, i + 1) for i in range(n)])
    np.testing.assert_allclose(summed, information, rtol=1e-10, atol=1e-10)


def test_kronecker_logistic_block_exact_where_weights_are_constant():
    # statsmodels Logit.hessian at beta = 0: every p_i = 1/2, so the information 1/4 sum x x^T is
    # (mean x x^T) (x) (n/4), exactly the Kronecker form; the mean loss divides it by n.
    x, y = logistic_data(seed=32)
    information = -sm.Logit(y, sm.add_constant(x)).hessian(np.zeros(4))
    order = [1, 2, 3, 0]
    information = information[np.ix_(order, order)] / len(y)
    model = zero_linear(3, 1)
    loss_fn = nn.BCEWithLogitsLoss()
    opt = exact_newton_like(model, loss_fn, damping=1e-3)
    train(model, loss_fn, opt, torch.as_tensor(x), torch.as_tensor(y)[:, None], steps=1)
    np.testing.assert_allclose(opt.blocks["Linear"].dense_curvature().numpy(), information, rtol=1e-12, atol=1e-14)


# ----------------------------------------------------------------------------- softmax regression
def test_softmax_regression_reaches_scikit_learn_unpenalized_loss():
    # sklearn.linear_model.LogisticRegression, unpenalized multinomial fit (C=np.inf: scikit-learn 1.8
    # deprecated penalty=None in its favour; same objective), log-loss by sklearn.metrics.log_loss.
    rng = np.random.default_rng(40)
    n, d, classes = 300, 3, 3
    x = rng.normal(size=(n, d))
    logits = x @ rng.normal(size=(d, classes))
    prob = np.exp(logits - logits.max(1, keepdims=True))
    prob /= prob.sum(1, keepdims=True)
    y = np.array([rng.choice(classes, p=row) for row in prob])   # labels drawn: not separable
    reference = LogisticRegression(C=np.inf, tol=1e-12, max_iter=10_000).fit(x, y)
    reference_loss = log_loss(y, reference.predict_proba(x))

    model = zero_linear(d, classes)
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_newton_like(model, loss_fn, damping=1e-10)
    inputs = torch.as_tensor(x)
    loss = train(model, loss_fn, opt, inputs, torch.as_tensor(y), steps=60)
    # Measured after 60 steps: loss - reference_loss = 9.0e-15, largest probability gap 6.9e-8
    # (after 40 steps: 1.4e-10 and 9.2e-6; linear convergence, about 11x per 5 steps).
    assert abs(loss - reference_loss) <= 1e-12
    # The fitted probabilities are unique even though softmax logits are not.
    with torch.no_grad():
        fitted = torch.softmax(model(inputs), dim=1).numpy()
    np.testing.assert_allclose(fitted, reference.predict_proba(x), atol=1e-6)
