"""Steps to target on the built-in tasks for each combination of step and damping rule.

One seed, each task's quick budget and batch size, the full training loss evaluated every 10 steps;
only step counts are reported (they do not depend on the machine's load).

    python scripts/rule_steps.py [--tasks a,b] [--seed 0]
"""
from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the built-in tasks live beside ngopt/
import ngopt  # noqa: E402
from benchmarks.tasks import TASKS  # noqa: E402
from benchmarks.training import evaluate, minibatches  # noqa: E402

CONFIGURATIONS = {
    "fixed step, fixed damping": {"step_rule": "fixed", "damping_rule": "fixed"},
    "fixed step, LM damping (default)": {"step_rule": "fixed", "damping_rule": "lm"},
    "quadratic step, LM damping": {"step_rule": "quadratic", "damping_rule": "lm"},
}


def steps_to_target(task_name: str, options: dict, seed: int, every: int = 10):
    task = TASKS[task_name]
    data = task.load_data()
    torch.manual_seed(seed)
    model, loss_fn = task.build_model(), task.make_loss()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, seed=seed, **options)
    batches = minibatches(len(data.train_x), task.batch_size, seed)
    loss = float("nan")
    for step in range(task.quick_steps):
        rows = next(batches)
        opt.zero_grad()
        loss_fn(model(data.train_x[rows]), data.train_y[rows]).backward()
        opt.step()
        if (step + 1) % every == 0:
            model.eval()
            loss = evaluate(model, loss_fn, data.train_x, data.train_y)
            model.train()
            if loss <= task.target_loss:
                return step + 1, loss
            if loss != loss:
                break
    return None, loss


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tasks", default="digits_autoencoder,digits_mlp,digits_cnn,mnist1d_mlp,"
                        "ill_conditioned_regression,digits_resnet,corpus_transformer")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    torch.set_num_threads(1)
    print("| task (target) | " + " | ".join(CONFIGURATIONS) + " |")
    print("|---|" + "---|" * len(CONFIGURATIONS))
    for name in args.tasks.split(","):
        cells = []
        for options in CONFIGURATIONS.values():
            steps, loss = steps_to_target(name, options, args.seed)
            cells.append(f"{steps}" if steps is not None else f"not reached ({loss:.3g})")
        print(f"| {name} ({TASKS[name].target_loss:g}) | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()
