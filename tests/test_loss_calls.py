"""The loss is found wherever it is computed, with its reduction, ignored labels, masks and scaling.

References: the exact per-layer Fisher of the loss as written, ``sum_n w_n J_n^T H_n J_n`` with
``w_n = dL/dl_n`` (1/#counted terms under torch's mean, 0 for ignored labels), from torch.func
Jacobians in float64 (``fisher_reference.py``; Martens & Grosse 2015, sec. 9); and twins that define
the same loss another way (a criterion object on the model's logits, the ignored rows dropped
before the loss, a mean instead of a sum divided by the count), which must give the same
statistics and, step for step, the same weights.  float64, one process: agreement to rounding
(1e-10 relative, common practice).
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn
import torch.nn.functional as F

import ngopt
from fisher_reference import cross_entropy_fisher, loss_input_jacobian

VOCAB, LENGTH, BATCH = 9, 6, 8
DTYPE = torch.float64
RTOL = 1e-10


class LanguageModel(nn.Module):
    """Embedding, a causal running mean, a read-out; given ``labels`` it computes its own next-token
    loss as common language-model code does: labels shifted inside, -100 for padding, an optional
    sum divided by a token count."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(VOCAB, 5)
        self.hidden = nn.Linear(5, 5)
        self.read_out = nn.Linear(5, VOCAB)

    def logits(self, tokens):
        e = self.embed(tokens)
        counts = torch.arange(1, tokens.shape[1] + 1, dtype=e.dtype).reshape(1, -1, 1)
        return self.read_out(torch.tanh(self.hidden(e.cumsum(dim=1) / counts)))

    def forward(self, input_ids, labels=None, num_items=None):
        logits = self.logits(input_ids)
        if labels is None:
            return {"logits": logits}
        shifted = F.pad(labels, (0, 1), value=-100)[:, 1:]
        reduction = "mean" if num_items is None else "sum"
        loss = F.cross_entropy(logits.reshape(-1, VOCAB), shifted.reshape(-1), ignore_index=-100, reduction=reduction)
        if num_items is not None:
            loss = loss / num_items
        return {"loss": loss, "logits": logits}


def token_batch(seed=0):
    generator = torch.Generator().manual_seed(seed)
    tokens = torch.randint(0, VOCAB, (BATCH, LENGTH), generator=generator)
    labels = tokens.clone()
    labels[::2, 4:] = -100  # padding at the end of every other sequence
    return tokens, labels


def settings(**overrides):
    base = dict(fisher="exact", lr=0.5, momentum=0.0, max_step_kl=None, stats_memory=0.0, stats_interval=1,
                inverse_interval=1, damping=1e-2, seed=0)
    base.update(overrides)
    return base


def quiet(model, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empirical Fisher's note
        return ngopt.FisherDescent(model, **options)


def exact_layer_fisher(model, layer, tokens, labels):
    """The exact Fisher of the model's own loss for one layer's (weight, bias), in the block's order."""
    names = [f"{layer}.weight", f"{layer}.bias"]

    def loss_input(params):
        return torch.func.functional_call(model, params, (tokens,))["logits"].reshape(-1, VOCAB)

    z, jac = loss_input_jacobian(model, names, loss_input)
    shifted = F.pad(labels, (0, 1), value=-100)[:, 1:].reshape(-1)
    counted = shifted != -100
    weights = counted.to(DTYPE) / counted.sum()
    d_out = model.get_submodule(layer).weight.shape[0]
    # the block's order: column-major vec of [W | b]
    matrix = torch.cat([jac[names[0]], jac[names[1]].unsqueeze(-1)], dim=-1)
    return cross_entropy_fisher(z, matrix.transpose(-1, -2).reshape(z.shape[0], VOCAB, -1), weights), d_out


@pytest.mark.parametrize("layer", ["hidden", "read_out"])
def test_a_loss_computed_inside_the_model_gets_the_exact_fisher_of_that_loss(layer):
    torch.manual_seed(1)
    model = LanguageModel().to(DTYPE)
    tokens, labels = token_batch()
    opt = ngopt.FisherDescent(model, **settings(structure="diag", lr=0.0))  # no loss_fn: found inside
    opt.zero_grad()
    model(tokens, labels=labels)["loss"].backward()
    opt.step()
    reference, _ = exact_layer_fisher(model, layer, tokens, labels)
    got = opt.blocks[layer].dense_curvature()
    torch.testing.assert_close(torch.diagonal(got), torch.diagonal(reference), rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize("rules", [dict(step_rule="fixed", damping_rule="lm", damping_interval=1),
                                   dict(step_rule="quadratic", damping_rule="lm", damping_interval=2)],
                         ids=["fixed-lm", "quadratic-lm"])
@pytest.mark.parametrize("count", [False, True], ids=["mean", "sum-over-count"])
def test_a_loss_inside_the_model_trains_like_the_same_loss_in_the_loop(rules, count):
    # The twin computes the same next-token loss in the loop with a criterion object on the logits.
    # Both rules evaluate the loss on the recorded batch (the model's own loss call is replayed).
    torch.manual_seed(2)
    model = LanguageModel().to(DTYPE)
    twin = copy.deepcopy(model)
    criterion = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, **settings(**rules))
    twin_opt = ngopt.FisherDescent(twin, criterion, **settings(**rules))
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # the batch is replayable on both sides
        for step in range(4):
            tokens, labels = token_batch(step)
            opt.zero_grad()
            items = int((labels[:, 1:] != -100).sum()) if count else None
            model(tokens, labels=labels, num_items=items)["loss"].backward()
            opt.step()
            twin_opt.zero_grad()
            logits = twin(tokens)["logits"]
            criterion(logits[:, :-1].reshape(-1, VOCAB), labels[:, 1:].reshape(-1)).backward()
            twin_opt.step()
            ours, theirs = opt.diagnostics()["update"], twin_opt.diagnostics()["update"]
            if theirs["reduction_ratio"] is None:  # the ratio is measured only on steps the damping rule is due
                assert ours["reduction_ratio"] is None
            else:
                assert ours["reduction_ratio"] == pytest.approx(theirs["reduction_ratio"], rel=1e-8)
    for p, q in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=RTOL, atol=1e-13)


