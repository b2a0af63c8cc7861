"""``structure="ekfac-gradient"``: EKFAC's eigenbases, scales that follow every step's gradient.

References:
* the Kronecker mixed-product rule ``(A (x) B)(C (x) D) = AC (x) BD`` (Van Loan, "The ubiquitous Kronecker
  product", J. Comput. Appl. Math. 2000), checked here with ``numpy.kron`` in float64;
* the Fisher information of the Gaussian linear model ``y ~ N(x^T w, s^2)``: ``E[x x^T] / s^2`` per
  observation (Casella & Berger, Statistical Inference, 2nd ed., sec. 7.3), the covariance of the score at
  the true parameter.  ``nn.MSELoss`` is that model's negative log-likelihood at ``s^2 = 1/2`` (up to a
  constant), so there the mean squared gradient of the loss estimates ``2 E[x x^T]``;
* the loss's term count ``N = 1 / mean w_n`` (``w_n = dL/dl_n``): the number of counted terms for a mean, 1
  for a sum, counted here by hand from the targets.
"""
from __future__ import annotations

import copy
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import ngopt
from ngopt.blocks.embedding import EmbeddingEigenbasisBlock
from ngopt.blocks.gradient_scales import GradientScaledEigenbasisBlock, carried_scales
from ngopt.blocks.grouped import GroupedEigenbasisBlock

# Every rule that would move the weights or the damping off: each test looks at the scales alone.
PLAIN = dict(structure="ekfac-gradient", step_rule="fixed", damping_rule="fixed", max_step_kl=None,
             max_exact_step_kl=None, rule_interval=0, momentum=0.0, seed=0)


def orthogonal(d, generator):
    q, _ = torch.linalg.qr(torch.randn(d, d, generator=generator, dtype=torch.float64))
    return q


def test_carried_scales_are_the_old_curvatures_diagonal_in_the_new_basis():
    # diag(Q_new^T Q_old diag(s) Q_old^T Q_new) with Q = kron(Q_in, Q_out) (column-major vec of the
    # [d_out, d_in] scales), computed densely with numpy.kron.
    generator = torch.Generator().manual_seed(0)
    d_in, d_out = 4, 3
    old_in, old_out, new_in, new_out = (orthogonal(d, generator) for d in (d_in, d_out, d_in, d_out))
    scales = torch.rand(d_out, d_in, generator=generator, dtype=torch.float64) + 0.1
    old = np.kron(old_in.numpy(), old_out.numpy())
    new = np.kron(new_in.numpy(), new_out.numpy())
    curvature = old @ np.diag(scales.T.reshape(-1).numpy()) @ old.T
    expected = np.diag(new.T @ curvature @ new).reshape(d_in, d_out).T
    got = carried_scales(scales, old_in, old_out, new_in, new_out)
    np.testing.assert_allclose(got.numpy(), expected, rtol=1e-12, atol=1e-14)
    # The same basis carries the scales unchanged.
    np.testing.assert_allclose(carried_scales(scales, old_in, old_out, old_in, old_out).numpy(), scales.numpy(),
                               rtol=1e-12, atol=1e-14)



