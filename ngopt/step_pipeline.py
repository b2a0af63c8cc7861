"""One step's curvature work, computed in full before anything is written.

    recorded forwards -> statistics -> inverses -> projected statistics (EKFAC) -> gradient scales
        -> proposals
        -> step rule (rules/) -> fallback changes -> one finiteness check -> write

Each stage is a function of explicit arguments that returns new tensors and writes nothing; the
:class:`PendingStep` they fill in is checked once and then written as a whole, so a step with a
non-finite value anywhere leaves weights and curvature state untouched.  A data-parallel
communicator, when given, averages the statistics and shares the inversions (``distributed/``).
"""
from __future__ import annotations

import math
from collections import ChainMap
from contextlib import nullcontext
from dataclasses import dataclass, field
from typing import Callable, Dict, List, Optional, Sequence

import torch

from . import fallback as fallback_rules
from . import scratch
from .fallback import with_weight_decay
from .linalg import damped_inverses, inversion_threads, pair_gram
from .packing import BlockPacker
from .blocks.base import LayerCurvature
from .rules.base import StepInputs, StepResult


def all_finite(tensors: Sequence[torch.Tensor], factors: Optional[List[float]] = None) -> bool:
    """Whether every entry of every tensor (times its factor, when given, in the tensor's dtype) is finite:
    one fused reduction and one host sync per device (a model on a GPU still keeps a few CPU tensors, e.g.
    the Adam fallback's step counter).

    Each tensor's norm, computed in its dtype, bounds every entry; the norms come to the host as floats, and
    each must stay within the dtype's largest finite value over ``|factor|`` (NaN and Inf fail the comparison).
    """
    if not tensors:
        return True
    tensors = list(tensors)
    norms = torch._foreach_norm(tensors)
    limits = [_norm_limit(t.dtype, 1.0 if factors is None else factors[i]) for i, t in enumerate(tensors)]
    by_device: Dict[torch.device, List[int]] = {}
    for index, norm in enumerate(norms):
        by_device.setdefault(norm.device, []).append(index)
    for indices in by_device.values():
        values = torch.stack([norms[i] for i in indices]).tolist()
        if not all(value <= limits[i] for value, i in zip(values, indices)):
            return False
    return True


_LARGEST: Dict[torch.dtype, float] = {}  # torch.finfo(dtype).max, looked up once per dtype


def _norm_limit(dtype: torch.dtype, factor: float) -> float:
    """The largest norm whose entries times ``factor`` stay finite in ``dtype`` (-1 for a non-finite factor:
    nothing passes).  A factor of zero keeps the dtype's own limit: a non-finite norm still fails."""
    if dtype not in _LARGEST:
        _LARGEST[dtype] = torch.finfo(dtype).max
    if not math.isfinite(factor):
        return -1.0
    return _LARGEST[dtype] / abs(factor) if factor else _LARGEST[dtype]


def finite_numbers(values: dict) -> bool:
    return all(math.isfinite(v) for v in values.values() if isinstance(v, float))


def tentative_view(block: LayerCurvature, statistics: dict, inverses: dict):
    """The block's tensors as this step will leave them: new ones first, then the committed state."""
    if block not in inverses and block not in statistics:
        return block.state
    return ChainMap(inverses[block][0] if block in inverses else {}, statistics.get(block, {}), block.state)


# ---------------------------------------------------------------------------------------- the stages
def new_statistics(blocks: Sequence[LayerCurvature], forwards: dict, stats_memory: float,
                   loss_scale: float = 1.0, share: Optional[Callable] = None) -> Optional[dict]:
    """``{block: blended statistics}`` from the recorded forwards; None if any is non-finite.

    ``share(batches)`` averages the batch statistics over ranks (data-parallel).
    """
    batches = {}
    for block in blocks:
        if block in forwards:
            batch = block.batch_statistics(forwards[block])
            if batch is not None:
                batches[block] = block.unscaled(batch, loss_scale)
    if share is not None:
        batches = share(batches)
    statistics = {block: block.blend(batch, stats_memory) for block, batch in batches.items()}
    if not all_finite([t for stats in statistics.values() for t in stats.values()]):
        return None
    return statistics


def new_inverses(jobs: list, invert: Optional[Callable] = None, track_spectra: bool = False) -> Optional[dict]:
    """``{block: (tensors, info)}`` for ``jobs = [(block, statistics, damping)]``; None if non-finite.

    ``invert(jobs)`` shares the inversions over ranks (data-parallel); else each block inverts its own.
    """
    # Most steps invert nothing: the thread count is then left alone.
    threads = inversion_threads(max((t.shape[-1] for _, stats, _ in jobs for t in stats.values()
                                     if torch.is_tensor(t) and t.dim() > 1), default=1)) if jobs else nullcontext()
    with threads:
        inverses = invert(jobs) if invert is not None else invert_blocks(jobs, track_spectra)
    if not all_finite([t for new, _ in inverses.values() for t in new.values()]):
        return None
    return inverses


