"""One parameter with two uses (a tied input embedding and output layer): ``C = C_1 + C_2``.

A weight ``W`` used by two operations gets the sum of their gradients, so its
Fisher is ``F = F_1 + F_2 + (cross terms of the two uses)``.  The block keeps each
use's own Kronecker approximation, in the layout of the first use's gradient
matrix ``M`` (``[d_out, d_in]``):

    C = X_1 (x) Y_1 + X_2 (x) Y_2,      C vec(M) = vec(Y_1 M X_1^T + Y_2 M X_2^T),

where ``X_k`` acts on the input side (columns of ``M``) and ``Y_k`` on the output side.
For an embedding ``W [V, d]`` tied to an output layer ``F.linear(h, W)``, the lookup
gives ``diag(token frequencies)`` on the ``V`` side and its output factor on the
``d`` side; the output layer gives its output factor on the ``V`` side and its
input factor on the ``d`` side.  The cross terms between the two uses are dropped,
as K-FAC drops those between layers.

A sum of two Kronecker products is inverted exactly by two generalized
eigendecompositions (Golub & Van Loan, *Matrix Computations*, sec. 8.7: a pencil
``(B, A)`` with ``A`` positive definite is diagonalized by ``P^T A P = I``,
``P^T B P = diag(mu)``): with ``P`` for ``(X_2, X_1)`` and ``Q`` for ``(Y_2, Y_1)``,

    C = (P (x) Q)^-T diag(1 + mu_i nu_j) (P (x) Q)^-1,
    C^-1 vec(M) = vec(Q [(Q^T M P) / (1 + nu mu^T)] P^T),

so the step costs four products per use of ``M``, as for EKFAC.  Each use is damped
by the factored rule (``linalg.factored_damping``) with half of ``lambda``, so that
the pair adds ``lambda I`` at least.  ``structure="diag"`` keeps the sum of the two
uses' exact diagonals.  A third use, or two uses whose layouts are not each other's
transposes, has no such form: the optimizer then uses the fallback rule.
"""
from __future__ import annotations

from typing import List, Sequence

import torch

from ..linalg import factored_damping, to_cpu64
from ..spectra import diagonal_summary
from .base import LayerCurvature, PrefixedState


def layout_relation(first, second) -> str:
    """``"same"``, ``"transposed"`` or ``"other"``: how ``second``'s gradient matrix lays out ``first``'s."""
    param = first.weight
    probe = torch.arange(param.numel(), dtype=torch.float64).reshape(param.shape)
    a, b = first.gradient_matrix(probe, None), second.gradient_matrix(probe, None)
    if a.shape == b.shape and torch.equal(a, b):
        return "same"
    if a.shape == b.T.shape and torch.equal(a, b.T):
        return "transposed"
    return "other"


class TiedLayer:
    """The layer adapter of a tied block: the first use's layout, a kind naming both uses."""

    def __init__(self, layers: Sequence):
        self.layers = list(layers)
        self._first = self.layers[0]
        self.kind = "+".join(layer.kind for layer in self.layers)
        self.default_stats_fraction = min(layer.default_stats_fraction for layer in self.layers)

    def __getattr__(self, name):
        return getattr(self._first, name)


def _generalized_eigen(b: torch.Tensor, a: torch.Tensor):
    """``(P, mu)`` with ``P^T a P = I`` and ``P^T b P = diag(mu)`` for symmetric ``b`` and positive definite ``a``."""
    lower = torch.linalg.cholesky(0.5 * (a + a.T))
    inverse = torch.linalg.solve_triangular(lower, torch.eye(a.shape[0], dtype=a.dtype), upper=False)
    mu, vectors = torch.linalg.eigh(inverse @ (0.5 * (b + b.T)) @ inverse.T)
    return inverse.T @ vectors, mu


def _dense(factor: torch.Tensor) -> torch.Tensor:
    """A factor kept as its diagonal (an embedding's token frequencies) as a matrix."""
    return torch.diag(factor) if factor.dim() == 1 else factor


