"""How far two data-parallel ranks' weights drift apart by rounding, and how ``resync_every`` bounds it.

Two processes (gloo on 127.0.0.1) train the same MLP (64-W-W-10, tanh, sampled Fisher, default
intervals) on halves of the same global batches; after every step ``max_parameter_difference``
gives ``max_entries |w_rank0 - w_rank1|``.  Every rank applies the same update computed from the
same averaged gradients and statistics, so any gap is rounding: kernels that round differently in
two processes (memory alignment, thread count, instruction set) make the ranks' updates differ in
their last bits, and the gap then walks on.  Each condition is one pair of processes with
``MKL_CBWR`` unset:

* ``1 thread``, ``2 threads``: both ranks alike (what a homogeneous cluster does);
* ``1 vs 2 threads``: rank 1 uses two threads (other reduction orders in the kernels);
* ``AVX512 vs AVX2``: rank 1 runs torch's and MKL's AVX2 kernels (a CPU of another kind).

The gap is printed in absolute terms and in units of ``eps * max|w|`` (``eps``: the dtype's
machine epsilon), with and without ``resync_every``; the step time with ``resync_every=1``
(the first rank's weights broadcast after every step) is the price of bitwise-equal replicas.

    python scripts/replica_drift.py --steps 200 --width 256 [--json drift.json]
"""
from __future__ import annotations

import argparse
import datetime
import json
import os
import socket
import statistics
import subprocess
import sys
import time
import warnings

import torch
from torch import nn

CONDITIONS = {  # label: (rank 0's threads and environment, rank 1's)
    "1 thread": ((1, {}), (1, {})),
    "2 threads": ((2, {}), (2, {})),
    "1 vs 2 threads": ((1, {}), (2, {})),
    "AVX512 vs AVX2": ((1, {}), (1, {"ATEN_CPU_CAPABILITY": "avx2", "MKL_ENABLE_INSTRUCTIONS": "AVX2"})),
}
CHECKPOINTS = (1, 10, 50, 100, 200, 500, 1000)


def parse_args(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--steps", type=int, default=200, help="optimizer steps per run (default 200)")
    parser.add_argument("--width", type=int, default=256, help="width of the two hidden layers (default 256)")
    parser.add_argument("--batch-size", type=int, default=256, help="global batch, split over 2 ranks")
    parser.add_argument("--resync-every", type=int, default=10, help="the bounded runs' resync_every (default 10)")
    parser.add_argument("--conditions", nargs="+", default=list(CONDITIONS), choices=list(CONDITIONS),
                        metavar="LABEL", help=f"which conditions to run (default all: {', '.join(CONDITIONS)})")
    parser.add_argument("--json", help="write every run's per-step gaps here")
    parser.add_argument("--worker", nargs=3, metavar=("RANK", "PORT", "OUT"), help=argparse.SUPPRESS)
    parser.add_argument("--threads", type=int, default=1, help=argparse.SUPPRESS)
    return parser.parse_args(argv)


# ---------------------------------------------------------------------------------------- one rank
def worker(args):
    import torch.distributed as dist
    import ngopt
    import ngopt.distributed as nd

    rank, port, out = int(args.worker[0]), args.worker[1], args.worker[2]
    torch.set_num_threads(args.threads)
    dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=2,
                            timeout=datetime.timedelta(seconds=60))
    share = args.batch_size // 2
    rows = slice(rank * share, (rank + 1) * share)
    runs = []
    for dtype in (torch.float32, torch.float64):
        for shard in (True, False):
            for resync in (None, args.resync_every, 1):
                torch.manual_seed(0)
                model = nn.Sequential(nn.Linear(64, args.width), nn.Tanh(), nn.Linear(args.width, args.width),
                                      nn.Tanh(), nn.Linear(args.width, 10)).to(dtype)
                teacher = torch.randn(64, 10, dtype=dtype)
                wrapped = nn.parallel.DistributedDataParallel(model)
                loss_fn = nn.CrossEntropyLoss()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    opt = ngopt.FisherDescent(wrapped, loss_fn, seed=0)
                nd.share_curvature(opt, shard_inversions=shard, resync_every=resync)
                data = torch.Generator().manual_seed(1)
                gaps, seconds = [], []
                for _ in range(args.steps):
                    x = torch.randn(args.batch_size, 64, generator=data, dtype=dtype)
                    y = (x @ teacher).argmax(1)
                    started = time.perf_counter()
                    opt.zero_grad()
                    loss_fn(wrapped(x[rows]), y[rows]).backward()
                    opt.step()
                    seconds.append(time.perf_counter() - started)
                    gaps.append(nd.max_parameter_difference(model))
                largest = max(float(p.detach().abs().max()) for p in model.parameters())
                runs.append({"dtype": str(dtype).replace("torch.", ""), "shard_inversions": shard,
                             "resync_every": resync, "gaps": gaps, "max_abs_weight": largest,
                             "step_seconds_median": statistics.median(seconds)})
    if rank == 0:
        with open(out, "w") as stream:
            json.dump({"threads": torch.get_num_threads(), "runs": runs}, stream)
    dist.barrier()
    dist.destroy_process_group()


