"""Data-parallel natural gradient on ``torch.distributed``: shared statistics, sharded inversions.

``share_curvature(opt)`` attaches a :class:`CurvatureCommunicator` to a
:class:`~ngopt.FisherDescent` (``opt.communicator``).  From then on, on every
rank of the process group:

* **statistics** — when a refresh is due, every block's batch statistics (this
  step's, before the running average) are packed into one flat buffer and
  averaged with a single ``all_reduce``.  Kronecker factors are symmetric, so
  only their upper triangles travel.  Each block carries a count slot: a block
  no rank recorded this step stays absent; one recorded by only some ranks is
  averaged over those.  Ranks weigh equally, exactly as DDP's gradient average
  does: with equal per-rank batches and a mean-reduced loss the result is the
  whole-batch statistics, ``A = mean_r A_r`` (a mean over rows) and
  ``G = mean_r G_r`` (``G_r = c_r sum g g^T`` with ``c_r = 1/#local terms``).
  With unequal batches it is the curvature of the objective DDP descends,
  ``L = mean_r L_r``, not of the pooled mean loss.
* **inversions** — blocks with inverse tensors of their own (Kronecker blocks)
  are assigned to ranks greedily by cost ``sum d^3`` over their square factors
  (``d_in^3 + d_out^3``); each owner runs ``block.prepare_inverse`` and the
  owners' results, the ``info`` dict included, travel bit for bit in one
  collective of byte buffers (after a tiny all-gather of their sizes).  Every rank
  therefore holds identical inverses and diagnostics.  With
  ``shard_inversions=False`` every rank inverts everything itself: no traffic,
  ``R`` times the compute.  Diagonal blocks are always done locally (their
  "inverse" is the statistic itself).
* **sampled targets** — each rank draws the targets of its own examples from a
  generator seeded by a hash of ``(seed, rank, step)``: a run is reproducible
  for a given world size, seed and data split, and a resumed run repeats the
  uninterrupted run's draws; another world size draws differently (same
  distribution, other numbers).

* **step control** — the KL trust bound and momentum see only shared values
  (averaged gradients, shared curvature).  With ``damping_rule='lm'`` the
  reduction ratio is that of the global batch: the losses before and after
  the step are averaged over the ranks (one tiny all-reduce) and the quadratic
  model's prediction comes from shared values, so every rank computes the same
  ratio up to rounding.  After every Levenberg-Marquardt update the ranks take
  the first rank's damping (one tiny broadcast), so that a ratio rounded to
  either side of a threshold cannot set their damping apart.
* **replicas** — every rank computes its step from the same bits (DDP's averaged
  gradients, the averaged statistics, the owners' inverses), but kernels may round
  it differently in another process (thread count, memory alignment, another
  CPU's instruction set).  The ranks' weights therefore agree to within rounding,
  not bit for bit.  The gap does not feed back (every rank's next step is again
  computed from shared bits), so it is a random walk of rounding errors, up to about
  ``0.5 sqrt(steps) * eps * max|w|`` (``scripts/replica_drift.py``);
  ``resync_every`` resets it to zero by broadcasting the first rank's parameters.

Gradients are averaged by ``DistributedDataParallel`` as usual; plain
``torch.distributed`` code calls :func:`average_gradients` after ``backward()``
(and :func:`sync_parameters` once at the start).

Communication per refresh, for ``R`` ranks and Kronecker blocks of sizes
``(d_in, d_out)``, 4-byte floats (:func:`communication_volume` computes it):

* statistics all-reduce: ``S = 4 * sum_b [d_in(d_in+1)/2 + d_out(d_out+1)/2 + 1]``
  bytes; a ring all-reduce sends and receives ``2 (R-1)/R * S`` per rank;
* inverse exchange (sharded): payload ``P = 4 * sum_b (d_in^2 + d_out^2)``,
  ``P_r`` of it from owner ``r``; an all-gather of buffers padded to the largest
  moves ``(R-1) max_r P_r`` into each rank (``~ P (R-1)/R`` when balanced), an
  all-reduce of the zero-filled concatenation ``2 (R-1)/R * P``; the cheaper one
  is used (all-gather for 2 ranks, all-reduce once ranks outnumber the large
  blocks, because then ``max_r P_r`` stops shrinking while ``R`` grows);
* replicated inversions: no bytes, every rank computes ``sum_b (d_in^3 + d_out^3)``.

Every rank keeps all factors and inverses, ``2 * 4 * sum_b (d_in^2 + d_out^2)``
bytes, whatever ``R``.

Failures: every collective is waited on with the communicator's ``timeout``
(default: the process group's); a peer that exited, raised or stalls makes
the others raise :class:`CurvatureSyncError` naming the step and the exchange.
An exception inside an owner's inversion is sent to all ranks, which all raise it.

The optimizer is used only through its public surface (``steps_taken``,
``statistics_due()``, ``seed``, ``sample_targets_with()``, ``blocks``,
``register_step_post_hook``); importing this module sets
``FisherDescent.attach_data_parallel``, which makes an optimizer built on a DDP
model share its curvature by itself.
"""
from __future__ import annotations

