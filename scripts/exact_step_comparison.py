"""Full-batch steps to a target loss: FisherDescent against the exact damped natural gradient.

The reference builds the whole generalized Gauss-Newton matrix F = J^T H J of a small tanh MLP
with torch.func (the exact Fisher for softmax cross-entropy) and steps
theta <- theta - (F + lambda I)^-1 g, with lambda adapted by the same Levenberg-Marquardt rule
(Martens & Grosse 2015, sec. 6.5) every step.  FisherDescent runs with fisher="exact" on the same
full batch, once per step rule.

    python scripts/exact_step_comparison.py [--target 0.05] [--steps 200]
"""
from __future__ import annotations

import argparse
import copy
import warnings

import torch
from torch import nn
from torch.func import functional_call, jacrev

import ngopt
from ngopt.rules import LevenbergMarquardt


def problem(seed: int = 0):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(256, 6, generator=generator, dtype=torch.float64)
    teacher = torch.randn(6, 4, generator=generator, dtype=torch.float64)
    y = (torch.tanh(x @ teacher) + 0.3 * torch.randn(256, 4, generator=generator, dtype=torch.float64)).argmax(1)
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(6, 16), nn.Tanh(), nn.Linear(16, 16), nn.Tanh(), nn.Linear(16, 4)).double()
    return model, x, y


def exact_natural_gradient(model, x, y, target, steps, damping=1e-2):
    loss_fn = nn.CrossEntropyLoss()
    names = [n for n, _ in model.named_parameters()]
    rule = LevenbergMarquardt(interval=1, damping_range=(1e-8, 1e2))
    for step in range(steps):
        params = {n: p.detach() for n, p in model.named_parameters()}
        loss = loss_fn(model(x), y)
        if float(loss.detach()) <= target:
            return step
        grad = torch.cat([g.reshape(-1) for g in torch.autograd.grad(loss, list(model.parameters()))])
        jac = jacrev(lambda p: functional_call(model, p, (x,)))(params)
        j = torch.cat([jac[n].reshape(len(x), 4, -1) for n in names], dim=2)
        with torch.no_grad():
            prob = torch.softmax(model(x), dim=1)
        h = (torch.diag_embed(prob) - prob.unsqueeze(2) * prob.unsqueeze(1)) / len(x)
        fisher = torch.einsum("nap,nab,nbq->pq", j, h, j)
        delta = -torch.linalg.solve(fisher + damping * torch.eye(len(grad), dtype=grad.dtype), grad)
        predicted = float(grad @ delta + 0.5 * delta @ (fisher + damping * torch.eye(len(grad))) @ delta)
        with torch.no_grad():
            offset = 0
            for p in model.parameters():
                p.add_(delta[offset:offset + p.numel()].reshape(p.shape))
                offset += p.numel()
            after = float(loss_fn(model(x), y))
        damping = rule.adapt(damping, (after - float(loss.detach())) / predicted if predicted < 0 else None)
    return None


def fisher_descent(model, x, y, target, steps, **options):
    loss_fn = nn.CrossEntropyLoss()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, fisher="exact", stats_interval=1, inverse_interval=1,
                                  stats_memory=0.0, rule_batch_fraction=1.0, damping_interval=1, **options)
    for step in range(steps):
        opt.zero_grad()
        loss = loss_fn(model(x), y)
        if float(loss.detach()) <= target:
            return step
        loss.backward()
        opt.step()
    return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", type=float, default=0.05, help="full-batch training loss to reach")
    parser.add_argument("--steps", type=int, default=300, help="step budget of every method")
    args = parser.parse_args()
    model, x, y = problem()
    rows = [("exact damped natural gradient (full GGN, LM damping)",
             exact_natural_gradient(copy.deepcopy(model), x, y, args.target, args.steps))]
    for rule, options in (("fixed", {}), ("quadratic", {}), ("quadratic", {"max_step_kl": None})):
        label = "".join(f", {k}={v}" for k, v in options.items())
        rows.append((f"FisherDescent step_rule={rule!r}, fisher='exact', LM damping{label}",
                     fisher_descent(copy.deepcopy(model), x, y, args.target, args.steps, step_rule=rule,
                                    **options)))
    reference = rows[0][1]
    for name, steps in rows:
        ratio = "" if steps is None or not reference else f"  ({steps / reference:.2f}x the exact steps)"
        print(f"{name}: {'not reached' if steps is None else steps}{ratio}")


if __name__ == "__main__":
    main()
