"""Small Kronecker blocks computed together (``ngopt/packing.py``) against the per-block path.

Packing changes only how the step is computed: the zero-padded batched products, dot products,
momentum updates and writes must give each block what its own computation gives.  Reference: the
same model and data trained with packing switched off (``opt._packer = None``), in float64, where
the two differ only in the order of summation inside the products: agreement to 1e-10 relative
(a few thousand roundings of 1.1e-16 each, through 20 steps; common practice).
"""
import io
import warnings

import pytest
import torch
from torch import nn

import ngopt
from ngopt.packing import BlockPack, packs_by_shape

DTYPE = torch.float64


class SmallNet(nn.Module):
    """A 1-d convolution and three linear layers, all small enough to pack."""

    def __init__(self, frozen_bias: bool):
        super().__init__()
        self.conv = nn.Conv1d(2, 4, 3, padding=1)
        self.first = nn.Linear(32, 16)
        self.second = nn.Linear(16, 12)
        self.out = nn.Linear(12, 3)
        if frozen_bias:
            self.second.bias.requires_grad_(False)

    def forward(self, x):
        h = torch.tanh(self.conv(x)).flatten(1)
        return self.out(torch.tanh(self.second(torch.tanh(self.first(h)))))


def _setup(packed: bool, frozen_bias: bool = False, groups: bool = False, device: str = "cpu"):
    torch.manual_seed(0)
    model = SmallNet(frozen_bias).to(DTYPE).to(device)
    param_groups = None
    if groups:  # two groups with different lr and weight decay: a pack of three, and one block on its own
        param_groups = [{"params": [p for layer in (model.conv, model.first, model.second)
                                    for p in layer.parameters() if p.requires_grad], "weight_decay": 1e-3},
                        {"params": list(model.out.parameters()), "lr": 0.2}]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), param_groups=param_groups, fisher="exact",
                                  stats_interval=2, inverse_interval=3, momentum=0.5, seed=0)
    if not packed:
        opt._packer = None
    return model, opt


def _batches(count, rows=16):
    generator = torch.Generator().manual_seed(3)
    return [(torch.randn(rows, 2, 8, generator=generator, dtype=DTYPE),
             torch.randint(0, 3, (rows,), generator=generator)) for _ in range(count)]


def _train(model, opt, batches):
    device = next(model.parameters()).device
    for x, y in batches:
        x, y = x.to(device), y.to(device)
        opt.zero_grad()
        nn.CrossEntropyLoss()(model(x), y).backward()
        opt.step()


def _reloaded(model, opt):
    """A new model and optimizer (packing on) from a checkpoint of these, written and read back."""
    saved = io.BytesIO()
    torch.save({"model": model.state_dict(), "opt": opt.state_dict()}, saved)
    saved.seek(0)
    restored = torch.load(saved, weights_only=False)
    model, opt = _setup(True)
    model.load_state_dict(restored["model"])
    opt.load_state_dict(restored["opt"])
    return model, opt


def _assert_same(model, opt, reference, reference_opt):
    for (name, p), q in zip(model.named_parameters(), reference.parameters()):
        torch.testing.assert_close(p.cpu(), q.cpu(), rtol=1e-10, atol=1e-12, msg=name)
    for block in opt.blocks.values():
        other = reference_opt.blocks[block.layer.name]
        for key in ("momentum_buffer", "inverse_in", "inverse_out", "factor_in", "factor_out"):
            torch.testing.assert_close(block.state[key].cpu(), other.state[key].cpu(), rtol=1e-10, atol=1e-12,
                                       msg=f"{block.layer.name} {key}")


@pytest.mark.parametrize("frozen_bias,groups", [(False, False), (True, False), (False, True)],
                         ids=["one-group", "frozen-bias", "two-groups"])
