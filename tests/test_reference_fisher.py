"""Closed-form Fisher information, measured through ngopt's own Fisher estimator.

Source of every closed form: Casella & Berger, *Statistical Inference*, 2nd ed.
(information of one observation: normal mean 1/sigma^2, multivariate normal mean
Sigma^-1, Bernoulli 1/(p(1-p)), Poisson 1/lambda; the score has mean 0 at the
true parameter and variance equal to minus the expected second derivative).

How a distribution becomes a model the optimizer can measure: the parameter of
the distribution is the weight of an ``nn.Linear`` without bias whose input is a
constant, and the criterion is the distribution's negative log-likelihood:

* ``nn.MSELoss`` term ``(t - f)^2`` is the NLL of ``t ~ N(f, 1/2)`` (up to a
  constant).  For ``y ~ N(mu, sigma^2)`` take ``t = k y`` with ``k = 1/(sigma sqrt 2)``:
  ``t ~ N(k mu, 1/2)``, so a layer with input ``k`` and weight ``mu`` outputs
  ``f = k mu`` and the loss is ``sum (y - mu)^2 / (2 sigma^2)``, the NLL of the sample;
* ``nn.BCEWithLogitsLoss`` is the Bernoulli NLL with the logit as parameter;
* ``nn.CrossEntropyLoss`` is the categorical NLL with the logits as parameters.

With ``reduction='mean'`` the loss is the NLL per observation, so its Fisher is the
information of one observation; with ``'sum'`` it is ``N`` times that.

Monte Carlo tolerances: an average of ``M`` independent draws of a quantity with
variance ``v`` has standard error ``sqrt(v / M)`` (central limit theorem); every
check allows ``Z_BOUND`` standard errors, a two-sided normal tail of 5.7e-7.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.stats
import torch
from torch import nn

import ngopt

Z_BOUND = 5.0
EXACT_RTOL = 1e-12  # float64 round-off over a few thousand terms


def standard_error(variance_per_draw: float, draws: int) -> float:
    """``sqrt(v / M)``: standard error of the mean of ``M`` draws with variance ``v``."""
    return math.sqrt(variance_per_draw / draws)


def single_refresh(model, loss_fn, inputs, targets, fisher, samples=1, seed=0):
    """Run one recorded forward/backward and ``step()``; return ``(curvature, loss gradient)``.

    The curvature is that of the weights before the step (the refresh is taken
    from the forward pass just run); ``stats_memory=0`` keeps only this batch.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empirical-Fisher advice is not what is tested here
        opt = ngopt.FisherDescent(model, loss_fn, lr=1e-3, momentum=0.0, damping=1e-3, fisher=fisher,
                                  stats_interval=1, inverse_interval=1, stats_memory=0.0, max_step_kl=None,
                                  fisher_samples=samples, seed=seed)
    loss_fn(model(inputs), targets).backward()
    gradient = model.weight.grad.detach().clone()
    opt.step()
    (block,) = opt.blocks.values()
    return block.dense_curvature().detach(), gradient


def constant_input_layer(value, out_features=1):
    """``nn.Linear(1, out, bias=False)`` in float64 whose weight column is ``value``."""
    layer = nn.Linear(1, out_features, bias=False).double()
    with torch.no_grad():
        layer.weight.copy_(torch.as_tensor(value, dtype=torch.float64).reshape(out_features, 1))
    return layer


# ----------------------------------------------------------------------------- normal mean
NORMAL_DRAWS = 4000
NORMAL_MEAN = 3.0


def normal_sample(variance, seed):
    rng = np.random.default_rng(seed)
    y = rng.normal(NORMAL_MEAN, math.sqrt(variance), NORMAL_DRAWS)
    k = 1.0 / math.sqrt(2.0 * variance)  # t = k y ~ N(k mu, 1/2): MSELoss is its NLL
    inputs = torch.full((NORMAL_DRAWS, 1), k, dtype=torch.float64)
    targets = torch.as_tensor(k * y).reshape(-1, 1)
    return y, inputs, targets


