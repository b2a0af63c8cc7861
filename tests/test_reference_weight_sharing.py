"""The two Kronecker treatments of a layer applied at many positions, against the exact Fisher.

Eschenhagen et al., NeurIPS 2023 ("Kronecker-factored approximate curvature
for modern neural network architectures"), sec. 3: for a linear layer shared
over positions,

* "expand" (positions as examples) is exact when every position has its own
  independent loss term and the output Fisher is the same everywhere (squared
  error): F = sum_{n,t} a_nt a_nt^T (x) E[g g^T];
* "reduce" (inputs averaged, output gradients summed per example) is exact when
  the positions are pooled before a single loss term: the per-example gradient
  is g_n (sum_t a_nt)^T, so F = sum_n (sum_t a_nt)(sum_t a_nt)^T (x) E[g g^T].

Each case is checked with the exact per-layer Fisher from torch.func
(``test_reference_blocks.exact_layer_fisher``); the other treatment must then
be measurably off, so the test would notice the two being swapped.
"""
from __future__ import annotations

import pytest
import torch
from torch import nn

from test_reference_blocks import EXACT_RTOL, exact_layer_fisher, recorded_optimizer, relative_error

N, T, D_IN, D_OUT = 12, 5, 4, 3


class PerPosition(nn.Module):
    """A linear map at every position, one squared-error term per output element."""

    def __init__(self):
        super().__init__()
        self.lin = nn.Linear(D_IN, D_OUT)

    def forward(self, x):
        return self.lin(x)  # [N, T, d_out]


class SumPooled(nn.Module):
    """A linear map at every position, summed over positions before the loss."""

    def __init__(self):
        super().__init__()
        self.lin = nn.Linear(D_IN, D_OUT)

    def forward(self, x):
        return self.lin(x).sum(dim=1)  # [N, d_out]


class TwoCallsPooled(nn.Module):
    """The same layer called twice in one forward and the results added: reduce joins the calls."""

    def __init__(self):
        super().__init__()
        self.lin = nn.Linear(D_IN, D_OUT)

    def forward(self, x):
        return self.lin(x[:, 0]) + self.lin(x[:, 1])


def problem(model_class, seed=0):
    torch.manual_seed(seed)
    model = model_class().double()
    inputs = torch.randn(N, T, D_IN, dtype=torch.float64)
    with torch.no_grad():
        targets = torch.randn_like(model(inputs))
    return model, inputs, targets


def errors(model_class, structure="kfac"):
    """Relative Frobenius error of each treatment against the exact per-layer Fisher."""
    found = {}
    for treatment in ("expand", "reduce"):
        model, inputs, targets = problem(model_class)
        reference = exact_layer_fisher(model, inputs, "mse")["lin"]
        opt = recorded_optimizer(model, nn.MSELoss(), inputs, targets, structure=structure,
                                 weight_sharing=treatment)
        found[treatment] = relative_error(opt.blocks["lin"].dense_curvature(), reference)
    print(model_class.__name__, structure, found)
    return found


def test_expand_is_exact_for_a_loss_at_every_position():
    found = errors(PerPosition)
    assert found["expand"] <= EXACT_RTOL
    assert found["reduce"] > 0.05


@pytest.mark.parametrize("model_class", [SumPooled, TwoCallsPooled])
def test_reduce_is_exact_for_positions_pooled_before_the_loss(model_class):
    found = errors(model_class)
    assert found["reduce"] <= EXACT_RTOL
    assert found["expand"] > 0.05


def test_ekfac_scales_do_not_depend_on_the_treatment():
    # EKFAC's scales are the projected second moments of the true per-example gradients, whatever
    # factors chose the basis; an exact K-FAC basis then makes EKFAC exact as well (George et al. 2018).
    found = errors(SumPooled, structure="ekfac")
    assert found["reduce"] <= 1e-10
    assert found["expand"] < errors(SumPooled)["expand"]


def test_diagonal_is_the_exact_diagonal_with_either_treatment():
    for treatment in ("expand", "reduce"):
        model, inputs, targets = problem(SumPooled)
        reference = exact_layer_fisher(model, inputs, "mse")["lin"]
        opt = recorded_optimizer(model, nn.MSELoss(), inputs, targets, structure="diag", weight_sharing=treatment)
        got = torch.diag(opt.blocks["lin"].dense_curvature())
        assert relative_error(got, torch.diag(reference)) <= EXACT_RTOL
