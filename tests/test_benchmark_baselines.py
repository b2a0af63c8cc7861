"""Tests of the baselines beyond SGD and Adam: AdamW under warm-up and cosine decay, and Muon with AdamW;
and of the cosine decay alone, on FisherDescent's row of that name.

References: torch's own schedulers (``LinearLR``, ``CosineAnnealingLR``) for
the schedule, and torch's own optimizers stepped on their own for the
composite optimizer and the Muon split (torch's documentation of
``torch.optim.Muon``: Muon is for the 2-D parameters of hidden layers;
embeddings, the output layer, biases and gains take a standard method such as
AdamW). Comparisons of weights run in one process and use tolerances.
"""

from __future__ import annotations

import copy
import math
from dataclasses import replace

import pytest
import torch
from torch import nn

from benchmarks import muon as muon_row
from benchmarks import schedules
from benchmarks.cli import build_parser, main, make_config
from benchmarks.composite import CompositeOptimizer
from benchmarks.muon import REST_RULE, MATRIX_RULE, build_muon, hidden_matrices
from benchmarks.optimizers import ADAMW_WEIGHT_DECAY, OPTIMIZERS
from benchmarks.tasks import TASKS, corpus_torch_transformer, corpus_transformer, digits_cnn
from benchmarks.training import train_run

MUON = pytest.mark.skipif(not hasattr(torch.optim, "Muon"), reason="this torch has no torch.optim.Muon")


def lrs_of(scheduler_factory, steps: int, peak: float = 0.1) -> list[float]:
    """The lr each of ``steps`` optimizer steps runs at under the scheduler that the factory builds."""
    optimizer = torch.optim.SGD([nn.Parameter(torch.zeros(1))], lr=peak)
    scheduler = scheduler_factory(optimizer)
    seen = []
    for _ in range(steps):
        seen.append(optimizer.param_groups[0]["lr"])
        optimizer.step()
        scheduler.step()
    return seen


def test_warmup_then_cosine_follows_torchs_linear_and_cosine_schedulers():
    steps, peak = 200, 0.1
    warmup = schedules.warmup_steps(steps)
    assert warmup == 10  # 5% of 200
    ours = lrs_of(lambda optimizer: schedules.warmup_cosine(optimizer, steps), steps, peak)
    # torch.optim.lr_scheduler.LinearLR: start_factor * lr rising linearly to lr over total_iters steps
    rise = lrs_of(lambda optimizer: torch.optim.lr_scheduler.LinearLR(
        optimizer, start_factor=1 / warmup, end_factor=1.0, total_iters=warmup - 1), warmup, peak)
    # torch.optim.lr_scheduler.CosineAnnealingLR: eta_min + (lr - eta_min)(1 + cos(pi t / T_max)) / 2
    decay = lrs_of(lambda optimizer: torch.optim.lr_scheduler.CosineAnnealingLR(
        optimizer, T_max=steps - warmup, eta_min=0.0), steps - warmup, peak)
    assert ours == pytest.approx(rise + decay, rel=1e-9, abs=1e-12)
    assert ours[0] == pytest.approx(peak / warmup) and max(ours) == pytest.approx(peak)


def test_warmup_is_at_least_one_step_and_the_budget_must_be_positive():
    assert schedules.warmup_steps(3) == 1 and schedules.warmup_steps(1) == 1
    assert [schedules.warmup_cosine_factor(index, 1) for index in range(1)] == [1.0]
    optimizer = torch.optim.SGD([nn.Parameter(torch.zeros(1))], lr=0.1)
    with pytest.raises(ValueError, match="steps must be a positive integer"):
        schedules.warmup_cosine(optimizer, 0)


