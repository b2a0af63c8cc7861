"""ngopt.distributed in one process: layouts, payloads, owner assignment, volumes, a one-rank group.

The multi-process behaviour (equivalence with one process, sharding, faults,
checkpoints) is in ``test_distributed_processes.py``.
"""
from __future__ import annotations

import itertools
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.distributed as dist
from torch import nn

import ngopt
import ngopt.distributed as nd
from ngopt.distributed import wire


def quiet_optimizer(model, loss_fn, **kwargs):
    kwargs = {"step_rule": "fixed", "damping_rule": "fixed", **kwargs}  # the rules these tests were written for
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = ngopt.FisherDescent(model, loss_fn, **kwargs)
    first = model[0]  # the blocks, from one forward on an example batch
    opt.assign_curvature(torch.zeros(1, first.in_features, dtype=first.weight.dtype))
    return opt


def mlp(dtype=torch.float64, seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(6, 9), nn.Tanh(), nn.Linear(9, 4)).to(dtype)


def random_statistics(block, generator):
    """Statistics shaped as the block keeps them: symmetric PSD factors, or a positive diagonal."""
    out = {}
    for key, shape in wire._statistic_shapes(block, {}):
        if key in wire._symmetric_keys(block):
            rows = torch.randn(3 * shape[0], shape[0], generator=generator, dtype=torch.float64)
            out[key] = rows.T @ rows / rows.shape[0]
        else:
            out[key] = torch.rand(shape, generator=generator, dtype=torch.float64)
    return out


# ---------------------------------------------------------------------------------------- owner assignment
def best_makespan(costs, world):
    """Exhaustive optimum of the largest per-rank load (every assignment tried)."""
    best = math.inf
    for owners in itertools.product(range(world), repeat=len(costs)):
        loads = [0.0] * world
        for cost, owner in zip(costs, owners):
            loads[owner] += cost
        best = min(best, max(loads))
    return best


@pytest.mark.parametrize("world", [2, 3])
def test_greedy_owners_within_grahams_bound(world):
    # Graham (1969), "Bounds on multiprocessing timing anomalies": largest-first list scheduling
    # is within (4/3 - 1/(3m)) of the optimal makespan on m machines.
    rng = np.random.default_rng(0)
    for _ in range(20):
        costs = [float(c) for c in rng.integers(1, 50, size=7) ** 3]
        owners = nd.assign_owners(costs, world)
        loads = [sum(c for c, o in zip(costs, owners) if o == r) for r in range(world)]
        assert max(loads) <= (4 / 3 - 1 / (3 * world)) * best_makespan(costs, world) + 1e-9


def test_greedy_owners_hand_example():
    # Largest first to the least-loaded rank: 9 -> r0, 7 -> r1, 5 -> r1 (7 < 9), 4 -> r0 (9 < 12).
    assert nd.assign_owners([5.0, 9.0, 4.0, 7.0], 2) == [1, 0, 0, 1]
    assert nd.assign_owners([1.0, 1.0, 1.0], 1) == [0, 0, 0]
    with pytest.raises(ValueError, match="world_size"):
        nd.assign_owners([1.0], 0)


def test_inversion_cost_is_sum_of_cubes():
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss())
    first, second = opt.blocks.values()
    generator = torch.Generator().manual_seed(0)
    # Layer sizes with the bias column: (d_in, d_out) = (7, 9) and (10, 4).
    assert nd.inversion_cost(first, random_statistics(first, generator)) == 7 ** 3 + 9 ** 3
    assert nd.inversion_cost(second, random_statistics(second, generator)) == 10 ** 3 + 4 ** 3


# ---------------------------------------------------------------------------------------- statistics buffer
@pytest.mark.parametrize("structure", ["kfac", "diag"])
def test_statistics_buffer_sums_to_the_rank_mean(structure):
    """Summing the packed buffers of 3 ranks (what all_reduce does) unpacks to numpy's mean of their statistics."""
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss(), structure=structure)
    first, second = opt.blocks.values()
    generator = torch.Generator().manual_seed(1)
    # rank 0 and 1 recorded both blocks, rank 2 only the first one
    ranks = [{first: random_statistics(first, generator), second: random_statistics(second, generator)},
             {first: random_statistics(first, generator), second: random_statistics(second, generator)},
             {first: random_statistics(first, generator)}]
    (bucket,) = wire._statistics_buckets([first, second], ranks[0])
    summed = sum(bucket.pack(batches, torch.device("cpu")) for batches in ranks)
    averaged = bucket.unpack(summed)
    for block, holders in ((first, ranks), (second, ranks[:2])):
        for key in block.statistic_keys:
            expected = np.mean([r[block][key].numpy() for r in holders], axis=0)  # numpy.mean
            np.testing.assert_allclose(averaged[block][key].numpy(), expected, rtol=1e-14, atol=0)