# ---------------------------------------------------------------------------------------- the launcher
def run_condition(args, label, out_dir):
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = str(sock.getsockname()[1])
    out = os.path.join(out_dir, f"{label.replace(' ', '_')}.json")
    procs = []
    for rank, (threads, extra) in enumerate(CONDITIONS[label]):
        env = {k: v for k, v in os.environ.items() if k != "MKL_CBWR"}
        env.update(extra, OMP_NUM_THREADS=str(threads), PYTHONWARNINGS="ignore")
        command = [sys.executable, __file__, "--worker", str(rank), port, out, "--threads", str(threads),
                   "--steps", str(args.steps), "--width", str(args.width), "--batch-size", str(args.batch_size),
                   "--resync-every", str(args.resync_every)]
        procs.append(subprocess.Popen(command, env=env))
    codes = [proc.wait() for proc in procs]
    if codes != [0, 0]:
        raise SystemExit(f"{label}: the workers exited with {codes}")
    with open(out) as stream:
        return json.load(stream)


def describe(label, run):
    eps = torch.finfo(getattr(torch, run["dtype"])).eps
    unit = eps * run["max_abs_weight"]
    gaps = run["gaps"]
    marks = " ".join(f"{gaps[s - 1] / unit:7.2f}" for s in CHECKPOINTS if s <= len(gaps))
    resync = "never" if run["resync_every"] is None else str(run["resync_every"])
    inversions = "sharded" if run["shard_inversions"] else "replicated"
    return (f"{label:15s} {run['dtype']:8s} {inversions:10s} {resync:>6s} | {max(gaps):9.2e} "
            f"{max(gaps) / unit:8.2f} | {marks} | {1e3 * run['step_seconds_median']:7.2f}")


def main(argv=None):
    args = parse_args(argv)
    if args.worker:
        return worker(args)
    import tempfile
    results = {}
    with tempfile.TemporaryDirectory() as out_dir:
        for label in args.conditions:
            results[label] = run_condition(args, label, out_dir)
    marks = " ".join(f"{s:>7d}" for s in CHECKPOINTS if s <= args.steps)
    print(f"MLP 64-{args.width}-{args.width}-10, global batch {args.batch_size}, 2 ranks, {args.steps} steps, "
          f"MKL_CBWR unset; load average {os.getloadavg()[0]:.2f}")
    print(f"{'condition':15s} {'dtype':8s} {'inverses':10s} {'resync':>6s} | {'max gap':>9s} {'/eps|w|':>8s} | "
          f"gap/(eps max|w|) after step {marks} | ms/step")
    for label, result in results.items():
        for run in result["runs"]:
            print(describe(label, run))
    if args.json:
        with open(args.json, "w") as stream:
            json.dump({"args": vars(args), "results": results}, stream)


if __name__ == "__main__":
    main()
