"""Where the examples sit in a tensor that an operation applies a parameter to.

Curvature blocks read rows as ``[N, T, d]``: ``N`` examples of the model's batch,
``T`` positions per example (sequence positions, pixels, several rows of one
example), ``d`` features.  The operation's own tensor may hold its examples in
the first dimension (``[N, ..., d]``), flattened with their positions
(``x.view(-1, d)`` of ``[N, T, d]``, as a transposed-weight projection does before
``addmm``), in the second dimension (sequence-first layouts ``[T, N, d]``), or
not at all (an unbatched vector).  The model's batch size ``N``, read from its
first tensor argument, tells them apart; when it cannot (no batch size, or a
first dimension that is not a multiple of it) the first dimension counts as the
examples, the convention of every torch layer.
"""
from __future__ import annotations

from typing import Tuple

import torch


def example_layout(lead: Tuple[int, ...], examples: int) -> str:
    """``"first"``, ``"second"``, ``"flattened"`` or ``"single"`` for leading dims ``lead`` (features excluded)."""
    if not lead:
        return "single"
    first = lead[0]
    if examples <= 0 or first == examples:
        return "first"
    if len(lead) >= 2 and lead[1] == examples:
        return "second"
    if first > examples and first % examples == 0:
        return "flattened"
    return "first"


def as_rows(tensor: torch.Tensor, features: int, layout: str, examples: int) -> torch.Tensor:
    """``tensor [*lead, features]`` (features flattened last) as ``[N, T, features]``."""
    if layout == "single":
        return tensor.reshape(1, 1, features)
    if layout == "second":
        tensor = tensor.movedim(1, 0)
    if layout == "flattened":
        return tensor.reshape(examples, -1, features)
    return tensor.reshape(tensor.shape[0], -1, features)


def as_grad_rows(grads: torch.Tensor, features: int, layout: str, examples: int) -> torch.Tensor:
    """``grads [K, *lead, features]`` as ``[K, N, T, features]``."""
    k = grads.shape[0]
    if layout == "single":
        return grads.reshape(k, 1, 1, features)
    if layout == "second":
        grads = grads.movedim(2, 1)
    if layout == "flattened":
        return grads.reshape(k, examples, -1, features)
    return grads.reshape(k, grads.shape[1], -1, features)
