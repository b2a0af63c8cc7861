"""Curvature blocks: one per parameter (with its bias), composed of a layer adapter and a curvature kind."""
from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .embedding import EmbeddingDiagonalBlock, EmbeddingEigenbasisBlock, EmbeddingKroneckerBlock
from .factory import LAYER_BLOCKS, STRUCTURES, block_class, block_for_uses, make_block
from .kronecker import KroneckerBlock
from .layers import ChannelLayer, ConvolutionLayer, EmbeddingLayer, LayerAdapter, LinearLayer
from .norm import NormDiagonalBlock, NormPairBlock
from .tied import TiedDiagonalBlock, TiedKroneckerBlock

__all__ = ["LayerCurvature", "DiagonalBlock", "EigenbasisBlock", "KroneckerBlock", "EmbeddingKroneckerBlock",
           "EmbeddingEigenbasisBlock", "EmbeddingDiagonalBlock", "NormPairBlock", "NormDiagonalBlock",
           "TiedKroneckerBlock", "TiedDiagonalBlock", "ChannelLayer", "ConvolutionLayer", "EmbeddingLayer",
           "LayerAdapter", "LinearLayer", "STRUCTURES", "LAYER_BLOCKS", "block_class", "block_for_uses",
           "make_block"]
