"""Statistics from a random subset of the recorded examples (``stats_fraction`` < 1).

Every statistic a block forms is either a sum over the examples of the call,
``S = sum_n f_n`` (the output factor ``G``, EKFAC's scales, the exact diagonal,
the norm-layer pairs), which the block weighs by the capture's ``scale``, or a
mean over rows, ``A = mean_{n,t} a a^T``, with the same number of rows per
example.  Keeping ``m = round(fraction * N)`` examples drawn uniformly without
replacement and multiplying the scale by ``N / m`` leaves both unbiased: each
example is kept with probability ``m / N``.  Grosse & Martens 2016 (sec. 5)
estimate the factors from part of the batch in the same spirit.

The calls of one forward (a layer applied several times) keep the same
examples, so that per-example sums over their positions stay whole.
"""
from __future__ import annotations

import warnings
from typing import Dict, Optional, Tuple

import torch

from .rows import HeldRows


FEW_EXAMPLES = 4  # fewer kept examples than this per refresh: warn once


class ExampleSubsample:
    """Draws the kept examples of each recorded forward from a private CPU generator."""

    def __init__(self, fraction: float, seed: int = 0, generator: Optional[torch.Generator] = None):
        self.fraction = fraction
        # Blocks with different fractions may share one generator (one state to save and restore).
        self.generator = generator if generator is not None else torch.Generator().manual_seed(seed)
        self._warned = False

    def kept(self, examples: int) -> torch.Tensor:
        count = max(1, round(self.fraction * examples))
        if count < min(FEW_EXAMPLES, examples) and not self._warned:
            self._warned = True
            warnings.warn(f"stats_fraction={self.fraction:g} keeps {count} of the batch's {examples} examples for "
                          "the curvature statistics: factors from so few examples are noisy. Pass "
                          "stats_fraction=1.0 (or a larger batch)", stacklevel=2)
        return torch.randperm(examples, generator=self.generator)[:count].sort().values

    def take(self, subsets: Dict[Tuple, torch.Tensor], forward, input_rows, grad_rows, scale: float):
        """``(input rows, grad rows, scale)`` of the kept examples; ``subsets`` shares them within a forward."""
        examples = input_rows.shape[0]
        if grad_rows.dim() < 2 or grad_rows.shape[1] != examples or examples < 2:
            return input_rows, grad_rows, scale  # rows not laid out by example: all of them count
        key = (forward, examples)
        if key not in subsets:
            subsets[key] = self.kept(examples)
        kept = subsets[key]
        grad_rows = grad_rows.index_select(1, kept.to(grad_rows.device))
        if isinstance(input_rows, HeldRows):
            input_rows = input_rows.select(kept)
        else:
            input_rows = input_rows.index_select(0, kept.to(input_rows.device))
        return input_rows, grad_rows, scale * examples / kept.shape[0]
