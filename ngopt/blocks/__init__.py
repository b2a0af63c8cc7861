"""Curvature blocks: one per supported layer, composed of a layer adapter and a curvature kind."""
from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .embedding import EmbeddingDiagonalBlock, EmbeddingEigenbasisBlock, EmbeddingKroneckerBlock
from .factory import STRUCTURES, LAYER_BLOCKS, block_class, make_block
from .kronecker import KroneckerBlock
from .layers import (BatchNormLayer, Conv1dLayer, Conv2dLayer, EmbeddingLayer, LayerAdapter, LayerNormLayer,
                     LinearLayer, adapter_for)
from .norm import NormDiagonalBlock, NormPairBlock

__all__ = ["LayerCurvature", "DiagonalBlock", "EigenbasisBlock", "KroneckerBlock", "EmbeddingKroneckerBlock",
           "EmbeddingEigenbasisBlock", "EmbeddingDiagonalBlock", "NormPairBlock", "NormDiagonalBlock",
           "Conv1dLayer", "Conv2dLayer", "EmbeddingLayer", "LayerNormLayer", "BatchNormLayer",
           "LayerAdapter", "LinearLayer", "adapter_for", "STRUCTURES", "LAYER_BLOCKS", "block_class",
           "make_block"]
