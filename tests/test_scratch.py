"""Large layers reuse the memory of their per-step tensors (ngopt/scratch.py) without changing any result.

Checked against the same run with the reuse switched off (the threshold raised above every layer):
the same weights to float64 rounding (the same products, written into other memory), and the memory
of the momentum buffers alternating between two allocations instead of a new one every step.
"""
import copy

import numpy as np
import torch
from torch import nn

import ngopt
from ngopt import scratch
from ngopt.blocks.embedding import on_used_columns
from ngopt.factors import Whole


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
    assert not scratch.fits(None, (3, 4), torch.float32, like.device)
    kept = {"proposal": torch.empty(2, 2)}
    assert scratch.take(kept, "proposal", like) is None and kept == {}  # a misfit is dropped, not kept
    fitting = torch.empty(3, 4)
    kept = {"proposal": fitting}
    assert scratch.take(kept, "proposal", like) is fitting and kept == {}


def test_kept_memory_in_another_layout_is_not_written_into():
    # A product into memory of another layout would be computed and then copied: the result is made fresh.
    operand, matrix = torch.randn(5, 3, dtype=torch.float64), torch.randn(3, 3, dtype=torch.float64)
    transposed = torch.empty(3, 5, dtype=torch.float64).T
    result = Whole(3).right(operand, matrix, out=transposed)
    assert result.data_ptr() != transposed.data_ptr()
    np.testing.assert_allclose(result.numpy(), operand.numpy() @ matrix.numpy(), rtol=1e-12)
    contiguous = torch.empty(5, 3, dtype=torch.float64)
    assert Whole(3).right(operand, matrix, out=contiguous).data_ptr() == contiguous.data_ptr()
    # An embedding's gradient matrix is the transpose of its weight's gradient: kept memory must match it.
    gradient = torch.zeros(7, 4, dtype=torch.float64)
    gradient[2] = 1.0
    columns = gradient.T
    scale = lambda used_columns, used: 2.0 * used_columns  # noqa: E731
    same_layout = torch.full((7, 4), 5.0, dtype=torch.float64).T
    written = on_used_columns(columns, scale, same_layout)
    assert written.data_ptr() == same_layout.data_ptr()
    np.testing.assert_array_equal(written.numpy(), 2.0 * columns.numpy())  # the stale values were zeroed
    other_layout = torch.full((4, 7), 5.0, dtype=torch.float64)
    fresh = on_used_columns(columns, scale, other_layout)
    assert fresh.data_ptr() != other_layout.data_ptr()
    np.testing.assert_array_equal(fresh.numpy(), 2.0 * columns.numpy())



def test_kept_memory_is_dropped_on_load_and_never_shared_with_the_state(monkeypatch):
    # A state_dict() holds the optimizer's tensors themselves (torch's convention); loaded back a step later,
    # its momentum buffer is the one that step set aside as kept memory. Writing a proposal into memory the
    # state still reads would corrupt the momentum: kept memory is dropped on load, and never used when it
    # is the buffer itself.
    monkeypatch.setattr(scratch, "MIN_ELEMENTS", 2 ** 18)
    models = [_model(), _model()]
    torch.manual_seed(1)
    x, y = torch.randn(8, 16, dtype=torch.float64), torch.randint(0, 510, (8,))
    opts = [ngopt.FisherDescent(m, nn.CrossEntropyLoss(), stats_interval=2, inverse_interval=2, seed=3,
                                cost_budget=None) for m in models]

    def step(model, opt):
        opt.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        opt.step()

    for _ in range(3):
        for model, opt in zip(models, opts):
            step(model, opt)
    head = [next(b for b in opt.blocks.values() if b.layer.weight is m[2].weight) for m, opt in zip(models, opts)]
    assert "proposal" in head[0].scratch
    opts[0].load_state_dict(opts[0].state_dict())
    assert all(not block.scratch for block in opts[0].blocks.values())
    # The guard: kept memory that is the current buffer is not written into (the twin has none kept).
    head[0].scratch["proposal"] = opts[0].state[models[0][2].weight]["momentum_buffer"]
    head[1].scratch.clear()
    for _ in range(2):
        for model, opt in zip(models, opts):
            step(model, opt)
    for ours, theirs in zip(models[0].parameters(), models[1].parameters()):
        torch.testing.assert_close(ours, theirs, rtol=1e-12, atol=1e-14)
