"""Curvature of ``nn.Embedding``: a dense layer on one-hot inputs, without the one-hot matrices.

With the weight seen as ``W^T`` (``[d, V]``) and the input row of a position the
one-hot vector of its token, one example's gradient is ``M_n = sum_t g_nt e_{i_nt}^T``
(Martens & Grosse 2015, eq. 1-3, with ``a = e_i``).  The Kronecker factors are then

    A = mean over rows of e_i e_i^T = diag(f),   f_v = (count of token v) / rows,
    G = (1/c) sum over rows of g g^T / num_forwards   (as KroneckerBlock),

so ``A`` is kept as the vector ``f`` ``[V]``: the state is linear in ``V`` and no
``V x V`` matrix is ever built.  The damped direction is
``G_d^-1 M diag(1 / (f + shift_in))`` with factored damping (``linalg.factored_damping``).

Positions holding ``padding_idx`` get no gradient in PyTorch; they count as rows
with a zero input (like a zero input row of a Linear layer): ``f`` is zero there.

``structure="diag"``: the exact diagonal of the per-layer Fisher, where the
positions of one example that hold the same token add their gradients before
squaring (sums over unique (example, token) pairs, ``index_add``: memory
``O(N T d)``, never ``N V d``).

``structure="ekfac"``: a real eigenvalue correction (George et al., NeurIPS 2018).
The eigenbasis of the diagonal ``A`` is the identity, so the basis is
``I (x) Q_G`` and the scales are the per-(token, eigendirection) second moments of
the projected per-example gradients, ``S = (1/c) sum_n (Q_G^T M_n)^2``, ``[d, V]``:
the same pair sums as the diagonal, on rows ``Q_G^T g``.
"""
from __future__ import annotations

import torch

from ..linalg import damped_inverse, factored_damping, to_cpu, to_cpu64
from ..spectra import diagonal_summary, kronecker_summary
from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock


def _valid_positions(indices: torch.Tensor, padding_idx) -> torch.Tensor:
    """Mask ``[N*T]`` of the positions that carry a gradient (not ``padding_idx``)."""
    flat = indices.reshape(-1)
    if padding_idx is None:
        return torch.ones_like(flat, dtype=torch.bool)
    return flat != padding_idx


def _example_token_pairs(indices: torch.Tensor, vocab: int, valid: torch.Tensor):
    """``(tokens of the unique pairs, pair of each valid position)`` for the (example, token) pairs."""
    n, t = indices.shape
    examples = torch.arange(n, device=indices.device).repeat_interleave(t)
    keys = (examples * vocab + indices.reshape(-1))[valid]
    unique, inverse = torch.unique(keys, return_inverse=True)
    return unique % vocab, inverse


def token_square_sums(indices: torch.Tensor, grad_rows: torch.Tensor, vocab: int, padding_idx) -> torch.Tensor:
    """``sum_{k,n} (sum_t g[k,n,t] onehot(i[n,t])^T)^2`` as ``[d, V]``, for ``i: [N,T]``, ``g: [K,N,T,d]``."""
    k, d = grad_rows.shape[0], grad_rows.shape[-1]
    valid = _valid_positions(indices, padding_idx)
    tokens, pair = _example_token_pairs(indices, vocab, valid)
    grads = grad_rows.reshape(k, -1, d)[:, valid]
    sums = grads.new_zeros(k, tokens.shape[0], d).index_add_(1, pair, grads)
    total = grads.new_zeros(vocab, d).index_add_(0, tokens, sums.square().sum(0))
    return total.T


def on_used_columns(matrix: torch.Tensor, operation, out=None) -> torch.Tensor:
    """``operation(columns, used)`` on the columns of ``matrix`` that are not all zero, zeros elsewhere.

    An embedding's gradient has a nonzero column only for the tokens of the batch, and every
    preconditioner here maps a zero column to a zero column: working on the used columns alone costs
    ``d^2`` per token seen instead of per token of the vocabulary.  ``used`` is None when every column
    is worked on.  ``out``: memory for the result, used where it is laid out like ``matrix``
    (ngopt/scratch.py).
    """
    used = matrix.any(dim=0).nonzero().squeeze(1)  # no boolean copy of the matrix, as ne(0) would make
    if used.numel() > matrix.shape[1] // 4:
        return operation(matrix, None)
    result = out.zero_() if out is not None and out.stride() == matrix.stride() else torch.zeros_like(matrix)
    result[:, used] = operation(matrix[:, used], used)
    return result


