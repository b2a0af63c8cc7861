"""Time batch norm's per-channel moments as the curvature capture takes them against ``torch.var_mean``.

For each input shape (default: the batch-norm inputs of the benchmark's residual CNN at its batch size,
then one early ResNet-sized activation) the median of several repeats of
:func:`ngopt.uses.normalization.channel_moments` and of ``torch.var_mean`` over the same dims, their largest
relative difference, and the sum over the residual CNN's layers: what one recorded forward spends on them::

    python scripts/batch_norm_moments.py
    python scripts/batch_norm_moments.py --shapes 64,64,16,16 8,96,56,56 --threads 2
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
from ngopt.uses.normalization import channel_moments  # noqa: E402


def resnet_shapes() -> list[tuple[int, ...]]:
    """The input shape of every batch norm in the benchmark's residual CNN, at the task's batch size."""
    from benchmarks.tasks import TASKS
    task = TASKS["digits_resnet"]
    torch.manual_seed(0)
    model, shapes = task.build_model(), []
    for module in model.modules():
        if isinstance(module, torch.nn.modules.batchnorm._BatchNorm):
            module.register_forward_hook(lambda m, inputs, output: shapes.append(tuple(inputs[0].shape)))
    with torch.no_grad():
        model(task.load_data().train_x[:task.batch_size])
    return shapes


def median_us(function, repeats: int) -> float:
    function()
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        function()
        times.append(time.perf_counter() - started)
    return 1e6 * statistics.median(times)


def compare(shape: tuple[int, ...], repeats: int) -> tuple[float, float, float]:
    """(channel_moments us, var_mean us, largest relative difference of the variances)."""
    x = torch.randn(shape, generator=torch.Generator().manual_seed(0)) * 3 + 5
    dims = [0] + list(range(2, x.dim()))
    ours = median_us(lambda: channel_moments(x), repeats)
    theirs = median_us(lambda: torch.var_mean(x, dim=dims, correction=0), repeats)
    variance, _ = torch.var_mean(x, dim=dims, correction=0)
    difference = float(((channel_moments(x)[1] - variance) / variance).abs().max())
    return ours, theirs, difference


def parse_shape(text: str) -> tuple[int, ...]:
    try:
        shape = tuple(int(part) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"a shape is comma-separated integers, got {text!r}")
    if len(shape) < 2 or min(shape) < 1:
        raise argparse.ArgumentTypeError(f"a shape has at least two positive sizes, got {text!r}")
    return shape


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--shapes", nargs="+", type=parse_shape, help="input shapes N,C[,...] (default: see above)")
    parser.add_argument("--repeats", type=int, default=50)
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args(argv)
    if args.repeats < 1 or args.threads < 1:
        parser.error(f"--repeats and --threads must be at least 1, got {args.repeats} and {args.threads}")
    torch.set_num_threads(args.threads)
    network = [] if args.shapes else resnet_shapes()
    totals = [0.0, 0.0]
    for shape in args.shapes or sorted(set(network)) + [(8, 96, 56, 56)]:
        ours, theirs, difference = compare(shape, args.repeats)
        print(f"{list(shape)}: channel_moments {ours:.0f} us, torch.var_mean {theirs:.0f} us "
              f"({theirs / ours:.1f}x), variances agree to {difference:.1e}")
        count = network.count(shape)
        totals[0] += count * ours
        totals[1] += count * theirs
    if network:
        print(f"residual CNN, {len(network)} batch norms per recorded forward: channel_moments "
              f"{totals[0] / 1e3:.2f} ms, torch.var_mean {totals[1] / 1e3:.2f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