@pytest.mark.parametrize("case", ["mse-mean", "mse-sum", "mse-mean-times-4", "ce-mean-ignored", "ce-mean-halved-twice"])
def test_one_step_scales_are_the_term_count_times_the_squared_gradient_in_the_basis(case):
    # scale_memory=0: the gradient moment after a step is N (Q_G^T V Q_A)^2 exactly, for the gradient matrix
    # V [weight | bias] the user's backward left, N counted by hand; the scales are max(moment, L_G L_A^T)
    # with the eigenvalues L of the factors from numpy.
    torch.manual_seed(0)
    batch, d_in, d_out = 12, 4, 3
    layer = nn.Linear(d_in, d_out).double()
    x = torch.randn(batch, d_in, dtype=torch.float64)
    if case.startswith("mse"):
        y = torch.randn(batch, d_out, dtype=torch.float64)
        loss_fn = nn.MSELoss(reduction=case.split("-")[1])
        count = {"mse-mean": batch * d_out, "mse-sum": 1, "mse-mean-times-4": batch * d_out / 4}[case]
    else:
        y = torch.randint(0, d_out, (batch,))
        y[[1, 4, 5]] = -100  # ignored: no term, no count
        loss_fn = nn.CrossEntropyLoss(ignore_index=-100)
        count = int((y != -100).sum())
        if case == "ce-mean-halved-twice":  # two micro-batches, each loss / 2: w_n = 1 / (2 * counted)
            count = 2 * count
    opt = ngopt.FisherDescent(layer, loss_fn, lr=0.0, scale_memory=0.0, **PLAIN)
    opt.zero_grad()
    if case == "ce-mean-halved-twice":
        for _ in range(2):
            (loss_fn(layer(x), y) / 2).backward()
    elif case == "mse-mean-times-4":  # the loss is 4 L: w_n = 4 / (B d_out), seen as a multiplier on the root
        (4.0 * loss_fn(layer(x), y)).backward()
    else:
        loss_fn(layer(x), y).backward()
    opt.step()
    block = next(iter(opt.blocks.values()))
    assert isinstance(block, GradientScaledEigenbasisBlock)
    state = block.state
    gradient = torch.cat([layer.weight.grad, layer.bias.grad[:, None]], dim=1).numpy()
    rotated = state["basis_out"].numpy().T @ gradient @ state["basis_in"].numpy()
    moment = count * rotated ** 2
    np.testing.assert_allclose(state["gradient_moment"].numpy(), moment, rtol=1e-10, atol=1e-14 * moment.max())
    # The scales: the moment, never below K-FAC's own, the products of the factors' eigenvalues.
    kfac_scales = np.outer(np.linalg.eigvalsh(state["factor_out"].numpy()), np.linalg.eigvalsh(state["factor_in"].numpy()))
    np.testing.assert_allclose(state["scales"].numpy(), np.maximum(moment, kfac_scales), rtol=1e-10,
                               atol=1e-14 * moment.max())
    assert (moment < kfac_scales).any() and (moment > kfac_scales).any()  # both sides of the bound are seen


def test_the_scales_estimate_the_fisher_in_the_basis_at_the_true_parameter():
    # y = x^T w* + e, e ~ N(0, 1/2), x ~ N(0, Sigma): at w* the gradient of the mean squared error has mean
    # zero and E[N V V^T] = 2 Sigma, the Fisher (Casella & Berger), which the gradient moment estimates.  lr=0 keeps w* and one basis (no second
    # inversion); over 3,000 batches the running average (memory 0.998, ~1,000 batches' worth, each
    # entry a scaled chi-square of variance 2) is within about 5% of diag(Q^T 2 Sigma Q); 25% is > 5 sigma.
    generator = torch.Generator().manual_seed(3)
    d = 3
    root = torch.tensor([[1.0, 0.0, 0.0], [0.6, 0.5, 0.0], [-0.3, 0.2, 0.3]], dtype=torch.float64)
    sigma = root @ root.T
    w_true = torch.tensor([[0.5, -1.0, 2.0]], dtype=torch.float64)
    layer = nn.Linear(d, 1, bias=False).double()
    with torch.no_grad():
        layer.weight.copy_(w_true)
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(layer, loss_fn, lr=0.0, scale_memory=0.998, stats_interval=10_000,
                              inverse_interval=10_000, interval_warmup=0, **PLAIN)
    for _ in range(3000):
        x = torch.randn(64, d, generator=generator, dtype=torch.float64) @ root.T
        y = x @ w_true.T + torch.randn(64, 1, generator=generator, dtype=torch.float64) * 0.5 ** 0.5
        opt.zero_grad()
        loss_fn(layer(x), y).backward()
        opt.step()
    state = next(iter(opt.blocks.values())).state
    basis = np.kron(state["basis_in"].numpy(), state["basis_out"].numpy())
    expected = np.diag(basis.T @ (2.0 * sigma.numpy()) @ basis)
    got = state["gradient_moment"].T.reshape(-1).numpy()
    print("gradient moment", got, "Fisher in the basis", expected)
    np.testing.assert_allclose(got, expected, rtol=0.25)