import datetime
import hashlib
import json
import os
import time
from typing import Dict, Iterable, List, Optional, Sequence, Tuple

import torch
import torch.distributed as dist
from torch import nn

from .blocks.base import LayerCurvature
from .inversion_schedule import longest_first, square_cost
from .optimizer import FisherDescent
from .schedule import damping_due, resync_due

_HEADER_LENGTH_BYTES = 8


class CurvatureSyncError(RuntimeError):
    """A collective of the curvature exchange failed or timed out (a peer exited, raised or stalls)."""


# ---------------------------------------------------------------------------------------- entry points
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
        results = {block: block.prepare_inverse(stats, damping, want) for block, stats, damping in local}
        self.totals["inversions_here"] += len(results)
        if not shared:
            return results
        owners = assign_owners([inversion_cost(block, stats) for block, stats, _ in shared], self.world_size)
        mine, error = {}, None
        try:
            for (block, stats, damping), owner in zip(shared, owners):
                if owner == self.rank:
                    mine[block] = block.prepare_inverse(stats, damping, want)
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


# ---------------------------------------------------------------------------------------- statistics buffer
class StatisticsBucket:
    """The flat layout of all blocks' statistics of one dtype: values (triangles where symmetric), then counts."""

    def __init__(self, entries, dtype):
        self.entries = entries  # [(block, [(key, shape, symmetric)])] in the blocks' order
        self.dtype = dtype
        self.value_count = sum(_packed_size(shape, symmetric)
                               for _, keys in entries for _, shape, symmetric in keys)

    @property
    def size(self) -> int:
        return self.value_count + len(self.entries)

    def pack(self, batches, device) -> torch.Tensor:
        buffer = torch.zeros(self.size, dtype=self.dtype, device=device)
        offset = 0
        for index, (block, keys) in enumerate(self.entries):
            batch = batches.get(block)
            for key, shape, symmetric in keys:
                width = _packed_size(shape, symmetric)
                if batch is not None:
                    buffer[offset:offset + width] = _flatten(batch[key], symmetric).to(device)
                offset += width
            if batch is not None:
                buffer[self.value_count + index] = 1.0
        return buffer

    def unpack(self, buffer) -> Dict[LayerCurvature, dict]:
        averaged = {}
        offset = 0
        counts = buffer[self.value_count:].tolist()
        for (block, keys), count in zip(self.entries, counts):
            tensors = {}
            for key, shape, symmetric in keys:
                width = _packed_size(shape, symmetric)
                if count > 0:
                    values = buffer[offset:offset + width] / count
                    tensors[key] = _unflatten(values, shape, symmetric).to(block.layer.weight.device)
                offset += width
            if count > 0:
                averaged[block] = tensors
        return averaged


