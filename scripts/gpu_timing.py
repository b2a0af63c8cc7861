"""ngopt against AdamW on a CUDA device: mean step time and peak device memory, in a few minutes.

For each of the benchmark's built-in tasks (their models, losses and batch sizes; ``python -m benchmarks``)
and a ResNet-18 on 32x32 images (CIFAR layout, batch 128; ``scripts/large_layers.py``), the script
trains a copy with ``ngopt.FisherDescent`` at its defaults and a copy with ``torch.optim.AdamW(lr=1e-3)``
for ``--steps`` steps each on the device, synchronizing around every step, and prints the mean step (after
``--warmup`` untimed steps), the slowest step, ngopt's ratio to AdamW and each run's peak device memory
(``torch.cuda.max_memory_allocated``)::

    python scripts/gpu_timing.py                    # all tasks, 60 timed steps each
    python scripts/gpu_timing.py --tasks digits_mlp --steps 30 --option inverse_schedule=staggered
    python scripts/gpu_timing.py --parts            # also where fisher-descent's timed steps went

``--parts`` adds, per task, fisher-descent's own time split over the timed steps (``diagnostics()["time"]``,
milliseconds per step; host-side times, so on a GPU a part that waits for the device also carries the
device work queued before it).
"""
from __future__ import annotations

import argparse
import copy
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import ngopt  # noqa: E402
from benchmarks.tasks import TASKS  # noqa: E402
from benchmarks.cli import parse_options  # noqa: E402
from scripts.client_models import synchronize  # noqa: E402
from scripts.large_layers import ResNet18  # noqa: E402


def problems(names):
    for name in names:
        if name == "resnet18":
            generator = torch.Generator().manual_seed(0)
            x = torch.randn(512, 3, 32, 32, generator=generator)
            y = torch.randint(0, 10, (512,), generator=generator)
            yield name, (lambda: ResNet18("cifar")), (lambda: torch.nn.CrossEntropyLoss()), x, y, 128
            continue
        task = TASKS[name]
        split = task.load_data()
        yield name, task.build_model, task.make_loss, split.train_x, split.train_y, task.batch_size


def timed(model, opt, loss_fn, x, y, batch, steps, warmup, device):
    """``(mean step s, slowest step s, peak device bytes or None on the CPU, time split or None)`` over the
    ``steps`` steps after ``warmup``; the split (fisher-descent only) is ms per timed step by part."""
    times = []
    if device.type == "cuda":
        torch.cuda.reset_peak_memory_stats(device)
    before = None
    for step in range(warmup + steps):
        if step == warmup and isinstance(opt, ngopt.FisherDescent):
            before = dict(opt.diagnostics()["time"])
        start = (step * batch) % max(1, x.shape[0] - batch)
        inputs, targets = x[start:start + batch], y[start:start + batch]
        synchronize(device)
        began = time.perf_counter()
        opt.zero_grad()
        loss_fn(model(inputs), targets).backward()
        opt.step()
        synchronize(device)
        if step >= warmup:
            times.append(time.perf_counter() - began)
    split = None
    if before is not None:
        after = opt.diagnostics()["time"]
        split = {part: 1e3 * (after[part] - before.get(part, 0.0)) / steps for part in after}
    peak = torch.cuda.max_memory_allocated(device) if device.type == "cuda" else None
    return statistics.mean(times), max(times), peak, split


def split_line(name: str, split: dict) -> str:
    return f"  {name}, fisher-descent ms per step: " + ", ".join(f"{part} {ms:.2f}" for part, ms in split.items())


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", nargs="*", default=[n for n in TASKS if n != "corpus_torch_transformer"] +
                        ["resnet18"])
    parser.add_argument("--steps", type=int, default=60)
    parser.add_argument("--warmup", type=int, default=5)
    parser.add_argument("--option", action="append", help="a FisherDescent option KEY=VALUE (repeatable)")
    parser.add_argument("--parts", action="store_true", help="also print fisher-descent's time split per task")
    args = parser.parse_args(argv)
    if not torch.cuda.is_available():
        print("no CUDA device: this script times ngopt on a GPU", file=sys.stderr)
        return 2
    device = torch.device("cuda")
    print(f"{torch.cuda.get_device_name(device)}, torch {torch.__version__}, {args.steps} timed steps after "
          f"{args.warmup}, options {args.option or 'defaults'}")
    print("| task | AdamW ms | fisher-descent ms | ratio | its slowest ms | AdamW MB | fisher-descent MB |")
    print("|---|---|---|---|---|---|---|")
    splits = []
    for name, build, make_loss, x, y, batch in problems(args.tasks):
        torch.manual_seed(0)
        base = build().to(device)
        x, y = x.to(device), y.to(device)
        results = {}
        for which in ("adamw", "fisher-descent"):
            model = copy.deepcopy(base)
            loss_fn = make_loss()
            opt = torch.optim.AdamW(model.parameters(), lr=1e-3) if which == "adamw" else \
                ngopt.FisherDescent(model, loss_fn, **parse_options(args.option or []))
            results[which] = timed(model, opt, loss_fn, x, y, batch, args.steps, args.warmup, device)
        (a_mean, _, a_mem, _), (n_mean, n_slow, n_mem, split) = results["adamw"], results["fisher-descent"]
        print(f"| {name} | {1e3 * a_mean:.2f} | {1e3 * n_mean:.2f} | {n_mean / a_mean:.2f} | {1e3 * n_slow:.1f} | "
              f"{a_mem / 2 ** 20:.0f} | {n_mem / 2 ** 20:.0f} |", flush=True)
        splits.append(split_line(name, split))
    if args.parts:
        print()
        print("\n".join(splits))
    return 0


if __name__ == "__main__":
    sys.exit(main())
