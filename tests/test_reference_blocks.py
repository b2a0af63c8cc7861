"""Curvature blocks against independent float64 computations.

References: numpy.kron / numpy.linalg for the Kronecker algebra; the exact
per-layer Fisher built with torch.func (vmap + jacrev per-example Jacobians);
brute-force input patches cut out with numpy slicing for convolutions; plain
autograd for output gradients.  None of them goes through ngopt's capture hooks.

Scale of the Fisher: for a criterion ``L = c sum_n l_n`` (``c = 1/#terms`` for
``mean``, 1 for ``sum``) the Fisher the optimizer approximates is

    F = c sum_n J_n^T H_n J_n,   H_n = E_{y ~ p(y|f_n)}[grad_f l grad_f l^T],

``J_n`` the Jacobian of the network output for example ``n`` in the layer's
parameters (Martens & Grosse 2015, sec. 9).  ``H = 2 I`` for ``MSELoss`` (the term
``(y - f)^2`` is the NLL of N(f, 1/2)), and for ``CrossEntropyLoss`` the
expectation over the ``K`` classes in closed form:
``F = c sum_n sum_k p_nk grad l_n(k) grad l_n(k)^T`` (``= J^T (diag p - p p^T) J``).
Block ordering: column-major vec of the ``[d_out, d_in (+bias column last)]``
gradient matrix (API of ``dense_curvature``).
"""
from __future__ import annotations

import copy
import math
import warnings

import numpy as np
import pytest
import torch
from torch import nn
from torch.func import functional_call, jacrev, vmap

import ngopt

EXACT_RTOL = 1e-12
Z_BOUND = 5.0  # Monte Carlo checks allow 5 standard errors (normal two-sided tail 5.7e-7 per entry)