def invert_blocks(jobs: list, track_spectra: bool = False) -> dict:
    """``{block: block.prepare_inverse(statistics, damping, track_spectra)}`` for ``jobs``, inverted in this process.

    Without spectra, the blocks that split their work into an :class:`~ngopt.blocks.base.InversionPlan`
    have all their factors inverted in one :func:`~ngopt.linalg.damped_inverses` call (equal sizes
    batched together); the others invert their own.
    """
    plans = {} if track_spectra else {block: block.inversion_plan(stats, damping) for block, stats, damping in jobs}
    planned = [(block, plan) for block, plan in plans.items() if plan is not None]
    results = damped_inverses([request for _, plan in planned for request in plan.requests])
    inverses, start = {}, 0
    for block, plan in planned:
        stop = start + len(plan.requests)
        inverses[block] = plan.finish(results[start:stop])
        start = stop
    for block, stats, damping in jobs:
        if block not in inverses:
            inverses[block] = block.prepare_inverse(stats, damping, track_spectra)
    return {block: inverses[block] for block, _, _ in jobs}


def add_projected_statistics(blocks: Sequence[LayerCurvature], statistics: dict, inverses: dict, forwards: dict,
                             stats_memory: float, loss_scale: float = 1.0, share: Optional[Callable] = None) -> bool:
    """Second phase for blocks whose statistics live in a basis the inversion makes (EKFAC).

    Adds them to ``statistics``; False if any is non-finite.  ``share(batches)`` as in :func:`new_statistics`.
    """
    blocks = [b for b in blocks if b.projected_keys and (b in statistics or b in inverses)]
    if not blocks:
        return True
    views = {b: tentative_view(b, statistics, inverses) for b in blocks}
    batches = {}
    for block in blocks:
        if block in statistics and block in forwards:
            batch = block.projected_batch_statistics(views[block], forwards[block])
            if batch is not None:
                batches[block] = block.unscaled(batch, loss_scale)
    if share is not None:
        batches = share(batches)
    new = {block: block.blend_projected(batches.get(block), views[block], block in inverses, stats_memory)
           for block in blocks}
    return _add_if_finite(statistics, new)


def add_gradient_scales(blocks: Sequence[LayerCurvature], statistics: dict, inverses: dict, term_count: float,
                        memory: float) -> Optional[dict]:
    """Third phase, every step, for blocks whose scales follow the gradient (``follows_gradient``).

    ``term_count``: ``1 / mean w_n`` of the loss (the batch's term count for a mean) over the whole
    batch the gradient averages.  Adds the new tensors to ``statistics`` and returns ``{block: the
    gradient in its basis}`` for :func:`proposals`; None if a new tensor is non-finite.
    """
    new, rotated = {}, {}
    for block in blocks:
        layer = block.layer
        rebased = block in inverses
        if not block.follows_gradient or (layer.weight.grad is None and not rebased):
            continue
        view = tentative_view(block, statistics, inverses)
        if not all(key in view for key in ("basis_in", "basis_out")):
            continue  # no basis yet: proposals() names the block
        if layer.weight.grad is not None:
            grad_matrix = layer.gradient_matrix(layer.weight.grad, layer.bias.grad if layer.has_bias else None)
            rotated[block] = block.rotated(view, grad_matrix)
        new[block] = block.gradient_scales(view, rotated.get(block), term_count, memory, rebased)
    return rotated if _add_if_finite(statistics, new) else None


def _add_if_finite(statistics: dict, new: dict) -> bool:
    """Add ``new`` (``{block: tensors}``) to ``statistics`` if every tensor is finite; whether it was."""
    if not all_finite([t for tensors in new.values() for t in tensors.values()]):
        return False
    for block, tensors in new.items():
        if tensors:
            statistics.setdefault(block, {}).update(tensors)
    return True


