"""Data-parallel natural-gradient training with DistributedDataParallel on scikit-learn's digits.

Launch (one machine, two processes; gloo on the CPU, NCCL when every rank has a GPU):

    torchrun --standalone --nproc_per_node=2 examples/train_ddp.py --steps 100
    python examples/train_ddp.py --steps 100        # one process, no process group

Every run walks through the same global batches (drawn from ``--seed``); rank ``r`` of
``R`` takes the ``r``-th of ``R`` equal slices of each.  With ``--fisher exact`` or
``empirical`` the runs with 1 and 2 processes therefore follow the same trajectory up
to rounding; with ``sampled`` each rank draws the targets of its own examples, so the
draws (not their distribution) depend on the number of processes.

``--checkpoint PATH`` saves model and optimizer on rank 0 at the end; ``--resume PATH``
loads such a file before training, in any number of processes.  ``--json PATH`` writes
the measurements (step times, bytes and seconds of the curvature exchange, the
volumes computed from the layer sizes) that the README quotes.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
import warnings

import torch
import torch.distributed as dist
from torch import nn

import ngopt
import ngopt.distributed as nd


def parse_args(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--steps", type=int, default=100, help="optimizer steps (default 100)")
    parser.add_argument("--batch-size", type=int, default=512, help="global batch, split over the ranks")
    parser.add_argument("--hidden", type=int, default=256, help="width of the hidden layers")
    parser.add_argument("--depth", type=int, default=2, help="number of hidden layers")
    parser.add_argument("--fisher", choices=("sampled", "exact", "empirical"), default="sampled")
    parser.add_argument("--stats-interval", type=int, default=10)
    parser.add_argument("--inverse-interval", type=int, default=20)
    parser.add_argument("--interval-warmup", type=int, default=2,
                        help="refresh and inversion gaps grow 1, 1, 2, 2, ... up to the intervals (0: fixed)")
    parser.add_argument("--replicate-inversions", action="store_true",
                        help="every rank inverts every block (no inverse traffic, R times the compute)")
    parser.add_argument("--resync-every", type=int, default=None,
                        help="every this many steps, copy rank 0's weights and buffers to the other ranks "
                             "(one broadcast the size of the model). Ranks apply the same update but may "
                             "round it differently (other thread counts, kernels or CPUs), so without it "
                             "their weights drift apart by rounding, up to about 0.5 sqrt(steps) x eps x max|w| "
                             "(eps: the dtype's machine epsilon); with it, by at most that of this many "
                             "steps. Default: never; the report prints the ranks' largest weight difference")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch threads per process (default: CPU cores / processes)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--warmup", type=int, default=5, help="first steps left out of the step-time median")
    parser.add_argument("--checkpoint", help="save model and optimizer here (rank 0) at the end")
    parser.add_argument("--resume", help="load model and optimizer from this file before training")
    parser.add_argument("--json", help="write the measurements here (rank 0)")
    args = parser.parse_args(argv)
    if args.steps <= args.warmup:
        parser.error(f"--steps ({args.steps}) must exceed --warmup ({args.warmup})")
    return args


def start_processes():
    """``(rank, world, device)``; joins the process group when torchrun started us."""
    if "WORLD_SIZE" not in os.environ:
        return 0, 1, torch.device("cpu")
    use_cuda = torch.cuda.is_available() and torch.cuda.device_count() >= int(os.environ["LOCAL_WORLD_SIZE"])
    if use_cuda:
        device = torch.device("cuda", int(os.environ["LOCAL_RANK"]))
        torch.cuda.set_device(device)
    else:
        device = torch.device("cpu")
    dist.init_process_group("nccl" if use_cuda else "gloo")
    return dist.get_rank(), dist.get_world_size(), device


def digits(device):
    from sklearn.datasets import load_digits
    data = load_digits()
    x = torch.tensor(data.data, dtype=torch.float32)
    x = (x - x.mean(0)) / (x.std(0) + 1e-3)
    return x.to(device), torch.tensor(data.target).to(device)


def build_model(args, device):
    torch.manual_seed(args.seed)  # the same initial weights on every rank (DDP also broadcasts rank 0's)
    layers, width = [], 64
    for _ in range(args.depth):
        layers += [nn.Linear(width, args.hidden), nn.Tanh()]
        width = args.hidden
    layers.append(nn.Linear(width, 10))
    return nn.Sequential(*layers).to(device)


def global_batches(args, count, num_examples):
    """The same sequence of global batches on every rank and for every number of processes."""
    generator = torch.Generator().manual_seed(args.seed + 1)
    for _ in range(count):
        yield torch.randint(0, num_examples, (args.batch_size,), generator=generator)


def main(argv=None):
    args = parse_args(argv)
    rank, world, device = start_processes()
    if args.batch_size % world:
        raise ValueError(f"--batch-size {args.batch_size} must be divisible by the {world} processes")
    torch.set_num_threads(args.threads or max(1, (os.cpu_count() or 1) // world))
    x, y = digits(device)
    model = build_model(args, device)
    trained = nn.parallel.DistributedDataParallel(model) if world > 1 else model
    loss_fn = nn.CrossEntropyLoss()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empirical-Fisher advice, when asked for
        opt = ngopt.FisherDescent(trained, loss_fn, fisher=args.fisher, stats_interval=args.stats_interval,
                                  inverse_interval=args.inverse_interval, interval_warmup=args.interval_warmup,
                                  seed=args.seed)
    if args.resume:
        state = torch.load(args.resume, map_location=device, weights_only=True)
        model.load_state_dict(state["model"])
        opt.load_state_dict(state["optimizer"])
    if world > 1:  # replaces the communicator an optimizer built on a DDP model may have attached itself
        nd.share_curvature(opt, shard_inversions=not args.replicate_inversions, resync_every=args.resync_every)

    share = args.batch_size // world
    step_seconds, step_cpu_seconds = [], []
    for indices in global_batches(args, args.steps, x.shape[0]):
        mine = indices[rank * share:(rank + 1) * share].to(device)
        started, cpu_started = time.perf_counter(), time.process_time()
        opt.zero_grad()
        loss = loss_fn(trained(x[mine]), y[mine])
        loss.backward()
        opt.step()
        if device.type == "cuda":
            torch.cuda.synchronize()
        step_seconds.append(time.perf_counter() - started)
        step_cpu_seconds.append(time.process_time() - cpu_started)

    report = measurements(args, opt, model, x, y, step_seconds, step_cpu_seconds, world)
    if args.checkpoint:
        state = {"model": model.state_dict(), "optimizer": opt.state_dict()}
        if world > 1:
            nd.save_on_rank0(state, args.checkpoint)
        else:
            torch.save(state, args.checkpoint)
    if rank == 0:
        print_report(report)
        if args.json:
            with open(args.json, "w") as stream:
                json.dump(report, stream, indent=2)
    if world > 1:
        dist.barrier()
        dist.destroy_process_group()


def measurements(args, opt, model, x, y, step_seconds, step_cpu_seconds, world):
    """Rank 0's numbers; wall times suffer from other load on the machine, CPU times much less."""
    with torch.no_grad():
        logits = model(x)
        loss = float(nn.functional.cross_entropy(logits, y))
        accuracy = float((logits.argmax(1) == y).float().mean())
    timed = step_seconds[args.warmup:]
    report = {
        "command": " ".join([os.path.basename(sys.executable)] + sys.argv),
        "processes": world, "threads_per_process": torch.get_num_threads(),
        "steps": args.steps, "optimizer_steps": opt.diagnostics()["step"],  # resumed runs count on
        "global_batch": args.batch_size, "fisher": args.fisher,
        "layers": [[b.layer.in_dim, b.layer.out_dim] for b in opt.blocks.values()],
        "step_seconds_median": statistics.median(timed), "step_seconds_mean": statistics.fmean(timed),
        "step_cpu_seconds_mean": statistics.fmean(step_cpu_seconds[args.warmup:]),
        "load_average": os.getloadavg()[0] if hasattr(os, "getloadavg") else None,
        "optimizer_seconds": opt.diagnostics()["time"],
        "train_loss": loss, "train_accuracy": accuracy,
    }
    if world > 1:
        summary = opt.communicator.summary()
        report["exchange"] = summary
        report["volume_from_sizes"] = nd.communication_volume(opt, world, summary["shard_inversions"])
        report["max_weight_difference_between_ranks"] = nd.max_parameter_difference(model)
    else:
        report["volume_from_sizes"] = nd.communication_volume(opt, 2)  # what 2 processes would move
    return report


