"""What the exchanges cost: bytes per collective, the cheaper collective, owners of the inversions by cost."""
from __future__ import annotations

from typing import List, Sequence

from ..blocks.base import LayerCurvature
from ..inversion_schedule import longest_first, square_cost
from .wire import _packed_size, _statistic_shapes, _symmetric_keys


def inverse_exchange_bytes(sizes: Sequence[int], collective: str) -> float:
    """Bytes into each rank for owner payloads ``sizes`` (bandwidth-optimal ring algorithms).

    ``all_gather`` of padded buffers: ``(R-1) max(sizes)``; ``all_reduce`` of the
    zero-filled concatenation: ``2 (R-1)/R sum(sizes)``.
    """
    world = len(sizes)
    if world < 2:
        return 0.0
    if collective == "all_gather":
        return float((world - 1) * max(sizes))
    return 2.0 * (world - 1) / world * sum(sizes)


def cheaper_inverse_collective(sizes: Sequence[int]) -> str:
    """The collective that moves fewer bytes: all-gather while loads are balanced, all-reduce when
    a few owners hold most of the payload (many more ranks than large blocks)."""
    gather, reduce = (inverse_exchange_bytes(sizes, c) for c in ("all_gather", "all_reduce"))
    return "all_gather" if gather <= reduce else "all_reduce"


def _has_own_inverse(block: LayerCurvature) -> bool:
    """Blocks whose inverse is more than their statistics are worth sharding (Kronecker, not diagonal)."""
    return bool(set(block.inverse_keys) - set(block.statistic_keys))


def inversion_cost(block: LayerCurvature, statistics: dict) -> float:
    """``sum d^3`` over the block's square statistics (``d_in^3 + d_out^3`` for Kronecker factors)."""
    return square_cost([tuple(statistics[key].shape) for key in block.statistic_keys])


def assign_owners(costs: Sequence[float], world_size: int) -> List[int]:
    """The rank that inverts each job: the longest-first rule over the ranks (same on every rank)."""
    if world_size < 1:
        raise ValueError(f"world_size must be >= 1, got {world_size}")
    return longest_first(costs, world_size)


def communication_volume(opt, world_size: int, shard_inversions: bool = True) -> dict:
    """Bytes per refresh and per inversion for ``opt``'s blocks on ``world_size`` ranks (formulas above).

    Returns plain numbers: ``statistics_buffer_bytes`` (the all-reduce buffer),
    ``statistics_bytes_per_rank`` (ring all-reduce, sent = received),
    ``inverse_payload_bytes`` (all owners together), ``inverse_collective`` and
    ``inverse_bytes_per_rank`` (received, headers left out),
    ``inversion_cost_total`` and ``inversion_cost_per_rank`` (largest owner's ``sum d^3``),
    ``factor_memory_bytes`` (factors and inverses held by every rank).
    """
    blocks = list(opt.blocks.values())
    element = {b: b.layer.weight.element_size() for b in blocks}
    stats = sum(element[b] * (sum(_packed_size(shape, key in _symmetric_keys(b))
                                  for key, shape in _statistic_shapes(b, {}) + _statistic_shapes(b, {}, True))
                              + 1 + int(bool(b.projected_keys))) for b in blocks)
    shared = [b for b in blocks if _has_own_inverse(b)]
    # an inverse (or eigenbasis) has the shape of the statistic it comes from: d x d for d x d, a vector
    # for a diagonal factor (embeddings), 2x2 stacks for norm layers
    shapes = {b: [shape for _, shape in _statistic_shapes(b, {})] for b in shared}
    payload = {b: element[b] * sum(_packed_size(shape, False) for shape in shapes[b]) for b in shared}
    costs = [square_cost(shapes[b]) for b in shared]
    total_cost = sum(costs)
    ring = 2.0 * (world_size - 1) / world_size
    volume = {"world_size": world_size, "statistics_buffer_bytes": stats,
              "statistics_bytes_per_rank": ring * stats if world_size > 1 else 0.0,
              "inverse_payload_bytes": sum(payload.values()), "inversion_cost_total": total_cost,
              "factor_memory_bytes": 2 * sum(payload.values())}
    if shard_inversions and world_size > 1 and shared:
        owners = assign_owners(costs, world_size)
        per_owner = [0] * world_size
        load = [0.0] * world_size
        for b, owner, cost in zip(shared, owners, costs):
            per_owner[owner] += payload[b]
            load[owner] += cost
        volume["inverse_collective"] = cheaper_inverse_collective(per_owner)
        volume["inverse_bytes_per_rank"] = inverse_exchange_bytes(per_owner, volume["inverse_collective"])
        volume["inversion_cost_per_rank"] = max(load)
    else:
        volume["inverse_collective"] = None
        volume["inverse_bytes_per_rank"] = 0.0
        volume["inversion_cost_per_rank"] = total_cost
    return volume
