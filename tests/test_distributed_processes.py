"""ngopt.distributed across real processes: 2 ranks on loopback (gloo), spawned by the tests.

Every job is a pair of ``python this_file.py JOB RANK WORLD PORT DIR`` processes that
meet on ``127.0.0.1`` at an ephemeral port, with a short process-group timeout; the
parent kills whatever is still running after ``JOB_SECONDS`` (a hard wall-clock bound),
so no test can hang.  One "train" job runs every training scenario and writes each
rank's results; the tests compare them with single-process runs done here.  The fault
jobs and a 2-rank run of ``examples/train_ddp.py`` (started with the variables torchrun sets)
run beside it.

References:
* a data-parallel run whose ranks hold halves of the batch must end where one process
  with the whole batch ends: gradients are averaged by DDP and the curvature statistics
  by ngopt, so every step is the same computation regrouped (float64: to ~1e-12;
  float32: to float32 rounding, amplified by the damped inverses);
* the greedy owner assignment only changes *where* an inversion runs, so sharded and
  replicated inversions, and the ranks' weights, agree to within the rounding bound of
  :func:`rounding_bound` (never bit for bit: kernels may round differently in another
  process, thread count or CPU).

Conditions of the train job: ``NGOPT_TEST_THREADS`` sets the torch threads per rank (``1``,
``2``, ``1,2``; also the example's); rank 1 runs the next narrower vector kernels than rank 0
unless ``NGOPT_TEST_KERNELS=same``, so that the ranks round differently on every machine, as
ranks on two kinds of CPU do.  ``MKL_CBWR`` is left as the environment has it.
"""
from __future__ import annotations

import datetime
import importlib.util
import json
import math
import os
import re
import socket
import subprocess
import sys
import time
import warnings
from pathlib import Path

import pytest
import torch
from torch import nn

import ngopt

WORLD = 2
REPOSITORY = Path(__file__).resolve().parents[1]
EXAMPLE = REPOSITORY / "examples" / "train_ddp.py"
EXAMPLE_ARGS = ["--steps", "8", "--warmup", "2", "--hidden", "16", "--fisher", "exact", "--stats-interval", "2",
                "--inverse-interval", "4", "--interval-warmup", "0"]
THREADS_VARIABLE = "NGOPT_TEST_THREADS"
KERNELS_VARIABLE = "NGOPT_TEST_KERNELS"
JOB_SECONDS = 120           # hard bound on one spawned job (generous: a loaded 2-core machine)
GROUP_TIMEOUT_SECONDS = 10  # the process group's own timeout inside the jobs
FAULT_TIMEOUT_SECONDS = 3   # share_curvature(timeout=...) in the fault jobs
STEPS = 6
CHECKPOINT_STEP = 3
GLOBAL_BATCH = 24
SETTINGS = dict(lr=0.3, momentum=0.5, damping=1e-2, stats_interval=2, inverse_interval=3, interval_warmup=0,
                stats_memory=0.9, max_step_kl=1e-2, step_rule="fixed", damping_rule="fixed")


# The quadratic rule on the whole recorded batch of each rank, LM damping every other step.
QUADRATIC_RULES = dict(step_rule="quadratic", damping_rule="lm", damping_interval=2, rule_batch_fraction=1.0)


# ---------------------------------------------------------------------------------------- shared by jobs and tests
def build_model(dtype):
    """Three Kronecker blocks of different costs, so that both ranks own inversions."""
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(8, 12), nn.Tanh(), nn.Linear(12, 12), nn.Tanh(), nn.Linear(12, 5)).to(dtype)


def batches(dtype, regression=False):
    generator = torch.Generator().manual_seed(1)
    out = []
    for _ in range(STEPS):
        x = torch.randn(GLOBAL_BATCH, 8, generator=generator, dtype=dtype)
        y = (torch.randn(GLOBAL_BATCH, 5, generator=generator, dtype=dtype) if regression
             else torch.randint(0, 5, (GLOBAL_BATCH,), generator=generator))
        out.append((x, y))
    return out


def make_optimizer(model, loss_fn, **overrides):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the empirical-Fisher advice is not what is tested here
        return ngopt.FisherDescent(model, loss_fn, **dict(SETTINGS, **overrides))


def train(model, opt, loss_fn, data, rows, start=0, stop=STEPS, after_backward=None):
    for x, y in data[start:stop]:
        opt.zero_grad()
        loss_fn(model(x[rows]), y[rows]).backward()
        if after_backward is not None:
            after_backward()
        opt.step()


def weights(model):
    return [p.detach().clone() for p in model.parameters()]


