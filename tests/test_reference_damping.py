"""Levenberg-Marquardt damping on a quadratic problem where the reduction ratio is known in closed form.

Martens & Grosse 2015, sec. 6.5: rho = (L(theta + delta) - L(theta)) / M(delta),
M(delta) = g^T delta + delta^T C delta / 2 with the damped curvature C; damping
is multiplied by omega = (19/20)^T when rho > 3/4 and divided by it when rho < 1/4; ngopt's band is
narrower, 0.4 and 0.65 (``LevenbergMarquardt.RAISE_BELOW`` / ``LOWER_ABOVE``, see ngopt/rules/damping.py).

The problem: one linear layer, squared error.  The loss is exactly quadratic,
L(theta + delta) - L(theta) = g^T delta + delta^T H delta / 2, and with
``fisher='exact'`` the block's Fisher is the Hessian of the criterion (K-FAC is
exact for one linear layer with squared error: A (x) G with G = 2/d_out I).  The
objective the closure returns is ``s`` times the squared error, written out by hand
(``((f - y) ** 2).mean()``, no loss function ngopt knows) so that the curvature does
not see the factor: ngopt then takes the curvature at the model output with the
criterion's own scale (and says so), so H = s F: with
``s = 1`` the quadratic model is right (rho close to 1), with ``s = 4`` it
underestimates the curvature fourfold (rho small).  The reference rho is
computed here with numpy from the data alone.
"""
from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

import ngopt
from ngopt.rules.damping import LevenbergMarquardt

# The loss written out by hand is used on purpose here (see above): its warning is expected.
# (pytest splits a filter at colons, so the message's colon is matched by ".")
pytestmark = pytest.mark.filterwarnings("ignore:fisher='exact'. no loss call")

N, D_IN, D_OUT = 40, 4, 3


def problem(seed=0):
    rng = np.random.default_rng(seed)
    inputs = rng.normal(size=(N, D_IN))
    targets = inputs @ rng.normal(size=(D_IN, D_OUT)) + 0.3 * rng.normal(size=(N, D_OUT))
    return inputs, targets


def closed_form_rho(model, inputs, targets, objective_scale, lr, damping):
    """rho for one step delta = -lr C^-1 g, everything in float64 numpy (column-major vec ordering)."""
    weight = model.weight.detach().numpy()
    bias = model.bias.detach().numpy()
    rows = np.hstack([inputs, np.ones((N, 1))])                      # [x; 1]
    residual = rows @ np.hstack([weight, bias[:, None]]).T - targets  # f - y
    c = 1.0 / (N * D_OUT)                                             # mean over all elements
    grad = objective_scale * 2.0 * c * residual.T @ rows              # dL/dW, [d_out, d_in + 1]
    factor_in = rows.T @ rows / N
    factor_out = 2.0 / D_OUT * np.eye(D_OUT)
    # factored damping, Martens & Grosse 2015, sec. 6.3
    pi = np.sqrt((np.trace(factor_in) / (D_IN + 1)) / (np.trace(factor_out) / D_OUT))
    damped_in = factor_in + pi * np.sqrt(damping) * np.eye(D_IN + 1)
    damped_out = factor_out + np.sqrt(damping) / pi * np.eye(D_OUT)
    curvature = np.kron(damped_in, damped_out)
    hessian = objective_scale * np.kron(factor_in, factor_out)       # exact for this problem
    g = grad.T.reshape(-1)
    delta = -lr * np.linalg.solve(curvature, g)
    model_change = g @ delta + 0.5 * delta @ curvature @ delta
    loss_change = g @ delta + 0.5 * delta @ hessian @ delta
    return loss_change / model_change


# The closed-form rho of these cases: 1.21, 0.68 and 0.34 (inside the classic band, outside ngopt's), 0.54
# (inside both) and 0.18.
@pytest.mark.parametrize("objective_scale, lr, direction", [(1.0, 1.0, "falls"), (2.0, 0.7, "falls"),
                                                             (3.0, 0.5, "stays"), (3.0, 0.65, "rises"),
                                                             (4.0, 0.55, "rises")])
def test_damping_follows_the_closed_form_reduction_ratio(objective_scale, lr, direction):
    inputs, targets = problem()
    x = torch.tensor(inputs)
    y = torch.tensor(targets)
    torch.manual_seed(0)
    model = nn.Linear(D_IN, D_OUT).double()
    criterion = nn.MSELoss()
    damping = 1e-2
    opt = ngopt.FisherDescent(model, criterion, lr=lr, momentum=0.0, damping=damping, fisher="exact",
                              stats_interval=1, inverse_interval=1, stats_memory=0.0, max_step_kl=None,
                              damping_rule="lm", damping_interval=1, step_rule="fixed", loss_floor=None)

    def closure():
        # The loss written out by hand hides the factor from the curvature (it is taken at the model
        # output with the criterion's own scale, and ngopt warns): the model then underestimates a
        # loss scaled by 4 fourfold, which is the wrong model this check needs.
        opt.zero_grad()
        loss = objective_scale * ((model(x) - y) ** 2).mean()
        loss.backward()
        return loss

    expected = closed_form_rho(model, inputs, targets, objective_scale, lr, damping)
    print(f"closed-form rho {expected:.6f}")
    opt.step(closure)
    rho = opt.diagnostics()["update"]["reduction_ratio"]
    assert rho == pytest.approx(expected, rel=1e-8)
    omega = 19.0 / 20.0
    new_damping = opt.param_groups[0]["damping"]
    low, high = LevenbergMarquardt.RAISE_BELOW, LevenbergMarquardt.LOWER_ABOVE
    if direction == "falls":
        assert expected > high
        assert new_damping == pytest.approx(damping * omega, rel=1e-12)
    elif direction == "rises":
        assert expected < low
        assert new_damping == pytest.approx(damping / omega, rel=1e-12)
    else:
        assert low <= expected <= high
        assert new_damping == damping
    assert opt.diagnostics()["update"]["damping"] == new_damping


def test_damping_keeps_rising_while_the_model_is_wrong_and_stays_in_range():
    # With the curvature underestimated fourfold every step has rho < 1/4, so damping grows by
    # (20/19)^damping_interval per adaptation until the upper end of damping_range.
    inputs, targets = problem(1)
    x, y = torch.tensor(inputs), torch.tensor(targets)
    torch.manual_seed(1)
    model = nn.Linear(D_IN, D_OUT).double()
    criterion = nn.MSELoss()
    opt = ngopt.FisherDescent(model, criterion, lr=0.55, momentum=0.0, damping=1e-2, fisher="exact",
                              stats_interval=1, inverse_interval=1, max_step_kl=None, damping_rule="lm",
                              damping_interval=2, damping_range=(1e-4, 1.5e-2), step_rule="fixed")

    def closure():
        opt.zero_grad()
        loss = 4.0 * ((model(x) - y) ** 2).mean()  # curvature underestimated fourfold, as above
        loss.backward()
        return loss

    history = []
    for _ in range(20):
        opt.step(closure)
        history.append(opt.param_groups[0]["damping"])
    assert history[1] == pytest.approx(1e-2 * (20 / 19) ** 2, rel=1e-12)
    assert all(b >= a for a, b in zip(history, history[1:]))
    assert history[-1] == pytest.approx(1.5e-2)
