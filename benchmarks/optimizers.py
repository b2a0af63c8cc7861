"""The compared optimizers and their learning-rate grids.

The baselines are tuned over a learning-rate grid: every grid is log-spaced
with its points half a decade apart (a factor of sqrt(10), about 3.2) and has
the same number of points, so no baseline gets a finer or a wider search than
another. They are

- ``sgd``: SGD with heavy-ball momentum 0.9;
- ``adam``: Adam at its defaults;
- ``adamw-cosine``: AdamW (weight decay 0.01) under a linear warm-up and a
  cosine decay fitted to the run's step budget (:mod:`benchmarks.schedules`);
  the grid sets the peak lr;
- ``muon``: torch's ``Muon`` on the hidden weight matrices and AdamW on the
  rest, at one lr (:mod:`benchmarks.muon`); skipped, with the reason, on a
  torch without ``torch.optim.Muon``, and left out of a default run on a CPU
  without native bfloat16 arithmetic (on request it runs there too).

FisherDescent's headline row, ``fisher-descent``, is not tuned: it is built
as a user would build it, ``ngopt.FisherDescent(model, loss_fn)``, with only
the options given by ``--ngopt-option``, and it runs once per seed. That is
the comparison a user faces: the method at its defaults against baselines
whose lr was searched. The rows are named after the method, not the package,
so that a results table reads as methods side by side. Rows on request:

- ``fisher-descent-tuned``: FisherDescent with an lr grid like the baselines',
  centred at the library's own default lr (read from the library, so a change
  of the default moves the grid with it);
- ``fisher-descent-ekfac``, ``fisher-descent-ekfac-gradient``, ``fisher-descent-diag``:
  the untuned row with ``structure="ekfac"``, ``"ekfac-gradient"`` or ``"diag"``, so
  that they differ from ``fisher-descent`` in the curvature alone;
- ``fisher-descent-cosine``: the untuned row with its default lr decayed to 0
  over the run's step budget (:func:`benchmarks.schedules.cosine`), the schedule
  a user who knows the length of the run would add.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Callable, Optional

import torch
from torch import nn

from benchmarks import schedules
from benchmarks.muon import build_muon, muon_available, muon_slow_here
from benchmarks.selection import select_by_name

HEADLINE = "fisher-descent"  # the method at its defaults, the row every comparison is about
TUNED = f"{HEADLINE}-tuned"

# Between neighbouring points of every learning-rate grid, in powers of ten: at most a factor of
# about 3.2 from the best lr of the grid to a better one between its points.
GRID_SPACING_DECADES = 0.5


def grid_exponents(size: int) -> list[float]:
    """Where the points of a grid of ``size`` lie, in decades from its centre, in increasing order.

    The centre, then half a decade above, half a decade below, a decade above, ...: an odd count
    is symmetric, an even one has its extra point above, since a short budget rewards the larger
    lrs (in a quick run of the built-in tasks no baseline chose the lowest point of a 5-point grid).
    """
    if size < 1:
        raise ValueError(f"lr grid size must be at least 1, got {size}")
    offsets = [0] + [sign * distance for distance in range(1, size) for sign in (1, -1)]
    return sorted(GRID_SPACING_DECADES * offset for offset in offsets[:size])


def grid_span(size: int) -> float:
    """The width of a grid of ``size`` points, in decades."""
    return GRID_SPACING_DECADES * (size - 1)


# (model, loss, lr) -> optimizer; lr None means: do not pass one, use the optimizer's default
Builder = Callable[[nn.Module, nn.Module, Optional[float]], torch.optim.Optimizer]
# (optimizer, the run's step budget) -> lr scheduler, stepped after every optimizer step
Schedule = Callable[[torch.optim.Optimizer, int], torch.optim.lr_scheduler.LRScheduler]

# AdamW's decoupled weight decay: torch's default. The targets are training losses, which decay
# works against, so the baselines keep the light default rather than a heavier regularizer.
ADAMW_WEIGHT_DECAY = 0.01
# Centre of adamw-cosine's peak-lr grid: half a decade above Adam's lr centre, since the schedule runs
# at about half its peak on average (a centre of 1e-2 put the chosen peak at the grid's top on four of
# the seven built-in tasks).
PEAK_LR_CENTRE = 10 ** -1.5


@dataclass(frozen=True)
class OptimizerSpec:
    """How to build one optimizer from (model, loss, lr), and whether and where its lr is tuned.

    ``lr_centre`` is the centre of the grid: a grid of n points is
    ``lr_centre * 10 ** e`` for the exponents ``e`` of :func:`grid_exponents`.
    An untuned row (``tuned=False``) has the one-point grid ``[None]``: it is
    built without an lr and runs at the optimizer's own default. A row with a
    ``schedule`` has it built on its optimizer for each run's step budget; the
    grid then sets the lr the schedule scales.
    """

    name: str
    label: str
    lr_centre: Optional[float]
    build: Builder
    natural_gradient_options: Optional[dict] = None  # what defines a FisherDescent row; None otherwise
    tuned: bool = True
    schedule: Optional[Schedule] = None
    schedule_words: Optional[str] = None  # the schedule in words, kept in the label under option overrides
    unavailable: Optional[Callable[[], Optional[str]]] = None  # why the row cannot run here (None: it can)
    # why a default run leaves the row out here (None: it runs); asked for by name, it runs anyway
    slow_here: Optional[Callable[[], Optional[str]]] = None

    def why_unavailable(self) -> Optional[str]:
        return None if self.unavailable is None else self.unavailable()

    def lr_grid(self, size: int) -> list[Optional[float]]:
        exponents = grid_exponents(size)
        if not self.tuned:
            return [None]
        centre = self.grid_centre()
        return [float(centre * 10.0 ** e) for e in exponents]

    def grid_centre(self) -> float:
        if self.lr_centre is not None:
            return self.lr_centre
        return library_default_lr(self.natural_gradient_options or {})


def _sgd(model: nn.Module, loss_fn: nn.Module, lr: Optional[float]) -> torch.optim.Optimizer:
    return torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)


def _adam(model: nn.Module, loss_fn: nn.Module, lr: Optional[float]) -> torch.optim.Optimizer:
    return torch.optim.Adam(model.parameters(), lr=lr)


def _adamw(model: nn.Module, loss_fn: nn.Module, lr: Optional[float]) -> torch.optim.Optimizer:
    return torch.optim.AdamW(model.parameters(), lr=lr, weight_decay=ADAMW_WEIGHT_DECAY)


def _muon(model: nn.Module, loss_fn: nn.Module, lr: Optional[float]) -> torch.optim.Optimizer:
    return build_muon(model, loss_fn, lr, ADAMW_WEIGHT_DECAY)


def natural_gradient_builder(options: Optional[dict] = None) -> Builder:
    """FisherDescent with ``options`` (passed through unchecked, so new keywords work) and, if given, lr."""
    options = dict(options or {})

    def build(model: nn.Module, loss_fn: nn.Module, lr: Optional[float]) -> torch.optim.Optimizer:
        import ngopt  # imported late: the baselines run without it

        keywords = dict(options) if lr is None else {**options, "lr": lr}
        return ngopt.FisherDescent(model, loss_fn, **keywords)

    return build


def library_default_lr(options: dict) -> float:
    """The lr FisherDescent picks when none is passed (under ``options``), read from the library."""
    optimizer = natural_gradient_builder(options)(nn.Linear(2, 1), nn.MSELoss(), None)
    lr = float(optimizer.param_groups[0]["lr"])
    if lr <= 0:
        raise ValueError(f"{TUNED}: FisherDescent's default lr is {lr}; a log-spaced grid needs lr > 0 "
                         "(pass --ngopt-option lr=VALUE to centre the grid)")
    return lr


def listed_options(options: dict) -> str:
    return ", ".join(f"{key}={value!r}" for key, value in options.items())


def natural_gradient_label(options: dict, tuned: bool, schedule: Optional[str] = None) -> str:
    what = "lr tuned over a grid around its default" if tuned else "its defaults, lr not tuned"
    what += f", {schedule}" if schedule else ""
    return f"FisherDescent ({what}" + (f"; {listed_options(options)})" if options else ")")


def natural_gradient_row(name: str, options: dict, tuned: bool = False,
                         schedule: Optional[Schedule] = None, schedule_words: Optional[str] = None) -> OptimizerSpec:
    """A FisherDescent row defined by ``options`` (e.g. its structure) and, if given, an lr schedule."""
    return OptimizerSpec(name, natural_gradient_label(options, tuned, schedule_words), None,
                         natural_gradient_builder(options), dict(options), tuned, schedule=schedule,
                         schedule_words=schedule_words)


def with_natural_gradient_options(spec: OptimizerSpec, options: dict) -> OptimizerSpec:
    """A FisherDescent row with keyword overrides applied to every task alike.

    The options that define the row (the structure of ``fisher-descent-diag``) win over
    the overrides, so a row keeps being what its name says.
    """
    if not options:
        return spec
    merged = {**options, **(spec.natural_gradient_options or {})}
    return replace(spec, label=natural_gradient_label(merged, spec.tuned, spec.schedule_words),
                   build=natural_gradient_builder(merged), natural_gradient_options=merged)


OPTIMIZERS: dict[str, OptimizerSpec] = {
    spec.name: spec
    for spec in [
        natural_gradient_row(HEADLINE, {}),
        OptimizerSpec("sgd", "SGD, momentum 0.9, lr tuned", 0.3, _sgd),
        OptimizerSpec("adam", "Adam, lr tuned", 1e-2, _adam),
        OptimizerSpec("adamw-cosine", f"AdamW (weight decay {ADAMW_WEIGHT_DECAY:g}), {schedules.describe()}; "
                      "peak lr tuned", PEAK_LR_CENTRE, _adamw, schedule=schedules.warmup_cosine),
        OptimizerSpec("muon", "torch's Muon (match_rms_adamw, Newton-Schulz in bfloat16 as torch runs it) on the "
                      f"hidden weight matrices, AdamW on the rest, weight decay {ADAMW_WEIGHT_DECAY:g}; one lr, tuned",
                      1e-2, _muon, unavailable=muon_available, slow_here=muon_slow_here),
        natural_gradient_row(TUNED, {}, tuned=True),
        natural_gradient_row(f"{HEADLINE}-ekfac", {"structure": "ekfac"}),
        natural_gradient_row(f"{HEADLINE}-ekfac-gradient", {"structure": "ekfac-gradient"}),
        natural_gradient_row(f"{HEADLINE}-diag", {"structure": "diag"}),
        natural_gradient_row(f"{HEADLINE}-cosine", {}, schedule=schedules.cosine,
                             schedule_words=schedules.describe_cosine()),
    ]
}
NATURAL_GRADIENT_ROWS = tuple(name for name, spec in OPTIMIZERS.items() if spec.natural_gradient_options is not None)
BASELINES = ("sgd", "adam", "adamw-cosine", "muon")

# What runs without --optimizers. The other rows are on request: each adds about as much time as a
# baseline row (fisher-descent-tuned as much as both untuned rows together). muon runs by default only
# where it is fast (OptimizerSpec.slow_here): torch's Muon orthogonalizes in bfloat16, whose matrix
# products a CPU without native bfloat16 support (AVX2 only) runs tens of times slower than float32
# ones, so there one muon run can take minutes.
DEFAULT_OPTIMIZERS = (HEADLINE, "sgd", "adam", "adamw-cosine", "muon")


def resolve_optimizers(names: Optional[list[str]]) -> list[OptimizerSpec]:
    """The optimizers with the given names, in the order given (``DEFAULT_OPTIMIZERS`` for ``None``)."""
    return select_by_name(OPTIMIZERS, list(DEFAULT_OPTIMIZERS) if names is None else names, "optimizers")


def runnable(specs: list[OptimizerSpec], by_default: bool = False) -> tuple[list[OptimizerSpec], dict[str, str]]:
    """The rows that can run here, and for each other one the reason it cannot (e.g. a torch without Muon).

    ``by_default``: the rows are the default set, not named by the user, so a row that would only
    measure this machine's weakness (``slow_here``) is left out too, with its reason.
    """
    reasons = {spec.name: spec.why_unavailable() for spec in specs}
    if by_default:
        for spec in specs:
            if reasons[spec.name] is None and spec.slow_here is not None:
                reasons[spec.name] = spec.slow_here()
    return [spec for spec in specs if reasons[spec.name] is None], \
        {name: reason for name, reason in reasons.items() if reason is not None}


def natural_gradient_available() -> tuple[bool, str]:
    """Whether ``ngopt.FisherDescent`` imports here, with the reason when it does not."""
    try:
        import ngopt

        ngopt.FisherDescent
    except Exception as error:  # any import failure means: not usable here
        return False, f"{type(error).__name__}: {error}"
    return True, ""
