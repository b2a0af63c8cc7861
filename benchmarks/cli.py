"""Command line of the benchmark: ``python -m benchmarks [options]``."""

from __future__ import annotations

import argparse
import ast
import gc
import json
import re
import shlex
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import torch

from benchmarks import optimizers as optimizer_registry
from benchmarks import plots, report, results, scaling
from benchmarks.attachments import diagnostics_attacher, diagnostics_available
from benchmarks.evaluation import describe_rule
from benchmarks.harness import benchmark_task, planned_runs
from benchmarks.machine import machine_info
from benchmarks.optimizers import GRID_SPACING_DECADES, HEADLINE, OptimizerSpec, grid_span, resolve_optimizers
from benchmarks.outputs import ProgressiveOutputs
from benchmarks.pilot import propose_target
from benchmarks.profiling import write_profile
from benchmarks.results import SCHEMA_OPTIMIZER_NAMES
from benchmarks.task_file import load_task_file
from benchmarks.task_sets import DEFAULT_TASKS, TASK_SETS, resolve_tasks
from benchmarks.tasks import ON_REQUEST_TASKS, Task
from benchmarks.training import load_average

# Points per lr grid, half a decade apart: 5 span 2 decades; --quick drops the lowest point (a short
# budget rewards the larger lrs) and a seed, to keep a quick run of the built-in tasks near 5 minutes.
GRID_POINTS = {"full": 5, "quick": 4}
SEEDS = {"full": 3, "quick": 2}
SCALING_STEPS = {"quick": (2, 20), "full": (5, 60)}  # (warm-up, timed) steps per point; the
# timed steps span whole refresh periods of FisherDescent (statistics every 5, inversion every 10)


@dataclass
class Config:
    tasks: list[Task]
    specs: list[OptimizerSpec]
    seeds: list[int]
    grid_size: int
    steps: dict[str, int]
    steps_override: Optional[int]
    ngopt_options: dict
    quick: bool
    threads: int
    out: Optional[Path]
    progress: bool
    diagnostics_every: Optional[int]
    profile: bool
    scaling: bool
    task_file: Optional[Path] = None
    flush_denormal: bool = False  # whether subnormal floats are flushed to zero (CPU support)
    skipped: dict = field(default_factory=dict)  # optimizer name -> why it cannot run here


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m benchmarks",
        description="Compare ngopt.FisherDescent with SGD (momentum 0.9), Adam, AdamW under a warm-up and "
                    "cosine schedule, and Muon (with AdamW) on small CPU tasks: equal lr grids, seeds, batches, "
                    "initial weights, data order and step budget for every tuned optimizer.")
    parser.add_argument("--quick", action="store_true",
                        help=f"short budget: each task's quick step count, {GRID_POINTS['quick']}-point lr grids "
                             f"and {SEEDS['quick']} seeds (default: full step counts, {GRID_POINTS['full']}-point "
                             f"grids, {SEEDS['full']} seeds)")
    parser.add_argument("--tasks", help="comma-separated task names and set names: built-in (the default: "
                        f"{', '.join(DEFAULT_TASKS)}), held-out (problems the defaults are checked on, never "
                        f"tuned on: {', '.join(TASK_SETS['held-out'])}); {', '.join(ON_REQUEST_TASKS)} "
                        "by name only")
    parser.add_argument("--task-file", type=Path, metavar="FILE.py",
                        help="run the comparison on your own problem described in FILE.py (data, make_model, "
                             "criterion, batch_size, steps, optional target_loss; see examples/my_task.py) "
                             "instead of the built-in tasks")
    parser.add_argument("--optimizers", help="comma-separated optimizer names (default: "
                                             f"{', '.join(optimizer_registry.DEFAULT_OPTIMIZERS)}; all: "
                                             f"{', '.join(optimizer_registry.OPTIMIZERS)})")
    parser.add_argument("--seeds",
                        help="number of seeds N (seeds 0..N-1) or a comma-separated list; the first "
                             f"seed tunes the lr (default {SEEDS['full']}, {SEEDS['quick']} with --quick)")
    parser.add_argument("--steps", type=int, help="training steps per run for every task (default: each "
                                                  "task's own budget); with --scaling, timed steps per point")
    parser.add_argument("--grid", type=int, help=f"points in every tuned optimizer's lr grid, "
                                                 f"{GRID_SPACING_DECADES:g} decade apart (default "
                                                 f"{GRID_POINTS['full']}, {GRID_POINTS['quick']} with --quick)")
    parser.add_argument("--threads", type=int, default=2, help="torch intra-op threads (default 2)")
    parser.add_argument("--out", type=Path, help="write results.json, curves.csv, PNG plots and "
                                                 "report.md into this folder")
    parser.add_argument("--scaling", action="store_true",
                        help="run the step-time scaling study (width 64..1024, batch 64..2048) "
                             "instead of the tasks")
    parser.add_argument("--diagnostics", type=int, metavar="EVERY",
                        help="log FisherDescent's curvature diagnostics every EVERY steps into OUT/diagnostics "
                             "(needs --out; slows the fisher-descent rows, so their timings are then not "
                             "comparable)")
    parser.add_argument("--profile", action="store_true",
                        help=f"after the benchmark, profile one {HEADLINE} run per task "
                             f"with cProfile into OUT/profile_<task>_{HEADLINE}.txt (needs --out)")
    parser.add_argument("--ngopt-option", action="append", default=[], metavar="KEY=VALUE",
                        help="pass one keyword to FisherDescent in every fisher-descent row and task alike, e.g. "
                             "--ngopt-option structure=ekfac or --ngopt-option lr=0.1 (repeatable; values "
                             "are Python literals; keys go to FisherDescent unchecked)")
    parser.add_argument("--variant", action="append", nargs="+", default=[], metavar="NAME KEY=VALUE",
                        help="an extra untuned FisherDescent row NAME with these keywords (on top of any "
                             "--ngopt-option), trained in turns beside the others, e.g. --variant memory-0.8 "
                             "stats_memory=0.8 (repeatable): settings compared side by side in one run")
    parser.add_argument("--no-progress", action="store_true",
                        help="no progress output (by default a bar per run on a terminal, one line per "
                             "finished run when stderr is redirected)")
    return parser