def test_scales_that_overflow_skip_the_step_and_write_nothing():
    # A finite float32 gradient (|g|^2 = 8e37, within float32) whose weighted square does not fit:
    # N R^2 with N = 64 * 64 terms and R up to |g| ~ 9e18 in the basis.  The proposal alone,
    # (S + lambda)^-1 R, would stay finite: only the check of the new scales stops the step.
    torch.manual_seed(0)
    layer = nn.Linear(5, 64)
    x, y = torch.randn(64, 5), torch.randn(64, 64)
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(layer, loss_fn, structure="ekfac-gradient", scale_memory=0.0, seed=0)
    for _ in range(3):
        opt.zero_grad()
        loss_fn(layer(x), y).backward()
        opt.step()
    weights = [p.detach().clone() for p in layer.parameters()]
    states = {id(p): {k: v.clone() for k, v in s.items() if torch.is_tensor(v)} for p, s in opt.state.items()}
    handle = layer.weight.register_hook(lambda g: torch.full_like(g, 5e17))
    opt.zero_grad()
    loss_fn(layer(x), y).backward()
    handle.remove()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        opt.step()
    assert any("skipped" in str(w.message) for w in caught)
    assert opt.diagnostics()["skip_reasons"]["nonfinite_statistics"] == 1
    for before, p in zip(weights, layer.parameters()):
        torch.testing.assert_close(p.detach(), before, rtol=0, atol=0)
    for p, s in opt.state.items():
        for key, value in states[id(p)].items():
            torch.testing.assert_close(s[key], value, rtol=0, atol=0)


def test_a_run_resumes_exactly_from_a_checkpoint():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 3))
    twin = copy.deepcopy(model)
    generator = torch.Generator().manual_seed(1)
    data = [(torch.randn(20, 6, generator=generator), torch.randint(0, 3, (20,), generator=generator))
            for _ in range(9)]
    loss_fn = nn.CrossEntropyLoss()
    settings = dict(structure="ekfac-gradient", stats_interval=3, inverse_interval=4, seed=3)

    def run(net, opt, batches):
        for x, y in batches:
            opt.zero_grad()
            loss_fn(net(x), y).backward()
            opt.step()

    run(model, ngopt.FisherDescent(model, loss_fn, **settings), data)
    first = ngopt.FisherDescent(twin, loss_fn, **settings)
    run(twin, first, data[:5])
    first.remove_hooks()
    resumed = ngopt.FisherDescent(twin, loss_fn, **settings)
    resumed.load_state_dict(first.state_dict())
    assert resumed._term_count == first._term_count == pytest.approx(20, rel=1e-6)  # 1 / mean of float32 1/20
    run(twin, resumed, data[5:])
    for a, b in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(a, b, rtol=0, atol=0)


