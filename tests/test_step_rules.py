"""The step and damping rules that steer by the quadratic model, checked against explicit matrices.

References: for linear least squares the Fisher of the Gaussian model equals the Hessian of the
squared error, (2 / #terms) sum_n x_n x_n^T (x) I (Casella & Berger; Martens & Grosse 2015 sec. 9),
built here with numpy; the 2x2 minimization over span{Delta, delta_0} is Martens & Grosse 2015,
sec. 7; the Jacobian-vector route against the explicit Jacobian from torch.func.jacrev; the
reduction ratio against the same ratio measured through a closure (Martens & Grosse 2015, sec. 6.5).
"""
from __future__ import annotations

import copy
import math
import warnings

import numpy as np
import pytest
import torch
from torch import nn
from torch.func import functional_call, jacrev

import ngopt
from ngopt.capture import ForwardRecord
from ngopt.likelihoods import CrossEntropy, LossCall
from ngopt.quadratic_model import BatchEvaluator

DTYPE = torch.float64


def least_squares(seed, n=40, d_in=3, d_out=2):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d_in, generator=generator, dtype=DTYPE)
    w = torch.randn(d_out, d_in, generator=generator, dtype=DTYPE)
    y = x @ w.T + 0.3 * torch.randn(n, d_out, generator=generator, dtype=DTYPE)
    return x, y


def quadratic_optimizer(model, loss_fn, **overrides):
    settings = dict(fisher="exact", step_rule="quadratic", damping_rule="fixed", max_step_kl=None, lr=1.0,
                    momentum=0.99, damping=1e-16, stats_memory=0.0, stats_interval=1, inverse_interval=1,
                    rule_batch_fraction=1.0)
    settings.update(overrides)
    return ngopt.FisherDescent(model, loss_fn, **settings)


def column_major(model):
    """[d_out, d_in + 1] matrix (bias last) as the column-major vec the explicit Hessian uses."""
    matrix = torch.cat([model.weight.detach(), model.bias.detach().unsqueeze(1)], dim=1)
    return matrix.T.reshape(-1).numpy()


def explicit_hessian(x, d_out):
    rows = np.hstack([x.numpy(), np.ones((len(x), 1))])
    return np.kron(rows.T @ rows, np.eye(d_out)) * 2.0 / (len(x) * d_out)


def test_first_quadratic_step_lands_on_the_least_squares_solution():
    # numpy.linalg.lstsq is the minimizer; one step with alpha from the exact model gets there.
    x, y = least_squares(0)
    torch.manual_seed(0)
    model = nn.Linear(3, 2).to(DTYPE)
    loss_fn = nn.MSELoss()
    with pytest.warns(UserWarning, match="very small"):  # tiny damping on purpose: an exact step
        opt = quadratic_optimizer(model, loss_fn)
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()
    rows = np.hstack([x.numpy(), np.ones((len(x), 1))])
    solution, *_ = np.linalg.lstsq(rows, y.numpy(), rcond=None)
    fitted = torch.cat([model.weight.detach(), model.bias.detach().unsqueeze(1)], dim=1).numpy()
    np.testing.assert_allclose(fitted, solution.T, rtol=1e-6, atol=1e-7)
    assert opt.diagnostics()["update"]["alpha"] == pytest.approx(1.0, rel=1e-6)


def numpy_span_minimizer(hessian, damping, grad, directions, mu_cap):
    """(alpha, mu) minimizing g^T c + c^T K c / 2 over span(directions), mu clipped to [0, mu_cap]."""
    basis = np.stack(directions, axis=1)
    k = basis.T @ (hessian + damping * np.eye(len(grad))) @ basis
    b = basis.T @ grad
    alpha, mu = np.linalg.solve(k, -b)
    if not 0.0 <= mu <= mu_cap:
        mu = min(max(mu, 0.0), mu_cap)
        alpha = -(b[0] + k[0, 1] * mu) / k[0, 0]
    return alpha, mu