def print_report(report):
    print(f"{report['processes']} process(es) x {report['threads_per_process']} thread(s), "
          f"fisher={report['fisher']}, global batch {report['global_batch']}, layers {report['layers']}")
    print(f"step time: median {1e3 * report['step_seconds_median']:.2f} ms, "
          f"mean {1e3 * report['step_seconds_mean']:.2f} ms over {report['steps']} steps; "
          f"CPU per step {1e3 * report['step_cpu_seconds_mean']:.2f} ms (this process)")
    print(f"final train loss {report['train_loss']:.4f}, accuracy {report['train_accuracy']:.4f}")
    volume = report["volume_from_sizes"]
    print(f"per refresh (formula, R={volume['world_size']}): statistics buffer "
          f"{volume['statistics_buffer_bytes'] / 1e6:.3f} MB, {volume['statistics_bytes_per_rank'] / 1e6:.3f} MB "
          f"each way per rank; inverse exchange {volume['inverse_bytes_per_rank'] / 1e6:.3f} MB into each rank")
    if "exchange" in report:
        ex = report["exchange"]
        print(f"measured on rank 0: {ex['statistics_exchanges']} statistics all-reduces "
              f"({ex['statistics_seconds']:.3f} s, {ex['statistics_bytes'] / 1e6:.3f} MB), "
              f"{ex['inverse_exchanges']} inverse exchanges ({ex['inverse_seconds']:.3f} s, "
              f"{ex['inverse_bytes'] / 1e6:.3f} MB received), {ex['inversions_here']} inversions here; "
              f"ranks differ by {report['max_weight_difference_between_ranks']:g}")


if __name__ == "__main__":
    main()
