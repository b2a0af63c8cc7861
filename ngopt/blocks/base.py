"""The protocol every curvature block follows.

A block owns one layer's curvature.  Its life per refresh:

1. :meth:`add_capture` receives the layer's input rows ``a`` and output-gradient
   rows ``g`` from the capture hooks, with the factor ``scale`` that undoes the
   loss reduction (and averages Monte Carlo draws);
2. :meth:`batch_statistics` turns the pending captures into this batch's
   statistics;
3. :meth:`blend` mixes them into the running average (the first refresh sets
   them outright);
4. :meth:`prepare_inverse` builds what :meth:`precondition` needs, with its diagnostics.

Steps 2-4 return new tensors instead of writing them, so that the optimizer can
check everything for NaN/Inf and then :meth:`commit` it all at once: a step
that is skipped leaves the block untouched.  Persistent tensors live in the
optimizer's per-parameter state of the layer's weight, so ``state_dict()``
carries them.
"""
from __future__ import annotations

from collections.abc import MutableMapping
from dataclasses import dataclass
from typing import Callable, Dict, List, Optional, Tuple

import torch

from .layers import LayerAdapter
from .rows import join_positions

Tensors = Dict[str, torch.Tensor]


@dataclass
class InversionPlan:
    """A block's factors to invert, ``[(matrix on the CPU, shift, statistics precision or None)]``, and
    ``finish``, which turns their :class:`ngopt.linalg.DampedInverse` results, in the same order, into what
    ``prepare_inverse`` returns."""

    requests: List[Tuple[torch.Tensor, float, Optional[torch.dtype]]]
    finish: Callable[[list], Tuple[Tensors, dict]]


class PrefixedState(MutableMapping):
    """The entries of ``state`` whose keys start with ``prefix``, under their short keys.

    A block made of several blocks (``blocks/tied.py``) keeps all their tensors in its
    parameter's one optimizer state, so that ``state_dict()`` carries them.
    """

    def __init__(self, state: dict, prefix: str):
        self.state, self.prefix = state, prefix

    def __getitem__(self, key):
        return self.state[self.prefix + key]

    def __setitem__(self, key, value):
        self.state[self.prefix + key] = value

    def __delitem__(self, key):
        del self.state[self.prefix + key]

    def __iter__(self):
        return (key[len(self.prefix):] for key in list(self.state) if key.startswith(self.prefix))

    def __len__(self):
        return sum(1 for _ in self)


WEIGHT_SHARING = ("expand", "reduce")


