"""Layer kinds: how a layer's inputs and output gradients become matrix rows.

For every supported layer the weight gradient of one example is a sum over
"positions" of outer products ``g_t a_t^T`` (Martens & Grosse 2015 for dense
layers; Grosse & Martens 2016 for convolutions, where ``a_t`` is the input
patch at output position ``t``).  A layer adapter turns the layer's input into
rows ``a`` shaped ``[N, T, d_in]`` (a trailing 1 appended for the bias) and an
output gradient into rows ``g`` shaped ``[..., N, T, d_out]``, and reads and
writes the parameter gradient as a matrix ``[d_out, d_in]`` whose last column
is the bias.  Nothing else in the package knows a layer kind.

Two kinds have rows of their own, read by their own blocks: an embedding's input
rows are its indices ``[N, T]`` (one-hot rows, never built), and a norm layer's
are ``x_hat`` per channel ``[N, T, C]`` (``blocks/embedding.py``, ``blocks/norm.py``).
"""
from __future__ import annotations

import warnings
from typing import Optional

import torch
from torch import nn
import torch.nn.functional as F

from .rows import HeldRows


class LayerAdapter:
    kind = "layer"
    # Share of a recorded batch's examples the statistics use when stats_fraction is left at None.
    default_stats_fraction = 1.0

    def __init__(self, module: nn.Module, name: str):
        self.module = module
        self.name = name
        self.weight: nn.Parameter = module.weight
        self.bias: Optional[nn.Parameter] = module.bias

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

    def _append_ones(self, rows: torch.Tensor) -> torch.Tensor:
        if not self.has_bias:
            return rows
        ones = torch.ones(rows.shape[:-1] + (1,), dtype=rows.dtype, device=rows.device)
        return torch.cat([rows, ones], dim=-1)

    def input_rows(self, inputs: torch.Tensor) -> torch.Tensor:
        raise NotImplementedError

    def recorded_rows(self, inputs: torch.Tensor):
        """The rows a recorded call keeps until the refresh: ``input_rows`` or a compact stand-in (``rows.py``)."""
        return self.input_rows(inputs)

    def output_rows(self, grads: torch.Tensor) -> torch.Tensor:
        """``grads`` is ``[K, *output.shape]``; returns ``[K, N, T, d_out]``."""
        raise NotImplementedError

    def gradient_matrix(self, weight_grad: torch.Tensor, bias_grad: Optional[torch.Tensor]) -> torch.Tensor:
        matrix = weight_grad.reshape(self.out_dim, -1)
        if not self.has_bias:
            return matrix
        if bias_grad is None:
            bias_grad = torch.zeros(self.out_dim, dtype=matrix.dtype, device=matrix.device)
        return torch.cat([matrix, bias_grad.unsqueeze(1)], dim=1)

    def split_matrix(self, matrix: torch.Tensor):
        """Inverse of :meth:`gradient_matrix`: ``(weight-shaped, bias-shaped or None)``."""
        if not self.has_bias:
            return matrix.reshape(self.weight.shape), None
        return matrix[:, :-1].reshape(self.weight.shape), matrix[:, -1]


class LinearLayer(LayerAdapter):
    """``nn.Linear`` with inputs of any leading shape ``[N, *, d_in]``; the middle dims are positions."""

    kind = "linear"

    def input_rows(self, inputs):
        if inputs.dim() == 1:
            inputs = inputs.unsqueeze(0)
        rows = inputs.reshape(inputs.shape[0], -1, inputs.shape[-1])
        return self._append_ones(rows)

    def output_rows(self, grads):
        if grads.dim() == 2:  # unbatched output
            grads = grads.unsqueeze(1)
        return grads.reshape(grads.shape[0], grads.shape[1], -1, grads.shape[-1])


