"""Behaviour of ``ngopt.FisherDescent`` in a training loop (API.md, "Behaviour users rely on").

The drop-in loop and its gradients (1), what the statistics see under gradient
accumulation and weight sharing, what is not collected (6), frozen and
unsupported parameters (6), in-place operations downstream, and non-finite
steps (7).  Expected curvature factors are computed here by hand from the
inputs with plain torch, in float64.

Conventions the code follows (found in ngopt/blocks/kronecker.py and
ngopt/capture.py, checked below):

* gradient accumulation (several forward/backward pairs before one step):
  ``A`` is the mean of ``a a^T`` over all rows of all micro-batches, ``G`` is
  the mean over micro-batches of each micro-batch's ``G``; this is the
  curvature of the *average* of the micro-batch losses;
* a module called several times in one forward: ``A`` is the mean over the
  rows of all calls, ``G`` the sum over the calls (the "expand" convention of
  Eschenhagen et al., NeurIPS 2023), the same as one call on the stacked inputs;
  the diagonal block joins the calls like positions, which keeps it the exact
  Fisher diagonal (checked against ``torch.autograd.functional.jacobian``).
"""
import copy
import warnings

import pytest
import torch
from torch import nn

import ngopt
import ngopt.uses.recorder as recorder_module

DTYPE = torch.float64
FISHERS = ("sampled", "exact", "empirical")
STRUCTURES = ("kfac", "ekfac", "ekfac-gradient", "diag")


def quiet_optimizer(model, loss_fn, **kwargs):
    kwargs = {"step_rule": "fixed", "damping_rule": "fixed", **kwargs}  # the rules these tests were written for
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ngopt.FisherDescent(model, loss_fn, **kwargs)


def small_cnn(seed=0, inplace=False):
    """Conv2d -> ReLU -> Linear -> LayerNorm -> PReLU -> Linear on 1x4x4 images (PReLU: fallback rule)."""
    torch.manual_seed(seed)
    return nn.Sequential(nn.Conv2d(1, 3, 3, padding=1), nn.ReLU(inplace=inplace), nn.Flatten(),
                         nn.Linear(48, 8), nn.LayerNorm(8), nn.PReLU(8), nn.Linear(8, 3)).to(DTYPE)


def tanh_mlp(seed=0, sizes=(3, 4, 2)):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(sizes[0], sizes[1]), nn.Tanh(), nn.Linear(sizes[1], sizes[2])).to(DTYPE)


