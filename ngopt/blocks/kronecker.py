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

from ..factors import Whole, factor_form
from ..linalg import factored_damping, to_cpu
from ..spectra import kronecker_summary
from .base import InversionPlan, LayerCurvature
from .rows import example_chunks, mean_over_positions


def add_input_moment(factor_in: torch.Tensor, input_rows, form=None) -> int:
    """``factor_in += sum over rows of a a^T``, a bounded chunk of examples at a time; returns the row count."""
    form = form or Whole(factor_in.shape[0])
    count = 0
    for _, _, chunk in example_chunks(input_rows):
        # Rows may come in a lower precision (autocast); statistics accumulate in the factor's dtype.
        a = chunk.reshape(-1, form.dim).to(factor_in.dtype)
        form.add_moment(factor_in, a)
        count += a.shape[0]
    return count


class KroneckerBlock(LayerCurvature):
    structure = "kfac"
    statistic_keys = ("factor_in", "factor_out")
    inverse_keys = ("inverse_in", "inverse_out")
    loss_weighted_keys = ("factor_out",)

    def __init__(self, layer, state, weight_sharing="expand", factor_blocks=(None, None)):
        super().__init__(layer, state, weight_sharing)
        # Block sizes of the two factors (None: whole); see ngopt/factors.py.
        self.factor_blocks = tuple(factor_blocks)
        self.form_in = factor_form(layer.in_dim, factor_blocks[0])
        self.form_out = factor_form(layer.out_dim, factor_blocks[1])
        self.symmetric_statistic_keys = tuple(key for key, form in (("factor_in", self.form_in),
                                                                    ("factor_out", self.form_out))
                                              if form.symmetric_matrix)

    def fresh_copy(self):
        return type(self)(self.layer, {}, weight_sharing=self.weight_sharing, factor_blocks=self.factor_blocks)

    def statistic_shapes(self):
        return {"factor_in": self.form_in.shape, "factor_out": self.form_out.shape}

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
        ref = self.layer.weight
        factor_in, factor_out = self.form_in.zeros(ref), self.form_out.zeros(ref)
        rows = 0
        for input_rows, grad_rows, scale in self.factor_rows():
            rows += add_input_moment(factor_in, input_rows, self.form_in)
            self.form_out.add_moment(factor_out, grad_rows.reshape(-1, self.form_out.dim).to(ref.dtype), alpha=scale)
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
        factor_in, shift_in, factor_out, shift_out, info = self._damped_split(statistics, damping)
        inv_in, eig_in, fallback_in = self.form_in.inverse(factor_in, shift_in, want_spectrum)
        inv_out, eig_out, fallback_out = self.form_out.inverse(factor_out, shift_out, want_spectrum)
        info.update(in_eigenvalues=eig_in, out_eigenvalues=eig_out, used_eig_fallback=fallback_in or fallback_out)
        return self._on_device(inv_in, inv_out), info

    def inversion_plan(self, statistics, damping):
        if type(self.form_in) is not Whole or type(self.form_out) is not Whole:
            return None  # a block-diagonal factor is already one batched inversion of its own
        factor_in, shift_in, factor_out, shift_out, info = self._damped_split(statistics, damping)

        def finish(results):
            inverse_in, inverse_out = results
            info.update(in_eigenvalues=None, out_eigenvalues=None,
                        used_eig_fallback=inverse_in.used_fallback or inverse_out.used_fallback)
            return self._on_device(inverse_in.inverse, inverse_out.inverse), info

        return InversionPlan([(factor_in, shift_in, None), (factor_out, shift_out, None)], finish)

    def _damped_split(self, statistics, damping):
        """The factors on the CPU in their own precision (a float32 factor that float32 inverts safely is
        never copied to float64, ngopt/linalg.py), their shifts, and the diagnostics of the split."""
        factor_in, factor_out = to_cpu(statistics["factor_in"]), to_cpu(statistics["factor_out"])
        traces = torch.stack([self.form_in.trace(factor_in), self.form_out.trace(factor_out)]).tolist()  # one sync
        shift_in, shift_out = factored_damping(traces[0], self.form_in.dim, traces[1], self.form_out.dim, damping)
        info = {"in_trace": traces[0], "out_trace": traces[1], "in_damping": shift_in, "out_damping": shift_out}
        return factor_in, shift_in, factor_out, shift_out, info

    def _on_device(self, inverse_in, inverse_out):
        ref = self.layer.weight
        return {"inverse_in": inverse_in.to(device=ref.device, dtype=ref.dtype),
                "inverse_out": inverse_out.to(device=ref.device, dtype=ref.dtype)}

    writes_into = True

    def precondition(self, grad_matrix, damping, tensors=None, out=None):
        tensors = self.state if tensors is None else tensors
        if self.form_out.block == 1 and self.form_out.dim > 1:
            # A diagonal output factor (a large output layer) scales rows: done in place on the product
            # with the input factor, one parameter-sized tensor fewer than the two products in turn.
            right = self.form_in.right(grad_matrix, tensors["inverse_in"], out=out)
            return right.mul_(tensors["inverse_out"].reshape(-1, 1))
        left = self.form_out.left(tensors["inverse_out"], grad_matrix)
        return self.form_in.right(left, tensors["inverse_in"], out=out)

    def _shifts(self, damping):
        factor_in, factor_out = self.state["factor_in"], self.state["factor_out"]
        traces = torch.stack([self.form_in.trace(factor_in), self.form_out.trace(factor_out)]).tolist()  # one sync
        return factored_damping(traces[0], self.form_in.dim, traces[1], self.form_out.dim, damping)

    def damped_product(self, matrix, damping):
        # (G + s_out I) V (A + s_in I), with no damped copies of the factors.
        shift_in, shift_out = self._shifts(damping)
        left = self.form_out.left_damped(self.state["factor_out"], shift_out, matrix)
        return self.form_in.right_damped(left, self.state["factor_in"], shift_in)

    def summary(self, damping, with_spectra):
        return kronecker_summary(self, damping, with_spectra)

    def describe(self):
        text = super().describe()
        forms = [f"{side} {form.describe()}" for side, form in (("input factor", self.form_in),
                                                              ("output factor", self.form_out))
                 if type(form) is not Whole]
        return text + (f" ({'; '.join(forms)})" if forms else "")

    def dense_curvature(self, damping=0.0):
        factor_in = self.form_in.dense(self.state["factor_in"])
        factor_out = self.form_out.dense(self.state["factor_out"])
        if damping:
            shift_in, shift_out = self._shifts(damping)
            factor_in = factor_in + shift_in * torch.eye(factor_in.shape[0], dtype=factor_in.dtype,
                                                         device=factor_in.device)
            factor_out = factor_out + shift_out * torch.eye(factor_out.shape[0], dtype=factor_out.dtype,
                                                            device=factor_out.device)
        return torch.kron(factor_in, factor_out)
