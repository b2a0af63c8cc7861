"""``stats_fraction``: statistics from a random subset of the examples are exact in expectation.

Reference: the block statistics of the whole batch (checked against F.unfold and torch.func
elsewhere).  Kept uniformly without replacement, each example enters with probability m/N,
so ``(N/m) sum_kept f_n`` and the mean over kept rows are unbiased (Horvitz-Thompson; common
practice).  Bound: over R independent draws the mean of each entry lies within 5 standard
errors ``5 s / sqrt(R)`` (``s`` the entry's standard deviation over the draws) of the full
value; at Gaussian tails (central limit theorem over R = 1500 draws) a false alarm has
probability ~6e-7 per entry, under 1e-3 over the few hundred entries checked.  Entries that
do not vary across draws (A's bias-bias entry is 1) must match to float rounding, 1e-10.
"""
from __future__ import annotations

import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt.blocks.factory import make_block
from use_support import adapter_for
from ngopt.blocks.subsample import ExampleSubsample

DRAWS = 1500
STANDARD_ERRORS = 5.0


def _statistics(structure, layer, input_rows, grads, calls, subsample=None, view=None):
    block = make_block(layer, structure, {})
    block.subsample = subsample
    for _ in range(calls):
        block.add_capture(input_rows, grads, 0.5, 0)
    statistics = block.batch_statistics(1)
    if structure == "ekfac":
        if view is None:
            block.commit(statistics)
            tensors, _ = block.prepare_inverse(block.state, 1e-2, False)
            block.commit(tensors)
            view = block.state
        statistics = dict(statistics, **block.projected_batch_statistics(view, 1))
    return statistics, view


@pytest.mark.parametrize("structure,calls", [("kfac", 1), ("ekfac", 2), ("diag", 2)])
def test_subsampled_statistics_match_the_full_ones_in_expectation(structure, calls):
    generator = torch.Generator().manual_seed(0)
    conv = nn.Conv2d(2, 3, 3, padding=1).double()
    inputs = torch.randn(8, 2, 4, 4, dtype=torch.float64, generator=generator) + 0.5
    layer = adapter_for(conv, "conv", inputs)
    grads = layer.output_rows(torch.randn((1,) + tuple(conv(inputs).shape), dtype=torch.float64,
                                          generator=generator))
    full, view = _statistics(structure, layer, layer.recorded_rows(inputs), grads, calls)
    subsample = ExampleSubsample(0.25, seed=1)  # 2 of 8 examples per draw
    draws = {key: [] for key in full}
    for _ in range(DRAWS):
        statistics, _ = _statistics(structure, layer, layer.recorded_rows(inputs), grads, calls, subsample, view)
        for key, value in statistics.items():
            draws[key].append(value)
    for key, value in full.items():
        stacked = torch.stack(draws[key])
        error = (stacked.mean(0) - value).abs()
        bound = STANDARD_ERRORS * stacked.std(0) / DRAWS ** 0.5 + 1e-10 * value.abs().max()
        assert bool((error <= bound).all()), (key, float((error / bound).max()))
        # The draws do differ: a subsample that kept everything would pass the line above trivially.
        assert float(stacked.std(0).max()) > 1e-3 * float(value.abs().max()), key


def test_a_biased_subsample_fails_the_same_check():
    """The check can fail: keeping the first examples every time misses the full statistics."""
    generator = torch.Generator().manual_seed(0)
    conv = nn.Conv2d(2, 3, 3, padding=1).double()
    inputs = torch.randn(8, 2, 4, 4, dtype=torch.float64, generator=generator) + 0.5
    inputs[:2] *= 3.0  # the examples a biased rule keeps are larger
    layer = adapter_for(conv, "conv", inputs)
    grads = layer.output_rows(torch.randn((1,) + tuple(conv(inputs).shape), dtype=torch.float64,
                                          generator=generator))
    full, _ = _statistics("kfac", layer, layer.recorded_rows(inputs), grads, 1)
    first_two = ExampleSubsample(0.25, seed=1)
    first_two.kept = lambda examples: torch.arange(2)
    biased, _ = _statistics("kfac", layer, layer.recorded_rows(inputs), grads, 1, first_two)
    assert float((biased["factor_in"] - full["factor_in"]).abs().max()) > 0.1 * float(full["factor_in"].abs().max())


