"""The sampled Fisher's categorical draws (ngopt/sampling.py) against the distribution they claim."""
from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy import stats

from ngopt import sampling
from ngopt.sampling import categorical_draws


def test_draws_follow_each_rows_probabilities_by_a_chi_square_test():
    # Pearson's chi-square goodness of fit (scipy.stats.chisquare), per row, 20,000 draws; rows of 3, 7 and
    # 50 classes with probabilities from a Dirichlet.  With a fixed seed the outcome is fixed; the bound
    # p > 1e-3 is far from what a correct sampler's p-values (uniform on [0, 1]) fall below by chance.
    generator = np.random.default_rng(0)
    for classes in (3, 7, 50):
        prob = torch.tensor(generator.dirichlet(np.ones(classes), size=4))
        draws = categorical_draws(prob.float(), 20_000, torch.Generator().manual_seed(classes))
        for row in range(4):
            counts = np.bincount(draws[row].numpy(), minlength=classes)
            expected = prob[row].numpy() * 20_000
            assert stats.chisquare(counts, expected * counts.sum() / expected.sum()).pvalue > 1e-3


def test_a_class_of_probability_zero_is_never_drawn_and_a_certain_one_always():
    prob = torch.tensor([[0.0, 0.5, 0.0, 0.5], [0.0, 0.0, 1.0, 0.0], [1.0, 0.0, 0.0, 0.0]])
    draws = categorical_draws(prob, 5000, torch.Generator().manual_seed(0))
    assert set(draws[0].tolist()) == {1, 3}
    assert (draws[1] == 2).all() and (draws[2] == 0).all()


def test_long_rows_are_drawn_in_pieces_with_the_same_result(monkeypatch):
    # Rows are independent: drawing them a few at a time must give the very same draws (the uniforms
    # are taken for all rows first, so the pieces do not change which uniform a row gets).
    prob = torch.softmax(torch.randn(37, 11, generator=torch.Generator().manual_seed(1)), dim=1)
    whole = categorical_draws(prob, 3, torch.Generator().manual_seed(2))
    monkeypatch.setattr(sampling, "CHUNK_ENTRIES", 11 * 4)  # four rows at a time
    assert torch.equal(categorical_draws(prob, 3, torch.Generator().manual_seed(2)), whole)


def test_the_tail_of_a_long_row_keeps_its_probability():
    # 30,000 classes, one at probability 0.5 and the rest sharing the other half: float64 cumulative sums
    # keep each tail class's width, so the tail as a whole gets half the draws (binomial test, scipy).
    classes = 30_000
    prob = torch.full((1, classes), 0.5 / (classes - 1))
    prob[0, 0] = 0.5
    draws = categorical_draws(prob, 20_000, torch.Generator().manual_seed(3))
    tail = int((draws > 0).sum())
    assert stats.binomtest(tail, 20_000, 0.5).pvalue > 1e-3


@pytest.mark.parametrize("samples", [1, 4])
def test_shape_dtype_and_the_private_generator(samples):
    prob = torch.softmax(torch.randn(6, 5), dim=1)
    state = torch.get_rng_state()
    first = categorical_draws(prob, samples, torch.Generator().manual_seed(9))
    assert torch.equal(torch.get_rng_state(), state)  # the global generator is not consumed
    assert first.shape == (6, samples) and first.dtype == torch.long
    assert torch.equal(first, categorical_draws(prob, samples, torch.Generator().manual_seed(9)))


def test_a_uniform_that_rounds_up_to_the_total_still_draws_a_class_of_positive_probability(monkeypatch):
    # The largest uniform below 1 times a row's total can round to the total itself; the search must still
    # end inside the row, on a class with probability (here the last class has none).
    largest = 1.0 - 2.0 ** -53
    monkeypatch.setattr(sampling.torch, "rand", lambda shape, **kwargs: torch.full(shape, largest, dtype=torch.float64))
    prob = torch.tensor([[0.3, 0.7, 0.0], [0.1, 0.2, 0.7]], dtype=torch.float64)
    assert categorical_draws(prob, 2, None).tolist() == [[1, 1], [2, 2]]
