"""Output gradients from one extra backward pass: streamed layer by layer, or all at once.

Reference: ``torch.autograd.grad`` with respect to each layer output on its own (the definition of
the gradient the capture needs), for graphs with skips, a branch no criterion reaches, a layer used
twice and an in-place operation after a layer.  The optimizer's statistics are checked the same way:
a streamed refresh against one that collects every gradient first (float64, rounding-level tolerance).
"""
from __future__ import annotations

import warnings

import pytest
import torch
from torch import nn
from torch.autograd.graph import get_gradient_edge

import ngopt
import ngopt.capture as capture_module
from ngopt.output_gradients import stream_output_grads

DTYPE = torch.float64


def branching_graph(generator):
    x = torch.randn(5, 4, generator=generator, dtype=DTYPE)
    w = [torch.randn(4, 4, generator=generator, dtype=DTYPE, requires_grad=True) for _ in range(5)]
    outputs = []
    h0 = x @ w[0]
    outputs.append(h0)
    h1 = torch.tanh(h0) @ w[1]
    outputs.append(h1)
    skip = h1 + h0                       # a skip connection around the second layer
    h2 = skip @ w[2]
    outputs.append(h2)
    h3 = (h2.relu_() @ w[3])              # in place right after a recorded output
    outputs.append(h3)
    unused = x @ w[4]                     # a layer the criterion input does not depend on
    outputs.append(unused)
    z = torch.sin(h3) + (h1 @ w[3])       # w[3] used a second time
    outputs.append(h1 @ w[3])
    z = z + outputs[-1]
    return z, outputs


def test_streamed_gradients_equal_autograd_grad_per_layer_output():
    generator = torch.Generator().manual_seed(0)
    z, outputs = branching_graph(generator)
    edges = [get_gradient_edge(o) for o in outputs]
    vector = torch.randn(z.shape, generator=generator, dtype=DTYPE)
    streamed = {}
    def consume(i, grad):
        streamed[i] = grad.clone()
    stream_output_grads(z, edges, vector, consume)
    references = torch.autograd.grad(z, edges, grad_outputs=vector, retain_graph=True, allow_unused=True)
    assert set(streamed) == {i for i, r in enumerate(references) if r is not None}
    assert 4 not in streamed  # the unused branch gets nothing
    for i, grad in streamed.items():
        torch.testing.assert_close(grad, references[i], rtol=1e-14, atol=1e-15)


def test_streamed_gradients_of_a_chain_arrive_during_the_pass_from_the_top():
    # Only the lowest output is requested from autograd; the others reach the callback as the pass
    # goes, from the top layer down, so no two of them need to be held together.
    generator = torch.Generator().manual_seed(1)
    h = torch.randn(3, 4, generator=generator, dtype=DTYPE)
    weights = [torch.randn(4, 4, generator=generator, dtype=DTYPE, requires_grad=True) for _ in range(4)]
    outputs = []
    for w in weights:
        h = h @ w
        outputs.append(h)
        h = torch.tanh(h)
    order = []
    stream_output_grads(h.sum(dim=1), [get_gradient_edge(o) for o in outputs], torch.ones(3, dtype=DTYPE),
                        lambda i, grad: order.append(i))
    assert order == [3, 2, 1, 0]


def resnet_like():
    torch.manual_seed(0)

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.stem = nn.Conv2d(1, 3, 3, padding=1)
            self.norm = nn.BatchNorm2d(3)
            self.inner = nn.Conv2d(3, 3, 3, padding=1)
            self.shared = nn.Linear(3, 3)
            self.head = nn.Linear(3, 4)

        def forward(self, x):
            h = torch.relu_(self.norm(self.stem(x)))
            h = h + self.inner(h)                  # skip connection
            v = h.mean(dim=(2, 3))
            v = torch.tanh(self.shared(v))
            v = torch.tanh(self.shared(v))         # one layer, two calls
            return self.head(v)

    return Net().to(DTYPE)


def small_transformer():
    torch.manual_seed(0)

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = nn.Embedding(7, 8)
            self.layer = nn.TransformerEncoderLayer(8, 2, dim_feedforward=12, dropout=0.0, batch_first=True)
            self.head = nn.Linear(8, 4)

        def forward(self, tokens):
            return self.head(self.layer(self.embed(tokens)).mean(dim=1))

    return Net().to(DTYPE)


def problem(kind, generator):
    if kind == "resnet":
        return resnet_like(), torch.randn(6, 1, 5, 5, generator=generator, dtype=DTYPE)
    return small_transformer(), torch.randint(0, 7, (6, 5), generator=generator)


@pytest.mark.parametrize("kind", ["resnet", "transformer"])
@pytest.mark.parametrize("weight_sharing", ["expand", "reduce"])
@pytest.mark.parametrize("structure", ["kfac", "ekfac", "diag"])
def test_streamed_refresh_gives_the_statistics_of_a_collected_one(structure, weight_sharing, kind, monkeypatch):
    states, streams = [], []
    original = capture_module.stream_output_grads
    monkeypatch.setattr(capture_module, "stream_output_grads",
                        lambda *args: (streams.append(1), original(*args))[1])
    for streamed in (True, False):
        if not streamed:
            assert len(streams) == 3  # one streamed pass per refresh
            monkeypatch.setattr(capture_module, "_streamable", lambda targets: False)
        generator = torch.Generator().manual_seed(2)
        model, x = problem(kind, generator)
        y = torch.randint(0, 4, (6,), generator=generator)
        loss_fn = nn.CrossEntropyLoss()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            opt = ngopt.FisherDescent(model, loss_fn, structure=structure, weight_sharing=weight_sharing,
                                      stats_interval=1, seed=5, stats_fraction=1.0)  # same draws
        for _ in range(3):
            opt.zero_grad()
            loss_fn(model(x), y).backward()
            opt.step()
        states.append({name: {k: v.clone() for k, v in opt.state[b.layer.weight].items()
                              if isinstance(v, torch.Tensor)} for name, b in opt.blocks.items()})
    for name, tensors in states[0].items():
        for key, value in tensors.items():
            torch.testing.assert_close(value, states[1][name][key], rtol=1e-10, atol=1e-13, msg=f"{name} {key}")
    assert len(streams) == 3


@pytest.mark.parametrize("shape", [(7, 5), (4, 6, 3), (2, 4, 3, 5)])
@pytest.mark.parametrize("samples", [1, 3])
def test_sampled_cross_entropy_gradients_are_softmax_minus_the_drawn_one_hot(shape, samples):
    # The gradient of -log p_y with respect to the logits is p - e_y (common practice); the draws are
    # ngopt.sampling.categorical_draws' from the same generator, along the class dimension (dim 1); the
    # draws' distribution is checked in tests/test_sampling.py.
    from ngopt.likelihoods import likelihood_for
    from ngopt.sampling import categorical_draws
    output = torch.randn(*shape, generator=torch.Generator().manual_seed(1))
    got = likelihood_for(nn.CrossEntropyLoss()).sampled_output_grads(output, torch.Generator().manual_seed(0),
                                                                     samples)
    prob = torch.softmax(output, dim=1)
    flat = prob.movedim(1, -1).reshape(-1, shape[1])
    draws = categorical_draws(flat, samples, torch.Generator().manual_seed(0))
    one_hot = torch.nn.functional.one_hot(draws.T, shape[1]).to(prob.dtype)
    expected = (flat.unsqueeze(0) - one_hot).reshape((samples,) + prob.movedim(1, -1).shape).movedim(-1, 2)
    assert got.shape == (samples,) + tuple(shape)
    assert torch.equal(got, expected)  # the same subtraction of 1.0 from the same entries