class EmbeddingKroneckerBlock(LayerCurvature):
    structure = "kfac"
    statistic_keys = ("factor_in", "factor_out")
    symmetric_statistic_keys = ("factor_out",)
    inverse_keys = ("inverse_in", "inverse_out")
    loss_weighted_keys = ("factor_out",)

    def statistic_shapes(self):
        return {"factor_in": (self.layer.in_dim,), "factor_out": (self.layer.out_dim, self.layer.out_dim)}

    def _token_weights(self):
        """``(diag(A) numerator, rows, [(g, scale)])`` for "expand" or "reduce" weight sharing.

        "expand" (Eschenhagen et al., NeurIPS 2023, sec. 3): every position is a row,
        ``A = diag(counts) / rows``.  "reduce": one row per example, ``a_n = mean_t e_{i_nt}``,
        ``g_n = sum_t g_nt``; its ``A`` is not diagonal where tokens share an example, and
        only its diagonal ``mean_n (count_nv / T)^2`` is kept.
        """
        vocab, ref = self.layer.in_dim, self.layer.weight
        counts = torch.zeros(vocab, dtype=ref.dtype, device=ref.device)
        grads, rows = [], 0
        if self.weight_sharing == "expand":
            for indices, grad_rows, scale, _ in self.pending:
                valid = _valid_positions(indices, self.layer.padding_idx)
                counts += torch.bincount(indices.reshape(-1)[valid], minlength=vocab).to(ref.dtype)
                rows += indices.numel()
                grads.append((grad_rows, scale))
            return counts, rows, grads
        for indices, grad_rows, scale in self.calls_joined_per_forward():
            valid = _valid_positions(indices, self.layer.padding_idx)
            tokens, pair = _example_token_pairs(indices, vocab, valid)
            per_pair = torch.zeros(tokens.shape[0], dtype=ref.dtype, device=ref.device)
            per_pair.index_add_(0, pair, torch.ones(pair.shape[0], dtype=ref.dtype, device=ref.device))
            counts.index_add_(0, tokens, (per_pair / indices.shape[1]).square())
            rows += indices.shape[0]
            grads.append((grad_rows.sum(dim=2, keepdim=True), scale))
        return counts, rows, grads

    def batch_statistics(self, num_forwards):
        if not self.pending:
            return None
        d, ref = self.layer.out_dim, self.layer.weight
        counts, rows, grads = self._token_weights()
        factor_out = torch.zeros(d, d, dtype=ref.dtype, device=ref.device)
        for grad_rows, scale in grads:
            g = grad_rows.reshape(-1, d).to(ref.dtype)
            factor_out.addmm_(g.T, g, alpha=scale)
        return {"factor_in": counts / rows, "factor_out": factor_out / num_forwards}

    @staticmethod
    def _traces(factor_in, factor_out):
        """The two factors' traces (the input factor is its diagonal), the output's summed in float64."""
        return float(factor_in.sum()), float(factor_out.diagonal().sum(dtype=torch.float64))

    def _shifts(self, factor_in, factor_out, damping, traces=None):
        trace_in, trace_out = self._traces(factor_in, factor_out) if traces is None else traces
        return factored_damping(trace_in, factor_in.shape[0], trace_out, factor_out.shape[0], damping)

    def prepare_inverse(self, statistics, damping, want_spectrum):
        factor_in = to_cpu64(statistics["factor_in"]).clamp(min=0.0)
        factor_out = to_cpu(statistics["factor_out"])  # its own precision: see ngopt/linalg.py
        traces = self._traces(factor_in, factor_out)
        shift_in, shift_out = self._shifts(factor_in, factor_out, damping, traces)
        inv_out = damped_inverse(factor_out, shift_out, want_spectrum)
        ref = self.layer.weight
        info = {
            "in_trace": traces[0], "out_trace": traces[1],
            "in_damping": shift_in, "out_damping": shift_out,
            "in_eigenvalues": factor_in.sort().values if want_spectrum else None,
            "out_eigenvalues": inv_out.eigenvalues, "used_eig_fallback": inv_out.used_fallback,
        }
        return {"inverse_in": (1.0 / (factor_in + shift_in)).to(device=ref.device, dtype=ref.dtype),
                "inverse_out": inv_out.inverse.to(device=ref.device, dtype=ref.dtype)}, info

    writes_into = True

    def precondition(self, grad_matrix, damping, tensors=None, out=None):
        tensors = self.state if tensors is None else tensors
        return on_used_columns(grad_matrix, lambda columns, used: (tensors["inverse_out"] @ columns)
                               * (tensors["inverse_in"] if used is None else tensors["inverse_in"][used]), out)

    def _damped_factors(self, damping):
        factor_in, factor_out = self.state["factor_in"], self.state["factor_out"]
        shift_in, shift_out = self._shifts(factor_in, factor_out, damping)
        eye = torch.eye(factor_out.shape[0], dtype=factor_out.dtype, device=factor_out.device)
        return factor_in + shift_in, factor_out + shift_out * eye

    def damped_product(self, matrix, damping):
        damped_in, damped_out = self._damped_factors(damping)
        return on_used_columns(matrix, lambda columns, used: (damped_out @ columns)
                               * (damped_in if used is None else damped_in[used]))

    def dense_curvature(self, damping=0.0):
        if damping:
            damped_in, damped_out = self._damped_factors(damping)
            return torch.kron(torch.diag(damped_in), damped_out)
        return torch.kron(torch.diag(self.state["factor_in"]), self.state["factor_out"])

    def _ensure_spectra(self):
        """Factor spectra for the summaries: ``A``'s is its sorted diagonal, ``G``'s one ``eigvalsh``."""
        info = self.info
        if info.get("in_eigenvalues") is None:
            info["in_eigenvalues"] = to_cpu64(self.state["factor_in"]).sort().values
        if info.get("out_eigenvalues") is None:
            info["out_eigenvalues"] = torch.linalg.eigvalsh(to_cpu64(self.state["factor_out"]))

    def summary(self, damping, with_spectra):
        self._ensure_spectra()
        return kronecker_summary(self, damping, with_spectra)

    def describe(self):
        return (f"{self.layer.kind} {self.structure} [{self.layer.out_dim} x {self.layer.in_dim}] "
                "(diagonal input factor)")


