"""The public names are those of the API contract (version 2); none of the version-1 names survives.

The old spellings are built from pieces so that a search of the repository for any of them finds
nothing but what it should: no alias, no shim, no leftover in code, docs or messages.
"""
from __future__ import annotations

import inspect

import pytest
import torch
from torch import nn

import ngopt
import ngopt.distributed

OLD_CLASS = "Natural" + "Gradient"
OLD_KEYWORDS = ["curv" + "ature", "stats_" + "every", "invert_" + "every", "stats_" + "ema", "trust_" + "kl",
                "adapt_" + "damping", "adapt_" + "every"]
NEW_KEYWORDS = ["structure", "stats_interval", "inverse_interval", "stats_memory", "max_step_kl",
                "damping_rule", "damping_interval"]


def tiny():
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 2))
    return model, nn.MSELoss()


def test_new_names_exist_and_old_ones_do_not():
    assert hasattr(ngopt, "FisherDescent")
    assert not hasattr(ngopt, OLD_CLASS)
    assert hasattr(ngopt.distributed, "sync_parameters")
    assert not hasattr(ngopt.distributed, "broadcast_" + "parameters")
    assert not hasattr(ngopt.FisherDescent, "paused_" + "capture")
    assert not hasattr(ngopt.FisherDescent, "register_step_" + "hook")
    assert hasattr(ngopt.FisherDescent, "no_capture")
    assert not hasattr(ngopt.blocks, "Curvature" + "Block")
    assert hasattr(ngopt.blocks, "LayerCurvature")


def test_signature_has_the_new_keywords_only():
    parameters = inspect.signature(ngopt.FisherDescent).parameters
    for name in NEW_KEYWORDS:
        assert name in parameters, name
    for name in OLD_KEYWORDS:
        assert name not in parameters, name


@pytest.mark.parametrize("old", OLD_KEYWORDS)
def test_old_keywords_are_unexpected(old):
    model, loss_fn = tiny()
    with pytest.raises(TypeError, match="unexpected keyword"):
        ngopt.FisherDescent(model, loss_fn, **{old: 1})


def test_diagnostics_speak_of_the_direction_norm():
    model, loss_fn = tiny()
    opt = ngopt.FisherDescent(model, loss_fn)
    x, y = torch.randn(8, 3), torch.randn(8, 2)
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()
    update = opt.diagnostics()["update"]
    assert "direction_norm" in update and "update_" + "norm" not in update
    for entry in opt.diagnostics()["layers"].values():
        assert "structure" in entry and "curv" + "ature" not in entry