@pytest.mark.parametrize("variance, information", [(25.0, 0.04), (1.0, 1.0)])
def test_normal_mean_exact_fisher_is_one_over_variance(variance, information):
    # Casella & Berger: I(mu) = 1/sigma^2 for N(mu, sigma^2) with sigma known (0.04 and 1).
    _, inputs, targets = normal_sample(variance, seed=1)
    model = constant_input_layer(NORMAL_MEAN)
    curvature, _ = single_refresh(model, nn.MSELoss(), inputs, targets, "exact")
    assert curvature.shape == (1, 1)
    assert abs(curvature.item() - information) <= EXACT_RTOL * information
    # Minus the second derivative of the mean NLL (torch.autograd.functional.hessian), constant in mu.
    hessian = torch.autograd.functional.hessian(
        lambda mu: nn.functional.mse_loss(inputs * mu, targets), torch.tensor([NORMAL_MEAN], dtype=torch.float64))
    assert abs(hessian.item() - information) <= EXACT_RTOL * information


@pytest.mark.parametrize("variance", [25.0, 1.0])
@pytest.mark.parametrize("samples", [1, 10])
def test_normal_mean_sampled_fisher_within_monte_carlo_error(variance, samples):
    # Casella & Berger: I(mu) = 1/sigma^2.  The sampled estimate is (1/sigma^2) * mean of
    # N*S chi-square(1) draws (the squared standardized scores of model-drawn targets);
    # Var(chi-square(1)) = 2, so its standard error is (1/sigma^2) sqrt(2 / (N S)).
    _, inputs, targets = normal_sample(variance, seed=2)
    model = constant_input_layer(NORMAL_MEAN)
    curvature, _ = single_refresh(model, nn.MSELoss(), inputs, targets, "sampled", samples=samples, seed=3)
    information = 1.0 / variance
    bound = Z_BOUND * information * standard_error(2.0, NORMAL_DRAWS * samples)
    assert abs(curvature.item() - information) <= bound


@pytest.mark.parametrize("variance", [25.0, 1.0])
def test_normal_mean_score_identities_through_empirical_fisher(variance):
    # Casella & Berger: at the true mu the score (y - mu)/sigma^2 has mean 0 and variance
    # 1/sigma^2 = -E[d^2/dmu^2 log f].  The loss gradient is minus the mean score, and the
    # empirical Fisher is the mean squared score.
    y, inputs, targets = normal_sample(variance, seed=4)
    model = constant_input_layer(NORMAL_MEAN)
    curvature, gradient = single_refresh(model, nn.MSELoss(), inputs, targets, "empirical")
    information = 1.0 / variance
    # sd(score) = 1/sigma, so the mean score has standard error 1/(sigma sqrt N).
    assert abs(gradient.item()) <= Z_BOUND * standard_error(information, NORMAL_DRAWS)
    # squared score = chi-square(1) / sigma^2: variance 2/sigma^4 per draw.
    assert abs(curvature.item() - information) <= Z_BOUND * standard_error(2.0 * information ** 2, NORMAL_DRAWS)
    # The estimator is exactly the mean squared score of the observed sample (numpy).
    scores = (y - NORMAL_MEAN) / variance
    assert curvature.item() == pytest.approx(np.mean(scores ** 2), rel=1e-12)
    # Sample variance of the score: (N-1) s^2 / sigma_s^2 ~ chi-square(N-1), so sd(s^2) = sigma_s^2 sqrt(2/(N-1)).
    assert abs(np.var(scores, ddof=1) - information) <= Z_BOUND * information * math.sqrt(2.0 / (NORMAL_DRAWS - 1))


# ----------------------------------------------------------------------------- multivariate normal mean
MVN_COVARIANCE = np.array([[4.0, 1.0, 0.5], [1.0, 2.0, 0.3], [0.5, 0.3, 1.0]])
MVN_MEAN = np.array([1.0, -2.0, 0.5])
MVN_DRAWS = 2000


