"""Curvature of the affine part of ``nn.LayerNorm`` and ``nn.BatchNorm*``: exact 2x2 blocks per channel.

For ``y = gamma_c x_hat + beta_c`` the per-example gradients of channel ``c`` are

    u_nc = sum_t g_ntc x_hat_ntc   (gamma_c),     v_nc = sum_t g_ntc   (beta_c),

``t`` running over the positions that share the channel (sequence positions for
layer norm, spatial positions for batch norm).  The block keeps, per channel, the
exact 2x2 Fisher of ``(gamma_c, beta_c)``

    B_c = (1/c) sum_n [u v]^T [u v] / num_forwards      (``fisher_pairs``, ``[C, 2, 2]``),

i.e. the exact per-layer Fisher with every entry that couples two different channels
dropped.  Why 2x2 blocks: ``gamma_c`` and ``beta_c`` act on the same outputs and are
strongly coupled (``u`` and ``v`` are correlated whenever ``x_hat`` has a sign bias at
a channel), which a diagonal misses, at O(C) cost; the full ``2C x 2C`` Fisher is too
large to invert for wide layers, and the cross-channel entries have no cheap
structure (no Kronecker form: the layer is elementwise).  Without a bias the block is
the 1x1 (diagonal) case.

The blocks are inverted by a batched float64 eigendecomposition at each inversion
(negative round-off eigenvalues clipped to zero); damping is added to the
eigenvalues at every step, ``(B_c + lambda I)^-1``, so a change of ``damping`` acts at
once.  ``structure="diag"`` keeps the diagonal of the same blocks (``u^2``, ``v^2``);
``"kfac"`` and ``"ekfac"`` both give the exact 2x2 blocks (an eigenvalue correction of
an exact block changes nothing).  ``weight_sharing`` has no effect: the per-example
sums are exact.
"""
from __future__ import annotations

import torch

from ..linalg import to_cpu64
from ..spectra import diagonal_summary
from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .rows import example_chunks


def per_example_channel_gradients(normalized: torch.Tensor, grad_rows: torch.Tensor, with_bias: bool) -> torch.Tensor:
    """``[K, N, C, 1 or 2]``: ``(u_nc, v_nc)`` for ``x_hat: [N, T, C]``, ``g: [K, N, T, C]``."""
    u = torch.einsum("kntc,ntc->knc", grad_rows, normalized)
    if not with_bias:
        return u.unsqueeze(-1)
    return torch.stack([u, grad_rows.sum(dim=2)], dim=-1)


def _channel_sums(block, reduce):
    """``(1/c) sum_n reduce(w_n)`` over the pending captures, ``w_n`` the per-example channel gradients."""
    dtype = block.layer.weight.dtype
    total = None
    for normalized, grad_rows, scale in block.calls_joined_per_forward():
        for start, stop, rows in example_chunks(normalized):  # reduce sums over examples
            pairs = per_example_channel_gradients(rows.to(dtype), grad_rows[:, start:stop].to(dtype),
                                                  block.layer.has_bias)
            term = reduce(pairs) * scale
            total = term if total is None else total + term
    return total


def _channel_moments(block, num_forwards, reduce):
    """The folded and pending sums over ``num_forwards``; None without any capture."""
    total = block._folded
    if block.pending:
        more = _channel_sums(block, reduce)
        total = more if total is None else total + more
    return None if total is None else total / num_forwards


class _FoldsChannelSums:
    """Norm blocks: statistics are sums over examples, so captures fold as soon as they come."""

    def fold_pending(self):
        if self.pending:
            more = _channel_sums(self, self.reduce)
            self._folded = more if self._folded is None else self._folded + more
            self.pending.clear()


class NormPairBlock(_FoldsChannelSums, LayerCurvature):
    structure = "channel_pairs"
    statistic_keys = ("fisher_pairs",)
    inverse_keys = ("pair_basis", "pair_eigenvalues")
    loss_weighted_keys = ("fisher_pairs",)

    @staticmethod
    def reduce(w):
        return torch.einsum("knci,kncj->cij", w, w)

    def statistic_shapes(self):
        k = self.layer.in_dim
        return {"fisher_pairs": (self.layer.out_dim, k, k)}

    def batch_statistics(self, num_forwards):
        moments = _channel_moments(self, num_forwards, self.reduce)
        return None if moments is None else {"fisher_pairs": moments}

    def prepare_inverse(self, statistics, damping, want_spectrum):
        pairs = to_cpu64(statistics["fisher_pairs"])
        eigenvalues, basis = torch.linalg.eigh(0.5 * (pairs + pairs.transpose(1, 2)))
        clipped = eigenvalues.clamp(min=0.0)
        ref = self.layer.weight
        info = {"pair_eig_min": float(eigenvalues.min()), "pair_eig_max": float(eigenvalues.max()),
                "trace": float(clipped.sum()), "pair_eigenvalues": clipped}
        return {"pair_basis": basis.to(device=ref.device, dtype=ref.dtype),
                "pair_eigenvalues": clipped.to(device=ref.device, dtype=ref.dtype)}, info

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        basis = tensors["pair_basis"]
        rotated = torch.einsum("cij,ci->cj", basis, grad_matrix) / (tensors["pair_eigenvalues"] + damping)
        return torch.einsum("cij,cj->ci", basis, rotated)

    def damped_product(self, matrix, damping):
        return torch.einsum("cij,cj->ci", self.state["fisher_pairs"], matrix) + damping * matrix

    def dense_curvature(self, damping=0.0):
        pairs = self.state["fisher_pairs"]
        channels, k = pairs.shape[0], pairs.shape[1]
        # Column-major vec of [C, k]: entry (i, c) sits at i * C + c.
        dense = pairs.new_zeros(k, channels, k, channels)
        index = torch.arange(channels, device=pairs.device)
        dense[:, index, :, index] = pairs
        dense = dense.reshape(k * channels, k * channels)
        return dense + damping * torch.eye(k * channels, dtype=dense.dtype, device=dense.device)

    def summary(self, damping, with_spectra):
        eigenvalues = self.info.get("pair_eigenvalues")
        if eigenvalues is None:
            eigenvalues = torch.linalg.eigvalsh(to_cpu64(self.state["fisher_pairs"]))
            self.info["pair_eigenvalues"] = eigenvalues
        return diagonal_summary(eigenvalues, damping, with_spectra, prefix="pair_eig")

    def describe(self):
        return f"{self.layer.kind} {self.structure} [{self.layer.out_dim} channels x {self.layer.in_dim}]"


class NormDiagonalBlock(_FoldsChannelSums, DiagonalBlock):
    """The diagonal of the same per-channel blocks, ``[C, 1 or 2]``; the rest as for ``DiagonalBlock``."""

    @staticmethod
    def reduce(w):
        return w.square().sum(dim=(0, 1))

    def batch_statistics(self, num_forwards):
        moments = _channel_moments(self, num_forwards, self.reduce)
        return None if moments is None else {"fisher_diagonal": moments}