def single_process(dtype, fisher="exact", structure="kfac", regression=False, start_from=None, **overrides):
    """The reference: one process, the whole batch, no communicator."""
    model = build_model(dtype)
    loss_fn = nn.MSELoss() if regression else nn.CrossEntropyLoss()
    opt = make_optimizer(model, loss_fn, fisher=fisher, structure=structure, **overrides)
    start = 0
    if start_from is not None:
        model.load_state_dict(start_from["model"])
        opt.load_state_dict(start_from["optimizer"])
        start = CHECKPOINT_STEP
    train(model, opt, loss_fn, batches(dtype, regression), slice(None), start=start)
    return weights(model)


# ---------------------------------------------------------------------------------------- inside the jobs
def _rank_rows(rank, world):
    share = GLOBAL_BATCH // world
    return slice(rank * share, (rank + 1) * share)


def _ddp_run(rank, world, dtype, fisher="exact", structure="kfac", shard=True, checkpoint=None, spectra=False,
             collective="auto", **overrides):
    import ngopt.distributed as nd
    model = build_model(dtype)
    wrapped = nn.parallel.DistributedDataParallel(model)
    loss_fn = nn.CrossEntropyLoss()
    opt = make_optimizer(wrapped, loss_fn, fisher=fisher, structure=structure, **overrides)
    nd.share_curvature(opt, shard_inversions=shard).inverse_collective = collective
    opt.track_spectra = spectra
    data, rows = batches(dtype), _rank_rows(rank, world)
    if checkpoint is not None:
        train(wrapped, opt, loss_fn, data, rows, stop=CHECKPOINT_STEP)
        nd.save_on_rank0({"model": model.state_dict(), "optimizer": opt.state_dict()}, checkpoint)
        train(wrapped, opt, loss_fn, data, rows, start=CHECKPOINT_STEP)
    else:
        train(wrapped, opt, loss_fn, data, rows)
    return model, opt


def _plain_run(rank, world, dtype):
    """No DDP: the loop averages gradients itself with ngopt.distributed.average_gradients."""
    import ngopt.distributed as nd
    model = build_model(dtype)
    nd.sync_parameters(model)
    loss_fn = nn.MSELoss()
    opt = make_optimizer(model, loss_fn, fisher="empirical")
    nd.share_curvature(opt)
    train(model, opt, loss_fn, batches(dtype, regression=True), _rank_rows(rank, world),
          after_backward=lambda: nd.average_gradients(model))
    return model, opt


def _sampled_resume(rank, world):
    """6 steps in one go vs 3 steps, a state_dict round trip into fresh objects, 3 more steps;
    and, as a control, 6 steps in one go with other draws (another seed)."""
    import ngopt.distributed as nd
    dtype, rows = torch.float64, _rank_rows(rank, world)
    runs = []
    for stop_at, seed in ((None, 7), (CHECKPOINT_STEP, 7), (None, 8)):
        model = build_model(dtype)
        wrapped = nn.parallel.DistributedDataParallel(model)
        loss_fn = nn.CrossEntropyLoss()
        opt = make_optimizer(wrapped, loss_fn, fisher="sampled", seed=seed)
        nd.share_curvature(opt)
        data = batches(dtype)
        if stop_at is None:
            train(wrapped, opt, loss_fn, data, rows)
        else:
            train(wrapped, opt, loss_fn, data, rows, stop=stop_at)
            saved = {"model": model.state_dict(), "optimizer": opt.state_dict()}
            model = build_model(dtype)
            wrapped = nn.parallel.DistributedDataParallel(model)
            opt = make_optimizer(wrapped, loss_fn, fisher="sampled", seed=0)
            model.load_state_dict(saved["model"])
            opt.load_state_dict(saved["optimizer"])
            nd.share_curvature(opt)
            train(wrapped, opt, loss_fn, data, rows, start=stop_at)
        runs.append(weights(model))
    return runs


def _adaptive_damping_run(rank, world, penalty=0.0, calls=None):
    """LM damping under closures; ``penalty``: a term beside the criterion in this rank's closure."""
    import ngopt.distributed as nd
    model = build_model(torch.float64)
    wrapped = nn.parallel.DistributedDataParallel(model)
    loss_fn = nn.CrossEntropyLoss()
    opt = make_optimizer(wrapped, loss_fn, fisher="exact", damping_rule="lm", damping_interval=2)
    nd.share_curvature(opt)
    rows, history = _rank_rows(rank, world), []
    for x, y in batches(torch.float64):
        def closure():
            if calls is not None:
                calls.append(1)
            opt.zero_grad()
            loss = loss_fn(wrapped(x[rows]), y[rows]) + penalty * sum(p.square().sum() for p in model.parameters())
            loss.backward()
            return loss
        opt.step(closure)
        history.append(opt.param_groups[0]["damping"])
    return model, history


