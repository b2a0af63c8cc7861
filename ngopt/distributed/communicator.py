"""The communicator one optimizer shares its curvature through: ``share_curvature`` and its collectives."""
from __future__ import annotations

import hashlib
import time
from typing import Dict, List, Optional, Sequence, Tuple

import torch
import torch.distributed as dist

from ..blocks.base import LayerCurvature
from ..optimizer import FisherDescent
from ..schedule import damping_due, resync_due
from ..step_pipeline import invert_blocks
from .collectives import CurvatureSyncError, _as_timedelta, _communication_device, _complete, _first_rank
from .costs import _has_own_inverse, assign_owners, cheaper_inverse_collective, inverse_exchange_bytes, inversion_cost
from .data_parallel import sync_parameters
from .sampling import RankSampler
from .wire import _statistics_buckets, decode_inverses, encode_inverses


def share_curvature(opt, process_group=None, shard_inversions: bool = True,
                    timeout: Optional[float] = None, resync_every: Optional[int] = None) -> "CurvatureCommunicator":
    """Make ``opt`` share its curvature work over ``process_group`` (default: the whole world).

    Call it on every rank, after ``torch.distributed.init_process_group`` and after
    building the optimizer (with the model wrapped in ``DistributedDataParallel``, or
    with :func:`average_gradients` in a plain loop).  Calling it again replaces the
    previous communicator.

    Args:
        opt: a :class:`ngopt.FisherDescent`.
        process_group: the group to share over; ``None`` is the default group.
        shard_inversions: ``True`` spreads inversions over the ranks and exchanges the
            results; ``False`` makes every rank invert every block (no traffic).
        timeout: seconds to wait on each collective before raising
            :class:`CurvatureSyncError`; ``None`` uses the process group's timeout.
        resync_every: every this many steps, copy the group's first rank's parameters and
            buffers to the others (one broadcast per dtype, the size of the model).  Replicas
            otherwise drift apart by rounding (kernels may round the same update differently
            in another process or on another CPU), by up to about ``0.5 sqrt(steps) * eps * max|w|``;
            with it the gap is at most that of ``resync_every`` steps.  ``None`` never
            resynchronizes.
    Returns:
        the communicator, also set as ``opt.communicator``.
    """
    if not isinstance(opt, FisherDescent):
        raise TypeError(f"opt must be an ngopt.FisherDescent, got {type(opt).__name__}")
    if not isinstance(shard_inversions, bool):
        raise TypeError(f"shard_inversions must be a bool, got {type(shard_inversions).__name__}")
    _as_timedelta(timeout)
    if resync_every is not None and (isinstance(resync_every, bool) or not isinstance(resync_every, int)):
        raise TypeError(f"resync_every must be an int or None, got {type(resync_every).__name__}")
    if resync_every is not None and resync_every < 1:
        raise ValueError(f"resync_every must be >= 1 or None, got {resync_every}")
    if not dist.is_available() or not dist.is_initialized():
        raise RuntimeError("share_curvature needs an initialized process group: call "
                           "torch.distributed.init_process_group(...) first (torchrun sets the environment)")
    if isinstance(opt.communicator, CurvatureCommunicator):
        opt.communicator.close()
    communicator = CurvatureCommunicator(opt, process_group, shard_inversions, timeout, resync_every)
    communicator.check_same_setup(opt)
    opt.communicator = communicator
    return communicator


