"""Eigenvalue-corrected Kronecker curvature (EKFAC; George et al., NeurIPS 2018).

The Kronecker factors ``A = Q_A L_A Q_A^T`` and ``G = Q_G L_G Q_G^T`` are kept
as for K-FAC, but only their eigenbases are used: in the basis
``Q = Q_A (x) Q_G`` the curvature is the diagonal ``S`` of the projected
per-example gradients' second moments,

    S = (1/c) sum_n (Q_G^T M_n Q_A)^2   (elementwise),   M_n = sum_t g_nt a_nt^T,

instead of K-FAC's ``L_G L_A^T``.  Since K-FAC is itself diagonal in ``Q``, and
``S`` is the diagonal of ``Q^T F Q`` for the Fisher estimate ``F`` of the
batch, ``Q S Q^T`` is the closest matrix of that form to ``F`` in Frobenius
norm: never further from it than K-FAC.

Schedule: the eigenbases change at each inversion (``inverse_interval``), the
scales at each statistics refresh (``stats_interval``), as a running average in
the current basis.  When the basis changes, the old scales belong to the old
basis; the running average then restarts from ``L_G L_A^T``, the factors' own
(already averaged) estimate of the scales in the new basis.  Damping is added
to the scales: ``(S + lambda)^-1``.
"""
from __future__ import annotations

import torch

from ..spectra import diagonal_summary, kronecker_summary
from .diagonal import per_example_square_sum
from .kronecker import KroneckerBlock
from .rows import example_chunks


class EigenbasisBlock(KroneckerBlock):
    structure = "ekfac"
    inverse_keys = ("basis_in", "basis_out", "scales")
    projected_keys = ("scales",)
    loss_weighted_keys = ("factor_out", "scales")

    def statistic_shapes(self):
        shapes = super().statistic_shapes()
        if "scales" in self.projected_keys:  # a statistic only where a refresh measures it
            shapes["scales"] = (self.layer.out_dim, self.layer.in_dim)
        return shapes

    # -- the basis ------------------------------------------------------------------------
    # Precision of the eigendecompositions; None: the factors' own, at least float32.
    decomposition_dtype = torch.float64

    def prepare_inverse(self, statistics, damping, want_spectrum):
        ref = self.layer.weight
        result, info = {}, {}
        for side in ("in", "out"):
            factor = statistics[f"factor_{side}"].detach()
            dtype = self.decomposition_dtype or torch.promote_types(factor.dtype, torch.float32)
            factor = factor.to(device="cpu", dtype=dtype)
            eigenvalues, basis = torch.linalg.eigh(0.5 * (factor + factor.T))
            result[f"basis_{side}"] = basis.to(device=ref.device, dtype=ref.dtype)
            result[f"eigen_{side}"] = eigenvalues.clamp(min=0.0).to(device=ref.device, dtype=ref.dtype)
            info[f"{side}_trace"] = float(factor.trace())
            info[f"{side}_eigenvalues"] = eigenvalues  # free with the basis: diagnostics reuse them
        info["in_damping"] = info["out_damping"] = 0.0
        info["used_eig_fallback"] = False
        return result, info

    def inversion_plan(self, statistics, damping):
        return None  # eigendecompositions, not damped inverses

    # -- the scales -----------------------------------------------------------------------
    def projected_batch_statistics(self, view, num_forwards):
        if not self.pending:
            return None
        dtype = self.layer.weight.dtype
        basis_in, basis_out = view["basis_in"], view["basis_out"]
        total = None
        for input_rows, grad_rows, scale in self.calls_joined_per_forward():
            projected_out = grad_rows.to(dtype) @ basis_out        # rows of (Q_G^T g)^T
            for start, stop, a in example_chunks(input_rows):  # bounded memory for many positions
                projected_in = a.to(dtype) @ basis_in              # rows of (Q_A^T a)^T
                term = per_example_square_sum(projected_in, projected_out[:, start:stop]) * scale
                total = term if total is None else total + term
        return {"scales": total / num_forwards}

    def blend_projected(self, batch, view, rebased, ema):
        previous = None
        if rebased and "scales" in self.state:
            previous = torch.outer(view["eigen_out"], view["eigen_in"])  # K-FAC in the new basis
        elif not rebased:
            previous = self.state.get("scales")
        if batch is None:
            return {} if previous is None or not rebased else {"scales": previous}
        if previous is None:
            return {"scales": batch["scales"].clone()}
        return {"scales": previous.mul(ema).add_(batch["scales"], alpha=1.0 - ema)}

    # -- the step -------------------------------------------------------------------------
    def rotated(self, view, matrix):
        """``Q_G^T V Q_A``: a gradient matrix in the eigenbasis of ``view``."""
        return view["basis_out"].T @ matrix @ view["basis_in"]

    def _in_basis(self, matrix, tensors, damped_scales_op, rotated=None):
        """``Q op(Q^T vec(matrix))``; ``rotated``: ``matrix`` in the basis already."""
        rotated = self.rotated(tensors, matrix) if rotated is None else rotated
        return tensors["basis_out"] @ damped_scales_op(rotated) @ tensors["basis_in"].T

    writes_into = False  # its products run in the eigenbasis

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        return self._in_basis(grad_matrix, tensors, lambda r: r / (tensors["scales"] + damping))

    def damped_product(self, matrix, damping):
        return self._in_basis(matrix, self.state, lambda r: r * (self.state["scales"] + damping))

    def dense_curvature(self, damping=0.0):
        # contiguous: torch.kron fails on a mix of contiguous and eigh's column-major results
        basis = torch.kron(self.state["basis_in"].contiguous(), self.state["basis_out"].contiguous())
        return basis @ torch.diag(self.state["scales"].T.reshape(-1) + damping) @ basis.T

    def summary(self, damping, with_spectra):
        summary = kronecker_summary(self, damping, with_spectra)
        summary.update(diagonal_summary(self.state["scales"], damping, with_spectra, prefix="scale"))
        return summary
