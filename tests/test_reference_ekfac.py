"""EKFAC against independent float64 computations.

References: George et al., NeurIPS 2018 (EKFAC): in the Kronecker eigenbasis
``Q = Q_A (x) Q_G`` the curvature is the diagonal of the projected per-example
gradients' second moments.  Brute force here: per-example gradients from
torch.func (vmap + jacrev), projected with numpy, squared and summed; the exact
per-layer Fisher from torch.func as in ``test_reference_blocks.py``.
"""
from __future__ import annotations

import copy
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import ngopt
from ngopt.sampling import categorical_draws
from test_reference_blocks import (exact_layer_fisher, network_problem, per_class_gradients,
                                   per_example_jacobians, recorded_optimizer, relative_error)


def ekfac_and_kfac(kind, criterion, seed):
    model, inputs, targets, loss_fn = network_problem(kind, criterion, seed=seed)
    reference = exact_layer_fisher(copy.deepcopy(model), inputs, criterion)
    kfac = recorded_optimizer(copy.deepcopy(model), loss_fn, inputs, targets, structure="kfac")
    ekfac = recorded_optimizer(copy.deepcopy(model), loss_fn, inputs, targets, structure="ekfac")
    return reference, kfac, ekfac


@pytest.mark.parametrize("kind", ["linear", "mlp", "cnn"])
@pytest.mark.parametrize("criterion", ["mse", "ce"])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ekfac_is_never_further_from_the_exact_fisher_than_kfac(kind, criterion, seed):
    # George et al. 2018, sec. 3: K-FAC is diagonal in the eigenbasis Q, and diag(Q^T F Q) is the
    # Frobenius-closest diagonal in that basis, so ||EKFAC - F|| <= ||K-FAC - F|| (a theorem).
    reference, kfac, ekfac = ekfac_and_kfac(kind, criterion, seed)
    for name, fisher in reference.items():
        error_k = relative_error(kfac.blocks[name].dense_curvature(), fisher)
        error_e = relative_error(ekfac.blocks[name].dense_curvature(), fisher)
        print(f"{kind}/{criterion} seed {seed} layer {name}: K-FAC {error_k:.4g}, EKFAC {error_e:.4g}")
        assert error_e <= error_k + 1e-12, (name, error_e, error_k)


@pytest.mark.parametrize("kind, criterion", [("mlp", "ce"), ("cnn", "mse")])
def test_ekfac_scales_are_the_diagonal_of_the_exact_fisher_in_the_eigenbasis(kind, criterion):
    # With fisher='exact' the projected second moments are those of the exact Fisher F itself:
    # S = diag(Q^T F Q), Q = kron(Q_A, Q_G) in column-major vec ordering (numpy.kron).
    reference, _, ekfac = ekfac_and_kfac(kind, criterion, seed=1)
    for name, fisher in reference.items():
        state = ekfac.blocks[name].state
        basis = np.kron(state["basis_in"].numpy(), state["basis_out"].numpy())
        expected = np.diag(basis.T @ fisher.numpy() @ basis)
        got = state["scales"].T.reshape(-1).numpy()
        np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-14 * np.abs(expected).max())


def test_ekfac_scales_against_brute_force_projected_per_example_gradients():
    # Sampled Fisher: S = c sum_n (Q_G^T M_n Q_A)^2 with M_n the gradient of the per-example loss
    # l_n at the sampled target (the criterion is L = c sum_n l_n, c = 1/N).  Brute force: the sampled targets the optimizer drew (same private seed), the
    # per-class gradients from torch.func, one projection per example with numpy.
    model, inputs, _, loss_fn = network_problem("mlp", "ce", n=12, seed=4)
    reference_model = copy.deepcopy(model)
    opt = ngopt.FisherDescent(model, loss_fn, lr=1e-3, momentum=0.0, damping=1e-3, structure="ekfac",
                              stats_interval=1, inverse_interval=1, stats_memory=0.0, max_step_kl=None, seed=7)
    with torch.no_grad():
        prob = torch.softmax(reference_model(inputs), dim=1)
    generator = torch.Generator().manual_seed(7)  # the optimizer's private generator, same seed
    drawn = categorical_draws(prob, 1, generator).squeeze(1)  # the optimizer's sampler (tests/test_sampling.py)
    opt.zero_grad()
    loss_fn(model(inputs), drawn).backward()  # observed labels = the draws; only the curvature matters
    opt.step()
    jacobians = per_example_jacobians(reference_model, inputs)
    c = 1.0 / len(inputs)
    for name, index in (("0", 0), ("2", 2)):
        layer = reference_model[index]
        grads = per_class_gradients(jacobians[name], prob)[torch.arange(len(inputs)), drawn]  # [N, P]
        state = opt.blocks[name].state
        q_in, q_out = state["basis_in"].numpy(), state["basis_out"].numpy()
        total = np.zeros((layer.out_features, layer.in_features + 1))
        for gradient in grads.numpy():
            matrix = gradient.reshape(layer.in_features + 1, layer.out_features).T  # column-major vec
            total += (q_out.T @ matrix @ q_in) ** 2
        np.testing.assert_allclose(state["scales"].numpy(), c * total, rtol=1e-9, atol=1e-15)