def test_packed_steps_match_the_per_block_steps(frozen_bias, groups):
    model, opt = _setup(True, frozen_bias, groups)
    reference, reference_opt = _setup(False, frozen_bias, groups)
    batches = _batches(20)
    _train(model, opt, batches)
    _train(reference, reference_opt, batches)
    packs = opt._packer.packs({b: (opt._group_of[b.layer.weight], b.layer.weight.grad) for b in opt.blocks.values()})
    members = sorted(sorted(b.layer.name for b in pack.blocks) for pack in packs)
    assert members == ([["conv", "first", "second"]] if groups else [["conv", "first", "out", "second"]])
    # the momentum buffers are regions of a pack's stack
    assert any(block.state["momentum_buffer"]._base is not None for block in opt.blocks.values())
    if frozen_bias:
        assert torch.equal(model.second.bias, reference.second.bias)  # never written, packed or not
    _assert_same(model, opt, reference, reference_opt)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device")
def test_packed_steps_on_the_device_match_the_per_block_steps_on_the_cpu():
    # float64 on both: the device's kernels sum in other orders, well inside the same 1e-10
    model, opt = _setup(True, device="cuda")
    reference, reference_opt = _setup(False)
    batches = _batches(20)
    _train(model, opt, batches)
    _train(reference, reference_opt, batches)
    assert opt._packer._packs and model.first.weight.device.type == "cuda"
    assert all(block.state["momentum_buffer"].device.type == "cuda" for block in opt.blocks.values())
    _assert_same(model, opt, reference, reference_opt)


def test_a_loaded_state_and_a_skipped_step_keep_the_packed_path_exact():
    # A loaded state holds buffers outside the packs' stacks (gathered once); a skipped step leaves
    # the buffers in the stack the next step must not write.
    model, opt = _setup(True)
    reference, reference_opt = _setup(False)
    batches = _batches(16)
    _train(model, opt, batches[:7])
    _train(reference, reference_opt, batches[:7])
    model, opt = _reloaded(model, opt)
    _train(model, opt, batches[7:10])
    _train(reference, reference_opt, batches[7:10])
    for net, optimizer in ((model, opt), (reference, reference_opt)):
        optimizer.zero_grad()
        x, y = batches[10]
        nn.CrossEntropyLoss()(net(x), y).backward()
        net.first.weight.grad[0, 0] = float("nan")
        with pytest.warns(UserWarning, match="skipped"):
            optimizer.step()
    _train(model, opt, batches[11:])
    _train(reference, reference_opt, batches[11:])
    assert opt.diagnostics()["skip_reasons"]["nonfinite_gradient"] == 1
    _assert_same(model, opt, reference, reference_opt)


@pytest.mark.parametrize("packed", [True, False], ids=["packed", "per-block"])
@pytest.mark.parametrize("value", [float("nan"), float("inf")])
def test_a_non_finite_gradient_gives_no_proposals(packed, value):
    # The proposals' dot products are the first place a non-finite gradient shows on a step without
    # statistics: proposals() returns None there, before any rule computes with them.
    from ngopt.step_pipeline import proposals

    model, opt = _setup(packed)
    _train(model, opt, _batches(4))
    blocks = list(opt.blocks.values())

    def propose():
        return proposals(blocks, opt.param_groups, opt.group_index, {}, {}, opt.steps_taken, packer=opt._packer)

    inputs, missing = propose()
    assert inputs is not None and missing == [] and len(inputs.dots) == len(blocks)
    assert bool(inputs.packs) == packed
    model.second.weight.grad[1, 2] = value
    assert propose() == (None, [])


class _Layer:
    def __init__(self, out_dim, in_dim):
        self.out_dim, self.in_dim = out_dim, in_dim


class _Block:
    def __init__(self, out_dim, in_dim):
        self.layer = _Layer(out_dim, in_dim)


def test_blocks_are_packed_only_where_the_padding_adds_little_arithmetic():
    # The cost of a pack's products is B (O^2 I + O I^2) multiply-adds at the padded sizes.
    tiny = [_Block(8, 9), _Block(16, 17), _Block(1, 17)]       # padded 3 * 16 * 17 * 33: under the floor
    assert [len(p) for p in packs_by_shape(tiny)] == [3]
    mixed = [_Block(128, 129), _Block(16, 129), _Block(10, 33), _Block(10, 33)]
    packs = packs_by_shape(mixed)
    # the three small ones pack (0.9M padded, under the floor); the 128x129 block beside them would make
    # 17M multiply-adds of 4.6M, and alone it is no pack
    assert [sorted((b.layer.out_dim, b.layer.in_dim) for b in p) for p in packs] == [[(10, 33), (10, 33), (16, 129)]]
    assert packs_by_shape([_Block(128, 129), _Block(16, 129), _Block(16, 129)]) == []  # 12.7M against 4.8M
    assert packs_by_shape(tiny[:2]) == []  # two blocks are no pack (MIN_BLOCKS)


