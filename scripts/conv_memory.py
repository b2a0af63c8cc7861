"""Peak resident memory and mean step time of a CIFAR-sized CNN: FisherDescent against torch.optim.SGD.

The network: 3x32x32 inputs, 3x3 convolutions with 64-64-128-128-256 channels,
each followed by batch norm and ReLU (2x2 max-pooling after the 2nd, 4th and 5th),
global average pooling and a linear layer to 10 classes; random data, batch 128.
Each optimizer runs in a fresh subprocess, so that one's peak does not hide
another's; the peak is the process's resident high-water mark (getrusage
ru_maxrss), and "above base" subtracts the resident size just before the first
step (torch, the model and the data).  Steps are timed after one warm-up step;
the default 20 timed steps hold the amortized share of refreshes (every
``stats_interval`` = 10 steps) and inversions (every ``inverse_interval`` = 20).

    python scripts/conv_memory.py [--batch 128] [--steps 20] [--rounds 2] [--optimizers sgd kfac ekfac]
        [--option stats_fraction=1.0]     # every example in the statistics (the default for convolutions: 0.25)
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time

import torch
from torch import nn

CHANNELS = (64, 64, 128, 128, 256)
POOL_AFTER = (1, 3, 4)  # indices of the convolutions followed by 2x2 max-pooling

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from benchmarks.cli import parse_options  # noqa: E402


def make_cnn(classes: int = 10) -> nn.Module:
    layers, width = [], 3
    for index, channels in enumerate(CHANNELS):
        layers += [nn.Conv2d(width, channels, 3, padding=1), nn.BatchNorm2d(channels), nn.ReLU()]
        if index in POOL_AFTER:
            layers.append(nn.MaxPool2d(2))
        width = channels
    return nn.Sequential(*layers, nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(width, classes))


def resident_bytes() -> int:
    """Current resident set size (Linux /proc), for the base line before the first step."""
    with open("/proc/self/statm") as statm:
        return int(statm.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def make_optimizer(name: str, model: nn.Module, loss_fn, options: dict):
    if name == "sgd":
        return torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)
    import ngopt
    return ngopt.FisherDescent(model, loss_fn, lr=0.01, structure=name, **options)


def worker(name: str, batch: int, steps: int, threads: int, options: dict) -> dict:
    torch.set_num_threads(threads)
    torch.manual_seed(0)
    model = make_cnn()
    loss_fn = nn.CrossEntropyLoss()
    optimizer = make_optimizer(name, model, loss_fn, options)
    inputs = torch.randn(batch, 3, 32, 32)
    targets = torch.randint(0, 10, (batch,))
    base = resident_bytes()
    times = []
    for _ in range(1 + steps):
        start = time.perf_counter()
        optimizer.zero_grad()
        loss_fn(model(inputs), targets).backward()
        optimizer.step()
        times.append(time.perf_counter() - start)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kilobytes on Linux
    result = {"optimizer": name, "peak_bytes": peak, "base_bytes": base, "mean_step_s": statistics.mean(times[1:]),
              "median_step_s": statistics.median(times[1:]), "first_step_s": times[0]}
    if name != "sgd":
        result["time_split"] = {k: v for k, v in optimizer.diagnostics()["time"].items()}
    return result


def run_fresh(name: str, args) -> dict:
    command = [sys.executable, __file__, "--worker", name, "--batch", str(args.batch), "--steps", str(args.steps),
               "--threads", str(args.threads)] + sum((["--option", o] for o in args.option), [])
    output = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    return json.loads(output.strip().splitlines()[-1])


def merged_rounds(results) -> dict:
    """Peaks: the largest of the rounds; step times: the mean (median) over every timed step of all rounds."""
    merged = dict(results[-1])
    merged["peak_bytes"] = max(r["peak_bytes"] for r in results)
    merged["base_bytes"] = max(r["base_bytes"] for r in results)
    merged["mean_step_s"] = statistics.mean(r["mean_step_s"] for r in results)
    merged["median_step_s"] = statistics.median(r["median_step_s"] for r in results)
    return merged


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--batch", type=int, default=128)
    parser.add_argument("--steps", type=int, default=20, help="timed steps after one warm-up step")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--rounds", type=int, default=1, help="fresh runs per optimizer, taking turns")
    parser.add_argument("--optimizers", nargs="+", default=["sgd", "kfac"], choices=["sgd", "kfac", "ekfac", "diag"])
    parser.add_argument("--option", action="append", default=[], metavar="KEY=JSON",
                        help="a FisherDescent keyword for the FisherDescent rows, e.g. stats_interval=5")
    parser.add_argument("--worker", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        print(json.dumps(worker(args.worker, args.batch, args.steps, args.threads, parse_options(args.option or []))))
        return
    print(f"CNN {'-'.join(map(str, CHANNELS))}, batch {args.batch}, {args.steps} timed steps x {args.rounds} rounds, "
          f"threads {args.threads}, load average {os.getloadavg()[0]:.2f}")
    runs = {name: [] for name in args.optimizers}
    for _ in range(args.rounds):  # take turns, so that a busy spell of the machine hits every optimizer
        for name in args.optimizers:
            runs[name].append(run_fresh(name, args))
    rows = [merged_rounds(results) for results in runs.values()]
    reference = next((r for r in rows if r["optimizer"] == "sgd"), rows[0])
    print(f"{'optimizer':>9} {'peak MB':>8} {'above base':>10} {'x peak':>7} {'mean ms':>8} {'median ms':>9} "
          f"{'x mean':>7}")
    for row in rows:
        above = row["peak_bytes"] - row["base_bytes"]
        print(f"{row['optimizer']:>9} {row['peak_bytes'] / 2**20:>8.0f} {above / 2**20:>10.0f} "
              f"{row['peak_bytes'] / reference['peak_bytes']:>7.2f} {1e3 * row['mean_step_s']:>8.0f} "
              f"{1e3 * row['median_step_s']:>9.0f} {row['mean_step_s'] / reference['mean_step_s']:>7.2f}")
    print(f"load average after: {os.getloadavg()[0]:.2f}")
    for row in rows:
        if "time_split" in row:
            split = ", ".join(f"{k} {v:.2f}s" for k, v in row["time_split"].items())
            print(f"{row['optimizer']} time split (all steps): {split}")


if __name__ == "__main__":
    main()