def test_ekfac_preconditioner_solves_its_own_damped_curvature():
    # (Q diag(S + lambda) Q^T)^-1 vec(V), checked with numpy.linalg.solve on the dense block.
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    opt = recorded_optimizer(model, loss_fn, inputs, targets, structure="ekfac")
    block = opt.blocks["0"]
    grad = torch.randn(block.layer.out_dim, block.layer.in_dim, dtype=torch.float64)
    damping = 3e-3
    dense = block.dense_curvature(damping).numpy()
    expected = np.linalg.solve(dense, grad.T.reshape(-1).numpy())
    got = block.precondition(grad, damping).T.reshape(-1).numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-9)
    product = block.damped_product(block.precondition(grad, damping), damping)
    torch.testing.assert_close(product, grad, rtol=1e-9, atol=1e-12)


def test_a_new_basis_without_fresh_statistics_starts_from_the_kfac_eigenvalues():
    # stats_interval=2, inverse_interval=3: step 3 refreshes the basis with no new captures, so the scales
    # restart from L_G L_A^T, and the block is then exactly K-FAC's A (x) G (numpy.kron).
    model, inputs, targets, loss_fn = network_problem("mlp", "mse")
    opt = ngopt.FisherDescent(model, loss_fn, lr=1e-2, momentum=0.0, structure="ekfac", stats_interval=2,
                              inverse_interval=3, interval_warmup=0, max_step_kl=None)
    for _ in range(4):
        opt.zero_grad()
        loss_fn(model(inputs), targets).backward()
        opt.step()
    for block in opt.blocks.values():
        state = block.state
        expected = np.kron(state["factor_in"].numpy(), state["factor_out"].numpy())
        np.testing.assert_allclose(block.dense_curvature().numpy(), expected, atol=1e-12 * np.abs(expected).max())


def test_ekfac_scales_blend_in_an_unchanged_basis():
    # Between basis refreshes the scales are a running average: ema * old + (1 - ema) * batch
    # (common practice for curvature statistics).  Step 0 sets them; step 1 blends in the same basis.
    model, inputs, targets, loss_fn = network_problem("linear", "mse")
    opt = ngopt.FisherDescent(model, loss_fn, lr=1e-2, momentum=0.0, structure="ekfac", fisher="exact",
                              stats_interval=1, inverse_interval=10, stats_memory=0.75, max_step_kl=None)
    seen = []
    for _ in range(2):
        before = copy.deepcopy(model)
        opt.zero_grad()
        loss_fn(model(inputs), targets).backward()
        opt.step()
        seen.append(before)
    block = opt.blocks["Linear"]
    basis = np.kron(block.state["basis_in"].numpy(), block.state["basis_out"].numpy())
    batch = [np.diag(basis.T @ exact_layer_fisher(m, inputs, "mse")["Linear"].numpy() @ basis) for m in seen]
    np.testing.assert_allclose(block.state["scales"].T.reshape(-1).numpy(), 0.75 * batch[0] + 0.25 * batch[1],
                               rtol=1e-9)


def test_ekfac_trains_like_kfac_on_digits():
    # Same budget, same settings: EKFAC's loss after 30 steps within a factor 2 of K-FAC's, and both
    # far below the start (the optimizer's own training tests set the bar for K-FAC).
    from sklearn.datasets import load_digits
    digits = load_digits()
    inputs = torch.tensor(digits.data[:512] / 16.0, dtype=torch.float32)
    targets = torch.tensor(digits.target[:512])
    finals = {}
    for structure in ("kfac", "ekfac"):
        torch.manual_seed(0)
        model = nn.Sequential(nn.Linear(64, 32), nn.Tanh(), nn.Linear(32, 10))
        loss_fn = nn.CrossEntropyLoss()
        opt = ngopt.FisherDescent(model, loss_fn, structure=structure, seed=0)
        for _ in range(30):
            opt.zero_grad()
            loss = loss_fn(model(inputs), targets)
            loss.backward()
            opt.step()
        finals[structure] = float(loss)
    print(finals)
    assert finals["ekfac"] < 0.3 and finals["kfac"] < 0.3
    assert finals["ekfac"] < 2.0 * finals["kfac"]


def test_ekfac_state_round_trips_and_resumes_identically():
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    twin = copy.deepcopy(model)

    def run(net, steps, opt=None):
        opt = opt or ngopt.FisherDescent(net, loss_fn, structure="ekfac", stats_interval=2, inverse_interval=3, seed=3)
        for _ in range(steps):
            opt.zero_grad()
            loss_fn(net(inputs), targets).backward()
            opt.step()
        return opt

    run(model, 7)
    first = run(twin, 4)
    first.remove_hooks()  # one optimizer's hooks per model
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        resumed = ngopt.FisherDescent(twin, loss_fn, structure="ekfac", stats_interval=2, inverse_interval=3, seed=3)
    resumed.load_state_dict(first.state_dict())
    run(twin, 3, resumed)
    for a, b in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(a, b, rtol=0, atol=0)
