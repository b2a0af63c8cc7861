"""Layer kinds: how a layer's inputs and output gradients become matrix rows.

For every supported layer the weight gradient of one example is a sum over
"positions" of outer products ``g_t a_t^T`` (Martens & Grosse 2015 for dense
layers; Grosse & Martens 2016 for convolutions, where ``a_t`` is the input
patch at output position ``t``).  A layer adapter turns the layer's input into
rows ``a`` shaped ``[N, T, d_in]`` (a trailing 1 appended for the bias) and an
output gradient into rows ``g`` shaped ``[..., N, T, d_out]``, and reads and
writes the parameter gradient as a matrix ``[d_out, d_in]`` whose last column
is the bias.  Nothing else in the package knows a layer kind.
"""
from __future__ import annotations

import warnings
from typing import Optional

import torch
from torch import nn
import torch.nn.functional as F


class LayerAdapter:
    kind = "layer"

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


class Conv2dLayer(LayerAdapter):
    """``nn.Conv2d`` with ``groups=1`` (KFC): rows are input patches at every output position."""

    kind = "conv2d"

    def _explicit_padding(self):
        """Padding as ``F.pad`` takes it (last dim first), for every padding mode and 'same'/'valid'."""
        module = self.module
        if module.padding == "valid":
            return (0, 0, 0, 0)
        if module.padding == "same":
            pads = []
            for dilation, kernel in zip(reversed(module.dilation), reversed(module.kernel_size)):
                total = dilation * (kernel - 1)
                pads += [total // 2, total - total // 2]
            return tuple(pads)
        return tuple(module._reversed_padding_repeated_twice)

    def input_rows(self, inputs):
        module = self.module
        if inputs.dim() == 3:
            inputs = inputs.unsqueeze(0)
        mode = "constant" if module.padding_mode == "zeros" else module.padding_mode
        padded = F.pad(inputs, self._explicit_padding(), mode=mode)
        patches = F.unfold(padded, module.kernel_size, dilation=module.dilation, stride=module.stride)
        return self._append_ones(patches.transpose(1, 2))  # [N, L, C*kh*kw]

    def output_rows(self, grads):
        if grads.dim() == 4:  # unbatched output [K, C, H, W]
            grads = grads.unsqueeze(1)
        k, n, c = grads.shape[:3]
        return grads.reshape(k, n, c, -1).transpose(2, 3)


def adapter_for(module: nn.Module, name: str) -> Optional[LayerAdapter]:
    """The adapter for a supported layer, ``None`` (with a warning where useful) otherwise."""
    if type(module) is nn.Linear or (isinstance(module, nn.Linear) and type(module).forward is nn.Linear.forward):
        return LinearLayer(module, name)
    if isinstance(module, nn.Conv2d) and type(module).forward is nn.Conv2d.forward:
        if module.groups != 1:
            warnings.warn(f"{name}: Conv2d with groups={module.groups} has no Kronecker block; "
                          "its parameters use the fallback rule", stacklevel=3)
            return None
        return Conv2dLayer(module, name)
    return None
