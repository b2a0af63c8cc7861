"""On a CUDA device: training (parameters on either fallback rule too), a checkpoint round trip, autocast
with loss scaling, the sampled Fisher's generator, data parallelism with one process, and the finiteness
check over CPU and device tensors together.  Skipped where no CUDA device is present.

References: the same model trained on the CPU in float64 (the curvature of one linear layer with
squared error is exact, Martens & Grosse 2015, so the CUDA step must land where the CPU step does, to
float32 rounding of a few hundred terms: 1e-4 relative, common practice); bit-exact resume in one
process (the same kernels on the same device); torch's own GradScaler contract.
"""
from __future__ import annotations

import copy
import os
import tempfile

import pytest
import torch
from torch import nn
import torch.nn.functional as F

import ngopt

pytestmark = pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device")
DEVICE = "cuda"


def classifier(seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), nn.Flatten(),
                         nn.Linear(8 * 6 * 6, 32), nn.LayerNorm(32), nn.Tanh(), nn.Linear(32, 4))


def images(rows=64, seed=1, device=DEVICE):
    generator = torch.Generator().manual_seed(seed)
    x = torch.randn(rows, 1, 6, 6, generator=generator)
    y = (x[:, 0, :3].mean(dim=(1, 2)) > 0).long() * 2 + (x[:, 0, 3:].mean(dim=(1, 2)) > 0).long()
    return x.to(device), y.to(device)


def train(model, opt, x, y, steps):
    losses = []
    for _ in range(steps):
        opt.zero_grad()
        loss = F.cross_entropy(model(x), y)
        loss.backward()
        opt.step()
        losses.append(float(loss.detach()))
    return losses


@pytest.mark.parametrize("structure", ["kfac", "ekfac", "ekfac-gradient", "diag"])
def test_a_model_on_the_device_trains_and_keeps_its_state_there(structure):
    model = classifier().to(DEVICE)
    x, y = images()
    opt = ngopt.FisherDescent(model, structure=structure, stats_interval=2, inverse_interval=4, stats_fraction=1.0)
    losses = train(model, opt, x, y, 20)
    assert losses[-1] < 0.6 * losses[0]
    for state in opt.state.values():
        for value in state.values():
            if torch.is_tensor(value) and value.dim():
                assert value.device.type == "cuda"


def test_one_exact_step_on_the_device_lands_where_the_cpu_step_does():
    torch.manual_seed(2)
    cpu = nn.Linear(5, 3).double()
    gpu = copy.deepcopy(cpu).float().to(DEVICE)
    generator = torch.Generator().manual_seed(3)
    x, y = torch.randn(40, 5, generator=generator, dtype=torch.float64), torch.randn(40, 3, generator=generator,
                                                                                   dtype=torch.float64)
    settings = dict(fisher="exact", lr=1.0, momentum=0.0, max_step_kl=None, stats_memory=0.0, stats_interval=1,
                    inverse_interval=1, damping=1e-6, damping_rule="fixed")
    for model, inputs, targets in ((cpu, x, y), (gpu, x.float().to(DEVICE), y.float().to(DEVICE))):
        opt = ngopt.FisherDescent(model, nn.MSELoss(), **settings)
        opt.zero_grad()
        F.mse_loss(model(inputs), targets).backward()
        opt.step()
    torch.testing.assert_close(gpu.weight.double().cpu(), cpu.weight, rtol=1e-4, atol=1e-5)


def test_a_checkpoint_resumes_exactly_on_the_device():
    x, y = images(seed=4)
    model = classifier(5).to(DEVICE)
    opt = ngopt.FisherDescent(model, stats_interval=2, inverse_interval=4, seed=0)
    train(model, opt, x, y, 5)
    saved = copy.deepcopy((model.state_dict(), opt.state_dict()))
    train(model, opt, x, y, 5)
    resumed = classifier(5).to(DEVICE)
    resumed.load_state_dict(saved[0])
    resumed_opt = ngopt.FisherDescent(resumed, stats_interval=2, inverse_interval=4, seed=0)
    resumed_opt.load_state_dict(saved[1])
    train(resumed, resumed_opt, x, y, 5)
    # Same seed, same data, same state: the same trajectory. Not bit for bit: cuDNN's convolution
    # backward may sum in another order on each call (float32 atomics), a few ulps per step that the
    # preconditioned steps carry on (common practice: cuDNN documents these kernels as nondeterministic).
    for p, q in zip(model.parameters(), resumed.parameters()):
        torch.testing.assert_close(p, q, rtol=1e-4, atol=1e-5)