def mvn_rows(seed):
    """Observations ``y ~ N(mu, Sigma)`` as ``d`` whitened scalar rows each.

    With ``Sigma = L L^T`` and ``M = L^-1 / sqrt 2``, ``z = M y ~ N(M mu, I/2)``: the
    ``d`` entries ``z_j = m_j^T y`` are independent, each the MSE term of a layer with
    input ``m_j`` and weight ``mu^T``, and ``sum_j (z_j - m_j^T mu)^2 = (y-mu)^T Sigma^-1 (y-mu) / 2``,
    the NLL of ``y``.
    """
    rng = np.random.default_rng(seed)
    y = rng.multivariate_normal(MVN_MEAN, MVN_COVARIANCE, MVN_DRAWS)
    whitening = np.linalg.inv(np.linalg.cholesky(MVN_COVARIANCE)) / math.sqrt(2.0)
    inputs = torch.as_tensor(np.tile(whitening, (MVN_DRAWS, 1)))            # row (n, j) is m_j
    targets = torch.as_tensor((y @ whitening.T).reshape(-1, 1))            # row (n, j) is m_j^T y_n
    model = nn.Linear(3, 1, bias=False).double()
    with torch.no_grad():
        model.weight.copy_(torch.as_tensor(MVN_MEAN).reshape(1, 3))
    return y, inputs, targets, model


def test_multivariate_normal_mean_exact_fisher_is_inverse_covariance():
    # Casella & Berger: I(mu) = Sigma^-1 for N(mu, Sigma), Sigma known.  reduction='sum' is the NLL
    # of all N observations, whose information is N Sigma^-1.
    _, inputs, targets, model = mvn_rows(seed=5)
    curvature, _ = single_refresh(model, nn.MSELoss(reduction="sum"), inputs, targets, "exact")
    expected = np.linalg.inv(MVN_COVARIANCE)  # numpy.linalg.inv
    np.testing.assert_allclose(curvature.numpy() / MVN_DRAWS, expected, rtol=EXACT_RTOL, atol=EXACT_RTOL)


@pytest.mark.parametrize("fisher, samples", [("sampled", 1), ("sampled", 8), ("empirical", 1)])
def test_multivariate_normal_mean_monte_carlo_fisher(fisher, samples):
    # Casella & Berger: I(mu) = Sigma^-1.  In this construction the input factor is exact
    # (M^T M / d = Sigma^-1 / (2d)) and the only random part is the scalar output factor,
    # 2 x the mean of N*d*S chi-square(1) draws (whitened residuals, independent across j),
    # so the estimate is q Sigma^-1 with sd(q) = sqrt(2 / (N d S)).
    y, inputs, targets, model = mvn_rows(seed=6)
    curvature, gradient = single_refresh(model, nn.MSELoss(reduction="sum"), inputs, targets, fisher,
                                         samples=samples, seed=7)
    expected = np.linalg.inv(MVN_COVARIANCE)
    ratio = curvature.numpy() / MVN_DRAWS / expected
    assert np.ptp(ratio) <= 1e-10  # one common factor q
    assert abs(ratio.mean() - 1.0) <= Z_BOUND * standard_error(2.0, MVN_DRAWS * 3 * samples)
    if fisher == "empirical":
        # Score identities with numpy: the score Sigma^-1 (y - mu) has mean 0 and covariance Sigma^-1.
        scores = np.linalg.solve(MVN_COVARIANCE, (y - MVN_MEAN).T).T
        # The loss gradient is minus the summed score.
        np.testing.assert_allclose(-gradient.numpy().ravel(), scores.sum(0), rtol=1e-9, atol=1e-9)
        mean_bound = Z_BOUND * np.sqrt(np.diag(expected) / MVN_DRAWS)
        assert np.all(np.abs(scores.mean(0)) <= mean_bound)
        # Gaussian sample covariance entry (i, j): variance (S_ii S_jj + S_ij^2) / N (Anderson,
        # An Introduction to Multivariate Statistical Analysis, from memory; Wishart moments).
        cov_bound = Z_BOUND * np.sqrt((np.outer(np.diag(expected), np.diag(expected)) + expected ** 2) / MVN_DRAWS)
        assert np.all(np.abs(np.cov(scores.T) - expected) <= cov_bound)


