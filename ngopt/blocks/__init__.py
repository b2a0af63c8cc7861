"""Curvature blocks: one per supported layer, composed of a layer adapter and a curvature kind."""
from .base import CurvatureBlock
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .factory import CURVATURES, block_class, make_block
from .kronecker import KroneckerBlock
from .layers import Conv2dLayer, LayerAdapter, LinearLayer, adapter_for

__all__ = ["CurvatureBlock", "DiagonalBlock", "EigenbasisBlock", "KroneckerBlock", "Conv2dLayer",
           "LayerAdapter", "LinearLayer", "adapter_for", "CURVATURES", "block_class", "make_block"]
