"""The public surface of ``ngopt.FisherDescent`` (API.md, "Behaviour users rely on").

Argument checks (7), warnings, ``repr``, ``param_groups`` with
``torch.optim.lr_scheduler`` (2), ``state_dict`` round trips through
``torch.save``/``torch.load(weights_only=True)`` and ``step(closure)`` (3).
"""
import importlib
import io
import math
import warnings

import pytest
import torch
from torch import nn

import ngopt

DTYPE = torch.float64


def small_mlp(seed=0, dtype=DTYPE):
    """Linear -> Tanh -> PReLU -> Linear: two curvature blocks and one fallback layer."""
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.PReLU(8), nn.Linear(8, 3)).to(dtype)


def regression_batches(count, rows=16, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return [(torch.randn(rows, 6, generator=generator, dtype=DTYPE),
             torch.randn(rows, 3, generator=generator, dtype=DTYPE)) for _ in range(count)]


def class_batches(count, rows=16, seed=1):
    generator = torch.Generator().manual_seed(seed)
    return [(torch.randn(rows, 6, generator=generator, dtype=DTYPE),
             torch.randint(0, 3, (rows,), generator=generator)) for _ in range(count)]


def quiet_optimizer(model, loss_fn, **kwargs):
    kwargs = {"step_rule": "fixed", "damping_rule": "fixed", **kwargs}  # the rules these tests were written for
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ngopt.FisherDescent(model, loss_fn, **kwargs)


def train_step(model, opt, loss_fn, batch):
    x, y = batch
    opt.zero_grad()
    loss = loss_fn(model(x), y)
    loss.backward()
    opt.step()
    return loss


def weights(model):
    return [p.detach().clone() for p in model.parameters()]


# ---------------------------------------------------------------------------- argument checks
# The ranges are the documented ones in ngopt/validation.py; a learning rate must be >= 0 (0 is a
# schedule's first or last value), damping and the KL bound positive and momentum / an EMA weight lie in [0, 1) (common practice).
# (argument, a value of the right type that is out of range)
BAD_VALUES = [
    ("lr", -1.0), ("lr", math.nan), ("lr", math.inf),
    ("momentum", 1.0), ("momentum", -0.1),
    ("weight_decay", -1e-4), ("weight_decay", math.inf),
    ("damping", 0.0), ("damping", -1e-3),
    ("fisher", "fancy"),
    ("structure", "full"),
    ("stats_interval", 0),
    ("inverse_interval", 0),
    ("interval_warmup", -1),
    ("stats_memory", 1.0), ("stats_memory", -0.5),
    ("max_step_kl", 0.0), ("max_step_kl", -1.0),
    ("fallback", "lion"),
    ("fallback_lr_scale", -1.0),
    ("fisher_samples", 0),
    ("damping_range", (1.0, 1e-3)), ("damping_range", (0.0, 1.0)),
    ("damping_interval", 0),
    ("damping_rule", "adaptive"), ("damping_rule", "LM"),
]
# (argument, a value of the wrong type); bool is not accepted where a number is meant.
BAD_TYPES = [
    ("lr", "0.1"), ("lr", True),
    ("momentum", "0.9"), ("momentum", [0.5]),
    ("weight_decay", "0"),
    ("damping", "1e-3"),
    ("fisher", 1),
    ("structure", None),
    ("stats_interval", 1.5),
    ("inverse_interval", "20"),
    ("interval_warmup", 2.0), ("interval_warmup", True),
    ("stats_memory", [0.9]),
    ("max_step_kl", "1e-2"),
    ("damping_rule", 1), ("damping_rule", True),
    ("fallback", 0),
    ("fallback_lr_scale", "1"),
    ("fisher_samples", 2.0),
    ("damping_range", "wide"), ("damping_range", (1e-6, "high")),
    ("damping_interval", 5.0),
    ("seed", "7"), ("seed", 1.0),
]


@pytest.mark.parametrize("name,value", BAD_VALUES)
def test_bad_value_raises_value_error_naming_argument(name, value):
    with pytest.raises(ValueError, match=name):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), **{name: value})