def split_names(text: Optional[str]) -> Optional[list[str]]:
    if text is None:
        return None
    return [name.strip() for name in text.split(",") if name.strip()]


def parse_seeds(text: str) -> list[int]:
    """"3" means seeds 0, 1, 2; "0,5,9" means those seeds."""
    try:
        values = [int(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise ValueError(f"seeds must be a count or a comma-separated list of integers, got {text!r}")
    if len(values) == 1 and "," not in text:
        if values[0] < 1:
            raise ValueError(f"seeds must be at least 1, got {values[0]}")
        return list(range(values[0]))
    if not values or len(set(values)) != len(values):
        raise ValueError(f"seeds must list distinct integers, got {text!r}")
    return values


def parse_options(items: list[str]) -> dict:
    """KEY=VALUE pairs; values are Python literals (0.9, None, True, 'kfac') or bare strings."""
    options = {}
    for item in items:
        key, separator, text = item.partition("=")
        if not separator or not key.strip().isidentifier():
            raise ValueError(f"an option takes KEY=VALUE, got {item!r}")
        try:
            options[key.strip()] = ast.literal_eval(text.strip())
        except (ValueError, SyntaxError):
            options[key.strip()] = text.strip()
    return options


def variant_rows(variants: list[list[str]], taken: set[str]) -> list[OptimizerSpec]:
    """``--variant NAME KEY=VALUE ...``: untuned FisherDescent rows with those keywords."""
    rows = []
    for items in variants:
        name, pairs = items[0], items[1:]
        if not re.fullmatch(r"[\w.+-]+", name):
            raise ValueError(f"--variant takes a row name (letters, digits, _ . + -), then KEY=VALUE pairs, "
                             f"got {' '.join(items)!r}")
        if name in taken:
            raise ValueError(f"--variant {name}: the name is taken by another row; choose another")
        if not pairs:
            raise ValueError(f"--variant {name}: give at least one KEY=VALUE (the plain row is {HEADLINE})")
        taken.add(name)
        rows.append(optimizer_registry.natural_gradient_row(name, parse_options(pairs)))
    return rows


def make_config(args: argparse.Namespace) -> Config:
    """Check and resolve the options; every problem is a ValueError naming the option."""
    if args.task_file is not None and args.tasks is not None:
        raise ValueError("--task-file and --tasks exclude each other: the task file is the one task run")
    if args.task_file is not None and args.scaling:
        raise ValueError("--task-file and --scaling exclude each other")
    tasks = [load_task_file(args.task_file)] if args.task_file is not None else \
        resolve_tasks(split_names(args.tasks))
    ngopt_options = parse_options(args.ngopt_option)
    chosen = resolve_optimizers(split_names(args.optimizers))
    taken = set(optimizer_registry.OPTIMIZERS) | set(SCHEMA_OPTIMIZER_NAMES.values()) | {spec.name for spec in chosen}
    variants = variant_rows(args.variant, taken)
    specs = [optimizer_registry.with_natural_gradient_options(spec, ngopt_options)
             if spec.natural_gradient_options is not None else spec
             for spec in chosen + variants]
    specs, skipped = optimizer_registry.runnable(specs, by_default=args.optimizers is None)
    if not specs:
        raise ValueError("--optimizers: none of the chosen optimizers can run here: "
                         + "; ".join(f"{name}: {reason}" for name, reason in skipped.items()))
    seeds = parse_seeds(args.seeds if args.seeds is not None else str(SEEDS["quick" if args.quick else "full"]))
    grid = args.grid if args.grid is not None else GRID_POINTS["quick" if args.quick else "full"]
    if grid < 1:
        raise ValueError(f"--grid must be at least 1, got {grid}")
    if args.steps is not None and args.steps < 1:
        raise ValueError(f"--steps must be at least 1, got {args.steps}")
    if args.threads < 1:
        raise ValueError(f"--threads must be at least 1, got {args.threads}")
    if args.diagnostics is not None and (args.diagnostics < 1 or args.out is None):
        raise ValueError("--diagnostics needs a positive step interval and --out")
    if args.profile and args.out is None:
        raise ValueError("--profile needs --out")
    steps = {task.name: args.steps or (task.quick_steps if args.quick else task.steps) for task in tasks}
    return Config(tasks, specs, seeds, grid, steps, args.steps, ngopt_options, args.quick, args.threads, args.out,
                  not args.no_progress, args.diagnostics, args.profile, args.scaling, args.task_file,
                  skipped=skipped)


def natural_gradient_settings(spec: OptimizerSpec) -> dict:
    """The group hyperparameters FisherDescent ends up with (its defaults plus any options given)."""
    optimizer = spec.build(torch.nn.Linear(2, 1), torch.nn.MSELoss(), None)
    return json.loads(json.dumps(optimizer.defaults, default=repr))


def settings_of(config: Config, argv: list[str]) -> dict:
    settings = {
        "command": "python -m benchmarks " + shlex.join(argv),
        "quick": config.quick,
        "tasks": [task.name for task in config.tasks],
        "optimizers": [spec.name for spec in config.specs],
        "optimizer_labels": {spec.name: spec.label for spec in config.specs},
        "skipped_optimizers": config.skipped,
        "seeds": config.seeds,
        "grid_size": config.grid_size,
        "grid_decades": grid_span(config.grid_size),
        "grid_spacing_decades": GRID_SPACING_DECADES,
        "lr_grids": {spec.name: spec.lr_grid(config.grid_size) for spec in config.specs},
        "steps": config.steps,
        "threads": config.threads,
        "flush_denormal": config.flush_denormal,
        "diagnostics_every": config.diagnostics_every,
        "evaluation": describe_rule(),
        "task_file": None if config.task_file is None else str(config.task_file),
    }
    for spec in config.specs:
        if spec.name == HEADLINE:
            settings["fisher_descent_group_settings"] = natural_gradient_settings(spec)
            settings["fisher_descent_options"] = config.ngopt_options
    return settings


def check_ready(config: Config) -> None:
    """Fail before any work if a chosen optimizer or logger cannot be had."""
    names = {spec.name for spec in config.specs}
    if config.scaling and not names & {HEADLINE, "sgd"}:
        raise ValueError(f"--scaling compares {HEADLINE} and sgd: --optimizers must include one of them")
    if HEADLINE in names:
        available, reason = optimizer_registry.natural_gradient_available()
        if not available:
            raise ValueError(f"optimizer {HEADLINE}: ngopt.FisherDescent does not import ({reason}); "
                             "run the baselines alone with --optimizers sgd,adam,adamw-cosine")
    natural = [spec for spec in config.specs if spec.natural_gradient_options is not None]
    if natural and HEADLINE not in names:
        available, reason = optimizer_registry.natural_gradient_available()
        if not available:
            raise ValueError(f"optimizers {', '.join(spec.name for spec in natural)}: ngopt.FisherDescent "
                             f"does not import ({reason})")
    for spec in natural:
        try:
            natural_gradient_settings(spec)
            spec.lr_grid(config.grid_size)  # fisher-descent-tuned reads its grid centre from the library
        except (TypeError, ValueError) as error:
            raise ValueError(f"--ngopt-option/--variant: FisherDescent ({spec.name}) rejects "
                             f"{spec.natural_gradient_options}: {error}")
    if config.task_file is not None and natural:
        check_task_model(config.tasks[0], natural[0])
    if config.diagnostics_every is not None and not diagnostics_available():
        raise ValueError("--diagnostics needs ngopt.log_diagnostics, which this ngopt does not provide")


def check_task_model(task: Task, spec: OptimizerSpec) -> None:
    """FisherDescent builds on the task file's model (layers it has no block for are fine)."""
    torch.manual_seed(0)
    try:
        optimizer = spec.build(task.build_model(), task.make_loss(), None)
    except (TypeError, ValueError) as error:
        raise ValueError(f"{task.name}: ngopt.FisherDescent rejects the model of the task file: {error}; "
                         "run the baselines alone with --optimizers sgd,adam,adamw-cosine")
    if hasattr(optimizer, "remove_hooks"):
        optimizer.remove_hooks()


def with_targets(config: Config) -> list[Task]:
    """The tasks, each task without a target (a task file may give none) given one from a pilot run."""
    tasks = []
    for task in config.tasks:
        if task.target_loss is None:
            print(f"{task.name}: no target_loss given; proposing one from a pilot run of sgd and adam "
                  f"({config.steps[task.name]} steps each)", flush=True)
            task = propose_target(task, config.steps[task.name], config.seeds[0],
                                  config.task_file.name if config.task_file else task.name)
            print(f"{task.name}: target training loss {task.target_loss:.4g} ({task.target_reason})", flush=True)
        tasks.append(task)
    return tasks


def run_tasks(config: Config, argv: list[str]) -> dict:
    """Every task through the protocol, writing the files as runs finish.

    An interruption (Ctrl-C) or an error leaves the files of the finished runs,
    marked with where the benchmark stopped; Ctrl-C then ends with status 130.
    """
    attach_for = None
    if config.diagnostics_every is not None:
        attach_for = diagnostics_attacher(config.out / "diagnostics", config.diagnostics_every)
    settings = settings_of(config, argv)
    settings["load_average_start"] = load_average()
    started = time.perf_counter()

    def note_wall_time() -> None:  # everything since the start: set-up, training, evaluation, files
        settings["wall_seconds"] = round(time.perf_counter() - started, 1)
    total = len(config.tasks) * planned_runs(config.specs, config.grid_size, config.seeds)
    outputs = ProgressiveOutputs(config.out, machine_info(), settings, total)
    try:
        for task in with_targets(config):
            outcome = benchmark_task(task, config.specs, config.seeds, config.grid_size,
                                     config.steps[task.name], progress=config.progress,
                                     attach_for=attach_for, on_run=outputs.run_finished)
            outputs.task_finished(outcome)
            print("\n" + report.task_block(results.task_entry(outcome), threads=config.threads) + "\n",
                  flush=True)
    except KeyboardInterrupt:
        note_wall_time()
        outputs.stopped("interrupted by Ctrl-C / SIGINT")
        print(report.console_summary(outputs.results(), with_tasks=False), flush=True)
        print(closing_message(config, outputs, interrupted=True), flush=True)
        raise
    except Exception as error:
        note_wall_time()
        outputs.stopped(f"error: {type(error).__name__}: {error}")
        print(closing_message(config, outputs, interrupted=True), flush=True)
        raise
    settings["load_average_end"] = load_average()
    note_wall_time()
    results_dict = outputs.finished()
    print(report.console_summary(results_dict, with_tasks=False), flush=True)
    if config.out is not None and config.profile and HEADLINE in {spec.name for spec in config.specs}:
        for outcome in outputs.outcomes:
            chosen = outcome.outcomes[HEADLINE]
            path = write_profile(outcome.task, chosen.spec, None if not chosen.spec.tuned else chosen.best_lr,
                                 config.seeds[0], config.steps[outcome.task.name], config.out)
            outputs.written.append(path.name)
    print(closing_message(config, outputs), flush=True)
    return results_dict


def closing_message(config: Config, outputs: ProgressiveOutputs, interrupted: bool = False) -> str:
    if config.out is None:
        return "nothing written (no --out)" if interrupted else ""
    files = ["results.json", "curves.csv", "report.md"] + sorted(set(outputs.written))
    if config.diagnostics_every is not None:
        files.append("diagnostics/ (one JSON-lines log per FisherDescent run; `python -m ngopt.report LOG --out DIR` "
                     "draws one)")
    head = (f"the finished runs ({outputs.finished_count} of {outputs.total}) are written to"
            if interrupted else "results written to")
    return f"{head} {config.out}/: " + ", ".join(files)


def run_scaling_study(config: Config, argv: list[str]) -> list[dict]:
    specs = {spec.name: spec for spec in config.specs if spec.name in (HEADLINE, "sgd")}
    warmup, steps = SCALING_STEPS["quick" if config.quick else "full"]
    steps = config.steps_override or steps
    rows = scaling.run_scaling(specs, warmup, steps, progress=config.progress)
    print("\n" + scaling.scaling_table(rows), flush=True)
    note = scaling.contention_note(rows, config.threads)
    if note:
        print(note, flush=True)
    if config.out is not None:
        config.out.mkdir(parents=True, exist_ok=True)
        command = "python -m benchmarks " + shlex.join(argv)
        payload = {"machine": machine_info(), "command": command, "threads": config.threads,
                   "flush_denormal": config.flush_denormal, "warmup_steps": warmup,
                   "timed_steps": steps, "rows": rows}
        results.write_json(results.finite_or_none(payload), config.out / "scaling.json")
        scaling.write_scaling_csv(rows, config.out / "scaling.csv")
        plots.plot_scaling(rows, config.out / "scaling.png")
        (config.out / "scaling.md").write_text(
            scaling.scaling_markdown(rows, command, "scaling.png", warmup, steps, config.threads) + "\n")
        print(f"scaling study written to {config.out}/ (scaling.json, scaling.csv, scaling.png, scaling.md)")
    return rows


def main(argv: Optional[list[str]] = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        config = make_config(args)
        check_ready(config)
    except ValueError as error:
        parser.error(str(error))  # exits with status 2 and the message
    for name, reason in config.skipped.items():
        print(f"skipping optimizer {name}: {reason}", flush=True)
    threads_before = torch.get_num_threads()
    torch.set_num_threads(config.threads)
    # Subnormal floats (gradients of a loss fitted to ~0) slow CPU arithmetic many times over;
    # flushing them keeps late-training step times about the optimizer, not the float format.
    config.flush_denormal = torch.set_flush_denormal(True)
    try:
        if config.scaling:
            run_scaling_study(config, argv)
        else:
            run_tasks(config, argv)
    except KeyboardInterrupt:
        return 130  # the shell's status for a process ended by SIGINT
    finally:  # leave the process as it was when main() is called from Python
        gc.unfreeze()  # the harness sets live objects aside from garbage collection (see harness)
        torch.set_flush_denormal(False)
        torch.set_num_threads(threads_before)
    return 0
