"""Convolution statistics read a bounded chunk of examples at a time: same result as the whole batch.

References: the input patches of ``torch.nn.functional.unfold`` on the whole batch, in float64
(the KFC input factor ``A = mean over examples and positions of a a^T``, Grosse & Martens 2016,
eq. 4, with a trailing 1 for the bias); the EKFAC scales and the exact diagonal of blocks of the
same class fed those whole-batch patches as a plain tensor.  A chunked sum differs from the
whole-batch sum by float rounding only: in float64 with entries of order 1 and at most a few
thousand terms, relative 1e-12 is far above that rounding (~1e-16 per addition, common practice).
"""
from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import ngopt
from ngopt.blocks import rows as rows_module
from ngopt.blocks.factory import make_block
from use_support import adapter_for
from ngopt.blocks.rows import HeldRows, example_chunks

RTOL = 1e-12
# A tiny chunk limit forces many chunks (down to one example each) on these small batches.
SMALL_LIMIT = 500


def unfold_rows(conv: nn.Conv2d, inputs: torch.Tensor) -> torch.Tensor:
    """``[N, L, C*k*k + 1]``: F.unfold's patches of the whole batch with a column of ones (bias)."""
    patches = F.unfold(inputs, conv.kernel_size, dilation=conv.dilation, padding=conv.padding,
                       stride=conv.stride).transpose(1, 2)
    return torch.cat([patches, torch.ones(patches.shape[:2] + (1,), dtype=inputs.dtype)], dim=2)


def relative(a, b):
    return float((a - b).norm() / b.norm())


def conv_and_rows(generator, groups=1, **settings):
    conv = nn.Conv2d(4, 6, groups=groups, **settings).double()
    inputs = torch.randn(7, 4, 9, 8, dtype=torch.float64, generator=generator)
    layer = adapter_for(conv, "conv", inputs)
    output_shape = conv(inputs).shape
    grads = layer.output_rows(torch.randn((2,) + tuple(output_shape), dtype=torch.float64, generator=generator))
    return conv, layer, inputs, grads


CONV_SETTINGS = [dict(kernel_size=3, padding=1), dict(kernel_size=(2, 3), stride=(2, 1), padding=(1, 0), dilation=(1, 2))]


@pytest.mark.parametrize("settings", CONV_SETTINGS)
def test_chunked_input_factor_equals_the_unfold_reference(monkeypatch, settings):
    generator = torch.Generator().manual_seed(0)
    conv, layer, inputs, grads = conv_and_rows(generator, **settings)
    monkeypatch.setattr(rows_module, "CHUNK_ELEMENTS", SMALL_LIMIT)
    held = layer.recorded_rows(inputs)
    assert isinstance(held, HeldRows)
    assert len(list(example_chunks(held))) == inputs.shape[0]  # one example per chunk at this limit
    block = make_block(layer, "kfac", {})
    block.add_capture(held, grads, 0.5)
    statistics = block.batch_statistics(1)
    a = unfold_rows(conv, inputs).reshape(-1, layer.in_dim)
    g = grads.reshape(-1, layer.out_dim)
    assert relative(statistics["factor_in"], a.T @ a / a.shape[0]) < RTOL  # Grosse & Martens 2016, eq. 4
    assert relative(statistics["factor_out"], 0.5 * g.T @ g) < RTOL


