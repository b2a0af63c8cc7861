"""Diagonal Fisher curvature: the exact diagonal of the per-layer Fisher.

    F_diag = (1/c) sum over examples of (sum over positions g a^T)^2   (elementwise)

where a layer called several times in one forward contributes all its calls'
positions to the same example's sum, using the same rows and scale as the
Kronecker block.  For one position per
example the sum of squares is ``(g*g)^T (a*a)``, with no per-example matrices.
Damping is added directly, ``(F_diag + lambda)^-1``, at every step, so a change
of ``damping`` takes effect at once.
"""
from __future__ import annotations

import torch

from ..spectra import diagonal_summary
from .base import LayerCurvature
from .rows import example_slice, materialize

_PER_EXAMPLE_CHUNK = 64


def per_example_square_sum(input_rows: torch.Tensor, grad_rows: torch.Tensor) -> torch.Tensor:
    """``sum_{k,n} (sum_t g[k,n,t] a[n,t]^T)^2`` for ``a: [N,T,d_in]``, ``g: [K,N,T,d_out]``."""
    if input_rows.shape[1] == 1:
        a = materialize(input_rows).to(grad_rows.dtype)
        return torch.einsum("kno,nd->od", grad_rows[:, :, 0].square(), a[:, 0].square())
    total = grad_rows.new_zeros(grad_rows.shape[-1], input_rows.shape[-1])
    for start in range(0, input_rows.shape[0], _PER_EXAMPLE_CHUNK):
        a = example_slice(input_rows, start, start + _PER_EXAMPLE_CHUNK).to(grad_rows.dtype)
        for k in range(grad_rows.shape[0]):
            g = grad_rows[k, start:start + _PER_EXAMPLE_CHUNK]
            total += torch.einsum("nto,ntd->nod", g, a).square().sum(0)
    return total


class DiagonalBlock(LayerCurvature):
    structure = "diag"
    statistic_keys = ("fisher_diagonal",)
    inverse_keys = ("fisher_diagonal",)
    loss_weighted_keys = ("fisher_diagonal",)
    square_sum = staticmethod(per_example_square_sum)  # of the layer kind's rows

    def batch_statistics(self, num_forwards):
        if not self.pending:
            return None
        dtype = self.layer.weight.dtype
        total = None
        for input_rows, grad_rows, scale in self.calls_joined_per_forward():
            term = self.square_sum(input_rows, grad_rows.to(dtype)) * scale  # rows cast chunk by chunk
            total = term if total is None else total + term
        return {"fisher_diagonal": total / num_forwards}

    def statistic_shapes(self):
        return {"fisher_diagonal": (self.layer.out_dim, self.layer.in_dim)}

    def prepare_inverse(self, statistics, damping, want_spectrum):
        diagonal = statistics["fisher_diagonal"].detach().double().cpu()
        info = {"diag_min": float(diagonal.min()), "diag_max": float(diagonal.max()),
                "diag_mean": float(diagonal.mean())}
        if want_spectrum:
            info["diag_values"] = diagonal.flatten().sort().values
        return {}, info

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        return grad_matrix / (tensors["fisher_diagonal"] + damping)

    def damped_product(self, matrix, damping):
        return matrix * (self.state["fisher_diagonal"] + damping)

    def summary(self, damping, with_spectra):
        return diagonal_summary(self.state["fisher_diagonal"], damping, with_spectra)

    def dense_curvature(self, damping=0.0):
        return torch.diag(self.state["fisher_diagonal"].T.reshape(-1) + damping)
