"""Which tasks a run takes: the built-in ones by default; a set, or single tasks, by name.

``--tasks`` takes task names and set names, mixed: ``held-out`` stands for
every held-out task (:mod:`benchmarks.held_out`), ``built-in`` for the
built-in tasks a plain run takes.
"""

from __future__ import annotations

from typing import Optional

from benchmarks.held_out import HELD_OUT_TASKS
from benchmarks.selection import select_by_name
from benchmarks.tasks import ON_REQUEST_TASKS, TASKS, Task

ALL_TASKS: dict[str, Task] = {**TASKS, **HELD_OUT_TASKS}
DEFAULT_TASKS = tuple(name for name in TASKS if name not in ON_REQUEST_TASKS)
TASK_SETS = {"built-in": DEFAULT_TASKS, "held-out": tuple(HELD_OUT_TASKS)}


def expand_sets(names: list[str]) -> list[str]:
    """The names with each set name replaced by its tasks, in order, every task once."""
    expanded: list[str] = []
    for name in names:
        for member in TASK_SETS.get(name, (name,)):
            if member not in expanded:
                expanded.append(member)
    return expanded


def resolve_tasks(names: Optional[list[str]]) -> list[Task]:
    """The tasks named (or in the sets named), in the order given; for ``None``, the built-in set."""
    if names is None:
        return [TASKS[name] for name in DEFAULT_TASKS]
    try:
        return select_by_name(ALL_TASKS, expand_sets(names), "tasks")
    except ValueError as error:
        raise ValueError(f"{error}; or a set: {', '.join(TASK_SETS)}") from None