def proposals(blocks: Sequence[LayerCurvature], groups: list, group_index: Callable[[torch.Tensor], int],
              statistics: dict, inverses: dict, step_index: int,
              average: Callable = lambda *values: values,
              packer: Optional[BlockPacker] = None,
              rotated: Optional[dict] = None) -> "tuple[Optional[StepInputs], list]":
    """Every block's gradient matrix ``g`` (plus weight decay) and proposal ``p = C^-1 g``, with their dots.

    Each proposal is a tensor that nothing else holds this step, so a step rule may write into it.  With
    a ``packer``, small plain Kronecker blocks are computed together (:mod:`ngopt.packing`): their
    gradient matrices and proposals are then regions of the packs' stacks, listed in ``inputs.packs``.
    ``rotated``: the gradients that :func:`add_gradient_scales` put in their blocks' bases (used where
    no weight decay changes them).

    Returns ``(inputs, missing)``: ``missing`` are the blocks with a nonzero gradient and still no
    curvature to precondition it; ``inputs`` is None if a dot product is non-finite.
    """
    prepared, per_group, missing = {}, {}, []
    for block in blocks:
        layer = block.layer
        if layer.weight.grad is None:
            continue
        index = group_index(layer.weight)
        decay = groups[index]["weight_decay"]
        weight_grad = with_weight_decay(layer.weight.grad, layer.weight, decay)
        bias_grad = with_weight_decay(layer.bias.grad, layer.bias, decay) if layer.has_bias else None
        prepared[block] = (index, weight_grad, bias_grad, tentative_view(block, statistics, inverses))
        per_group.setdefault(index, []).append(block)
    ready = {block: (index, weight_grad) for block, (index, weight_grad, _, view) in prepared.items()
             if all(key in view for key in block.inverse_keys)}
    directions, packs = {}, []
    grams, gram_order = [], []  # [B, 2, 2] Gram matrices of (p, g), and their blocks in order
    for pack in packer.packs(ready) if packer is not None else []:
        members = [(block, prepared[block]) for block in pack.blocks]
        pack.fill_gradients([g for block, (_, w, b, _) in members for g in [w] + ([b] if block.layer.has_bias else [])])
        stack = pack.precondition([(view["inverse_out"], view["inverse_in"]) for _, (*_, view) in members])
        directions.update(zip(pack.blocks, zip(pack.gradient_regions, pack.regions[stack])))
        grams.append(pack.grams(stack))
        gram_order += pack.blocks
        packs.append((pack, stack))
    own_grams = []
    for block, (index, weight_grad, bias_grad, view) in prepared.items():
        if block in directions:
            continue
        grad_matrix = _gradient_matrix(block, weight_grad, bias_grad)
        if block in ready:
            # Memory of a replaced momentum buffer, never the buffer this step still reads.
            spare = scratch.take(block.scratch, "proposal", grad_matrix, avoid=block.state.get("momentum_buffer")) \
                if block.writes_into else None
            keywords = {"out": spare} if spare is not None else {}
            if rotated and block in rotated and not groups[index]["weight_decay"]:
                keywords["rotated"] = rotated[block]
            proposal = block.precondition(grad_matrix, groups[index]["damping"], view, **keywords)
        else:
            missing.append(block)
            proposal = grad_matrix.clone()  # a proposal is always the step's own tensor: rules may reuse it
        directions[block] = (grad_matrix, proposal)
        own_grams.append(pair_gram(proposal, grad_matrix))
        gram_order.append(block)
    if own_grams:
        grams.append(torch.stack(own_grams))
    directions = {block: directions[block] for block in prepared}  # the blocks' own order
    dots = {}
    if grams:
        # One transfer for all the scalars the step needs: <p, g>, |p|^2, |g|^2 per block.
        sums = (torch.cat(grams) if len(grams) > 1 else grams[0]).tolist()  # exact as floats: no float64 copy
        # [[<p, p>, <p, g>], [<g, p>, <g, g>]] per block, checked as the Python floats they become anyway
        # (a tensor check and the join of a single Gram stack cost 15 us against 5 with these, 3 blocks)
        if not all(math.isfinite(value) for gram in sums for row in gram for value in row):
            return None, []
        found = {block: (gram[0][1], gram[0][0], gram[1][1]) for block, gram in zip(gram_order, sums)}
        dots = {block: found[block] for block in directions}
    missing = [b for b in missing if dots[b][2] > 0.0]
    return StepInputs(groups, per_group, directions, dots, step_index, average=average, packs=packs), missing