def _statistics_buckets(blocks: Sequence[LayerCurvature], batches,
                        projected: bool = False) -> List[StatisticsBucket]:
    """One bucket per statistics dtype (normally a single one), blocks in the optimizer's order."""
    by_dtype: Dict[torch.dtype, list] = {}
    for block in blocks:
        keys = [(key, shape, key in _symmetric_keys(block))
                for key, shape in _statistic_shapes(block, batches, projected)]
        by_dtype.setdefault(block.layer.weight.dtype, []).append((block, keys))
    return [StatisticsBucket(entries, dtype) for dtype, entries in by_dtype.items()]


def _statistic_shapes(block: LayerCurvature, batches, projected: bool = False) -> List[Tuple[str, Tuple[int, ...]]]:
    """Shapes of a block's statistics (or projected ones), known on every rank even where it recorded nothing."""
    shapes = block.statistic_shapes()
    keys = block.projected_keys if projected else block.statistic_keys
    return [(key, tuple(shapes[key])) for key in keys]


def _symmetric_keys(block: LayerCurvature) -> Tuple[str, ...]:
    """Statistics symmetric by construction (``E[a a^T]``, ``E[g g^T]``), as the block declares them."""
    return tuple(block.symmetric_statistic_keys)


_TRIANGLES: Dict[Tuple[int, str], torch.Tensor] = {}


def _upper_triangle(size: int, device) -> torch.Tensor:
    key = (size, str(device))
    if key not in _TRIANGLES:
        _TRIANGLES[key] = torch.triu_indices(size, size, device=device)
    return _TRIANGLES[key]


def _packed_size(shape, symmetric: bool) -> int:
    if symmetric:
        return shape[0] * (shape[0] + 1) // 2
    count = 1
    for dim in shape:
        count *= dim
    return count


def _flatten(tensor: torch.Tensor, symmetric: bool) -> torch.Tensor:
    if not symmetric:
        return tensor.reshape(-1)
    rows, cols = _upper_triangle(tensor.shape[0], tensor.device)
    return tensor[rows, cols]


def _unflatten(values: torch.Tensor, shape, symmetric: bool) -> torch.Tensor:
    if not symmetric:
        return values.reshape(shape)
    rows, cols = _upper_triangle(shape[0], values.device)
    matrix = values.new_empty(shape)
    matrix[rows, cols] = values
    matrix[cols, rows] = values
    return matrix


# ---------------------------------------------------------------------------------------- inversion sharding
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


# ---------------------------------------------------------------------------------------- inverse payloads
def encode_inverses(results: Dict[LayerCurvature, tuple], error: Optional[BaseException], rank: int,
                    device=None) -> torch.Tensor:
    """One byte buffer: ``[header length][JSON header][raw tensor bytes...]``, exact to the bit.

    The header lists, per block, the tensors (key, shape, dtype, whether on the CPU)
    and the plain ``info`` values; ``info`` tensors (eigenvalues) travel as tensors.
    """
    header: dict = {"blocks": []}
    chunks: List[torch.Tensor] = []
    if error is not None:
        header["error"] = f"rank {rank}: {type(error).__name__}: {error}"
    else:
        for block, (tensors, info) in results.items():
            entry = {"name": block.layer.name, "tensors": [], "info": {}, "info_tensors": []}
            for key, value in tensors.items():
                entry["tensors"].append(_tensor_spec(key, value))
                chunks.append(_as_bytes(value))
            for key, value in info.items():
                if isinstance(value, torch.Tensor):
                    entry["info_tensors"].append(_tensor_spec(key, value))
                    chunks.append(_as_bytes(value))
                elif value is None or isinstance(value, (bool, int, float, str)):
                    entry["info"][key] = value
                else:
                    raise TypeError(f"{block.layer.name}: info[{key!r}] is a {type(value).__name__}; "
                                    "inverse info must hold numbers, bools, strings, None or tensors")
            header["blocks"].append(entry)
    header_bytes = json.dumps(header).encode()
    device = torch.device("cpu") if device is None else device
    length = torch.tensor([len(header_bytes)], dtype=torch.int64).view(torch.uint8)
    head = torch.cat([length, torch.frombuffer(bytearray(header_bytes), dtype=torch.uint8)]).to(device)
    return torch.cat([head] + [c.to(device) for c in chunks])


