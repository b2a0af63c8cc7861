"""Curvature blocks: one per supported layer, composed of a layer adapter and a curvature kind."""
from .base import CurvatureBlock
from .diagonal import DiagonalBlock
from .kronecker import KroneckerBlock
from .layers import Conv2dLayer, LayerAdapter, LinearLayer, adapter_for

__all__ = ["CurvatureBlock", "DiagonalBlock", "KroneckerBlock", "Conv2dLayer", "LayerAdapter",
           "LinearLayer", "adapter_for"]
