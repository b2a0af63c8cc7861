"""A weight used twice (an embedding lookup and the output layer, tied) gets one block for both uses.

References: the exact Fisher of the tied weight, ``sum_n w_n J_n^T H_n J_n`` from torch.func Jacobians
in float64 (``fisher_reference.py``; Martens & Grosse 2015, sec. 9), which includes the two uses' cross
terms; an untied twin (the same values in two parameters) whose two blocks are checked against the
exact Fisher elsewhere, and whose statistics the tied block's two terms must equal; and
``torch.linalg.solve`` of the dense damped curvature for the inverse by generalized eigendecompositions
(Golub & Van Loan, Matrix Computations, sec. 8.7).  float64: agreement to rounding, 1e-9 relative for
the solves of matrices with condition numbers up to ~1e6 (common practice).
"""
from __future__ import annotations

import copy

import pytest
import torch
from torch import nn
import torch.nn.functional as F

import ngopt
from fisher_reference import cross_entropy_fisher, loss_input_jacobian

VOCAB, WIDTH, BATCH, LENGTH = 7, 4, 6, 5
DTYPE = torch.float64


class TiedLM(nn.Module):
    def __init__(self, tied=True):
        super().__init__()
        self.embed = nn.Embedding(VOCAB, WIDTH)
        self.mix = nn.Linear(WIDTH, WIDTH)
        self.head = None if tied else nn.Parameter(self.embed.weight.detach().clone())

    def forward(self, tokens):
        h = torch.tanh(self.mix(self.embed(tokens)))
        return F.linear(h, self.embed.weight if self.head is None else self.head).reshape(-1, VOCAB)


def data(seed=0):
    generator = torch.Generator().manual_seed(seed)
    return (torch.randint(0, VOCAB, (BATCH, LENGTH), generator=generator),
            torch.randint(0, VOCAB, (BATCH * LENGTH,), generator=generator))


def fresh_optimizer(model, structure="kfac", lr=0.0, damping=1e-3):
    return ngopt.FisherDescent(model, fisher="exact", structure=structure, lr=lr, momentum=0.0, max_step_kl=None,
                               stats_memory=0.0, stats_interval=1, inverse_interval=1, damping=damping,
                               damping_rule="fixed", seed=0)


def refresh(model, opt, tokens, targets):
    opt.zero_grad()
    F.cross_entropy(model(tokens), targets).backward()
    opt.step()


def tied_and_untied(structure="kfac", seed=1):
    torch.manual_seed(seed)
    tied = TiedLM().to(DTYPE)
    untied = TiedLM(tied=False).to(DTYPE)
    untied.load_state_dict({**tied.state_dict(), "head": tied.embed.weight.detach().clone()})
    tokens, targets = data()
    opts = []
    for model in (tied, untied):
        opt = fresh_optimizer(model, structure)
        refresh(model, opt, tokens, targets)
        opts.append(opt)
    return tied, untied, opts, tokens, targets


def test_the_tied_weight_gets_one_block_with_both_uses_statistics():
    tied, untied, (opt, twin_opt), _, _ = tied_and_untied()
    block = opt.blocks["embed"]
    assert block.layer.kind == "embedding+linear" and "tied" in block.describe()
    assert opt.curvature_assignment()["embed.weight"].kind == "embedding+linear"
    # Term 0 is the lookup's K-FAC (its own layout [d, V]); term 1 the head's ([V, d]): each equals the
    # untied twin's block of that use.
    for term, twin_name in ((0, "embed"), (1, "head")):
        twin_state = twin_opt.state[twin_opt.blocks[twin_name].layer.weight]
        for key in ("factor_in", "factor_out"):
            torch.testing.assert_close(block.state[f"use{term}.{key}"], twin_state[key], rtol=1e-12, atol=1e-15)