def test_statistics_buffer_sends_triangles_of_kronecker_factors():
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss())
    blocks = list(opt.blocks.values())
    (bucket,) = wire._statistics_buckets(blocks, {})
    # (d_in, d_out) = (7, 9) and (10, 4): n(n+1)/2 per factor, one count per block
    assert bucket.size == (28 + 45) + (55 + 10) + 2
    assert wire._statistics_buckets(blocks, {})[0].dtype == torch.float64


def test_a_block_nobody_recorded_stays_absent():
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss())
    first, second = opt.blocks.values()
    generator = torch.Generator().manual_seed(2)
    batches = {first: random_statistics(first, generator)}
    (bucket,) = wire._statistics_buckets([first, second], batches)
    averaged = bucket.unpack(bucket.pack(batches, torch.device("cpu")))
    assert set(averaged) == {first}


# ---------------------------------------------------------------------------------------- inverse payloads
def test_inverse_payload_round_trip_is_bit_exact():
    opt = quiet_optimizer(mlp(torch.float32), nn.CrossEntropyLoss())
    blocks = list(opt.blocks.values())
    generator = torch.Generator().manual_seed(3)
    results = {}
    for block in blocks:
        stats = {k: v.float() for k, v in random_statistics(block, generator).items()}
        results[block] = block.prepare_inverse(stats, 1e-2, want_spectrum=block is blocks[0])
    tensors, info = results[blocks[1]]
    info["used_eig_fallback"], info["in_trace"] = True, math.inf  # bools and non-finite floats travel too
    payload = nd.encode_inverses(results, None, rank=0)
    shifted = torch.cat([torch.zeros(3, dtype=torch.uint8), payload])[3:]  # decoding must not need alignment
    decoded, error = nd.decode_inverses(shifted, {b.layer.name: b for b in blocks})
    assert error is None and list(decoded) == blocks
    for block in blocks:
        (want_tensors, want_info), (got_tensors, got_info) = results[block], decoded[block]
        assert got_tensors.keys() == want_tensors.keys()
        for key in want_tensors:
            assert got_tensors[key].dtype == want_tensors[key].dtype
            assert torch.equal(got_tensors[key], want_tensors[key])
        assert got_info.keys() == want_info.keys()
        for key, value in want_info.items():
            if isinstance(value, torch.Tensor):
                assert torch.equal(got_info[key], value)
            else:
                assert got_info[key] == value and type(got_info[key]) is type(value)


def test_inverse_payload_carries_an_owners_error():
    payload = nd.encode_inverses({}, np.linalg.LinAlgError("not positive definite"), rank=1)
    decoded, error = nd.decode_inverses(payload, {})
    assert decoded == {} and "rank 1" in error and "not positive definite" in error


def test_inverse_payload_refuses_unknown_info_values():
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss())
    block = next(iter(opt.blocks.values()))
    with pytest.raises(TypeError, match="info"):
        nd.encode_inverses({block: ({}, {"odd": object()})}, None, rank=0)


# ---------------------------------------------------------------------------------------- volumes from the sizes
def test_communication_volume_from_layer_sizes():
    opt = quiet_optimizer(mlp(torch.float32), nn.CrossEntropyLoss())
    volume = nd.communication_volume(opt, world_size=4)
    # (d_in, d_out) = (7, 9), (10, 4); 4-byte floats.
    statistics = 4 * ((28 + 45 + 1) + (55 + 10 + 1))
    assert volume["statistics_buffer_bytes"] == statistics
    assert volume["statistics_bytes_per_rank"] == pytest.approx(2 * 3 / 4 * statistics)  # ring all-reduce
    assert volume["inverse_payload_bytes"] == 4 * ((49 + 81) + (100 + 16))
    # owners: 1072 (7^3+9^3) -> rank 0, 1064 (10^3+4^3) -> rank 1; ranks 2, 3 own nothing.
    # Padded all-gather: 3 * 520 = 1560 bytes in; all-reduce of the concatenation: 2*3/4 * 984 = 1476.
    assert volume["inverse_collective"] == "all_reduce"
    assert volume["inverse_bytes_per_rank"] == pytest.approx(2 * 3 / 4 * 4 * (49 + 81 + 100 + 16))
    two = nd.communication_volume(opt, world_size=2)
    assert two["inverse_collective"] == "all_gather" and two["inverse_bytes_per_rank"] == 4 * (49 + 81)
    assert volume["inversion_cost_per_rank"] == 7 ** 3 + 9 ** 3
    assert volume["factor_memory_bytes"] == 2 * volume["inverse_payload_bytes"]
    replicated = nd.communication_volume(opt, world_size=4, shard_inversions=False)
    assert replicated["inverse_bytes_per_rank"] == 0.0
    assert replicated["inversion_cost_per_rank"] == 7 ** 3 + 9 ** 3 + 10 ** 3 + 4 ** 3