@pytest.mark.parametrize("name,value", BAD_TYPES)
def test_bad_type_raises_type_error_naming_argument(name, value):
    with pytest.raises(TypeError, match=name):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), **{name: value})


def test_model_and_loss_fn_of_the_wrong_type_raise_type_error():
    with pytest.raises(TypeError, match="model"):
        ngopt.FisherDescent("a network", nn.MSELoss())
    with pytest.raises(TypeError, match="loss_fn"):
        ngopt.FisherDescent(small_mlp(), 3)


@pytest.mark.parametrize("key,value", [("lr", -1.0), ("momentum", 2.0), ("damping", 0.0),
                                       ("fallback", "lion"), ("max_step_kl", "big")])
def test_per_group_settings_are_checked(key, value):
    model = small_mlp()
    groups = [{"params": list(model[0].parameters())},
              {"params": list(model[2].parameters()) + list(model[3].parameters()), key: value}]
    with pytest.raises((ValueError, TypeError), match=key):
        ngopt.FisherDescent(model, nn.MSELoss(), param_groups=groups)


def test_weight_and_bias_in_different_groups_is_refused():
    # Blocks are built when the first training forward shows which bias goes with which weight.
    model = small_mlp()
    groups = [{"params": [model[0].weight]},
              {"params": [model[0].bias] + list(model[2].parameters()) + list(model[3].parameters())}]
    opt = ngopt.FisherDescent(model, nn.MSELoss(), param_groups=groups)
    with pytest.raises(ValueError, match="param_groups: 0: its weight and bias must be in the same group"):
        opt.assign_curvature(torch.randn(2, model[0].in_features, dtype=DTYPE))


def _two_groups(model):
    """The first layer in one group; the PReLU (a fallback layer) and the head in another, with own settings."""
    return ([{"params": list(model[0].parameters())},
             {"params": list(model[2].parameters()) + list(model[3].parameters()), "lr": 0.05,
              "fallback": "adam", "damping": 3e-2}])


def test_a_group_added_before_the_first_step_trains_as_if_given_to_the_constructor():
    batches = class_batches(6)
    given, added = small_mlp(), small_mlp()
    settings = dict(fisher="sampled", seed=3, stats_interval=2, inverse_interval=2, damping_interval=2)
    given_opt = ngopt.FisherDescent(given, nn.CrossEntropyLoss(), param_groups=_two_groups(given), **settings)
    first, second = _two_groups(added)
    added_opt = ngopt.FisherDescent(added, nn.CrossEntropyLoss(), param_groups=[first], **settings)
    added_opt.add_param_group(second)
    assert added_opt.param_groups[1]["fallback_lr_scale"] == given_opt.param_groups[1]["fallback_lr_scale"] == 1e-2
    for batch in batches:
        train_step(given, given_opt, nn.CrossEntropyLoss(), batch)
        train_step(added, added_opt, nn.CrossEntropyLoss(), batch)
    assert added_opt.curvature_assignment() == given_opt.curvature_assignment()
    # One process, the same operations in the same order: only float64 rounding could separate them.
    for a, b, start in zip(added.parameters(), given.parameters(), small_mlp().parameters()):
        assert (b - start).abs().max() > 1e-4  # every parameter moved
        torch.testing.assert_close(a, b, rtol=1e-12, atol=1e-14)