def _statistics(structure, layer, input_rows, grads, weight_sharing="expand", calls=1):
    """Block statistics (and EKFAC scales in the basis of these statistics) for ``calls`` equal calls."""
    block = make_block(layer, structure, {}, weight_sharing=weight_sharing)
    for _ in range(calls):
        block.add_capture(input_rows, grads, 0.5, 0)
    statistics = block.batch_statistics(1)
    block.commit(statistics)
    if block.projected_keys:
        tensors, _ = block.prepare_inverse(block.state, 1e-2, False)
        block.commit(tensors)
        statistics = dict(statistics, **block.projected_batch_statistics(block.state, 1))
    return statistics


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
@pytest.mark.parametrize("groups", [1, 2])
@pytest.mark.parametrize("weight_sharing,calls", [("expand", 1), ("reduce", 2), ("expand", 2)])
def test_chunked_block_statistics_equal_whole_batch_ones(monkeypatch, structure, groups, weight_sharing, calls):
    """Every structure (grouped too; shared weights joined per forward) sees the same rows chunked or whole."""
    generator = torch.Generator().manual_seed(1)
    conv, layer, inputs, grads = conv_and_rows(generator, groups=groups, kernel_size=3, padding=1)
    whole = unfold_rows(conv, inputs)
    if groups > 1:  # compact grouped rows: each group's own channels, then its bias column
        patches = whole[..., :-1].reshape(whole.shape[:2] + (groups, -1))
        whole = torch.cat([patches, torch.ones(patches.shape[:3] + (1,), dtype=whole.dtype)], dim=3)
    reference = _statistics(structure, layer, whole, grads, weight_sharing, calls)
    monkeypatch.setattr(rows_module, "CHUNK_ELEMENTS", SMALL_LIMIT)
    chunked = _statistics(structure, layer, layer.recorded_rows(inputs), grads, weight_sharing, calls)
    assert reference.keys() == chunked.keys()
    for key in reference:
        assert relative(chunked[key], reference[key]) < RTOL, key


def test_optimizer_factor_equals_the_unfold_reference_of_the_recorded_batch(monkeypatch):
    """End to end: the first refresh's input factor of a small CNN is the unfold reference."""
    monkeypatch.setattr(rows_module, "CHUNK_ELEMENTS", SMALL_LIMIT)
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(3, 5, 3, padding=1), nn.ReLU(), nn.Conv2d(5, 4, 3, stride=2),
                          nn.Flatten(), nn.LazyLinear(3)).double()
    inputs = torch.randn(6, 3, 8, 8, dtype=torch.float64)
    model(inputs)  # materialize the lazy layer before the optimizer sees its parameters
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.0, stats_fraction=1.0)
    seen = {}
    hooks = [m.register_forward_hook(lambda m, args, out: seen.__setitem__(m, args[0].detach().clone()))
             for m in (model[0], model[2])]
    opt.zero_grad()
    loss_fn(model(inputs), torch.tensor([0, 1, 2, 0, 1, 2])).backward()
    opt.step()
    for hook in hooks:
        hook.remove()
    for conv in (model[0], model[2]):
        a = unfold_rows(conv, seen[conv]).reshape(-1, conv.weight[0].numel() + 1)
        assert relative(opt.state[conv.weight]["factor_in"], a.T @ a / a.shape[0]) < RTOL


def test_an_input_changed_in_place_after_recording_is_an_error():
    conv = nn.Conv2d(2, 3, 3)
    inputs = torch.randn(2, 2, 5, 5)
    layer = adapter_for(conv, "conv", inputs)
    held = layer.recorded_rows(inputs)
    inputs.mul_(2.0)
    with pytest.raises(RuntimeError, match="modified in place"):
        held.examples(0, 1)


@pytest.mark.parametrize("structure", ["kfac", "diag"])
def test_chunked_batch_norm_pairs_equal_the_whole_batch_ones(monkeypatch, structure):
    """Batch norm's rows: x_hat from the held input and its batch moments, chunked, against F.batch_norm."""
    generator = torch.Generator().manual_seed(2)
    norm = nn.BatchNorm2d(3).double()
    inputs = 2.0 * torch.randn(6, 3, 5, 4, dtype=torch.float64, generator=generator) + 1.0
    layer = adapter_for(norm, "norm", inputs)
    grads = layer.output_rows(torch.randn((2,) + tuple(inputs.shape), dtype=torch.float64, generator=generator))
    x_hat = F.batch_norm(inputs, None, None, training=True, eps=norm.eps)  # the whole batch's x_hat
    whole = x_hat.reshape(6, 3, -1).transpose(1, 2)
    reference = _statistics(structure, layer, whole, grads)
    monkeypatch.setattr(rows_module, "CHUNK_ELEMENTS", 120)  # two examples (60 floats each) per chunk
    held = layer.recorded_rows(inputs)
    assert len(list(example_chunks(held))) == 3
    chunked = _statistics(structure, layer, held, grads)
    for key in reference:
        assert relative(chunked[key], reference[key]) < RTOL, key
