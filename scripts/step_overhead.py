"""Per-step wall time of FisherDescent (default refresh intervals) over torch.optim.SGD's.

An MLP of width d (3 hidden layers of d units, 10 classes) on random data, batch B.
Two flop-count estimates of the ratio, both estimates and not bounds (step times
are not proportional to flops, and measured ratios fall below them at small batch):

- "precond. est.": forward+backward cost ~6 B d^2 flops per d x d layer and
  preconditioning ~4 d^3 per step, so the flops grow by 1 + 2d / (3B); EKFAC
  rotates into and out of the eigenbasis, ~8 d^3 per step: 1 + 4d / (3B).
- "schedule est.": all the work the default schedule does, amortized: the
  preconditioning, the Levenberg-Marquardt check every damping_interval steps
  (one forward, 2 B d^2, and the model change, the preconditioning's products
  again), the refresh every stats_interval steps (the extra backward, 2 B d^2,
  and the factor statistics, 4 B d^2) and the float64 inversions every
  inverse_interval steps (Cholesky n^3/3 and inverse 2n^3/3 per n x n factor;
  EKFAC's eigendecompositions ~9 n^3, Golub & Van Loan, Matrix Computations, 4th
  ed., sec. 8.3, from memory; EKFAC's refresh also projects the rows into the
  eigenbasis).

"slowest ms" is FisherDescent's longest single step (an inversion step under
inverse_schedule "together"; "staggered" spreads the inversions).

    python scripts/step_overhead.py --width 256 --batches 256 1024 [--structure ekfac]
    python scripts/step_overhead.py --width 1024 --batches 256 --inverse-schedule staggered
    python scripts/step_overhead.py --widths 64 128 128 10 --batches 256      # the digits MLP
"""
from __future__ import annotations

import argparse
import os
import statistics
import time

import torch
from torch import nn

import ngopt


def layer_widths(width: int, depth: int = 3, classes: int = 10):
    return [width] * (depth + 1) + [classes]


def make_mlp(widths) -> nn.Module:
    layers = []
    for d_in, d_out in zip(widths[:-2], widths[1:-1]):
        layers += [nn.Linear(d_in, d_out), nn.Tanh()]
    return nn.Sequential(*layers, nn.Linear(widths[-2], widths[-1]))


PRODUCTS_PER_STEP = {"kfac": 2, "ekfac": 4, "diag": 0}  # d x d products per layer and step


def preconditioning_flops(d_in: int, d_out: int, gemms: int) -> float:
    """``gemms`` products per step, half on each side of a d_out x d_in matrix: gemms/2 * 2 d_in d_out (d_in + d_out)."""
    return gemms / 2 * 2 * d_in * d_out * (d_in + d_out)


def flop_count_estimate(widths, batch: int, gemms: int) -> float:
    """1 + preconditioning flops / forward-backward flops (6 B d_in d_out per layer)."""
    pairs = list(zip(widths[:-1], widths[1:]))
    extra = sum(preconditioning_flops(i, o, gemms) for i, o in pairs)
    return 1 + extra / sum(6 * batch * i * o for i, o in pairs)


def schedule_flop_estimate(widths, batch: int, structure: str, intervals: dict) -> float:
    """1 + every amortized part of the default schedule's flops / forward-backward flops (module docstring)."""
    gemms = PRODUCTS_PER_STEP[structure]
    inversion_per_cube = {"kfac": 1, "ekfac": 9, "diag": 0}[structure]  # flops / n^3 per n x n factor
    pairs = list(zip(widths[:-1], widths[1:]))
    extra = 0.0
    for index, (i, o) in enumerate(pairs):
        products = preconditioning_flops(i, o, gemms)
        check = 2 * batch * i * o + products
        backward = 2 * batch * i * o if index else 0.0  # the lowest layer's input needs no gradient
        moments = 2 * batch * (i * i + o * o) if gemms else 2 * batch * i * o  # diag: squared per-example grads
        if structure == "ekfac":  # rows projected into the eigenbasis, then squared per-example products
            moments += 2 * batch * (i * i + o * o) + 2 * batch * i * o
        inversion = inversion_per_cube * (i ** 3 + o ** 3)
        extra += (products + check / intervals["damping_interval"] + (backward + moments) / intervals["stats_interval"]
                  + inversion / intervals["inverse_interval"])
    return 1 + extra / sum(6 * batch * i * o for i, o in pairs)


