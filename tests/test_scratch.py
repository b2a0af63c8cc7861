"""Large layers reuse the memory of their per-step tensors (ngopt/scratch.py) without changing any result.

Checked against the same run with the reuse switched off (the threshold raised above every layer):
the same weights to float64 rounding (the same products, written into other memory), and the memory
of the momentum buffers alternating between two allocations instead of a new one every step.
"""
import copy

import torch
from torch import nn

import ngopt
from ngopt import scratch


def _run(model, steps=6):
    torch.manual_seed(1)
    x, y = torch.randn(8, 16, dtype=torch.float64), torch.randint(0, 510, (8,))
    # cost_budget=None: whole Kronecker factors at this small batch (the budget would pick the diagonal).
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), stats_interval=2, inverse_interval=2, seed=3,
                              cost_budget=None)
    head = model[2].weight
    buffers = []  # held here, so that no new allocation can come back at a freed buffer's address
    for _ in range(steps):
        opt.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        opt.step()
        buffers.append(opt.state[head]["momentum_buffer"])
    return opt, [b.data_ptr() for b in buffers]


def _model():
    torch.manual_seed(0)
    # The head's weight has 520 x 510 = 265,200 elements (the tests lower scratch.MIN_ELEMENTS to 2^18); a bias.
    return nn.Sequential(nn.Linear(16, 520), nn.Tanh(), nn.Linear(520, 510)).double()


def test_reused_memory_gives_the_same_weights_and_alternates_between_two_buffers(monkeypatch):
    monkeypatch.setattr(scratch, "MIN_ELEMENTS", 2 ** 18)  # a small model above the threshold
    model = _model()
    assert model[2].weight.numel() >= scratch.MIN_ELEMENTS
    twin = copy.deepcopy(model)
    opt, addresses = _run(model)
    monkeypatch.setattr(scratch, "MIN_ELEMENTS", 10 ** 9)
    _, fresh_addresses = _run(twin)
    assert len(set(fresh_addresses)) == len(fresh_addresses)  # without reuse, every step's buffer is new memory
    for ours, theirs in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(ours, theirs, rtol=1e-12, atol=1e-14)
    # Once the first buffer is replaced, every second step writes into the same memory again.
    assert addresses[2] == addresses[4] and addresses[3] == addresses[5] and addresses[2] != addresses[3]
    block = next(b for b in opt.blocks.values() if b.layer.weight is model[2].weight)
    assert block.writes_into and set(block.scratch) == {"gradient_matrix", "proposal"}
    # Reused memory is no state: a checkpoint holds the optimizer's tensors only.
    saved = opt.state_dict()["state"]
    assert all("gradient_matrix" not in entries and "proposal" not in entries for entries in saved.values())


def test_a_kept_tensor_is_used_only_where_it_fits():
    like = torch.zeros(3, 4)
    assert scratch.fits(torch.empty(3, 4), (3, 4), torch.float32, like.device)
    assert not scratch.fits(torch.empty(4, 3), (3, 4), torch.float32, like.device)
    assert not scratch.fits(torch.empty(3, 4, dtype=torch.float64), (3, 4), torch.float32, like.device)
    assert not scratch.fits(torch.empty(4, 3).T, (3, 4), torch.float32, like.device)  # not contiguous
    assert not scratch.fits(None, (3, 4), torch.float32, like.device)
    kept = {"proposal": torch.empty(2, 2)}
    assert scratch.take(kept, "proposal", like) is None and kept == {}  # a misfit is dropped, not kept
    fitting = torch.empty(3, 4)
    kept = {"proposal": fitting}
    assert scratch.take(kept, "proposal", like) is fitting and kept == {}
