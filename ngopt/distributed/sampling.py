"""Sampled targets per rank: generators seeded by ``hash(seed, rank, step)``."""
from __future__ import annotations

import hashlib
from typing import Optional

import torch


class RankSampler:
    """Generators for sampled targets, seeded by ``hash(seed, rank, step)``: per rank, stateless.

    Stateless seeding makes a resumed run draw what the uninterrupted run drew without
    saving one generator state per rank; different ranks draw independent numbers.
    """

    def __init__(self, opt, rank: int):
        self._opt = opt
        self.rank = rank
        self._generator: Optional[torch.Generator] = None
        self._key = None

    def seed_for(self, step: int) -> int:
        return rank_step_seed(self._opt.seed, self.rank, step)

    def generator_for(self, device: torch.device) -> torch.Generator:
        key = (self._opt.seed, self._opt.steps_taken, str(device))
        if self._generator is None or self._key != key:
            self._generator = torch.Generator(device=device)
            self._generator.manual_seed(self.seed_for(self._opt.steps_taken))
            self._key = key
        return self._generator


def rank_step_seed(seed: int, rank: int, step: int) -> int:
    """A 63-bit seed from ``(seed, rank, step)`` (BLAKE2b), distinct for distinct triples in practice."""
    digest = hashlib.blake2b(f"{seed}:{rank}:{step}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") & ((1 << 63) - 1)