def test_a_group_added_after_training_started_gets_its_blocks_at_the_next_step():
    model = small_mlp()
    opt = quiet_optimizer(model, nn.MSELoss(), param_groups=[{"params": list(model[0].parameters())}],
                          stats_interval=10, interval_warmup=0)  # step 1 is then off the schedule
    batches = regression_batches(3)
    train_step(model, opt, nn.MSELoss(), batches[0])
    assert list(opt.blocks) == ["0"]
    opt.add_param_group({"params": list(model[2].parameters()) + list(model[3].parameters()), "lr": 0.1})
    before = model[3].weight.detach().clone()
    train_step(model, opt, nn.MSELoss(), batches[1])  # step 1: off the statistics schedule
    assert opt.curvature_assignment()["3.weight"].block == "3"
    assert opt.blocks["3"].has_statistics and opt.blocks["3"].has_inverse
    assert (model[3].weight - before).abs().max() > 0
    assert not opt.statistics_due()  # the extra refresh was a one-off: step 2 keeps the schedule


@pytest.mark.parametrize("key,value,error", [("lr", -1.0, ValueError), ("damping", 0.0, ValueError),
                                             ("fallback", "lion", ValueError), ("momentum", "high", TypeError),
                                             ("fallback_lr_scale", -2.0, ValueError)])
def test_add_param_group_checks_the_settings_before_adding(key, value, error):
    model = small_mlp()
    opt = ngopt.FisherDescent(model, nn.MSELoss(), param_groups=[{"params": list(model[0].parameters())}])
    rest = list(model[2].parameters()) + list(model[3].parameters())
    with pytest.raises(error, match=key):
        opt.add_param_group({"params": rest, key: value})
    assert len(opt.param_groups) == 1  # nothing half-added: the same parameters can still be added
    opt.add_param_group({"params": rest})
    train_step(model, opt, nn.MSELoss(), regression_batches(1)[0])


def test_add_param_group_refuses_parameters_already_in_the_optimizer():
    model = small_mlp()
    opt = ngopt.FisherDescent(model, nn.MSELoss())
    with pytest.raises(ValueError, match="more than one parameter group"):
        opt.add_param_group({"params": [model[3].weight]})
    with pytest.raises(TypeError, match="'params'"):
        opt.add_param_group({"lr": 0.1})
    assert len(opt.param_groups) == 1


def test_param_groups_of_the_wrong_type_name_the_argument():
    with pytest.raises(TypeError, match="param_groups"):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), param_groups=5)


def test_model_without_parameters_names_the_argument():
    with pytest.raises(ValueError, match="model"):
        ngopt.FisherDescent(nn.Tanh(), nn.MSELoss())


def test_seed_out_of_range_is_refused_at_construction():
    with pytest.raises(ValueError, match="seed"):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), seed=2 ** 70)


@pytest.mark.parametrize("argument,table", [("step_rule", "ngopt.rules.STEP_RULES"),
                                             ("damping_rule", "ngopt.rules.DAMPING_RULES"),
                                             ("structure", "ngopt.blocks.factory.STRUCTURES"),
                                             ("inverse_schedule", "ngopt.inversion_schedule.INVERSION_SCHEDULES")])
def test_the_choices_checked_are_those_of_the_implementation_tables(argument, table, monkeypatch):
    from ngopt.validation import check_arguments

    module, _, name = table.rpartition(".")
    implementations = getattr(importlib.import_module(module), name)
    for value in implementations:
        check_arguments(**{argument: value})
    with pytest.raises(ValueError, match=argument):
        check_arguments(**{argument: "newcomer"})
    monkeypatch.setitem(implementations, "newcomer", object)  # registered once, in its table
    check_arguments(**{argument: "newcomer"})


def test_weight_sharing_choice_is_checked():
    with pytest.raises(ValueError, match="weight_sharing must be one of"):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), weight_sharing="average")


@pytest.mark.parametrize("fisher", ["sampled", "exact"])
def test_model_based_fisher_without_any_loss_call_is_refused_at_the_step(fisher):
    # loss_fn is optional: the loss call is found where it is made.  A loss with no closed form
    # and no loss_fn to fall back on is a clear error at the first step, with nothing changed.
    model = small_mlp()
    opt = ngopt.FisherDescent(model, None, fisher=fisher)
    x = torch.randn(8, model[0].in_features, dtype=DTYPE)
    before = [p.detach().clone() for p in model.parameters()]
    model(x).abs().mean().backward()
    with pytest.raises(RuntimeError, match="found no loss call"):
        opt.step()
    assert all(torch.equal(p, q) for p, q in zip(model.parameters(), before))