def time_steps(make_optimizer, widths, batch: int, steps: int, warmup: int, seed: int = 0):
    torch.manual_seed(seed)
    model = make_mlp(widths)
    loss_fn = nn.CrossEntropyLoss()
    optimizer = make_optimizer(model, loss_fn)
    inputs = torch.randn(batch, widths[0])
    targets = torch.randint(0, widths[-1], (batch,))
    times = []
    for _ in range(warmup + steps):
        start = time.perf_counter()
        optimizer.zero_grad()
        loss_fn(model(inputs), targets).backward()
        optimizer.step()
        times.append(time.perf_counter() - start)
    return times[warmup:], sum(times), optimizer


def default_intervals(structure: str) -> dict:
    """FisherDescent's default intervals, read from the library (they may change)."""
    opt = ngopt.FisherDescent(make_mlp(layer_widths(2, depth=1, classes=2)), nn.CrossEntropyLoss(),
                              structure=structure)
    return {name: getattr(opt, name) for name in ("stats_interval", "inverse_interval", "damping_interval")}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--width", type=int, default=256)
    parser.add_argument("--widths", type=int, nargs="+", default=None,
                        help="layer widths, input to classes (e.g. the digits MLP: 64 128 128 10); overrides --width")
    parser.add_argument("--batches", type=int, nargs="+", default=[256, 1024])
    parser.add_argument("--steps", type=int, default=200,
                        help="timed steps per run; must be a multiple of FisherDescent's inverse_interval "
                             "so that every run times whole refresh periods (default 200)")
    parser.add_argument("--warmup", type=int, default=20)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--rounds", type=int, default=3, help="alternate SGD/FisherDescent runs this many times")
    parser.add_argument("--structure", choices=["kfac", "ekfac", "diag"], default="kfac")
    parser.add_argument("--inverse-schedule", choices=["together", "staggered"], default="together",
                        help="FisherDescent's inverse_schedule: all blocks inverted on one step, or each on its own")
    args = parser.parse_args(argv)
    intervals = default_intervals(args.structure)
    interval = intervals["inverse_interval"]
    if args.steps < 1 or args.steps % interval:
        parser.error(f"--steps must be a positive multiple of inverse_interval ({interval}), got {args.steps}")
    torch.set_num_threads(args.threads)
    widths = args.widths or layer_widths(args.width)

    def sgd(model, loss_fn):
        return torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)

    def natural(model, loss_fn):
        return ngopt.FisherDescent(model, loss_fn, lr=0.01, structure=args.structure,
                                   inverse_schedule=args.inverse_schedule)

    print(f"widths {'-'.join(map(str, widths))}, load average {os.getloadavg()[0]:.2f}, threads {args.threads}, {args.steps} timed steps x {args.rounds} rounds, "
          f"curvature {args.structure}, inverse_schedule {args.inverse_schedule}")
    print(f"{'batch':>6} {'sgd ms':>8} {'fisher-descent ms':>17} {'ratio(mean)':>11} {'ratio(median)':>13} "
          f"{'precond. est.':>13} {'schedule est.':>13} {'slowest ms':>10}  fisher-descent split (% of its whole step, forward and backward included)")
    for batch in args.batches:
        sgd_times, ng_times, optimizer = [], [], None
        for _ in range(args.rounds):  # interleave so that machine noise hits both alike
            sgd_times += time_steps(sgd, widths, batch, args.steps, args.warmup)[0]
            times, wall, optimizer = time_steps(natural, widths, batch, args.steps, args.warmup)
            ng_times += times
        # The optimizer's own clocks cover every step of its last run, warm-up included.
        split = optimizer.diagnostics()["time"]
        parts = ("precondition", "rules", "inversion", "statistics", "statistics_in_backward", "extra_backward",
                 "capture")
        share = {k: 100 * split[k] / wall for k in parts}
        flop_estimate = flop_count_estimate(widths, batch, PRODUCTS_PER_STEP[args.structure])
        schedule_estimate = schedule_flop_estimate(widths, batch, args.structure, intervals)
        mean_ratio = statistics.mean(ng_times) / statistics.mean(sgd_times)
        median_ratio = statistics.median(ng_times) / statistics.median(sgd_times)
        print(f"{batch:>6} {1e3 * statistics.mean(sgd_times):>8.2f} {1e3 * statistics.mean(ng_times):>17.2f} "
              f"{mean_ratio:>11.2f} {median_ratio:>13.2f} {flop_estimate:>13.2f} {schedule_estimate:>13.2f} {1e3 * max(ng_times):>10.2f}  "
              + ", ".join(f"{k} {v:.0f}%" for k, v in share.items()))


if __name__ == "__main__":
    main()
