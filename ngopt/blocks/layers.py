"""Layer kinds: the geometry of a parameter's use, as the curvature blocks see it.

For every supported use the weight gradient of one example is a sum over
"positions" of outer products ``g_t a_t^T`` (Martens & Grosse 2015 for dense
layers; Grosse & Martens 2016 for convolutions, where ``a_t`` is the input
patch at output position ``t``).  A layer adapter knows the sizes of that
product and how to read and write the parameter gradient as a matrix
``[d_out, d_in]`` whose last column is the bias.  How a call's inputs and output
gradients become rows ``a`` (``[N, T, d_in]``, a trailing 1 for the bias) and ``g``
(``[K, N, T, d_out]``) is the use's business (``ngopt/uses/``); nothing else in the
package knows a layer kind.

Two kinds have rows of their own, read by their own blocks: an embedding's input
rows are its indices ``[N, T]`` (one-hot rows, never built), and a norm layer's
or an elementwise scale's are ``x_hat`` per channel ``[N, T, C]``
(``blocks/embedding.py``, ``blocks/norm.py``).
"""
from __future__ import annotations

from typing import Optional

import torch
from torch import nn


class LayerAdapter:
    kind = "layer"
    # Share of a recorded batch's examples the statistics use when stats_fraction is left at None.
    default_stats_fraction = 1.0

    def __init__(self, name: str, weight: nn.Parameter, bias: Optional[nn.Parameter] = None):
        self.name = name
        self.weight = weight
        self.bias = bias

    @property
    def has_bias(self) -> bool:
        return self.bias is not None

    @property
    def out_dim(self) -> int:
        return self.weight.shape[0]

    @property
    def in_dim(self) -> int:
        """Input-factor size, bias column included."""
        return self.weight[0].numel() + int(self.has_bias)

    def params(self):
        return [self.weight] + ([self.bias] if self.has_bias else [])

    def gradient_matrix(self, weight_grad: torch.Tensor, bias_grad: Optional[torch.Tensor],
                        out: Optional[torch.Tensor] = None) -> torch.Tensor:
        """``[d_out, d_in (+1)]``; with a bias, a new tensor (written into ``out`` when given, of that shape)."""
        matrix = weight_grad.reshape(self.out_dim, -1)
        if not self.has_bias:
            return matrix
        if bias_grad is None:
            bias_grad = torch.zeros(self.out_dim, dtype=matrix.dtype, device=matrix.device)
        parts = [matrix, bias_grad.reshape(self.out_dim, 1)]
        return torch.cat(parts, dim=1) if out is None else torch.cat(parts, dim=1, out=out)

    def split_matrix(self, matrix: torch.Tensor):
        """Inverse of :meth:`gradient_matrix`: ``(weight-shaped, bias-shaped or None)``."""
        if not self.has_bias:
            return matrix.reshape(self.weight.shape), None
        return matrix[:, :-1].reshape(self.weight.shape), matrix[:, -1].reshape(self.bias.shape)


class LinearLayer(LayerAdapter):
    """A linear map ``s = W a (+ b)`` with ``W`` stored ``[d_out, d_in]``, or ``[d_in, d_out]`` when ``transposed``.

    ``F.linear(x, W, b)`` applies the first orientation; ``torch.addmm(b, x, W)`` or ``x @ W``
    the second (a transposed-weight projection).  The gradient matrix is always ``[d_out, d_in (+1)]``.
    """

    kind = "linear"

    def __init__(self, name, weight, bias=None, transposed: bool = False, kind: str = None):
        super().__init__(name, weight, bias)
        self.transposed = transposed
        if kind is not None:
            self.kind = kind

    @property
    def out_dim(self) -> int:
        return self.weight.shape[1] if self.transposed else self.weight.shape[0]

    @property
    def in_dim(self) -> int:
        return (self.weight.shape[0] if self.transposed else self.weight.shape[1]) + int(self.has_bias)

    def gradient_matrix(self, weight_grad, bias_grad, out=None):
        return super().gradient_matrix(weight_grad.T if self.transposed else weight_grad, bias_grad, out)

    def split_matrix(self, matrix):
        if not self.transposed:
            return super().split_matrix(matrix)
        weight = (matrix[:, :-1] if self.has_bias else matrix).T
        return weight, (matrix[:, -1].reshape(self.bias.shape) if self.has_bias else None)