def _gradient_matrix(block: LayerCurvature, weight_grad: torch.Tensor, bias_grad: Optional[torch.Tensor]):
    """The block's gradient matrix; a large layer's weight and bias are joined in memory it keeps for it."""
    layer = block.layer
    if bias_grad is None or not scratch.worth_keeping(weight_grad):
        return layer.gradient_matrix(weight_grad, bias_grad)
    kept = block.scratch.get("gradient_matrix")
    shape = (layer.out_dim, weight_grad.numel() // layer.out_dim + 1)
    out = kept if scratch.fits(kept, shape, weight_grad.dtype, weight_grad.device) else None
    matrix = layer.gradient_matrix(weight_grad, bias_grad, out=out)
    block.scratch["gradient_matrix"] = matrix  # read only within a step: the next one may overwrite it
    return matrix


@dataclass
class FallbackChange:
    """One group's fallback changes: ``params += changes``, then the new state entries."""

    params: List[torch.Tensor]
    changes: List[torch.Tensor]
    new_states: List[dict]

    def tensors(self) -> List[torch.Tensor]:
        """Everything this part would write (the states too: Adam's moments can overflow alone)."""
        return list(self.changes) + [t for entries in self.new_states for t in entries.values()]

    def apply(self, state) -> None:
        torch._foreach_add_(self.params, self.changes)
        for param, entries in zip(self.params, self.new_states):
            state[param].update(entries)


def fallback_changes(groups: list, covered, state) -> List[FallbackChange]:
    """Per param group, the fallback rule's changes to the parameters outside every block, unwritten."""
    parts = []
    for group in groups:
        params = [p for p in group["params"] if p.grad is not None and p not in covered]
        if not params:
            continue
        grads = [p.grad for p in params]
        states = [state[p] for p in params]
        if group["fallback"] == "adam":
            directions, new_states = fallback_rules.adam_directions(params, grads, states,
                                                                    weight_decay=group["weight_decay"])
        else:
            directions, new_states = fallback_rules.sgd_directions(params, grads, states, momentum=group["momentum"],
                                                                   weight_decay=group["weight_decay"])
        step = group["lr"] * group["fallback_lr_scale"]
        parts.append(FallbackChange(params, torch._foreach_mul(directions, -step), new_states))
    return parts


# ---------------------------------------------------------------------------------------- check, write
@dataclass
class PendingStep:
    """Everything one step would write, kept apart until :meth:`finite` passes and :meth:`write` runs."""

    statistics: dict = field(default_factory=dict)     # block -> new statistics tensors
    inverses: dict = field(default_factory=dict)       # block -> (new inverse tensors, info)
    result: Optional[StepResult] = None                # the step rule's updates and state entries
    fallback: List[FallbackChange] = field(default_factory=list)

    def finite(self) -> bool:
        """One check of every update the step would write (block updates times their factors; a pack's
        whole stack for its blocks)."""
        scale = self.result.update_scale
        packed = self._packed_blocks()
        written = [pack.stacks[index] for pack, index in self.result.packs]
        factors = [abs(scale.get(pack.blocks[0], 1.0)) for pack, _ in self.result.packs]
        for block, update in self.result.updates.items():
            if block not in packed:
                written.append(update)
                factors.append(abs(scale.get(block, 1.0)))
        written += [t for part in self.fallback for t in part.tensors()]
        factors += [1.0] * (len(written) - len(factors))
        return all_finite(written, factors) and finite_numbers(self.result.diagnostics)

    def _packed_blocks(self) -> set:
        """The blocks whose updates are regions of a pack's stack (checked and written as whole stacks)."""
        return {block for pack, _ in self.result.packs for block in pack.blocks}

    def write_curvature(self, step_index: int) -> None:
        for block, tensors in self.statistics.items():
            block.commit(tensors)
        for block, (tensors, info) in self.inverses.items():
            block.commit(tensors)
            block.info = dict(info, inversion_step=step_index)
        for block, entries in (self.result.states if self.result is not None else {}).items():
            replaced = block.state.get("momentum_buffer")
            block.state.update(entries)
            if block.writes_into:  # a replaced buffer is no longer state: the next proposal's memory
                scratch.set_aside(block.scratch, "proposal", replaced, block.state.get("momentum_buffer"))

    def write_block_updates(self, keep_previous: bool) -> None:
        """``w += s * u`` for every block (``s`` from ``update_scale``, 1 where absent); ``keep_previous``
        keeps ``u`` as the next step's momentum direction (the quadratic rule)."""
        by_scale: Dict[float, tuple] = {}  # one fused add per distinct factor (one per param group at most)
        for pack, index in self.result.packs:  # a pack's places in its stack, parameter-shaped, kept with it
            params, parts = by_scale.setdefault(self.result.update_scale.get(pack.blocks[0], 1.0), ([], []))
            params += pack.params
            parts += pack.update_places[index]
        packed = self._packed_blocks()
        for block, update in self.result.updates.items():
            if keep_previous:
                block.state["previous_update"] = update
            if block in packed:
                continue
            params, parts = by_scale.setdefault(self.result.update_scale.get(block, 1.0), ([], []))
            weight_part, bias_part = block.layer.split_matrix(update)
            for param, part in ((block.layer.weight, weight_part), (block.layer.bias, bias_part)):
                if part is not None and param.grad is not None:
                    params.append(param)
                    parts.append(part)
        for scale, (params, parts) in by_scale.items():
            if params:
                torch._foreach_add_(params, parts, alpha=scale)

    def write_fallback(self, state) -> None:
        for part in self.fallback:
            part.apply(state)