class _ConvolutionLayer(LayerAdapter):
    """Convolutions (KFC): rows are input patches at every output position."""

    spatial_dims = 2
    # The input factor costs 2 (C k^2)^2 B H W flops, about 9x the layer's forward for a 3x3
    # layer with C_in = C_out, and the patches of one example are many rows already: a quarter of
    # the examples cut a refresh about 3.5-fold with no more steps to target on the benchmark's CNNs.
    default_stats_fraction = 0.25

    def _explicit_padding(self):
        """Padding as ``F.pad`` takes it (last dim first), for every padding mode and 'same'/'valid'."""
        module = self.module
        if module.padding == "valid":
            return (0, 0) * self.spatial_dims
        if module.padding == "same":
            pads = []
            for dilation, kernel in zip(reversed(module.dilation), reversed(module.kernel_size)):
                total = dilation * (kernel - 1)
                pads += [total // 2, total - total // 2]
            return tuple(pads)
        return tuple(module._reversed_padding_repeated_twice)

    def _patches(self, padded):
        raise NotImplementedError

    def _patch_rows(self, inputs):
        """``[N, L, C*prod(kernel)]``: the input patch at every output position."""
        module = self.module
        if inputs.dim() == self.spatial_dims + 1:  # unbatched
            inputs = inputs.unsqueeze(0)
        mode = "constant" if module.padding_mode == "zeros" else module.padding_mode
        padded = F.pad(inputs, self._explicit_padding(), mode=mode)
        return self._patches(padded).transpose(1, 2)

    def input_rows(self, inputs):
        return self._append_ones(self._patch_rows(inputs))

    def recorded_rows(self, inputs):
        # The input, not its prod(kernel) times larger patches: blocks unfold a chunk at a time.
        if inputs.dim() == self.spatial_dims + 1:  # unbatched
            inputs = inputs.unsqueeze(0)
        return HeldRows(self.input_rows, inputs)

    def output_rows(self, grads):
        if grads.dim() == self.spatial_dims + 2:  # unbatched output [K, C, *spatial]
            grads = grads.unsqueeze(1)
        k, n, c = grads.shape[:3]
        return grads.reshape(k, n, c, -1).transpose(2, 3)


class Conv2dLayer(_ConvolutionLayer):
    """``nn.Conv2d`` with ``groups=1`` (``groups > 1``: ``GroupedConv2dLayer``)."""

    kind = "conv2d"

    def _patches(self, padded):
        module = self.module
        return F.unfold(padded, module.kernel_size, dilation=module.dilation, stride=module.stride)


class Conv1dLayer(_ConvolutionLayer):
    """``nn.Conv1d`` with ``groups=1``: the 2-d patches of a height-1 image, in the weight's (c, i) order."""

    kind = "conv1d"
    spatial_dims = 1

    def _patches(self, padded):
        module = self.module
        return F.unfold(padded.unsqueeze(2), (1, module.kernel_size[0]), dilation=(1, module.dilation[0]),
                        stride=(1, module.stride[0]))


class _GroupedRows:
    """Convolutions with ``groups > 1``: rows per group, ``[N, L, groups, d (+1)]`` and ``[K, N, L, groups, o]``.

    ``d = C_in / groups * prod(kernel)``: the patch of a group's own input channels (the
    patch's channel-major order puts them next to each other); ``o = C_out / groups``.
    """

    def input_rows(self, inputs):
        patches = self._patch_rows(inputs)
        groups = self.module.groups
        return self._append_ones(patches.reshape(patches.shape[0], patches.shape[1], groups, -1))

    def output_rows(self, grads):
        rows = super().output_rows(grads)
        return rows.reshape(rows.shape[:-1] + (self.module.groups, -1))


class GroupedConv2dLayer(_GroupedRows, Conv2dLayer):
    kind = "grouped_conv2d"


class GroupedConv1dLayer(_GroupedRows, Conv1dLayer):
    kind = "grouped_conv1d"


class EmbeddingLayer(LayerAdapter):
    """``nn.Embedding`` seen as a dense layer on one-hot inputs: ``s = W^T onehot(i)``.

    The gradient matrix is ``W^T``-shaped, ``[d, V]`` (``out_dim = d``, ``in_dim = V``,
    no bias), so one example's gradient is ``sum_t g_t onehot(i_t)^T`` as for Linear.
    The input rows are the index tensor itself, ``[N, T]`` (long): one-hot rows are
    never built.  The leading index dimension is the batch, the rest are positions:
    index with a batch (position indices expanded to ``[N, T]``), since an index
    tensor without one would make its positions count as examples.
    """

    kind = "embedding"

    def __init__(self, module: nn.Embedding, name: str):
        self.module = module
        self.name = name
        self.weight = module.weight
        self.bias = None

    @property
    def out_dim(self) -> int:
        return self.weight.shape[1]

    @property
    def in_dim(self) -> int:
        return self.weight.shape[0]

    @property
    def padding_idx(self) -> Optional[int]:
        return self.module.padding_idx

    def input_rows(self, inputs):
        if inputs.dim() == 0:
            inputs = inputs.reshape(1)
        return inputs.reshape(inputs.shape[0], -1)

    def output_rows(self, grads):
        if grads.dim() == 2:  # a single index: output [d]
            grads = grads.unsqueeze(1)
        return grads.reshape(grads.shape[0], grads.shape[1], -1, grads.shape[-1])

    def gradient_matrix(self, weight_grad, bias_grad=None):
        return weight_grad.T

    def split_matrix(self, matrix):
        return matrix.T, None


class _NormLayer(LayerAdapter):
    """Elementwise affine ``y = gamma x_hat + beta`` per channel: a scalar "linear layer" per channel.

    The gradient matrix is ``[C, 1 (+1)]``: column 0 the ``gamma`` gradient, the last
    column the ``beta`` gradient (the bias, as for the other layers), ``C`` the number of
    affine parameters.  Input rows are ``x_hat`` recomputed from the layer's input,
    ``[N, T, C]``; output-gradient rows ``[K, N, T, C]`` on the same positions.
    """

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


class LayerNormLayer(_NormLayer):
    """``nn.LayerNorm`` with ``elementwise_affine=True`` (with or without bias), any ``normalized_shape``."""

    kind = "layer_norm"

    def _batched(self, tensor, extra):
        unbatched = tensor.dim() - extra == len(self.module.normalized_shape)
        return tensor.unsqueeze(extra) if unbatched else tensor

    def input_rows(self, inputs):
        module = self.module
        inputs = self._batched(inputs, 0)
        normalized = F.layer_norm(inputs, module.normalized_shape, eps=module.eps)
        return normalized.reshape(inputs.shape[0], -1, self.out_dim)

    def output_rows(self, grads):
        grads = self._batched(grads, 1)
        return grads.reshape(grads.shape[0], grads.shape[1], -1, self.out_dim)


class BatchNormLayer(_NormLayer):
    """``nn.BatchNorm1d/2d/3d`` with ``affine=True`` in training mode: ``x_hat`` from the batch statistics.

    The batch statistics couple the examples, but not through ``gamma`` and ``beta``:
    ``x_hat`` does not depend on them, so the per-example gradients in them are
    ``sum_t g x_hat`` and ``sum_t g`` as for any elementwise affine map.
    """

    kind = "batch_norm"

    def input_rows(self, inputs):
        normalized = F.batch_norm(inputs, None, None, training=True, eps=self.module.eps)
        return normalized.reshape(inputs.shape[0], inputs.shape[1], -1).transpose(1, 2)

    def recorded_rows(self, inputs):
        # The input and its per-channel batch moments, not a second input-sized x_hat: rows are
        # normalized a chunk of examples at a time.
        dims = [0] + list(range(2, inputs.dim()))
        shape = (1, -1) + (1,) * (inputs.dim() - 2)
        variance, mean = torch.var_mean(inputs, dim=dims, correction=0)
        mean, scale = mean.reshape(shape), torch.rsqrt(variance + self.module.eps).reshape(shape)

        def normalized_rows(part):
            return ((part - mean) * scale).reshape(part.shape[0], part.shape[1], -1).transpose(1, 2)
        return HeldRows(normalized_rows, inputs)

    def output_rows(self, grads):
        k, n, c = grads.shape[:3]
        return grads.reshape(k, n, c, -1).transpose(2, 3)


class GroupNormLayer(_NormLayer):
    """``nn.GroupNorm`` with ``affine=True``: ``x_hat`` normalised per example and group, affine per channel."""

    kind = "group_norm"

    def input_rows(self, inputs):
        normalized = F.group_norm(inputs, self.module.num_groups, eps=self.module.eps)
        return normalized.reshape(inputs.shape[0], inputs.shape[1], -1).transpose(1, 2)

    def output_rows(self, grads):
        k, n, c = grads.shape[:3]
        return grads.reshape(k, n, c, -1).transpose(2, 3)


class InstanceNormLayer(GroupNormLayer):
    """``nn.InstanceNorm1d/2d/3d`` with ``affine=True`` in training mode: one group per channel.

    With ``track_running_stats=True`` training mode still normalises by the input's own
    statistics, which is what the rows use.
    """

    kind = "instance_norm"

    def _batched(self, tensor, extra):
        unbatched = tensor.dim() - extra == self.module._get_no_batch_dim()
        return tensor.unsqueeze(extra) if unbatched else tensor

    def input_rows(self, inputs):
        inputs = self._batched(inputs, 0)
        normalized = F.instance_norm(inputs, eps=self.module.eps)
        return normalized.reshape(inputs.shape[0], inputs.shape[1], -1).transpose(1, 2)

    def output_rows(self, grads):
        return super().output_rows(self._batched(grads, 1))


class RMSNormLayer(LayerNormLayer):
    """``nn.RMSNorm`` (torch >= 2.4): ``y = gamma x / rms(x)``, a weight and no bias."""

    kind = "rms_norm"

    def __init__(self, module, name):
        self.module, self.name, self.weight, self.bias = module, name, module.weight, None

    def input_rows(self, inputs):
        module = self.module
        inputs = self._batched(inputs, 0)
        normalized = F.rms_norm(inputs, module.normalized_shape, eps=module.eps)
        return normalized.reshape(inputs.shape[0], -1, self.out_dim)


def _plain(module: nn.Module, cls) -> bool:
    """An instance of ``cls`` that computes what ``cls`` computes (subclasses may change the forward)."""
    return isinstance(module, cls) and type(module).forward is cls.forward


# nn.MultiheadAttention's out_proj: its forward never runs; blocks/attention.py adapts it with its owner.
_ATTENTION_OUTPUT = getattr(nn.modules.linear, "NonDynamicallyQuantizableLinear", None)
_RMS_NORM = getattr(nn, "RMSNorm", None)  # torch >= 2.4


def adapter_for(module: nn.Module, name: str) -> Optional[LayerAdapter]:
    """The adapter for a supported layer, ``None`` (with a warning where useful) otherwise."""
    if _ATTENTION_OUTPUT is not None and type(module) is _ATTENTION_OUTPUT:
        return None
    if _plain(module, nn.Linear):
        return LinearLayer(module, name)
    for cls, adapter, grouped in ((nn.Conv2d, Conv2dLayer, GroupedConv2dLayer),
                                  (nn.Conv1d, Conv1dLayer, GroupedConv1dLayer)):
        if _plain(module, cls):
            return adapter(module, name) if module.groups == 1 else grouped(module, name)
    if _plain(module, nn.Embedding):
        return _embedding_adapter(module, name)
    if _plain(module, nn.LayerNorm) and module.weight is not None:
        return LayerNormLayer(module, name)
    if isinstance(module, (nn.BatchNorm1d, nn.BatchNorm2d, nn.BatchNorm3d)) \
            and type(module).forward is nn.modules.batchnorm._BatchNorm.forward and module.affine:
        return BatchNormLayer(module, name)
    if _plain(module, nn.GroupNorm) and module.affine:
        return GroupNormLayer(module, name)
    if isinstance(module, nn.modules.instancenorm._InstanceNorm) \
            and type(module).forward is nn.modules.instancenorm._InstanceNorm.forward and module.affine:
        return InstanceNormLayer(module, name)
    if _RMS_NORM is not None and _plain(module, _RMS_NORM) and module.weight is not None:
        return RMSNormLayer(module, name)
    return None


def _embedding_adapter(module: nn.Embedding, name: str) -> Optional[EmbeddingLayer]:
    if module.sparse and module.weight.requires_grad:
        # The optimizer's finiteness checks and fallback rules work on dense gradients only.
        raise ValueError(f"{name}: nn.Embedding(sparse=True) is not supported (sparse gradients); "
                         "use sparse=False, or freeze the embedding (weight.requires_grad_(False))")
    if module.scale_grad_by_freq:
        warnings.warn(f"{name}: nn.Embedding(scale_grad_by_freq=True) scales gradients by batch counts, which "
                      "the Kronecker block does not describe; its weight uses the fallback rule", stacklevel=4)
        return None
    return EmbeddingLayer(module, name)
