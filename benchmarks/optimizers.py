"""The compared optimizers and their learning-rate grids.

Each optimizer is built with nothing tuned but its learning rate: SGD with
heavy-ball momentum 0.9, Adam with its defaults, FisherDescent with its own
defaults (or, to tune those defaults, with overrides that apply to every task
alike). Every grid is log-spaced, spans the same number of decades and has the
same number of points, so no optimizer gets a finer search than another.

Besides the default FisherDescent row (``ngopt``, K-FAC curvature) there are
rows with its other curvature kinds, ``ngopt-ekfac`` and ``ngopt-diag``: same
defaults otherwise and the same grid centre, so the three differ in the
curvature alone. They run on request (``--optimizers``), not by default.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Callable, Optional

import numpy as np
import torch
from torch import nn

from benchmarks.selection import select_by_name

GRID_DECADES = 2.0  # width of every learning-rate grid, in powers of ten

Builder = Callable[[nn.Module, nn.Module, float], torch.optim.Optimizer]


@dataclass(frozen=True)
class OptimizerSpec:
    """How to build one optimizer from (model, loss, lr), and where its lr grid sits.

    ``lr_centre`` is the geometric centre of the grid: a grid of n points is
    ``lr_centre * 10 ** linspace(-GRID_DECADES / 2, GRID_DECADES / 2, n)``.
    """

    name: str
    label: str
    lr_centre: float
    build: Builder
    natural_gradient_options: Optional[dict] = None  # what defines a FisherDescent row; None otherwise

    def lr_grid(self, size: int) -> list[float]:
        if size < 1:
            raise ValueError(f"lr grid size must be at least 1, got {size}")
        if size == 1:
            return [self.lr_centre]
        exponents = np.linspace(-GRID_DECADES / 2, GRID_DECADES / 2, size)
        return [float(self.lr_centre * 10.0 ** e) for e in exponents]


def _sgd(model: nn.Module, loss_fn: nn.Module, lr: float) -> torch.optim.Optimizer:
    return torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)


def _adam(model: nn.Module, loss_fn: nn.Module, lr: float) -> torch.optim.Optimizer:
    return torch.optim.Adam(model.parameters(), lr=lr)


def natural_gradient_builder(options: Optional[dict] = None) -> Builder:
    """FisherDescent with its defaults, or with ``options`` overriding some of them."""
    options = dict(options or {})

    def build(model: nn.Module, loss_fn: nn.Module, lr: float) -> torch.optim.Optimizer:
        import ngopt  # imported late: the baselines run without it

        return ngopt.FisherDescent(model, loss_fn, lr=lr, **options)

    return build


def listed_options(options: dict) -> str:
    return ", ".join(f"{key}={value!r}" for key, value in options.items())


def natural_gradient_row(name: str, options: dict) -> OptimizerSpec:
    """A FisherDescent row defined by ``options`` (e.g. its curvature), grid centred like ngopt's."""
    return OptimizerSpec(name, f"FisherDescent ({listed_options(options)})", NATURAL_GRADIENT_LR,
                         natural_gradient_builder(options), dict(options))


def with_natural_gradient_options(spec: OptimizerSpec, options: dict) -> OptimizerSpec:
    """A FisherDescent row with keyword overrides applied to every task alike (for tuning its defaults).

    The options that define the row (the curvature of ``ngopt-diag``) win over
    the overrides, so a row keeps being what its name says.
    """
    if not options:
        return spec
    merged = {**options, **(spec.natural_gradient_options or {})}
    return replace(spec, label=f"FisherDescent ({listed_options(merged)})",
                   build=natural_gradient_builder(merged), natural_gradient_options=merged)


# Centred at FisherDescent's own default lr (0.3): its steps are near unit scale,
# lr=1 being a damped Newton step.
NATURAL_GRADIENT_LR = 0.3

OPTIMIZERS: dict[str, OptimizerSpec] = {
    spec.name: spec
    for spec in [
        OptimizerSpec("ngopt", "FisherDescent (defaults)", NATURAL_GRADIENT_LR, natural_gradient_builder(), {}),
        OptimizerSpec("sgd", "SGD, momentum 0.9", 0.3, _sgd),
        OptimizerSpec("adam", "Adam", 1e-2, _adam),
        natural_gradient_row("ngopt-ekfac", {"structure": "ekfac"}),
        natural_gradient_row("ngopt-diag", {"structure": "diag"}),
    ]
}

# What runs without --optimizers. The curvature rows stay out: each adds as much time as the ngopt
# row itself (five rows instead of three make the quick run about 5/3 as long), and the goals and the
# README results compare the default optimizer with the baselines; the rows are an ablation on request.
DEFAULT_OPTIMIZERS = ("ngopt", "sgd", "adam")


def resolve_optimizers(names: Optional[list[str]]) -> list[OptimizerSpec]:
    """The optimizers with the given names, in the order given (``DEFAULT_OPTIMIZERS`` for ``None``)."""
    return select_by_name(OPTIMIZERS, list(DEFAULT_OPTIMIZERS) if names is None else names, "optimizers")


def natural_gradient_available() -> tuple[bool, str]:
    """Whether ``ngopt.FisherDescent`` imports here, with the reason when it does not."""
    try:
        import ngopt

        ngopt.FisherDescent
    except Exception as error:  # any import failure means: not usable here
        return False, f"{type(error).__name__}: {error}"
    return True, ""