# ----------------------------------------------------------------------------- Bernoulli
BERNOULLI_DRAWS = 4000


def bernoulli_sample(p, seed):
    rng = np.random.default_rng(seed)
    y = (rng.random(BERNOULLI_DRAWS) < p).astype(np.float64)
    inputs = torch.ones(BERNOULLI_DRAWS, 1, dtype=torch.float64)
    return y, inputs, torch.as_tensor(y).reshape(-1, 1), constant_input_layer(math.log(p / (1 - p)))


def squared_residual_variance(p):
    """Variance of ``(p - y)^2`` for ``y ~ Bernoulli(p)``: ``p(1-p)(1-2p)^2``.

    ``(p-y)^2`` is ``p^2`` w.p. ``1-p`` and ``(1-p)^2`` w.p. ``p``:
    ``E[X^2] - E[X]^2 = p(1-p)(p^3 + (1-p)^3) - p^2 (1-p)^2 = p(1-p)(1 - 4p(1-p))``.
    """
    return p * (1 - p) * (1 - 2 * p) ** 2


@pytest.mark.parametrize("p", [0.3, 0.05])
def test_bernoulli_exact_fisher_and_reparametrisation(p):
    # The layer's weight is the logit eta; the Fisher of the logit is p(1-p).  With
    # p = sigmoid(eta), dp/deta = p(1-p), and the information transforms as
    # I(p) = I(eta) / (dp/deta)^2 = 1/(p(1-p)) (Casella & Berger: Bernoulli I(p) = 1/(p(1-p))).
    _, inputs, targets, model = bernoulli_sample(p, seed=8)
    curvature, _ = single_refresh(model, nn.BCEWithLogitsLoss(), inputs, targets, "exact")
    assert curvature.item() == pytest.approx(p * (1 - p), rel=EXACT_RTOL)
    information_p = curvature.item() / (p * (1 - p)) ** 2
    assert information_p == pytest.approx(1.0 / (p * (1 - p)), rel=EXACT_RTOL)


@pytest.mark.parametrize("p", [0.3, 0.05])
@pytest.mark.parametrize("fisher, samples", [("sampled", 1), ("sampled", 10), ("empirical", 1)])
def test_bernoulli_monte_carlo_fisher(p, fisher, samples):
    # Fisher of the logit p(1-p) = E[(p - y)^2] (Casella & Berger, with the chain rule above);
    # the estimate averages N*S draws of (p - y)^2, variance p(1-p)(1-2p)^2 each.
    y, inputs, targets, model = bernoulli_sample(p, seed=9)
    curvature, gradient = single_refresh(model, nn.BCEWithLogitsLoss(), inputs, targets, fisher,
                                         samples=samples, seed=10)
    bound = Z_BOUND * standard_error(squared_residual_variance(p), BERNOULLI_DRAWS * samples)
    assert abs(curvature.item() - p * (1 - p)) <= bound
    if fisher == "empirical":
        # Score of the logit y - p: mean 0, variance p(1-p); the loss gradient is minus its mean.
        assert abs(gradient.item()) <= Z_BOUND * standard_error(p * (1 - p), BERNOULLI_DRAWS)
        assert curvature.item() == pytest.approx(np.mean((y - p) ** 2), rel=1e-12)


def test_bernoulli_sampled_fisher_at_one_half_has_no_noise():
    # At p = 1/2, (p - y)^2 = 1/4 for either outcome: variance p(1-p)(1-2p)^2 = 0, so any
    # draws give exactly 1/4 (Casella & Berger: I(eta) = p(1-p)).
    _, inputs, targets, model = bernoulli_sample(0.5, seed=11)
    curvature, _ = single_refresh(model, nn.BCEWithLogitsLoss(), inputs, targets, "sampled", samples=3, seed=12)
    assert curvature.item() == pytest.approx(0.25, rel=EXACT_RTOL)


