"""The warning for a training loss that climbs above where it started (ngopt/loss_trend.py)."""
from __future__ import annotations

import math
import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt.loss_trend import MARGIN, OPENING, WINDOW, LossTrend


def trend_of(values):
    trend = LossTrend()
    for value in values:
        trend.add(value)
    return trend


def test_rising_means_the_latest_window_above_the_opening_by_the_margin():
    start = [1.0] * OPENING
    assert trend_of(start + [1.0 + 2 * MARGIN] * WINDOW).rising()
    assert not trend_of(start + [1.0 + MARGIN / 2] * WINDOW).rising()
    assert not trend_of(start + [1.0 + 2 * MARGIN] * (WINDOW - 1)).rising()  # too few values yet
    assert not trend_of(start + [0.5] * WINDOW).rising()
    # only the latest window counts: an early bump that has come down again does not
    assert not trend_of(start + [3.0] * WINDOW + [0.9] * WINDOW).rising()
    # a negative loss (a Gaussian log-likelihood, say) rises by the margin of its size
    assert trend_of([-2.0] * OPENING + [-2.0 + 3 * MARGIN] * WINDOW).rising()
    assert not trend_of([-2.0] * OPENING + [-2.0 + MARGIN] * WINDOW).rising()


def test_a_rise_within_the_scatter_of_the_values_is_no_trend():
    # Means 1.0 and 1.5 (a rise of 50%), but values of single examples that scatter by +-2 around them:
    # the difference of the means is within the standard error of that difference, so no warning.
    opening = [1.0 + 2.0 * (-1) ** i for i in range(OPENING)]
    recent = [1.5 + 2.0 * (-1) ** i for i in range(WINDOW)]
    shift = sum(opening) / OPENING - 1.0  # an odd count leaves the opening's mean off 1.0 by this much
    assert not trend_of([v - shift for v in opening] + recent).rising()
    # the same rise with a tenth of the scatter is one
    assert trend_of([1.0 + 0.2 * (-1) ** i for i in range(OPENING)] + [1.5 + 0.2 * (-1) ** i for i in range(WINDOW)]).rising()


def test_missing_and_non_finite_values_are_left_out():
    trend = trend_of([1.0] * OPENING + [None, math.nan, math.inf] + [1.5] * (WINDOW - 1))
    assert not trend.rising()
    trend.add(1.5)
    assert trend.rising() and "1.5 over the last" in trend.message() and "against 1 over the first" in trend.message()


def train(labels_of, steps, **options):
    """A small classifier on fresh batches of 8, the loss computed in the loop (no closure)."""
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(12, 32), nn.Tanh(), nn.Linear(32, 3))
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), seed=0, **options)
    generator = torch.Generator().manual_seed(1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(steps):
            inputs = torch.randn(8, 12, generator=generator)
            opt.zero_grad()
            nn.functional.cross_entropy(model(inputs), labels_of(inputs, generator)).backward()
            opt.step()
    return [str(w.message) for w in caught if "risen above where it started" in str(w.message)]


def test_fitting_every_batch_of_random_labels_warns_once():
    # Labels with no relation to the inputs and a KL bound a hundred times the default: every step fits
    # its own batch, so the loss of the next one rises above chance (log 3) and stays there.
    random_labels = lambda inputs, generator: torch.randint(0, 3, (len(inputs),), generator=generator)
    assert len(train(random_labels, 60, max_step_kl=1.0)) == 1


def test_a_learnable_problem_at_the_defaults_does_not_warn():
    learnable = lambda inputs, generator: (inputs[:, 0] > 0).long() + (inputs[:, 1] > 0).long()
    assert train(learnable, 60) == []


def test_a_closure_loss_feeds_the_trend():
    torch.manual_seed(0)
    model = nn.Linear(4, 1)
    opt = ngopt.FisherDescent(model, nn.MSELoss(), seed=0)
    inputs, targets = torch.randn(16, 4), torch.randn(16, 1)
    scale = iter([1.0] * OPENING + [10.0] * WINDOW)

    def closure():  # a loss that grows for reasons of its own: the trend sees the closure's values
        opt.zero_grad()
        loss = next(scale) * nn.functional.mse_loss(model(inputs), targets)
        loss.backward()
        return loss

    with pytest.warns(UserWarning, match="risen above where it started"):
        for _ in range(OPENING + WINDOW):
            opt.step(closure)


def test_the_standard_error_is_numpys_sample_variance_over_the_counts():
    # Welch's standard error of a difference of two means, sqrt(s1^2/n1 + s2^2/n2) with the unbiased
    # sample variances (ddof=1), computed by numpy; the rule warns exactly when the rise exceeds both
    # the margin and that error, checked on random series on both sides of the boundary.
    import numpy as np
    generator = np.random.default_rng(0)
    decided = set()
    for _ in range(300):
        opening = generator.normal(1.0, generator.uniform(0.01, 1.0), OPENING)
        recent = generator.normal(1.0 + generator.uniform(0.0, 1.0), generator.uniform(0.01, 1.0), WINDOW)
        error = math.sqrt(opening.var(ddof=1) / OPENING + recent.var(ddof=1) / WINDOW)
        rise = recent.mean() - opening.mean()
        expected = rise > max(MARGIN * abs(opening.mean()), error)
        if abs(rise - max(MARGIN * abs(opening.mean()), error)) < 1e-9:
            continue  # too close to the boundary for rounding to decide
        assert trend_of(list(opening) + list(recent)).rising() == expected
        decided.add(expected)
    assert decided == {True, False}  # both outcomes were checked


def test_a_climb_after_the_loss_came_near_zero_gets_the_advice_for_fitted_data():
    # A loss that had fitted its data (below 1% of its start) and then jumped: the lr-decay advice, not
    # the small-batch one; a loss that never came down gets the small-batch advice.
    fitted = trend_of([2.3, 2.2, 2.1] + [1e-5] * 5 + [10.0] * WINDOW)
    assert fitted.rising() and fitted.after_fitting()
    assert "CosineAnnealingLR" in fitted.message() and "1e-05" in fitted.message()
    noisy = trend_of([1.1, 1.1, 1.1] + [1.5] * WINDOW)
    assert noisy.rising() and not noisy.after_fitting()
    assert "max_step_kl" in noisy.message() and "CosineAnnealingLR" not in noisy.message()
