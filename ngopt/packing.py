"""Small Kronecker blocks stacked, so that a plain step makes a few batched calls for all of them.

On a small network most of a plain step's time is the fixed cost of each call, not arithmetic: per
layer, the gradient matrix (weight and bias joined), two products with the inverse factors, the dot
products, the momentum update, the finiteness check and the write, each a call or several.  Blocks
of one param group that keep both factors whole, of one dtype and device, are stacked here,
zero-padded, into ``[B, O, I]`` matrices (``O``, ``I`` the group's largest output and input
dimensions) and ``[B, O, O]``, ``[B, I, I]`` inverses.  Zero padding makes each block's region of a
batched product its own product exactly (the padded rows and columns contribute nothing and stay
zero), so the results are the per-block computation's, up to the order of summation.

A pack keeps its tensors from step to step, with their views: one gradient stack, filled by one
fused copy, and two proposal stacks used in turn (the proposals become the momentum buffers, which
the next step still reads).  The inverse stacks are rebuilt only when a block's inverses are new
tensors (after an inversion).  Blocks are packed only where the padding adds little arithmetic
(:data:`MAX_PADDING`, :data:`SMALL_PRODUCTS`); the rest keep the per-block path.
"""
from __future__ import annotations

from typing import Dict, List, Optional, Sequence, Tuple

import torch

from .blocks.kronecker import KroneckerBlock
from .factors import Whole

# A pack's batched products (o^2 i + o i^2 multiply-adds per block, at the padded sizes) cost at most
# this many times the blocks' own, or at most SMALL_PRODUCTS in all: below that (tens of microseconds)
# the padding's arithmetic costs less than the calls the pack saves.
MAX_PADDING = 1.5
SMALL_PRODUCTS = 2 ** 21
# A pack's own calls (about a dozen) cost about what two blocks' calls cost on the per-block path: packs
# of two were no faster on the benchmark's networks (a CNN's two convolutions: 1.09-1.22x the plain step).
MIN_BLOCKS = 3
# Layers above this many gradient-matrix entries keep the per-block path: there the products'
# arithmetic, not the calls, is the cost, and padding would add to it.
MAX_BLOCK_NUMEL = 2 ** 14


def packable(block) -> bool:
    """A plain Kronecker block (both factors whole) of a small layer."""
    return type(block) is KroneckerBlock and type(block.form_in) is Whole and type(block.form_out) is Whole \
        and block.layer.out_dim * block.layer.in_dim <= MAX_BLOCK_NUMEL


def packs_by_shape(blocks: Sequence) -> List[list]:
    """Blocks (of one param group, dtype and device) in packs whose padded products cost at most
    :data:`MAX_PADDING` times their own or :data:`SMALL_PRODUCTS`: sorted by shape, each pack grown
    while it fits; packs of fewer than :data:`MIN_BLOCKS` blocks are dropped."""
    order = sorted(blocks, key=lambda b: (b.layer.out_dim, b.layer.in_dim))
    packs, current = [], []
    for block in order:
        trial = current + [block]
        if len(trial) > 1 and _padded(trial) > max(MAX_PADDING * _own(trial), SMALL_PRODUCTS):
            packs.append(current)
            trial = [block]
        current = trial
    packs.append(current)
    return [p for p in packs if len(p) >= MIN_BLOCKS]


def _products(out_dim: int, in_dim: int) -> int:
    """Multiply-adds of ``G^-1 g A^-1`` for a ``[out_dim, in_dim]`` gradient matrix."""
    return out_dim * in_dim * (out_dim + in_dim)


def _own(blocks) -> int:
    return sum(_products(b.layer.out_dim, b.layer.in_dim) for b in blocks)


def _padded(blocks) -> int:
    return len(blocks) * _products(max(b.layer.out_dim for b in blocks), max(b.layer.in_dim for b in blocks))


