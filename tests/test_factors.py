"""Factors of any size: the block-diagonal form, and the per-layer choice of forms from a cost budget.

References: numpy in float64 for every block operation (the diagonal blocks of ``X^T X``,
``numpy.linalg.inv`` of each damped block, products with ``scipy.linalg.block_diag``,
``numpy.linalg.eigvalsh``); the nearest positive semi-definite matrix of an indefinite block by
clipping its eigenvalues (Higham 1988); and the exact Fisher of one linear layer with squared error,
``A (x) 2I/d_out`` (K-FAC is exact there: Martens & Grosse 2015), against which the block-diagonal form
is off by exactly the input factor's off-diagonal blocks.  Flop counts of the cost model by hand.
Tolerances: float64 rounding of products of a few hundred terms, 1e-12 relative (common practice).
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.linalg
import torch
from torch import nn

import ngopt
from ngopt.budget import Schedule, choose, forward_backward_flops, kronecker_flops
from ngopt.factors import BlockDiagonal, Whole

DTYPE = torch.float64


def random_rows(rows, dim, seed=0):
    return torch.randn(rows, dim, generator=torch.Generator().manual_seed(seed), dtype=DTYPE)


def diagonal_blocks(matrix: np.ndarray, block: int):
    return [matrix[i:i + block, i:i + block] for i in range(0, matrix.shape[0], block)]


# (261, 2) and (256, 2): more blocks than BlockDiagonal.LOOPED_BLOCKS, with and without padding (the batched paths).
@pytest.mark.parametrize("dim, block", [(12, 4), (13, 4), (10, 1), (7, 3), (261, 2), (256, 2)])
def test_block_diagonal_statistics_inverse_and_products_against_numpy(dim, block):
    form = BlockDiagonal(dim, block)
    assert form.count == math.ceil(dim / block) and form.block * form.count - dim < form.count
    rows = random_rows(40, dim)
    factor = form.zeros(rows)
    form.add_moment(factor, rows[:25])
    form.add_moment(factor, rows[25:], alpha=1.0)
    dense = rows.numpy().T @ rows.numpy()
    expected_blocks = diagonal_blocks(dense, form.block)
    reference = scipy.linalg.block_diag(*expected_blocks)
    np.testing.assert_allclose(form.dense(factor).numpy(), reference, rtol=1e-12, atol=1e-12)
    assert float(form.trace(factor)) == pytest.approx(np.trace(dense), rel=1e-12)
    shift = 0.3
    inverse, _, fallback = form.inverse(factor, shift, want_spectrum=False)
    assert not fallback
    expected_inverse = scipy.linalg.block_diag(*[np.linalg.inv(b + shift * np.eye(len(b))) for b in expected_blocks])
    np.testing.assert_allclose(form.dense(inverse).numpy(), expected_inverse, rtol=1e-10, atol=1e-12)
    operand = random_rows(dim, 5, seed=1)
    np.testing.assert_allclose(form.left(inverse, operand).numpy(), expected_inverse @ operand.numpy(), rtol=1e-10,
                               atol=1e-12)
    right = form.right(operand.T.contiguous(), inverse)
    np.testing.assert_allclose(right.numpy(), operand.numpy().T @ expected_inverse, rtol=1e-10, atol=1e-12)
    # A proposal in a transposed layout made every later pass over it (momentum, the write) slow.
    assert right.is_contiguous()
    np.testing.assert_allclose(form.right(operand.T, inverse, transpose=True).numpy(),
                               operand.numpy().T @ expected_inverse.T, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(form.left(inverse, operand, transpose=True).numpy(), expected_inverse.T @ operand.numpy(),
                               rtol=1e-10, atol=1e-12)
    damped = reference + shift * np.eye(dim)
    np.testing.assert_allclose(form.left_damped(factor, shift, operand).numpy(), damped @ operand.numpy(),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(form.right_damped(operand.T, factor, shift).numpy(), operand.numpy().T @ damped,
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(form.eigenvalues(factor).numpy(), np.linalg.eigvalsh(reference), rtol=1e-10,
                               atol=1e-10)


def test_an_indefinite_block_takes_its_nearest_positive_semi_definite_matrix():
    # One block indefinite (a negative eigenvalue from round-off, here made large), one fine: only the
    # first is repaired, by clipping its eigenvalues to zero before the shift (Higham 1988).
    form = BlockDiagonal(6, 3)
    good = np.diag([1.0, 2.0, 3.0])
    vectors = np.linalg.qr(np.random.default_rng(0).normal(size=(3, 3)))[0]
    bad = vectors @ np.diag([-0.5, 1.0, 2.0]) @ vectors.T
    factor = torch.tensor(np.stack([bad, good]))
    inverse, _, fallback = form.inverse(factor, 0.1, want_spectrum=False)
    assert fallback
    expected_bad = np.linalg.inv(vectors @ np.diag([0.0, 1.0, 2.0]) @ vectors.T + 0.1 * np.eye(3))
    np.testing.assert_allclose(inverse[0].numpy(), expected_bad, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(inverse[1].numpy(), np.linalg.inv(good + 0.1 * np.eye(3)), rtol=1e-12, atol=1e-14)


def test_a_block_with_an_exactly_zero_pivot_is_repaired_too():
    # diag(-0.1, 1, 2) shifted by 0.1 has an exact zero pivot: Cholesky stops there, and the batched
    # inverse must not read that factor (it refuses a zero diagonal); the repair clips -0.1 to 0 (Higham 1988).
    form = BlockDiagonal(6, 3)
    good = np.diag([1.0, 2.0, 3.0])
    factor = torch.tensor(np.stack([good, np.diag([-0.1, 1.0, 2.0])]))
    inverse, _, fallback = form.inverse(factor, 0.1, want_spectrum=False)
    assert fallback
    np.testing.assert_allclose(inverse[1].numpy(), np.diag([1 / 0.1, 1 / 1.1, 1 / 2.1]), rtol=1e-12)
    np.testing.assert_allclose(inverse[0].numpy(), np.linalg.inv(good + 0.1 * np.eye(3)), rtol=1e-12, atol=1e-14)


def single_layer_problem(d_in=9, d_out=4, rows=64, seed=2):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(rows, d_in, generator=generator, dtype=DTYPE) @ torch.randn(d_in, d_in, generator=generator,
                                                                               dtype=DTYPE)
    y = torch.randn(rows, d_out, generator=generator, dtype=DTYPE)
    torch.manual_seed(seed)
    return nn.Linear(d_in, d_out).to(DTYPE), x, y


def refreshed(model, x, y, **options):
    settings = dict(fisher="exact", lr=0.0, stats_memory=0.0, stats_interval=1, inverse_interval=1, damping=1e-2,
                    damping_rule="fixed", cost_budget=None)
    settings.update(options)
    opt = ngopt.FisherDescent(model, nn.MSELoss(), **settings)
    opt.zero_grad()
    nn.MSELoss()(model(x), y).backward()
    opt.step()
    return opt


def test_the_block_diagonal_form_is_off_the_exact_fisher_by_the_dropped_blocks_only():
    # One linear layer with squared error: the exact Fisher is A (x) (2/d_out) I with A the mean of
    # [x; 1][x; 1]^T.  Keeping A's diagonal blocks of 5 misses exactly its off-diagonal blocks.
    model, x, y = single_layer_problem()
    exact_in = np.hstack([x.numpy(), np.ones((64, 1))])
    a = exact_in.T @ exact_in / 64
    exact = np.kron(a, 2.0 / 4 * np.eye(4))
    whole = refreshed(model, x, y).blocks["Linear"]
    np.testing.assert_allclose(whole.dense_curvature().numpy(), exact, rtol=1e-10, atol=1e-14)
    model.zero_grad()
    blocked = refreshed(model, x, y, max_factor_size=5).blocks["Linear"]
    assert isinstance(blocked.form_in, BlockDiagonal) and blocked.form_in.count == 2
    kept = scipy.linalg.block_diag(*diagonal_blocks(a, 5))
    np.testing.assert_allclose(blocked.dense_curvature().numpy(), np.kron(kept, 2.0 / 4 * np.eye(4)), rtol=1e-10,
                               atol=1e-14)
    error = np.linalg.norm(blocked.dense_curvature().numpy() - exact) / np.linalg.norm(exact)
    assert error == pytest.approx(np.linalg.norm(a - kept) / np.linalg.norm(a), rel=1e-10)
    # The step solves the damped block-diagonal curvature (numpy.linalg.solve of the dense matrix).
    grad = torch.cat([model.weight.grad, model.bias.grad.unsqueeze(1)], dim=1)
    damped = blocked.dense_curvature(1e-2).numpy()
    expected = np.linalg.solve(damped, grad.T.reshape(-1).numpy()).reshape(10, 4).T
    np.testing.assert_allclose(blocked.precondition(grad, 1e-2).numpy(), expected, rtol=1e-9, atol=1e-12)


def test_a_diagonal_output_factor_preconditions_as_the_dense_solve():
    # An output factor above max_factor_size keeps its diagonal; the step scales the rows of the product
    # with the input factor in place: still the solve of the damped dense curvature (numpy.linalg.solve).
    model, x, y = single_layer_problem(d_in=9, d_out=12)
    block = refreshed(model, x, y, max_factor_size=5).blocks["Linear"]
    assert block.form_out.block == 1 and block.form_out.dim == 12
    grad = torch.cat([model.weight.grad, model.bias.grad.unsqueeze(1)], dim=1)
    kept = grad.clone()
    damped = block.dense_curvature(1e-2).numpy()
    expected = np.linalg.solve(damped, grad.T.reshape(-1).numpy()).reshape(10, 12).T
    np.testing.assert_allclose(block.precondition(grad, 1e-2).numpy(), expected, rtol=1e-9, atol=1e-12)
    assert torch.equal(grad, kept)  # the operand is only read


def test_below_the_limit_the_forms_change_nothing():
    # A limit no factor reaches, and a budget no layer exceeds, give the very same step (same process).
    runs = []
    for options in (dict(max_factor_size=None, cost_budget=None), dict(max_factor_size=64, cost_budget=1e6)):
        model, x, y = single_layer_problem(seed=3)
        opt = refreshed(model, x, y, lr=0.5, **options)
        assert type(opt.blocks["Linear"].form_in) is Whole
        runs.append([p.detach().clone() for p in model.parameters()])
    for p, q in zip(*runs):
        assert torch.equal(p, q)


def test_the_cost_model_by_hand():
    schedule = Schedule(stats_interval=10, inverse_interval=20, stats_fraction=1.0)
    # preconditioning 2 (d_in b_in d_out + d_in d_out b_out) + statistics 2 R (d_in b_in + d_out b_out) / 10
    # + inversions (d_in b_in^2 + d_out b_out^2) / 20, with d_in = 10, d_out = 4, b = d, R = 100
    expected = 2 * (10 * 10 * 4 + 10 * 4 * 4) + 2 * 100 * (100 + 16) / 10 + (1000 + 64) / 20
    assert kronecker_flops(10, 4, 100, 10, 4, schedule) == pytest.approx(expected)
    assert forward_backward_flops(10, 4, 100) == 6 * 100 * 10 * 4
    # A 3x3 convolution with 512 channels on 1x1 maps at batch 32: whole factors cost ~55x its forward and
    # backward; within a budget of 1 both factors split into blocks of 32 (2 (4609*32*512 + 4609*512*32) =
    # 302 Mflop against 453); within 0.2 the blocks would be smaller than 16: the exact diagonal.
    plan = choose("conv2d", 4609, 512, 32, "kfac", 1.0, 4096, Schedule(10, 20, 0.25))
    assert plan.structure == "kfac" and plan.blocks == (32, 32) and "budget 1x" in plan.why
    plan = choose("conv2d", 4609, 512, 32, "kfac", 0.2, 4096, Schedule(10, 20, 0.25))
    assert plan.structure == "diag" and "budget 0.2x" in plan.why
    # The same layer on 4x4 maps at batch 32 (512 rows): block-diagonal factors.
    plan = choose("conv2d", 4609, 512, 512, "kfac", 1.0, 4096, Schedule(10, 20, 0.25))
    assert plan.structure == "kfac" and plan.blocks[0] is not None and plan.blocks[0] < 4609
    assert kronecker_flops(4609, 512, 512, plan.blocks[0], plan.blocks[1] or 512, Schedule(10, 20, 0.25)) <= \
        forward_backward_flops(4609, 512, 512)
    # A small layer at a large batch keeps whole factors; the exact diagonal is never changed.
    assert choose("linear", 65, 128, 4096, "kfac", 1.0, 4096, schedule).blocks == (None, None)
    assert choose("linear", 4609, 512, 32, "diag", 1.0, 4096, schedule).structure == "diag"
    # max_factor_size: the output factor of a 32k vocabulary keeps its diagonal; memory: an input factor of
    # 10000 keeps at most as many numbers as the layer's 640,000 parameters (or 2^20): blocks of 64.
    plan = choose("linear", 513, 32000, 10 ** 9, "kfac", None, 4096, schedule)
    assert plan.blocks == (None, 1) and "max_factor_size" in plan.why
    plan = choose("linear", 10000, 64, 10 ** 9, "kfac", None, 4096, schedule)
    assert plan.blocks == (64, None) and "more numbers than the layer has parameters" in plan.why
    # A ten-class output layer over 1000 inputs at 64 rows: whole factors cost 83 Mflop, ~22x its own
    # 3.84 Mflop, but less than the model's mean layer of 1 Gflop: it keeps them.
    head = (1000, 10, 64, "kfac", 1.0, 4096, schedule)
    assert kronecker_flops(1000, 10, 64, 1000, 10, schedule) == pytest.approx(
        2 * (1000 ** 2 * 10 + 1000 * 100) + 2 * 64 * (1000 ** 2 + 100) / 10 + (1000 ** 3 + 1000) / 20)
    assert choose("linear", *head).blocks != (None, None)
    assert choose("linear", *head, mean_layer_flops=1e9).blocks == (None, None)


def test_the_budget_reads_the_models_mean_layer_from_the_recorded_forward():
    model = nn.Sequential(nn.Linear(64, 512), nn.Tanh(), nn.Linear(512, 10))
    opt = ngopt.FisherDescent(model)
    opt.assign_curvature(torch.randn(32, 64))
    # 6 x rows x weight entries per linear map, halved over the two layers (bias columns not counted)
    assert opt._assignment.mean_layer_flops == pytest.approx(6 * 32 * (64 * 512 + 512 * 10) / 2)


def test_the_models_mean_layer_counts_convolutions_at_their_output_positions():
    model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.Flatten(), nn.Linear(8 * 6 * 6, 10))
    opt = ngopt.FisherDescent(model)
    opt.assign_curvature(torch.randn(4, 3, 6, 6))
    # a 3x3 convolution forward is 2 x (examples x output pixels) x weight entries flops, x3 with the backward
    expected = (6 * 4 * 36 * (8 * 3 * 9) + 6 * 4 * (8 * 36 * 10)) / 2
    assert opt._assignment.mean_layer_flops == pytest.approx(expected)


def vocab_model(vocab=4096, width=16):
    torch.manual_seed(4)
    return nn.Sequential(nn.Embedding(vocab, width), nn.Linear(width, width), nn.Tanh(), nn.Linear(width, vocab))


def train_tokens(model, opt, tokens, steps):
    losses = []
    for _ in range(steps):
        opt.zero_grad()
        logits = model(tokens[:, :-1])
        loss = nn.functional.cross_entropy(logits.reshape(-1, logits.shape[-1]), tokens[:, 1:].reshape(-1))
        loss.backward()
        opt.step()
        losses.append(float(loss.detach()))
    return losses


def test_a_large_vocabulary_trains_with_a_block_diagonal_output_factor_and_says_so():
    model = vocab_model()
    tokens = torch.randint(0, 4096, (4, 17), generator=torch.Generator().manual_seed(5))
    opt = ngopt.FisherDescent(model, max_factor_size=512, stats_interval=2, inverse_interval=4)
    losses = train_tokens(model, opt, tokens, 8)
    assert losses[-1] < 0.8 * losses[0]
    head = opt.blocks["3"]
    assert isinstance(head.form_out, BlockDiagonal) and head.form_out.block == 1
    state = opt.state[model[3].weight]
    assert state["factor_out"].numel() == 4096  # its diagonal: linear in the vocabulary, never 4096 x 4096
    assert "output factor 4096 (diagonal)" in repr(opt)


def test_a_layer_chooses_again_when_the_batch_changes_and_a_pinned_layer_keeps_its_structure():
    torch.manual_seed(6)
    model = nn.Sequential(nn.Linear(256, 256), nn.Tanh(), nn.Linear(256, 3))
    x = torch.randn(512, 256)
    y = torch.randint(0, 3, (512,))
    opt = ngopt.FisherDescent(model, stats_interval=2, cost_budget=1.0, pinned_structures={"2": "kfac"})
    loss_fn = nn.CrossEntropyLoss()
    for rows in (512, 512, 4, 4):  # at 4 rows whole 256 x 257 factors cost ~40x the layer's forward and backward
        opt.zero_grad()
        loss_fn(model(x[:rows]), y[:rows]).backward()
        opt.step()
        if rows == 512:
            assert opt.blocks["0"].plan.blocks == (None, None)
    first = opt.blocks["0"]
    assert first.plan.rows == 4 and (first.structure == "diag" or first.plan.blocks != (None, None))
    assert first.has_statistics and first.plan.why
    assert opt.blocks["2"].plan.blocks == (None, None) and opt.blocks["2"].structure == "kfac"  # pinned
    with pytest.raises(ValueError, match=r"pinned_structures\['0'\] must be one of"):
        ngopt.FisherDescent(nn.Linear(2, 2), pinned_structures={"0": "full"})
    with pytest.raises(ValueError, match="cost_budget must be > 0"):
        ngopt.FisherDescent(nn.Linear(2, 2), cost_budget=0.0)
    with pytest.raises(TypeError, match="max_factor_size must be an int"):
        ngopt.FisherDescent(nn.Linear(2, 2), max_factor_size=2.5)


def test_a_pinned_name_that_is_no_block_is_a_warning_naming_the_blocks():
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 3))
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), pinned_structures={"2": "diag", "layer2": "kfac"})
    with pytest.warns(UserWarning, match=r"pinned_structures names no curvature block: 'layer2'; .*: 0, 2"):
        opt.assign_curvature(torch.zeros(1, 4))
    assert opt.blocks["2"].structure == "diag"  # the name that matched still applies
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # once only, and never for names that match
        opt.assign_curvature(torch.zeros(1, 4))
        ngopt.FisherDescent(nn.Sequential(nn.Linear(4, 3)), nn.CrossEntropyLoss(),
                            pinned_structures={"0": "diag"}).assign_curvature(torch.zeros(1, 4))


def test_block_diagonal_single_precision_inverse_matches_float64_within_float32_accuracy():
    # The worst-conditioned block decides the precision; cond <= 11 here, so float32's inverse is
    # within ~1e-5 relative (Higham, Accuracy and Stability of Numerical Algorithms, ch. 14).
    dim, block = 300, 64
    form = BlockDiagonal(dim, block)
    rows = random_rows(400, dim)
    factor = form.zeros(rows)
    form.add_moment(factor, rows)
    shift = 0.1 * float(factor.diagonal(dim1=1, dim2=2).sum(-1).max())
    single, _, _ = form.inverse(factor, shift, want_spectrum=False, precision=torch.float32)
    double, _, _ = form.inverse(factor, shift, want_spectrum=False)
    assert single.dtype == torch.float32 and double.dtype == torch.float64
    error = float((single.double() - double).norm() / double.norm())
    assert 1e-12 < error < 1e-5
    native, _, _ = form.inverse(factor.float(), shift, want_spectrum=False)  # float32 statistics themselves
    assert native.dtype == torch.float32
    assert float((native.double() - double).norm() / double.norm()) < 1e-5


def test_block_diagonal_inverse_of_rank_deficient_blocks_at_the_bottom_of_the_damping_range():
    # Ten rows over blocks of 16: every block is singular, so the shift alone (1e-3, the factored shift
    # sqrt(lambda) at lambda = 1e-6) keeps them invertible, at condition numbers near 5e4. In float64 the
    # Cholesky inverse is then within about cond * 1e-16 of numpy's LU inverse (Higham, Accuracy and Stability
    # of Numerical Algorithms, 2nd ed., ch. 10 and 14): 1e-8 relative leaves room.
    form = BlockDiagonal(40, 16)
    rows = random_rows(10, 40)
    factor = form.zeros(rows)
    form.add_moment(factor, rows)
    shift = 1e-3
    inverse, _, fallback = form.inverse(factor, shift, want_spectrum=False)
    assert not fallback and inverse.dtype == torch.float64
    blocks = diagonal_blocks(rows.numpy().T @ rows.numpy(), form.block)
    assert max(np.linalg.cond(b + shift * np.eye(len(b))) for b in blocks) > 1e4
    expected = scipy.linalg.block_diag(*[np.linalg.inv(b + shift * np.eye(len(b))) for b in blocks])
    np.testing.assert_allclose(form.dense(inverse).numpy(), expected, rtol=1e-8, atol=1e-8 * np.abs(expected).max())