class CurvatureCommunicator:
    """Averages statistics and shares inversions for one optimizer; see the module docstring."""

    def __init__(self, opt, process_group=None, shard_inversions: bool = True,
                 timeout: Optional[float] = None, resync_every: Optional[int] = None):
        self.group = process_group
        self.rank = dist.get_rank(process_group)
        self.world_size = dist.get_world_size(process_group)
        self.shard_inversions = shard_inversions
        self.timeout = _as_timedelta(timeout)
        self.device = _communication_device(process_group)
        self._opt = opt
        self._sampler = RankSampler(opt, self.rank)
        opt.sample_targets_with(self._sampler.generator_for)
        self.resync_every = resync_every
        # "auto" picks the cheaper of "all_gather" and "all_reduce" from the owners' payload sizes.
        self.inverse_collective = "auto"
        self._hooks = []
        if opt.damping_rule == "lm" and self.world_size > 1:
            self._hooks.append(opt.register_step_post_hook(lambda o, args, kwargs: self._agree_on_damping(o)))
        if resync_every is not None and self.world_size > 1:
            self._hooks.append(opt.register_step_post_hook(lambda o, args, kwargs: self._resync(o)))
        self._blocks_checked = bool(opt.blocks)
        self.totals = {"statistics_exchanges": 0, "statistics_bytes": 0, "statistics_seconds": 0.0,
                       "inverse_exchanges": 0, "inverse_bytes": 0, "inverse_seconds": 0.0,
                       "inversions_here": 0}

    # -- the two calls the optimizer makes -------------------------------------------------------------
    def average_statistics(self, blocks: Sequence[LayerCurvature], batches: Dict[LayerCurvature, dict],
                           due: bool, projected: bool = False) -> Dict[LayerCurvature, dict]:
        """``batches`` averaged over the ranks; called on every step, exchanges only when ``due`` (a refresh).

        ``blocks``: every block of the optimizer, in its order (the same on every rank);
        ``projected``: the second-phase statistics (EKFAC's scales) of the blocks that have them.
        """
        if self.world_size == 1:
            return batches
        if not self._blocks_checked and blocks:
            # Blocks are built at the first recorded forward, after share_curvature: check them once,
            # on the first step that has them (the same step on every rank).
            self._blocks_checked = True
            self.check_same_setup(self._opt)
        if not due:
            return batches
        blocks = list(blocks)
        if projected:
            blocks = [b for b in blocks if b.projected_keys]
        averaged: Dict[LayerCurvature, dict] = {}
        for bucket in _statistics_buckets(blocks, batches, projected):
            buffer = bucket.pack(batches, self.device)
            self._all_reduce(buffer, "statistics all-reduce", clock="statistics_seconds")
            self.totals["statistics_bytes"] += buffer.numel() * buffer.element_size()
            averaged.update(bucket.unpack(buffer))
        self.totals["statistics_exchanges"] += 1
        return averaged

    def invert(self, blocks: Sequence[LayerCurvature], jobs: Sequence[Tuple[LayerCurvature, dict, float]],
               track_spectra: bool = False):
        """``{block: (tensors, info)}`` as ``block.prepare_inverse`` gives it, the same on every rank.

        ``blocks``: every block of the optimizer (a peer's results are matched to them by name).
        Sharded blocks carry their owner's bits; blocks every rank inverts itself agree to within rounding.
        """
        want = track_spectra
        sharding = self.shard_inversions and self.world_size > 1
        shared = [job for job in jobs if sharding and _has_own_inverse(job[0])]
        local = [job for job in jobs if not (sharding and _has_own_inverse(job[0]))]
        results = invert_blocks(local, want)
        self.totals["inversions_here"] += len(results)
        if not shared:
            return results
        owners = assign_owners([inversion_cost(block, stats) for block, stats, _ in shared], self.world_size)
        mine, error = {}, None
        try:
            mine = invert_blocks([job for job, owner in zip(shared, owners) if owner == self.rank], want)
        except Exception as exc:  # sent to the peers so that they fail too instead of waiting
            error = exc
        self.totals["inversions_here"] += len(mine)
        received = self._exchange_inverses(blocks, mine, error)
        results.update(received)
        results.update(mine)
        return {block: results[block] for block, _, _ in jobs}

    def close(self) -> None:
        """Detach from the optimizer: its own sampling generator and no hooks (``share_curvature`` calls it)."""
        self._opt.sample_targets_with(None)
        for handle in self._hooks:
            handle.remove()
        self._hooks.clear()
        if self._opt.communicator is self:
            self._opt.communicator = None

    # -- step control: scalars every rank must agree on -------------------------------------------------
    def _agree_on_damping(self, opt) -> None:
        """After a Levenberg-Marquardt update, every rank takes rank 0's damping.

        The reduction ratio is the global batch's (losses averaged over the ranks, the
        prediction from shared values), but each rank computes it in its own process and
        rounding may put it on different sides of a threshold; then the ranks' rules would
        move ``damping`` differently and their inverses drift apart.  One tiny broadcast on
        the adaptation schedule keeps them equal.
        """
        if not damping_due(opt.steps_taken - 1, opt.damping_interval):  # the step just taken
            return
        values = torch.tensor([g["damping"] for g in opt.param_groups], dtype=torch.float64, device=self.device)
        self._wait(lambda: dist.broadcast(values, src=_first_rank(self.group), group=self.group, async_op=True),
                   "damping broadcast", "")
        for group, value in zip(opt.param_groups, values.tolist()):
            group["damping"] = value

    def _resync(self, opt) -> None:
        if resync_due(opt.steps_taken - 1, self.resync_every):  # the step just taken
            sync_parameters(opt.model, src=_first_rank(self.group), process_group=self.group,
                                 timeout=None if self.timeout is None else self.timeout.total_seconds())

    def average_scalars(self, *values: float) -> Tuple[float, ...]:
        """The mean over ranks of each value (one small all-reduce), e.g. the loss before and after a step."""
        if self.world_size == 1:
            return tuple(float(v) for v in values)
        buffer = torch.tensor([float(v) for v in values], dtype=torch.float64, device=self.device)
        self._all_reduce(buffer, "scalar average")
        return tuple((buffer / self.world_size).tolist())

    def summary(self) -> dict:
        """Counts, bytes and seconds of this rank's curvature exchanges so far (plain numbers)."""
        return dict(self.totals, rank=self.rank, world_size=self.world_size,
                    shard_inversions=self.shard_inversions, resync_every=self.resync_every)

    def check_same_setup(self, opt) -> None:
        """Fail at once, on every rank, if the ranks' optimizers do not match (blocks, schedule, step)."""
        if self.world_size == 1:
            return
        fingerprint = _setup_fingerprint(opt)
        values = torch.tensor([fingerprint, -fingerprint], dtype=torch.int64, device=self.device)
        self._all_reduce(values, "set-up check", op=dist.ReduceOp.MAX)
        if int(values[0]) != -int(values[1]):
            raise ValueError("share_curvature: the ranks' optimizers differ (layers, their sizes, fisher, "
                             "structure, stats_interval, inverse_interval or step count); build the same model and "
                             "optimizer on every rank, and load the same checkpoint everywhere")

    # -- collectives -----------------------------------------------------------------------------------
    def _all_reduce(self, tensor: torch.Tensor, what: str, op=dist.ReduceOp.SUM, clock: str = "") -> None:
        self._wait(lambda: dist.all_reduce(tensor, op=op, group=self.group, async_op=True), what, clock)

    def _all_gather(self, outputs: List[torch.Tensor], tensor: torch.Tensor, what: str, clock: str = "") -> None:
        self._wait(lambda: dist.all_gather(outputs, tensor, group=self.group, async_op=True), what, clock)

    def _wait(self, start, what: str, clock: str) -> None:
        """Run one collective to completion; ``clock`` names the ``totals`` entry its seconds go to."""
        started = time.perf_counter()
        _complete(start, f"{what} at step {self._opt.steps_taken}", self.timeout, self.group)
        if clock:
            self.totals[clock] += time.perf_counter() - started

    def _exchange_inverses(self, blocks, mine, error):
        """Share every owner's results (sizes first, then one collective); returns the blocks others computed."""
        payload = encode_inverses(mine, error, self.rank, self.device)
        sizes = [torch.zeros(1, dtype=torch.int64, device=self.device) for _ in range(self.world_size)]
        self._all_gather(sizes, torch.tensor([payload.numel()], dtype=torch.int64, device=self.device),
                         "inverse exchange (sizes)", clock="inverse_seconds")
        sizes = [int(s) for s in sizes]
        collective = self.inverse_collective
        if collective == "auto":
            collective = cheaper_inverse_collective(sizes)
        if collective == "all_gather":
            buffers = self._gather_payloads(payload, sizes)
        else:
            buffers = self._reduce_payloads(payload, sizes)
        self.totals["inverse_exchanges"] += 1
        self.totals["inverse_bytes"] += int(inverse_exchange_bytes(sizes, collective))
        by_name = {block.layer.name: block for block in blocks}
        received, errors = {}, []
        for rank, buffer in enumerate(buffers):
            entries, peer_error = decode_inverses(buffer, by_name)
            if peer_error is not None:
                errors.append(peer_error)
            if rank != self.rank:
                received.update(entries)
        if error is not None:
            raise error
        if errors:
            raise CurvatureSyncError("ngopt.distributed: the inversion failed on a peer: " + "; ".join(errors))
        return received

    def _gather_payloads(self, payload, sizes):
        """All-gather of the payloads padded to the longest: ``(R-1) max(sizes)`` bytes into each rank."""
        padded = torch.zeros(max(sizes), dtype=torch.uint8, device=self.device)
        padded[:payload.numel()] = payload
        gathered = [torch.empty_like(padded) for _ in range(self.world_size)]
        self._all_gather(gathered, padded, "inverse exchange", clock="inverse_seconds")
        return [buffer[:size] for buffer, size in zip(gathered, sizes)]

    def _reduce_payloads(self, payload, sizes):
        """All-reduce of a zero buffer where each rank fills its own slot (``x + 0 = x`` exactly, also in bytes)."""
        offsets = [sum(sizes[:r]) for r in range(self.world_size + 1)]
        buffer = torch.zeros(offsets[-1], dtype=torch.uint8, device=self.device)
        buffer[offsets[self.rank]:offsets[self.rank + 1]] = payload
        self._all_reduce(buffer, "inverse exchange", clock="inverse_seconds")
        return [buffer[offsets[r]:offsets[r + 1]] for r in range(self.world_size)]


def _setup_fingerprint(opt) -> int:
    """A 62-bit hash of what must match across ranks: blocks, sizes, schedule, step count."""
    parts = [opt.fisher, opt.structure, opt.stats_interval, opt.inverse_interval, opt.interval_warmup,
             opt.scale_memory, opt.steps_taken]
    parts += [(name, b.structure, b.layer.in_dim, b.layer.out_dim) for name, b in opt.blocks.items()]
    digest = hashlib.blake2b(repr(parts).encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") >> 2


# An optimizer built on a DistributedDataParallel model calls this with DDP's own group.
FisherDescent.attach_data_parallel = staticmethod(share_curvature)