def _resync_run(rank, world):
    """Rank 1's weights are knocked off after step 1; resync_every=2 must restore rank 0's after step 2."""
    import ngopt.distributed as nd
    model = build_model(torch.float64)
    wrapped = nn.parallel.DistributedDataParallel(model)
    loss_fn = nn.CrossEntropyLoss()
    opt = make_optimizer(wrapped, loss_fn, fisher="exact")
    nd.share_curvature(opt, resync_every=2)
    data, rows, differences = batches(torch.float64), _rank_rows(rank, world), []
    for step in range(3):
        train(wrapped, opt, loss_fn, data, rows, start=step, stop=step + 1)
        if step == 0 and rank == 1:
            with torch.no_grad():
                model[0].weight.add_(1e-3)
        differences.append(nd.max_parameter_difference(model))
    return differences, weights(model)


def _mismatched_setup(rank):
    """Rank 1 builds a wider layer: the first step with blocks (assigned by the first forward) must refuse on
    both ranks, before any statistics travel."""
    import ngopt.distributed as nd
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(8, 12 + rank), nn.Tanh(), nn.Linear(12 + rank, 5))
    loss_fn = nn.CrossEntropyLoss()
    opt = make_optimizer(model, loss_fn)
    nd.share_curvature(opt)
    loss_fn(model(torch.randn(4, 8)), torch.tensor([0, 1, 2, 3])).backward()
    try:
        opt.step()
    except ValueError as exc:
        return str(exc)
    return None


def job_train(rank, world, out_dir):
    import ngopt.distributed as nd
    results, sync = {}, {}
    runs = {
        "ddp_exact_f32_sharded": dict(dtype=torch.float32, shard=True, spectra=True,
                                      checkpoint=str(out_dir / "checkpoint.pt")),
        "ddp_exact_f32_replicated": dict(dtype=torch.float32, shard=False, spectra=True),
        "ddp_exact_f32_reduced": dict(dtype=torch.float32, spectra=True, collective="all_reduce"),
        "ddp_exact_f64_sharded": dict(dtype=torch.float64, shard=True),
        "ddp_exact_f64_replicated": dict(dtype=torch.float64, shard=False),
        "ddp_diag_f64": dict(dtype=torch.float64, structure="diag"),
        "ddp_ekfac_f64": dict(dtype=torch.float64, structure="ekfac"),
        "ddp_ekfac_gradient_f64": dict(dtype=torch.float64, structure="ekfac-gradient"),
        "ddp_quadratic_lm_f64": dict(dtype=torch.float64, **QUADRATIC_RULES),
    }
    diagnostics = {}
    for name, options in runs.items():
        model, opt = _ddp_run(rank, world, **options)
        results[name] = weights(model)
        sync[name] = nd.max_parameter_difference(model)
        diagnostics[name] = {layer: {k: v for k, v in entry.items() if "eigenvalues" not in k}
                             for layer, entry in opt.diagnostics()["layers"].items()}
        results[name + "_summary"] = opt.communicator.summary()
    model, _ = _plain_run(rank, world, torch.float64)
    results["plain_empirical_f64"] = weights(model)
    sync["plain_empirical_f64"] = nd.max_parameter_difference(model)
    results["sampled_resume"] = _sampled_resume(rank, world)
    model, history = _adaptive_damping_run(rank, world)
    results["adaptive_damping"] = (weights(model), history)
    sync["adaptive_damping"] = nd.max_parameter_difference(model)
    # Only rank 0's closure has a term the replay cannot see: every rank must still call its closure again
    # (a DDP backward is a collective), or the ranks would wait for each other forever.
    calls = []
    _adaptive_damping_run(rank, world, penalty=1e-2 if rank == 0 else 0.0, calls=calls)
    results["disagreeing_closure_calls"] = len(calls)
    results["mismatch_error"] = _mismatched_setup(rank)
    results["resync"] = _resync_run(rank, world)
    model, opt = _ddp_run(rank, world, torch.float32)
    results["volume_from_sizes"] = nd.communication_volume(opt, world)
    results["sync"] = sync
    results["diagnostics"] = diagnostics
    torch.save(results, out_dir / f"rank{rank}.pt")