def decode_inverses(buffer: torch.Tensor, blocks_by_name: Dict[str, LayerCurvature]):
    """Inverse of :func:`encode_inverses`: ``({block: (tensors, info)}, error message or None)``."""
    length = int(buffer[:_HEADER_LENGTH_BYTES].cpu().clone().view(torch.int64))  # clone: slices may be unaligned
    start = _HEADER_LENGTH_BYTES
    header = json.loads(buffer[start:start + length].cpu().numpy().tobytes())
    offset = start + length
    results = {}
    for entry in header["blocks"]:
        block = blocks_by_name[entry["name"]]
        tensors, info = {}, dict(entry["info"])
        for spec in entry["tensors"]:
            tensors[spec[0]], offset = _from_bytes(buffer, offset, spec, block)
        for spec in entry["info_tensors"]:
            info[spec[0]], offset = _from_bytes(buffer, offset, spec, block)
        results[block] = (tensors, info)
    return results, header.get("error")


def _tensor_spec(key: str, tensor: torch.Tensor) -> list:
    return [key, list(tensor.shape), str(tensor.dtype).replace("torch.", ""), tensor.device.type == "cpu"]


def _as_bytes(tensor: torch.Tensor) -> torch.Tensor:
    return tensor.detach().contiguous().reshape(-1).view(torch.uint8)


def _from_bytes(buffer, offset, spec, block):
    key, shape, dtype_name, on_cpu = spec
    dtype = getattr(torch, dtype_name)
    count = 1
    for dim in shape:
        count *= dim
    width = count * torch.empty((), dtype=dtype).element_size()
    tensor = buffer[offset:offset + width].clone().view(dtype).reshape(shape)
    device = torch.device("cpu") if on_cpu else block.layer.weight.device
    return tensor.to(device), offset + width


# ---------------------------------------------------------------------------------------- sampled targets
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


# ---------------------------------------------------------------------------------------- plain data-parallel helpers
def average_gradients(params, process_group=None, timeout: Optional[float] = None) -> None:
    """Average ``.grad`` over the ranks in one all-reduce per dtype (for loops without DDP).

    ``params`` is a module or an iterable of parameters.  A parameter without a gradient
    on some rank counts as zero there; it keeps ``grad=None`` only if no rank has one.
    """
    params = [p for p in _parameters(params) if p.requires_grad]
    world = dist.get_world_size(process_group)
    device = _communication_device(process_group)
    by_dtype: Dict[torch.dtype, list] = {}
    for p in params:
        by_dtype.setdefault(p.dtype, []).append(p)
    for dtype, group in by_dtype.items():
        flats = [p.grad.reshape(-1).to(device) if p.grad is not None
                 else torch.zeros(p.numel(), dtype=dtype, device=device) for p in group]
        present = torch.tensor([p.grad is not None for p in group], dtype=dtype, device=device)
        buffer = torch.cat(flats + [present])
        _complete(lambda: dist.all_reduce(buffer, group=process_group, async_op=True), "gradient all-reduce",
                  _as_timedelta(timeout), process_group)
        offset = 0
        for p, seen in zip(group, buffer[-len(group):].tolist()):
            piece = buffer[offset:offset + p.numel()]
            offset += p.numel()
            if seen == 0:
                continue
            average = (piece / world).reshape(p.shape).to(p.device)
            if p.grad is None:
                p.grad = average
            else:
                p.grad.copy_(average)


def sync_parameters(module: nn.Module, src: int = 0, process_group=None,
                         timeout: Optional[float] = None) -> None:
    """Copy ``src``'s parameters and buffers to every rank (one broadcast per dtype), as DDP does at wrap time."""
    tensors = list(module.parameters()) + list(module.buffers())
    device = _communication_device(process_group)
    by_dtype: Dict[torch.dtype, list] = {}
    for t in tensors:
        by_dtype.setdefault(t.dtype, []).append(t)
    with torch.no_grad():
        for group in by_dtype.values():
            buffer = torch.cat([t.detach().reshape(-1).to(device) for t in group])
            _complete(lambda: dist.broadcast(buffer, src=src, group=process_group, async_op=True),
                      "parameter broadcast", _as_timedelta(timeout), process_group)
            offset = 0
            for t in group:
                t.copy_(buffer[offset:offset + t.numel()].reshape(t.shape))
                offset += t.numel()


