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


def test_the_optimizer_works_on_the_steps_the_schedule_names():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(5, 7), nn.Tanh(), nn.Linear(7, 3)).double()
    intervals = dict(stats_interval=3, inverse_interval=4, damping_interval=5)
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
    assert refreshed == [t for t in range(16) if schedule.statistics_due(t, 3)] == [0, 3, 6, 9, 12, 15]
    assert inverted == [t for t in range(16) if schedule.inversion_due(t, 4)] == [0, 4, 8, 12]
    assert measured == [t for t in range(16) if schedule.damping_due(t, 5)] == [4, 9, 14]


@pytest.mark.parametrize("name", ["statistics_due", "inversion_due", "solve_due", "damping_due", "resync_due"])
def test_every_question_has_the_interval_as_its_second_argument(name):
    due = getattr(schedule, name)
    assert [t for t in range(6) if due(t, 1)] == list(range(6))  # an interval of 1: every step