class _TiedBlock(LayerCurvature):
    """Two uses' blocks (``terms``) of one parameter, their statistics under prefixed keys."""

    def __init__(self, terms: List[LayerCurvature], relations: List[str], state: dict, weight_sharing: str):
        super().__init__(TiedLayer([term.layer for term in terms]), state, weight_sharing)
        self.terms = terms
        self.relations = relations  # "same" or "transposed", each use's layout against the first's
        for index, term in enumerate(terms):
            term.state = PrefixedState(state, f"use{index}.")
            term._kept = self._kept  # the same examples for every use of one forward
        self.statistic_keys = tuple(f"use{i}.{k}" for i, t in enumerate(terms) for k in t.statistic_keys)
        self.symmetric_statistic_keys = tuple(f"use{i}.{k}" for i, t in enumerate(terms)
                                              for k in t.symmetric_statistic_keys)
        self.loss_weighted_keys = tuple(f"use{i}.{k}" for i, t in enumerate(terms) for k in t.loss_weighted_keys)

    def fresh_copy(self):
        return type(self)([term.fresh_copy() for term in self.terms], list(self.relations), {},
                          self.weight_sharing)

    def rebind(self, state):
        super().rebind(state)
        for index, term in enumerate(self.terms):
            term.state = PrefixedState(state, f"use{index}.")

    # -- capture: each call goes to its use's block ------------------------------------------
    def add_capture(self, input_rows, grad_rows, scale, forward=0, term: int = 0):
        self.terms[term].subsample = self.subsample
        self.terms[term].add_capture(input_rows, grad_rows, scale, forward)

    def clear_pending(self):
        super().clear_pending()
        for term in self.terms:
            term.clear_pending()
            term._kept = self._kept

    def fold_pending(self):
        for term in self.terms:
            term.fold_pending()

    def statistic_shapes(self):
        return {f"use{i}.{k}": shape for i, t in enumerate(self.terms) for k, shape in t.statistic_shapes().items()}

    def batch_statistics(self, num_forwards):
        statistics = {}
        for index, term in enumerate(self.terms):
            batch = term.batch_statistics(num_forwards)
            if batch is None:
                continue
            statistics.update({f"use{index}.{k}": v for k, v in batch.items()})
        return statistics or None

    def blend(self, batch, ema):
        if not all(key in self.state for key in batch):
            return {key: value.clone() for key, value in batch.items()}
        return {key: self.state[key].mul(ema).add_(batch[key], alpha=1.0 - ema) for key in batch}

    def _term_statistics(self, statistics, index):
        prefix = f"use{index}."
        return {k[len(prefix):]: v for k, v in statistics.items() if k.startswith(prefix)}

    def describe(self) -> str:
        return f"{self.layer.kind} {self.structure} [{self.layer.out_dim} x {self.layer.in_dim}] (tied: two uses)"


