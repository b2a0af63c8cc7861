"""What machine and software a benchmark ran on, for results.json."""

from __future__ import annotations

import datetime
import os
import platform
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import torch

PACKAGES = ("torch", "numpy", "scikit-learn", "mnist1d", "matplotlib", "tqdm")
# BLAS tuning variables change the speed of the linear algebra, so they are recorded.
ENVIRONMENT_KEYS = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                    "OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")


def cpu_model() -> str:
    """The CPU's model name from /proc/cpuinfo, or platform's guess elsewhere."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def memory_bytes() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None


def package_versions() -> dict[str, str | None]:
    versions: dict[str, str | None] = {}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def git_commit(repository: Path) -> str | None:
    """The checked-out commit (with "+dirty" when the tree has changes), None outside git."""
    try:
        commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=repository, capture_output=True,
                                text=True, timeout=10, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain"], cwd=repository,
                               capture_output=True, text=True, timeout=10, check=True).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return None
    return commit + ("+dirty" if dirty else "")


def machine_info() -> dict:
    """Platform, CPU, memory, thread settings and library versions of this process."""
    return {
        "timestamp": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "cpu_model": cpu_model(),
        "logical_cpus": os.cpu_count(),
        "memory_bytes": memory_bytes(),
        "python": sys.version.split()[0],
        "packages": package_versions(),
        "torch_threads": torch.get_num_threads(),
        "torch_interop_threads": torch.get_num_interop_threads(),
        "torch_parallel_info": [line.strip() for line in torch.__config__.parallel_info().splitlines()
                                if line.strip() and not line.startswith(("\t", "Environment"))],
        "environment": {key: os.environ[key] for key in ENVIRONMENT_KEYS if key in os.environ},
        "git_commit": git_commit(Path(__file__).resolve().parent.parent),
        "memory_note": "optimizer_state_bytes: bytes of the tensors in optimizer.state_dict() at the "
                       "end of a run (curvature factors and inverses for FisherDescent, momentum or moment "
                       "buffers for the baselines); process_peak_rss_bytes: the process's resident-set "
                       "high-water mark (getrusage ru_maxrss) when the run ended, which only grows "
                       "over a benchmark and so bounds, not isolates, one run's peak; rss_growth_bytes: "
                       "resident memory after a run (its model and optimizer deleted, gc run) minus "
                       "before it, which is near zero unless something keeps memory from that run; null "
                       "for runs that trained in turns with others (their memory overlaps): the task's "
                       "rss_growth_bytes then sums the same over its groups of runs in turns",
    }
