"""Which curvature block a layer gets: its layer kind and the chosen curvature kind decide."""
from __future__ import annotations

from typing import Dict, Type

from .base import CurvatureBlock
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .embedding import EmbeddingDiagonalBlock, EmbeddingEigenbasisBlock, EmbeddingKroneckerBlock
from .kronecker import KroneckerBlock
from .layers import LayerAdapter
from .norm import NormDiagonalBlock, NormPairBlock

# Blocks built from the generic rows a = inputs, g = output gradients (Linear, Conv1d, Conv2d).
CURVATURES: Dict[str, Type[CurvatureBlock]] = {
    "kfac": KroneckerBlock, "ekfac": EigenbasisBlock, "diag": DiagonalBlock,
}
# Layer kinds whose curvature has a structure of its own: {layer kind: {curvature: block class}}.
# Norm layers: "kfac" and "ekfac" both give the exact per-channel 2x2 blocks (blocks/norm.py).
_NORM_BLOCKS = {"kfac": NormPairBlock, "ekfac": NormPairBlock, "diag": NormDiagonalBlock}
LAYER_BLOCKS: Dict[str, Dict[str, Type[CurvatureBlock]]] = {
    "embedding": {"kfac": EmbeddingKroneckerBlock, "ekfac": EmbeddingEigenbasisBlock,
                  "diag": EmbeddingDiagonalBlock},
    "layer_norm": _NORM_BLOCKS,
    "batch_norm": _NORM_BLOCKS,
}


def block_class(layer: LayerAdapter, curvature: str) -> Type[CurvatureBlock]:
    if curvature not in CURVATURES:
        raise ValueError(f"curvature must be one of {tuple(CURVATURES)}, got {curvature!r}")
    return LAYER_BLOCKS.get(layer.kind, CURVATURES)[curvature]


def make_block(layer: LayerAdapter, curvature: str, state: dict, weight_sharing: str = "expand") -> CurvatureBlock:
    return block_class(layer, curvature)(layer, state, weight_sharing=weight_sharing)
