"""The sampled/exact Fisher is that of the loss as the user computes it: it starts from the tensor the
criterion object receives, through whatever the code did between the model and the loss.

References: the Fisher of L = c sum_terms l_t is c sum_t J_t^T H_t J_t with H_t the output Fisher of
one term (Martens & Grosse 2015, sec. 9; for softmax cross-entropy H = diag(p) - p p^T), built here
with torch.func.jacrev of the loss's input as written; and the same model wrapped so that it returns
the criterion's input itself, which the optimizer must not tell apart from the original loop.
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn
from torch.func import functional_call, jacrev

import ngopt

VOCAB, POSITIONS, BATCH = 11, 7, 12
DTYPE = torch.float64
# float64 throughout; the two loops run the same operations, so they agree to rounding (common practice).
RTOL = 1e-10


class TinyLM(nn.Module):
    """Embedding, a causal running mean over positions (so positions interact), tanh, read-out."""

    def __init__(self, dict_output=False):
        super().__init__()
        self.embed = nn.Embedding(VOCAB, 6)
        self.hidden = nn.Linear(6, 6)
        self.read_out = nn.Linear(6, VOCAB)
        self.dict_output = dict_output

    def forward(self, tokens):
        e = self.embed(tokens)
        counts = torch.arange(1, tokens.shape[1] + 1, dtype=e.dtype).reshape(1, -1, 1)
        h = torch.tanh(self.hidden(e.cumsum(dim=1) / counts))
        logits = self.read_out(h)                       # [N, T, V]
        return {"logits": logits, "hidden": h} if self.dict_output else logits


class Returns(nn.Module):
    """The same network, returning what the criterion is given in the loop under test."""

    def __init__(self, inner, transform):
        super().__init__()
        self.inner, self.transform = inner, transform

    def forward(self, tokens):
        return self.transform(self.inner(tokens))


def flat(out):
    return out.reshape(-1, VOCAB)


def shifted(out):
    return out[:, :-1].reshape(-1, VOCAB)


def tempered(out):
    return out / 0.7


def picked(out):
    return out["logits"].reshape(-1, VOCAB)


# (name, transform of the model output, targets from tokens, model returns a dict)
LOOPS = [
    ("view", flat, lambda tokens, labels: labels.reshape(-1), False),
    ("next_token", shifted, lambda tokens, labels: tokens[:, 1:].reshape(-1), False),
    ("temperature", lambda out: flat(tempered(out)), lambda tokens, labels: labels.reshape(-1), False),
    ("dict", picked, lambda tokens, labels: labels.reshape(-1), True),
]


def data(seed=0):
    generator = torch.Generator().manual_seed(seed)
    tokens = torch.randint(0, VOCAB, (BATCH, POSITIONS), generator=generator)
    labels = torch.randint(0, VOCAB, (BATCH, POSITIONS), generator=generator)
    return tokens, labels


def exact_optimizer(model, loss_fn, **overrides):
    settings = dict(fisher="exact", lr=0.5, momentum=0.0, max_step_kl=None, stats_memory=0.0, stats_interval=1,
                    inverse_interval=1, damping=1e-3, step_rule="fixed", damping_rule="fixed")
    settings.update(overrides)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the exact Fisher's cost note
        return ngopt.FisherDescent(model, loss_fn, **settings)


@pytest.mark.parametrize("name, transform, make_targets, dict_output", LOOPS, ids=[loop[0] for loop in LOOPS])
def test_loop_matches_a_model_that_returns_the_criterion_input(name, transform, make_targets, dict_output):
    torch.manual_seed(1)
    tokens, labels = data()
    targets = make_targets(tokens, labels)
    looped = TinyLM(dict_output).to(DTYPE)
    wrapped = Returns(copy.deepcopy(looped), transform)
    loss_a, loss_b = nn.CrossEntropyLoss(), nn.CrossEntropyLoss()
    opt_a, opt_b = exact_optimizer(looped, loss_a), exact_optimizer(wrapped, loss_b)
    for _ in range(3):
        opt_a.zero_grad()
        loss_a(transform(looped(tokens)), targets).backward()
        opt_a.step()
        opt_b.zero_grad()
        loss_b(wrapped(tokens), targets).backward()
        opt_b.step()
    for p, q in zip(looped.parameters(), wrapped.inner.parameters()):
        torch.testing.assert_close(p, q, rtol=RTOL, atol=1e-12)


def exact_layer_fisher(model, layer_name, loss_input, targets_shape_terms):
    """c sum_t J_t^T H_t J_t for one layer's (weight, bias), columns in the blocks' order.

    ``loss_input(params)`` returns the criterion's input [terms, V]; c = 1/terms (mean reduction).
    Block order: column-major vec of the [d_out, d_in + 1] gradient matrix.
    """
    layer = model.get_submodule(layer_name)
    names = [f"{layer_name}.weight", f"{layer_name}.bias"]
    params = {n: p.detach() for n, p in model.named_parameters() if n in names}

    def z_of(own):
        return loss_input({**{n: p.detach() for n, p in model.named_parameters()}, **own})

    z = z_of(params).detach()
    jac = jacrev(z_of)(params)
    d_out, d_in = layer.weight.shape
    # [terms, V, d_out, d_in + 1] -> [terms, V, P] with the column-major vec order
    matrix = torch.cat([jac[names[0]], jac[names[1]].unsqueeze(-1)], dim=-1)
    jacobian = matrix.transpose(-1, -2).reshape(z.shape[0], z.shape[1], -1)
    prob = torch.softmax(z, dim=1)
    hessian = torch.diag_embed(prob) - prob.unsqueeze(2) * prob.unsqueeze(1)
    c = 1.0 / targets_shape_terms
    return c * torch.einsum("tvp,tvw,twq->pq", jacobian, hessian, jacobian)


@pytest.mark.parametrize("layer", ["hidden", "read_out"])
@pytest.mark.parametrize("name, transform, make_targets, dict_output", LOOPS[:2], ids=["view", "next_token"])
def test_exact_diagonal_block_is_the_fisher_of_the_loss_as_written(layer, name, transform, make_targets,
                                                                   dict_output):
    torch.manual_seed(2)
    tokens, labels = data(3)
    targets = make_targets(tokens, labels)
    model = TinyLM().to(DTYPE)
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_optimizer(model, loss_fn, structure="diag", lr=0.0)
    opt.zero_grad()
    loss_fn(transform(model(tokens)), targets).backward()
    opt.step()
    reference = exact_layer_fisher(model, layer, lambda p: transform(functional_call(model, p, (tokens,))),
                                   targets.numel())
    got = opt.blocks[layer].dense_curvature()
    torch.testing.assert_close(torch.diagonal(got), torch.diagonal(reference), rtol=1e-9, atol=1e-14)


def test_two_criterion_calls_add_up_with_the_losses_weights():
    # L = l_1 + 0.3 l_2 with two heads on a shared layer: F = F_1 + 0.3 F_2 (linearity of the Fisher
    # in the loss, Martens & Grosse 2015 sec. 9); the exact diagonal block of the shared layer.
    torch.manual_seed(4)
    trunk, head_a, head_b = nn.Linear(5, 4), nn.Linear(4, 3), nn.Linear(4, 2)
    model = nn.ModuleDict({"trunk": trunk, "a": head_a, "b": head_b}).to(DTYPE)

    class TwoHeads(nn.Module):
        def __init__(self):
            super().__init__()
            self.net = model

        def forward(self, x):
            h = torch.tanh(self.net["trunk"](x))
            return self.net["a"](h), self.net["b"](h)

    net = TwoHeads()
    x = torch.randn(16, 5, dtype=DTYPE)
    ya, yb = torch.randint(0, 3, (16,)), torch.randint(0, 2, (16,))
    loss_fn = nn.CrossEntropyLoss()
    opt = exact_optimizer(net, loss_fn, structure="diag", lr=0.0)
    opt.zero_grad()
    out_a, out_b = net(x)
    (loss_fn(out_a, ya) + 0.3 * loss_fn(out_b, yb)).backward()
    opt.step()

    def head_input(index):
        return lambda p: functional_call(net, p, (x,))[index]

    fisher = exact_layer_fisher(net, "net.trunk", head_input(0), 16) + \
        0.3 * exact_layer_fisher(net, "net.trunk", head_input(1), 16)
    got = opt.blocks["net.trunk"].dense_curvature()
    torch.testing.assert_close(torch.diagonal(got), torch.diagonal(fisher), rtol=1e-9, atol=1e-14)


def test_a_criterion_call_on_a_tensor_outside_the_layers_adds_nothing():
    torch.manual_seed(5)
    tokens, labels = data(6)
    runs = []
    for extra in (False, True):
        model = TinyLM().to(DTYPE)
        model.load_state_dict(TinyLM().to(DTYPE).state_dict()) if not runs else model.load_state_dict(runs[0][0])
        loss_fn = nn.CrossEntropyLoss()
        opt = exact_optimizer(model, loss_fn, structure="diag", lr=0.0)
        opt.zero_grad()
        loss = loss_fn(flat(model(tokens)), labels.reshape(-1))
        if extra:  # a regularizer computed with the same criterion on a free tensor
            free = torch.zeros(4, VOCAB, dtype=DTYPE, requires_grad=True)
            loss = loss + loss_fn(free, torch.zeros(4, dtype=torch.long))
        loss.backward()
        opt.step()
        runs.append((model.state_dict(), {n: b.dense_curvature() for n, b in opt.blocks.items()}))
    for name in runs[0][1]:
        torch.testing.assert_close(runs[1][1][name], runs[0][1][name], rtol=1e-12, atol=0)


def test_a_functional_loss_is_found_like_the_criterion_object():
    # F.cross_entropy in the user's code is the same loss as the criterion object: no warning, and the
    # same curvature and trajectory as the loop that calls the object.
    torch.manual_seed(7)
    x, y = torch.randn(20, 3, dtype=DTYPE), torch.randint(0, 4, (20,))
    base = nn.Sequential(nn.Linear(3, 5), nn.Tanh(), nn.Linear(5, 4)).to(DTYPE)
    twin = copy.deepcopy(base)
    twin_loss = nn.CrossEntropyLoss()
    opt, twin_opt = exact_optimizer(base, None), exact_optimizer(twin, twin_loss)
    for _ in range(3):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            opt.zero_grad()
            nn.functional.cross_entropy(base(x), y).backward()
            opt.step()
        twin_opt.zero_grad()
        twin_loss(twin(x), y).backward()
        twin_opt.step()
    for p, q in zip(base.parameters(), twin.parameters()):
        torch.testing.assert_close(p, q, rtol=RTOL, atol=1e-12)


def test_exact_cost_warning_counts_the_criterions_classes_and_positions():
    tokens, labels = data()
    model = TinyLM().to(DTYPE)
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, fisher="exact", stats_interval=1)
    opt.zero_grad()
    with pytest.warns(UserWarning) as caught:
        loss_fn(flat(model(tokens)), labels.reshape(-1)).backward()
    messages = [str(w.message) for w in caught if "backpropagates" in str(w.message)]
    assert len(messages) == 1
    assert f"{VOCAB * POSITIONS} vectors" in messages[0]
    assert f"{VOCAB} classes x {POSITIONS} positions" in messages[0]
