"""Argument checks at the door: each names the argument and the allowed values."""
from __future__ import annotations

import math
import numbers

from torch import nn

from .blocks.factory import STRUCTURES
from .inversion_schedule import INVERSION_SCHEDULES
from .rules import DAMPING_RULES, STEP_RULES

# Choices with a table of implementations are read from it (registering a rule there is enough);
# the rest are spelled here.
CHOICES = {"fisher": ("sampled", "exact", "empirical"), "structure": STRUCTURES,
           "fallback": ("sgd", "adam"), "weight_sharing": ("expand", "reduce"),
           "damping_rule": DAMPING_RULES, "step_rule": STEP_RULES,
           "inverse_schedule": INVERSION_SCHEDULES}
PLANNED: dict = {}  # {argument: {value: message}} for values announced but not built yet


def _real(name, value, *, low=None, high=None, low_open=False, high_open=False, optional=False):
    if value is None and optional:
        return
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number{' or None' if optional else ''}, "
                        f"got {type(value).__name__}")
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value}")
    if low is not None and (value < low or (low_open and value == low)):
        raise ValueError(f"{name} must be {'>' if low_open else '>='} {low}, got {value}")
    if high is not None and (value > high or (high_open and value == high)):
        raise ValueError(f"{name} must be {'<' if high_open else '<='} {high}, got {value}")


def _integer(name, value, *, low):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {type(value).__name__}")
    if value < low:
        raise ValueError(f"{name} must be >= {low}, got {value}")


def _choice(name, value):
    if not isinstance(value, str):
        raise TypeError(f"{name} must be a string, one of {tuple(CHOICES[name])}; got {type(value).__name__}")
    if value in PLANNED.get(name, {}):
        raise ValueError(f"{name}: {PLANNED[name][value]}")
    if value not in CHOICES[name]:
        raise ValueError(f"{name} must be one of {tuple(CHOICES[name])}, got {value!r}")


CHECKS = {
    "lr": lambda v: _real("lr", v, low=0.0),
    "momentum": lambda v: _real("momentum", v, low=0.0, high=1.0, high_open=True),
    "weight_decay": lambda v: _real("weight_decay", v, low=0.0),
    "damping": lambda v: _real("damping", v, low=0.0, low_open=True),
    "stats_memory": lambda v: _real("stats_memory", v, low=0.0, high=1.0, high_open=True),
    "scale_memory": lambda v: _real("scale_memory", v, low=0.0, high=1.0, high_open=True),
    "max_step_kl": lambda v: _real("max_step_kl", v, low=0.0, low_open=True, optional=True),
    "max_exact_step_kl": lambda v: _real("max_exact_step_kl", v, low=0.0, low_open=True, optional=True),
    "fallback_lr_scale": lambda v: _real("fallback_lr_scale", v, low=0.0, optional=True),
    "stats_interval": lambda v: _integer("stats_interval", v, low=1),
    "inverse_interval": lambda v: _integer("inverse_interval", v, low=1),
    "interval_warmup": lambda v: _integer("interval_warmup", v, low=0),
    "loss_floor": lambda v: _real("loss_floor", v, optional=True),
    "fisher_samples": lambda v: _integer("fisher_samples", v, low=1),
    "damping_interval": lambda v: _integer("damping_interval", v, low=1),
    "fisher": lambda v: _choice("fisher", v),
    "structure": lambda v: _choice("structure", v),
    "fallback": lambda v: _choice("fallback", v),
    "weight_sharing": lambda v: _choice("weight_sharing", v),
    "damping_rule": lambda v: _choice("damping_rule", v),
    "step_rule": lambda v: _choice("step_rule", v),
    "inverse_schedule": lambda v: _choice("inverse_schedule", v),
    "rule_interval": lambda v: _integer("rule_interval", v, low=0),
    "rule_batch_fraction": lambda v: _real("rule_batch_fraction", v, low=0.0, high=1.0, low_open=True),
    "stats_fraction": lambda v: _real("stats_fraction", v, low=0.0, high=1.0, low_open=True, optional=True),
    "cost_budget": lambda v: _real("cost_budget", v, low=0.0, low_open=True, optional=True),
    "max_factor_size": lambda v: None if v is None else _integer("max_factor_size", v, low=1),
}


def _check_model(model):
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if next(model.parameters(), None) is None:
        raise ValueError("model has no parameters to optimize")


def _check_loss_fn(loss_fn):
    if loss_fn is not None and not callable(loss_fn):
        raise TypeError(f"loss_fn must be a callable criterion (e.g. nn.CrossEntropyLoss()) or None, "
                        f"got {type(loss_fn).__name__}")


def _check_damping_range(value):
    if not isinstance(value, (tuple, list)) or len(value) != 2:
        raise TypeError(f"damping_range must be a pair (low, high), got {value!r}")
    low, high = value
    _real("damping_range[0]", low, low=0.0, low_open=True)
    _real("damping_range[1]", high, low=0.0, low_open=True)
    if low > high:
        raise ValueError(f"damping_range must have low <= high, got {value!r}")


def _check_seed(value):
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"seed must be an int or None, got {type(value).__name__}")
    if not 0 <= value < 2 ** 63:
        raise ValueError(f"seed must be in [0, 2**63), got {value}")


def _check_param_groups(value):
    if value is None:
        return
    if isinstance(value, (dict, str, bytes)) or not isinstance(value, (list, tuple)):
        raise TypeError("param_groups must be a list of dicts like [{'params': [...], 'lr': ...}], "
                        f"got {type(value).__name__}")
    for index, group in enumerate(value):
        if not isinstance(group, dict) or "params" not in group:
            raise TypeError(f"param_groups[{index}] must be a dict with a 'params' entry, got {group!r:.60}")


def _check_pinned_structures(value):
    if value is None:
        return
    if not isinstance(value, dict):
        raise TypeError(f"pinned_structures must be a dict {{block name: structure}}, got {type(value).__name__}")
    for name, structure in value.items():
        if not isinstance(name, str):
            raise TypeError(f"pinned_structures: keys must be block names (str), got {name!r}")
        if structure not in CHOICES["structure"]:
            raise ValueError(f"pinned_structures[{name!r}] must be one of {tuple(CHOICES['structure'])}, "
                             f"got {structure!r}")


def check_arguments(**arguments) -> None:
    """Validate every given argument; raise ``TypeError``/``ValueError`` naming the first bad one."""
    special = {"model": _check_model, "loss_fn": _check_loss_fn, "damping_range": _check_damping_range,
               "seed": _check_seed, "param_groups": _check_param_groups,
               "pinned_structures": _check_pinned_structures}
    for name, value in arguments.items():
        check = special.get(name) or CHECKS[name]
        check(value)