class EmbeddingEigenbasisBlock(EmbeddingKroneckerBlock):
    structure = "ekfac"
    inverse_keys = ("basis_out", "scales")
    projected_keys = ("scales",)
    loss_weighted_keys = ("factor_out", "scales")
    # The same running-average rule as for dense layers: K-FAC's outer(eigen_out, eigen_in) on a new basis.
    blend_projected = EigenbasisBlock.blend_projected

    def statistic_shapes(self):
        shapes = super().statistic_shapes()
        shapes["scales"] = (self.layer.out_dim, self.layer.in_dim)
        return shapes

    def prepare_inverse(self, statistics, damping, want_spectrum):
        ref = self.layer.weight
        factor_in = to_cpu64(statistics["factor_in"]).clamp(min=0.0)
        factor_out = to_cpu64(statistics["factor_out"])
        eigenvalues, basis = torch.linalg.eigh(0.5 * (factor_out + factor_out.T))
        result = {"basis_out": basis.to(device=ref.device, dtype=ref.dtype),
                  "eigen_out": eigenvalues.clamp(min=0.0).to(device=ref.device, dtype=ref.dtype),
                  "eigen_in": factor_in.to(device=ref.device, dtype=ref.dtype)}
        info = {"in_trace": float(factor_in.sum()), "out_trace": float(factor_out.trace()),
                "in_damping": 0.0, "out_damping": 0.0, "used_eig_fallback": False,
                "in_eigenvalues": None, "out_eigenvalues": eigenvalues}
        return result, info

    def projected_batch_statistics(self, view, num_forwards):
        if not self.pending:
            return None
        dtype, basis = self.layer.weight.dtype, view["basis_out"]
        total = None
        for indices, grad_rows, scale in self.calls_joined_per_forward():
            term = token_square_sums(indices, grad_rows.to(dtype) @ basis, self.layer.in_dim,
                                     self.layer.padding_idx) * scale
            total = term if total is None else total + term
        return {"scales": total / num_forwards}

    # The step as for dense layers, in the basis I (x) Q_G.
    damped_product = EigenbasisBlock.damped_product

    def precondition(self, grad_matrix, damping, tensors=None, out=None):
        tensors = self.state if tensors is None else tensors
        basis = tensors["basis_out"]

        def rotated(columns, used):
            scales = tensors["scales"] if used is None else tensors["scales"][:, used]
            return basis @ ((basis.T @ columns) / (scales + damping))
        return on_used_columns(grad_matrix, rotated, out)

    def _in_basis(self, matrix, tensors, damped_scales_op):
        basis = tensors["basis_out"]
        return basis @ damped_scales_op(basis.T @ matrix)

    def dense_curvature(self, damping=0.0):
        vocab = self.layer.in_dim
        out = self.state["basis_out"].contiguous()  # eigh returns column-major bases; kron wants rows
        basis = torch.kron(torch.eye(vocab, dtype=out.dtype, device=out.device), out)
        return basis @ torch.diag(self.state["scales"].T.reshape(-1) + damping) @ basis.T

    def summary(self, damping, with_spectra):
        summary = super().summary(damping, with_spectra)
        summary.update(diagonal_summary(self.state["scales"], damping, with_spectra, prefix="scale"))
        return summary

    def describe(self):
        return f"{self.layer.kind} {self.structure} [{self.layer.out_dim} x {self.layer.in_dim}] (basis I (x) Q_G)"


class EmbeddingDiagonalBlock(DiagonalBlock):
    """The exact diagonal of the per-layer Fisher, ``[d, V]``; the rest as for ``DiagonalBlock``."""

    def batch_statistics(self, num_forwards):
        if not self.pending:
            return None
        dtype = self.layer.weight.dtype
        total = None
        for indices, grad_rows, scale in self.calls_joined_per_forward():
            term = token_square_sums(indices, grad_rows.to(dtype), self.layer.in_dim, self.layer.padding_idx) * scale
            total = term if total is None else total + term
        return {"fisher_diagonal": total / num_forwards}