@pytest.mark.parametrize("fisher", ["exact", "empirical"])
def test_ignored_labels_carry_no_curvature(fisher):
    # nn.CrossEntropyLoss() ignores label -100 and its mean counts only the other rows; the twin drops
    # those rows before the same criterion: the same statistics and the same first step.
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(6, 6), nn.Tanh(), nn.Linear(6, 7)).to(DTYPE)
    twin = copy.deepcopy(model)
    generator = torch.Generator().manual_seed(4)
    x = torch.randn(30, 6, generator=generator, dtype=DTYPE)
    y = torch.randint(0, 7, (30,), generator=generator)
    y[::3] = -100
    criterion = nn.CrossEntropyLoss()
    opt, twin_opt = quiet(model, **settings(fisher=fisher)), quiet(twin, **settings(fisher=fisher))
    opt.zero_grad()
    criterion(model(x), y).backward()
    opt.step()
    kept = y != -100
    twin_opt.zero_grad()
    criterion(twin(x)[kept], y[kept]).backward()
    twin_opt.step()
    for name in ("0", "2"):
        for key in ("factor_in", "factor_out"):
            torch.testing.assert_close(opt.state[opt.blocks[name].layer.weight][key],
                                       twin_opt.state[twin_opt.blocks[name].layer.weight][key], rtol=RTOL,
                                       atol=1e-15, msg=f"{name}.{key}")
    for p, q in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=RTOL, atol=1e-13)


def test_a_masked_sum_without_reduction_is_the_mean_over_the_kept_rows():
    # (l * mask).sum() / mask.sum() with reduction="none": the weights dL/dl_n are the mask over its
    # count, so the twin that keeps only the masked rows under a mean trains identically.
    torch.manual_seed(5)
    model = nn.Sequential(nn.Linear(4, 6), nn.Tanh(), nn.Linear(6, 3)).to(DTYPE)
    twin = copy.deepcopy(model)
    generator = torch.Generator().manual_seed(6)
    x = torch.randn(20, 4, generator=generator, dtype=DTYPE)
    y = torch.randint(0, 3, (20,), generator=generator)
    mask = (torch.arange(20) % 4 != 0).to(DTYPE)
    opt, twin_opt = ngopt.FisherDescent(model, **settings()), ngopt.FisherDescent(twin, **settings())
    for _ in range(3):
        opt.zero_grad()
        ((F.cross_entropy(model(x), y, reduction="none") * mask).sum() / mask.sum()).backward()
        opt.step()
        twin_opt.zero_grad()
        F.cross_entropy(twin(x)[mask.bool()], y[mask.bool()]).backward()
        twin_opt.step()
    for p, q in zip(model.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=RTOL, atol=1e-13)


def test_label_smoothing_keeps_the_curvature_of_the_plain_loss():
    # The smoothed loss (1 - e) l(y) + e mean_k l(k) is linear in the log-softmax with weights summing to
    # one, so its Hessian in the logits is diag(p) - p p^T as for the plain loss: the same statistics.
    torch.manual_seed(7)
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 3)).to(DTYPE)
    twin = copy.deepcopy(model)
    x, y = torch.randn(16, 4, dtype=DTYPE), torch.randint(0, 3, (16,))
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(label_smoothing=0.2), **settings(lr=0.0))
    twin_opt = ngopt.FisherDescent(twin, nn.CrossEntropyLoss(), **settings(lr=0.0))
    opt.zero_grad()
    opt.loss_fn(model(x), y).backward()
    opt.step()
    twin_opt.zero_grad()
    twin_opt.loss_fn(twin(x), y).backward()
    twin_opt.step()
    for name in ("0", "2"):
        torch.testing.assert_close(opt.blocks[name].dense_curvature(), twin_opt.blocks[name].dense_curvature(),
                                   rtol=RTOL, atol=1e-15)


def test_a_loss_with_label_dependent_weights_is_refused_clearly():
    model = nn.Sequential(nn.Linear(4, 3)).to(DTYPE)
    opt = ngopt.FisherDescent(model)
    x, y = torch.randn(6, 4, dtype=DTYPE), torch.randint(0, 3, (6,))
    F.cross_entropy(model(x), y, weight=torch.ones(3, dtype=DTYPE)).backward()
    with pytest.raises(RuntimeError, match="class weights.*fisher='empirical'"):
        opt.step()