class BlockPack:
    """The stacks of one pack of blocks and the views of each block's region in them."""

    def __init__(self, blocks: list, like: torch.Tensor):
        self.blocks = blocks
        self.out_dim = max(b.layer.out_dim for b in blocks)
        self.in_dim = max(b.layer.in_dim for b in blocks)
        self.gradients = self._zeros(like, self.out_dim, self.in_dim)
        self.gradient_regions = self._regions(self.gradients)
        self._gradient_places = self._places(self.gradient_regions)
        every = [p for b in blocks for p in b.layer.params()]
        # A parameter without a gradient (a bias the user froze) is not written, as on the per-block path.
        self._written = [p.grad is not None for p in every]
        self.params = [p for p, w in zip(every, self._written) if w]
        self.stacks, self.regions, self.update_places = [], [], []
        for _ in range(2):
            self._add_stack(like)
        self._inverse_key: Optional[tuple] = None
        self._inverses: list = []
        self.inverse_out = self.inverse_in = None

    def _add_stack(self, like: torch.Tensor, index: Optional[int] = None) -> None:
        """A zero proposal stack with its regions and parameter-shaped places, appended or at ``index``."""
        stack = self._zeros(like, self.out_dim, self.in_dim)
        regions = self._regions(stack)
        places = [place for place, w in zip(self._places(regions), self._written) if w]
        if index is None:
            self.stacks.append(stack)
            self.regions.append(regions)
            self.update_places.append(places)
        else:
            self.stacks[index], self.regions[index], self.update_places[index] = stack, regions, places

    def _zeros(self, like: torch.Tensor, rows: int, columns: int) -> torch.Tensor:
        return torch.zeros(len(self.blocks), rows, columns, dtype=like.dtype, device=like.device)

    def _regions(self, stack: torch.Tensor) -> List[torch.Tensor]:
        return [stack[k, :b.layer.out_dim, :b.layer.in_dim] for k, b in enumerate(self.blocks)]

    def _places(self, regions: List[torch.Tensor]) -> List[torch.Tensor]:
        """Each weight's and bias's place in the regions, parameter-shaped, in the layers' parameter order."""
        places = []
        for block, region in zip(self.blocks, regions):
            weight, bias = block.layer.split_matrix(region)
            places += [weight] + ([bias] if block.layer.has_bias else [])
        return places

    def places_are_views(self) -> bool:
        """Whether every parameter's place is a view into its stack (a layer whose split copies is not
        packable)."""
        return all(_shares(place, self.gradients) for place in self._gradient_places) \
            and all(_shares(place, stack) for stack, places in zip(self.stacks, self.update_places)
                    for place in places)

    # ---------------------------------------------------------------- the step's computations
    def fill_gradients(self, gradients: List[Optional[torch.Tensor]]) -> None:
        """Copy every parameter's gradient (weight decay included; None: zero) into the gradient stack."""
        sources = [torch.zeros_like(place) if g is None else g for place, g in zip(self._gradient_places, gradients)]
        torch._foreach_copy_(self._gradient_places, sources)

    def free_stack(self) -> int:
        """The proposal stack that holds none of the blocks' momentum buffers (the other one may)."""
        for index, regions in enumerate(self.regions):
            held = {id(r) for r in regions}
            if not any(id(b.state.get("momentum_buffer")) in held for b in self.blocks):
                return index
        # Both hold some (a state put together by hand): a new stack; the buffers keep the old one alive.
        self._add_stack(self.gradients, index=0)
        return 0

    def precondition(self, inverses: List[Tuple[torch.Tensor, torch.Tensor]]) -> int:
        """``P = G^-1 g A^-1`` of every block into the free proposal stack; returns its index.

        ``inverses``: each block's ``(inverse_out, inverse_in)`` as this step sees them.
        """
        self._inverse_stacks(inverses)
        index = self.free_stack()
        torch.bmm(torch.bmm(self.inverse_out, self.gradients), self.inverse_in, out=self.stacks[index])
        return index

    def grams(self, index: int) -> torch.Tensor:
        """``[B, 2, 2]``: each block's ``[[<p, p>, <p, g>], [<g, p>, <g, g>]]``."""
        pairs = torch.stack((self.stacks[index], self.gradients), dim=1).view(len(self.blocks), 2, -1)
        return torch.bmm(pairs, pairs.transpose(1, 2))

    def buffers(self, index: int, buffers: List[Optional[torch.Tensor]]) -> Optional[torch.Tensor]:
        """The momentum buffers as one stack (zero where a block has none): the other proposal stack when
        they are its regions, as after every packed step; else a copy (the first step, a loaded state).
        None when no block has one."""
        other = 1 - index
        if all(buffer is region for buffer, region in zip(buffers, self.regions[other])):
            return self.stacks[other]
        if all(buffer is None for buffer in buffers):
            return None
        gathered = torch.zeros_like(self.stacks[index])
        pairs = [(region, buffer) for region, buffer in zip(self._regions(gathered), buffers) if buffer is not None]
        torch._foreach_copy_([r for r, _ in pairs], [b for _, b in pairs])
        return gathered

    def _inverse_stacks(self, inverses: List[Tuple[torch.Tensor, torch.Tensor]]) -> None:
        """The zero-padded inverse stacks, rebuilt only when some block's inverses are new tensors."""
        key = tuple(id(t) for pair in inverses for t in pair)
        if key == self._inverse_key:
            return
        like = self.gradients
        out = self._zeros(like, self.out_dim, self.out_dim)
        into = self._zeros(like, self.in_dim, self.in_dim)
        for k, (inverse_out, inverse_in) in enumerate(inverses):
            out[k, :inverse_out.shape[0], :inverse_out.shape[1]] = inverse_out
            into[k, :inverse_in.shape[0], :inverse_in.shape[1]] = inverse_in
        # The tensors are kept with the key, so that their ids cannot be reused while it stands.
        self._inverse_key, self._inverses = key, list(inverses)
        self.inverse_out, self.inverse_in = out, into


def _shares(view: torch.Tensor, stack: torch.Tensor) -> bool:
    return view.untyped_storage().data_ptr() == stack.untyped_storage().data_ptr()


class BlockPacker:
    """The packs of a model's blocks, kept while the same blocks come ready (gradient and inverses)."""

    def __init__(self):
        self._key: Optional[tuple] = None
        self._packs: List[BlockPack] = []

    def packs(self, ready: Dict[object, Tuple[int, torch.Tensor]]) -> List[BlockPack]:
        """Packs among ``ready`` (``{block: (param group index, weight gradient)}``)."""
        eligible = [b for b in ready if packable(b)]
        # Which gradients are present decides which parameters a pack writes.
        key = tuple((id(b), ready[b][0], ready[b][1].dtype, ready[b][1].device,
                     b.layer.has_bias and b.layer.bias.grad is not None) for b in eligible)
        if key != self._key:
            self._key = key
            kinds: Dict[tuple, list] = {}
            for block in eligible:
                group, grad = ready[block]
                kinds.setdefault((group, grad.dtype, grad.device), []).append(block)
            made = [BlockPack(blocks, ready[blocks[0]][1]) for members in kinds.values()
                    for blocks in packs_by_shape(members)]
            self._packs = [pack for pack in made if pack.places_are_views()]
        return self._packs
