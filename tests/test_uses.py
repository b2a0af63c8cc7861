"""A parameter gets the block of the operation that applies it, whatever module makes the call.

References: the same linear map written as ``nn.Linear`` (whose blocks are checked against the
exact Fisher elsewhere) must give the same statistics and, step for step, the same trajectory
(float64, one process, the same operations: agreement to rounding, 1e-10 relative, common
practice); where no such twin exists, the exact per-layer Fisher of the loss as written, from
torch.func Jacobians in float64 (``fisher_reference.py``; Martens & Grosse 2015, sec. 9): the
``diag`` structure must equal its diagonal, and the per-channel blocks of norms, scales and shifts
their entries.
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn
import torch.nn.functional as F

import ngopt
from fisher_reference import cross_entropy_fisher, flat_jacobian, loss_input_jacobian, model_loss_input

DTYPE = torch.float64
RTOL = 1e-10


def exact_settings(**overrides):
    settings = dict(fisher="exact", lr=0.5, momentum=0.0, max_step_kl=None, stats_memory=0.0, stats_interval=1,
                    inverse_interval=1, damping=1e-3, step_rule="fixed", damping_rule="fixed", seed=0,
                    stats_fraction=1.0)
    settings.update(overrides)
    return settings


def train(model, opt, inputs, labels, steps=3):
    for _ in range(steps):
        opt.zero_grad()
        F.cross_entropy(model(inputs), labels).backward()
        opt.step()


def batch(rows=12, features=5, classes=3, seed=0):
    generator = torch.Generator().manual_seed(seed)
    return (torch.randn(rows, features, generator=generator, dtype=DTYPE),
            torch.randint(0, classes, (rows,), generator=generator))


# ----------------------------------------------------------------------------- linear maps
class Projection(nn.Module):
    """A linear map applied one of several ways; ``weight`` stored ``[out, in]`` or ``[in, out]``."""

    def __init__(self, d_in, d_out, how):
        super().__init__()
        self.how = how
        transposed = how in ("addmm", "x@W", "einsum_io")
        shape = (d_in, d_out) if transposed else (d_out, d_in)
        self.weight = nn.Parameter(torch.randn(shape, dtype=DTYPE) / d_in ** 0.5)
        self.bias = nn.Parameter(torch.zeros(d_out, dtype=DTYPE)) if how in ("linear", "addmm") else None

    def forward(self, x):
        if self.how == "linear":
            return F.linear(x, self.weight, self.bias)
        if self.how == "addmm":  # a transposed-weight projection: flattens its rows and restores them
            out = torch.addmm(self.bias, x.reshape(-1, x.shape[-1]), self.weight)
            return out.reshape(x.shape[:-1] + (-1,))
        if self.how == "x@W.T":
            return x @ self.weight.T
        if self.how == "x@W":
            return x @ self.weight
        if self.how == "W@x":
            return (self.weight @ x.transpose(-1, -2)).transpose(-1, -2)
        if self.how == "einsum_oi":
            return torch.einsum("...i,oi->...o", x, self.weight)
        return torch.einsum("nti,io->nto", x, self.weight)


class TwoLayers(nn.Module):
    def __init__(self, how, d_in=5, hidden=6, classes=3):
        super().__init__()
        self.first = Projection(d_in, hidden, how)
        self.second = nn.Linear(hidden, classes).to(DTYPE)

    def forward(self, x):
        return self.second(torch.tanh(self.first(x))).reshape(-1, 3)


def as_linear(model: TwoLayers) -> TwoLayers:
    """The twin that applies the same map with ``F.linear`` and the weight stored ``[out, in]``."""
    twin = TwoLayers("linear" if model.first.bias is not None else "x@W.T")
    with torch.no_grad():
        twin.first.weight.copy_(model.first.weight.T if model.first.how in ("addmm", "x@W", "einsum_io")
                                else model.first.weight)
        if model.first.bias is not None:
            twin.first.bias.copy_(model.first.bias)
        twin.second.load_state_dict(model.second.state_dict())
    return twin


@pytest.mark.parametrize("how", ["addmm", "x@W.T", "x@W", "W@x", "einsum_oi", "einsum_io"])
@pytest.mark.parametrize("structure", ["kfac", "diag"])
def test_every_way_of_applying_a_weight_matrix_is_one_linear_block(how, structure):
    torch.manual_seed(0)
    model = TwoLayers(how)
    twin = as_linear(model)
    generator = torch.Generator().manual_seed(1)
    # Inputs with positions: [examples, positions, features] (einsum "nti" needs them).
    x = torch.randn(8, 4, 5, generator=generator, dtype=DTYPE)
    y = torch.randint(0, 3, (32,), generator=generator)
    opts = [ngopt.FisherDescent(m, **exact_settings(structure=structure)) for m in (model, twin)]
    for m, opt in zip((model, twin), opts):
        train(m, opt, x, y)
    block, reference = opts[0].blocks["first"], opts[1].blocks["first"]
    assert block.describe() == reference.describe()
    assert block.layer.kind == "linear" and block.layer.transposed == (how in ("addmm", "x@W", "einsum_io"))
    torch.testing.assert_close(block.dense_curvature(), reference.dense_curvature(), rtol=RTOL, atol=1e-14)
    first = model.first.weight.T if how in ("addmm", "x@W", "einsum_io") else model.first.weight
    torch.testing.assert_close(first, twin.first.weight, rtol=RTOL, atol=1e-14)


def test_a_packed_weight_applied_in_slices_is_one_block_with_the_exact_diagonal():
    # W[:4] and W[4:] applied to different inputs (a packed projection): one block over W, each call's
    # rows zero outside its part; the diagonal structure is the exact diagonal of W's Fisher.
    class Packed(nn.Module):
        def __init__(self):
            super().__init__()
            self.packed = nn.Parameter(torch.randn(8, 5, dtype=DTYPE) / 3)
            self.out = nn.Linear(4, 3).to(DTYPE)

        def forward(self, x):
            a = F.linear(x, self.packed[:4])
            b = F.linear(x.flip(-1), self.packed[4:])
            return self.out(torch.tanh(a) * torch.sigmoid(b))

    torch.manual_seed(2)
    model = Packed()
    x, y = batch()
    opt = ngopt.FisherDescent(model, **exact_settings(structure="diag", lr=0.0))
    train(model, opt, x, y, steps=1)
    assert opt.blocks["packed"].layer.kind == "linear"
    z, jac = loss_input_jacobian(model, ["packed"], model_loss_input(model, (x,)))
    fisher = cross_entropy_fisher(z, flat_jacobian(jac, z, ["packed"]), torch.full((12,), 1 / 12, dtype=DTYPE))
    expected = torch.diagonal(fisher).reshape(8, 5)  # row-major W, the block's gradient matrix
    torch.testing.assert_close(opt.blocks["packed"].state["fisher_diagonal"], expected, rtol=1e-9, atol=1e-15)


def test_a_view_kept_from_before_the_forward_is_a_use_of_its_parameter():
    # A module that keeps W[:4] from its construction: the view was made outside the recording (as every
    # slice of a parameter is under torch before 2.3), so it is found through its base; the block is the
    # one that slicing inside the forward gives (the exact diagonal, checked against torch.func above).
    class Kept(nn.Module):
        def __init__(self, keep: bool):
            super().__init__()
            self.packed = nn.Parameter(torch.randn(8, 5, dtype=DTYPE) / 3)
            self.out = nn.Linear(4, 3).to(DTYPE)
            self.keep = keep
            if keep:
                self.top = self.packed[:4]  # a plain attribute: a view, not a parameter

        def forward(self, x):
            top = self.top if self.keep else self.packed[:4]
            return self.out(torch.tanh(F.linear(x, top)))

    x, y = batch()
    diagonals = []
    for keep in (True, False):
        torch.manual_seed(3)
        model = Kept(keep)
        opt = ngopt.FisherDescent(model, **exact_settings(structure="diag", lr=0.0))
        train(model, opt, x, y, steps=2)
        assert opt.curvature_assignment()["packed"].block == "packed"
        diagonals.append(opt.blocks["packed"].state["fisher_diagonal"])
    assert diagonals[0][4:].abs().max() == 0  # rows 4..7 are never applied
    torch.testing.assert_close(diagonals[0], diagonals[1], rtol=1e-12, atol=0)


@pytest.mark.parametrize("layout", ["sequence-first", "flattened"])
def test_examples_are_found_in_sequence_first_and_flattened_rows(layout):
    # The exact diagonal sums each example's positions before squaring, so it is right only if the
    # examples are found: [T, N, d] (sequence first) and [N*T, d] (flattened) against torch.func.
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = nn.Linear(5, 4).to(DTYPE)
            self.out = nn.Linear(4, 3).to(DTYPE)

        def forward(self, x):  # x: [N, T, 5]
            if layout == "sequence-first":
                h = self.inner(x.transpose(0, 1)).transpose(0, 1)
            else:
                h = self.inner(x.reshape(-1, 5)).reshape(x.shape[0], x.shape[1], 4)
            return self.out(torch.tanh(h).mean(dim=1))

    torch.manual_seed(3)
    model = Net()
    generator = torch.Generator().manual_seed(4)
    x = torch.randn(6, 7, 5, generator=generator, dtype=DTYPE)  # 6 examples, 7 positions
    y = torch.randint(0, 3, (6,), generator=generator)
    opt = ngopt.FisherDescent(model, **exact_settings(structure="diag", lr=0.0))
    train(model, opt, x, y, steps=1)
    names = ["inner.weight", "inner.bias"]
    z, jac = loss_input_jacobian(model, names, model_loss_input(model, (x,)))
    fisher = torch.diagonal(cross_entropy_fisher(z, flat_jacobian(jac, z, names), torch.full((6,), 1 / 6,
                                                                                                  dtype=DTYPE)))
    expected = torch.cat([fisher[:20].reshape(4, 5), fisher[20:].reshape(4, 1)], dim=1)  # [W | b]
    torch.testing.assert_close(opt.blocks["inner"].state["fisher_diagonal"], expected, rtol=1e-9, atol=1e-15)


# ----------------------------------------------------------------------------- norms, scales, shifts
class NormWithActivation(nn.BatchNorm2d):
    """A batch-norm subclass that applies its activation inside ``forward`` (as some model libraries do)."""

    def forward(self, x):
        out = F.batch_norm(x, self.running_mean, self.running_var, self.weight, self.bias, self.training,
                           self.momentum, self.eps)
        return F.relu(out)


class ChannelsFirstLayerNorm(nn.LayerNorm):
    """Layer norm over the channels of ``[N, C, H, W]``: permute, normalize the last dimension, permute back."""

    def forward(self, x):
        x = x.permute(0, 2, 3, 1)
        x = F.layer_norm(x, self.normalized_shape, self.weight, self.bias, self.eps)
        return x.permute(0, 3, 1, 2)


class HandWrittenRMSNorm(nn.Module):
    """``weight * x / rms(x)``: the norm shows up only as a multiplication by the parameter."""

    def __init__(self, width):
        super().__init__()
        self.weight = nn.Parameter(1 + 0.1 * torch.randn(width, dtype=DTYPE))

    def forward(self, x):
        x = x * torch.rsqrt(x.pow(2).mean(-1, keepdim=True) + 1e-6)
        return self.weight * x


class ImageNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(2, 4, 3, padding=1).to(DTYPE)
        self.norm = NormWithActivation(4).to(DTYPE)
        self.channels = ChannelsFirstLayerNorm(4).to(DTYPE)
        self.gamma = nn.Parameter(1 + 0.1 * torch.randn(4, dtype=DTYPE))      # a layer scale
        self.position = nn.Parameter(0.1 * torch.randn(1, 4, 5, 5, dtype=DTYPE))  # a learned table
        self.rms = HandWrittenRMSNorm(100)
        self.head = nn.Linear(100, 3).to(DTYPE)

    def forward(self, x):
        h = self.channels(self.norm(self.conv(x)))
        h = torch.tanh(h.mul(self.gamma.reshape(1, -1, 1, 1)) + self.position)
        return self.head(self.rms(h.flatten(1)))


def test_norm_subclasses_channels_first_norms_scales_and_shifts_get_their_blocks():
    torch.manual_seed(5)
    model = ImageNet()
    generator = torch.Generator().manual_seed(6)
    x = torch.randn(10, 2, 5, 5, generator=generator, dtype=DTYPE)
    y = torch.randint(0, 3, (10,), generator=generator)
    opt = ngopt.FisherDescent(model, **exact_settings(structure="diag", lr=0.0))
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # no fallback share, no missing statistics
        train(model, opt, x, y, steps=1)
    kinds = {name: block.layer.kind for name, block in opt.blocks.items()}
    assert kinds == {"conv": "conv2d", "norm": "batch_norm", "channels": "layer_norm", "gamma": "scale",
                     "position": "shift", "rms": "scale", "head": "linear"}
    assert not any(entry.fallback for entry in opt.curvature_assignment().values())
    # The exact diagonal of each of these parameters' Fisher (torch.func, batch norm in train mode).
    for name, params in (("norm", ["norm.weight", "norm.bias"]), ("channels", ["channels.weight", "channels.bias"]),
                         ("gamma", ["gamma"]), ("position", ["position"]), ("rms", ["rms.weight"])):
        probe = copy.deepcopy(model)  # batch norm updates its running statistics on each forward
        z, jac = loss_input_jacobian(probe, params, model_loss_input(probe, (x,)))
        fisher = cross_entropy_fisher(z, flat_jacobian(jac, z, params), torch.full((10,), 0.1, dtype=DTYPE))
        diagonal = torch.diagonal(fisher)
        got = opt.blocks[name].state["fisher_diagonal"]  # [channels, (gamma, beta)]
        expected = diagonal.reshape(len(params), -1).T
        torch.testing.assert_close(got, expected, rtol=1e-9, atol=1e-15, msg=name)


def test_a_use_without_a_block_takes_the_fallback_rule_and_says_why():
    # A class token concatenated to the sequence (torch.cat) has no block; everything else keeps its own.
    class WithToken(nn.Module):
        def __init__(self):
            super().__init__()
            self.token = nn.Parameter(torch.zeros(1, 1, 5, dtype=DTYPE))
            self.mix = nn.Linear(5, 5).to(DTYPE)
            self.head = nn.Linear(5, 3).to(DTYPE)

        def forward(self, x):
            h = torch.cat([self.token.expand(x.shape[0], -1, -1), x], dim=1)
            return self.head(torch.tanh(self.mix(h))[:, 0])

    model = WithToken()
    opt = ngopt.FisherDescent(model)
    assignment = opt.assign_curvature(torch.randn(4, 3, 5, dtype=DTYPE))
    assert assignment["token"].fallback and assignment["token"].reason == \
        "applied by cat, which has no curvature block"
    assert [name for name, a in assignment.items() if not a.fallback] == ["mix.weight", "mix.bias", "head.weight",
                                                                         "head.bias"]
    assert "token (5): applied by cat, which has no curvature block" in repr(opt)


def test_a_position_table_looked_up_once_for_the_batch_gets_each_examples_gradient():
    # position_ids of shape [1, T] (one lookup for the whole batch, broadcast when added to the token
    # embeddings): each example's gradient must count apart, or the exact diagonal would square the
    # batch's sum.  Against torch.func's exact Fisher of the loss, and a twin that looks up [N, T] ids.
    class Embedded(nn.Module):
        def __init__(self, per_example):
            super().__init__()
            self.tokens = nn.Embedding(6, 4).to(DTYPE)
            self.positions = nn.Embedding(5, 4).to(DTYPE)
            self.head = nn.Linear(4, 3).to(DTYPE)
            self.per_example = per_example

        def forward(self, ids):
            where = torch.arange(ids.shape[1]).unsqueeze(0)
            if self.per_example:
                where = where.expand(ids.shape[0], -1)
            return self.head(torch.tanh(self.tokens(ids) + self.positions(where)).mean(dim=1))

    torch.manual_seed(8)
    model, twin = Embedded(False), Embedded(True)
    twin.load_state_dict(model.state_dict())
    generator = torch.Generator().manual_seed(9)
    ids = torch.randint(0, 6, (7, 5), generator=generator)
    y = torch.randint(0, 3, (7,), generator=generator)
    opts = [ngopt.FisherDescent(m, **exact_settings(structure="diag", lr=0.0)) for m in (model, twin)]
    for m, opt in zip((model, twin), opts):
        train(m, opt, ids, y, steps=1)
    z, jac = loss_input_jacobian(model, ["positions.weight"], model_loss_input(model, (ids,)))
    fisher = cross_entropy_fisher(z, flat_jacobian(jac, z, ["positions.weight"]), torch.full((7,), 1 / 7, dtype=DTYPE))
    expected = torch.diagonal(fisher).reshape(5, 4).T  # the block's layout: W^T [d, V]
    for opt in opts:
        torch.testing.assert_close(opt.blocks["positions"].state["fisher_diagonal"], expected, rtol=1e-9, atol=1e-15)
    # K-FAC sees the same rows as the twin's, so the same factors.
    for opt in opts:
        opt.remove_hooks()  # one optimizer's hooks per model
    kfac = [ngopt.FisherDescent(m, **exact_settings(lr=0.0)) for m in (model, twin)]
    for m, opt in zip((model, twin), kfac):
        train(m, opt, ids, y, steps=1)
    for key in ("factor_in", "factor_out"):
        torch.testing.assert_close(kfac[0].blocks["positions"].state[key], kfac[1].blocks["positions"].state[key],
                                   rtol=1e-12, atol=1e-15)
