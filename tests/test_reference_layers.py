"""Curvature blocks of Conv1d, Embedding, LayerNorm and BatchNorm against independent float64 references.

References: the exact per-layer Fisher ``F = c sum_n J_n^T H_n J_n`` (Martens & Grosse 2015, sec. 9)
with ``J_n`` the Jacobian of the batch output ``f_n`` in the layer's parameters by
``torch.func.jacrev`` (of the whole batch, so batch norm's coupling through the batch statistics
is included), ``H = 2 I`` for ``MSELoss`` and ``diag(p) - p p^T`` for ``CrossEntropyLoss``;
input patches cut out by numpy slicing; numpy.linalg.solve / numpy.kron for the damped solves.
Block ordering (API of ``dense_curvature``): column-major vec of the gradient matrix, written
out here per layer kind without ngopt's adapters: ``[d_out, d_in (+bias)]`` for convolutions,
``W^T`` ``[d, V]`` for embeddings (so: the rows of ``W`` one after the other), ``[C, (gamma, beta)]``
for norm layers (so: all gammas, then all betas).

Measured numbers (``python -m pytest tests/test_reference_layers.py -s`` prints them).
"""
from __future__ import annotations

import copy
import io
import time
import warnings

import numpy as np
import pytest
import torch
from torch import nn
from torch.func import functional_call, jacrev

import ngopt
from ngopt.fisher_probe import exact_layer_fisher as probe_exact_fisher, probe_fisher_quality
from test_reference_blocks import EXACT_RTOL, brute_force_patches, recorded_optimizer, relative_error

PAIR_RTOL = 1e-10


# ----------------------------------------------------------------------------- torch.func reference
def module_name(model, module):
    return next(name for name, m in model.named_modules() if m is module)


def batch_jacobian(model, module, inputs, parameter_names=("weight", "bias")):
    """``{"weight": [N, O, *shape], "bias": ...}``: Jacobian of the flattened batch output in the layer's parameters.

    ``parameter_names``: the module's attributes that play weight and bias (e.g. ``in_proj_weight``).
    """
    prefix = module_name(model, module)
    roles = {name: role for name, role in zip(parameter_names, ("weight", "bias"))
             if getattr(module, name, None) is not None}
    params = {(f"{prefix}.{k}" if prefix else k): getattr(module, k).detach() for k in roles}

    def output(p):
        return functional_call(model, p, (inputs,), strict=False).reshape(len(inputs), -1)

    jac = jacrev(output)(params)
    return output(params).detach(), {roles[k.rsplit(".", 1)[-1]]: v for k, v in jac.items()}


def block_ordered(kind, jac):
    """``[N, O, P]`` in the blocks' ordering, written out per kind (see the module docstring)."""
    weight = jac["weight"]
    n, o = weight.shape[:2]
    if kind == "embedding":  # vec of W^T column-major: row v of W is column v of W^T
        return weight.reshape(n, o, -1)
    if kind == "norm":  # [gamma | beta]
        return torch.cat([weight.reshape(n, o, -1)] + ([jac["bias"].reshape(n, o, -1)] if "bias" in jac else []), -1)
    matrix = weight.reshape(n, o, weight.shape[2], -1)
    if "bias" in jac:
        matrix = torch.cat([matrix, jac["bias"].unsqueeze(-1)], -1)
    return matrix.transpose(-1, -2).reshape(n, o, -1)


def without_running_statistics(model):
    """Batch (and instance) norm on batch statistics only, as in training, minus the buffer updates torch.func refuses."""
    for m in model.modules():
        if isinstance(m, (nn.modules.batchnorm._BatchNorm, nn.modules.instancenorm._InstanceNorm)):
            m.track_running_stats, m.running_mean, m.running_var, m.num_batches_tracked = False, None, None, None
    return model


def exact_fisher(model, module, inputs, kind, criterion, parameter_names=("weight", "bias")):
    """The exact per-layer Fisher of a mean-reduced ``MSELoss`` or ``CrossEntropyLoss`` (training mode)."""
    output, jac = batch_jacobian(model, module, inputs, parameter_names)
    jacobian = block_ordered(kind, jac).detach()
    if criterion == "mse":
        return 2.0 / output.numel() * torch.einsum("nop,noq->pq", jacobian, jacobian)
    prob = torch.softmax(output, dim=1)
    hessian = torch.diag_embed(prob) - prob.unsqueeze(2) * prob.unsqueeze(1)
    return torch.einsum("nop,noq,nqr->pr", jacobian, hessian, jacobian) / len(inputs)


def reference_and_optimizer(model, module_path, inputs, targets, kind, criterion, **options):
    """Exact Fisher of the pre-step weights (on a copy) and an optimizer after one recorded step."""
    reference_model = without_running_statistics(copy.deepcopy(model))
    reference = exact_fisher(reference_model, reference_model.get_submodule(module_path), inputs, kind, criterion)
    loss_fn = nn.MSELoss() if criterion == "mse" else nn.CrossEntropyLoss()
    opt = recorded_optimizer(model, loss_fn, inputs, targets, **options)
    return reference, opt


def targets_for(criterion, n, generator_seed=5, classes=3, dims=None):
    generator = torch.Generator().manual_seed(generator_seed)
    if criterion == "mse":
        return torch.randn(dims, generator=generator, dtype=torch.float64)
    return torch.randint(0, classes, (n,), generator=generator)


