"""``ngopt/schedule.py``: the steps on which the optimizer does each piece of periodic work."""
import pytest
import torch
from torch import nn

import ngopt
from ngopt import schedule


def test_interval_starts_and_ends():
    assert [t for t in range(10) if schedule.starts_interval(t, 4)] == [0, 4, 8]
    assert [t for t in range(10) if schedule.starts_interval(t, 4, phase=1)] == [1, 5, 9]
    assert [t for t in range(10) if schedule.ends_interval(t, 4)] == [3, 7]
    assert all(schedule.starts_interval(t, 1) and schedule.ends_interval(t, 1) for t in range(5))


def test_a_ramp_of_two_repeats_each_shorter_gap_twice_then_keeps_the_interval():
    due = [t for t in range(40) if schedule.ramped_interval_due(t, 5, warmup=2)]
    assert due == [0, 1, 2, 4, 6, 9, 12, 16, 20, 25, 30, 35]  # gaps 1 1 2 2 3 3 4 4, then 5
    assert [t for t in range(12) if schedule.ramped_interval_due(t, 4, warmup=1)] == [0, 1, 3, 6, 10]
    assert [t for t in range(12) if schedule.ramped_interval_due(t, 4, warmup=0)] == [0, 4, 8]
    assert [t for t in range(9) if schedule.ramped_interval_due(t, 1, warmup=3)] == list(range(9))
    # a phase shifts the intervals after the ramp (0, 1, 3, 6); without a ramp, nothing is due before it
    assert [t for t in range(16) if schedule.ramped_interval_due(t, 4, warmup=1, phase=2)] == [0, 1, 3, 8, 12]
    assert [t for t in range(12) if schedule.ramped_interval_due(t, 4, warmup=0, phase=3)] == [3, 7, 11]
    # long intervals: the ramp ends on step warmup * n (n - 1) / 2 and the interval holds from there
    ramp_end = 3 * 100 * 99 // 2
    assert schedule.ramped_interval_due(ramp_end, 100, warmup=3)
    assert [t for t in range(ramp_end + 1, ramp_end + 201) if schedule.ramped_interval_due(t, 100, warmup=3)] \
        == [ramp_end + 100, ramp_end + 200]


@pytest.mark.parametrize("warmup", [0, 2])
def test_the_optimizer_works_on_the_steps_the_schedule_names(warmup):
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(5, 7), nn.Tanh(), nn.Linear(7, 3)).double()
    intervals = dict(stats_interval=3, inverse_interval=4, damping_interval=5, interval_warmup=warmup)
    opt = ngopt.FisherDescent(model, nn.MSELoss(), damping_rule="lm", stats_memory=0.5, **intervals)
    generator = torch.Generator().manual_seed(1)
    refreshed, inverted, measured = [], [], []
    for t in range(16):
        x = torch.randn(16, 5, generator=generator, dtype=torch.float64)
        y = torch.randn(16, 3, generator=generator, dtype=torch.float64)
        assert opt.steps_taken == t
        if opt.statistics_due():
            refreshed.append(t)
        opt.zero_grad()
        nn.MSELoss()(model(x), y).backward()
        opt.step()
        snapshot = opt.diagnostics()
        if snapshot["layers"]["0"]["inversion_step"] == t:
            inverted.append(t)
        if snapshot["update"]["actual_change"] is not None:
            measured.append(t)
    assert refreshed == [t for t in range(16) if schedule.statistics_due(t, 3, warmup)] \
        == ([0, 3, 6, 9, 12, 15] if warmup == 0 else [0, 1, 2, 4, 6, 9, 12, 15])
    assert inverted == [t for t in range(16) if schedule.inversion_due(t, 4, warmup=warmup)] \
        == ([0, 4, 8, 12] if warmup == 0 else [0, 1, 2, 4, 6, 9, 12])
    assert measured == [t for t in range(16) if schedule.damping_due(t, 5)] == [4, 9, 14]  # no ramp


@pytest.mark.parametrize("name", ["statistics_due", "inversion_due", "rule_evaluation_due", "damping_due", "resync_due"])
def test_every_question_has_the_interval_as_its_second_argument(name):
    due = getattr(schedule, name)
    assert [t for t in range(6) if due(t, 1)] == list(range(6))  # an interval of 1: every step
