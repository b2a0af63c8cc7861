"""A benchmark task from a user's own Python file (``python -m benchmarks --task-file FILE.py``).

The file is plain Python run once; the harness reads these names from it:

==================  ========  ====================================================================
name                needed    what it is
==================  ========  ====================================================================
``make_model``      yes       a function that returns a fresh ``torch.nn.Module`` (called once per
                              run, right after the run's seed is set, so every optimizer starts
                              from the same weights)
``criterion``       yes       the training loss, a ``torch.nn.Module`` such as
                              ``nn.CrossEntropyLoss()`` (each run gets its own copy)
``train_data``      yes       ``(inputs, targets)`` tensors with one example per row, or a
                              ``torch.utils.data.Dataset`` of ``(input, target)`` pairs
``batch_size``      yes       examples per step (at least the data size: full batch)
``steps``           yes       steps per run
``quick_steps``     no        steps per run with ``--quick`` (default ``steps // 4``)
``target_loss``     no        the training loss to reach; without it the harness proposes one
                              from a short pilot run (:mod:`benchmarks.pilot`) and says how
``target_reason``   no        why that target, for the report
``test_data``       no        held-out data in the same form, scored with ``metric``
``metric``          no        ``"accuracy"``, ``"mse"`` or ``"loss"`` (the criterion on the test
                              data); default ``"accuracy"`` for ``nn.CrossEntropyLoss``, else ``"loss"``
``name``            no        the task's name (default: the file name without ``.py``)
``description``     no        one line for the report
==================  ========  ====================================================================

Everything is checked before any training: a missing or ill-typed name, a
criterion that is not a module, inputs the model rejects and outputs the
criterion cannot compare with the targets each raise a ``TaskFileError``
naming the file and what to change.
"""

from __future__ import annotations

import copy
import math
import numbers
import runpy
import traceback
import warnings
from pathlib import Path
from typing import Optional

import torch
from torch import nn
from torch.utils.data import Dataset, default_collate

from benchmarks.datasets import Split
from benchmarks.evaluation import METRIC_NAMES
from benchmarks.tasks import Task

SHAPE_CHECK_EXAMPLES = 4  # examples pushed through model and criterion before any training


class TaskFileError(ValueError):
    """A task file that cannot be run, with the file and what to change in the message."""


def load_task_file(path: Path) -> Task:
    """Run the file, check every name the harness needs, and return the task (target may be None)."""
    path = Path(path)
    namespace = run_file(path)
    where = path.name
    make_model = model_factory(namespace, where)
    criterion = criterion_of(namespace, where)
    train = data_pair(namespace, "train_data", where, required=True)
    test = data_pair(namespace, "test_data", where, required=False)
    batch_size = positive_int(namespace, "batch_size", where, required=True)
    steps = positive_int(namespace, "steps", where, required=True)
    quick_steps = positive_int(namespace, "quick_steps", where, required=False) or max(1, steps // 4)
    target = target_loss_of(namespace, where)
    metric = metric_of(namespace, criterion, test, where)
    check_shapes(make_model, criterion, train, test, where)
    split = Split(train[0], train[1], *(test if test is not None else (train[0][:0], train[1][:0])))
    name = text_of(namespace, "name", where) or path.stem
    description = text_of(namespace, "description", where) or (
        f"the task in {where}: {type(criterion).__name__}, {len(train[0])} training examples, batch {batch_size}")
    reason = text_of(namespace, "target_reason", where) or f"set in {where}"
    return Task(
        name=name, description=description.rstrip("."), load_data=lambda: split, build_model=make_model,
        make_loss=lambda: copy.deepcopy(criterion), metric=metric if test is not None else None,
        target_loss=target, target_reason=reason, batch_size=batch_size, steps=steps,
        quick_steps=quick_steps,
    )


def run_file(path: Path) -> dict:
    if not path.is_file():
        raise TaskFileError(f"--task-file: no such file: {path}")
    try:
        return runpy.run_path(str(path), run_name="__task_file__")
    except Exception as error:
        frames = [frame for frame in traceback.extract_tb(error.__traceback__)
                  if Path(frame.filename).resolve() == path.resolve()]
        line = f" (line {frames[-1].lineno})" if frames else ""
        raise TaskFileError(f"{path.name}: running the file raised {type(error).__name__}{line}: {error}") from error


def model_factory(namespace: dict, where: str):
    factory = namespace.get("make_model")
    if factory is None:
        hint = ""
        if isinstance(namespace.get("model"), nn.Module):
            hint = (" It defines `model`, a module built once; the harness needs a function that builds a "
                    "fresh one for every run.")
        raise TaskFileError(f"{where} defines no model factory: add `def make_model(): return <your "
                            f"nn.Module>`.{hint}")
    if isinstance(factory, nn.Module) or not callable(factory):
        raise TaskFileError(f"{where}: make_model must be a function that returns a new nn.Module, "
                            f"got {type(factory).__name__}")
    return factory


def criterion_of(namespace: dict, where: str) -> nn.Module:
    if "criterion" not in namespace:
        raise TaskFileError(f"{where} defines no criterion: add e.g. `criterion = nn.CrossEntropyLoss()`")
    criterion = namespace["criterion"]
    if isinstance(criterion, nn.Module):
        return criterion
    if isinstance(criterion, type) and issubclass(criterion, nn.Module):
        hint = f" (it is the class itself: write {criterion.__name__}() with parentheses)"
    elif callable(criterion):
        hint = (" (a plain function such as F.cross_entropy gives ngopt no module to read the likelihood "
                "and reduction from: use nn.CrossEntropyLoss(), nn.MSELoss(), ...)")
    else:
        hint = ""
    raise TaskFileError(f"{where}: criterion must be a torch.nn.Module instance such as nn.CrossEntropyLoss(), "
                        f"got {type(criterion).__name__}{hint}")


def data_pair(namespace: dict, key: str, where: str, required: bool):
    """(inputs, targets) tensors from a pair of tensors or a Dataset of pairs."""
    if namespace.get(key) is None:
        if required:
            raise TaskFileError(f"{where} defines no {key}: add `{key} = (inputs, targets)` (tensors, one "
                                "example per row) or a torch.utils.data.Dataset of (input, target) pairs")
        return None
    data = namespace[key]
    if isinstance(data, Dataset):
        data = stack_dataset(data, key, where)
    if not (isinstance(data, (tuple, list)) and len(data) == 2):
        raise TaskFileError(f"{where}: {key} must be (inputs, targets) or a Dataset of (input, target) "
                            f"pairs, got {type(data).__name__}")
    inputs, targets = (torch.as_tensor(part) if not isinstance(part, torch.Tensor) else part for part in data)
    if inputs.ndim == 0 or targets.ndim == 0:
        raise TaskFileError(f"{where}: {key} needs one example per row; got inputs of shape "
                            f"{list(inputs.shape)} and targets of shape {list(targets.shape)}")
    if len(inputs) != len(targets):
        raise TaskFileError(f"{where}: {key} has {len(inputs)} inputs but {len(targets)} targets")
    if len(inputs) == 0:
        raise TaskFileError(f"{where}: {key} is empty")
    return inputs, targets


def stack_dataset(dataset: Dataset, key: str, where: str):
    try:
        size = len(dataset)
        batch = default_collate([dataset[index] for index in range(size)])
    except Exception as error:
        raise TaskFileError(f"{where}: could not read {key} as a whole ({type(error).__name__}: {error}); "
                            "its items must be (input, target) pairs of tensors or numbers") from error
    return batch


def positive_int(namespace: dict, key: str, where: str, required: bool) -> Optional[int]:
    value = namespace.get(key)
    if value is None:
        if required:
            raise TaskFileError(f"{where} defines no {key}: add `{key} = <a positive integer>`")
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 1:
        raise TaskFileError(f"{where}: {key} must be a positive integer, got {value!r}")
    return int(value)


def target_loss_of(namespace: dict, where: str) -> Optional[float]:
    value = namespace.get("target_loss")
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value):
        raise TaskFileError(f"{where}: target_loss must be a finite number (a training-loss value), got {value!r}")
    return float(value)