def test_stats_fraction_is_checked_and_trains_and_resumes():
    model = nn.Sequential(nn.Conv2d(1, 4, 3), nn.ReLU(), nn.Flatten(), nn.Linear(4 * 6 * 6, 3))
    loss_fn = nn.CrossEntropyLoss()
    for bad in (0.0, 1.5):
        with pytest.raises(ValueError, match="stats_fraction"):
            ngopt.FisherDescent(model, loss_fn, stats_fraction=bad)
    with pytest.raises(TypeError, match="stats_fraction"):
        ngopt.FisherDescent(model, loss_fn, stats_fraction="half")
    torch.manual_seed(0)
    inputs, targets = torch.randn(16, 1, 8, 8), torch.randint(0, 3, (16,))

    def run(opt, steps):
        losses = []
        for _ in range(steps):
            opt.zero_grad()
            loss = loss_fn(model(inputs), targets)
            loss.backward()
            opt.step()
            losses.append(float(loss))
        return losses

    opt = ngopt.FisherDescent(model, loss_fn, stats_fraction=0.5, stats_interval=1, seed=3)
    losses = run(opt, 6)
    assert losses[-1] < losses[0]  # training works on half the examples' statistics
    saved = opt.state_dict()
    kept = _subsample_of(opt).kept(16)
    opt.remove_hooks()
    restored = ngopt.FisherDescent(model, loss_fn, stats_fraction=0.5, stats_interval=1, seed=3)
    restored.load_state_dict(saved)
    model(inputs)  # blocks are built at the first recorded training forward
    assert torch.equal(_subsample_of(restored).kept(16), kept)  # the draws resume where they were


def _subsample_of(opt):
    return next(block.subsample for block in opt.blocks.values() if block.subsample is not None)


def test_by_default_convolutions_use_a_quarter_of_the_examples_and_other_layers_all():
    model = nn.Sequential(nn.Conv2d(1, 2, 3), nn.Tanh(), nn.Flatten(), nn.Linear(2 * 4 * 4, 3))
    loss_fn = nn.CrossEntropyLoss()
    images = torch.randn(4, 1, 6, 6)
    default = ngopt.FisherDescent(model, loss_fn)
    model(images)  # blocks are built at the first recorded training forward
    fractions = {name: None if b.subsample is None else b.subsample.fraction for name, b in default.blocks.items()}
    assert fractions == {"0": 0.25, "3": None}
    default.remove_hooks()
    everything = ngopt.FisherDescent(model, loss_fn, stats_fraction=1.0)
    model(images)
    assert all(block.subsample is None for block in everything.blocks.values())
    everything.remove_hooks()
    half = ngopt.FisherDescent(model, loss_fn, stats_fraction=0.5)
    model(images)
    assert all(block.subsample.fraction == 0.5 for block in half.blocks.values())


def test_a_subsample_of_very_few_examples_warns_once():
    # Three kept examples of twelve: a warning naming the option; 16 of 64: none.
    model = nn.Sequential(nn.Conv2d(1, 2, 3), nn.Flatten(), nn.Linear(2 * 4 * 4, 3))
    loss_fn = nn.CrossEntropyLoss()
    for batch, warns in ((64, False), (12, True)):
        opt = ngopt.FisherDescent(model, loss_fn)  # convolutions: a quarter of the examples by default
        x, y = torch.randn(batch, 1, 6, 6), torch.randint(0, 3, (batch,))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            for _ in range(2):
                opt.zero_grad()
                loss_fn(model(x), y).backward()
                opt.step()
        mine = [w for w in caught if "stats_fraction" in str(w.message)]
        assert len(mine) == (1 if warns else 0), [str(w.message) for w in caught]
        opt.remove_hooks()