def image_batch(rows=12, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return (torch.randn(rows, 1, 4, 4, generator=generator, dtype=DTYPE),
            torch.randint(0, 3, (rows,), generator=generator))


def regression_batch(rows, d_in=3, d_out=2, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return (torch.randn(rows, d_in, generator=generator, dtype=DTYPE),
            torch.randn(rows, d_out, generator=generator, dtype=DTYPE))


def snapshot(model, opt):
    """Weights and every tensor of the optimizer state (momentum buffers, factors, inverses)."""
    params = list(model.parameters())
    state = {(index, key): value.clone() for index, p in enumerate(params)
             for key, value in opt.state.get(p, {}).items() if torch.is_tensor(value)}
    return [p.detach().clone() for p in params], state


def assert_same_snapshot(first, second):
    assert all(torch.equal(p, q) for p, q in zip(first[0], second[0]))
    assert first[1].keys() == second[1].keys()
    for key, value in first[1].items():
        assert torch.equal(value, second[1][key]), key


def with_ones(rows):
    return torch.cat([rows, torch.ones(rows.shape[0], 1, dtype=rows.dtype)], dim=1)


# ---------------------------------------------------------------------------- the drop-in loop
@pytest.mark.parametrize("fallback", ["sgd", "adam"])
@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize("fisher", FISHERS)
def test_ordinary_loop_works_and_leaves_the_users_gradients_alone(fisher, structure, fallback):
    model = small_cnn()
    plain = copy.deepcopy(model)  # same weights, no optimizer attached
    loss_fn = nn.CrossEntropyLoss()
    opt = quiet_optimizer(model, loss_fn, fisher=fisher, structure=structure, fallback=fallback, lr=0.1,
                          stats_interval=2, inverse_interval=2)
    x, y = image_batch()
    global_rng = torch.get_rng_state()
    losses = []
    for _ in range(6):
        opt.zero_grad()
        loss = loss_fn(model(x), y)
        loss.backward()  # the only backward the user writes
        plain.zero_grad()
        plain_loss = loss_fn(plain(x), y)
        plain_loss.backward()
        assert torch.equal(loss, plain_loss)
        for p, q in zip(model.parameters(), plain.parameters()):
            assert torch.equal(p.grad, q.grad)
        opt.step()
        losses.append(loss.item())
        with torch.no_grad():
            for p, q in zip(model.parameters(), plain.parameters()):
                q.copy_(p)
    assert set(opt.blocks) == {"0", "3", "4", "6"}
    assert all(block.has_statistics and block.has_inverse for block in opt.blocks.values())
    assert losses[-1] < losses[0]
    assert opt.diagnostics()["step"] == 6 and opt.diagnostics()["skipped_steps"] == 0
    # Sampled targets come from the optimizer's private generator (ngopt/optimizer.py docstring).
    assert torch.equal(torch.get_rng_state(), global_rng)


@pytest.mark.parametrize("fisher", ["sampled", "exact"])
@pytest.mark.parametrize("loss_fn,target", [
    (nn.MSELoss(reduction="sum"), lambda rows: torch.randn(rows, 3, dtype=DTYPE)),
    (nn.BCEWithLogitsLoss(), lambda rows: torch.randint(0, 2, (rows, 3)).to(DTYPE)),
], ids=["mse-sum", "bce"])
def test_extra_backward_does_not_touch_the_gradients_for_other_criteria(fisher, loss_fn, target):
    model = small_cnn()
    plain = copy.deepcopy(model)
    opt = quiet_optimizer(model, loss_fn, fisher=fisher)
    x, _ = image_batch()
    y = target(x.shape[0])
    loss_fn(model(x), y).backward()
    loss_fn(plain(x), y).backward()
    for p, q in zip(model.parameters(), plain.parameters()):
        assert torch.equal(p.grad, q.grad)
    opt.step()
    assert all(block.has_statistics for block in opt.blocks.values())


# ---------------------------------------------------------------------------- statistics by hand
def mlp_statistics_by_hand(model, inputs):
    """Exact-Fisher statistics of one micro-batch for ``Linear -> Tanh -> Linear`` with ``MSELoss()``.

    The loss is ``L = c sum_n |f_n - y_n|^2`` with ``c = 1 / (N * d_out)`` and output Hessian
    ``2 I`` per example; ``J_n = W2 diag(1 - tanh(s_n)^2)`` is the Jacobian of the output with
    respect to the first layer's pre-activation.  K-FAC (Martens & Grosse 2015, eq. 1-3):
    ``A = mean_n a a^T`` and ``G = c sum_n J_n^T (2 I) J_n``; the Fisher diagonal of a
    linear layer is ``c sum_n diag(J_n^T 2 J_n) (a_n * a_n)^T``.
    """
    first, second = model[0], model[2]
    rows, d_out = inputs.shape[0], second.out_features
    c = 1.0 / (rows * d_out)
    with torch.no_grad():
        hidden = torch.tanh(inputs @ first.weight.T + first.bias)
        jacobian = second.weight.unsqueeze(0) * (1 - hidden ** 2).unsqueeze(1)        # [N, d_out, hidden]
        output_curvature = 2.0 * torch.einsum("noh,nok->nhk", jacobian, jacobian)    # J^T H J per example
        a_first, a_second = with_ones(inputs), with_ones(hidden)
        eye_out = torch.eye(d_out, dtype=DTYPE).expand(rows, d_out, d_out)
        stats = {}
        for name, a, curvature in (("0", a_first, output_curvature), ("2", a_second, 2.0 * eye_out)):
            stats[name] = {
                "in_sum": a.T @ a, "rows": rows,
                "factor_out": c * curvature.sum(0),
                "fisher_diagonal": c * torch.einsum("nhh,nd->hd", curvature, a * a),
            }
    return stats


def step_with_micro_batches(model, opt, micro_batches):
    opt.zero_grad()
    for x, y in micro_batches:
        nn.MSELoss()(model(x), y).backward()
    opt.step()


@pytest.mark.parametrize("structure", STRUCTURES)
def test_gradient_accumulation_uses_every_micro_batch(structure):
    model = tanh_mlp()
    opt = quiet_optimizer(model, nn.MSELoss(), fisher="exact", structure=structure)
    micro = [regression_batch(5, seed=1), regression_batch(7, seed=2)]
    by_hand = [mlp_statistics_by_hand(model, x) for x, _ in micro]
    step_with_micro_batches(model, opt, micro)
    for name, block in opt.blocks.items():
        state = opt.state[block.layer.weight]
        first, second = by_hand[0][name], by_hand[1][name]
        if structure != "diag":  # EKFAC keeps K-FAC's factors for its eigenbasis
            expected_in = (first["in_sum"] + second["in_sum"]) / (first["rows"] + second["rows"])
            torch.testing.assert_close(state["factor_in"], expected_in, rtol=1e-10, atol=1e-13)
            expected_out = 0.5 * (first["factor_out"] + second["factor_out"])
            torch.testing.assert_close(state["factor_out"], expected_out, rtol=1e-10, atol=1e-13)
        else:
            expected = 0.5 * (first["fisher_diagonal"] + second["fisher_diagonal"])
            torch.testing.assert_close(state["fisher_diagonal"], expected, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_equal_micro_batches_give_the_statistics_of_the_whole_batch(structure):
    x, y = regression_batch(12, seed=3)
    split_model, whole_model = tanh_mlp(), tanh_mlp()
    split_opt = quiet_optimizer(split_model, nn.MSELoss(), fisher="exact", structure=structure)
    whole_opt = quiet_optimizer(whole_model, nn.MSELoss(), fisher="exact", structure=structure)
    step_with_micro_batches(split_model, split_opt, [(x[:6], y[:6]), (x[6:], y[6:])])
    step_with_micro_batches(whole_model, whole_opt, [(x, y)])
    expected = mlp_statistics_by_hand(tanh_mlp(), x)
    for name in split_opt.blocks:
        split_state = split_opt.state[split_opt.blocks[name].layer.weight]
        whole_state = whole_opt.state[whole_opt.blocks[name].layer.weight]
        block = split_opt.blocks[name]
        for key in block.statistic_keys + block.projected_keys:
            torch.testing.assert_close(split_state[key], whole_state[key], rtol=1e-10, atol=1e-13)
        if structure != "diag":
            torch.testing.assert_close(whole_state["factor_in"], expected[name]["in_sum"] / 12,
                                       rtol=1e-10, atol=1e-13)
            torch.testing.assert_close(whole_state["factor_out"], expected[name]["factor_out"],
                                       rtol=1e-10, atol=1e-13)


class SharedLayer(nn.Module):
    """``head(tanh(inner(tanh(inner(x)))))``: ``inner`` is applied twice in one forward."""

    def __init__(self, width=3, d_out=2):
        super().__init__()
        self.inner = nn.Linear(width, width)
        self.head = nn.Linear(width, d_out)

    def forward(self, x):
        return self.head(torch.tanh(self.inner(torch.tanh(self.inner(x)))))


def test_module_called_twice_collects_both_calls():
    torch.manual_seed(0)
    model = SharedLayer().to(DTYPE)
    opt = quiet_optimizer(model, nn.MSELoss(), fisher="exact")
    x, y = regression_batch(6, d_in=3, d_out=2, seed=4)
    rows, d_out = x.shape[0], 2
    c = 1.0 / (rows * d_out)
    with torch.no_grad():
        w_inner, w_head = model.inner.weight, model.head.weight
        h1 = torch.tanh(model.inner(x))
        h2 = torch.tanh(model.inner(h1))
        d1, d2 = 1 - h1 ** 2, 1 - h2 ** 2
        # Output Jacobians w.r.t. the pre-activations of the second and first call (chain rule).
        j2 = w_head.unsqueeze(0) * d2.unsqueeze(1)                                  # [N, 2, 3]
        j1 = torch.einsum("noh,hk->nok", j2, w_inner) * d1.unsqueeze(1)             # [N, 2, 3]
        a1, a2 = with_ones(x), with_ones(h1)
        expected_in = (a1.T @ a1 + a2.T @ a2) / (2 * rows)
        expected_out = c * 2.0 * (torch.einsum("noh,nok->hk", j1, j1) + torch.einsum("noh,nok->hk", j2, j2))
    opt.zero_grad()
    nn.MSELoss()(model(x), y).backward()
    opt.step()
    state = opt.state[model.inner.weight]
    torch.testing.assert_close(state["factor_in"], expected_in, rtol=1e-10, atol=1e-13)
    torch.testing.assert_close(state["factor_out"], expected_out, rtol=1e-10, atol=1e-13)


class TwoInputs(nn.Module):
    """``head(tanh(inner(x1)) + tanh(inner(x2)))`` either by two calls or by one call on stacked inputs."""

    def __init__(self, stacked):
        super().__init__()
        self.stacked = stacked
        self.inner = nn.Linear(3, 3)
        self.head = nn.Linear(3, 2)

    def forward(self, x):
        if self.stacked:
            return self.head(torch.tanh(self.inner(x)).sum(1))
        return self.head(torch.tanh(self.inner(x[:, 0])) + torch.tanh(self.inner(x[:, 1])))


def _two_input_state(stacked, structure, before_step=lambda model, x: None):
    """The inner layer's statistics after one step, and ``before_step(model, x)`` taken before it."""
    torch.manual_seed(0)
    model = TwoInputs(stacked).to(DTYPE)
    opt = quiet_optimizer(model, nn.MSELoss(), fisher="exact", structure=structure)
    generator = torch.Generator().manual_seed(5)
    x = torch.randn(6, 2, 3, generator=generator, dtype=DTYPE)
    y = torch.randn(6, 2, generator=generator, dtype=DTYPE)
    nn.MSELoss()(model(x), y).backward()
    expected = before_step(model, x)
    opt.step()
    return opt.state[model.inner.weight], expected


def test_two_calls_and_one_call_on_stacked_inputs_agree_for_kfac():
    twice, _ = _two_input_state(stacked=False, structure="kfac")
    once, _ = _two_input_state(stacked=True, structure="kfac")
    for key in ("factor_in", "factor_out"):
        torch.testing.assert_close(twice[key], once[key], rtol=1e-10, atol=1e-13)


def _exact_fisher_diagonal_of_inner(model, x):
    """``c sum_n sum_k 2 (d f_nk / d W)^2`` for ``MSELoss()`` (Fisher of a Gaussian output), via
    ``torch.autograd.functional.jacobian`` of each example's output w.r.t. the shared weight."""
    rows, d_out = x.shape[0], 2
    c = 1.0 / (rows * d_out)
    weight, bias = model.inner.weight.detach(), model.inner.bias.detach()

    def output(w, b, example):
        inner = lambda v: torch.tanh(v @ w.T + b)
        return model.head(inner(example[0]) + inner(example[1]))

    total_w = torch.zeros_like(weight)
    total_b = torch.zeros_like(bias)
    for n in range(rows):
        jac_w, jac_b = torch.autograd.functional.jacobian(lambda w, b: output(w, b, x[n]), (weight, bias))
        total_w += 2.0 * (jac_w ** 2).sum(0)
        total_b += 2.0 * (jac_b ** 2).sum(0)
    return c * torch.cat([total_w, total_b[:, None]], dim=1)


def test_diagonal_of_a_stacked_call_is_the_exact_fisher_diagonal():
    state, expected = _two_input_state(stacked=True, structure="diag", before_step=_exact_fisher_diagonal_of_inner)
    torch.testing.assert_close(state["fisher_diagonal"], expected, rtol=1e-9, atol=1e-13)


def test_diagonal_of_a_module_called_twice_is_the_exact_fisher_diagonal():
    state, expected = _two_input_state(stacked=False, structure="diag", before_step=_exact_fisher_diagonal_of_inner)
    torch.testing.assert_close(state["fisher_diagonal"], expected, rtol=1e-9, atol=1e-13)


# ---------------------------------------------------------------------------- what is not collected
def test_eval_and_no_grad_forwards_collect_nothing():
    watched, reference = tanh_mlp(), tanh_mlp()
    settings = dict(fisher="exact", stats_interval=1, inverse_interval=1, stats_memory=0.5)
    watched_opt = quiet_optimizer(watched, nn.MSELoss(), **settings)
    reference_opt = quiet_optimizer(reference, nn.MSELoss(), **settings)
    batches = [regression_batch(8, seed=s) for s in range(3)]
    for model, opt in ((watched, watched_opt), (reference, reference_opt)):
        step_with_micro_batches(model, opt, [batches[0]])

    # Between the steps the watched model also sees an eval() forward with a backward, and
    # no_grad() forwards before and after its training forward/backward.
    watched.eval()
    x, y = batches[1]
    nn.MSELoss()(watched(x), y).backward()
    watched.train()
    watched_opt.zero_grad()
    with torch.no_grad():
        watched(x)
    nn.MSELoss()(watched(batches[2][0]), batches[2][1]).backward()
    with torch.no_grad():
        watched(x)
    watched_opt.step()
    step_with_micro_batches(reference, reference_opt, [batches[2]])
    assert_same_snapshot(snapshot(watched, watched_opt), snapshot(reference, reference_opt))

    # A whole step in eval() mode: the weights move, the statistics stay as they were.
    factors = {name: watched_opt.state[b.layer.weight]["factor_in"].clone() for name, b in watched_opt.blocks.items()}
    before = [p.detach().clone() for p in watched.parameters()]
    watched.eval()
    step_with_micro_batches(watched, watched_opt, [batches[1]])
    for name, block in watched_opt.blocks.items():
        assert torch.equal(watched_opt.state[block.layer.weight]["factor_in"], factors[name])
    assert not all(torch.equal(p, q) for p, q in zip(watched.parameters(), before))


def test_frozen_parameters_are_left_alone():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 5), nn.LayerNorm(5), nn.Linear(5, 2)).to(DTYPE)
    frozen = [model[0].weight, model[0].bias, model[2].bias, model[3].weight]
    for p in frozen:
        p.requires_grad_(False)
    initial = [p.clone() for p in frozen]
    trained = [model[2].weight, model[3].bias, model[4].weight, model[4].bias]
    trained_initial = [p.detach().clone() for p in trained]
    opt = quiet_optimizer(model, nn.MSELoss(), fisher="exact", stats_interval=1, momentum=0.5)
    opt.assign_curvature(torch.zeros(1, 4, dtype=DTYPE))
    assert set(opt.blocks) == {"2", "4"}  # the fully frozen layer gets no block
    assert opt.blocks["2"].layer.bias is None  # a frozen bias stays outside the block
    for seed in range(3):
        x, y = regression_batch(8, d_in=4, d_out=2, seed=seed)
        step_with_micro_batches(model, opt, [(x, y)])
    for p, start in zip(frozen, initial):
        assert torch.equal(p, start) and p.grad is None
        assert "momentum_buffer" not in opt.state.get(p, {})
    for p, start in zip(trained, trained_initial):
        assert not torch.equal(p, start)


# ---------------------------------------------------------------------------- the fallback rule
def _prelu_net():
    return nn.Sequential(nn.Linear(4, 6), nn.PReLU(6), nn.Linear(6, 2))


class BilinearNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.pair = nn.Bilinear(4, 4, 3)
        self.head = nn.Linear(3, 2)

    def forward(self, x):
        return self.head(self.pair(x, x.flip(1)))


def _conv_transpose_net():
    return nn.Sequential(nn.ConvTranspose2d(2, 3, 2, stride=2), nn.Flatten(), nn.Linear(3 * 8 * 8, 2))


UNSUPPORTED = {
    # name: (model factory, input maker, names of the modules whose parameters take the fallback rule)
    "prelu": (_prelu_net, lambda g: torch.randn(8, 4, generator=g, dtype=DTYPE), {"1"}),
    "bilinear": (BilinearNet, lambda g: torch.randn(8, 4, generator=g, dtype=DTYPE), {"pair"}),
    "conv-transpose": (_conv_transpose_net, lambda g: torch.randn(8, 2, 4, 4, generator=g, dtype=DTYPE), {"0"}),
}


def _unsupported_setup(kind, **kwargs):
    factory, make_input, fallback_modules = UNSUPPORTED[kind]
    torch.manual_seed(0)
    model = factory().to(DTYPE)
    opt = quiet_optimizer(model, nn.MSELoss(), **kwargs)
    params = [p for name, module in model.named_modules() if name in fallback_modules
              for p in module.parameters()]
    return model, opt, params, make_input


@pytest.mark.parametrize("scale", [None, 0.5])
@pytest.mark.parametrize("kind", UNSUPPORTED)
def test_unsupported_layers_take_the_plain_sgd_step(kind, scale):
    model, opt, params, make_input = _unsupported_setup(kind, lr=0.3, momentum=0.0, fallback="sgd",
                                                        fallback_lr_scale=scale)
    assert not {id(p) for p in params} & {id(p) for b in opt.blocks.values() for p in b.layer.params()}
    generator = torch.Generator().manual_seed(1)
    step_size = 0.3 * (1.0 if scale is None else scale)  # default scale 1 for sgd (ngopt/optimizer.py)
    for _ in range(2):
        x, y = make_input(generator), torch.randn(8, 2, generator=generator, dtype=DTYPE)
        opt.zero_grad()
        nn.MSELoss()(model(x), y).backward()
        before = [p.detach().clone() for p in params]
        grads = [p.grad.clone() for p in params]
        opt.step()
        for p, start, grad in zip(params, before, grads):
            assert grad.abs().max() > 0
            torch.testing.assert_close(p.detach(), start - step_size * grad, rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("rule", ["sgd", "adam"])
@pytest.mark.parametrize("kind", UNSUPPORTED)
def test_fallback_rules_follow_torch_optim(kind, rule):
    # torch.optim.SGD (heavy ball, dampening 0) and torch.optim.Adam (betas 0.9/0.999, eps 1e-8),
    # both with L2 weight decay, fed the same gradients.
    settings = dict(lr=0.3, momentum=0.7, weight_decay=1e-2, fallback=rule, fallback_lr_scale=0.1)
    model, opt, params, make_input = _unsupported_setup(kind, **settings)
    mirror = [p.detach().clone().requires_grad_(True) for p in params]
    if rule == "sgd":
        reference = torch.optim.SGD(mirror, lr=0.03, momentum=0.7, weight_decay=1e-2)
    else:
        reference = torch.optim.Adam(mirror, lr=0.03, weight_decay=1e-2)
    generator = torch.Generator().manual_seed(1)
    for _ in range(4):
        x, y = make_input(generator), torch.randn(8, 2, generator=generator, dtype=DTYPE)
        opt.zero_grad()
        nn.MSELoss()(model(x), y).backward()
        for p, m in zip(params, mirror):
            m.grad = p.grad.clone()
        opt.step()
        reference.step()
        for p, m in zip(params, mirror):
            torch.testing.assert_close(p.detach(), m.detach(), rtol=1e-12, atol=1e-14)


# ---------------------------------------------------------------------------- in-place operations
def _inplace_pair(kind):
    if kind == "linear":
        def build(inplace):
            torch.manual_seed(0)
            return nn.Sequential(nn.Linear(5, 6), nn.ReLU(inplace=inplace), nn.Linear(6, 3)).to(DTYPE)
        generator = torch.Generator().manual_seed(2)
        return build, torch.randn(10, 5, generator=generator, dtype=DTYPE)
    return (lambda inplace: small_cnn(inplace=inplace)), image_batch(10)[0]


@pytest.mark.parametrize("edges", [True, False], ids=["gradient_edges", "copies"])
@pytest.mark.parametrize("fisher", FISHERS)
@pytest.mark.parametrize("kind", ["linear", "conv"])
def test_inplace_relu_after_a_layer_changes_neither_capture_nor_gradients(kind, fisher, edges, monkeypatch):
    if not edges:  # a torch without autograd gradient edges: the capture hands the network a copy instead
        monkeypatch.setattr(recorder_module, "_gradient_edge", None)
    build, x = _inplace_pair(kind)
    y = torch.randint(0, 3, (x.shape[0],))
    loss_fn = nn.CrossEntropyLoss()
    inplace, plain_inplace, out_of_place = build(True), build(True), build(False)
    opt = quiet_optimizer(inplace, loss_fn, fisher=fisher, seed=3)
    reference_opt = quiet_optimizer(out_of_place, loss_fn, fisher=fisher, seed=3)
    loss_fn(inplace(x), y).backward()
    loss_fn(plain_inplace(x), y).backward()
    loss_fn(out_of_place(x), y).backward()
    for p, q in zip(inplace.parameters(), plain_inplace.parameters()):
        assert torch.equal(p.grad, q.grad)
    opt.step()
    reference_opt.step()
    for name, block in opt.blocks.items():
        if block.structure != "kfac":
            continue  # the LayerNorm's own block; the Kronecker factors are what the copy could disturb
        state = opt.state[block.layer.weight]
        reference_state = reference_opt.state[reference_opt.blocks[name].layer.weight]
        assert state["factor_out"].abs().max() > 0
        for key in ("factor_in", "factor_out"):
            torch.testing.assert_close(state[key], reference_state[key], rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("fisher", FISHERS)
def test_a_recorded_layer_hands_the_network_its_own_output_not_a_copy(fisher):
    # A copy per recorded layer would double the activation memory of a refresh step.
    model = nn.Sequential(nn.Linear(5, 6), nn.ReLU(inplace=True), nn.Linear(6, 3)).to(DTYPE)
    produced, received = [], []
    model[0].register_forward_hook(lambda module, inputs, output: produced.append(output.data_ptr()))
    loss_fn = nn.CrossEntropyLoss()
    opt = quiet_optimizer(model, loss_fn, fisher=fisher)
    model[1].register_forward_pre_hook(lambda module, inputs: received.append(inputs[0].data_ptr()))
    x, y = torch.randn(10, 5, dtype=DTYPE), torch.randint(0, 3, (10,))
    assert opt.statistics_due()
    loss_fn(model(x), y).backward()
    assert produced == received and len(produced) == 1
    opt.step()
    assert opt.state[model[0].weight]["factor_out"].abs().max() > 0


# ---------------------------------------------------------------------------- non-finite steps
def _poisoned_setup(fisher, structure):
    model = tanh_mlp(sizes=(3, 5, 2))
    opt = quiet_optimizer(model, nn.MSELoss(), fisher=fisher, structure=structure, stats_interval=1,
                          inverse_interval=1, momentum=0.5, stats_memory=0.5, seed=0)
    return model, opt


def _nan_loss(model, x, y):
    return nn.MSELoss()(model(x), y) * float("nan")


def _inf_gradient(model, x, y):
    armed = [True]  # one-shot: the hook stays registered but poisons only this backward

    def poison(grad):
        if armed.pop() if armed else False:
            return grad + float("inf")
        return None

    model[2].weight.register_hook(poison)
    return nn.MSELoss()(model(x), y)


@pytest.mark.parametrize("poison", [_nan_loss, _inf_gradient], ids=["nan-loss", "inf-gradient-hook"])
@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize("fisher", FISHERS)
def test_non_finite_gradient_skips_the_step(fisher, structure, poison):
    model, opt = _poisoned_setup(fisher, structure)
    twin, twin_opt = _poisoned_setup(fisher, structure)
    batches = [regression_batch(8, seed=s) for s in range(4)]
    for net, optimizer in ((model, opt), (twin, twin_opt)):
        for batch in batches[:2]:
            step_with_micro_batches(net, optimizer, [batch])
    before = snapshot(model, opt)
    assert any(key[1] == "momentum_buffer" for key in before[1])

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(2):
            opt.zero_grad()
            poison(model, *batches[2]).backward()
            assert not all(bool(torch.isfinite(p.grad).all()) for p in model.parameters())
            opt.step()
    skip_warnings = [w for w in caught if "skipped" in str(w.message)]
    assert len(skip_warnings) == 1
    assert_same_snapshot(snapshot(model, opt), before)
    report = opt.diagnostics()
    assert report["skipped_steps"] == 2 and report["skip_reasons"]["nonfinite_gradient"] == 2

    # The skipped steps leave no trace: the next step matches a run that never saw them.  (With
    # fisher='sampled' the poisoned backward has already drawn its targets from the private
    # generator, so the later draws differ from the twin's; that is expected.)
    if fisher == "sampled":
        return
    step_with_micro_batches(model, opt, [batches[3]])
    step_with_micro_batches(twin, twin_opt, [batches[3]])
    assert_same_snapshot(snapshot(model, opt), snapshot(twin, twin_opt))


@pytest.mark.parametrize("statistics_step", [True, False], ids=["statistics-step", "plain-step"])
def test_a_non_finite_gradient_outside_every_block_skips_the_step_with_its_cause(statistics_step):
    # The gradients get no check of their own: the check of the fallback rule's changes catches a NaN in a
    # parameter without a curvature block (here PReLU's slope), and the skip is still put down to the gradient.
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(3, 5), nn.PReLU(), nn.Linear(5, 2)).to(DTYPE)
    opt = quiet_optimizer(model, nn.MSELoss(), stats_interval=1 if statistics_step else 50, inverse_interval=1,
                          momentum=0.5, fallback="adam")
    batches = [regression_batch(8, seed=s) for s in range(12)]
    for batch in batches[:2]:
        step_with_micro_batches(model, opt, [batch])
    for batch in batches[2:11]:  # the first steps refresh often: on to one that records nothing
        if opt.statistics_due() == statistics_step:
            break
        step_with_micro_batches(model, opt, [batch])
    assert opt.statistics_due() == statistics_step
    before = snapshot(model, opt)
    opt.zero_grad()
    nn.MSELoss()(model(batches[11][0]), batches[11][1]).backward()
    model[1].weight.grad.fill_(float("nan"))
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    assert_same_snapshot(snapshot(model, opt), before)
    assert opt.diagnostics()["skip_reasons"] == {**opt.diagnostics()["skip_reasons"], "nonfinite_gradient": 1}
    assert opt.diagnostics()["skipped_steps"] == 1


@pytest.mark.parametrize("fisher", FISHERS)
def test_non_finite_closure_loss_skips_the_step(fisher):
    model, opt = _poisoned_setup(fisher, "kfac")
    batches = [regression_batch(8, seed=s) for s in range(3)]
    for batch in batches[:2]:
        step_with_micro_batches(model, opt, [batch])
    before = snapshot(model, opt)
    x, y = batches[2]

    def closure():
        opt.zero_grad()
        loss = nn.MSELoss()(model(x), y)
        loss.backward()  # finite gradients; only the reported loss is not finite
        return loss + float("inf")

    with pytest.warns(UserWarning, match="skipped"):
        returned = opt.step(closure)
    assert torch.isinf(returned)
    assert_same_snapshot(snapshot(model, opt), before)
    report = opt.diagnostics()
    assert report["skipped_steps"] == 1 and report["skip_reasons"]["nonfinite_loss"] == 1


def test_nan_logits_with_sampled_cross_entropy_skip_the_step():
    model = tanh_mlp(sizes=(3, 5, 3))
    opt = quiet_optimizer(model, nn.CrossEntropyLoss(), fisher="sampled")
    x = torch.randn(8, 3, dtype=DTYPE)
    x[0, 0] = float("nan")
    before = [p.detach().clone() for p in model.parameters()]
    nn.CrossEntropyLoss()(model(x), torch.randint(0, 3, (8,))).backward()
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    assert opt.diagnostics()["skipped_steps"] == 1
    assert all(torch.equal(p, q) for p, q in zip(model.parameters(), before))
    assert all(not block.has_statistics for block in opt.blocks.values())


def test_refreshes_leave_no_tensors_behind():
    # Captured forwards hold tensor hooks that refer back to their own tensors; unless the records let
    # go of them, every refresh leaks its activations (a cycle through autograd's C++ side that
    # Python's garbage collector cannot break).  Common practice: count live tensors with gc.
    import gc

    def live_tensors():
        gc.collect()
        return sum(1 for obj in gc.get_objects() if isinstance(obj, torch.Tensor))

    for fisher in ("sampled", "empirical"):
        torch.manual_seed(0)
        model = nn.Sequential(nn.Linear(8, 16), nn.Tanh(), nn.Linear(16, 4))
        loss_fn = nn.MSELoss()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            opt = ngopt.FisherDescent(model, loss_fn, fisher=fisher, stats_interval=1, inverse_interval=1)
        x = torch.randn(32, 8)

        def run(steps):
            for _ in range(steps):
                opt.zero_grad()
                loss_fn(model(x), x[:, :4]).backward()
                opt.step()

        run(5)
        settled = live_tensors()
        run(40)
        assert live_tensors() <= settled, fisher


@pytest.mark.parametrize("fallback, overflowing", [("sgd", "blocks"), ("adam", "blocks"), ("sgd", "fallback")])
def test_an_update_that_overflows_skips_the_step_and_writes_no_state(fallback, overflowing):
    # Finite gradients, statistics and directions, but a step so large that lr * buffer overflows
    # float64 (max ~1.8e308): the step is skipped, and neither the momentum buffers nor the fallback's
    # state (Adam's moments and step count included) nor any weight has moved.
    model = small_cnn()
    loss_fn = nn.CrossEntropyLoss()
    opt = quiet_optimizer(model, loss_fn, fisher="exact", momentum=0.5, max_step_kl=None, fallback=fallback,
                          stats_interval=1, inverse_interval=1, stats_fraction=1.0)
    x, y = image_batch()
    for _ in range(2):
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        opt.step()
    before = snapshot(model, opt)
    assert any(key[1] == "momentum_buffer" for key in before[1])
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    if overflowing == "blocks":
        for block in opt.blocks.values():
            block.layer.weight.grad.mul_(1e150)  # directions ~1e150: finite, and so are their dots
        opt.param_groups[0]["lr"] = 1e300
    else:
        model[5].weight.grad.mul_(1e150)  # PReLU, the fallback rule's parameter
        opt.param_groups[0]["fallback_lr_scale"] = 1e200
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    assert opt.diagnostics()["skip_reasons"]["nonfinite_update"] == 1
    assert_same_snapshot(snapshot(model, opt), before)


def test_an_update_that_overflows_only_once_scaled_by_lr_skips_the_step():
    # The fixed rule hands over its momentum buffer with the factor -lr: here the buffer (~1e4) and
    # every diagnostic are finite, and only lr * buffer overflows float32 (max ~3.4e38).
    torch.manual_seed(0)
    model = nn.Linear(3, 2)
    x, y = torch.randn(8, 3), 1e4 * torch.randn(8, 2)
    opt = quiet_optimizer(model, nn.MSELoss(), lr=1e38, momentum=0.0, max_step_kl=None, loss_floor=None)
    before = snapshot(model, opt)
    opt.zero_grad()
    nn.functional.mse_loss(model(x), y).backward()
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    assert opt.diagnostics()["skip_reasons"]["nonfinite_update"] == 1
    for p, q in zip(model.parameters(), before[0]):
        assert torch.equal(p, q)