def test_the_tied_block_is_closer_to_the_exact_fisher_than_either_use_alone():
    tied, untied, (opt, twin_opt), tokens, targets = tied_and_untied()

    def loss_input(params):
        return torch.func.functional_call(tied, params, (tokens,))

    z, jac = loss_input_jacobian(tied, ["embed.weight"], loss_input)
    weights = torch.full((z.shape[0],), 1.0 / z.shape[0], dtype=DTYPE)
    exact = cross_entropy_fisher(z, jac["embed.weight"].reshape(z.shape + (-1,)), weights)  # row-major W
    # The block's order: column-major vec of its first use's gradient matrix W^T [d, V] = row-major W.
    block = opt.blocks["embed"].dense_curvature()
    lookup = twin_opt.blocks["embed"].dense_curvature()  # the lookup's use alone, same order
    head = twin_opt.blocks["head"].dense_curvature()      # column-major vec of W [V, d]: reorder to row-major
    order = torch.arange(VOCAB * WIDTH).reshape(WIDTH, VOCAB).T.reshape(-1)
    head = head[order][:, order]

    def error(approx):
        return float(torch.linalg.matrix_norm(approx - exact) / torch.linalg.matrix_norm(exact))

    errors = {"tied": error(block), "lookup alone": error(lookup), "head alone": error(head)}
    print("relative Frobenius error against the exact Fisher of the tied weight:", errors)
    assert errors["tied"] < errors["lookup alone"] and errors["tied"] < errors["head alone"]
    # What it drops is the two uses' cross terms: the sum of both uses' exact Fisher matrices alone.
    assert errors["tied"] < 0.6


@pytest.mark.parametrize("damping", [1e-2, 1e-8])
def test_the_generalized_eigen_inverse_solves_the_dense_damped_curvature(damping):
    tied, _, (opt, _), _, _ = tied_and_untied()
    block = opt.blocks["embed"]
    tensors, _ = block.prepare_inverse(block.state, damping, False)
    generator = torch.Generator().manual_seed(3)
    matrix = torch.randn(WIDTH, VOCAB, generator=generator, dtype=DTYPE)  # a gradient matrix, layout [d, V]
    got = block.precondition(matrix, damping, tensors)
    dense = block.dense_curvature(damping)
    expected = torch.linalg.solve(dense, matrix.T.reshape(-1)).reshape(VOCAB, WIDTH).T
    print(f"condition number of the damped block: {float(torch.linalg.cond(dense)):.3g}")
    torch.testing.assert_close(got, expected, rtol=1e-9, atol=1e-12 * float(expected.abs().max()))
    # and the damped product is its inverse
    torch.testing.assert_close(block.damped_product(got, damping), matrix, rtol=1e-9, atol=1e-10)


def test_the_diagonal_structure_sums_the_two_uses_exact_diagonals():
    tied, untied, (opt, twin_opt), _, _ = tied_and_untied("diag")
    lookup = twin_opt.state[untied.embed.weight]["fisher_diagonal"]   # [d, V]
    head = twin_opt.state[untied.head]["fisher_diagonal"]             # [V, d]
    torch.testing.assert_close(opt.blocks["embed"].state["use0.fisher_diagonal"], lookup, rtol=1e-12, atol=0)
    expected = lookup + head.T
    torch.testing.assert_close(torch.diagonal(opt.blocks["embed"].dense_curvature()), expected.T.reshape(-1),
                               rtol=1e-12, atol=0)


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_a_tied_language_model_trains_and_resumes(structure):
    torch.manual_seed(4)
    model = TiedLM()
    tokens, targets = data(5)
    opt = ngopt.FisherDescent(model, structure=structure, stats_interval=2, inverse_interval=4, seed=0)
    losses = []
    for _ in range(10):
        opt.zero_grad()
        loss = F.cross_entropy(model(tokens), targets)
        loss.backward()
        opt.step()
        losses.append(float(loss))
    assert losses[-1] < 0.8 * losses[0], losses
    assert not any(a.fallback for a in opt.curvature_assignment().values())
    saved = copy.deepcopy((model.state_dict(), opt.state_dict()))
    copy_model = TiedLM()
    copy_model.load_state_dict(saved[0])
    resumed = ngopt.FisherDescent(copy_model, structure=structure, stats_interval=2, inverse_interval=4, seed=0)
    resumed.load_state_dict(saved[1])
    for m, o in ((model, opt), (copy_model, resumed)):
        for _ in range(3):
            o.zero_grad()
            F.cross_entropy(m(tokens), targets).backward()
            o.step()
    for p, q in zip(model.parameters(), copy_model.parameters()):
        assert torch.equal(p, q)  # one process, the same operations in the same order