def test_adamw_cosine_row_runs_each_step_at_the_scheduled_lr():
    steps, peak = 40, 0.02
    seen: list[float] = []
    spec = OPTIMIZERS["adamw-cosine"]

    def recording_build(model, loss_fn, lr):
        optimizer = spec.build(model, loss_fn, lr)
        optimizer.register_step_pre_hook(lambda opt, args, kwargs: seen.append(opt.param_groups[0]["lr"]))
        assert isinstance(optimizer, torch.optim.AdamW)
        assert optimizer.param_groups[0]["weight_decay"] == ADAMW_WEIGHT_DECAY == 0.01  # torch's AdamW default
        return optimizer

    run = train_run(TASKS["ill_conditioned_regression"], replace(spec, build=recording_build), peak, seed=0,
                    steps=steps)
    assert run.lr == peak and run.steps_run == steps
    expected = lrs_of(lambda optimizer: schedules.warmup_cosine(optimizer, steps), steps, peak)
    assert seen == pytest.approx(expected, rel=1e-12)


def test_cosine_decay_alone_is_the_closed_form_from_the_peak_to_zero():
    # (1 + cos(pi i / T)) / 2 times the lr on step i of T (the cosine annealing of Loshchilov & Hutter,
    # SGDR, ICLR 2017, without restarts), by hand; no warm-up: the first step runs at the lr itself
    steps, peak = 50, 0.3
    ours = lrs_of(lambda optimizer: schedules.cosine(optimizer, steps), steps, peak)
    by_hand = [peak * (1 + math.cos(math.pi * index / steps)) / 2 for index in range(steps)]
    assert ours == pytest.approx(by_hand, rel=1e-9, abs=1e-12)
    assert ours[0] == peak and 0 < ours[-1] < 1e-3 * peak
    with pytest.raises(ValueError, match="steps must be a positive integer"):
        schedules.cosine(torch.optim.SGD([nn.Parameter(torch.zeros(1))], lr=0.1), 0)


def test_fisher_descent_cosine_row_is_the_untuned_method_under_the_decay():
    import ngopt
    from benchmarks.optimizers import with_natural_gradient_options

    steps, seen = 12, []
    spec = OPTIMIZERS["fisher-descent-cosine"]
    assert spec.lr_grid(4) == [None] and "cosine decay" in spec.label

    def recording_build(model, loss_fn, lr):
        optimizer = spec.build(model, loss_fn, lr)
        assert isinstance(optimizer, ngopt.FisherDescent)
        optimizer.register_step_pre_hook(lambda opt, args, kwargs: seen.append(opt.param_groups[0]["lr"]))
        return optimizer

    run = train_run(TASKS["ill_conditioned_regression"], replace(spec, build=recording_build), None, seed=0,
                    steps=steps)
    assert run.steps_run == steps
    default_lr = OPTIMIZERS["fisher-descent"].build(nn.Linear(2, 1), nn.MSELoss(), None).param_groups[0]["lr"]
    assert seen == pytest.approx(lrs_of(lambda optimizer: schedules.cosine(optimizer, steps), steps, default_lr),
                                 rel=1e-12)
    # options given on the command line keep the schedule and say so
    overridden = with_natural_gradient_options(spec, {"damping": 0.1})
    assert overridden.schedule is schedules.cosine and "cosine decay" in overridden.label \
        and "damping=0.1" in overridden.label


def small_model() -> nn.Sequential:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.LayerNorm(8), nn.Linear(8, 3))


def train_steps(model: nn.Module, step, steps: int = 5) -> None:
    """``steps`` steps of ``step(closure)`` on fixed random batches."""
    generator = torch.Generator().manual_seed(1)
    for _ in range(steps):
        inputs, targets = torch.randn(16, 4, generator=generator), torch.randint(0, 3, (16,), generator=generator)

        def closure():
            model.zero_grad()
            loss = nn.functional.cross_entropy(model(inputs), targets)
            loss.backward()
            return loss

        step(closure)


def each_part_by_hand(parts: dict[str, torch.optim.Optimizer]):
    """The reference step: the closure once, then every torch optimizer's own step."""
    def step(closure):
        closure()
        for part in parts.values():
            part.step()
    return step


def assert_same_weights(model: nn.Module, reference: nn.Module, rtol: float = 1e-6, atol: float = 1e-7) -> None:
    for ours, theirs in zip(model.parameters(), reference.parameters()):
        torch.testing.assert_close(ours, theirs, rtol=rtol, atol=atol)