def metric_of(namespace: dict, criterion: nn.Module, test, where: str) -> str:
    metric = namespace.get("metric")
    if metric is None:
        return "accuracy" if isinstance(criterion, nn.CrossEntropyLoss) else "loss"
    if metric not in METRIC_NAMES:
        raise TaskFileError(f"{where}: metric must be one of {', '.join(METRIC_NAMES)}, got {metric!r}")
    return metric


def text_of(namespace: dict, key: str, where: str) -> Optional[str]:
    value = namespace.get(key)
    if value is not None and not isinstance(value, str):
        raise TaskFileError(f"{where}: {key} must be a string, got {type(value).__name__}")
    return value


def check_shapes(make_model, criterion: nn.Module, train, test, where: str) -> None:
    """A few training examples through the model and the criterion, before anything is timed."""
    torch.manual_seed(0)
    model = make_model()
    if not isinstance(model, nn.Module):
        raise TaskFileError(f"{where}: make_model() must return a torch.nn.Module, got {type(model).__name__}")
    inputs, targets = train[0][:SHAPE_CHECK_EXAMPLES], train[1][:SHAPE_CHECK_EXAMPLES]
    try:
        with torch.no_grad():
            outputs = model(inputs)
    except Exception as error:
        raise TaskFileError(f"{where}: the model does not accept the training inputs (a batch of shape "
                            f"{list(inputs.shape)}, {inputs.dtype}): {type(error).__name__}: {error}") from error
    described = (f"the model's output (shape {list(getattr(outputs, 'shape', []))}) and the targets "
                 f"(shape {list(targets.shape)}, {targets.dtype})")
    if not isinstance(outputs, torch.Tensor):
        raise TaskFileError(f"{where}: the model must return one tensor, got {type(outputs).__name__}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            loss = copy.deepcopy(criterion)(outputs, targets)
        except Exception as error:
            raise TaskFileError(f"{where}: {type(criterion).__name__} cannot compare {described}: "
                                f"{type(error).__name__}: {error}") from error
    # nn.MSELoss and kin broadcast mismatched shapes with only a warning: here that is a mistake
    if caught:
        raise TaskFileError(f"{where}: {type(criterion).__name__} does not fit {described}: {caught[0].message}")
    if not isinstance(loss, torch.Tensor) or loss.numel() != 1:
        raise TaskFileError(f"{where}: {type(criterion).__name__} must return a single number, got shape "
                            f"{list(getattr(loss, 'shape', []))}: use reduction='mean' or 'sum'")
    if test is not None:
        for part, kind in ((0, "inputs"), (1, "targets")):
            if test[part].shape[1:] != train[part].shape[1:]:
                raise TaskFileError(f"{where}: test_data {kind} have rows of shape {list(test[part].shape[1:])}, "
                                    f"train_data {kind} rows of shape {list(train[part].shape[1:])}")