def check_eigenbasis_against_exact(block, reference, kfac_error, vocab_basis=None):
    # EKFAC (George et al., NeurIPS 2018): with the exact Fisher as statistics the scales are
    # diag(Q^T F Q), Q the Kronecker eigenbasis; Q S Q^T is then the closest matrix diagonal in Q to F
    # (Frobenius), hence never further from F than K-FAC, which is also diagonal in Q.
    state = block.state
    if vocab_basis is None:  # (torch.kron trips on a mix of row- and column-major operands)
        basis = torch.kron(state["basis_in"].contiguous(), state["basis_out"].contiguous())
    else:
        basis = torch.kron(torch.eye(vocab_basis, dtype=torch.float64), state["basis_out"].contiguous())
    expected = torch.diagonal(basis.T @ reference @ basis)
    assert relative_error(state["scales"].T.reshape(-1), expected) <= 1e-10
    error = relative_error(block.dense_curvature(), reference)
    assert error <= kfac_error + 1e-12
    return error


# ----------------------------------------------------------------------------- Conv1d
def brute_force_patches_1d(inputs, conv):
    """Input patches ``[N, positions, C*k]`` by numpy slicing, in the weight's (c, i) order."""
    x = inputs.numpy()
    (kernel,), (stride,), (dilation,) = conv.kernel_size, conv.stride, conv.dilation
    if conv.padding == "same":  # total d(k-1), the odd one on the far side (PyTorch docs)
        total = dilation * (kernel - 1)
        pad = (total // 2, total - total // 2)
    elif conv.padding == "valid":
        pad = (0, 0)
    else:
        pad = (conv.padding[0], conv.padding[0])
    mode = {"zeros": "constant", "reflect": "reflect", "replicate": "edge", "circular": "wrap"}[conv.padding_mode]
    padded = np.pad(x, [(0, 0), (0, 0), pad], mode=mode)  # numpy.pad
    span = dilation * (kernel - 1) + 1
    length = (padded.shape[2] - span) // stride + 1
    patches = np.stack([padded[:, :, i * stride:i * stride + span:dilation].reshape(x.shape[0], -1)
                        for i in range(length)], axis=1)
    return torch.as_tensor(patches), length


CONV1D_SETTINGS = [
    dict(kernel_size=3),
    dict(kernel_size=3, stride=2, padding=1),
    dict(kernel_size=2, padding=2, dilation=3),
    dict(kernel_size=3, padding="same", padding_mode="reflect"),
    dict(kernel_size=2, padding="same"),                          # odd total padding: asymmetric
    dict(kernel_size=3, padding="same", dilation=2, padding_mode="replicate"),
    dict(kernel_size=3, padding=1, padding_mode="circular", stride=2),
    dict(kernel_size=4, padding="valid", stride=3),
]


@pytest.mark.filterwarnings("ignore:Using padding='same' with even kernel lengths")  # torch's own note
@pytest.mark.parametrize("settings", CONV1D_SETTINGS, ids=lambda s: ",".join(f"{k}={v}" for k, v in s.items()))
@pytest.mark.parametrize("bias", [True, False])
def test_conv1d_factors_against_brute_force_patches(settings, bias):
    # KFC (Grosse & Martens 2016) in this package's scaling: A = mean over examples and output positions
    # of [patch; 1][patch; 1]^T, G = (1/c) sum over examples and positions of g g^T, g = dL/ds of the
    # mean cross-entropy with the observed labels (empirical Fisher, c = 1/N), by plain autograd.
    torch.manual_seed(30)
    conv = nn.Conv1d(2, 3, bias=bias, **settings).double()
    inputs = torch.randn(4, 2, 9, dtype=torch.float64)
    patches, length = brute_force_patches_1d(inputs, conv)
    with torch.no_grad():  # the patches reproduce the layer: conv(x) = patches @ W^T (+ b) (torch.nn.Conv1d)
        direct = conv(inputs).transpose(1, 2)
    rebuilt = patches @ conv.weight.detach().reshape(3, -1).T + (conv.bias.detach() if bias else 0.0)
    torch.testing.assert_close(rebuilt, direct, rtol=1e-12, atol=1e-12)

    model = nn.Sequential(conv, nn.Tanh(), nn.Flatten(), nn.Linear(3 * length, 4)).double()
    targets = torch.randint(0, 4, (4,))
    reference = copy.deepcopy(model)
    outputs = reference[0](inputs)
    grad, = torch.autograd.grad(nn.functional.cross_entropy(reference[1:](outputs), targets), outputs)
    grad = grad.transpose(1, 2)
    opt = recorded_optimizer(model, nn.CrossEntropyLoss(), inputs, targets, fisher="empirical")

    rows = torch.cat([patches, torch.ones(patches.shape[:2] + (1,), dtype=torch.float64)], -1) if bias else patches
    state = opt.state[conv.weight]
    factor_in = torch.einsum("nti,ntj->ij", rows, rows) / (rows.shape[0] * rows.shape[1])
    torch.testing.assert_close(state["factor_in"], factor_in, rtol=EXACT_RTOL, atol=1e-13)
    torch.testing.assert_close(state["factor_out"], torch.einsum("nti,ntj->ij", grad, grad) * len(inputs),
                               rtol=1e-10, atol=1e-14)


def conv1d_problem(deep, criterion, n=6, seed=31):
    torch.manual_seed(seed)
    conv = nn.Conv1d(2, 3, 3, padding=1, stride=2)
    if deep:
        model = nn.Sequential(conv, nn.Tanh(), nn.Flatten(), nn.Linear(3 * 4, 3)).double()
    else:
        model = nn.Sequential(conv, nn.Flatten()).double()
    inputs = torch.randn(n, 2, 8, dtype=torch.float64)
    dims = (n, 3 * 4) if not deep else (n, 3)
    return model, inputs, targets_for(criterion, n, dims=dims)


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_conv1d_blocks_exact_for_gaussian_output(structure):
    # A conv layer whose output is the Gaussian (MSE) model output: s_nt = W a_nt, J_n^T J_n =
    # sum_t (a a^T) (x) I, so F = 2c sum_{n,t} (a a^T) (x) I = (mean_{n,t} a a^T) (x) (2 c N T I):
    # the Kronecker form is exact (Martens & Grosse 2015 for the dense case; Grosse & Martens 2016),
    # EKFAC too (its scales are then L_G L_A^T), and the diagonal is diag(F).
    model, inputs, targets = conv1d_problem(False, "mse")
    reference, opt = reference_and_optimizer(model, "0", inputs, targets, "dense", "mse", structure=structure)
    block = opt.blocks["0"]
    assert block.layer.kind == "conv1d" and block.structure == structure
    if structure == "diag":
        reference = torch.diag(torch.diagonal(reference))
    assert relative_error(block.dense_curvature(), reference) <= EXACT_RTOL


# ----------------------------------------------------------------------------- Embedding
def embedding_problem(deep, criterion, padding_idx=None, vocab=7, dim=3, n=8, positions=4, seed=40):
    torch.manual_seed(seed)
    embedding = nn.Embedding(vocab, dim, padding_idx=padding_idx)
    if deep:
        model = nn.Sequential(embedding, nn.Flatten(), nn.Tanh(), nn.Linear(positions * dim, 3)).double()
    else:
        model = nn.Sequential(embedding, nn.Flatten()).double()
    generator = torch.Generator().manual_seed(seed)
    tokens = torch.randint(0, vocab - 2, (n, positions), generator=generator)  # tokens V-2, V-1 never seen
    tokens[:, 1] = tokens[:, 0]  # every example repeats a token: per-example sums must add them first
    dims = (n, positions * dim) if not deep else (n, 3)
    return model, tokens, targets_for(criterion, n, dims=dims)


@pytest.mark.parametrize("padding_idx", [None, 0])
@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_embedding_blocks_exact_for_gaussian_output(structure, padding_idx):
    # Embedding output = Gaussian model output: s_nt = W^T e_{i_nt}, so F = 2c sum_{n,t} e e^T (x) I =
    # diag(counts) (x) 2c I = diag(f) (x) (2 c N T I), f the token frequencies: K-FAC with a diagonal
    # input factor is exact (Martens & Grosse 2015, eq. 1-3 with one-hot inputs), EKFAC as well; padded
    # positions have no gradient (PyTorch's padding_idx), and their zero row in f matches F.
    model, tokens, targets = embedding_problem(False, "mse", padding_idx)
    reference, opt = reference_and_optimizer(model, "0", tokens, targets, "embedding", "mse", structure=structure)
    block = opt.blocks["0"]
    if structure == "diag":
        reference = torch.diag(torch.diagonal(reference))
    assert relative_error(block.dense_curvature(), reference) <= EXACT_RTOL
    if padding_idx is not None:
        assert float(torch.diagonal(reference).reshape(7, 3)[padding_idx].abs().max()) == 0.0


CLASSIFIERS = {  # (problem, parameter ordering, vocabulary for EKFAC's identity input basis)
    "conv1d": (lambda: conv1d_problem(True, "ce"), "dense", None),
    "embedding": (lambda: embedding_problem(True, "ce", padding_idx=0), "embedding", 7),
}


@pytest.mark.parametrize("network", list(CLASSIFIERS))
def test_blocks_against_exact_fisher_of_a_classifier(network):
    problem, kind, vocab = CLASSIFIERS[network]
    model, inputs, targets = problem()
    errors = {}
    for structure in ("kfac", "ekfac", "diag"):
        reference, opt = reference_and_optimizer(copy.deepcopy(model), "0", inputs, targets, kind, "ce",
                                                 structure=structure)
        block = opt.blocks["0"]
        if structure == "diag":
            # diag(F) exactly: per-example gradients are summed over positions (repeated tokens) before squaring.
            assert relative_error(torch.diagonal(block.dense_curvature()), torch.diagonal(reference)) <= EXACT_RTOL
        elif structure == "ekfac":
            errors[structure] = check_eigenbasis_against_exact(block, reference, errors["kfac"], vocab_basis=vocab)
        else:
            if kind == "embedding":  # A = diag(token counts off padding) / rows, by torch.bincount
                counts = torch.bincount(inputs[inputs != 0].reshape(-1), minlength=vocab).double()
                torch.testing.assert_close(block.state["factor_in"], counts / inputs.numel(), rtol=EXACT_RTOL, atol=0)
            errors[structure] = relative_error(block.dense_curvature(), reference)
    print(f"{network} classifier: relative Frobenius error K-FAC {errors['kfac']:.4g}, EKFAC {errors['ekfac']:.4g}")
    assert 1e-3 <= errors["kfac"] <= 0.9  # not exact: the output Fisher varies with the example


class TwoFields(nn.Module):
    """One embedding applied to two index fields of each example (two calls per forward)."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(5, 3)
        self.head = nn.Linear(4 * 3, 3)

    def forward(self, tokens):
        fields = torch.cat([self.embed(tokens[:, :2]), self.embed(tokens[:, 2:])], dim=1)
        return self.head(torch.tanh(fields.flatten(1)))


def test_embedding_diagonal_sums_an_examples_gradient_over_calls_of_one_forward():
    # diag(F) (torch.func, whole forward): an example's gradient sums over both calls of the layer,
    # and a token seen in both fields adds up before squaring.
    torch.manual_seed(45)
    model = TwoFields().double()
    tokens = torch.randint(0, 5, (8, 4), generator=torch.Generator().manual_seed(45))
    tokens[:, 2] = tokens[:, 0]
    targets = targets_for("ce", 8)
    reference, opt = reference_and_optimizer(model, "embed", tokens, targets, "embedding", "ce", structure="diag")
    assert relative_error(torch.diagonal(opt.blocks["embed"].dense_curvature()), torch.diagonal(reference)) \
        <= EXACT_RTOL


def test_embedding_precondition_matches_numpy_solve_with_factored_damping():
    # numpy.linalg.solve(kron(diag(f_d), G_d), vec(M)) with factored Tikhonov damping
    # f_d = f + pi sqrt(lambda), G_d = G + sqrt(lambda)/pi I, pi^2 = (tr A/V)/(tr G/d) (Martens & Grosse 2015,
    # sec. 6.3); damped_product applies the same matrix.
    model, tokens, targets = embedding_problem(True, "ce")
    damping = 0.05
    opt = recorded_optimizer(model, nn.CrossEntropyLoss(), tokens, targets, damping=damping)
    block = opt.blocks["0"]
    f, g = block.state["factor_in"].numpy(), block.state["factor_out"].numpy()
    pi = np.sqrt((f.sum() / len(f)) / (np.trace(g) / len(g)))
    damped = np.kron(np.diag(f + pi * np.sqrt(damping)), g + np.sqrt(damping) / pi * np.eye(len(g)))
    np.testing.assert_allclose(block.dense_curvature(damping).numpy(), damped, rtol=1e-12)
    grad = model[0].weight.grad.T.numpy()  # W^T-shaped [d, V]
    expected = np.linalg.solve(damped, grad.reshape(-1, order="F")).reshape(grad.shape, order="F")
    np.testing.assert_allclose(block.precondition(torch.as_tensor(grad), damping).numpy(), expected,
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(block.damped_product(torch.as_tensor(expected), damping).numpy(), grad,
                               rtol=1e-9, atol=1e-12)


def test_embedding_reduce_weight_sharing_keeps_the_diagonal_of_the_reduced_input_factor():
    # "reduce" (Eschenhagen et al., NeurIPS 2023, sec. 3): a_n = mean_t onehot(i_nt), g_n = sum_t g_nt;
    # the block keeps diag(mean_n a_n a_n^T) (numpy one-hot rows) and G = (1/c) sum_n g_n g_n^T with
    # g = dL/ds of the summed loss by plain autograd (empirical Fisher, c = 1).
    model, tokens, targets = embedding_problem(True, "ce")
    reference = copy.deepcopy(model)
    outputs = reference[0](tokens)
    grad, = torch.autograd.grad(nn.functional.cross_entropy(reference[1:](outputs), targets, reduction="sum"),
                                outputs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(reduction="sum"), fisher="empirical",
                                  weight_sharing="reduce", stats_interval=1, inverse_interval=1, stats_memory=0.0)
    opt.zero_grad()
    nn.functional.cross_entropy(model(tokens), targets, reduction="sum").backward()
    opt.step()
    one_hot = np.eye(7)[tokens.numpy()].mean(axis=1)  # [N, V]
    state = opt.state[model[0].weight]
    np.testing.assert_allclose(state["factor_in"].numpy(), np.diag(one_hot.T @ one_hot / len(one_hot)),
                               rtol=EXACT_RTOL)
    summed = grad.sum(1)
    torch.testing.assert_close(state["factor_out"], summed.T @ summed, rtol=EXACT_RTOL, atol=1e-14)


def embedding_state_bytes(vocab, dim, structure):
    torch.manual_seed(0)
    model = nn.Sequential(nn.Embedding(vocab, dim), nn.Flatten(), nn.Linear(4 * dim, 5))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, structure=structure, stats_interval=1,
                              inverse_interval=1, momentum=0.0)
    tokens = torch.randint(0, vocab, (64, 4))
    targets = torch.randint(0, 5, (64,))
    started = time.perf_counter()
    for _ in range(2):
        opt.zero_grad()
        loss_fn(model(tokens), targets).backward()
        opt.step()
    seconds = (time.perf_counter() - started) / 2
    state = opt.state[model[0].weight]
    return sum(t.numel() * t.element_size() for t in state.values() if torch.is_tensor(t)), seconds


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_embedding_state_is_linear_in_the_vocabulary(structure):
    # With d fixed, a diagonal input factor keeps O(V d + d^2) numbers: going from V = 1000 to 20000
    # multiplies the state by at most 20 (plus the d x d part); any V x V factor would multiply it by
    # 400 and would need 3.2 GB at V = 20000 (float64) / 1.6 GB (float32).  Every refresh and inversion
    # runs here (stats_interval = inverse_interval = 1), and a step stays well under a second.
    small, _ = embedding_state_bytes(1000, 8, structure)
    large, seconds = embedding_state_bytes(20000, 8, structure)
    weight_bytes = 20000 * 8 * 4
    print(f"embedding {structure}: state {small} B at V=1000, {large} B at V=20000 "
          f"({large / weight_bytes:.2f} x the weight), {seconds * 1e3:.1f} ms per step")
    assert large / small <= 20.5
    assert large <= 4 * weight_bytes
    assert seconds < 1.0


def test_sparse_embedding_is_refused_with_a_clear_error_and_a_frozen_one_is_fine():
    # The optimizer's finiteness checks and fallback rules take dense gradients (common practice in
    # torch.optim: sparse gradients need SparseAdam).
    model = nn.Sequential(nn.Embedding(10, 4, sparse=True), nn.Flatten(), nn.Linear(12, 3))
    with pytest.raises(ValueError, match="sparse=True"):
        ngopt.FisherDescent(model, nn.CrossEntropyLoss())
    model[0].weight.requires_grad_(False)
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss())
    opt.assign_curvature(torch.randint(0, 10, (2, 3)))
    assert list(opt.blocks) == ["2"]


def test_embedding_with_frequency_scaled_gradients_uses_the_fallback_rule():
    # Gradients rescaled by counts within the batch are no lookup's curvature: the fallback rule, said why.
    model = nn.Sequential(nn.Embedding(10, 4, scale_grad_by_freq=True), nn.Flatten(), nn.Linear(12, 3))
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss())
    with pytest.warns(UserWarning, match=r"0.weight \(40: applied by embedding with scale_grad_by_freq=True"):
        assignment = opt.assign_curvature(torch.randint(0, 10, (2, 3)))
    assert list(opt.blocks) == ["2"] and assignment["0.weight"].fallback


# ----------------------------------------------------------------------------- grouped convolutions
GROUPED_CONVOLUTIONS = {
    "conv2d-groups-2": lambda: nn.Conv2d(4, 6, 3, groups=2, padding=1),
    "conv2d-depthwise-multiplier-2": lambda: nn.Conv2d(3, 6, 3, groups=3, stride=2),
    "conv2d-depthwise-no-bias": lambda: nn.Conv2d(3, 3, 2, groups=3, bias=False),
    "conv1d-groups-2": lambda: nn.Conv1d(4, 4, 3, groups=2, padding=1),
}


def grouped_problem(name, n=6, seed=53):
    torch.manual_seed(seed)
    conv = GROUPED_CONVOLUTIONS[name]()
    spatial = (5, 5) if isinstance(conv, nn.Conv2d) else (6,)
    inputs = torch.randn((n, conv.in_channels) + spatial, dtype=torch.float64)
    outputs = conv.double()(inputs).shape[2:].numel()
    model = nn.Sequential(conv, nn.Tanh(), nn.Flatten(), nn.Linear(conv.out_channels * outputs, 3)).double()
    return model, inputs


@pytest.mark.parametrize("name", list(GROUPED_CONVOLUTIONS))
def test_grouped_convolution_blocks_against_the_exact_fisher(name):
    # Per group j the weight gradient of one example is sum_t g_tj a_tj^T (Grosse & Martens 2016 per
    # group). The diagonal block is then the exact diagonal of the per-layer Fisher (torch.func); EKFAC's
    # scales are diag(Q^T F Q) in a block-diagonal eigenbasis and never further from F than K-FAC
    # (George et al. 2018); K-FAC's input factor is the mean over examples, positions and groups of the
    # groups' own patches (numpy slicing), its output factor is block-diagonal. Errors are printed.
    model, inputs = grouped_problem(name)
    conv = model[0]
    targets = targets_for("ce", len(inputs))
    errors = {}
    for structure in ("kfac", "ekfac", "diag"):
        reference, opt = reference_and_optimizer(copy.deepcopy(model), "0", inputs, targets, "dense", "ce",
                                                 structure=structure)
        block = opt.blocks["0"]
        assert block.layer.kind.startswith("grouped_conv")
        if structure == "diag":
            assert relative_error(torch.diagonal(block.dense_curvature()), torch.diagonal(reference)) <= EXACT_RTOL
            continue
        if structure == "ekfac":
            errors[structure] = check_eigenbasis_against_exact(block, reference, errors["kfac"])
            continue
        errors[structure] = relative_error(block.dense_curvature(), reference)
        images = inputs if conv.weight.dim() == 4 else inputs.unsqueeze(2)
        square = nn.Conv2d(conv.in_channels, conv.out_channels, (1,) * (4 - conv.weight.dim()) + conv.kernel_size,
                           stride=(1,) * (4 - conv.weight.dim()) + conv.stride,
                           padding=(0,) * (4 - conv.weight.dim()) + conv.padding)
        patches, _ = brute_force_patches(images, square)
        rows = patches.reshape(patches.shape[0], patches.shape[1], conv.groups, -1)
        if conv.bias is not None:
            rows = torch.cat([rows, torch.ones(rows.shape[:-1] + (1,), dtype=rows.dtype)], -1)
        rows = rows.reshape(-1, rows.shape[-1])
        torch.testing.assert_close(block.state["factor_in"], rows.T @ rows / len(rows), rtol=1e-12, atol=1e-14)
        per_group = conv.out_channels // conv.groups
        factor_out = block.state["factor_out"]
        same_group = (torch.arange(conv.out_channels) // per_group).unsqueeze(0) == \
            (torch.arange(conv.out_channels) // per_group).unsqueeze(1)
        assert float(factor_out[~same_group].abs().max()) == 0.0 and float(factor_out.diagonal().min()) > 0
    group = (torch.arange(reference.shape[0]) % conv.out_channels) // per_group  # column-major vec of [C_out, d]
    within = reference * (group.unsqueeze(0) == group.unsqueeze(1))
    print(f"{name}: K-FAC {errors['kfac']:.3g}, EKFAC {errors['ekfac']:.3g} relative Frobenius error; "
          f"keeping only the exact within-group blocks: {relative_error(within, reference):.3g}")


# ----------------------------------------------------------------------------- LayerNorm and BatchNorm
def pair_mask(channels, k):
    """Entries of the [gamma | beta] ordering that lie in one channel's (gamma_c, beta_c) block."""
    channel = torch.arange(k * channels) % channels
    return channel.unsqueeze(0) == channel.unsqueeze(1)


def randomize_affine(norm):
    with torch.no_grad():
        norm.weight.normal_(1.0, 0.5)
        if getattr(norm, "bias", None) is not None:
            norm.bias.normal_(0.0, 0.5)


def layer_norm_problem(shape, bias, n=8, seed=50):
    torch.manual_seed(seed)
    channels = int(np.prod(shape))
    norm = nn.LayerNorm(shape, bias=bias)
    if len(shape) == 1:
        model = nn.Sequential(nn.Linear(4, channels), norm, nn.Tanh(), nn.Linear(channels, 3))
        inputs = torch.randn(n, 4, dtype=torch.float64)
    else:  # positions: [N, T, *shape]
        model = nn.Sequential(nn.Linear(4, channels), nn.Unflatten(-1, shape), norm, nn.Flatten(1), nn.Tanh(),
                              nn.Linear(3 * channels, 3))
        inputs = torch.randn(n, 3, 4, dtype=torch.float64)
    model = model.double()
    randomize_affine(norm)
    return model, module_name(model, norm), inputs, channels


def batch_norm_problem(kind, n=8, seed=51):
    torch.manual_seed(seed)
    if kind == "bn1d-flat":
        model = nn.Sequential(nn.Linear(4, 5), nn.BatchNorm1d(5), nn.Tanh(), nn.Linear(5, 3))
        inputs, channels = torch.randn(n, 4), 5
    elif kind == "bn1d-seq":
        model = nn.Sequential(nn.Conv1d(2, 3, 3), nn.BatchNorm1d(3), nn.Tanh(), nn.Flatten(), nn.Linear(3 * 4, 3))
        inputs, channels = torch.randn(n, 2, 6), 3
    else:
        model = nn.Sequential(nn.Conv2d(1, 3, 3), nn.BatchNorm2d(3), nn.Tanh(), nn.Flatten(), nn.Linear(3 * 9, 3))
        inputs, channels = torch.randn(n, 1, 5, 5), 3
    model = model.double()
    randomize_affine(model[1])
    return model, "1", inputs.double(), channels


def channel_norm_problem(kind, n=6, seed=52):
    """GroupNorm / InstanceNorm (affine) after a convolution, RMSNorm on sequence positions."""
    torch.manual_seed(seed)
    if kind == "rms":
        norm = nn.RMSNorm(4)
        model = nn.Sequential(nn.Linear(3, 4), norm, nn.Flatten(), nn.Tanh(), nn.Linear(5 * 4, 3))
        inputs, channels = torch.randn(n, 5, 3), 4
    else:
        norm = {"group": nn.GroupNorm(2, 4), "instance2d": nn.InstanceNorm2d(4, affine=True)}.get(kind)
        if kind == "instance1d":  # unused running statistics: training mode normalises by the input's own
            norm = nn.InstanceNorm1d(4, affine=True, track_running_stats=True)
            model = nn.Sequential(nn.Conv1d(2, 4, 2), norm, nn.Tanh(), nn.Flatten(), nn.Linear(4 * 5, 3))
            inputs = torch.randn(n, 2, 6)
        else:
            model = nn.Sequential(nn.Conv2d(1, 4, 2), norm, nn.Tanh(), nn.Flatten(), nn.Linear(4 * 9, 3))
            inputs = torch.randn(n, 1, 4, 4)
        channels = 4
    model = model.double()
    randomize_affine(norm)
    return model, "1", inputs.double(), channels


NORM_PROBLEMS = {
    "groupnorm": lambda: channel_norm_problem("group"),
    "instancenorm2d": lambda: channel_norm_problem("instance2d"),
    "instancenorm1d-running-stats": lambda: channel_norm_problem("instance1d"),
    "layernorm": lambda: layer_norm_problem((6,), True),
    "layernorm-nobias": lambda: layer_norm_problem((6,), False),
    "layernorm-2d-positions": lambda: layer_norm_problem((2, 3), True),
    "batchnorm1d-flat": lambda: batch_norm_problem("bn1d-flat"),
    "batchnorm1d-seq": lambda: batch_norm_problem("bn1d-seq"),
    "batchnorm2d": lambda: batch_norm_problem("bn2d"),
}
if hasattr(nn, "RMSNorm"):  # torch >= 2.4
    NORM_PROBLEMS["rmsnorm"] = lambda: channel_norm_problem("rms")


@pytest.mark.parametrize("problem", list(NORM_PROBLEMS))
def test_norm_blocks_equal_the_exact_fisher_restricted_to_channel_pairs(problem):
    # The per-layer Fisher of (gamma, beta) by torch.func on the whole batch (batch norm in training
    # mode: the batch statistics couple the examples, but x_hat does not depend on gamma or beta, so the
    # batch Jacobian's rows are the per-example gradients); the block keeps exactly its entries within
    # each channel's (gamma_c, beta_c) pair, the diagonal block exactly its diagonal.
    model, path, inputs, channels = NORM_PROBLEMS[problem]()
    targets = targets_for("ce", len(inputs))
    k = 1 + int(getattr(model.get_submodule(path), "bias", None) is not None)
    for structure in ("kfac", "ekfac", "diag"):
        reference, opt = reference_and_optimizer(copy.deepcopy(model), path, inputs, targets, "norm", "ce",
                                                 structure=structure)
        block = opt.blocks[path]
        mask = pair_mask(channels, k)
        kept = reference * mask if structure != "diag" else torch.diag(torch.diagonal(reference))
        assert relative_error(block.dense_curvature(), kept) <= PAIR_RTOL, structure
    omitted = relative_error(reference * mask, reference)
    print(f"{problem}: the pairs omit {omitted:.4g} of the exact Fisher (relative Frobenius), "
          f"the diagonal {relative_error(torch.diag(torch.diagonal(reference)), reference):.4g}")
    assert omitted > 1e-3  # the cross-channel entries are not zero: the check above is not vacuous


def test_batch_norm_moments_hold_in_float32_far_from_zero():
    # The block reads x_hat from the batch's own moments.  With inputs of mean 1e3 and unit spread,
    # E[x^2] - E[x]^2 in float32 would lose the variance (float32 spacing near 1e6 is 0.06); the two-pass
    # moments (Chan, Golub & LeVeque, Am. Stat. 1983) keep the float32 block within 1e-3 of the float64 one.
    torch.manual_seed(53)
    model = nn.Sequential(nn.BatchNorm2d(3), nn.Tanh(), nn.Flatten(), nn.Linear(3 * 16, 3))
    randomize_affine(model[0])
    inputs, targets = 1e3 + torch.randn(16, 3, 4, 4, dtype=torch.float64), targets_for("ce", 16)
    curvature = {}
    for dtype in (torch.float32, torch.float64):
        opt = recorded_optimizer(copy.deepcopy(model).to(dtype), nn.CrossEntropyLoss(), inputs.to(dtype), targets)
        curvature[dtype] = opt.blocks["0"].dense_curvature().double()
    assert relative_error(curvature[torch.float32], curvature[torch.float64]) <= 1e-3


def test_channel_moments_equal_numpy_and_the_timing_script_runs(capsys):
    # numpy.mean / numpy.var (ddof=0, the biased variance batch norm normalizes by) over every dim but 1.
    import runpy
    from pathlib import Path

    from ngopt.uses.normalization import channel_moments
    x = 1e3 + torch.randn(6, 4, 3, 5, dtype=torch.float64, generator=torch.Generator().manual_seed(54))
    mean, variance = channel_moments(x)
    np.testing.assert_allclose(mean.numpy(), x.numpy().mean(axis=(0, 2, 3)), rtol=1e-12)
    np.testing.assert_allclose(variance.numpy(), x.numpy().var(axis=(0, 2, 3)), rtol=1e-9)
    script = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "batch_norm_moments.py"),
                            run_name="batch_norm_moments")
    assert script["main"](["--shapes", "4,3,2,2", "5,6", "--repeats", "2"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert [line.split(":")[0] for line in lines] == ["[4, 3, 2, 2]", "[5, 6]"]
    assert all("variances agree to" in line for line in lines)
    assert script["main"](["--repeats", "1"]) == 0  # the residual CNN's shapes, and their sum per forward
    assert capsys.readouterr().out.splitlines()[-1].startswith("residual CNN, 5 batch norms per recorded forward")


def test_norm_pair_block_preconditions_like_numpy_solve():
    # numpy.linalg.solve((B + lambda I), vec(grad)) on the dense block-diagonal matrix; damped_product inverse.
    model, path, inputs, channels = NORM_PROBLEMS["batchnorm2d"]()
    damping = 0.03
    opt = recorded_optimizer(model, nn.CrossEntropyLoss(), inputs, targets_for("ce", len(inputs)), damping=damping)
    block, layer = opt.blocks[path], model.get_submodule(path)
    dense = block.dense_curvature(damping).numpy()
    grad = np.stack([layer.weight.grad.numpy(), layer.bias.grad.numpy()], axis=1)  # [C, (gamma, beta)]
    expected = np.linalg.solve(dense, grad.reshape(-1, order="F")).reshape(grad.shape, order="F")
    np.testing.assert_allclose(block.precondition(torch.as_tensor(grad), damping).numpy(), expected,
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(block.damped_product(torch.as_tensor(expected), damping).numpy(), grad,
                               rtol=1e-9, atol=1e-12)
    summary = opt.diagnostics()["layers"][path]
    eigenvalues = np.linalg.eigvalsh(block.dense_curvature().numpy())  # numpy.linalg on the dense block
    np.testing.assert_allclose([summary["pair_eig_min"], summary["pair_eig_max"]],
                               [eigenvalues.min(), eigenvalues.max()], rtol=1e-9, atol=1e-15)


# ----------------------------------------------------------------------------- the probe
def test_probe_uses_each_layer_kinds_ordering():
    # fisher_probe.exact_layer_fisher against this file's torch.func reference, for every new layer
    # kind; then the probe's block error is ~0 where the block is exact (embedding into a Gaussian
    # output), which fails if the probe lays the parameters out differently from the block.
    model, tokens, targets = embedding_problem(False, "mse")
    opt = recorded_optimizer(model, nn.MSELoss(), tokens, targets)
    result = probe_fisher_quality(opt, model, nn.MSELoss(), tokens, targets, warn_angle_deg=180.0)
    assert result["layers"]["0"]["block_error"] <= 1e-10

    torch.manual_seed(60)
    model = nn.Sequential(nn.Embedding(6, 4), nn.LayerNorm(4), nn.Flatten(), nn.Unflatten(1, (1, 12)),
                          nn.Conv1d(1, 2, 3), nn.Tanh(), nn.Flatten(), nn.Linear(2 * 10, 3)).double()
    randomize_affine(model[1])
    tokens = torch.randint(0, 6, (8, 3))
    targets = targets_for("ce", 8)
    for path, kind in (("0", "embedding"), ("1", "norm"), ("4", "dense")):
        module = model.get_submodule(path)
        expected = exact_fisher(model, module, tokens, kind, "ce")
        got = probe_exact_fisher(model, module, nn.CrossEntropyLoss(), tokens, targets)
        assert relative_error(got, expected) <= 1e-12, path
    opt = recorded_optimizer(model, nn.CrossEntropyLoss(), tokens, targets, lr=1e-12)  # weights stay put
    result = probe_fisher_quality(opt, model, nn.CrossEntropyLoss(), tokens, targets, warn_angle_deg=180.0)
    assert set(result["layers"]) == {"0", "1", "4", "7"}
    # LayerNorm behaves alike in eval mode: the pair block of this batch misses only cross-channel entries.
    mask = pair_mask(4, 2)
    expected = exact_fisher(model, model[1], tokens, "norm", "ce")
    assert result["layers"]["1"]["block_error"] == pytest.approx(relative_error(expected * mask, expected), rel=1e-6)


# ----------------------------------------------------------------------------- end to end
def token_model():
    return nn.Sequential(nn.Embedding(12, 6, padding_idx=0), nn.LayerNorm(6), nn.Flatten(), nn.Tanh(),
                         nn.Linear(5 * 6, 3))


def cnn_model():
    return nn.Sequential(nn.Conv2d(1, 3, 3), nn.BatchNorm2d(3), nn.Tanh(), nn.Flatten(2), nn.Conv1d(3, 4, 3),
                         nn.Tanh(), nn.Flatten(), nn.Linear(4 * 14, 3))


def token_data(seed=70):
    generator = torch.Generator().manual_seed(seed)
    tokens = torch.randint(0, 12, (48, 5), generator=generator)
    labels = (tokens[:, 0] % 3)  # learnable from the first token
    return tokens, labels


def image_data(seed=71):
    generator = torch.Generator().manual_seed(seed)
    images = torch.randn(48, 1, 6, 6, generator=generator)
    labels = (images[:, 0, :3].sum(dim=(1, 2)) > 0).long() + (images[:, 0, 3:].sum(dim=(1, 2)) > 0).long()
    return images, labels


def train(model, opt, inputs, labels, steps):
    losses = []
    for _ in range(steps):
        opt.zero_grad()
        loss = opt.loss_fn(model(inputs), labels)
        loss.backward()
        opt.step()
        losses.append(float(loss.detach()))
    return losses


def make_optimizer(model, structure):
    return ngopt.FisherDescent(model, nn.CrossEntropyLoss(), structure=structure, lr=0.3, momentum=0.5,
                               stats_interval=2, inverse_interval=4, seed=0)


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
@pytest.mark.parametrize("network", ["embedding-layernorm-linear", "cnn-batchnorm2d-conv1d"])
def test_training_through_the_new_layers(network, structure):
    # Integration: loss goes down within a few steps; every layer gets a block (no fallback warnings,
    # no fallback parameters); state_dict() round-trips so that a resumed run continues exactly as the
    # uninterrupted one (API.md behaviour 3).
    build, (inputs, labels), kinds = {
        "embedding-layernorm-linear": (token_model, token_data(), {"0": "embedding", "1": "layer_norm",
                                                                   "4": "linear"}),
        "cnn-batchnorm2d-conv1d": (cnn_model, image_data(), {"0": "conv2d", "1": "batch_norm", "4": "conv1d",
                                                             "7": "linear"}),
    }[network]
    torch.manual_seed(72)
    model = build()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no fallback, no uninitialised-curvature or skipped-step warnings
        opt = make_optimizer(model, structure)
        losses = train(model, opt, inputs, labels, 12)
    assert {name: block.layer.kind for name, block in opt.blocks.items()} == kinds
    assert "fallback rule" not in repr(opt)
    assert losses[-1] < 0.8 * losses[0], losses
    assert opt.diagnostics()["skipped_steps"] == 0

    buffer = io.BytesIO()
    torch.save({"model": model.state_dict(), "opt": opt.state_dict()}, buffer)
    buffer.seek(0)
    saved = torch.load(buffer, weights_only=False)
    resumed_model = build()
    resumed_model.load_state_dict(saved["model"])
    resumed_opt = make_optimizer(resumed_model, structure)
    resumed_opt.load_state_dict(saved["opt"])
    straight = train(model, opt, inputs, labels, 5)
    resumed = train(resumed_model, resumed_opt, inputs, labels, 5)
    assert straight == resumed
    for a, b in zip(model.parameters(), resumed_model.parameters()):
        assert torch.equal(a, b)
    for summary in opt.diagnostics()["layers"].values():
        assert np.isfinite(summary["condition"])