UNSUPPORTED_CRITERIA = [
    nn.L1Loss(),
    nn.CrossEntropyLoss(weight=torch.ones(3)),
    nn.BCEWithLogitsLoss(pos_weight=torch.ones(3)),
    nn.HuberLoss(),
]


@pytest.mark.parametrize("fisher", ["sampled", "exact"])
@pytest.mark.parametrize("criterion", UNSUPPORTED_CRITERIA, ids=lambda c: repr(c))
def test_unsupported_criterion_is_refused_clearly(fisher, criterion):
    with pytest.raises(ValueError, match="loss_fn"):
        ngopt.FisherDescent(small_mlp(), criterion, fisher=fisher)


def test_unsupported_criterion_is_fine_with_the_empirical_fisher():
    model = small_mlp()
    with pytest.warns(UserWarning, match="empirical"):
        opt = ngopt.FisherDescent(model, nn.L1Loss(), fisher="empirical", step_rule="fixed")
    opt.assign_curvature(torch.randn(2, model[0].in_features, dtype=DTYPE))
    assert len(opt.blocks) == 2
    # The quadratic rule needs the criterion's closed-form output Hessian: a clear error instead.
    with pytest.raises(ValueError, match="loss_fn: .*L1Loss"):
        ngopt.FisherDescent(small_mlp(), nn.L1Loss(), fisher="empirical", step_rule="quadratic")


# ---------------------------------------------------------------------------- warnings and repr
def test_empirical_fisher_warns_at_construction():
    # Kunstner, Balles & Hennig (NeurIPS 2019): the empirical Fisher is not the curvature.
    with pytest.warns(UserWarning, match="empirical"):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), fisher="empirical")


def test_tiny_damping_warns_and_usual_damping_does_not():
    with pytest.warns(UserWarning, match="damping"):
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), damping=1e-7)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ngopt.FisherDescent(small_mlp(), nn.MSELoss(), damping=1e-3)


def test_repr_lists_every_layer_with_its_block_kind():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(1, 2, 3), nn.ReLU(), nn.Flatten(), nn.Linear(8, 4), nn.LayerNorm(4),
                          nn.Linear(4, 2), nn.PReLU(2))
    for structure in ("kfac", "ekfac", "diag"):
        opt = ngopt.FisherDescent(model, nn.MSELoss(), structure=structure)
        assert "assigned at the first training forward" in repr(opt)
        opt.assign_curvature(torch.randn(2, 1, 4, 4))
        text = repr(opt)
        opt.remove_hooks()
        lines = text.splitlines()
        expected = {"0": "conv2d", "3": "linear", "4": "layer_norm", "5": "linear"}
        for name, kind in expected.items():
            matching = [line for line in lines if line.strip().startswith(f"{name}:")]
            assert len(matching) == 1, text
            assert kind in matching[0], matching[0]
            if kind != "layer_norm":  # norm layers keep their own exact per-channel block
                assert structure in matching[0], matching[0]
        # PReLU's slopes: 1 tensor of 2 numbers goes to the fallback rule, and the line says why.
        assert any("fallback" in line and "1 tensors" in line and "2 parameters" in line for line in lines), text
        assert "6.weight (2): applied by prelu, which has no curvature block" in text


# ---------------------------------------------------------------------------- param_groups and schedulers
def test_param_groups_carry_the_hyperparameters():
    opt = ngopt.FisherDescent(small_mlp(), nn.MSELoss(), lr=0.2, momentum=0.3, weight_decay=1e-4,
                              damping=5e-2)
    assert isinstance(opt, torch.optim.Optimizer)
    group = opt.param_groups[0]
    assert (group["lr"], group["momentum"], group["weight_decay"], group["damping"]) == (0.2, 0.3, 1e-4, 5e-2)