def test_bernoulli_score_identities_in_p():
    # Casella & Berger: score in p is y/p - (1-y)/(1-p), mean 0; minus the second derivative
    # y/p^2 + (1-y)/(1-p)^2 has mean 1/(p(1-p)), which is also the score variance.  numpy draws.
    p, draws = 0.3, 200_000
    y = (np.random.default_rng(13).random(draws) < p).astype(np.float64)
    score = y / p - (1 - y) / (1 - p)
    curvature = y / p ** 2 + (1 - y) / (1 - p) ** 2
    information = 1.0 / (p * (1 - p))
    assert abs(score.mean()) <= Z_BOUND * standard_error(information, draws)
    # The per-draw variances below are the sample variances of the quantities averaged.
    assert abs(curvature.mean() - information) <= Z_BOUND * standard_error(curvature.var(), draws)
    assert abs(np.mean(score ** 2) - information) <= Z_BOUND * standard_error(np.var(score ** 2), draws)


# ----------------------------------------------------------------------------- categorical
CATEGORICAL_P = np.array([0.1, 0.2, 0.3, 0.4])
CATEGORICAL_DRAWS = 4000


def categorical_entry_variance(p):
    """Per-draw variance of every entry of ``(p - e_y)(p - e_y)^T``, ``y ~ Categorical(p)``, by enumeration."""
    outer = np.stack([np.outer(p - e, p - e) for e in np.eye(len(p))])   # [y, i, j]
    mean = np.einsum("y,yij->ij", p, outer)
    return np.einsum("y,yij->ij", p, outer ** 2) - mean ** 2


def categorical_sample(seed):
    rng = np.random.default_rng(seed)
    y = rng.choice(len(CATEGORICAL_P), size=CATEGORICAL_DRAWS, p=CATEGORICAL_P)
    inputs = torch.ones(CATEGORICAL_DRAWS, 1, dtype=torch.float64)
    return y, inputs, torch.as_tensor(y), constant_input_layer(np.log(CATEGORICAL_P), len(CATEGORICAL_P))


def test_categorical_exact_fisher_of_logits():
    # The Fisher of the logits of a categorical distribution is the covariance of the one-hot
    # sufficient statistic, diag(p) - p p^T (Casella & Berger, exponential families: the
    # information of the natural parameter is the variance of the sufficient statistic).
    _, inputs, targets, model = categorical_sample(seed=14)
    curvature, _ = single_refresh(model, nn.CrossEntropyLoss(), inputs, targets, "exact")
    expected = np.diag(CATEGORICAL_P) - np.outer(CATEGORICAL_P, CATEGORICAL_P)
    np.testing.assert_allclose(curvature.numpy(), expected, rtol=EXACT_RTOL, atol=EXACT_RTOL)


@pytest.mark.parametrize("fisher, samples", [("sampled", 1), ("sampled", 10), ("empirical", 1)])
def test_categorical_monte_carlo_fisher(fisher, samples):
    # Each entry of diag(p) - p p^T (exponential-family identity above) is estimated by the mean of
    # N*S draws of (p - e_y)(p - e_y)^T, whose per-draw variance comes from enumerating y.
    y, inputs, targets, model = categorical_sample(seed=15)
    curvature, gradient = single_refresh(model, nn.CrossEntropyLoss(), inputs, targets, fisher,
                                         samples=samples, seed=16)
    expected = np.diag(CATEGORICAL_P) - np.outer(CATEGORICAL_P, CATEGORICAL_P)
    bound = Z_BOUND * np.sqrt(categorical_entry_variance(CATEGORICAL_P) / (CATEGORICAL_DRAWS * samples))
    assert np.all(np.abs(curvature.numpy() - expected) <= bound)
    if fisher == "empirical":
        # Score of the logits e_y - p: mean 0, covariance diag(p) - p p^T; the gradient is minus its mean.
        score_bound = Z_BOUND * np.sqrt(np.diag(expected) / CATEGORICAL_DRAWS)
        assert np.all(np.abs(gradient.numpy().ravel()) <= score_bound)