def test_alpha_and_mu_are_the_minimizer_of_the_explicit_two_by_two_model():
    # Two batches of a least-squares problem: the second step's (alpha, mu) against numpy's
    # minimizer of the same 2x2 model built from the explicit Hessian (= exact Fisher).
    damping = 0.5
    torch.manual_seed(0)
    model = nn.Linear(3, 2).to(DTYPE)
    loss_fn = nn.MSELoss()
    opt = quadratic_optimizer(model, loss_fn, damping=damping)
    batches = [least_squares(1, n=30), least_squares(2, n=30)]
    before = None
    for index, (x, y) in enumerate(batches):
        before = column_major(model)
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        if index == 1:
            grad = torch.cat([model.weight.grad, model.bias.grad.unsqueeze(1)], dim=1).T.reshape(-1).numpy()
            previous = before - first_start
        else:
            first_start = before
        opt.step()
    block = opt.blocks["Linear"]
    x, _ = batches[1]
    # The blocks' proposal Delta = -(A_d (x) G_d)^-1 g, rebuilt from the committed inverses.
    grad_matrix = torch.cat([model.weight.grad, model.bias.grad.unsqueeze(1)], dim=1)
    proposal = -(block.state["inverse_out"] @ grad_matrix @ block.state["inverse_in"]).T.reshape(-1).numpy()
    alpha, mu = numpy_span_minimizer(explicit_hessian(x, 2), damping, grad, [proposal, previous], 0.99)
    update = opt.diagnostics()["update"]
    assert update["alpha"] == pytest.approx(alpha, rel=1e-7)
    assert update["mu"] == pytest.approx(mu, rel=1e-7, abs=1e-12)
    np.testing.assert_allclose(column_major(model) - before, alpha * proposal + mu * previous, rtol=1e-7,
                               atol=1e-12)


def test_jacobian_vector_products_equal_the_explicit_gauss_newton_form():
    # v^T F v = (J v)^T H (J v) with J from torch.func.jacrev and H = c (diag(p) - p p^T).
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(4, 5), nn.Tanh(), nn.Linear(5, 3)).to(DTYPE)
    x, y = torch.randn(10, 4, dtype=DTYPE), torch.randint(0, 3, (10,))
    loss_fn = nn.CrossEntropyLoss()
    # The loss at the model's output, as the optimizer records it: mean reduction, w_n = 1/10 per term.
    call = LossCall(CrossEntropy(), model(x), y, 0.0, origin=("output",))
    call.set_weights(torch.ones((), dtype=DTYPE))
    batch = ForwardRecord(examples=10, losses=[call], inputs={"args": (x,), "kwargs": {}, "rng_state": torch.get_rng_state()})
    evaluator = BatchEvaluator(model, batch, 1.0)
    params = dict(model.named_parameters())
    u = {p: torch.randn_like(p) for p in params.values()}
    v = {p: torch.randn_like(p) for p in params.values()}
    loss, gram = evaluator.curvature_products([u, v])

    flat = {n: p.detach() for n, p in params.items()}
    jac = jacrev(lambda own: functional_call(model, own, (x,)))(flat)         # {name: [N, 3, *shape]}
    names = list(flat)
    jmat = torch.cat([jac[n].reshape(10, 3, -1) for n in names], dim=2)       # [N, 3, P]
    with torch.no_grad():
        prob = torch.softmax(model(x), dim=1)
    hess = (torch.diag_embed(prob) - prob.unsqueeze(2) * prob.unsqueeze(1)) / 10
    fisher = torch.einsum("nap,nab,nbq->pq", jmat, hess, jmat)
    uu = torch.cat([u[params[n]].reshape(-1) for n in names])
    vv = torch.cat([v[params[n]].reshape(-1) for n in names])
    assert gram[0][0] == pytest.approx(float(uu @ fisher @ uu), rel=1e-10)
    assert gram[0][1] == pytest.approx(float(uu @ fisher @ vv), rel=1e-10)
    assert gram[1][1] == pytest.approx(float(vv @ fisher @ vv), rel=1e-10)
    assert loss == pytest.approx(float(loss_fn(model(x), y)), rel=1e-12)


def lm_problem(seed=4):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 3)).to(DTYPE)
    x, y = torch.randn(32, 5, dtype=DTYPE), torch.randint(0, 3, (32,))
    return model, nn.CrossEntropyLoss(), x, y


