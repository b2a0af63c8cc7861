"""Which curvature block a parameter gets: the kind of its use(s) and the chosen structure decide."""
from __future__ import annotations

from typing import Callable, Dict, List, Optional, Tuple, Type

from .base import LayerCurvature
from .diagonal import DiagonalBlock
from .eigenbasis import EigenbasisBlock
from .embedding import EmbeddingDiagonalBlock, EmbeddingEigenbasisBlock, EmbeddingKroneckerBlock
from .gradient_scales import GradientScaledEigenbasisBlock
from .grouped import GroupedDiagonalBlock, GroupedEigenbasisBlock, GroupedKroneckerBlock
from .kronecker import KroneckerBlock
from .layers import LayerAdapter
from .norm import NormDiagonalBlock, NormPairBlock
from .tied import TiedDiagonalBlock, TiedKroneckerBlock, layout_relation

# Blocks built from the generic rows a = inputs, g = output gradients (linear maps, convolutions).
STRUCTURES: Dict[str, Type[LayerCurvature]] = {
    "kfac": KroneckerBlock, "ekfac": EigenbasisBlock, "ekfac-gradient": GradientScaledEigenbasisBlock,
    "diag": DiagonalBlock,
}
# Layer kinds whose curvature has a structure of its own: {layer kind: {structure: block class}}.
# Norm layers: "kfac" and both "ekfac" give the exact per-channel 2x2 blocks (blocks/norm.py).
_NORM_BLOCKS = {"kfac": NormPairBlock, "ekfac": NormPairBlock, "ekfac-gradient": NormPairBlock,
                "diag": NormDiagonalBlock}
# An elementwise scale or shift by a parameter: the exact diagonal whatever the structure.
_DIAGONAL_BLOCKS = dict.fromkeys(STRUCTURES, NormDiagonalBlock)
# Grouped convolutions: a block-diagonal output factor, one input factor shared by the groups (blocks/grouped.py).
# Under "ekfac-gradient" grouped convolutions keep EKFAC's sampled scales (scales following the gradient
# were not built or measured for their per-group bases), and so do embeddings: scales following the
# gradient there took the benchmark's transformer 1.04-1.10x the steps, seed by seed (README, Choosing the structure).
_GROUPED_BLOCKS = {"kfac": GroupedKroneckerBlock, "ekfac": GroupedEigenbasisBlock,
                   "ekfac-gradient": GroupedEigenbasisBlock, "diag": GroupedDiagonalBlock}
LAYER_BLOCKS: Dict[str, Dict[str, Type[LayerCurvature]]] = {
    "embedding": {"kfac": EmbeddingKroneckerBlock, "ekfac": EmbeddingEigenbasisBlock,
                  "ekfac-gradient": EmbeddingEigenbasisBlock, "diag": EmbeddingDiagonalBlock},
    "layer_norm": _NORM_BLOCKS,
    "batch_norm": _NORM_BLOCKS,
    "grouped_conv1d": _GROUPED_BLOCKS,
    "grouped_conv2d": _GROUPED_BLOCKS,
    "group_norm": _NORM_BLOCKS,
    "instance_norm": _NORM_BLOCKS,
    "rms_norm": _NORM_BLOCKS,
    "scale": _DIAGONAL_BLOCKS,
    "shift": _DIAGONAL_BLOCKS,
}
# Uses whose curvature is a product of an input and an output factor: the ones a tied block can pair.
KRONECKER_KINDS = ("linear", "conv1d", "conv2d", "embedding", "attention_in", "attention_q", "attention_k",
                   "attention_v", "attention_out")


def block_class(layer: LayerAdapter, structure: str) -> Type[LayerCurvature]:
    if structure not in STRUCTURES:
        raise ValueError(f"structure must be one of {tuple(STRUCTURES)}, got {structure!r}")
    return LAYER_BLOCKS.get(layer.kind, STRUCTURES)[structure]


# Layers whose input is a constant: summing positions first ("reduce") gives their exact Fisher.
_CONSTANT_INPUT_KINDS = ("attention_in_bias",)


def make_block(layer: LayerAdapter, structure: str, state: dict, weight_sharing: str = "expand",
               factor_blocks=(None, None)) -> LayerCurvature:
    if layer.kind in _CONSTANT_INPUT_KINDS:
        weight_sharing = "reduce"
    if factor_blocks != (None, None):
        # Block-diagonal factors (ngopt/factors.py) are kept by the K-FAC block only: an eigenbasis
        # is kept for whole factors.
        return block_class(layer, "kfac")(layer, state, weight_sharing=weight_sharing, factor_blocks=factor_blocks)
    return block_class(layer, structure)(layer, state, weight_sharing=weight_sharing)


def block_for_uses(layers: List[LayerAdapter], structure: str, state: dict, weight_sharing: str = "expand",
                   plan: Callable = None) -> Tuple[Optional[LayerCurvature], str]:
    """``(block, why)`` for a parameter applied by ``layers`` (one per distinct use); block None: no block.

    One use: that use's block, in the form ``plan(layer) -> budget.Plan`` gives it (structure and
    factor blocks within the cost budget).  Two uses of the Kronecker kinds without biases whose
    gradient matrices lay the parameter out the same way or transposed (a tied embedding and
    output layer): a tied block (``blocks/tied.py``), its diagonal form when a factor is larger than
    the plan allows whole.  Anything else has no block.
    """
    if len(layers) == 1:
        chosen = plan(layers[0]) if plan is not None else None
        if chosen is None:
            return make_block(layers[0], structure, state, weight_sharing), ""
        block = make_block(layers[0], chosen.structure, state, weight_sharing, chosen.blocks)
        block.plan = chosen
        return block, ""
    kinds = ", ".join(layer.kind for layer in layers)
    if len(layers) > 2:
        return None, f"applied in {len(layers)} different ways ({kinds}); a block covers at most two"
    if any(layer.kind not in KRONECKER_KINDS or layer.has_bias for layer in layers):
        return None, (f"applied in two ways ({kinds}); a block pairs two linear maps, convolutions or embedding "
                      "lookups without biases")
    relations = ["same", layout_relation(layers[0], layers[1])]
    if relations[1] == "other":
        return None, f"applied in two ways ({kinds}) that lay the parameter out differently"
    whole = plan is None or all(chosen.blocks == (None, None) and chosen.structure != "diag"
                                for chosen in map(plan, layers))
    diagonal = structure == "diag" or not whole
    terms = [make_block(layer, "diag" if diagonal else "kfac", {}, weight_sharing) for layer in layers]
    tied = TiedDiagonalBlock if diagonal else TiedKroneckerBlock
    return tied(terms, relations, state, weight_sharing), ""