class Mixed(nn.Module):
    """An embedding, a grouped 1-d convolution and a linear head."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(11, 4)
        self.conv = nn.Conv1d(4, 4, 3, groups=2, padding=1)
        self.head = nn.Linear(4, 5)

    def forward(self, tokens):
        h = self.conv(self.embed(tokens).transpose(1, 2)).relu()
        return self.head(h.mean(dim=2))


def test_embeddings_and_grouped_convolutions_keep_sampled_scales_and_train():
    torch.manual_seed(0)
    model = Mixed()
    tokens, y = torch.randint(0, 11, (16, 7)), torch.randint(0, 5, (16,))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, structure="ekfac-gradient", seed=0)
    losses = []
    for _ in range(15):
        opt.zero_grad()
        loss = loss_fn(model(tokens), y)
        loss.backward()
        opt.step()
        losses.append(float(loss))
    kinds = {name: type(block) for name, block in opt.blocks.items()}
    assert kinds == {"embed": EmbeddingEigenbasisBlock, "conv": GroupedEigenbasisBlock,
                     "head": GradientScaledEigenbasisBlock}
    assert "scale_memory=0.9" in repr(opt) and "ekfac-gradient" in repr(opt)
    assert losses[-1] < 0.7 * losses[0], losses


def test_scale_memory_is_checked_and_a_pinned_block_follows_the_gradient():
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 2))
    for bad in (1.0, -0.1, float("nan")):
        with pytest.raises(ValueError, match="scale_memory"):
            ngopt.FisherDescent(model, nn.MSELoss(), structure="ekfac-gradient", scale_memory=bad)
    with pytest.raises(TypeError, match="scale_memory"):
        ngopt.FisherDescent(model, nn.MSELoss(), scale_memory="0.9")
    opt = ngopt.FisherDescent(model, nn.MSELoss(), pinned_structures={"2": "ekfac-gradient"}, seed=0)
    x, y = torch.randn(8, 3), torch.randn(8, 2)
    opt.zero_grad()
    nn.MSELoss()(model(x), y).backward()
    opt.step()
    assert type(opt.blocks["2"]) is GradientScaledEigenbasisBlock
    assert opt.blocks["0"].structure == "kfac"
    assert "scale_memory" in repr(opt)


def test_a_model_where_no_block_can_follow_the_gradient_is_told_so():
    # An embedding and a norm layer only: "ekfac-gradient" would silently be plain EKFAC.
    model = nn.Sequential(nn.Embedding(10, 4), nn.LayerNorm(4))
    opt = ngopt.FisherDescent(model, nn.MSELoss(), structure="ekfac-gradient", seed=0)
    with pytest.warns(UserWarning, match="no block takes its scales from the gradient"):
        model(torch.randint(0, 10, (6, 3)))
    assert not opt._follows_gradient() and len(opt.blocks) == 2
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        mixed = Mixed()
        ngopt.FisherDescent(mixed, nn.CrossEntropyLoss(), structure="ekfac-gradient").assign_curvature(
            torch.randint(0, 11, (2, 5)))


@pytest.mark.parametrize("weight_decay", [0.0, 0.1])
def test_one_plain_step_is_the_damped_scales_inverse_in_the_basis(weight_decay):
    # lr=1, no momentum, no bounds: w_new = w - Q_G [(Q_G^T (V + decay W) Q_A) / (S + lambda)] Q_A^T with the
    # step's basis and scales, computed here in float64 numpy (the gradient reused from the scales' update
    # without decay, rotated again with it).
    torch.manual_seed(1)
    layer = nn.Linear(4, 3).double()
    x, y = torch.randn(10, 4, dtype=torch.float64), torch.randn(10, 3, dtype=torch.float64)
    loss_fn = nn.MSELoss()
    opt = ngopt.FisherDescent(layer, loss_fn, lr=1.0, weight_decay=weight_decay, damping=0.05, loss_floor=None,
                              **PLAIN)
    before = torch.cat([layer.weight, layer.bias[:, None]], dim=1).detach().numpy().copy()
    opt.zero_grad()
    loss_fn(layer(x), y).backward()
    gradient = torch.cat([layer.weight.grad, layer.bias.grad[:, None]], dim=1).numpy() + weight_decay * before
    opt.step()
    state = next(iter(opt.blocks.values())).state
    q_in, q_out = state["basis_in"].numpy(), state["basis_out"].numpy()
    step = q_out @ ((q_out.T @ gradient @ q_in) / (state["scales"].numpy() + 0.05)) @ q_in.T
    after = torch.cat([layer.weight, layer.bias[:, None]], dim=1).detach().numpy()
    np.testing.assert_allclose(after, before - step, rtol=1e-10, atol=1e-12)


def test_float32_eigendecompositions_of_ill_conditioned_factors_hold_their_stated_accuracy():
    # Factors of condition 1e8 at the bottom of the damping range (1e-6): the float32 decomposition's basis is
    # orthonormal to float32 rounding and its eigenvalues match numpy's float64 ones within a few n eps |A|
    # (the backward error of a symmetric eigensolver, Golub & Van Loan, 4th ed., sec. 8.3), so the bound by
    # K-FAC's scales is off by at most about 1e-7 of the largest; the preconditioned gradient stays a descent
    # direction (g^T C^-1 g > 0).
    generator = torch.Generator().manual_seed(5)
    layer = nn.Linear(15, 11)
    opt = ngopt.FisherDescent(layer, nn.MSELoss(), structure="ekfac-gradient", damping=1e-6, seed=0)
    opt.assign_curvature(torch.randn(4, 15))
    block = next(iter(opt.blocks.values()))
    statistics = {}
    for side, d in (("in", 16), ("out", 11)):
        q = orthogonal(d, generator)
        spectrum = torch.logspace(0, -8, d, dtype=torch.float64)
        statistics[f"factor_{side}"] = (q @ torch.diag(spectrum) @ q.T).float()
    result, _ = block.prepare_inverse(statistics, 1e-6, False)
    eps = torch.finfo(torch.float32).eps
    for side, d in (("in", 16), ("out", 11)):
        basis = result[f"basis_{side}"].double()
        assert basis.dtype == torch.float64 and result[f"basis_{side}"].dtype == torch.float32
        np.testing.assert_allclose((basis.T @ basis).numpy(), np.eye(d), atol=10 * d * eps)
        exact = np.linalg.eigvalsh(statistics[f"factor_{side}"].double().numpy())
        got = result[f"eigen_{side}"].double().numpy()
        assert np.abs(got - np.clip(exact, 0, None)).max() <= 10 * d * eps * exact.max()
    view = dict(result)
    gradient = torch.randn(11, 16, generator=generator)
    rotated = block.rotated(view, gradient)
    view.update(block.gradient_scales(view, rotated, 8.0, 0.9, rebased=True))
    direction = block.precondition(gradient, 1e-6, view)
    assert torch.isfinite(direction).all() and float((direction * gradient).sum()) > 0