def job_fault(rank, world, out_dir, mode):
    """Rank 1 fails at step 2, between its backward and ``step()``; rank 0 must fail clearly and soon."""
    import ngopt.distributed as nd
    model = build_model(torch.float32)
    loss_fn = nn.CrossEntropyLoss()
    wrapped = nn.parallel.DistributedDataParallel(model) if mode.endswith("_ddp") else model
    opt = make_optimizer(wrapped, loss_fn, fisher="exact", stats_interval=1)
    nd.share_curvature(opt, timeout=FAULT_TIMEOUT_SECONDS)
    rows = _rank_rows(rank, world)
    # Start the timed steps together: on a loaded machine one rank may still be building its
    # model when the other's first collective has already waited FAULT_TIMEOUT_SECONDS.
    torch.distributed.barrier()
    for step, (x, y) in enumerate(batches(torch.float32)):
        started = time.monotonic()
        try:
            opt.zero_grad()
            loss_fn(wrapped(x[rows]), y[rows]).backward()
            if wrapped is model:
                nd.average_gradients(model, timeout=FAULT_TIMEOUT_SECONDS)
            if rank == 1 and step == 2:
                _inject_fault(mode)
            opt.step()
        except Exception as exc:
            print(f"FAILED after {time.monotonic() - started:.2f} s at step {step}: "
                  f"{type(exc).__name__}: {exc}", flush=True)
            os._exit(1)  # the usual exit would wait on the broken process group
    print("FINISHED", flush=True)


def _inject_fault(mode):
    if mode == "raise":
        raise RuntimeError("injected failure on rank 1")
    if mode == "exit_ddp":
        os._exit(3)
    if mode == "stall":
        time.sleep(10 * JOB_SECONDS)  # the parent kills it


def worker_main(argv):
    job, rank, world, port, out_dir = argv[:5]
    rank, world, out_dir = int(rank), int(world), Path(out_dir)
    import torch.distributed as dist
    torch.set_num_threads(int(os.environ.get("OMP_NUM_THREADS", "1")))  # Job.workers sets it per rank
    dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=world,
                            timeout=datetime.timedelta(seconds=GROUP_TIMEOUT_SECONDS))
    if job == "train":
        job_train(rank, world, out_dir)
    else:
        job_fault(rank, world, out_dir, argv[5])
    dist.barrier()  # nobody tears the group down while a peer still talks
    dist.destroy_process_group()


# ---------------------------------------------------------------------------------------- the parent side
def torchrun_environment(world):
    """The variables ``torchrun --standalone --nproc_per_node=WORLD`` gives its workers, one dict per rank.

    The example is started as torchrun's workers are, without torchrun's own agent process in
    between: what is tested is the example and ngopt, and the agent's start-up and shut-down under a
    loaded machine only add time to a bounded job.
    """
    port = str(_free_port())
    return [dict(RANK=str(rank), LOCAL_RANK=str(rank), WORLD_SIZE=str(world), LOCAL_WORLD_SIZE=str(world),
                 GROUP_RANK="0", MASTER_ADDR="127.0.0.1", MASTER_PORT=port) for rank in range(world)]


def _free_port():
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def threads_per_rank():
    """Torch threads of each rank: ``NGOPT_TEST_THREADS=2`` (every rank) or ``=1,2`` (per rank); default 1.

    Other thread counts (and other CPUs) take other summation orders in the kernels: the tests
    must pass under each, which is what makes them independent of any bitwise code path.
    """
    counts = [int(part) for part in os.environ.get(THREADS_VARIABLE, "1").split(",")]
    if len(counts) == 1:
        counts *= WORLD
    if len(counts) != WORLD or min(counts) < 1:
        raise ValueError(f"{THREADS_VARIABLE} must be one count or {WORLD} comma-separated counts >= 1")
    return counts


# One level below each vector-kernel level, for torch's own kernels and MKL's.
_LOWER_KERNELS = {"AVX512": {"ATEN_CPU_CAPABILITY": "avx2", "MKL_ENABLE_INSTRUCTIONS": "AVX2"},
                  "AVX2": {"ATEN_CPU_CAPABILITY": "default", "MKL_ENABLE_INSTRUCTIONS": "SSE4_2"}}


def kernels_per_rank():
    """Extra environment of each rank: rank 1 runs narrower vector kernels than rank 0.

    Narrower kernels sum in another order, as another kind of CPU does, so the ranks round
    differently even where one machine's BLAS happens to be bitwise reproducible.
    ``NGOPT_TEST_KERNELS=same`` runs every rank on the machine's own kernels.
    """
    choice = os.environ.get(KERNELS_VARIABLE, "mixed")
    if choice not in ("mixed", "same"):
        raise ValueError(f"{KERNELS_VARIABLE} must be 'mixed' or 'same', got {choice!r}")
    capability = getattr(torch.backends.cpu, "get_cpu_capability", lambda: "")()
    lower = _LOWER_KERNELS.get(capability, {}) if choice == "mixed" else {}
    return [{}] + [lower] * (WORLD - 1)