def test_inverse_exchange_picks_the_collective_that_moves_less():
    # Ring algorithms (bandwidth-optimal, common practice): all-gather of R blocks of size m
    # brings m into each rank; all-reduce of n bytes sends and receives 2 (R-1)/R n.
    assert nd.inverse_exchange_bytes([100, 90], "all_gather") == 100
    assert nd.inverse_exchange_bytes([100, 90], "all_reduce") == 190
    assert nd.cheaper_inverse_collective([100, 90]) == "all_gather"
    eight = [100] + [0] * 7  # one big block, many ranks: padding would cost 7 x 100
    assert nd.inverse_exchange_bytes(eight, "all_gather") == 700
    assert nd.inverse_exchange_bytes(eight, "all_reduce") == pytest.approx(175)
    assert nd.cheaper_inverse_collective(eight) == "all_reduce"
    assert nd.inverse_exchange_bytes([5], "all_gather") == 0.0


# ---------------------------------------------------------------------------------------- sampling seeds
def test_rank_step_seeds_are_distinct_and_repeatable():
    seeds = {nd.rank_step_seed(5, rank, step) for rank in range(8) for step in range(500)}
    assert len(seeds) == 8 * 500
    assert nd.rank_step_seed(5, 1, 7) == nd.rank_step_seed(5, 1, 7) != nd.rank_step_seed(6, 1, 7)
    assert all(0 <= s < 2 ** 63 for s in seeds)


# ---------------------------------------------------------------------------------------- the optimizer's surface
def test_the_communicator_reads_no_private_optimizer_attribute():
    # The arrow runs one way: ngopt.distributed uses the optimizer's public surface, and the
    # optimizer module imports nothing from ngopt.distributed (it registers itself).
    for path in Path(nd.__file__).parent.glob("*.py"):
        assert not re.findall(r"\b(?:opt|o|self\._opt)\._[a-z]\w*", path.read_text()), path.name
    optimizer_source = Path(ngopt.optimizer.__file__).read_text()
    assert not re.search(r"^\s*(?:from|import)\s+[.\w]*distributed", optimizer_source, re.MULTILINE)
    assert ngopt.FisherDescent.attach_data_parallel is nd.share_curvature


def test_public_schedule_seed_and_sampling_generator():
    model, loss_fn = mlp(), nn.CrossEntropyLoss()
    opt = quiet_optimizer(model, loss_fn, stats_interval=3, interval_warmup=0, seed=11)
    assert opt.seed == 11
    drawn_on = []

    def recording(device):
        drawn_on.append(opt.steps_taken)
        return torch.Generator(device=device).manual_seed(0)

    generator = torch.Generator().manual_seed(5)
    due = []
    for step in range(7):
        if step == 4:
            opt.sample_targets_with(None)  # back to the optimizer's own generator
        elif step == 0:
            opt.sample_targets_with(recording)
        due.append(opt.statistics_due())
        opt.zero_grad()
        loss_fn(model(torch.randn(8, 6, generator=generator, dtype=torch.float64)),
                torch.randint(0, 4, (8,), generator=generator)).backward()
        opt.step()
    assert due == [True, False, False, True, False, False, True]  # every stats_interval = 3 steps
    assert drawn_on == [0, 3]  # targets are drawn on refresh steps only, and not after the reset
    state = opt.state_dict()
    other = quiet_optimizer(mlp(), loss_fn, stats_interval=3, seed=0)
    other.load_state_dict(state)
    assert other.seed == 11 and other.steps_taken == 7


# ---------------------------------------------------------------------------------------- entry point checks
def test_share_curvature_checks_its_arguments():
    opt = quiet_optimizer(mlp(), nn.CrossEntropyLoss())
    with pytest.raises(TypeError, match="opt"):
        nd.share_curvature(torch.optim.SGD(mlp().parameters(), lr=0.1))
    with pytest.raises(TypeError, match="shard_inversions"):
        nd.share_curvature(opt, shard_inversions="yes")
    with pytest.raises(ValueError, match="timeout"):
        nd.share_curvature(opt, timeout=-1)
    if not dist.is_initialized():
        with pytest.raises(RuntimeError, match="init_process_group"):
            nd.share_curvature(opt)