SCHEDULERS = {
    # lr after one scheduler.step(): StepLR multiplies by gamma, LambdaLR sets base_lr * lambda(1)
    # (torch.optim.lr_scheduler documentation).
    "StepLR": (lambda opt: torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.5), 0.2),
    "LambdaLR": (lambda opt: torch.optim.lr_scheduler.LambdaLR(opt, lambda epoch: 0.25 if epoch else 1.0), 0.1),
}


def _controlled_optimizer(model, lr):
    # momentum 0 and no trust bound: the change of every weight is exactly -lr * direction.
    return quiet_optimizer(model, nn.MSELoss(), lr=lr, momentum=0.0, max_step_kl=None, fisher="exact",
                           stats_interval=1, inverse_interval=1, fallback_lr_scale=0.5)


@pytest.mark.parametrize("name", SCHEDULERS)
def test_scheduler_sets_the_lr_that_the_step_uses(name):
    make_scheduler, lr_after = SCHEDULERS[name]
    batches = regression_batches(2)
    model = small_mlp()
    opt = _controlled_optimizer(model, lr=0.4)
    scheduler = make_scheduler(opt)
    train_step(model, opt, nn.MSELoss(), batches[0])
    scheduler.step()
    assert opt.param_groups[0]["lr"] == pytest.approx(lr_after, rel=1e-15)

    # The same second step from the same point with lr = 1 gives the unit direction.
    buffer = io.BytesIO()
    torch.save({"model": model.state_dict(), "opt": opt.state_dict()}, buffer)
    before = weights(model)
    train_step(model, opt, nn.MSELoss(), batches[1])
    scheduled_change = [after - b for after, b in zip(weights(model), before)]

    buffer.seek(0)
    saved = torch.load(buffer, weights_only=True)
    unit_model = small_mlp(seed=5)
    unit_model.load_state_dict(saved["model"])
    unit_opt = _controlled_optimizer(unit_model, lr=0.4)
    unit_opt.load_state_dict(saved["opt"])
    unit_opt.param_groups[0]["lr"] = 1.0
    train_step(unit_model, unit_opt, nn.MSELoss(), batches[1])
    unit_change = [after - b for after, b in zip(weights(unit_model), before)]

    for change, unit in zip(scheduled_change, unit_change):
        assert unit.abs().max() > 1e-6
        torch.testing.assert_close(change, lr_after * unit, rtol=1e-9, atol=1e-15)


def test_damping_in_param_groups_takes_effect_for_the_diagonal_block():
    # Diagonal block: delta = grad / (F_diag + damping) (ngopt/blocks/diagonal.py docstring).
    model = small_mlp()
    opt = quiet_optimizer(model, nn.MSELoss(), lr=1.0, momentum=0.0, max_step_kl=None, fisher="exact",
                          structure="diag", stats_interval=1, inverse_interval=1, stats_memory=0.0)
    batches = regression_batches(2)
    train_step(model, opt, nn.MSELoss(), batches[0])
    opt.param_groups[0]["damping"] = 0.5
    layer = model[3]
    before_w, before_b = layer.weight.detach().clone(), layer.bias.detach().clone()
    train_step(model, opt, nn.MSELoss(), batches[1])
    fisher = opt.state[layer.weight]["fisher_diagonal"]
    grad = torch.cat([layer.weight.grad, layer.bias.grad[:, None]], dim=1)
    expected = torch.cat([before_w, before_b[:, None]], dim=1) - grad / (fisher + 0.5)
    torch.testing.assert_close(torch.cat([layer.weight, layer.bias[:, None]], dim=1).detach(), expected,
                               rtol=1e-12, atol=1e-14)