def recorded_optimizer(model, loss_fn, inputs, targets, *, fisher="exact", structure="kfac", samples=1,
                       stats_memory=0.0, damping=1e-3, lr=1e-3, seed=0, weight_sharing="expand"):
    """An optimizer after one recorded forward/backward and ``step()`` (statistics of the pre-step weights)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # empirical-Fisher advice
        opt = ngopt.FisherDescent(model, loss_fn, lr=lr, momentum=0.0, weight_decay=0.0, damping=damping,
                                  fisher=fisher, structure=structure, stats_interval=1, inverse_interval=1,
                                  stats_memory=stats_memory, max_step_kl=None, fisher_samples=samples, seed=seed,
                                  weight_sharing=weight_sharing, step_rule="fixed", damping_rule="fixed",
                                  stats_fraction=1.0)
    opt.zero_grad()
    loss_fn(model(inputs), targets).backward()
    opt.step()
    return opt


def relative_error(estimate, reference):
    return float(torch.linalg.norm(estimate - reference) / torch.linalg.norm(reference))


# ----------------------------------------------------------------------------- torch.func reference
def supported_layers(model):
    return [(name or type(m).__name__, name, m) for name, m in model.named_modules()
            if isinstance(m, (nn.Linear, nn.Conv2d))]


def per_example_jacobians(model, inputs):
    """``{block name: [N, O, P]}``: Jacobian of each example's flattened output in the layer's parameters.

    torch.func.vmap over examples of torch.func.jacrev of a functional_call; the
    parameter axis ``P`` is put in the block ordering (weight matrix columns, bias last, column-major).
    """
    params = {k: v.detach() for k, v in model.named_parameters()}

    def flat_output(p, example):
        return functional_call(model, p, (example.unsqueeze(0),)).reshape(-1)

    jac = vmap(jacrev(flat_output), in_dims=(None, 0))(params, inputs)
    result = {}
    for block_name, name, module in supported_layers(model):
        prefix = f"{name}." if name else ""
        weight = jac[prefix + "weight"]
        n, o = weight.shape[:2]
        parts = [weight.reshape(n, o, module.weight.shape[0], -1)]
        if module.bias is not None:
            parts.append(jac[prefix + "bias"].reshape(n, o, -1, 1))
        result[block_name] = torch.cat(parts, -1).transpose(-1, -2).reshape(n, o, -1)
    return result


def per_class_gradients(jacobian, prob):
    """``grad_theta l_n(k) = -J_n^T (e_k - p_n)`` for every class ``k``: ``[N, K, P]`` (softmax cross-entropy)."""
    eye = torch.eye(prob.shape[1], dtype=prob.dtype)
    return -torch.einsum("nkp,nyk->nyp", jacobian, eye.unsqueeze(0) - prob.unsqueeze(1))


def exact_layer_fisher(model, inputs, criterion):
    """``{block name: F}`` for ``MSELoss()`` or ``CrossEntropyLoss()`` with mean reduction."""
    with torch.no_grad():
        output = model(inputs)
    jacobians = per_example_jacobians(model, inputs)
    if criterion == "mse":
        c = 1.0 / output.numel()
        return {k: 2.0 * c * torch.einsum("nop,noq->pq", j, j) for k, j in jacobians.items()}
    c = 1.0 / output.shape[0]
    prob = torch.softmax(output, dim=1)
    fishers = {}
    for key, jacobian in jacobians.items():
        grads = per_class_gradients(jacobian, prob)
        fishers[key] = c * torch.einsum("ny,nyp,nyq->pq", prob, grads, grads)
    return fishers


def mlp():
    return nn.Sequential(nn.Linear(5, 4), nn.Tanh(), nn.Linear(4, 3))


def cnn():
    return nn.Sequential(nn.Conv2d(1, 2, 3), nn.Tanh(), nn.Flatten(), nn.Linear(2 * 4 * 4, 3))


NETWORKS = {"linear": (lambda: nn.Linear(5, 3), (5,)), "mlp": (mlp, (5,)), "cnn": (cnn, (1, 6, 6))}


def network_problem(kind, criterion, n=20, seed=1):
    torch.manual_seed(seed)
    build, shape = NETWORKS[kind]
    model = build().double()
    inputs = torch.randn((n,) + shape, dtype=torch.float64)
    if criterion == "mse":
        return model, inputs, torch.randn(n, 3, dtype=torch.float64), nn.MSELoss()
    return model, inputs, torch.randint(0, 3, (n,)), nn.CrossEntropyLoss()


# ----------------------------------------------------------------------------- Kronecker algebra
def random_spd(rng, size):
    root = rng.normal(size=(size, size))
    return root @ root.T + size * np.eye(size)


def test_kronecker_identities_numpy():
    # numpy.kron: (A (x) B)^-1 = A^-1 (x) B^-1 and (A (x) B) vec(X) = vec(B X A^T) with the
    # column-major vec (Van Loan, "The ubiquitous Kronecker product", 2000, from memory).
    rng = np.random.default_rng(50)
    a, b = random_spd(rng, 4), random_spd(rng, 3)
    x = rng.normal(size=(3, 4))
    np.testing.assert_allclose(np.linalg.inv(np.kron(a, b)), np.kron(np.linalg.inv(a), np.linalg.inv(b)),
                               rtol=1e-10, atol=1e-14)
    vec = lambda m: m.reshape(-1, order="F")
    np.testing.assert_allclose(np.kron(a, b) @ vec(x), vec(b @ x @ a.T), rtol=1e-12)
    # A non-symmetric A checks the transpose in B X A^T.
    a_general = rng.normal(size=(4, 4))
    np.testing.assert_allclose(np.kron(a_general, b) @ vec(x), vec(b @ x @ a_general.T), rtol=1e-12, atol=1e-12)


def test_kronecker_block_preconditions_like_numpy_solve_with_factored_damping():
    # numpy.linalg.solve(kron(A_d, G_d), vec(grad)) with the factored Tikhonov damping
    # A_d = A + pi sqrt(lambda) I, G_d = G + sqrt(lambda)/pi I, pi^2 = (tr A/dim A)/(tr G/dim G)
    # (Martens & Grosse 2015, sec. 6.3), computed here from the block's own factors.
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    damping, lr = 0.05, 0.7
    before = copy.deepcopy(model)
    opt = recorded_optimizer(model, loss_fn, inputs, targets, damping=damping, lr=lr)
    for name, index in (("0", 0), ("2", 2)):
        block, layer_before, layer_after = opt.blocks[name], before[index], model[index]
        state = opt.state[layer_after.weight]
        factor_in, factor_out = state["factor_in"].numpy(), state["factor_out"].numpy()
        np.testing.assert_allclose(block.dense_curvature().numpy(), np.kron(factor_in, factor_out), rtol=1e-14)
        pi = math.sqrt((np.trace(factor_in) / len(factor_in)) / (np.trace(factor_out) / len(factor_out)))
        damped = np.kron(factor_in + pi * math.sqrt(damping) * np.eye(len(factor_in)),
                         factor_out + math.sqrt(damping) / pi * np.eye(len(factor_out)))
        np.testing.assert_allclose(block.dense_curvature(damping).numpy(), damped, rtol=1e-12)

        grad = np.hstack([layer_after.weight.grad.numpy(), layer_after.bias.grad.numpy()[:, None]])
        expected = np.linalg.solve(damped, grad.reshape(-1, order="F")).reshape(grad.shape, order="F")
        direction = block.precondition(torch.as_tensor(grad), damping).numpy()
        np.testing.assert_allclose(direction, expected, rtol=1e-9, atol=1e-12)
        # damped_product is the same matrix applied to vec(V): kron(A_d, G_d) vec(V) = vec(G_d V A_d).
        product = block.damped_product(torch.as_tensor(expected), damping).numpy()
        np.testing.assert_allclose(product, grad, rtol=1e-9, atol=1e-12)
        # The step (momentum 0, no trust bound) moved the layer by -lr times that direction.
        moved = np.hstack([(layer_after.weight - layer_before.weight).detach().numpy(),
                           (layer_after.bias - layer_before.bias).detach().numpy()[:, None]])
        np.testing.assert_allclose(moved, -lr * expected, rtol=1e-9, atol=1e-12)



@pytest.mark.parametrize("damping", [0.05, 1e-6])
def test_single_precision_block_inverses_match_numpy_at_both_ends_of_the_damping_range(damping):
    # A float32 network keeps float32 factors; each is inverted in float32 where the damping keeps it well
    # conditioned, else in float64 (ngopt/linalg.py), and stored in float32.  A float32 Cholesky inverse
    # is accurate to about cond * 6e-8 relative (Higham, Accuracy and Stability of Numerical Algorithms,
    # ch. 14; 10x for the constant); a float64 one rounded to float32 to 6e-8.  So the error may grow
    # with cond, but never beyond 1e-4 (cond <= 1e3 on the float32 path) nor 1e-6 on the float64 path.
    # Measured: cond 2-5 at damping 0.05, up to 477 at 1e-6 (the bottom of the default damping range),
    # errors 2e-8 to 1.7e-5.
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    model, inputs = model.float(), inputs.float()
    opt = recorded_optimizer(model, loss_fn, inputs, targets, damping=damping)
    for name, index in (("0", 0), ("2", 2)):
        state = opt.state[model[index].weight]
        assert state["factor_in"].dtype == state["inverse_in"].dtype == torch.float32
        factor_in, factor_out = state["factor_in"].double().numpy(), state["factor_out"].double().numpy()
        pi = math.sqrt((np.trace(factor_in) / len(factor_in)) / (np.trace(factor_out) / len(factor_out)))
        shifts = (pi * math.sqrt(damping), math.sqrt(damping) / pi)
        for key, factor, shift in (("inverse_in", factor_in, shifts[0]), ("inverse_out", factor_out, shifts[1])):
            damped = 0.5 * (factor + factor.T) + shift * np.eye(len(factor))
            expected = np.linalg.inv(damped)
            error = np.linalg.norm(state[key].double().numpy() - expected) / np.linalg.norm(expected)
            condition = np.linalg.cond(damped)
            tolerance = min(1e-4, max(1e-6, 10 * condition * 6e-8)) if condition <= 1e3 else 1e-6
            assert error < tolerance, (name, key, error, condition)

# ----------------------------------------------------------------------------- K-FAC vs exact Fisher
# Relative Frobenius errors |A (x) G - F| / |F| measured with (the test prints them)
#   python -m pytest tests/test_reference_blocks.py -k kronecker_block_against_exact -s
# (seed 1, N = 20): linear/MSE 1.6e-16, linear/CE 0.1206, mlp/MSE: first layer 0.2663, last 1.5e-16,
# mlp/CE 0.2742 and 0.0639, cnn/MSE: conv 0.5699, last 1.6e-16, cnn/CE conv 0.6443, last 0.0424.
# "exact" where K-FAC theory says so: a layer whose output feeds a Gaussian (MSE) output directly has
# F = c sum_n (a a^T) (x) 2I = (mean a a^T) (x) (2 c N I).  Elsewhere: the measured value times 1.25,
# and at least 1e-3, since the Kronecker form is then provably not exact (the output Fisher varies with n).
KRONECKER_ERRORS = {
    ("linear", "mse"): {"Linear": "exact"},
    ("linear", "ce"): {"Linear": 0.1206},
    ("mlp", "mse"): {"0": 0.2663, "2": "exact"},
    ("mlp", "ce"): {"0": 0.2742, "2": 0.0639},
    ("cnn", "mse"): {"0": 0.5699, "3": "exact"},
    ("cnn", "ce"): {"0": 0.6443, "3": 0.0424},
}


@pytest.mark.parametrize("kind, criterion", list(KRONECKER_ERRORS))
def test_kronecker_block_against_exact_per_layer_fisher(kind, criterion):
    model, inputs, targets, loss_fn = network_problem(kind, criterion)
    reference = exact_layer_fisher(copy.deepcopy(model), inputs, criterion)
    opt = recorded_optimizer(model, loss_fn, inputs, targets)
    for name, expected in KRONECKER_ERRORS[(kind, criterion)].items():
        error = relative_error(opt.blocks[name].dense_curvature(), reference[name])
        print(f"K-FAC vs exact Fisher, {kind}/{criterion} layer {name}: relative error {error:.4g}")
        if expected == "exact":
            assert error <= EXACT_RTOL, name
        else:
            assert 1e-3 <= error <= 1.25 * expected, (name, error)


def bias_rows(per_class, out_dim):
    """The bias part of block-ordered gradients (the last ``d_out`` entries): ``dl/ds`` of a dense layer."""
    return per_class[..., -out_dim:]


def test_kronecker_factors_of_mlp_equal_their_definition():
    # K-FAC (Martens & Grosse 2015, eq. 1-3) with the exact expectation over the predictive
    # distribution: A = mean_n [a;1][a;1]^T from the layer inputs (a plain forward), and
    # G = c sum_n sum_k p_nk (dl_n(k)/ds)(dl_n(k)/ds)^T, with dl/ds the bias gradient (torch.func).
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    reference_model = copy.deepcopy(model)
    opt = recorded_optimizer(model, loss_fn, inputs, targets)
    with torch.no_grad():
        layer_inputs = {"0": inputs, "2": torch.tanh(reference_model[0](inputs))}
        prob = torch.softmax(reference_model(inputs), dim=1)
    jacobians = per_example_jacobians(reference_model, inputs)
    c = 1.0 / len(inputs)
    for name, index in (("0", 0), ("2", 2)):
        rows = torch.cat([layer_inputs[name], torch.ones(len(inputs), 1, dtype=torch.float64)], 1)
        factor_in = rows.T @ rows / len(inputs)
        slopes = bias_rows(per_class_gradients(jacobians[name], prob), reference_model[index].out_features)
        factor_out = c * torch.einsum("ny,nyi,nyj->ij", prob, slopes, slopes)
        state = opt.state[model[index].weight]
        torch.testing.assert_close(state["factor_in"], factor_in, rtol=EXACT_RTOL, atol=1e-14)
        torch.testing.assert_close(state["factor_out"], factor_out, rtol=EXACT_RTOL, atol=1e-14)


# ----------------------------------------------------------------------------- diagonal curvature
@pytest.mark.parametrize("kind", list(NETWORKS))
@pytest.mark.parametrize("criterion", ["mse", "ce"])
def test_diagonal_block_is_exact_diagonal_of_layer_fisher(kind, criterion):
    # diag(F) of the torch.func exact Fisher, for any network: the diagonal block sums squared
    # per-example (per-class) gradients, with no Kronecker approximation.  Measured errors 1e-16.
    model, inputs, targets, loss_fn = network_problem(kind, criterion)
    reference = exact_layer_fisher(copy.deepcopy(model), inputs, criterion)
    opt = recorded_optimizer(model, loss_fn, inputs, targets, structure="diag")
    for name, fisher in reference.items():
        assert relative_error(torch.diag(opt.blocks[name].dense_curvature()), torch.diag(fisher)) <= EXACT_RTOL


@pytest.mark.parametrize("kind", list(NETWORKS))
def test_diagonal_block_is_exact_diagonal_of_empirical_fisher(kind):
    # Empirical Fisher of a mean cross-entropy: (1/N) sum_n grad l_n(y_n) grad l_n(y_n)^T with the observed
    # labels; per-example gradients from torch.func (the y_n row of the per-class gradients).
    model, inputs, targets, loss_fn = network_problem(kind, "ce")
    reference_model = copy.deepcopy(model)
    with torch.no_grad():
        prob = torch.softmax(reference_model(inputs), dim=1)
    jacobians = per_example_jacobians(reference_model, inputs)
    opt = recorded_optimizer(model, loss_fn, inputs, targets, fisher="empirical", structure="diag")
    for name, jacobian in jacobians.items():
        observed = per_class_gradients(jacobian, prob)[torch.arange(len(targets)), targets]
        expected = observed.square().mean(0)
        assert relative_error(torch.diag(opt.blocks[name].dense_curvature()), expected) <= EXACT_RTOL


# ----------------------------------------------------------------------------- sampled Fisher
@pytest.mark.parametrize("samples", [16, 400])
def test_sampled_fisher_within_monte_carlo_error_of_exact(samples):
    # The sampled estimate averages, over N examples and S independent draws y ~ p(y|x_n), statistics
    # X(n, y) whose expectation over y is the exact one (closed form above).  Its standard error per
    # entry is therefore c sqrt(sum_n Var_y X(n, y) / S), with Var_y by enumerating the K classes.
    # Diagonal block: X = (dl_n(y)/dtheta_i)^2; Kronecker output factor: X = (dl/ds)_i (dl/ds)_j.
    # Both S values must sit within Z_BOUND standard errors: the error shrinks like 1/sqrt(S).
    model, inputs, targets, loss_fn = network_problem("mlp", "ce")
    with torch.no_grad():
        model[2].weight.mul_(6.0)  # confident, uneven predictions (p from 0.0008 to 0.98), not near-uniform ones
    reference_model = copy.deepcopy(model)
    with torch.no_grad():
        prob = torch.softmax(reference_model(inputs), dim=1)
    jacobians = per_example_jacobians(reference_model, inputs)
    c = 1.0 / len(inputs)

    def mean_and_error(statistic):  # statistic: [N, K, ...] values of X(n, y)
        weights = prob.reshape(prob.shape + (1,) * (statistic.dim() - 2))
        mean = (weights * statistic).sum(1)
        variance = (weights * (statistic - mean.unsqueeze(1)).square()).sum(1)
        return c * mean.sum(0), c * torch.sqrt(variance.sum(0) / samples)

    diag_opt = recorded_optimizer(copy.deepcopy(model), loss_fn, inputs, targets, fisher="sampled",
                                  structure="diag", samples=samples, seed=60)
    kfac_opt = recorded_optimizer(model, loss_fn, inputs, targets, fisher="sampled", samples=samples, seed=61)
    for name, index in (("0", 0), ("2", 2)):
        grads = per_class_gradients(jacobians[name], prob)
        expected, error = mean_and_error(grads.square())
        estimate = torch.diag(diag_opt.blocks[name].dense_curvature())
        assert bool(((estimate - expected).abs() <= Z_BOUND * error).all()), name
        slopes = bias_rows(grads, reference_model[index].out_features)
        expected, error = mean_and_error(slopes.unsqueeze(-1) * slopes.unsqueeze(-2))
        estimate = kfac_opt.state[model[index].weight]["factor_out"]
        assert bool(((estimate - expected).abs() <= Z_BOUND * error).all()), name


# ----------------------------------------------------------------------------- convolution factors
def brute_force_patches(inputs, conv):
    """Input patches ``[N, positions, C*kh*kw]`` cut out by numpy slicing, in the weight's (c, i, j) order."""
    x = inputs.numpy()
    kernel, stride, dilation = conv.kernel_size, conv.stride, conv.dilation
    if conv.padding == "same":  # total d(k-1) per dimension, the odd one on the far side (PyTorch docs)
        pads = [(d * (k - 1) // 2, d * (k - 1) - d * (k - 1) // 2) for k, d in zip(kernel, dilation)]
    else:
        pads = [(p, p) for p in conv.padding]
    mode = {"zeros": "constant", "reflect": "reflect", "replicate": "edge", "circular": "wrap"}[conv.padding_mode]
    padded = np.pad(x, [(0, 0), (0, 0)] + pads, mode=mode)          # numpy.pad
    spans = [d * (k - 1) + 1 for k, d in zip(kernel, dilation)]
    out_h = (padded.shape[2] - spans[0]) // stride[0] + 1
    out_w = (padded.shape[3] - spans[1]) // stride[1] + 1
    patches = np.empty((x.shape[0], out_h * out_w, x.shape[1] * kernel[0] * kernel[1]))
    for i in range(out_h):
        for j in range(out_w):
            top, left = i * stride[0], j * stride[1]
            window = padded[:, :, top:top + spans[0]:dilation[0], left:left + spans[1]:dilation[1]]
            patches[:, i * out_w + j] = window.reshape(x.shape[0], -1)
    return torch.as_tensor(patches), (out_h, out_w)


CONV_SETTINGS = [
    dict(kernel_size=3),
    dict(kernel_size=3, stride=2, padding=1),
    dict(kernel_size=(2, 3), stride=(1, 2), padding=(1, 0), dilation=(2, 1)),
    dict(kernel_size=3, padding="same", padding_mode="reflect"),
    dict(kernel_size=2, padding="same"),                          # odd total padding: asymmetric
    dict(kernel_size=(3, 2), padding="same", dilation=2, padding_mode="replicate"),
    dict(kernel_size=3, padding=1, padding_mode="circular", stride=(2, 1)),
]


def conv_output_gradients(conv_model, inputs, targets, fisher):
    """``(rows [N, T, C_out], per-row weights)`` of the output gradients by plain autograd on a copy.

    ``empirical``: dL/ds of the mean cross-entropy with the observed labels, weight 1.
    ``exact``: for every class k, dl_n(k)/ds (summed loss, so per example), weight p_nk.
    """
    outputs = conv_model[0](inputs)
    logits = conv_model[1:](outputs)
    flat = lambda g: g.flatten(2).transpose(1, 2)
    if fisher == "empirical":
        grad, = torch.autograd.grad(nn.functional.cross_entropy(logits, targets), outputs)
        return [(flat(grad), torch.ones(len(inputs), dtype=torch.float64))]
    prob = torch.softmax(logits, dim=1).detach()
    pieces = []
    for k in range(logits.shape[1]):
        labels = torch.full_like(targets, k)
        grad, = torch.autograd.grad(nn.functional.cross_entropy(logits, labels, reduction="sum"), outputs,
                                    retain_graph=True)
        pieces.append((flat(grad), prob[:, k]))
    return pieces


@pytest.mark.filterwarnings("ignore:Using padding='same' with even kernel lengths")  # torch's own note
@pytest.mark.parametrize("settings", CONV_SETTINGS, ids=lambda s: ",".join(f"{k}={v}" for k, v in s.items()))
@pytest.mark.parametrize("bias", [True, False])
@pytest.mark.parametrize("fisher", ["empirical", "exact"])
def test_conv2d_factors_against_brute_force_patches(settings, bias, fisher):
    # KFC (Grosse & Martens 2016) in this package's scaling: A = mean over examples and output positions
    # of [patch; 1][patch; 1]^T, G = (1/c) sum over examples and positions of g g^T with g the output
    # gradient as the mean loss scales it (c = 1/N): empirical g = dL/ds; exact: sum over classes of
    # p_nk (c dl_n(k)/ds)(c dl_n(k)/ds)^T.
    torch.manual_seed(70)
    conv = nn.Conv2d(2, 3, bias=bias, **settings).double()
    inputs = torch.randn(3, 2, 7, 8, dtype=torch.float64)
    patches, (out_h, out_w) = brute_force_patches(inputs, conv)
    # The reference patches reproduce the layer: conv(x) = patches @ W^T (+ b) (torch.nn.Conv2d).
    with torch.no_grad():
        direct = conv(inputs).flatten(2).transpose(1, 2)
    rebuilt = patches @ conv.weight.detach().reshape(3, -1).T + (conv.bias.detach() if bias else 0.0)
    torch.testing.assert_close(rebuilt, direct, rtol=1e-12, atol=1e-12)

    model = nn.Sequential(conv, nn.Tanh(), nn.Flatten(), nn.Linear(3 * out_h * out_w, 4)).double()
    targets = torch.randint(0, 4, (3,))
    pieces = conv_output_gradients(copy.deepcopy(model), inputs, targets, fisher)
    opt = recorded_optimizer(model, nn.CrossEntropyLoss(), inputs, targets, fisher=fisher)

    rows = torch.cat([patches, torch.ones(patches.shape[:2] + (1,), dtype=torch.float64)], -1) if bias else patches
    factor_in = torch.einsum("nti,ntj->ij", rows, rows) / (rows.shape[0] * rows.shape[1])
    c = 1.0 / len(inputs)
    if fisher == "empirical":
        (grad, _), = pieces
        factor_out = torch.einsum("nti,ntj->ij", grad, grad) / c
        # The rows also reproduce the weight gradient: sum over positions of g a^T (autograd's .grad).
        gradient = torch.einsum("nto,nti->oi", grad, rows)
        autograd = conv.weight.grad.reshape(3, -1)
        if bias:
            autograd = torch.cat([autograd, conv.bias.grad[:, None]], 1)
        torch.testing.assert_close(gradient, autograd, rtol=1e-10, atol=1e-14)
    else:
        factor_out = sum(torch.einsum("n,nti,ntj->ij", weight, c * grad, c * grad) for grad, weight in pieces) / c
    state = opt.state[conv.weight]
    torch.testing.assert_close(state["factor_in"], factor_in, rtol=EXACT_RTOL, atol=1e-13)
    torch.testing.assert_close(state["factor_out"], factor_out, rtol=1e-10, atol=1e-14)


# ----------------------------------------------------------------------------- linear with positions
def positional_problem(positions, seed):
    """``nn.Linear(4, 3)`` applied at every position of inputs ``[6, *positions, 4]``, with regression targets."""
    torch.manual_seed(seed)
    model = nn.Linear(4, 3).double()
    inputs = torch.randn((6,) + positions + (4,), dtype=torch.float64)
    return model, inputs, torch.randn((6,) + positions + (3,), dtype=torch.float64)


@pytest.mark.parametrize("positions", [(5,), (2, 3)])
def test_linear_with_leading_dims_exact_fisher(positions):
    # A single nn.Linear applied at every position of [N, *positions, d] with MSELoss: the torch.func
    # Fisher c sum_n J_n^T 2I J_n is (mean over rows x x^T) (x) (2 c N T I): Kronecker form exact.
    model, inputs, targets = positional_problem(positions, seed=80)
    reference = exact_layer_fisher(copy.deepcopy(model), inputs, "mse")["Linear"]
    opt = recorded_optimizer(model, nn.MSELoss(), inputs, targets)
    assert relative_error(opt.blocks["Linear"].dense_curvature(), reference) <= EXACT_RTOL


@pytest.mark.parametrize("positions", [(5,), (2, 3)])
def test_linear_with_leading_dims_empirical_factors(positions):
    # Rows are all N*T positions: A = mean over rows [x;1][x;1]^T, G = sum over rows of dL/ds dL/ds^T for
    # a summed loss (c = 1); dL/ds from plain autograd on a copy.
    model, inputs, targets = positional_problem(positions, seed=81)
    reference = copy.deepcopy(model)
    outputs = reference(inputs)
    slope, = torch.autograd.grad(nn.functional.mse_loss(outputs, targets, reduction="sum"), outputs)
    opt = recorded_optimizer(model, nn.MSELoss(reduction="sum"), inputs, targets, fisher="empirical")
    rows = torch.cat([inputs, torch.ones(inputs.shape[:-1] + (1,), dtype=torch.float64)], -1).reshape(-1, 5)
    slope = slope.reshape(-1, 3)
    state = opt.state[model.weight]
    torch.testing.assert_close(state["factor_in"], rows.T @ rows / len(rows), rtol=EXACT_RTOL, atol=1e-14)
    torch.testing.assert_close(state["factor_out"], slope.T @ slope, rtol=EXACT_RTOL, atol=1e-14)


# ----------------------------------------------------------------------------- first refresh
def test_first_refresh_sets_statistics_outright_then_blends():
    # API.md behaviour 5: with stats_memory = 0.9 the first factors are this batch's statistics, not
    # 0.1 x them (no blend with zeros) nor a blend with the identity; the second refresh is
    # 0.9 old + 0.1 new (the running-average definition of stats_memory).  Batch statistics of a single
    # linear layer with MSE and the exact Fisher: A = mean [x;1][x;1]^T (numpy), G = (2/outputs) I
    # (c = 1/(N outputs), H = 2I: G = (1/c) c^2 sum_n 2I).
    torch.manual_seed(90)
    model = nn.Linear(4, 3).double()
    batches = [(torch.randn(10, 4, dtype=torch.float64), torch.randn(10, 3, dtype=torch.float64)) for _ in range(2)]

    def input_factor(x):
        rows = np.hstack([x.numpy(), np.ones((len(x), 1))])
        return rows.T @ rows / len(rows)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loss_fn = nn.MSELoss()
        opt = ngopt.FisherDescent(model, loss_fn, lr=0.1, momentum=0.0, damping=1e-3, fisher="exact",
                                  stats_interval=1, inverse_interval=1, stats_memory=0.9, max_step_kl=None)
    expected_out = (2.0 / 3.0) * np.eye(3)
    expected_in = None
    for x, y in batches:
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        opt.step()
        expected_in = input_factor(x) if expected_in is None else 0.9 * expected_in + 0.1 * input_factor(x)
        state = opt.state[model.weight]
        np.testing.assert_allclose(state["factor_in"].numpy(), expected_in, rtol=EXACT_RTOL, atol=1e-15)
        np.testing.assert_allclose(state["factor_out"].numpy(), expected_out, rtol=EXACT_RTOL, atol=1e-15)