def test_reduction_ratio_from_the_recording_equals_the_closures():
    model, loss_fn, x, y = lm_problem()
    twin = copy.deepcopy(model)
    twin_loss = nn.CrossEntropyLoss()
    settings = dict(step_rule="fixed", damping_rule="lm", damping_interval=1, fisher="exact", seed=1)
    recorded = ngopt.FisherDescent(model, loss_fn, **settings)
    closured = ngopt.FisherDescent(twin, twin_loss, **settings)

    def closure():
        closured.zero_grad()
        value = twin_loss(twin(x), y)
        value.backward()
        return value

    for _ in range(3):
        recorded.zero_grad()
        loss_fn(model(x), y).backward()
        recorded.step()
        closured.step(closure)  # a closure defines the loss: the damping rule measures it
        a, b = recorded.diagnostics()["update"], closured.diagnostics()["update"]
        assert a["reduction_ratio"] is not None
        assert a["reduction_ratio"] == pytest.approx(b["reduction_ratio"], rel=1e-9)
        assert a["damping"] == b["damping"]


def _closure_run(options, penalty=0.0, force_closure=False, monkeypatch=None):
    """Three Levenberg-Marquardt steps driven by a closure; returns (closure calls, ratios, dampings)."""
    model, loss_fn, x, y = lm_problem()
    opt = ngopt.FisherDescent(model, loss_fn, **options)
    if force_closure:
        monkeypatch.setattr("ngopt.batch_evaluation.replay_measures_closure_loss", lambda *a: False)
    calls = []

    def closure():
        calls.append(1)
        opt.zero_grad()
        value = loss_fn(model(x), y) + penalty * sum(p.square().sum() for p in model.parameters())
        value.backward()
        return value

    ratios, dampings = [], []
    for _ in range(3):
        opt.step(closure)
        ratios.append(opt.diagnostics()["update"]["reduction_ratio"])
        dampings.append(opt.param_groups[0]["damping"])
    return len(calls), ratios, dampings


def test_a_closure_whose_loss_the_replay_reproduces_is_not_called_again(monkeypatch):
    # The recorded loss calls add up to the closure's loss: a forward without gradients on the recorded
    # batch measures the step's loss change, not the closure's forward and backward, with the same ratio.
    settings = dict(step_rule="fixed", damping_rule="lm", damping_interval=1, fisher="exact", seed=1)
    calls, ratios, dampings = _closure_run(settings)
    assert calls == 3
    forced_calls, forced_ratios, forced_dampings = _closure_run(settings, force_closure=True, monkeypatch=monkeypatch)
    assert forced_calls == 6
    # float64 model: the replay's loss and the closure's differ by summation order only
    np.testing.assert_allclose(ratios, forced_ratios, rtol=1e-9)
    assert dampings == forced_dampings


def test_a_closure_with_a_term_beside_the_loss_calls_is_evaluated_again():
    # A penalty in the closure is part of the loss the replay cannot see: the closure measures the change.
    settings = dict(step_rule="fixed", damping_rule="lm", damping_interval=1, fisher="exact", seed=1)
    calls, ratios, _ = _closure_run(settings, penalty=1e-2)
    assert calls == 6
    assert all(r is not None and np.isfinite(r) for r in ratios)


def test_evaluations_leave_batch_norm_statistics_rng_and_gradients_alone():
    # A step under the quadratic rule with Levenberg-Marquardt runs three extra forwards; the
    # model's running statistics, the global RNG and .grad must end as after a plain fixed step.
    torch.manual_seed(5)
    model = nn.Sequential(nn.Linear(4, 6), nn.BatchNorm1d(6), nn.Dropout(0.3), nn.Tanh(), nn.Linear(6, 2))
    plain = copy.deepcopy(model)
    x, y = torch.randn(16, 4), torch.randn(16, 2)
    steered = ngopt.FisherDescent(model, nn.MSELoss(), step_rule="quadratic", damping_rule="lm", damping_interval=1,
                                  seed=2)
    fixed = ngopt.FisherDescent(plain, nn.MSELoss(), step_rule="fixed", damping_rule="fixed", seed=2)
    states = []
    for net, opt in ((model, steered), (plain, fixed)):
        torch.manual_seed(11)
        loss_fn = opt.loss_fn
        opt.zero_grad()
        loss_fn(net(x), y).backward()
        grads = [p.grad.clone() for p in net.parameters()]
        opt.step()
        states.append((torch.get_rng_state(), {k: v.clone() for k, v in net.state_dict().items()
                                               if "running" in k or "num_batches" in k},
                       grads, [p.grad for p in net.parameters()]))
    assert steered.diagnostics()["update"]["reduction_ratio"] is not None
    assert torch.equal(states[0][0], states[1][0])
    for key in states[0][1]:
        assert torch.equal(states[0][1][key], states[1][1][key]), key
    for before, after in zip(states[0][2], states[0][3]):
        assert torch.equal(before, after)