def test_damping_in_param_groups_enters_the_next_kronecker_inversion():
    # Factored damping (Martens & Grosse 2015, sec. 6.3): inverse_in = (A + pi sqrt(lambda) I)^-1,
    # pi = sqrt((tr A / dim A) / (tr G / dim G)).
    model = small_mlp()
    opt = quiet_optimizer(model, nn.MSELoss(), fisher="exact", stats_interval=1, inverse_interval=1)
    batches = regression_batches(2)
    train_step(model, opt, nn.MSELoss(), batches[0])
    opt.param_groups[0]["damping"] = 0.3
    train_step(model, opt, nn.MSELoss(), batches[1])
    state = opt.state[model[0].weight]
    factor_in, factor_out = state["factor_in"], state["factor_out"]
    pi = math.sqrt((factor_in.trace() / factor_in.shape[0]) / (factor_out.trace() / factor_out.shape[0]))
    expected = torch.linalg.inv(factor_in + pi * math.sqrt(0.3) * torch.eye(factor_in.shape[0], dtype=DTYPE))
    torch.testing.assert_close(state["inverse_in"], expected, rtol=1e-9, atol=1e-12)


# ---------------------------------------------------------------------------- checkpoints
CHECKPOINT_CASES = {
    "kfac-sampled-momentum-sgd": dict(fisher="sampled", structure="kfac", momentum=0.5, fallback="sgd"),
    "diag-sampled-momentum-sgd": dict(fisher="sampled", structure="diag", momentum=0.9, fallback="sgd"),
    "kfac-sampled-adam": dict(fisher="sampled", structure="kfac", momentum=0.5, fallback="adam",
                              weight_decay=1e-3),
    "kfac-exact-adam": dict(fisher="exact", structure="kfac", momentum=0.5, fallback="adam"),
    "diag-empirical-adam": dict(fisher="empirical", structure="diag", momentum=0.5, fallback="adam"),
    "kfac-sampled-lm-damping": dict(fisher="sampled", structure="kfac", momentum=0.5, damping_rule="lm",
                                       damping_interval=2),
}
TOTAL_STEPS, RESUME_AT = 8, 4


def _checkpoint_run(case, batches, start_model=None, start_opt=None, steps=range(TOTAL_STEPS)):
    settings = dict(lr=0.1, stats_interval=2, inverse_interval=3, stats_memory=0.5, seed=123, **CHECKPOINT_CASES[case])
    model = small_mlp(seed=0)
    loss_fn = nn.CrossEntropyLoss()
    opt = quiet_optimizer(model, loss_fn, **settings)
    if start_model is not None:
        model = small_mlp(seed=42)  # a fresh model with other weights, then the checkpoint loaded into it
        opt = quiet_optimizer(model, loss_fn, **settings)
        model.load_state_dict(start_model)
        opt.load_state_dict(start_opt)
    for index in steps:
        x, y = batches[index]

        def closure():
            opt.zero_grad()
            loss = loss_fn(model(x), y)
            loss.backward()
            return loss

        opt.step(closure)
        torch.randn(3)  # other users of the global RNG must not disturb the optimizer's draws
    return model, opt


