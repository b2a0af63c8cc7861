"""EKFAC's eigenbasis with scales that follow the mini-batch gradient (``structure="ekfac-gradient"``).

The eigenbases ``Q_A``, ``Q_G`` of the Kronecker factors are kept and refreshed as for EKFAC
(George et al., NeurIPS 2018).  In the basis ``Q = Q_A (x) Q_G`` the block keeps a running average,
updated on every step, of the squared gradient seen in that basis,

    M <- m M + (1 - m) N (Q_G^T V Q_A)^2        (elementwise),

with ``V`` the step's gradient matrix and ``N = 1 / mean_n w_n`` the loss's term count
(``w_n = dL/dl_n``: the batch size for a mean over examples, 1 for a sum).  For a loss
``L = sum_n w_n l_n`` with equal weights ``w``, ``E[(Q^T V)^2] = w^2 sum_n E[(Q^T g_n)^2] + (Q^T E[V])^2``,
so ``N (Q^T V)^2`` estimates the diagonal of ``Q^T F Q`` for ``F = w sum_n g_n g_n^T``, the loss's
own (empirical) Fisher, plus the squared mean gradient: a gradient that is large against its own
noise takes shorter steps, as in Adam.  Vyas et al. (ICLR 2025) run Adam's second moment in such a
Kronecker eigenbasis; here the bases come from the sampled Fisher's factors, and no second pass over
the rows in the basis is needed at a refresh.

The curvature is ``S = max(M, L_G L_A^T)``: the moment, but never below K-FAC's own scales in the
basis, the products of the factors' eigenvalues (a sampled-Fisher estimate).  The empirical Fisher
shrinks with the residuals near a fit while the Fisher does not (Kunstner et al., NeurIPS 2019): on
a squared-error autoencoder the moment alone fell far below the Fisher, the Levenberg-Marquardt rule
raised the damping to make up for it, and the run stalled.  Damping is added to ``S``:
``(S + lambda)^-1``.

When the basis changes, the moment is carried over: its new value is the exact diagonal of
``Q_old M Q_old^T`` in the new basis, ``(R_G o R_G) M (R_A o R_A)^T`` with ``R = Q_new^T Q_old``
(``o``: elementwise).  The first basis starts it from K-FAC's scales.
"""
from __future__ import annotations

import torch

from .eigenbasis import EigenbasisBlock


def carried_scales(scales: torch.Tensor, old_in: torch.Tensor, old_out: torch.Tensor, new_in: torch.Tensor,
                   new_out: torch.Tensor) -> torch.Tensor:
    """The diagonal of ``(Q_in_old (x) Q_out_old) diag(scales) (...)^T`` in the basis ``Q_in_new (x) Q_out_new``.

    ``scales`` is ``[d_out, d_in]`` (entry ``[o, i]`` belongs to the pair of eigenvectors ``o``, ``i``).
    """
    rotate_in = (new_in.T @ old_in).square_()
    rotate_out = (new_out.T @ old_out).square_()
    return rotate_out @ scales @ rotate_in.T


class GradientScaledEigenbasisBlock(EigenbasisBlock):
    structure = "ekfac-gradient"
    inverse_keys = ("basis_in", "basis_out", "scales")
    projected_keys = ()  # the scales come from the gradient: no second pass over the rows
    loss_weighted_keys = ("factor_out",)
    follows_gradient = True
    # The eigenvalues only start the moment and bound the scales from below: float32 factors are
    # decomposed in float32, twice as fast as in float64 (rounding about 1e-7 of the largest eigenvalue).
    decomposition_dtype = None

    def gradient_scales(self, view, rotated, term_count: float, memory: float, rebased: bool) -> dict:
        """The new moment ``m M + (1 - m) N R^2`` for the gradient ``R`` in the eigenbasis (``M`` carried
        into the basis when ``rebased``; ``rotated`` None, no gradient: ``M`` alone) and the scales
        ``max(M, L_G L_A^T)`` (new tensors; nothing when neither changes)."""
        moment = self._moment_in_basis(view, rebased)
        if rotated is not None:
            moment = moment.mul(memory).addcmul_(rotated, rotated, value=(1.0 - memory) * term_count)
        elif not rebased:
            return {}
        kfac_scales = torch.outer(view["eigen_out"], view["eigen_in"])
        return {"gradient_moment": moment, "scales": torch.maximum(moment, kfac_scales)}

    def _moment_in_basis(self, view, rebased: bool) -> torch.Tensor:
        """The committed moment in the basis of ``view``; K-FAC's ``L_G L_A^T`` for the first basis."""
        if not rebased:
            return view["gradient_moment"]
        if all(key in self.state for key in ("gradient_moment", "basis_in", "basis_out")):
            return carried_scales(self.state["gradient_moment"], self.state["basis_in"], self.state["basis_out"],
                                  view["basis_in"], view["basis_out"])
        return torch.outer(view["eigen_out"], view["eigen_in"])

    def precondition(self, grad_matrix, damping, tensors=None, rotated=None):
        """As EKFAC's; ``rotated``: ``grad_matrix`` in the eigenbasis already (from the scales' update)."""
        tensors = self.state if tensors is None else tensors
        return self._in_basis(grad_matrix, tensors, lambda r: r / (tensors["scales"] + damping), rotated)
