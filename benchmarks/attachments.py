"""Loggers hung on the natural-gradient runs (``--diagnostics``).

The diagnostics logger of ngopt turns on spectra tracking, which makes its
inversions eigendecompositions, so runs with ``--diagnostics`` are slower and
their timings are not comparable with runs without it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

from benchmarks.harness import AttachFactory
from benchmarks.optimizers import OptimizerSpec
from benchmarks.tasks import Task
from benchmarks.training import Attach


def diagnostics_available() -> bool:
    try:
        import ngopt
    except Exception:  # not importable at all: no logger either
        return False
    return hasattr(ngopt, "log_diagnostics")


def diagnostics_attacher(directory: Path, every: int) -> AttachFactory:
    """For each FisherDescent run, a JSON-lines log ``<task>_<row>_lr<lr>_seed<seed>.jsonl`` in ``directory``.

    ``<lr>`` is ``default`` for an untuned row (built without an lr).
    """
    if not diagnostics_available():
        raise ValueError("--diagnostics needs ngopt.log_diagnostics, which this ngopt does not provide")
    import ngopt

    directory.mkdir(parents=True, exist_ok=True)

    def attach_for(task: Task, spec: OptimizerSpec, lr: Optional[float], seed: int) -> Optional[Attach]:
        if spec.natural_gradient_options is None:
            return None
        lr_text = "default" if lr is None else f"{lr:.3g}"
        path = directory / f"{task.name}_{spec.name}_lr{lr_text}_seed{seed}.jsonl"

        def attach(optimizer):
            handle = ngopt.log_diagnostics(optimizer, str(path), every=every)
            return handle.close

        return attach

    return attach_for