@pytest.mark.parametrize("case", CHECKPOINT_CASES)
def test_resumed_run_matches_the_uninterrupted_run_bit_for_bit(case):
    batches = class_batches(TOTAL_STEPS)
    torch.manual_seed(7)
    straight_model, straight_opt = _checkpoint_run(case, batches)

    torch.manual_seed(7)
    first_model, first_opt = _checkpoint_run(case, batches, steps=range(RESUME_AT))
    buffer = io.BytesIO()
    torch.save({"model": first_model.state_dict(), "opt": first_opt.state_dict()}, buffer)
    buffer.seek(0)
    saved = torch.load(buffer, weights_only=True)
    del first_model, first_opt
    torch.manual_seed(99)  # the resumed process starts with another global RNG state
    resumed_model, resumed_opt = _checkpoint_run(case, batches, start_model=saved["model"],
                                                 start_opt=saved["opt"], steps=range(RESUME_AT, TOTAL_STEPS))

    for p, q in zip(straight_model.parameters(), resumed_model.parameters()):
        assert torch.equal(p, q)
    straight_state, resumed_state = straight_opt.state_dict(), resumed_opt.state_dict()
    assert straight_state["param_groups"] == resumed_state["param_groups"]
    for index, entries in straight_state["state"].items():
        assert entries.keys() == resumed_state["state"][index].keys()
        for key, value in entries.items():
            other = resumed_state["state"][index][key]
            assert torch.equal(value, other) if torch.is_tensor(value) else value == other, key
    assert straight_opt.diagnostics()["step"] == resumed_opt.diagnostics()["step"] == TOTAL_STEPS


def test_checkpoint_restores_the_private_generator():
    # Without the generator state a resumed sampled-Fisher run would redraw the first targets again.
    batches = class_batches(TOTAL_STEPS)
    _, opt = _checkpoint_run("kfac-sampled-momentum-sgd", batches, steps=range(RESUME_AT))
    state = opt.state_dict()
    fresh = quiet_optimizer(small_mlp(), nn.CrossEntropyLoss(), seed=123)
    fresh.load_state_dict(state)
    assert torch.equal(fresh._generator_for(torch.device("cpu")).get_state(),
                       opt._generator_for(torch.device("cpu")).get_state())


def test_step_with_closure_returns_the_closure_loss():
    model = small_mlp()
    opt = quiet_optimizer(model, nn.MSELoss())
    x, y = regression_batches(1)[0]
    returned = []

    def closure():
        opt.zero_grad()
        loss = nn.MSELoss()(model(x), y)
        loss.backward()
        returned.append(loss)
        return loss

    assert opt.step(closure) is returned[0]
    assert opt.step() is None


def test_lm_damping_needs_no_closure():
    # API behaviour 12: the reduction ratio comes from the recorded batch; the damping moves by
    # the Levenberg-Marquardt factor (19/20)^T or its inverse (Martens & Grosse 2015, sec. 6.5).
    model, loss_fn = small_mlp(), nn.MSELoss()
    opt = quiet_optimizer(model, loss_fn, damping_rule="lm", damping_interval=1, fisher="exact")
    x, y = regression_batches(1)[0]
    opt.zero_grad()
    loss_fn(model(x), y).backward()
    opt.step()
    rho = opt.diagnostics()["update"]["reduction_ratio"]
    damping = opt.param_groups[0]["damping"]
    assert rho is not None
    expected = 1e-2 * (19 / 20 if rho > 0.75 else 20 / 19 if rho < 0.25 else 1.0)
    assert damping == pytest.approx(expected, rel=1e-12)


def test_a_second_optimizer_on_the_same_model_is_warned_about():
    # Two sets of capture hooks on one model: the second one misses its output gradients (measured),
    # so its curvature would silently go stale; after remove_hooks() a new optimizer is fine.
    model = small_mlp()
    first = ngopt.FisherDescent(model, nn.MSELoss())
    with pytest.warns(UserWarning, match="already carries the capture hooks"):
        second = ngopt.FisherDescent(model, nn.MSELoss())
    second.remove_hooks()
    first.remove_hooks()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ngopt.FisherDescent(model, nn.MSELoss())


def test_sparse_gradients_are_refused_at_construction():
    # Sparse gradients would reach dense-only finiteness checks and update rules at the first step.
    model = nn.Sequential(nn.EmbeddingBag(10, 4, sparse=True), nn.Linear(4, 2))
    with pytest.raises(ValueError, match="sparse=True"):
        ngopt.FisherDescent(model, nn.MSELoss())
    model[0].weight.requires_grad_(False)
    ngopt.FisherDescent(model, nn.MSELoss())