@pytest.fixture
def one_rank_group(tmp_path):
    """A gloo group of one process (a file store: no port)."""
    if dist.is_initialized():
        pytest.skip("a process group is already initialized in this process")
    store = dist.FileStore(str(tmp_path / "store"), 1)
    dist.init_process_group("gloo", store=store, rank=0, world_size=1)
    yield
    dist.destroy_process_group()


def test_one_rank_group_changes_nothing(one_rank_group, tmp_path):
    generator = torch.Generator().manual_seed(4)
    data = [(torch.randn(16, 6, generator=generator, dtype=torch.float64),
             torch.randint(0, 4, (16,), generator=generator)) for _ in range(5)]
    runs = []
    for shared in (False, True):
        model, loss_fn = mlp(), nn.CrossEntropyLoss()
        opt = quiet_optimizer(model, loss_fn, fisher="exact", stats_interval=2, inverse_interval=2)
        if shared:
            communicator = nd.share_curvature(opt)
            assert opt.communicator is communicator and communicator.world_size == 1
        for x, y in data:
            opt.zero_grad()
            loss_fn(model(x), y).backward()
            if shared:
                before = [p.grad.clone() for p in model.parameters()]
                nd.average_gradients(model)
                assert all(torch.equal(a, p.grad) for a, p in zip(before, model.parameters()))
            opt.step()
        runs.append([p.detach().clone() for p in model.parameters()])
    assert all(torch.equal(a, b) for a, b in zip(*runs))
    assert nd.max_parameter_difference(model) == 0.0
    nd.save_on_rank0({"optimizer": opt.state_dict()}, str(tmp_path / "state.pt"))
    assert "natural_gradient" in torch.load(tmp_path / "state.pt", weights_only=True)["optimizer"]
    communicator.close()
    assert opt.communicator is None


class _SecondRankStandIn:
    """The communicator of rank 0 in a two-rank run whose other rank measured ``other`` (before, after).

    Statistics and inverses stay local (both ranks would hold the same); scalars are averaged with
    the other rank's, as ``CurvatureCommunicator.average_scalars`` does.
    """

    def __init__(self, other):
        self.other, self.averaged = other, []

    def average_statistics(self, blocks, batches, due, projected=False):
        return batches

    def invert(self, blocks, jobs, track_spectra=False):
        return {block: block.prepare_inverse(stats, damping, track_spectra) for block, stats, damping in jobs}

    def average_scalars(self, *values):
        self.averaged.append(values)
        return tuple((mine + theirs) / 2 for mine, theirs in zip(values, self.other))


def test_the_reduction_ratio_is_the_global_batchs():
    # What the module docstring says: the losses before and after a step are averaged over the
    # ranks, and the ratio is their change over the (shared) model's prediction.
    model = mlp()
    opt = quiet_optimizer(model, nn.MSELoss(), damping_rule="lm", damping_interval=1, stats_interval=1)
    other = (2.0, 1.5)  # the other rank's loss before and after the step
    opt.communicator = _SecondRankStandIn(other)
    generator = torch.Generator().manual_seed(0)
    x, y = torch.randn(32, 6, generator=generator, dtype=torch.float64), \
        torch.randn(32, 4, generator=generator, dtype=torch.float64)
    opt.zero_grad()
    before = nn.MSELoss()(model(x), y)
    before.backward()
    opt.step()
    with torch.no_grad():
        after = nn.MSELoss()(model(x), y)
    update = opt.diagnostics()["update"]
    # Two averages: the loss bound's (this rank's loss above the floor of 0, and that it saw one),
    # then the ratio's.
    assert len(opt.communicator.averaged) == 2
    gap, seen = opt.communicator.averaged[0]
    assert gap == pytest.approx(float(before.detach()), rel=1e-12) and seen == 1.0
    # The rank's own losses, measured here and by the optimizer on the recorded batch: the same
    # float64 forward, so only summation order could differ.
    mine_before, mine_after = opt.communicator.averaged[1]
    assert mine_before == pytest.approx(float(before.detach()), rel=1e-12)
    assert mine_after == pytest.approx(float(after), rel=1e-12)
    global_change = (mine_after + other[1]) / 2 - (mine_before + other[0]) / 2
    assert update["actual_change"] == pytest.approx(global_change, rel=1e-12)
    assert update["reduction_ratio"] == pytest.approx(global_change / update["predicted_change"], rel=1e-12)
    assert update["reduction_ratio"] != pytest.approx((mine_after - mine_before) / update["predicted_change"],
                                                      rel=1e-3)  # not the rank's own ratio
