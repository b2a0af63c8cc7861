"""Which curvature block a layer gets: its layer kind and the chosen structure decide."""
from __future__ import annotations

from typing import Dict, List, Type

from torch import nn

from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .embedding import EmbeddingDiagonalBlock, EmbeddingEigenbasisBlock, EmbeddingKroneckerBlock
from .grouped import GroupedDiagonalBlock, GroupedEigenbasisBlock, GroupedKroneckerBlock
from .kronecker import KroneckerBlock
from .attention import attention_adapters
from .layers import LayerAdapter, _plain, adapter_for
from .norm import NormDiagonalBlock, NormPairBlock

# Blocks built from the generic rows a = inputs, g = output gradients (Linear, Conv1d, Conv2d).
STRUCTURES: Dict[str, Type[LayerCurvature]] = {
    "kfac": KroneckerBlock, "ekfac": EigenbasisBlock, "diag": DiagonalBlock,
}
# Layer kinds whose curvature has a structure of its own: {layer kind: {structure: block class}}.
# Norm layers: "kfac" and "ekfac" both give the exact per-channel 2x2 blocks (blocks/norm.py).
_NORM_BLOCKS = {"kfac": NormPairBlock, "ekfac": NormPairBlock, "diag": NormDiagonalBlock}
# Grouped convolutions: a block-diagonal output factor, one input factor shared by the groups (blocks/grouped.py).
_GROUPED_BLOCKS = {"kfac": GroupedKroneckerBlock, "ekfac": GroupedEigenbasisBlock, "diag": GroupedDiagonalBlock}
LAYER_BLOCKS: Dict[str, Dict[str, Type[LayerCurvature]]] = {
    "embedding": {"kfac": EmbeddingKroneckerBlock, "ekfac": EmbeddingEigenbasisBlock,
                  "diag": EmbeddingDiagonalBlock},
    "layer_norm": _NORM_BLOCKS,
    "batch_norm": _NORM_BLOCKS,
    "grouped_conv1d": _GROUPED_BLOCKS,
    "grouped_conv2d": _GROUPED_BLOCKS,
    "group_norm": _NORM_BLOCKS,
    "instance_norm": _NORM_BLOCKS,
    "rms_norm": _NORM_BLOCKS,
}


def adapters_for(module: nn.Module, name: str) -> List[LayerAdapter]:
    """The adapters of every layer ``module`` applies itself (several for attention), ``[]`` if none."""
    if _plain(module, nn.MultiheadAttention):
        return attention_adapters(module, name)
    layer = adapter_for(module, name)
    return [] if layer is None else [layer]


def block_class(layer: LayerAdapter, structure: str) -> Type[LayerCurvature]:
    if structure not in STRUCTURES:
        raise ValueError(f"structure must be one of {tuple(STRUCTURES)}, got {structure!r}")
    return LAYER_BLOCKS.get(layer.kind, STRUCTURES)[structure]


# Layers whose input is a constant: summing positions first ("reduce") gives their exact Fisher.
_CONSTANT_INPUT_KINDS = ("attention_in_bias",)


def make_block(layer: LayerAdapter, structure: str, state: dict, weight_sharing: str = "expand") -> LayerCurvature:
    if layer.kind in _CONSTANT_INPUT_KINDS:
        weight_sharing = "reduce"
    return block_class(layer, structure)(layer, state, weight_sharing=weight_sharing)
