"""Grouped and depthwise convolutions (``groups > 1``): one output factor per group, one shared input factor.

Group ``j`` maps its own ``C_in / groups`` input channels to its ``o = C_out / groups``
output channels, so its weight gradient of one example is ``sum_t g_tj a_tj^T``
with ``a_tj`` the patch of its input channels at output position ``t``.  The
block treats every (position, group) pair as a position of one shared layer
``[C_out, C_in / groups * k + 1]`` whose output gradient is zero outside the
group's own channels ("expand", Eschenhagen et al., NeurIPS 2023):

    A = mean over examples, positions and groups of a_tj a_tj^T     (one d x d factor)
    G = blockdiag_j (1/c) sum over examples and positions of g_tj g_tj^T

K-FAC (``A (x) G``, KFC of Grosse & Martens 2016 per group with the input factor
pooled over groups), EKFAC (a block-diagonal eigenbasis of ``G``) and the exact
diagonal all see the exact per-example gradients.  Rows stay compact: inputs
``[N, T, groups, d]``, output gradients ``[K, N, T, groups, o]``; ``G`` is
assembled block-diagonally, never from zero-padded rows.
"""
from __future__ import annotations

import torch

from ..linalg import to_cpu64
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .kronecker import KroneckerBlock, add_input_moment
from .rows import example_chunks


def _groups(block) -> int:
    return block.layer.groups


def _describe(block) -> str:
    layer = block.layer
    return f"{layer.kind} {block.structure} [{layer.out_dim} x {layer.in_dim}] ({_groups(block)} groups)"


class GroupedKroneckerBlock(KroneckerBlock):
    describe = _describe

    def factor_sums(self):
        d_in, groups = self.layer.in_dim, _groups(self)
        per_group = self.layer.out_dim // groups
        ref = self.layer.weight
        factor_in = torch.zeros(d_in, d_in, dtype=ref.dtype, device=ref.device)
        blocks_out = torch.zeros(groups, per_group, per_group, dtype=ref.dtype, device=ref.device)
        rows = 0
        for input_rows, grad_rows, scale in self.factor_rows():
            rows += add_input_moment(factor_in, input_rows)
            g = grad_rows.reshape(-1, groups, per_group).to(ref.dtype)
            blocks_out.add_(torch.einsum("rjo,rjp->jop", g, g), alpha=scale)
        return factor_in, rows, torch.block_diag(*blocks_out)


def _per_example_square_sum(input_rows, grad_rows):
    """``sum_{k,n} (sum_t g[k,n,t,j] a[n,t,j]^T)^2`` as ``[C_out, d]`` for compact grouped rows."""
    total = 0
    for start, stop, a in example_chunks(input_rows):
        a = a.to(grad_rows.dtype)
        per_example = torch.einsum("kntjo,ntjd->knjod", grad_rows[:, start:stop], a)
        total = total + per_example.square().sum(dim=(0, 1)).reshape(-1, a.shape[-1])
    return total


class GroupedDiagonalBlock(DiagonalBlock):
    square_sum = staticmethod(_per_example_square_sum)
    describe = _describe


class GroupedEigenbasisBlock(GroupedKroneckerBlock, EigenbasisBlock):
    """EKFAC with the output eigenbasis taken group by group, so that it stays block-diagonal."""

    def prepare_inverse(self, statistics, damping, want_spectrum):
        result, info = super().prepare_inverse(statistics, damping, want_spectrum)
        groups = _groups(self)
        per_group = self.layer.out_dim // groups
        factor = to_cpu64(statistics["factor_out"]).reshape(groups, per_group, groups, per_group)
        blocks = factor.diagonal(dim1=0, dim2=2).permute(2, 0, 1)  # [groups, o, o]
        eigenvalues, bases = torch.linalg.eigh(0.5 * (blocks + blocks.transpose(1, 2)))
        ref = self.layer.weight
        result["basis_out"] = torch.block_diag(*bases).to(device=ref.device, dtype=ref.dtype)
        result["eigen_out"] = eigenvalues.reshape(-1).clamp(min=0.0).to(device=ref.device, dtype=ref.dtype)
        info["out_eigenvalues"] = eigenvalues.reshape(-1).sort().values
        return result, info

    def projected_batch_statistics(self, view, num_forwards):
        if not self.pending:
            return None
        dtype = self.layer.weight.dtype
        groups = _groups(self)
        per_group = self.layer.out_dim // groups
        basis_out = view["basis_out"].reshape(groups, per_group, groups, per_group)
        bases = basis_out.diagonal(dim1=0, dim2=2).permute(2, 0, 1)  # [groups, o, o]
        total = None
        for input_rows, grad_rows, scale in self.calls_joined_per_forward():
            projected_out = torch.einsum("kntjo,joq->kntjq", grad_rows.to(dtype), bases)
            for start, stop, a in example_chunks(input_rows):
                projected_in = a.to(dtype) @ view["basis_in"]
                term = _per_example_square_sum(projected_in, projected_out[:, start:stop]) * scale
                total = term if total is None else total + term
        return {"scales": total / num_forwards}