def test_the_sampled_fisher_draws_from_a_generator_on_the_device():
    model = classifier(6).to(DEVICE)
    x, y = images(seed=7)
    opt = ngopt.FisherDescent(model, stats_interval=1)
    train(model, opt, x, y, 2)
    generator = opt._generator_for(torch.device(DEVICE))
    assert generator.device.type == "cuda"


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_autocast_with_the_loss_scaler_trains_on_the_device(dtype):
    model = classifier(8).to(DEVICE)
    x, y = images(seed=9)
    opt = ngopt.FisherDescent(model, stats_interval=2, inverse_interval=4)
    scaler = torch.amp.GradScaler("cuda")
    start = float(F.cross_entropy(model(x), y))
    for _ in range(30):
        opt.zero_grad()
        with torch.autocast("cuda", dtype=dtype):
            loss = F.cross_entropy(model(x), y)
        scaler.scale(loss).backward()
        scaler.step(opt)
        scaler.update()
    assert float(F.cross_entropy(model(x), y)) < 0.7 * start


def test_data_parallel_with_one_process_on_the_device():
    import torch.distributed as dist
    backend = "nccl" if dist.is_nccl_available() else "gloo"
    with tempfile.TemporaryDirectory() as folder:
        dist.init_process_group(backend, init_method=f"file://{os.path.join(folder, 'rendezvous')}", rank=0,
                                world_size=1)
        try:
            model = nn.parallel.DistributedDataParallel(classifier(10).to(DEVICE))
            x, y = images(seed=11)
            opt = ngopt.FisherDescent(model, stats_interval=2, inverse_interval=4)
            assert opt.communicator is not None  # attached by itself to DDP's group
            losses = train(model, opt, x, y, 10)
            assert losses[-1] < losses[0]
        finally:
            dist.destroy_process_group()


class WithFreeParameters(nn.Module):
    """A classifier with a parameter outside every block (an extra input row joined by ``cat``, as a class
    token is): it takes the fallback rule."""

    def __init__(self):
        super().__init__()
        self.extra_row = nn.Parameter(torch.zeros(1, 1, 1, 6))
        self.body = classifier(12)

    def forward(self, x):
        rows = torch.cat([x[:, :, :5], self.extra_row.expand(x.shape[0], -1, -1, -1)], dim=2)
        return self.body(rows)


@pytest.mark.parametrize("fallback", ["adam", "sgd"])
def test_parameters_on_the_fallback_rule_train_on_the_device(fallback):
    model = WithFreeParameters().to(DEVICE)
    x, y = images(seed=13)
    opt = ngopt.FisherDescent(model, stats_interval=2, inverse_interval=4, fallback=fallback)
    extra_row = model.extra_row.detach().clone()
    losses = train(model, opt, x, y, 20)
    assert {name for name, entry in opt.curvature_assignment().items() if entry.fallback} == {"extra_row"}
    assert losses[-1] < 0.6 * losses[0] and opt.diagnostics()["skipped_steps"] == 0
    assert not torch.equal(model.extra_row, extra_row)


def test_the_finiteness_check_reads_tensors_on_the_cpu_and_the_device_together():
    from ngopt.step_pipeline import all_finite
    cpu, gpu = torch.ones(3), torch.ones(4, device=DEVICE)
    assert all_finite([cpu, gpu, torch.ones((), dtype=torch.float64)])
    assert not all_finite([cpu, gpu.clone().fill_(float("nan"))])
    assert not all_finite([torch.tensor([1.0, float("inf")]), gpu])
    assert not all_finite([cpu, gpu], [1.0, float("inf")])  # a factor that overflows the product