class TiedKroneckerBlock(_TiedBlock):
    structure = "kfac"
    inverse_keys = ("basis_in", "basis_out", "eigen_in", "eigen_out")

    def _damped_factors(self, statistics, damping):
        """``[(X_k, Y_k)]``: each use's damped input- and output-side factors in the first use's layout."""
        pairs = []
        for index, relation in enumerate(self.relations):
            term = self._term_statistics(statistics, index)
            factor_in, factor_out = to_cpu64(term["factor_in"]), to_cpu64(term["factor_out"])
            trace_in = float(factor_in.sum()) if factor_in.dim() == 1 else float(factor_in.trace())
            shift_in, shift_out = factored_damping(trace_in, factor_in.shape[0], float(factor_out.trace()),
                                                   factor_out.shape[0], 0.5 * damping)
            damped_in = _dense(factor_in.clamp(min=0.0) if factor_in.dim() == 1 else factor_in)
            damped_in = damped_in + shift_in * torch.eye(damped_in.shape[0], dtype=torch.float64)
            damped_out = factor_out + shift_out * torch.eye(factor_out.shape[0], dtype=torch.float64)
            pairs.append((damped_in, damped_out) if relation == "same" else (damped_out, damped_in))
        return pairs

    def prepare_inverse(self, statistics, damping, want_spectrum):
        (x1, y1), (x2, y2) = self._damped_factors(statistics, damping)
        basis_in, eigen_in = _generalized_eigen(x2, x1)
        basis_out, eigen_out = _generalized_eigen(y2, y1)
        ref = self.layer.weight
        cast = dict(device=ref.device, dtype=ref.dtype)
        info = {"in_trace": float(x1.trace() + x2.trace()), "out_trace": float(y1.trace() + y2.trace()),
                "in_damping": 0.0, "out_damping": 0.0, "used_eig_fallback": False,
                "in_eigenvalues": None, "out_eigenvalues": None}
        return {"basis_in": basis_in.to(**cast), "basis_out": basis_out.to(**cast),
                "eigen_in": eigen_in.to(**cast), "eigen_out": eigen_out.to(**cast)}, info

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        basis_in, basis_out = tensors["basis_in"], tensors["basis_out"]
        rotated = basis_out.T @ grad_matrix @ basis_in
        scaled = rotated / (1.0 + torch.outer(tensors["eigen_out"], tensors["eigen_in"]))
        return basis_out @ scaled @ basis_in.T

    def damped_product(self, matrix, damping):
        result = torch.zeros_like(matrix)
        for x, y in self._damped_factors(self.state, damping):
            result += (y.to(matrix) @ matrix @ x.to(matrix).T)
        return result

    def dense_curvature(self, damping=0.0):
        if damping:
            pairs = self._damped_factors(self.state, damping)
        else:
            pairs = []
            for index, relation in enumerate(self.relations):
                term = self._term_statistics(self.state, index)
                x, y = _dense(to_cpu64(term["factor_in"])), to_cpu64(term["factor_out"])
                pairs.append((x, y) if relation == "same" else (y, x))
        ref = self.layer.weight
        return sum(torch.kron(x, y) for x, y in pairs).to(device=ref.device, dtype=ref.dtype)

    def summary(self, damping, with_spectra):
        summary = {"in_trace": self.info.get("in_trace"), "out_trace": self.info.get("out_trace")}
        if "eigen_in" in self.state:
            scales = 1.0 + torch.outer(self.state["eigen_out"], self.state["eigen_in"])
            summary.update(diagonal_summary(scales, 0.0, with_spectra, prefix="pencil"))
        return {k: v for k, v in summary.items() if v is not None}


class TiedDiagonalBlock(_TiedBlock):
    """``structure="diag"``: the sum of the two uses' exact diagonals, ``(D_1 + D_2 + lambda)^-1``."""

    structure = "diag"

    def __init__(self, terms, relations, state, weight_sharing):
        super().__init__(terms, relations, state, weight_sharing)
        self.inverse_keys = self.statistic_keys  # the statistics are the whole curvature

    def _diagonal(self, statistics):
        total = None
        for index, relation in enumerate(self.relations):
            diagonal = self._term_statistics(statistics, index)["fisher_diagonal"]
            diagonal = diagonal if relation == "same" else diagonal.T
            total = diagonal if total is None else total + diagonal
        return total

    def prepare_inverse(self, statistics, damping, want_spectrum):
        diagonal = to_cpu64(self._diagonal(statistics))
        return {}, {"diag_min": float(diagonal.min()), "diag_max": float(diagonal.max()),
                    "diag_mean": float(diagonal.mean())}

    def precondition(self, grad_matrix, damping, tensors=None):
        tensors = self.state if tensors is None else tensors
        return grad_matrix / (self._diagonal(tensors) + damping)

    def damped_product(self, matrix, damping):
        return matrix * (self._diagonal(self.state) + damping)

    def dense_curvature(self, damping=0.0):
        return torch.diag(self._diagonal(self.state).T.reshape(-1) + damping)

    def summary(self, damping, with_spectra):
        return diagonal_summary(self._diagonal(self.state), damping, with_spectra)