def split_sgd_adam(model: nn.Module, lr: float = 0.05) -> dict[str, torch.optim.Optimizer]:
    matrices = [param for param in model.parameters() if param.ndim == 2]
    rest = [param for param in model.parameters() if param.ndim != 2]
    return {"sgd": torch.optim.SGD(matrices, lr=lr, momentum=0.9), "adam": torch.optim.Adam(rest, lr=lr)}


def test_composite_steps_each_part_as_that_optimizer_alone_would():
    model, reference = small_model(), small_model()
    train_steps(model, CompositeOptimizer(split_sgd_adam(model)).step)
    train_steps(reference, each_part_by_hand(split_sgd_adam(reference)))
    assert_same_weights(model, reference)


def test_composite_groups_are_the_parts_groups_so_schedulers_reach_every_part():
    model = small_model()
    parts = split_sgd_adam(model, lr=0.08)
    composite = CompositeOptimizer(parts)
    assert [id(group) for group in composite.param_groups] == [
        id(group) for part in parts.values() for group in part.param_groups]
    scheduler = torch.optim.lr_scheduler.LambdaLR(composite, lambda epoch: 0.5 ** epoch)
    train_steps(model, composite.step, steps=1)
    scheduler.step()
    # torch.optim.lr_scheduler.LambdaLR: lr = initial lr * lambda(epoch), in every group
    assert [part.param_groups[0]["lr"] for part in parts.values()] == [0.04, 0.04]
    composite.zero_grad()
    assert all(param.grad is None for param in model.parameters())  # torch's zero_grad: set_to_none


def test_composite_state_dict_restores_every_part():
    model = small_model()
    composite = CompositeOptimizer(split_sgd_adam(model))
    train_steps(model, composite.step, steps=3)
    twin = copy.deepcopy(model)
    restored = CompositeOptimizer(split_sgd_adam(twin))
    # a saved copy, as torch.save would make: torch's load_state_dict keeps the tensors it is given
    restored.load_state_dict(copy.deepcopy(composite.state_dict()))
    assert [id(group) for group in restored.param_groups] == [  # still the parts' own groups after the load
        id(group) for part in restored.parts.values() for group in part.param_groups]
    train_steps(model, composite.step, steps=2)
    train_steps(twin, restored.step, steps=2)
    assert_same_weights(model, twin)
    with pytest.raises(ValueError, match="state_dict must hold the parts"):
        restored.load_state_dict({"parts": {"sgd": {}}})


def test_composite_rejects_bad_parts():
    model = small_model()
    with pytest.raises(ValueError, match="parts must be a non-empty dict"):
        CompositeOptimizer({})
    with pytest.raises(TypeError, match=r"parts\['odd'\] must be a torch.optim.Optimizer"):
        CompositeOptimizer({"odd": object()})
    with pytest.raises(ValueError, match="is in both parts 'a' and 'b'"):
        CompositeOptimizer({"a": torch.optim.SGD(model.parameters(), lr=0.1),
                            "b": torch.optim.Adam(model[0].parameters())})


def named(model: nn.Module, params) -> set[str]:
    names = {id(param): name for name, param in model.named_parameters()}
    return {names[id(param)] for param in params}


def test_hidden_matrices_are_the_2d_weights_of_hidden_layers():
    torch.manual_seed(0)
    model = corpus_transformer()
    # by hand: per block the query, key, value and out projections and the two MLP layers
    expected = {f"blocks.{block}.{layer}.weight" for block in range(2)
                for layer in ("attention.query", "attention.key", "attention.value", "attention.out", "mlp.0", "mlp.2")}
    assert named(model, hidden_matrices(model)) == expected  # not the embeddings, not the read-out
    torch_layers = corpus_torch_transformer()
    chosen = named(torch_layers, hidden_matrices(torch_layers))
    assert "blocks.layers.0.self_attn.in_proj_weight" in chosen and "read_out.weight" not in chosen
    assert len(chosen) == 2 * 4  # packed in-projection, out-projection, two MLP layers per block
    assert hidden_matrices(digits_cnn()) == []  # 4-D kernels and the read-out only