def max_parameter_difference(module: nn.Module, process_group=None, timeout: Optional[float] = None) -> float:
    """Largest ``max_rank - min_rank`` over all parameter entries (0.0: every rank holds the same weights)."""
    device = _communication_device(process_group)
    values = torch.cat([p.detach().double().reshape(-1).to(device) for p in module.parameters()])
    both = torch.cat([values, -values])
    _complete(lambda: dist.all_reduce(both, op=dist.ReduceOp.MAX, group=process_group, async_op=True),
              "parameter comparison", _as_timedelta(timeout), process_group)
    high, low = both[:values.numel()], -both[values.numel():]
    return float((high - low).max()) if values.numel() else 0.0


def save_on_rank0(obj, path: str, process_group=None, timeout: Optional[float] = None) -> None:
    """``torch.save(obj, path)`` on rank 0 only (written to a temporary name, then renamed), then a barrier.

    The optimizer's state is the same on every rank (to within rounding), so rank 0's ``state_dict()`` is
    the whole state and loads into any world size, a single process included.
    """
    if dist.get_rank(process_group) == 0:
        temporary = f"{path}.tmp{os.getpid()}"
        torch.save(obj, temporary)
        os.replace(temporary, path)
    _complete(lambda: dist.barrier(group=process_group, async_op=True), "checkpoint barrier",
              _as_timedelta(timeout), process_group)


# ---------------------------------------------------------------------------------------- volume from the sizes
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


# ---------------------------------------------------------------------------------------- small helpers
def _complete(start, what: str, timeout: Optional[datetime.timedelta], group) -> None:
    """Start a collective (``start()`` returns its work handle) and wait for it, or raise a clear error."""
    try:
        work = start()
        if timeout is None:
            work.wait()
        else:
            work.wait(timeout)
    except Exception as exc:
        raise CurvatureSyncError(
            f"ngopt.distributed: the {what} failed on rank {dist.get_rank(group)} of "
            f"{dist.get_world_size(group)}: a peer has probably exited, raised or stalled (see its log). "
            f"Cause: {exc}") from exc


def _as_timedelta(seconds: Optional[float]) -> Optional[datetime.timedelta]:
    if seconds is None:
        return None
    if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) or not seconds > 0:
        raise ValueError(f"timeout must be a positive number of seconds or None, got {seconds!r}")
    return datetime.timedelta(seconds=float(seconds))


def _communication_device(process_group) -> torch.device:
    """NCCL moves CUDA tensors only; every other backend here takes CPU tensors."""
    backend = str(dist.get_backend(process_group)).lower()
    if "nccl" in backend and torch.cuda.is_available():
        return torch.device("cuda", torch.cuda.current_device())
    return torch.device("cpu")


def _first_rank(group) -> int:
    """Global rank of the group's rank 0 (``broadcast`` takes global ranks)."""
    return 0 if group is None else dist.get_global_rank(group, 0)


def _parameters(params) -> Iterable[torch.Tensor]:
    if isinstance(params, nn.Module):
        return list(params.parameters())
    return list(params)


def _setup_fingerprint(opt) -> int:
    """A 62-bit hash of what must match across ranks: blocks, sizes, schedule, step count."""
    parts = [opt.fisher, opt.structure, opt.stats_interval, opt.inverse_interval, opt.interval_warmup,
             opt.steps_taken]
    parts += [(name, b.structure, b.layer.in_dim, b.layer.out_dim) for name, b in opt.blocks.items()]
    digest = hashlib.blake2b(repr(parts).encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") >> 2


# An optimizer built on a DistributedDataParallel model calls this with DDP's own group.
FisherDescent.attach_data_parallel = staticmethod(share_curvature)