def test_a_pack_computes_each_blocks_own_products():
    # G^-1 g A^-1 per block against the dense float64 products, through the zero-padded stacks.
    model, opt = _setup(True)
    _train(model, opt, _batches(4))
    blocks = [opt.blocks[name] for name in ("conv", "first", "second")]
    pack = BlockPack(blocks, model.first.weight)
    grads = [g for b in blocks for g in (b.layer.weight.grad, b.layer.bias.grad)]
    pack.fill_gradients(grads)
    index = pack.precondition([(b.state["inverse_out"], b.state["inverse_in"]) for b in blocks])
    grams = pack.grams(index)
    for k, block in enumerate(blocks):
        g = block.layer.gradient_matrix(block.layer.weight.grad, block.layer.bias.grad)
        expected = block.state["inverse_out"] @ g @ block.state["inverse_in"]
        torch.testing.assert_close(pack.regions[index][k], expected, rtol=1e-12, atol=1e-14)
        torch.testing.assert_close(pack.gradient_regions[k], g, rtol=0, atol=0)
        pairs = torch.stack([expected.reshape(-1), g.reshape(-1)])
        torch.testing.assert_close(grams[k], pairs @ pairs.T, rtol=1e-12, atol=1e-14)
    # the padding stays zero
    outside = pack.stacks[index].clone()
    for k, block in enumerate(blocks):
        outside[k, :block.layer.out_dim, :block.layer.in_dim] = 0
    assert not outside.any()


def test_the_timing_script_times_both_paths_on_the_same_steps():
    # scripts/packed_step_time.py: the packed variant reports its packs, the per-block one none.
    import runpy
    from pathlib import Path
    script = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "packed_step_time.py"),
                            run_name="packed_step_time")
    times = script["step_times"]("friedman1_deep_mlp", 20)
    assert times["packed"][2] == [7] and times["per-block"][2] == []
    assert all(mean > 0 and median > 0 for mean, median, _ in times.values())


def test_a_state_with_buffers_in_both_stacks_gets_a_new_stack_and_keeps_its_buffers():
    # Not reachable through step() (a step writes one stack for all its blocks); a state put together
    # by hand must still not be overwritten.
    model, opt = _setup(True)
    _train(model, opt, _batches(3))
    blocks = [opt.blocks[name] for name in ("conv", "first", "second")]
    pack = BlockPack(blocks, model.first.weight)
    for stack in pack.stacks:
        stack.normal_()
    blocks[0].state["momentum_buffer"] = pack.regions[0][0]
    blocks[1].state["momentum_buffer"] = pack.regions[1][1]
    kept = [blocks[0].state["momentum_buffer"].clone(), blocks[1].state["momentum_buffer"].clone()]
    old_stack = pack.stacks[0]
    index = pack.precondition([(b.state["inverse_out"], b.state["inverse_in"]) for b in blocks])
    assert index == 0 and pack.stacks[0] is not old_stack
    assert torch.equal(blocks[0].state["momentum_buffer"], kept[0])
    assert torch.equal(blocks[1].state["momentum_buffer"], kept[1])


def test_a_resumed_packed_run_continues_exactly_as_the_uninterrupted_one():
    # API behaviour 3, with packs: the loaded buffers are gathered into a stack once, with the same values
    # the uninterrupted run reads from its other stack (same process, same threads: equal, not close).
    batches = _batches(10)
    model, opt = _setup(True)
    _train(model, opt, batches)
    resumed, resumed_opt = _setup(True)
    _train(resumed, resumed_opt, batches[:5])
    resumed, resumed_opt = _reloaded(resumed, resumed_opt)
    _train(resumed, resumed_opt, batches[5:])
    assert resumed_opt._packer._packs and all(torch.equal(p, q) for p, q in zip(model.parameters(),
                                                                                   resumed.parameters()))