class Job:
    """Processes started at once; :meth:`finish` waits for some (bounded) and kills the leftovers."""

    def __init__(self, commands, out_dir, wait_for=None, envs=None):
        env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1", PYTHONWARNINGS="ignore")
        if Path("/sys/class/net/lo").exists():
            env["GLOO_SOCKET_IFNAME"] = "lo"  # keep gloo's own sockets on loopback as well
        envs = envs or [{}] * len(commands)
        self.out_dir = out_dir
        self.wait_for = range(len(commands)) if wait_for is None else wait_for
        self.logs = [out_dir / f"process{index}.log" for index in range(len(commands))]
        self.started = time.monotonic()
        self.deadline = self.started + JOB_SECONDS
        self.procs = []
        for command, log, extra in zip(commands, self.logs, envs):
            with open(log, "w") as stream:
                self.procs.append(subprocess.Popen(command, stdout=stream, stderr=subprocess.STDOUT,
                                                   env=dict(env, **extra), cwd=REPOSITORY))
        self._result = None

    @classmethod
    def workers(cls, job, out_dir, *extra, wait_for=None, conditions=True):
        """``WORLD`` ranks of one of this file's jobs, meeting at a fresh port on 127.0.0.1.

        ``conditions``: the ranks take the threads and kernels of :func:`threads_per_rank` and
        :func:`kernels_per_rank`; otherwise one thread each on the machine's own kernels.
        """
        port = str(_free_port())
        envs = [dict(kernels, OMP_NUM_THREADS=str(threads))
                for threads, kernels in zip(threads_per_rank(), kernels_per_rank())] if conditions else None
        return cls([[sys.executable, __file__, job, str(rank), str(WORLD), port, str(out_dir), *extra]
                    for rank in range(WORLD)], out_dir, wait_for, envs)

    def finish(self):
        """``(return codes, logs)``; a process killed at the deadline has a negative code, and the first
        log then ends with a line that says so (with the seconds the job ran)."""
        if self._result is None:
            killed = False
            try:
                for rank in self.wait_for:
                    self.procs[rank].wait(timeout=max(0.1, self.deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                killed = True
            finally:
                self.kill()
            logs = [log.read_text() for log in self.logs]
            if killed:
                logs[0] += (f"\n[killed by the test at its {JOB_SECONDS} s deadline, "
                            f"{time.monotonic() - self.started:.0f} s after the start]")
            self._result = ([proc.returncode for proc in self.procs], logs)
        return self._result

    def kill(self):
        for proc in self.procs:
            if proc.poll() is None:
                proc.kill()
            proc.wait()


FAULT_MODES = ("raise", "exit_ddp", "stall")


@pytest.fixture(scope="module")
def jobs(tmp_path_factory):
    """Every job of this module, running side by side (they spend most of their time importing torch)."""
    started = {"train": Job.workers("train", tmp_path_factory.mktemp("distributed_train"))}
    for mode in FAULT_MODES:
        # the fault jobs time a failure, not numerics: one thread each keeps a loaded machine from
        # stretching their steps past the communicator's short timeout
        started[mode] = Job.workers("fault", tmp_path_factory.mktemp(f"distributed_{mode}"), mode, wait_for=[0],
                                    conditions=False)
    example = tmp_path_factory.mktemp("distributed_example")
    command = [sys.executable, str(EXAMPLE), *EXAMPLE_ARGS, "--threads", str(max(threads_per_rank())),
               "--json", str(example / "report.json"), "--checkpoint", str(example / "checkpoint.pt")]
    started["example"] = Job([command] * WORLD, example, envs=torchrun_environment(WORLD))
    yield started
    for job in started.values():
        job.finish()


@pytest.fixture(scope="module")
def trained(jobs):
    job = jobs["train"]
    codes, logs = job.finish()
    assert codes == [0] * WORLD, "train job failed:\n" + "\n".join(logs)
    ranks = [torch.load(job.out_dir / f"rank{r}.pt", weights_only=False) for r in range(WORLD)]
    return ranks, job.out_dir


def assert_same_weights(actual, expected, rtol, atol):
    for got, want in zip(actual, expected):
        torch.testing.assert_close(got, want, rtol=rtol, atol=atol)


# Float32 tolerance: unit round-off 6e-8 (IEEE 754), amplified over 6 steps by damped inverses with
# condition numbers up to ~1e2; the observed gap is ~3e-7 on weights of size ~0.3 (measured here).
F32 = dict(rtol=1e-5, atol=2e-6)
F64 = dict(rtol=1e-10, atol=1e-12)


def test_ddp_two_ranks_match_one_process_float32(trained):
    ranks, _ = trained
    reference = single_process(torch.float32)
    for rank in ranks:
        assert_same_weights(rank["ddp_exact_f32_sharded"], reference, **F32)


def test_ddp_two_ranks_match_one_process_float64(trained):
    ranks, _ = trained
    reference = single_process(torch.float64)
    for rank in ranks:
        assert_same_weights(rank["ddp_exact_f64_sharded"], reference, **F64)
        assert_same_weights(rank["ddp_exact_f64_replicated"], reference, **F64)


def test_plain_loop_with_average_gradients_matches_one_process(trained):
    ranks, _ = trained
    reference = single_process(torch.float64, fisher="empirical", regression=True)
    for rank in ranks:
        assert_same_weights(rank["plain_empirical_f64"], reference, **F64)


def test_diagonal_curvature_matches_one_process(trained):
    ranks, _ = trained
    reference = single_process(torch.float64, structure="diag")
    for rank in ranks:
        assert_same_weights(rank["ddp_diag_f64"], reference, **F64)


def test_quadratic_rule_and_lm_damping_match_one_process(trained):
    # The 2x2 system's products and the losses behind rho are averaged over the ranks before use:
    # with equal shares and a mean-reduced loss that is the whole batch's value, so both ranks take the
    # step (and the damping) one process with the whole batch takes.
    ranks, _ = trained
    reference = single_process(torch.float64, **QUADRATIC_RULES)
    for rank in ranks:
        assert_same_weights(rank["ddp_quadratic_lm_f64"], reference, **F64)


def test_ekfac_matches_one_process(trained):
    # The scales are a second all-reduce in the basis the (sharded) inversion broadcast.
    ranks, _ = trained
    reference = single_process(torch.float64, structure="ekfac")
    for rank in ranks:
        assert_same_weights(rank["ddp_ekfac_f64"], reference, **F64)


def test_gradient_scaled_ekfac_matches_one_process(trained):
    # Each rank's loss averages its half of the batch (12 terms) and DDP averages the gradients: the
    # gradient is the whole batch's, and its term count is 2 x 12, the one process's 24.
    ranks, _ = trained
    reference = single_process(torch.float64, structure="ekfac-gradient")
    for rank in ranks:
        assert_same_weights(rank["ddp_ekfac_gradient_f64"], reference, **F64)


# ---------------------------------------------------------------------------------------- replicas: rounding only
PRODUCT_LENGTH = 13  # longest inner dimension of the preconditioning products G^-1 V A^-1 here (12 + bias)


def rounding_bound(dtype, steps, weights, condition=0.0):
    """Largest gap that rounding alone can open between two replicas of ``weights`` in ``steps`` steps.

    Derivation (forward error analysis, Higham 2002, "Accuracy and Stability of Numerical
    Algorithms", 2nd ed.: eq. (3.13) for matrix products, sec. 14.3 for inverses):

    * no feedback: every rank computes its step from the same bits (DDP's averaged gradients, the
      all-reduced statistics and, when sharded, the broadcast inverses), so a gap between the
      replicas' weights never changes what a rank computes next: per-step gaps only add up, at
      most linearly in ``steps`` (in practice a random walk, see scripts/replica_drift.py);
    * per step each weight becomes ``w - lr * u``: two ranks' roundings of that subtraction differ
      by at most ``eps |w|``; ``u`` comes from two products of inner length ``d <= PRODUCT_LENGTH``,
      each within ``gamma_d ~ d eps`` of exact on each rank (``4 d eps`` between two ranks), and an
      inverse computed on each rank itself adds ``d kappa eps`` per rank (``condition``: the
      largest damped condition number ``kappa``; 0 where the inverses are the owner's bits);
      momentum ``m`` sums the past differences, a factor ``1 / (1 - m)``;
    * ``lr |u| <= max |w|`` (the trust bound keeps each step below a third of the largest weight
      in these runs: measured);

    so after ``steps`` steps ``|w_0 - w_1| <= steps (1 + 2 d (2 + kappa) / (1 - m)) eps max|w|``.
    """
    eps = torch.finfo(dtype).eps
    per_step = 1 + 2 * PRODUCT_LENGTH * (2 + condition) / (1 - SETTINGS["momentum"])
    return steps * per_step * eps * max(float(w.abs().max()) for w in weights)


def largest_gap(first, second):
    return max(float((a - b).abs().max()) for a, b in zip(first, second))


def largest_damped_condition(diagnostics):
    return max(value for layer in diagnostics.values() for key, value in layer.items()
               if key.endswith("_condition_damped"))


def assert_same_diagnostics(first, second, relative):
    """Layer summaries agree: sizes, kinds and steps exactly, numbers to within rounding.

    ``relative``: the relative gap between the weights the two summaries come from.  The factors
    are smooth in the weights (common practice: tanh layers, O(1) activations), so their entries,
    and by Weyl's inequality (``|d lambda| <= ||dF||``) their eigenvalues, traces and factored
    damping, move by at most about ``relative`` times the layer's largest eigenvalue (plus their own
    eigensolver rounding, ``PRODUCT_LENGTH eps_64`` relative).  A condition number ``hi/lo`` of a
    nearly singular factor is compared through its reciprocal ``lo/hi``, which that moves by at most
    ``2 relative``; a damped one ``c = (hi+s)/(lo+s) >= 1`` by at most ``2 relative (1 + c)`` relative,
    and the product of two by the sum of theirs: at most ``8 relative c^2`` in all.
    """
    relative = relative + PRODUCT_LENGTH * torch.finfo(torch.float64).eps
    assert first.keys() == second.keys()
    for name in first:
        a, b = first[name], second[name]
        assert a.keys() == b.keys(), name
        numbers = [k for k in a if isinstance(a[k], float) and not isinstance(a[k], bool)]
        assert {k: a[k] for k in a if k not in numbers} == {k: b[k] for k in b if k not in numbers}, name
        scale = max(abs(a[k]) for k in numbers if "condition" not in k and math.isfinite(a[k]))
        for key in numbers:
            x, y = a[key], b[key]
            if x == y or (math.isnan(x) and math.isnan(y)):
                continue
            if key.endswith("_condition"):  # undamped: hi/lo, infinite for a singular factor
                assert abs(1 / x - 1 / y) <= 2 * relative, (name, key, x, y)
            elif "condition" in key:  # damped, and "condition", the product of the two sides' (<= 8 rel c^2)
                assert abs(x - y) <= 8 * relative * max(x, y) ** 2, (name, key, x, y)
            else:
                assert abs(x - y) <= 2 * relative * scale, (name, key, x, y)


def test_sharded_inversion_equals_everyone_inverting(trained):
    ranks, _ = trained
    for rank in ranks:
        for sharded, replicated, dtype in (("ddp_exact_f32_sharded", "ddp_exact_f32_replicated", torch.float32),
                                           ("ddp_exact_f32_reduced", "ddp_exact_f32_replicated", torch.float32),
                                           ("ddp_exact_f64_sharded", "ddp_exact_f64_replicated", torch.float64)):
            # an inverse made in another process vs one made here: the same inputs, other roundings
            kappa = largest_damped_condition(rank["diagnostics"][replicated])
            bound = rounding_bound(dtype, STEPS, rank[replicated], condition=kappa)
            assert largest_gap(rank[sharded], rank[replicated]) <= bound, f"{sharded} vs {replicated}"
            # the info that came with the inverses (traces, damping, condition numbers) too
            scale = max(float(w.abs().max()) for w in rank[replicated])
            assert_same_diagnostics(rank["diagnostics"][sharded], rank["diagnostics"][replicated], bound / scale)
    for run in ranks[0]["diagnostics"]:  # rank 0 vs rank 1: the same factors, the inverses of their owner
        dtype = torch.float32 if "f32" in run else torch.float64
        bound = rounding_bound(dtype, STEPS, ranks[0][run])
        scale = max(float(w.abs().max()) for w in ranks[0][run])
        assert_same_diagnostics(ranks[0]["diagnostics"][run], ranks[1]["diagnostics"][run], bound / scale)
    sharded = [r["ddp_exact_f32_sharded_summary"] for r in ranks]
    replicated = [r["ddp_exact_f32_replicated_summary"] for r in ranks]
    # 3 blocks, 2 inversion rounds: the owners split the work; replicated ranks each do all of it.
    assert sum(s["inversions_here"] for s in sharded) == 3 * 2
    assert all(s["inversions_here"] == 3 * 2 for s in replicated)
    assert all(s["inverse_bytes"] > 0 for s in sharded) and all(s["inverse_bytes"] == 0 for s in replicated)


def _run_weights(rank, name):
    return rank["adaptive_damping"][0] if name == "adaptive_damping" else rank[name]


def test_every_rank_holds_the_same_weights(trained):
    # To within rounding_bound; the inverses each rank makes itself (replicated) add their conditioning.
    ranks, _ = trained
    for name, gap in ranks[0]["sync"].items():
        assert ranks[1]["sync"][name] == gap  # the same all-reduced number on both ranks
        dtype = torch.float32 if "f32" in name else torch.float64
        kappa = largest_damped_condition(ranks[0]["diagnostics"][name]) if "replicated" in name else 0.0
        assert gap <= rounding_bound(dtype, STEPS, _run_weights(ranks[0], name), condition=kappa), (name, gap)


def test_checkpoint_from_two_ranks_resumes_in_one_process(trained):
    ranks, out_dir = trained
    state = torch.load(out_dir / "checkpoint.pt", weights_only=True)
    resumed = single_process(torch.float32, start_from=state)
    assert_same_weights(resumed, ranks[0]["ddp_exact_f32_sharded"], **F32)


def test_sampled_fisher_resume_repeats_the_draws(trained):
    ranks, _ = trained
    for rank in ranks:
        straight, resumed, other_draws = rank["sampled_resume"]
        # the same draws: the two runs differ by rounding at most (same process, other allocations)
        bound = rounding_bound(torch.float64, STEPS, straight)
        assert largest_gap(straight, resumed) <= bound
        assert largest_gap(straight, other_draws) > 1e3 * bound  # other draws are far outside it


def test_adaptive_damping_stays_equal_on_all_ranks(trained):
    ranks, _ = trained
    (weights0, history0), (_, history1) = ranks[0]["adaptive_damping"], ranks[1]["adaptive_damping"]
    assert history0 == history1  # rank 0's value, copied to the others by a broadcast: equal by construction
    assert len(set(history0)) > 1  # the rule did move damping
    assert ranks[0]["sync"]["adaptive_damping"] <= rounding_bound(torch.float64, STEPS, weights0)


def test_ranks_agree_on_calling_the_closure_again(trained):
    ranks, _ = trained
    counts = [ranks[r]["disagreeing_closure_calls"] for r in (0, 1)]
    steps = len(ranks[0]["adaptive_damping"][1])
    assert counts[0] == counts[1] > steps  # both re-evaluated on the damping steps, none hung


def test_resync_restores_rank_zeros_weights(trained):
    ranks, _ = trained
    (after_knock, after_resync, after_next), weights_now = ranks[0]["resync"]
    assert after_knock == pytest.approx(1e-3, rel=1e-6)  # what rank 1 added
    assert after_resync == 0.0  # a broadcast copy of rank 0's weights: equal by construction
    assert after_next <= rounding_bound(torch.float64, 1, weights_now)  # one step of rounding since


def test_measured_statistics_bytes_match_the_formula(trained):
    ranks, _ = trained
    for rank in ranks:
        summary, volume = rank["ddp_exact_f32_sharded_summary"], rank["volume_from_sizes"]
        assert summary["statistics_bytes"] == summary["statistics_exchanges"] * volume["statistics_buffer_bytes"]
    # the inverse buffers add a JSON header (names, shapes, plain info values) to the raw tensors
    received = [r["ddp_exact_f32_sharded_summary"]["inverse_bytes"] / 2 for r in ranks]  # 2 exchanges
    formula = ranks[0]["volume_from_sizes"]["inverse_bytes_per_rank"]
    assert all(formula < got < formula + 2048 for got in received)


def test_mismatched_models_are_refused_on_every_rank(trained):
    ranks, _ = trained
    for rank in ranks:
        assert rank["mismatch_error"] is not None and "differ" in rank["mismatch_error"]


@pytest.mark.parametrize("mode", FAULT_MODES)
def test_a_failing_rank_makes_the_other_fail_fast(jobs, mode):
    codes, logs = jobs[mode].finish()
    assert codes[0] == 1, f"rank 0 should have stopped with an error by itself:\n{logs[0]}"
    found = re.search(r"FAILED after ([0-9.]+) s at step 2: (\w+): (.*)", logs[0])
    assert found, logs[0] + "\n--- rank 1 ---\n" + logs[1]
    seconds, kind, message = float(found.group(1)), found.group(2), found.group(3)
    # a closed connection is seen at once; a stalled peer after the communicator's timeout
    assert seconds < FAULT_TIMEOUT_SECONDS + 5
    assert kind == "CurvatureSyncError"
    # the first collective of a step: the scalar average of the loss bound (rules/loss_bound.py)
    assert "scalar average at step 2" in message and "rank 0 of 2" in message


def test_the_example_runs_on_two_ranks_and_its_checkpoint_loads_in_one_process(jobs):
    job = jobs["example"]
    codes, logs = job.finish()
    assert codes == [0] * WORLD, "\n".join(logs)
    report = json.loads((job.out_dir / "report.json").read_text())
    assert report["processes"] == 2 and report["exchange"]["statistics_exchanges"] == 4  # steps 0, 2, 4, 6
    assert report["exchange"]["inverse_exchanges"] == 2  # steps 0, 4
    assert report["max_weight_difference_between_ranks"] < 1e-6
    spec = importlib.util.spec_from_file_location("train_ddp_example", EXAMPLE)
    example = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(example)
    example.main(EXAMPLE_ARGS + ["--threads", str(torch.get_num_threads()),
                                 "--resume", str(job.out_dir / "checkpoint.pt"),
                                 "--json", str(job.out_dir / "resumed.json")])
    resumed = json.loads((job.out_dir / "resumed.json").read_text())
    assert report["optimizer_steps"] == 8 and resumed["processes"] == 1 and resumed["optimizer_steps"] == 16
    assert resumed["train_loss"] < report["train_loss"]  # 8 more steps on the digits from where rank 0 saved


if __name__ == "__main__":
    worker_main(sys.argv[1:])
