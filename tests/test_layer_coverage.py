"""Which parameters get a curvature block, and what the user hears when one gets none.

Checks against plain facts of the models built here (parameter counts by torch's ``numel``,
which module holds which parameter), and the optimizer's documented behaviour: a gradient
without statistics after a due refresh is an error that names the layer and leaves the
model as it was; more than a tenth of the trainable parameters on the fallback rule is a
warning at construction naming the layer kinds (common practice: say it once, up front).
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn

import ngopt


class FunctionalHead(nn.Module):
    """Applies ``head.weight`` through ``F.linear``: the ``head`` module's own forward never runs."""

    def __init__(self):
        super().__init__()
        self.body = nn.Linear(4, 6)
        self.head = nn.Linear(6, 3)

    def forward(self, x):
        return nn.functional.linear(torch.tanh(self.body(x)), self.head.weight, self.head.bias)


class ModuleHead(FunctionalHead):
    def forward(self, x):
        return self.head(torch.tanh(self.body(x)))


def batch(n=8, seed=90):
    generator = torch.Generator().manual_seed(seed)
    return torch.randn(n, 4, generator=generator), torch.randint(0, 3, (n,), generator=generator)


def train(model, opt, loss_fn, steps=4):
    x, y = batch()
    for _ in range(steps):
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        opt.step()


def test_a_layer_applied_through_the_functional_api_gets_the_block_its_module_gets():
    # A block follows the operation, not the module: F.linear(x, head.weight, head.bias) is the same
    # linear map as head(x), so the same block and, step for step, the same trajectory.
    torch.manual_seed(91)
    functional = FunctionalHead()
    module = ModuleHead()
    module.load_state_dict(functional.state_dict())
    runs = []
    for model in (functional, module):
        loss_fn = nn.CrossEntropyLoss()
        opt = ngopt.FisherDescent(model, loss_fn, seed=0)
        train(model, opt, loss_fn)
        runs.append(opt)
    assert [(n, b.describe()) for n, b in runs[0].blocks.items()] == \
        [(n, b.describe()) for n, b in runs[1].blocks.items()] == \
        [("body", "linear kfac [6 x 5]"), ("head", "linear kfac [3 x 7]")]
    for p, q in zip(functional.parameters(), module.parameters()):
        assert torch.equal(p, q)  # one process, the same operations in the same order


def test_an_unrecorded_first_step_is_an_error_and_an_unused_layer_is_not():
    loss_fn = nn.CrossEntropyLoss()
    torch.manual_seed(92)
    model = nn.Sequential(nn.Linear(4, 6), nn.Tanh(), nn.Linear(6, 3))
    opt = ngopt.FisherDescent(model, loss_fn)
    before = copy.deepcopy(model.state_dict())
    x, y = batch()
    model.eval()
    loss_fn(model(x), y).backward()
    with pytest.raises(RuntimeError, match=r"step\(\) before any recorded training forward.*eval\(\)"):
        opt.step()
    for name, value in model.state_dict().items():
        assert torch.equal(value, before[name]), name
    # Blocks assigned from an example batch, then a refresh whose forward was not recorded: the
    # blocks with a gradient and no statistics are named, and nothing moves.
    opt.assign_curvature(x)
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    with pytest.raises(RuntimeError, match=r"0 \(linear\), 2 \(linear\): a gradient but no curvature statistics"):
        opt.step()
    for name, value in model.state_dict().items():
        assert torch.equal(value, before[name]), name
    assert opt.steps_taken == 0

    # A layer left out of the forward has no use: the fallback rule, and with a zero gradient
    # (zero_grad(set_to_none=False)) nothing to warn about.
    class WithSpare(nn.Module):
        def __init__(self):
            super().__init__()
            self.used, self.spare = model, nn.Linear(4, 3)

        def forward(self, inputs):
            return self.used(inputs)

    model.train()
    opt.remove_hooks()  # one optimizer's hooks per model
    both = WithSpare()
    opt = ngopt.FisherDescent(both, loss_fn)
    opt.zero_grad(set_to_none=False)
    loss_fn(both(x), y).backward()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        opt.step()
    assert opt.blocks["used.0"].has_statistics and "spare" not in opt.blocks
    assignment = opt.curvature_assignment()
    assert assignment["spare.weight"].fallback
    assert assignment["spare.weight"].reason == "not applied in any recorded training forward"
    assert assignment["used.0.weight"] == assignment["used.0.bias"]
    assert (assignment["used.0.weight"].block, assignment["used.0.weight"].kind) == ("used.0", "linear")


