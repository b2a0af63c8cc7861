"""``inverse_schedule``: every block on one step, or each block on its own step of the interval.

References: the longest-first rule's bound, max load <= (4/3 - 1/(3m)) x optimum (Graham 1969,
SIAM J. Appl. Math. 17), against the optimum found by brute force; the staggered trajectory
against the one its documentation states (each block's inverse is the damped inverse of the
statistics it had on its own inversion step, the last step t with (t - phase) % interval == 0).
"""
from __future__ import annotations

import itertools
import random
import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt.inversion_schedule import longest_first

DTYPE = torch.float64


def make(schedule, interval, seed=0, **kwargs):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 8), nn.Tanh(), nn.Linear(8, 8), nn.Tanh(),
                          nn.Linear(8, 3)).to(DTYPE)
    options = dict(step_rule="fixed", damping_rule="fixed", stats_interval=1, inverse_interval=interval,
                   inverse_schedule=schedule, seed=1, interval_warmup=0)  # plain intervals: the phases show
    options.update(kwargs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), **options)
    opt.assign_curvature(torch.zeros(1, 6, dtype=DTYPE))  # blocks now, before the first training step
    return model, opt


def batches(steps, seed=3):
    generator = torch.Generator().manual_seed(seed)
    return [(torch.randn(32, 6, generator=generator, dtype=DTYPE), torch.randint(0, 3, (32,), generator=generator))
            for _ in range(steps)]


def train_step(model, opt, x, y):
    opt.zero_grad()
    opt.loss_fn(model(x), y).backward()
    opt.step()


def test_longest_first_is_within_grahams_bound_of_the_best_assignment():
    rng = random.Random(0)
    for _ in range(60):
        costs = [float(rng.randint(1, 30)) for _ in range(rng.randint(1, 7))]
        bins = rng.randint(1, 4)
        loads = [0.0] * bins
        for cost, b in zip(costs, longest_first(costs, bins)):
            loads[b] += cost
        best = min(max(sum(c for c, b in zip(costs, choice) if b == k) for k in range(bins))
                   for choice in itertools.product(range(bins), repeat=len(costs)))
        assert max(loads) <= (4 / 3 - 1 / (3 * bins)) * best + 1e-12


def test_one_step_interval_gives_the_same_trajectory_under_both_schedules():
    data = batches(6)
    runs = []
    for schedule in ("together", "staggered"):
        model, opt = make(schedule, interval=1)
        for x, y in data:
            train_step(model, opt, x, y)
        runs.append([p.detach().clone() for p in model.parameters()])
    for a, b in zip(*runs):
        torch.testing.assert_close(a, b, rtol=1e-13, atol=1e-15)


def test_staggered_blocks_invert_on_their_own_phase_from_that_steps_statistics():
    interval = 4
    model, opt = make("staggered", interval)
    blocks = list(opt.blocks.values())
    phases = opt._inversions.phases(interval, blocks)
    # The three 8x8 hidden layers cost the same and get three different phases; the 3-class read-out
    # (the cheapest) takes the fourth.
    assert sorted(phases.values()) == [0, 1, 2, 3]
    committed = {}  # (block, step) -> statistics after that step
    inverted_per_step = []
    for t, (x, y) in enumerate(batches(11)):
        train_step(model, opt, x, y)
        inverted_per_step.append(sum(block.info["inversion_step"] == t for block in blocks))
        for block in blocks:
            committed[block, t] = {k: block.state[k].clone() for k in block.statistic_keys}
            expected = max(s for s in range(t + 1) if s == 0 or (s - phases[block]) % interval == 0)
            assert block.info["inversion_step"] == expected
            reference, _ = block.prepare_inverse(committed[block, expected], opt.param_groups[0]["damping"], False)
            for key, value in reference.items():
                torch.testing.assert_close(block.state[key], value, rtol=1e-12, atol=1e-14)
    # Step 0 inverts every block (none has an inverse yet); afterwards one block per step.
    assert inverted_per_step[0] == len(blocks)
    assert inverted_per_step[1:] == [1] * (len(inverted_per_step) - 1)


def test_staggered_blocks_share_the_ramp_then_keep_their_phases():
    interval = 4
    model, opt = make("staggered", interval, interval_warmup=1)  # ramp: steps 0, 1, 3, 6
    blocks = list(opt.blocks.values())
    phases = opt._inversions.phases(interval, blocks)
    for t, (x, y) in enumerate(batches(16)):
        train_step(model, opt, x, y)
        for block in blocks:
            due = [s for s in range(t + 1) if s in (0, 1, 3) or (s >= 6 + phases[block]
                                                                  and (s - 6 - phases[block]) % interval == 0)]
            assert block.info["inversion_step"] == due[-1], (t, phases[block])


def test_together_inverts_every_block_on_the_same_steps():
    model, opt = make("together", interval=3)
    for t, (x, y) in enumerate(batches(7)):
        train_step(model, opt, x, y)
        assert {block.info["inversion_step"] for block in opt.blocks.values()} == {t - t % 3}


def test_inverse_schedule_is_checked():
    with pytest.raises(ValueError, match="inverse_schedule"):
        make("sometimes", interval=2)
    with pytest.raises(TypeError, match="inverse_schedule"):
        make(2, interval=2)