class LayerCurvature:
    structure = "block"
    statistic_keys: Tuple[str, ...] = ()
    inverse_keys: Tuple[str, ...] = ()
    # Statistics that are symmetric matrices by construction (sent as triangles between ranks).
    symmetric_statistic_keys: Tuple[str, ...] = ()
    # Statistics measured in a basis the inversion produces (EKFAC's scales): a second phase.
    projected_keys: Tuple[str, ...] = ()
    # Statistics proportional to the loss's weights (built from output gradients): a loss scale divides them.
    loss_weighted_keys: Tuple[str, ...] = ()
    # Whether precondition() takes ``out=`` (memory for its result, see ngopt/scratch.py).
    writes_into = False
    # Whether the block updates its scales from every step's gradient (gradient_scales()).
    follows_gradient = False

    def __init__(self, layer: LayerAdapter, state: dict, weight_sharing: str = "expand"):
        if weight_sharing not in WEIGHT_SHARING:
            raise ValueError(f"weight_sharing must be one of {WEIGHT_SHARING}, got {weight_sharing!r}")
        self.layer = layer
        self.state = state
        self.weight_sharing = weight_sharing
        # (input rows, grad rows, scale, index of the model forward the call belongs to)
        self.pending: List[Tuple[torch.Tensor, torch.Tensor, float, int]] = []
        self.info: dict = {}  # latest diagnostics of this block (plain Python numbers)
        # stats_fraction < 1: an ExampleSubsample (blocks/subsample.py) and the examples kept per forward
        self.subsample = None
        self._kept: dict = {}
        # Partial sums of captures already folded (fold_pending), for blocks whose statistics are sums.
        self._folded = None
        self.plan = None  # budget.Plan: the form chosen for this layer's cost, when one was
        # Memory reused between steps (ngopt/scratch.py): never state, never checkpointed.
        self.scratch: dict = {}

    # -- capture -------------------------------------------------------------------------
    def add_capture(self, input_rows: torch.Tensor, grad_rows: torch.Tensor, scale: float,
                    forward: int = 0, term: int = 0) -> None:
        """Queue one call's rows; ``term`` says which use of the parameter made it (tied blocks)."""
        if self.subsample is not None:
            input_rows, grad_rows, scale = self.subsample.take(self._kept, forward, input_rows, grad_rows, scale)
        self.pending.append((input_rows, grad_rows, scale, forward))

    def clear_pending(self) -> None:
        self.pending.clear()
        self._kept.clear()
        self._folded = None

    def fold_pending(self) -> None:
        """Reduce the pending captures to partial sums now and drop their rows (a no-op by default).

        Blocks whose batch statistics are sums over the captures override it, so that the
        capture can free each layer's output gradients as soon as they are formed.  Folding
        must not change the statistics beyond rounding.
        """

    def calls_joined_per_forward(self) -> List[Tuple[torch.Tensor, torch.Tensor, float]]:
        """Pending calls of one forward (shared weights) joined along positions.

        An example's gradient sums over all calls of the layer in its forward,
        so per-example quantities must see those calls as one.
        """
        joined = {}
        for input_rows, grad_rows, scale, forward in self.pending:
            previous = joined.get(forward)
            if previous is not None and previous[0].shape[0] == input_rows.shape[0] \
                    and previous[1].shape[0] == grad_rows.shape[0] and previous[2] == scale:
                joined[forward] = (join_positions([previous[0], input_rows]),
                                   torch.cat([previous[1], grad_rows], dim=2), scale)
            else:
                key = forward if previous is None else (forward, len(joined))
                joined[key] = (input_rows, grad_rows, scale)
        return list(joined.values())

    # -- statistics ----------------------------------------------------------------------
    @property
    def has_statistics(self) -> bool:
        return all(key in self.state for key in self.statistic_keys)

    @property
    def has_inverse(self) -> bool:
        return all(key in self.state for key in self.inverse_keys)

    def batch_statistics(self, num_forwards: int) -> Optional[Tensors]:
        raise NotImplementedError

    def statistic_shapes(self) -> Dict[str, Tuple[int, ...]]:
        """Shape of every statistic (and projected statistic), known before any capture."""
        raise NotImplementedError

    def projected_batch_statistics(self, view, num_forwards: int) -> Optional[Tensors]:
        """This batch's projected statistics in the basis of ``view`` (blocks with ``projected_keys``)."""
        raise NotImplementedError

    def blend_projected(self, batch: Optional[Tensors], view, rebased: bool, ema: float) -> Tensors:
        """New projected statistics; ``rebased``: the basis in ``view`` is new this step."""
        raise NotImplementedError

    def blend(self, batch: Tensors, ema: float) -> Tensors:
        """``ema * old + (1 - ema) * batch``; the first refresh takes ``batch`` as it is."""
        if not self.has_statistics:
            return {key: value.clone() for key, value in batch.items()}
        return {key: self.state[key].mul(ema).add_(batch[key], alpha=1.0 - ema) for key in batch}

    def rotated(self, view, grad_matrix: torch.Tensor) -> torch.Tensor:
        """``grad_matrix`` in the basis of ``view`` (blocks with ``follows_gradient``)."""
        raise NotImplementedError

    def gradient_scales(self, view, rotated: Optional[torch.Tensor], term_count: float, memory: float,
                        rebased: bool) -> Tensors:
        """New tensors from this step's gradient in the block's basis (blocks with ``follows_gradient``;
        ``rotated`` None: no gradient this step); ``rebased``: the basis in ``view`` is new this step.
        :meth:`precondition` then takes ``rotated=`` to skip rotating the same gradient again."""
        raise NotImplementedError

    def prepare_inverse(self, statistics: Tensors, damping: float,
                        want_spectrum: bool) -> Tuple[Tensors, dict]:
        """New inverse tensors and the diagnostics that came with them (traces, damping, spectra)."""
        raise NotImplementedError

    def inversion_plan(self, statistics: Tensors, damping: float) -> Optional["InversionPlan"]:
        """The same work as ``prepare_inverse(statistics, damping, False)`` split in two, so that the
        optimizer can invert the factors of many blocks together (:func:`ngopt.linalg.damped_inverses`);
        None where the block inverts in its own way (the default)."""
        return None

    def commit(self, tensors: Tensors) -> None:
        self.state.update(tensors)

    def fresh_copy(self) -> "LayerCurvature":
        """A block of the same kind for the same layer, with no statistics (e.g. for one probe batch)."""
        return type(self)(self.layer, {}, weight_sharing=self.weight_sharing)

    def rebind(self, state: dict) -> None:
        """Use ``state`` as the block's persistent tensors (after ``load_state_dict``).

        Kept memory is dropped: a loaded state may hold the very tensor set aside there.
        """
        self.state = state
        self.scratch.clear()

    def unscaled(self, batch: Tensors, loss_scale: float) -> Tensors:
        """``batch`` with the loss-weighted statistics divided by ``loss_scale`` (a loss scaler's factor)."""
        if loss_scale == 1.0:
            return batch
        return {key: value / loss_scale if key in self.loss_weighted_keys else value for key, value in batch.items()}

    # -- the step -----------------------------------------------------------------------
    def precondition(self, grad_matrix: torch.Tensor, damping: float, tensors=None) -> torch.Tensor:
        """``C^-1 grad`` as a gradient matrix; ``tensors`` (default: the block's state) holds the inverse.

        Blocks with ``writes_into`` also take ``out``: a tensor shaped like ``grad_matrix`` that the result
        is written into where its layout suits the block's products (the result is returned either way).
        """
        raise NotImplementedError

    def damped_product(self, matrix: torch.Tensor, damping: float) -> torch.Tensor:
        """``C v`` for the damped curvature ``C`` of this block, ``v`` given as a gradient matrix."""
        raise NotImplementedError

    def dense_curvature(self, damping: float = 0.0) -> torch.Tensor:
        """The block's (undamped unless asked) Fisher approximation as a dense matrix.

        Ordering: the column-major ``vec`` of the ``[d_out, d_in(+bias)]`` gradient
        matrix, i.e. ``grad_matrix.T.reshape(-1)``.
        """
        raise NotImplementedError

    def summary(self, damping: float, with_spectra: bool) -> dict:
        """Plain-number diagnostics of the block's current curvature (see ``spectra.py``)."""
        return {}

    def describe(self) -> str:
        return f"{self.layer.kind} {self.structure} [{self.layer.out_dim} x {self.layer.in_dim}]"