def test_more_than_a_tenth_on_the_fallback_rule_is_a_warning_naming_the_largest():
    loss_fn = nn.CrossEntropyLoss()
    model = nn.Sequential(nn.Linear(4, 6), nn.PReLU(6), nn.Linear(6, 6), nn.Linear(6, 3))
    x = torch.randn(5, 4)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # 6 of 99 parameters (6%): no warning
        opt = ngopt.FisherDescent(model, loss_fn)
        opt.assign_curvature(x)
    assert "fallback rule (adam): 1 tensors, 6 parameters" in repr(opt)
    assert "1.weight (6): applied by prelu, which has no curvature block" in repr(opt)

    class Pairwise(nn.Module):
        def __init__(self):
            super().__init__()
            self.pair = nn.Bilinear(4, 4, 5)   # 85 parameters without a block
            self.out = nn.Linear(5, 3)          # 18 with one

        def forward(self, x):
            return self.out(self.pair(x, x))

    opt = ngopt.FisherDescent(Pairwise(), nn.CrossEntropyLoss())
    # the count by hand: Bilinear(4, 4, 5) 80 + 5, Linear(5, 3) 18
    with pytest.warns(UserWarning, match=r"83% of the trainable parameters \(85 of 103\).*the largest: "
                                         r"pair.weight \(80: applied by bilinear"):
        opt.assign_curvature(x)
    assert "pair.bias (5): applied by bilinear, which has no curvature block" in repr(opt)


def test_a_cnn_with_group_norm_and_a_depthwise_convolution_has_no_fallback_parameters():
    loss_fn = nn.CrossEntropyLoss()  # ngopt hooks this very object
    # The layers torch offers for small-batch CNNs: GroupNorm and depthwise/grouped convolutions.
    torch.manual_seed(93)
    model = nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.GroupNorm(2, 8), nn.ReLU(),
                          nn.Conv2d(8, 8, 3, groups=8, padding=1), nn.Conv2d(8, 8, 1, groups=2),
                          nn.InstanceNorm2d(8, affine=True), nn.ReLU(), nn.Flatten(), nn.Linear(8 * 36, 3))
    generator = torch.Generator().manual_seed(94)
    images = torch.randn(32, 1, 6, 6, generator=generator)
    labels = (images[:, 0, :3].mean(dim=(1, 2)) > 0).long() + (images[:, 0, 3:].mean(dim=(1, 2)) > 0).long()
    for structure in ("kfac", "ekfac", "diag"):
        trained = copy.deepcopy(model)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            opt = ngopt.FisherDescent(trained, loss_fn, structure=structure, stats_interval=2,
                                      inverse_interval=4, seed=0)
            losses = []
            for _ in range(15):
                opt.zero_grad()
                loss = loss_fn(trained(images), labels)
                loss.backward()
                opt.step()
                losses.append(float(loss.detach()))
        text = repr(opt)
        assert "fallback rule" not in text
        for name, kind in (("1", "group_norm"), ("3", "grouped_conv2d"), ("4", "grouped_conv2d"),
                           ("5", "instance_norm")):
            assert f"  {name}: {kind} " in text, name
        assert losses[-1] < 0.7 * losses[0], (structure, losses)