def test_resume_continues_exactly_with_the_rules_state():
    model, loss_fn, x, y = lm_problem(6)
    batches = [(x[i::3], y[i::3]) for i in range(3)] * 3

    def run(opt, net, part):
        for bx, by in part:
            opt.zero_grad()
            opt.loss_fn(net(bx), by).backward()
            opt.step()

    settings = dict(step_rule="quadratic", damping_rule="lm", damping_interval=2, rule_interval=2, seed=3,
                    stats_interval=2,
                    inverse_interval=3)
    whole = copy.deepcopy(model)
    whole_opt = ngopt.FisherDescent(whole, nn.CrossEntropyLoss(), **settings)
    run(whole_opt, whole, batches)

    first = copy.deepcopy(model)
    first_opt = ngopt.FisherDescent(first, nn.CrossEntropyLoss(), **settings)
    run(first_opt, first, batches[:4])
    saved = copy.deepcopy((first.state_dict(), first_opt.state_dict()))
    resumed = copy.deepcopy(model)
    resumed.load_state_dict(saved[0])
    resumed_opt = ngopt.FisherDescent(resumed, nn.CrossEntropyLoss(), **settings)
    resumed_opt.load_state_dict(saved[1])
    run(resumed_opt, resumed, batches[4:])
    for p, q in zip(whole.parameters(), resumed.parameters()):
        assert torch.equal(p, q)  # one process, the same operations in the same order
    assert whole_opt.param_groups[0]["damping"] == resumed_opt.param_groups[0]["damping"]


def test_non_finite_rule_scalars_skip_the_step(monkeypatch):
    model, loss_fn, x, y = lm_problem(7)
    opt = ngopt.FisherDescent(model, loss_fn, step_rule="quadratic")
    monkeypatch.setattr(BatchEvaluator, "curvature_products",
                        lambda self, directions: (math.nan, [[math.nan] * len(directions)] * len(directions)))
    before = copy.deepcopy(model.state_dict())
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    with pytest.warns(UserWarning, match="skipped"):
        opt.step()
    assert opt.diagnostics()["skip_reasons"]["nonfinite_update"] == 1
    for key, value in model.state_dict().items():
        assert torch.equal(value, before[key])
    assert not any("previous_update" in s for s in opt.state.values())


class PassThrough(torch.overrides.TorchFunctionMode):
    """A user's own torch function mode around the training step (ngopt then cannot watch the loss)."""

    def __torch_function__(self, func, types, args=(), kwargs=None):
        return func(*args, **(kwargs or {}))


def test_an_unreplayable_loss_warns_once_and_still_steps():
    # Under another torch function mode ngopt sees the loss only through the criterion object's hook,
    # so it cannot tell how the loss's input came from the model output: one warning, and the step
    # falls back to the blocks' own model.
    model, loss_fn, x, y = lm_problem(8)
    opt = ngopt.FisherDescent(model, loss_fn, step_rule="quadratic")
    start = float(loss_fn(model(x), y))
    with pytest.warns(UserWarning, match="recorded batch") as caught:
        for _ in range(5):
            opt.zero_grad()
            with PassThrough():
                loss_fn(model(x)[:, :3] * 1.0, y).backward()
            opt.step()
    assert sum("recorded batch" in str(w.message) for w in caught) == 1
    assert float(loss_fn(model(x), y)) < start