# ----------------------------------------------------------------------------- Poisson
def test_poisson_score_identities_with_numpy_draws():
    # The optimizer has no Poisson criterion, so these identities are checked on numpy draws
    # only (nothing of ngopt is involved).  Casella & Berger: score y/lambda - 1 has mean 0;
    # I(lambda) = Var(score) = -E[-y/lambda^2] = 1/lambda.
    lam, draws = 3.5, 200_000
    y = np.random.default_rng(17).poisson(lam, draws).astype(np.float64)
    score = y / lam - 1.0
    minus_second = y / lam ** 2
    information = 1.0 / lam
    assert abs(score.mean()) <= Z_BOUND * standard_error(information, draws)
    # Var(y / lambda^2) = lambda / lambda^4.
    assert abs(minus_second.mean() - information) <= Z_BOUND * standard_error(lam / lam ** 4, draws)
    # Sample variance of the score: Var(s^2) ~ (mu_4 - sigma^4) / N, with the Poisson kurtosis
    # mu_4 / sigma^4 = 3 + 1/lambda (scipy.stats.poisson.stats, moments='k' gives the excess 1/lambda).
    excess = float(scipy.stats.poisson.stats(lam, moments="k"))
    variance_of_variance = information ** 2 * (2.0 + excess)
    assert abs(np.var(score, ddof=1) - information) <= Z_BOUND * standard_error(variance_of_variance, draws)


# ----------------------------------------------------------------------------- several outputs per example
@pytest.mark.parametrize("reduction", ["sum", "mean"])
def test_empirical_fisher_matches_fisher_at_true_parameters_with_several_outputs(reduction):
    # Casella & Berger: at the true parameter E[score score^T] = I, so the empirical Fisher of a
    # well-specified model estimates the Fisher whatever the reduction.  Model: y ~ N(W x, I/2) with
    # O = 3 outputs, for which the MSE terms are the exact NLL; the Fisher of L = c sum (y - Wx)^2 is
    # (mean x x^T) (x) (2 c N I), so the output factor should be 2 c N I (c = 1 for 'sum', 1/(N O) for
    # 'mean').  The empirical output factor is 2 c N times the mean of N products z_i z_j of
    # standardized residuals (z ~ N(0, 1)): per-draw variance 2 on the diagonal, 1 off it.
    rng = np.random.default_rng(18)
    draws, inputs_dim, outputs = 4000, 2, 3
    weight = rng.normal(size=(outputs, inputs_dim))
    x = rng.normal(size=(draws, inputs_dim))
    y = x @ weight.T + rng.normal(size=(draws, outputs)) / math.sqrt(2.0)
    model = nn.Linear(inputs_dim, outputs, bias=False).double()
    with torch.no_grad():
        model.weight.copy_(torch.as_tensor(weight))
    loss_fn = nn.MSELoss(reduction=reduction)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, lr=1e-3, momentum=0.0, damping=1e-3, fisher="empirical",
                                  stats_interval=1, inverse_interval=1, stats_memory=0.0, max_step_kl=None)
    loss_fn(model(torch.as_tensor(x)), torch.as_tensor(y)).backward()
    opt.step()
    c = 1.0 if reduction == "sum" else 1.0 / (draws * outputs)
    scale = 2.0 * c * draws
    per_draw_variance = np.ones((outputs, outputs)) + np.eye(outputs)
    bound = Z_BOUND * scale * np.sqrt(per_draw_variance / draws)
    factor_out = opt.state[model.weight]["factor_out"].numpy()
    assert np.all(np.abs(factor_out - scale * np.eye(outputs)) <= bound)