class ConvolutionLayer(LayerAdapter):
    """A 1-d or 2-d convolution (KFC): rows are input patches at every output position.

    With ``groups > 1`` (grouped and depthwise) the kind is ``grouped_conv1d/2d``: rows per
    group, ``[N, T, groups, d (+1)]`` and ``[K, N, T, groups, o]`` (``blocks/grouped.py``).
    """

    # The input factor costs 2 (C k^2)^2 B H W flops, about 9x the layer's forward for a 3x3
    # layer with C_in = C_out, and the patches of one example are many rows already: a quarter of
    # the examples cut a refresh about 3.5-fold with no more steps to target on the benchmark's CNNs.
    default_stats_fraction = 0.25

    def __init__(self, name, weight, bias=None, groups: int = 1):
        super().__init__(name, weight, bias)
        self.groups = groups
        spatial = weight.dim() - 2
        self.kind = f"{'grouped_' if groups > 1 else ''}conv{spatial}d"


class EmbeddingLayer(LayerAdapter):
    """An embedding lookup seen as a dense layer on one-hot inputs: ``s = W^T onehot(i)``.

    The gradient matrix is ``W^T``-shaped, ``[d, V]`` (``out_dim = d``, ``in_dim = V``,
    no bias), so one example's gradient is ``sum_t g_t onehot(i_t)^T`` as for a linear
    map.  The input rows are the index tensor itself, ``[N, T]`` (long): one-hot rows
    are never built.
    """

    kind = "embedding"

    def __init__(self, name, weight, padding_idx: Optional[int] = None):
        super().__init__(name, weight, None)
        self.padding_idx = padding_idx

    @property
    def out_dim(self) -> int:
        return self.weight.shape[1]

    @property
    def in_dim(self) -> int:
        return self.weight.shape[0]

    def gradient_matrix(self, weight_grad, bias_grad=None):
        return weight_grad.T

    def split_matrix(self, matrix):
        return matrix.T, None


class ChannelLayer(LayerAdapter):
    """An elementwise affine map ``y = gamma x_hat (+ beta)`` per channel: a scalar "linear layer" per channel.

    Norm layers (``layer_norm``, ``batch_norm``, ``group_norm``, ``instance_norm``,
    ``rms_norm``: ``x_hat`` the normalized input), an elementwise scale by a parameter
    (``scale``: ``x_hat`` the other operand) and an elementwise shift (``shift``: the
    parameter is the ``beta`` with no ``gamma``, ``x_hat = 1``).  The gradient matrix is
    ``[C, 1 (+1)]``: column 0 the ``gamma`` gradient, the last column the ``beta``
    gradient, ``C`` the number of parameter elements.
    """

    def __init__(self, name, weight, bias=None, kind: str = "layer_norm"):
        super().__init__(name, weight, bias)
        self.kind = kind

    @property
    def out_dim(self) -> int:
        return self.weight.numel()

    @property
    def in_dim(self) -> int:
        return 1 + int(self.has_bias)

    def gradient_matrix(self, weight_grad, bias_grad=None):
        matrix = weight_grad.reshape(-1, 1)
        if not self.has_bias:
            return matrix
        if bias_grad is None:
            bias_grad = torch.zeros_like(matrix)
        return torch.cat([matrix, bias_grad.reshape(-1, 1)], dim=1)

    def split_matrix(self, matrix):
        weight = matrix[:, 0].reshape(self.weight.shape)
        return weight, (matrix[:, 1].reshape(self.bias.shape) if self.has_bias else None)
