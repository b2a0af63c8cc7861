"""The README's first example with a diagnostics log, three Fisher probes and the report.

    python examples/diagnostics_probe.py --out probe_run                  # default settings
    python examples/diagnostics_probe.py --out probe_fresh --stats-interval 1 --stats-memory 0 --fisher exact

A 64-128-10 tanh MLP trained on one batch of 256 random inputs with random labels (the
batch is memorized, so the Fisher shrinks about a hundredfold in 100 steps).  The output
layer is probed at steps 10, 50 and 100 on that same batch; ``DIR/run.jsonl`` holds the
log and ``DIR/report/`` what ``python -m ngopt.report`` makes of it.
"""
from __future__ import annotations

import argparse
import warnings
from pathlib import Path

import torch
from torch import nn

import ngopt
from ngopt.report import write_report

PROBE_STEPS = (10, 50, 100)
COLUMNS = ("block_error", "fresh_error", "statistics_gap", "block_trace", "exact_trace", "block_angle_deg",
           "diag_error", "diag_angle_deg", "exact_below_damping")


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", type=Path, required=True, help="folder for run.jsonl and report/")
    parser.add_argument("--stats-interval", type=int, default=10, help="FisherDescent stats_interval (default 10)")
    parser.add_argument("--stats-memory", type=float, default=0.9, help="FisherDescent stats_memory (default 0.9)")
    parser.add_argument("--fisher", default="sampled", choices=("sampled", "exact", "empirical"))
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)

    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(64, 128), nn.Tanh(), nn.Linear(128, 10))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, lr=0.3, stats_interval=args.stats_interval,
                              inverse_interval=20, stats_memory=args.stats_memory, fisher=args.fisher)
    x, y = torch.randn(256, 64), torch.randint(0, 10, (256,))
    print("step  " + "  ".join(COLUMNS))
    with ngopt.log_diagnostics(opt, args.out / "run.jsonl", every=10) as handle:
        for _ in range(max(PROBE_STEPS)):
            opt.zero_grad()
            loss = loss_fn(model(x), y)
            loss.backward()
            handle.note_loss(loss)
            opt.step()
            if opt.steps_taken in PROBE_STEPS:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")  # the report repeats the probe's warnings
                    result = ngopt.probe_fisher_quality(opt, model, loss_fn, x, y)
                handle.log_probe(result)
                entry = result["layers"]["2"]
                print(f"{opt.steps_taken:4d}  " + "  ".join(f"{entry[key]:.3g}" for key in COLUMNS))
    report = write_report(args.out / "run.jsonl", args.out / "report")
    print(f"final loss {loss.item():.4g}; report in {report['summary']}")


if __name__ == "__main__":
    main()