def test_a_loss_on_a_slice_of_the_output_is_replayed():
    # The operations between the model output and the loss (a slice, a scaling) are replayed: the
    # quadratic rule solves its system on every step, and the damping rule measures rho.
    model, loss_fn, x, y = lm_problem(8)
    opt = ngopt.FisherDescent(model, loss_fn, step_rule="quadratic", damping_interval=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # none of ngopt's
        for _ in range(3):
            opt.zero_grad()
            loss_fn(model(x)[:, :3] * 1.0, y).backward()
            opt.step()
            update = opt.diagnostics()["update"]
            assert update["rule_solved"] and update["reduction_ratio"] is not None


def test_forwards_inside_no_capture_change_neither_statistics_nor_the_recorded_batch():
    # API behaviour 6: a train-mode forward inside opt.no_capture() (an evaluation pass, say) records
    # nothing, so the step, its statistics and the damping rule's ratio are those of the training batch.
    model, loss_fn, x, y = lm_problem(9)
    twin, twin_loss = copy.deepcopy(model), nn.CrossEntropyLoss()
    settings = dict(damping_rule="lm", damping_interval=1, stats_interval=1, inverse_interval=1, seed=4)
    opt = ngopt.FisherDescent(model, loss_fn, **settings)
    twin_opt = ngopt.FisherDescent(twin, twin_loss, **settings)
    other_x, other_y = torch.randn(32, 5, dtype=DTYPE), torch.randint(0, 3, (32,))
    for _ in range(3):
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        with opt.no_capture():
            loss_fn(model(other_x), other_y)  # train mode, gradients enabled, criterion called
        opt.step()
        twin_opt.zero_grad()
        twin_loss(twin(x), y).backward()
        twin_opt.step()
        assert opt.diagnostics()["update"]["reduction_ratio"] == twin_opt.diagnostics()["update"]["reduction_ratio"]
    for p, q in zip(model.parameters(), twin.parameters()):
        assert torch.equal(p, q)  # one process, the same operations in the same order


@pytest.mark.parametrize("reuse", [False, True])
@pytest.mark.parametrize("momentum", [0.0, 0.9])
def test_fused_heavy_ball_keeps_the_buffers_torch_sgd_keeps(momentum, reuse):
    # Reference: torch.optim.SGD's momentum recursion (dampening 0), buf = momentum * buf + d with
    # buf = d on the first step, fed the scaled directions; one tensor joins late (a fresh buffer).
    from ngopt.fallback import heavy_ball
    generator = torch.Generator().manual_seed(0)
    shapes = [(4, 3), (2,), (3, 5, 2)]
    params = [torch.zeros(s, dtype=DTYPE, requires_grad=True) for s in shapes]
    reference = torch.optim.SGD(params, lr=1.0, momentum=momentum)
    states = [{} for _ in shapes]
    for step in range(4):
        scale = 0.5 + 0.25 * step
        present = range(len(shapes)) if step else range(len(shapes) - 1)
        directions = {i: torch.randn(shapes[i], generator=generator, dtype=DTYPE) for i in present}
        for i, p in enumerate(params):
            p.grad = directions[i] * scale if i in directions else None
        reference.step()
        kept = {i: states[i]["momentum_buffer"].clone() for i in directions if "momentum_buffer" in states[i]}
        scratch = {i: d.clone() for i, d in directions.items()}  # with reuse the new buffers are written here
        taken = heavy_ball([states[i].get("momentum_buffer") for i in directions], list(scratch.values()),
                           momentum, scale=scale, reuse_directions=reuse)
        assert all(torch.equal(states[i]["momentum_buffer"], old) for i, old in kept.items())  # only read
        if reuse:
            assert all(t is scratch[i] for i, t in zip(directions, taken))
        if momentum:  # out of place: the caller keeps the new buffers
            for i, buffer in zip(directions, taken):
                states[i]["momentum_buffer"] = buffer
        for i, direction in zip(directions, taken):
            buffer = reference.state[params[i]].get("momentum_buffer")  # None without momentum (older torch)
            expected = buffer if buffer is not None else params[i].grad
            torch.testing.assert_close(direction, expected, rtol=1e-14, atol=1e-15)


def test_a_step_leaves_the_gradients_as_they_were():
    # The fixed rule writes its momentum buffers into the step's own proposals; a layer without bias
    # hands the blocks its gradient itself (a view), which must stay untouched, as torch's optimizers leave it.
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(4, 6, bias=False), nn.Tanh(), nn.Linear(6, 3, bias=False)).to(DTYPE)
    opt = ngopt.FisherDescent(model, nn.CrossEntropyLoss(), stats_interval=1, momentum=0.9)
    x, y = torch.randn(16, 4, dtype=DTYPE), torch.randint(0, 3, (16,))
    for _ in range(3):
        opt.zero_grad()
        nn.CrossEntropyLoss()(model(x), y).backward()
        grads = [p.grad.clone() for p in model.parameters()]
        opt.step()
        assert all(torch.equal(p.grad, g) for p, g in zip(model.parameters(), grads))
