"""A step leaves no reference cycle that holds tensors.

Tensors in a reference cycle are freed only when Python's cyclic garbage collector runs, which can be
many steps later: on a language model each such cycle held a copy of the logits (131 MB at a vocabulary
of 128,256 and 256 tokens) and the process's peak memory grew by gigabytes between collections.  The
check: with automatic collection off, run steps of every kind (refreshes, inversions, the damping rule's
replay of the batch, the quadratic rule's solves), then collect with ``gc.DEBUG_SAVEALL`` and look for
tensors among what only a cycle held (common practice for finding leaks in Python).
"""
import gc

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import ngopt


class LossInside(nn.Module):
    """A classifier that computes its own loss, as the model libraries do with ``labels=``."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Linear(6, 16), nn.Tanh(), nn.Linear(16, 5))

    def forward(self, x, labels):
        logits = self.net(x)
        return F.cross_entropy(logits.reshape(-1, 5), labels.reshape(-1), ignore_index=-100) / 2.0


def _tensors_only_cycles_held(run_steps) -> list:
    gc.collect()
    enabled = gc.isenabled()
    gc.disable()
    try:
        run_steps()
        gc.set_debug(gc.DEBUG_SAVEALL)
        gc.collect()
        found = [o for o in gc.garbage if isinstance(o, torch.Tensor)]
    finally:
        gc.set_debug(0)
        gc.garbage.clear()
        if enabled:
            gc.enable()
    return found


@pytest.mark.parametrize("options", [{}, {"step_rule": "quadratic"}, {"structure": "ekfac"},
                                     {"rule_interval": 2}])
def test_steps_leave_no_tensor_in_a_reference_cycle(options):
    torch.manual_seed(0)
    model = LossInside()
    x, labels = torch.randn(4, 8, 6), torch.randint(0, 5, (4, 8))
    labels[0, :3] = -100
    opt = ngopt.FisherDescent(model, stats_interval=2, inverse_interval=3, damping_interval=2, **options)

    def run_steps():
        for _ in range(7):
            opt.zero_grad()
            model(x, labels).backward()
            opt.step()

    run_steps()  # the first forward assigns the blocks; afterwards the steady state
    assert _tensors_only_cycles_held(run_steps) == []


def test_a_functional_loss_in_the_loop_leaves_no_tensor_in_a_reference_cycle():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Embedding(11, 8), nn.Linear(8, 11))
    tokens = torch.randint(0, 11, (3, 9))
    opt = ngopt.FisherDescent(model, stats_interval=1, damping_interval=1)

    def run_steps():
        for _ in range(4):
            opt.zero_grad()
            logits = model(tokens[:, :-1])
            F.cross_entropy(logits.reshape(-1, 11), tokens[:, 1:].reshape(-1)).backward()
            opt.step()

    run_steps()
    assert _tensors_only_cycles_held(run_steps) == []
