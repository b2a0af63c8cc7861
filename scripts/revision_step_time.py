"""Mean step time of FisherDescent at an earlier revision of ngopt against the checkout's, side by side in
one process on the benchmark's networks (built-in and held-out tasks).

The revision's ``ngopt`` (``git archive``) is imported under another name beside the checkout's. Each trains
its own copy of a task's network (same initial weights, same random minibatches) at the defaults, in rounds
of 20 steps that take turns (``scripts/setting_step_time.py``), so the machine's drift falls alike on both:
run to run a mean step moves by 10-20% on a shared machine, which only a comparison inside one process
resolves to a few percent. The mean includes every refresh, inversion and damping check. For a change meant
to leave the arithmetic as it was, the last column says whether the two networks' weights ended equal::

    python scripts/revision_step_time.py --base HEAD~1 --tasks breast_cancer_mlp,friedman1_deep_mlp \\
        --threads 1 --steps 800
"""
from __future__ import annotations

import argparse
import importlib
import io
import os
import subprocess
import sys
import tarfile
import tempfile

import torch

REPOSITORY = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, REPOSITORY)  # the checkout, not an install
import ngopt  # noqa: E402
from benchmarks.held_out import HELD_OUT_TASKS  # noqa: E402
from benchmarks.tasks import TASKS  # noqa: E402

sys.path.insert(0, os.path.join(REPOSITORY, "scripts"))
from setting_step_time import side_by_side  # noqa: E402

REVISION_PACKAGE = "ngopt_at_revision"


def import_revision(revision: str, folder: str):
    """The ``ngopt`` package of ``revision``, extracted into ``folder`` and imported as :data:`REVISION_PACKAGE`."""
    try:
        archive = subprocess.run(["git", "-C", REPOSITORY, "archive", "--format=tar", revision, "ngopt"],
                                 capture_output=True, check=False)
    except OSError as error:  # no git on the PATH
        raise ValueError(f"--base {revision!r}: git could not run ({error})") from error
    if archive.returncode != 0:
        raise ValueError(f"--base {revision!r}: git archive failed: {archive.stderr.decode().strip()}")
    with tarfile.open(fileobj=io.BytesIO(archive.stdout)) as tar:
        tar.extractall(folder, filter="data") if hasattr(tarfile, "data_filter") else tar.extractall(folder)
    os.rename(os.path.join(folder, "ngopt"), os.path.join(folder, REVISION_PACKAGE))
    forget_revision()  # an earlier call's revision, if any
    sys.path.insert(0, folder)
    return importlib.import_module(REVISION_PACKAGE)


def forget_revision() -> None:
    """Drop an imported revision's modules and folders from ``sys.modules`` and ``sys.path``."""
    for name in [n for n in sys.modules if n == REVISION_PACKAGE or n.startswith(REVISION_PACKAGE + ".")]:
        del sys.modules[name]
    sys.path[:] = [entry for entry in sys.path if not os.path.isdir(os.path.join(entry, REVISION_PACKAGE))]


def compare(task_name: str, packages: dict, steps: int) -> tuple:
    """``({label: mean step in ms}, whether the networks' weights ended equal)``."""
    makers = {label: package.FisherDescent for label, package in packages.items()}
    means, models = side_by_side(task_name, makers, steps)
    first, second = models.values()
    return means, all(torch.equal(p, q) for p, q in zip(first.parameters(), second.parameters()))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--base", default="HEAD", help="git revision to compare with (default HEAD: the "
                                                       "checkout's uncommitted changes against the last commit)")
    parser.add_argument("--tasks", default="breast_cancer_mlp,friedman1_deep_mlp,digits_mlp")
    parser.add_argument("--steps", type=int, default=400, help="steps per version and task (default 400)")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    args = parser.parse_args(argv)
    unknown = [name for name in args.tasks.split(",") if name not in {**TASKS, **HELD_OUT_TASKS}]
    if unknown:
        parser.error(f"--tasks: unknown task(s) {', '.join(unknown)}")
    if args.steps < 20:
        parser.error(f"--steps must be at least 20 (one round), got {args.steps}")
    torch.set_num_threads(args.threads)
    with tempfile.TemporaryDirectory() as folder:
        try:
            base = import_revision(args.base, folder)
        except ValueError as error:
            parser.error(str(error))
        print(f"{args.steps} steps per version, {args.threads} threads, load average {os.getloadavg()[0]:.1f}; "
              f"ratio: the checkout's mean step over {args.base}'s")
        try:
            for task_name in args.tasks.split(","):
                means, same = compare(task_name, {args.base: base, "checkout": ngopt}, args.steps)
                old, new = means[args.base], means["checkout"]
                print(f"{task_name}: {args.base} {old:.3f} ms | checkout {new:.3f} ms | ratio {new / old:.3f} | "
                      f"weights equal: {'yes' if same else 'no'}", flush=True)
        finally:
            forget_revision()
    return 0


if __name__ == "__main__":
    sys.exit(main())