def test_tied_read_out_keeps_the_hidden_layers():
    embedding = nn.Embedding(10, 6)
    model = nn.Sequential(embedding, nn.Linear(6, 6), nn.Tanh(), nn.Linear(6, 10, bias=False))
    model[3].weight = embedding.weight  # read-out tied to the embedding (common practice)
    assert named(model, hidden_matrices(model)) == {"1.weight"}


@MUON
def test_muon_row_steps_like_torchs_muon_and_adamw_on_their_own():
    lr = 0.02
    model, reference = small_model(), small_model()
    optimizer = build_muon(model, nn.CrossEntropyLoss(), lr, ADAMW_WEIGHT_DECAY)
    assert list(optimizer.parts) == [MATRIX_RULE, REST_RULE]
    train_steps(model, optimizer.step)
    matrix = reference[0].weight  # the hidden layer's weight; the read-out (layer 3) takes AdamW
    parts = {"muon": torch.optim.Muon([matrix], lr=lr, weight_decay=ADAMW_WEIGHT_DECAY,
                                      adjust_lr_fn="match_rms_adamw"),
             "adamw": torch.optim.AdamW([p for p in reference.parameters() if p is not matrix], lr=lr,
                                        weight_decay=ADAMW_WEIGHT_DECAY)}
    train_steps(reference, each_part_by_hand(parts))
    assert_same_weights(model, reference, rtol=1e-5, atol=1e-6)


@MUON
def test_muon_row_on_a_model_without_hidden_matrices_is_adamw_alone():
    torch.manual_seed(0)
    model = digits_cnn()
    optimizer = OPTIMIZERS["muon"].build(model, nn.CrossEntropyLoss(), 0.01)
    assert list(optimizer.parts) == [REST_RULE]
    assert sum(p.numel() for g in optimizer.param_groups for p in g["params"]) == \
        sum(p.numel() for p in model.parameters())


def test_muon_row_is_skipped_with_its_reason_on_a_torch_without_muon(monkeypatch, capsys, tmp_path):
    monkeypatch.delattr(torch.optim, "Muon", raising=False)
    config = make_config(build_parser().parse_args(["--optimizers", "sgd,muon"]))
    assert [spec.name for spec in config.specs] == ["sgd"]
    assert "has no torch.optim.Muon" in config.skipped["muon"]
    with pytest.raises(ValueError, match="--optimizers: none of the chosen optimizers can run here: muon"):
        make_config(build_parser().parse_args(["--optimizers", "muon"]))
    argv = ["--tasks", "ill_conditioned_regression", "--optimizers", "sgd,muon", "--steps", "2", "--grid", "1",
            "--seeds", "1", "--no-progress", "--out", str(tmp_path)]
    assert main(argv) == 0
    assert "skipping optimizer muon: torch" in capsys.readouterr().out
    assert "skipped: muon (torch" in (tmp_path / "report.md").read_text()


@MUON
def test_a_default_run_leaves_muon_out_only_where_bfloat16_is_emulated(monkeypatch):
    # torch's Muon orthogonalizes in bfloat16; emulated (AVX2 only) its times measure the emulation
    for ratio, left_out in [(0.5, False), (1.5, False), (30.0, True)]:
        monkeypatch.setattr(muon_row, "bfloat16_product_ratio", lambda ratio=ratio: ratio)
        muon_row.muon_slow_here.cache_clear()
        default = make_config(build_parser().parse_args([]))
        assert ("muon" not in [spec.name for spec in default.specs]) == left_out
        assert ("muon" in default.skipped) == left_out
        if left_out:
            assert "30x slower than float32" in default.skipped["muon"]
        asked = make_config(build_parser().parse_args(["--optimizers", "sgd,muon"]))
        assert [spec.name for spec in asked.specs] == ["sgd", "muon"] and not asked.skipped  # named: it runs
    muon_row.muon_slow_here.cache_clear()


def test_bfloat16_probe_measures_a_positive_ratio_and_keeps_the_thread_count():
    threads = torch.get_num_threads()
    ratio = muon_row.bfloat16_product_ratio(size=32, repeats=2)
    assert math.isfinite(ratio) and ratio > 0
    assert torch.get_num_threads() == threads
