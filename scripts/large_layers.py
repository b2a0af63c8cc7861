"""Step time and memory of ngopt against AdamW on models with large layers, each run in a fresh process.

Two model families, built here with random weights (no downloads):

* ``vocab``: ``Embedding(V, w) -> Linear(w, w) -> GELU -> Linear(w, V)``, next-token loss on random
  tokens, batch 8 sequences of 32 tokens; the output layer's output factor is ``V x V`` when kept whole.
* ``resnet``: ResNet-18 (basic blocks 2-2-2-2, widths 64-512, batch norm) on 32x32 images, batch 32,
  10 classes, in the ImageNet layout (7x7 stride-2 stem and max pooling: the 512-channel 3x3
  convolutions see 1x1 feature maps, as in timm's ``resnet18``) or the CIFAR layout (3x3 stem, no
  pooling: 4x4 maps).

Every optimizer runs in a process of its own (``python scripts/large_layers.py --worker ...``), so that
the peak resident memory (``ru_maxrss``) is its own; the script reports, per model and optimizer, the
mean step over the timed steps (refreshes and inversions included), the median, the slowest step and
its ratio to the median, and the peak memory, with ngopt's ratios to AdamW's::

    python scripts/large_layers.py vocab --vocab 32000 50257 128256
    python scripts/large_layers.py resnet --layout imagenet cifar
    python scripts/large_layers.py vocab --vocab 32000 --option cost_budget=0.5   # any FisherDescent option
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
import torch.nn.functional as F

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from benchmarks.cli import parse_options  # noqa: E402


# ----------------------------------------------------------------------------------------- models
def vocab_model(vocab: int, width: int) -> nn.Module:
    return nn.Sequential(nn.Embedding(vocab, width), nn.Linear(width, width), nn.GELU(), nn.Linear(width, vocab))


class BasicBlock(nn.Module):
    def __init__(self, inputs, outputs, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(inputs, outputs, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(outputs)
        self.conv2 = nn.Conv2d(outputs, outputs, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(outputs)
        self.shortcut = nn.Sequential()
        if stride != 1 or inputs != outputs:
            self.shortcut = nn.Sequential(nn.Conv2d(inputs, outputs, 1, stride, bias=False), nn.BatchNorm2d(outputs))

    def forward(self, x):
        out = F.relu(self.bn1(self.conv1(x)))
        return F.relu(self.bn2(self.conv2(out)) + self.shortcut(x))


class ResNet18(nn.Module):
    def __init__(self, layout: str, classes: int = 10):
        super().__init__()
        if layout == "imagenet":
            self.stem = nn.Sequential(nn.Conv2d(3, 64, 7, 2, 3, bias=False), nn.BatchNorm2d(64), nn.ReLU(),
                                      nn.MaxPool2d(3, 2, 1))
        else:
            self.stem = nn.Sequential(nn.Conv2d(3, 64, 3, 1, 1, bias=False), nn.BatchNorm2d(64), nn.ReLU())
        layers, inputs = [], 64
        for outputs, stride in ((64, 1), (128, 2), (256, 2), (512, 2)):
            layers += [BasicBlock(inputs, outputs, stride), BasicBlock(outputs, outputs, 1)]
            inputs = outputs
        self.layers = nn.Sequential(*layers)
        self.head = nn.Linear(512, classes)

    def forward(self, x):
        return self.head(F.adaptive_avg_pool2d(self.layers(self.stem(x)), 1).flatten(1))


# ----------------------------------------------------------------------------------------- one run
def worker(args) -> dict:
    torch.manual_seed(0)
    torch.set_num_threads(args.threads)
    generator = torch.Generator().manual_seed(1)
    if args.family == "vocab":
        model = vocab_model(args.size, args.width)
        data = [torch.randint(0, args.size, (8, 33), generator=generator) for _ in range(4)]

        def loss_of(tokens):
            logits = model(tokens[:, :-1])
            return F.cross_entropy(logits.reshape(-1, args.size), tokens[:, 1:].reshape(-1))
    else:
        model = ResNet18(args.layout)
        data = [(torch.randn(32, 3, 32, 32, generator=generator), torch.randint(0, 10, (32,), generator=generator))
                for _ in range(4)]

        def loss_of(batch):
            return F.cross_entropy(model(batch[0]), batch[1])
    if args.optimizer == "adamw":
        opt = torch.optim.AdamW(model.parameters(), lr=1e-3)
    else:
        import ngopt
        opt = ngopt.FisherDescent(model, **parse_options(args.option or []))
    times, losses = [], []
    for step in range(args.warmup + args.steps):
        started = time.perf_counter()
        opt.zero_grad()
        loss = loss_of(data[step % len(data)])
        loss.backward()
        opt.step()
        elapsed = time.perf_counter() - started
        if step >= args.warmup:
            times.append(elapsed)
        losses.append(float(loss.detach()))
    result = {"mean_ms": 1e3 * statistics.mean(times), "median_ms": 1e3 * statistics.median(times),
              "slowest_ms": 1e3 * max(times), "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
              "first_loss": losses[0], "last_loss": losses[-1], "load": os.getloadavg()[0]}
    if args.optimizer == "fisher-descent":
        result["blocks"] = repr(opt)
    return result


def run_in_fresh_process(family, size, layout, optimizer, args) -> dict:
    command = [sys.executable, __file__, "--worker", family, "--optimizer", optimizer, "--size", str(size),
               "--layout", layout, "--width", str(args.width), "--steps", str(args.steps), "--warmup",
               str(args.warmup), "--threads", str(args.threads)] + \
        [part for option in args.option or [] for part in ("--option", option)]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    if done.returncode:
        raise RuntimeError(f"{family} {size} {layout} {optimizer} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("family", choices=["vocab", "resnet"])
    parser.add_argument("--vocab", type=int, nargs="+", default=[32000, 50257, 128256])
    parser.add_argument("--layout", nargs="+", default=["imagenet", "cifar"], choices=["imagenet", "cifar"])
    parser.add_argument("--width", type=int, default=512, help="vocab model width (default 512)")
    parser.add_argument("--steps", type=int, default=40, help="timed steps (default 40)")
    parser.add_argument("--warmup", type=int, default=2, help="untimed steps before them (default 2)")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    parser.add_argument("--option", action="append", help="a FisherDescent option KEY=VALUE (repeatable)")
    parser.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--optimizer", default="fisher-descent", help=argparse.SUPPRESS)
    parser.add_argument("--size", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        args.layout = args.layout[0] if isinstance(args.layout, list) else args.layout
        print(json.dumps(worker(args)))
        return 0
    cases = [(size, "imagenet") for size in args.vocab] if args.family == "vocab" else [(0, layout) for layout in args.layout]
    print(f"{args.family}: {args.steps} timed steps after {args.warmup}, {args.threads} threads, "
          f"options {args.option or 'defaults'}, torch {torch.__version__}")
    print("| model | optimizer | mean ms | median ms | slowest ms | slowest/median | peak MB | mean / AdamW | "
          "peak / AdamW | loss first -> last | load |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for size, layout in cases:
        name = f"V={size}" if args.family == "vocab" else f"ResNet-18 {layout}"
        runs = {opt: run_in_fresh_process(args.family, size, layout, opt, args) for opt in ("adamw", "fisher-descent")}
        base = runs["adamw"]
        for opt, r in runs.items():
            print(f"| {name} | {opt} | {r['mean_ms']:.0f} | {r['median_ms']:.0f} | {r['slowest_ms']:.0f} | "
                  f"{r['slowest_ms'] / r['median_ms']:.2f} | {r['peak_mb']:.0f} | {r['mean_ms'] / base['mean_ms']:.2f} | "
                  f"{r['peak_mb'] / base['peak_mb']:.2f} | {r['first_loss']:.2f} -> {r['last_loss']:.2f} | "
                  f"{r['load']:.1f} |", flush=True)
        if "blocks" in runs["fisher-descent"]:
            print("\n".join("    " + line for line in runs["fisher-descent"]["blocks"].splitlines()[2:]
                            if "factor" in line or "diag" in line))
    return 0


if __name__ == "__main__":
    sys.exit(main())
