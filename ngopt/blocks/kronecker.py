"""Kronecker-factored curvature (K-FAC; KFC for convolutions).

With rows ``a`` (inputs, bias as a trailing 1) and ``g`` (output gradients as
the user's loss scales them, ``g = c dl/ds``), the block keeps

    A = mean over rows of a a^T              (input factor,  d_in x d_in)
    G = (1/c) sum over rows of g g^T         (output factor, d_out x d_out)

so that ``A (x) G`` approximates the Fisher of ``L = c sum_n l_n`` (Martens &
Grosse 2015, eq. 1-3; Grosse & Martens 2016 for the position count of
convolutions, which this scaling reproduces).  The natural-gradient direction of
a gradient matrix ``V`` is ``(A_d (x) G_d)^-1 vec(V) = vec(G_d^-1 V A_d^-1)``.
"""
from __future__ import annotations

import torch

from ..linalg import damped_inverse, factored_damping, to_cpu64
from ..spectra import kronecker_summary
from .base import LayerCurvature, Tensors
from .rows import example_chunks, mean_over_positions


def add_input_moment(factor_in: torch.Tensor, input_rows) -> int:
    """``factor_in += sum over rows of a a^T``, a bounded chunk of examples at a time; returns the row count."""
    d_in, count = factor_in.shape[0], 0
    for _, _, chunk in example_chunks(input_rows):
        # Rows may come in a lower precision (autocast); statistics accumulate in the factor's dtype.
        a = chunk.reshape(-1, d_in).to(factor_in.dtype)
        factor_in.addmm_(a.T, a)
        count += a.shape[0]
    return count


class KroneckerBlock(LayerCurvature):
    structure = "kfac"
    statistic_keys = ("factor_in", "factor_out")
    symmetric_statistic_keys = ("factor_in", "factor_out")
    inverse_keys = ("inverse_in", "inverse_out")
    loss_weighted_keys = ("factor_out",)

    def statistic_shapes(self):
        d_in, d_out = self.layer.in_dim, self.layer.out_dim
        return {"factor_in": (d_in, d_in), "factor_out": (d_out, d_out)}

    def factor_rows(self):
        """``(a, g, scale)`` per capture, positions kept ("expand") or summed per example ("reduce").

        Eschenhagen et al., NeurIPS 2023, sec. 3: "expand" treats every position
        as an example, ``A = mean_{n,t} a a^T``, ``G = sum_{n,t} g g^T``;
        "reduce" first forms ``a_n = mean_t a_nt`` and ``g_n = sum_t g_nt``.
        """
        if self.weight_sharing == "expand":
            return [(a, g, scale) for a, g, scale, _ in self.pending]
        return [(mean_over_positions(a), g.sum(dim=2, keepdim=True), scale)
                for a, g, scale in self.calls_joined_per_forward()]

    def factor_sums(self):
        """``(sum of a a^T, row count, sum of scale * g g^T)`` over the pending captures."""
        d_in, d_out = self.layer.in_dim, self.layer.out_dim
        ref = self.layer.weight
        factor_in = torch.zeros(d_in, d_in, dtype=ref.dtype, device=ref.device)
        factor_out = torch.zeros(d_out, d_out, dtype=ref.dtype, device=ref.device)
        rows = 0
        for input_rows, grad_rows, scale in self.factor_rows():
            rows += add_input_moment(factor_in, input_rows)
            g = grad_rows.reshape(-1, d_out).to(ref.dtype)
            factor_out.addmm_(g.T, g, alpha=scale)
        return factor_in, rows, factor_out

    def fold_pending(self):
        # Only "expand" sums capture by capture ("reduce" joins a forward's calls first), and
        # blocks with projected statistics need the rows again after the inversion.
        if not self.pending or self.weight_sharing != "expand" or self.projected_keys:
            return
        sums = self.factor_sums()
        self._folded = sums if self._folded is None else \
            (self._folded[0] + sums[0], self._folded[1] + sums[1], self._folded[2] + sums[2])
        self.pending.clear()

    def batch_statistics(self, num_forwards):
        parts = [self._folded] if self._folded is not None else []
        if self.pending:
            parts.append(self.factor_sums())
        if not parts:
            return None
        factor_in, rows, factor_out = parts[0]
        for more in parts[1:]:
            factor_in, rows, factor_out = factor_in + more[0], rows + more[1], factor_out + more[2]
        return {"factor_in": factor_in / rows, "factor_out": factor_out / num_forwards}

    def prepare_inverse(self, statistics, damping, want_spectrum):
        factor_in = to_cpu64(statistics["factor_in"])
        factor_out = to_cpu64(statistics["factor_out"])
        trace_in, trace_out = float(factor_in.trace()), float(factor_out.trace())
        shift_in, shift_out = factored_damping(trace_in, factor_in.shape[0], trace_out,
                                               factor_out.shape[0], damping)
        inv_in = damped_inverse(factor_in, shift_in, want_spectrum)
        inv_out = damped_inverse(factor_out, shift_out, want_spectrum)
        ref = self.layer.weight
        info = {
            "in_trace": trace_in, "out_trace": trace_out,
            "in_damping": shift_in, "out_damping": shift_out,
            "in_eigenvalues": inv_in.eigenvalues, "out_eigenvalues": inv_out.eigenvalues,
            "used_eig_fallback": inv_in.used_fallback or inv_out.used_fallback,
        }
        return {"inverse_in": inv_in.inverse.to(device=ref.device, dtype=ref.dtype),
                "inverse_out": inv_out.inverse.to(device=ref.device, dtype=ref.dtype)}, info

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        return tensors["inverse_out"] @ grad_matrix @ tensors["inverse_in"]

    def _shifts(self, damping):
        factor_in, factor_out = self.state["factor_in"], self.state["factor_out"]
        traces = torch.stack([factor_in.trace(), factor_out.trace()]).tolist()  # one host sync
        return factored_damping(traces[0], factor_in.shape[0], traces[1], factor_out.shape[0], damping)

    def _damped_factors(self, damping):
        factor_in, factor_out = self.state["factor_in"], self.state["factor_out"]
        shift_in, shift_out = self._shifts(damping)
        eye_in = torch.eye(factor_in.shape[0], dtype=factor_in.dtype, device=factor_in.device)
        eye_out = torch.eye(factor_out.shape[0], dtype=factor_out.dtype, device=factor_out.device)
        return factor_in + shift_in * eye_in, factor_out + shift_out * eye_out

    def damped_product(self, matrix, damping):
        # (G + s_out I) V (A + s_in I) = W A + s_in W with W = G V + s_out V: no damped copies of the factors.
        shift_in, shift_out = self._shifts(damping)
        left = torch.addmm(matrix, self.state["factor_out"], matrix, beta=shift_out)
        return torch.addmm(left, left, self.state["factor_in"], beta=shift_in)

    def summary(self, damping, with_spectra):
        return kronecker_summary(self, damping, with_spectra)

    def dense_curvature(self, damping=0.0):
        if damping:
            damped_in, damped_out = self._damped_factors(damping)
            return torch.kron(damped_in, damped_out)
        return torch.kron(self.state["factor_in"], self.state["factor_out"])
