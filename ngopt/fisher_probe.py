"""How good is the curvature approximation? Compare it with the exact per-layer Fisher.

    result = probe_fisher_quality(opt, model, loss_fn, inputs, targets)
    handle.log_probe(result)          # optional: into the diagnostics log

For every curvature block with at most ``max_params`` parameters, on one probe
batch (x_n, y_n), n = 1..N, at the current weights, three matrices are built:

* ``F``, the exact per-layer Fisher of the loss L = c sum_n l_n as the user
  defined it (c = 1/#terms for ``reduction='mean'``, 1 for ``'sum'``)

      F = c sum_n J_n^T H_n J_n,

  J_n the Jacobian of the model output f_n in the layer's parameters
  (``torch.func.jacrev``), H_n the Hessian of the per-term loss in f_n
  (``torch.func.hessian``), which for these criteria is the output Fisher
  E_{y~p(y|f_n)}[grad l grad l^T]: softmax cross-entropy diag(p) - p p^T,
  squared error 2 I, sigmoid binary cross-entropy diag(s (1 - s));
* ``C``, the optimizer's block as it stands (``block.dense_curvature()``: A (x) G
  for K-FAC, the diagonal for ``structure='diag'``), built from its *running*
  statistics: an average over earlier training batches (``stats_memory``),
  refreshed every ``stats_interval`` steps, with output gradients from the
  optimizer's Fisher source (one Monte Carlo draw per example by default);
* ``C_fresh``, the same structure built from the probe batch alone, with the
  exact expectation over the model's predictive distribution: what the block
  would hold with ``fisher='exact'``, ``stats_memory=0`` and a refresh now.

All matrices are compared undamped.  Per layer the result holds

==========================  ====================================================
``block_error``             ||C - F|| / ||F|| (Frobenius): the optimizer's block
                            against the current Fisher, everything included
``fresh_error``             ||C_fresh - F|| / ||F||: the structure's own error
                            (the Kronecker or diagonal form), no lag, no noise
``statistics_gap``          ||C - C_fresh|| / ||C_fresh||: how far the running
                            statistics are from this batch's (lag of the
                            average, Monte Carlo noise, a different batch)
``block_trace``,            traces of C, C_fresh and F: a lagging average of a
``fresh_trace``,            shrinking Fisher shows as block_trace >> exact_trace
``exact_trace``
``block_angle_deg``         angle between the damped directions (C + lambda I)^-1 g
                            and (F + lambda I)^-1 g, g the layer gradient on the
                            probe batch (the same lambda on both sides)
``fresh_angle_deg``         the same for C_fresh
``step_angle_deg``          the direction the optimizer takes, with its own
                            damping (factored for K-FAC), against the exact one
``diag_error``,             the diagonal of F itself as the approximation
``diag_angle_deg``
``exact_eig_max``,          largest eigenvalue of F and the share of its
``exact_below_damping``     eigenvalues under lambda; near 1, every damped
                            direction is close to g / lambda and small angles
                            say little about the approximation
``empirical_vs_sampled_*``  the empirical Fisher (1/c) sum_n J_n^T u_n u_n^T J_n,
                            u_n = dL_n/df_n with the observed targets, against
                            the sampled one (targets drawn from the model,
                            ``samples`` draws per example): error and angle
==========================  ====================================================

A relative error of 1 is what the zero matrix scores: a block with a tiny
trace (say, a sampled Fisher whose single draws all fell on the predicted
class of a confident model) scores about 1 whatever its shape; a block ten
times too large scores about 9.

Warnings (``warnings.warn``): when ``block_error`` exceeds ``warn_error``, the
probe says which part is off: the statistics (``statistics_gap`` above
``warn_error`` or a trace off by more than ten times; the remedies are a
smaller ``stats_memory`` or ``stats_interval``, or more Monte Carlo draws),
the structure (``fresh_error`` above ``warn_error``), or both; and when the
empirical Fisher turns the damped direction further than ``warn_angle_deg``
from the sampled one (Kunstner, Balles & Hennig 2019 on why the empirical
Fisher can point the step elsewhere).

The probe runs the model in ``eval()`` mode (restored afterwards) so that the
optimizer's capture hooks record nothing; with dropout or batch norm that is a
slightly different function from the training one (batch norm then uses its
running statistics, and ``statistics_gap`` holds that difference too).
"""
from __future__ import annotations

import contextlib
import math
import warnings
from typing import Optional

import torch
from torch import nn
from torch.func import functional_call, hessian, jacrev, vmap

from .likelihoods import criterion_arguments, likelihood_from_arguments
from .sampling import categorical_draws
from .step_pipeline import PendingStep, add_projected_statistics, new_inverses, new_statistics
from .uses.recorder import record_uses

__all__ = ["probe_fisher_quality", "exact_layer_fisher", "fresh_blocks", "far_from_fisher",
           "relative_frobenius_error", "direction_angle_deg"]

SUPPORTED_LOSSES = (nn.MSELoss, nn.CrossEntropyLoss, nn.BCEWithLogitsLoss)
# Statistics whose trace is off from the current Fisher's by more than this factor are called far off.
TRACE_RATIO_WARNING = 10.0
# Share of the exact Fisher's eigenvalues under lambda from which damping is said to dominate it.
DAMPING_DOMINATES_SHARE = 0.9


# --------------------------------------------------------------------------
# small measures
# --------------------------------------------------------------------------

def relative_frobenius_error(approx: torch.Tensor, exact: torch.Tensor) -> float:
    """||approx - exact||_F / ||exact||_F (inf when exact is zero and approx is not)."""
    reference = float(torch.linalg.matrix_norm(exact))
    difference = float(torch.linalg.matrix_norm(approx - exact))
    if reference == 0.0:
        return 0.0 if difference == 0.0 else math.inf
    return difference / reference


def direction_angle_deg(u: torch.Tensor, v: torch.Tensor) -> float:
    """Angle between two vectors in degrees (0 = same direction, 180 = opposite)."""
    nu, nv = float(u.norm()), float(v.norm())
    if nu == 0.0 or nv == 0.0:
        return math.nan
    cosine = float(torch.dot(u.flatten(), v.flatten())) / (nu * nv)
    return math.degrees(math.acos(max(-1.0, min(1.0, cosine))))


def damped_direction(curvature: torch.Tensor, grad: torch.Tensor, damping: float) -> torch.Tensor:
    """(curvature + damping I)^-1 grad."""
    eye = torch.eye(curvature.shape[0], dtype=curvature.dtype, device=curvature.device)
    return torch.linalg.solve(curvature + damping * eye, grad)


# --------------------------------------------------------------------------
# the loss: reduction scale, per-term Hessian, sampled targets
# --------------------------------------------------------------------------

def _check_loss(loss_fn) -> None:
    if type(loss_fn) not in SUPPORTED_LOSSES:
        names = ", ".join(f"nn.{cls.__name__}" for cls in SUPPORTED_LOSSES)
        raise ValueError(f"loss_fn must be one of {names} (their Hessian is their Fisher); "
                         f"got {type(loss_fn).__name__}")
    if loss_fn.reduction not in ("mean", "sum"):
        raise ValueError(f"loss_fn.reduction must be 'mean' or 'sum', got {loss_fn.reduction!r}")
    if getattr(loss_fn, "weight", None) is not None or getattr(loss_fn, "pos_weight", None) is not None \
            or getattr(loss_fn, "label_smoothing", 0.0):
        raise ValueError("loss_fn: class weights, pos_weight and label_smoothing are not supported by the probe")


def _per_example_scale(loss_fn, outputs: torch.Tensor) -> float:
    """Factor s with L = s * sum_n loss_fn(f_n[None], y_n[None]): 1/N for 'mean', 1 for 'sum'."""
    return 1.0 / outputs.shape[0] if loss_fn.reduction == "mean" else 1.0


def _reduction_scale(loss_fn, outputs: torch.Tensor) -> float:
    """c in L = c sum over terms: a term is an example for cross-entropy, an element otherwise."""
    if loss_fn.reduction == "sum":
        return 1.0
    terms = outputs.shape[0] if isinstance(loss_fn, nn.CrossEntropyLoss) else outputs.numel()
    return 1.0 / terms


def _sample_targets(loss_fn, outputs: torch.Tensor, generator: torch.Generator) -> torch.Tensor:
    """Targets drawn from the model's predictive distribution p(y | f)."""
    if isinstance(loss_fn, nn.CrossEntropyLoss):
        return categorical_draws(torch.softmax(outputs, dim=1), 1, generator).squeeze(1)
    if isinstance(loss_fn, nn.BCEWithLogitsLoss):
        uniform = torch.rand(outputs.shape, generator=generator, dtype=outputs.dtype)
        return (uniform < torch.sigmoid(outputs)).to(outputs.dtype)
    # squared error (y - f)^2 is the negative log-likelihood of N(f, 1/2) up to a constant
    noise = torch.randn(outputs.shape, generator=generator, dtype=outputs.dtype)
    return outputs + noise / math.sqrt(2.0)


# --------------------------------------------------------------------------
# per-layer Jacobians and Fisher matrices
# --------------------------------------------------------------------------

def _layer_of(model: nn.Module, module: nn.Module, inputs: torch.Tensor):
    """The layer adapter the optimizer would build for ``module``'s weight, from one forward on ``inputs``."""
    weight = getattr(module, "weight", None)
    if not isinstance(weight, nn.Parameter):
        return None
    trainable = [p for p in module.parameters(recurse=False) if p.requires_grad]
    _, calls, _ = record_uses(model, (inputs,), {}, trainable, examples=int(inputs.shape[0]))
    for use, _ in calls:
        if use.weight is weight:
            return use.make_layer(type(module).__name__)
    return None


def _layer_parameters(module: nn.Module, layer=None) -> dict:
    if layer is not None:
        return {"weight": layer.weight, **({"bias": layer.bias} if layer.has_bias else {})}
    names = {"weight": module.weight}
    if getattr(module, "bias", None) is not None and module.bias.requires_grad:
        names["bias"] = module.bias
    return names


def _block_order(jacobian: dict, weight_shape, layer=None) -> torch.Tensor:
    """[N, D, *param] Jacobians -> [N, D, P] in the blocks' ordering.

    The blocks flatten their layer adapter's gradient matrix column-major
    (``matrix.T.reshape(-1)``): for dense and convolution layers ``[d_out, d_in]``
    with the bias column last, for embeddings ``W^T`` ``[d, V]``, for norm layers
    ``[C, (gamma, beta)]``.  Without an adapter: the weight as ``[shape[0], -1]``, bias last.
    """
    weight = jacobian["weight"]
    n, d = weight.shape[:2]
    if layer is None:
        matrix = weight.reshape(n, d, weight_shape[0], -1)
        if "bias" in jacobian:
            matrix = torch.cat([matrix, jacobian["bias"].unsqueeze(-1)], dim=-1)
        return matrix.transpose(-1, -2).reshape(n, d, -1)
    flat = [weight.reshape((n * d,) + weight.shape[2:])]
    if "bias" in jacobian:
        flat.append(jacobian["bias"].reshape((n * d,) + jacobian["bias"].shape[2:]))
        matrices = vmap(layer.gradient_matrix)(*flat)
    else:
        matrices = vmap(lambda w: layer.gradient_matrix(w, None))(*flat)
    return matrices.transpose(-1, -2).reshape(n, d, -1)


def layer_jacobian(model: nn.Module, module: Optional[nn.Module], inputs: torch.Tensor, layer=None) -> tuple:
    """(outputs [N, D], Jacobian [N, D, P]) of the model outputs in one layer's parameters.

    ``layer``: the block's layer adapter (default: the one the optimizer would build for ``module``).
    """
    if layer is None:
        layer = _layer_of(model, module, inputs)
    members = _layer_parameters(module, layer)
    names = {p: n for n, p in model.named_parameters()}
    own = {names[p]: p.detach() for p in members.values()}
    roles = {names[p]: role for role, p in members.items()}

    def forward(layer_params):
        return functional_call(model, layer_params, (inputs,), strict=False)

    outputs = forward(own).detach()
    if outputs.dim() != 2:
        raise ValueError(f"the probe needs model outputs shaped [batch, features]; got {tuple(outputs.shape)}")
    jac = jacrev(forward)(own)
    jac = {roles[key]: value for key, value in jac.items()}
    # the other layers' parameters still require grad; nothing here is meant to be differentiated
    return outputs, _block_order(jac, members["weight"].shape, layer).detach().to(torch.float64)


def output_hessians(loss_fn, outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """[N, D, D]: Hessian of loss_fn on one example (a batch of one) in its output."""
    def one(f, y):
        return loss_fn(f.unsqueeze(0), y.unsqueeze(0))

    return vmap(hessian(one))(outputs, targets).to(torch.float64)


def output_gradients(loss_fn, outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """[N, D]: u_n = dL/df_n of the batch loss."""
    f = outputs.detach().clone().requires_grad_(True)
    (grad,) = torch.autograd.grad(loss_fn(f, targets), f)
    return grad.to(torch.float64)


@contextlib.contextmanager
def evaluation_mode(model: nn.Module):
    """The whole model in ``eval()`` mode, each module's own mode restored afterwards.

    The optimizer's capture hooks record only training-mode forwards, so the
    probe's passes neither reach its statistics nor trigger its extra backward.
    """
    was_training = {m: m.training for m in model.modules()}
    model.eval()
    try:
        yield
    finally:
        for module, mode in was_training.items():
            module.train(mode)


def exact_layer_fisher(model: nn.Module, module: nn.Module, loss_fn, inputs: torch.Tensor,
                       targets: torch.Tensor) -> torch.Tensor:
    """The exact Fisher block F = c sum_n J_n^T H_n J_n of one layer, in the blocks' ordering.

    The model runs in ``eval()`` mode (restored afterwards), as in the probe.
    """
    _check_loss(loss_fn)
    with evaluation_mode(model):
        outputs, jac = layer_jacobian(model, module, inputs)
    return _exact_from(loss_fn, outputs, targets, jac)


def _exact_from(loss_fn, outputs, targets, jac) -> torch.Tensor:
    hess = output_hessians(loss_fn, outputs, targets) * _per_example_scale(loss_fn, outputs)
    return torch.einsum("ndp,nde,neq->pq", jac, hess, jac)


def _outer_fisher(loss_fn, outputs, jac, grads) -> torch.Tensor:
    """(1/c) sum_n (J_n^T u_n)(J_n^T u_n)^T for output gradients u_n of the batch loss."""
    per_example = torch.einsum("ndp,nd->np", jac, grads)
    return per_example.T @ per_example / _reduction_scale(loss_fn, outputs)


# --------------------------------------------------------------------------
# the same structure, from the probe batch alone
# --------------------------------------------------------------------------

def fresh_blocks(blocks: dict, model: nn.Module, loss_fn, inputs: torch.Tensor, damping: dict,
                 use_keys=None) -> dict:
    """``{name: block}``: new blocks of the same kinds holding the probe batch's statistics only.

    The output gradients are the columns of the output Fisher's square root
    (``fisher='exact'``), so each block holds the exact expectation over the
    model's predictive distribution, with no running average and no Monte Carlo
    noise; ``damping`` {name: lambda} is needed only for blocks whose statistics
    live in an eigenbasis (EKFAC); ``use_keys(block)`` the uses a tied block was built for
    (``FisherDescent.use_keys_of``).  The caller puts the model in ``eval()`` mode.
    """
    function, args, kwargs = criterion_arguments(loss_fn, None, None)
    likelihood, _, _ = likelihood_from_arguments(function, args, kwargs)
    by_weight = {block.layer.weight: name for name, block in blocks.items()}
    params = [p for block in blocks.values() for p in block.layer.params()]
    output, calls, _ = record_uses(model, (inputs,), {}, params, examples=int(inputs.shape[0]))
    calls = [(use, edge) for use, edge in calls if use.weight in by_weight]
    columns = likelihood.exact_output_grad_columns(output.detach())
    # Unit-scale columns: G = c sum g g^T with the reduction's c (likelihoods.LossCall.fisher_vectors).
    scale = _reduction_scale(loss_fn, output)
    per_column = [torch.autograd.grad(output, [edge for _, edge in calls], grad_outputs=column, retain_graph=True,
                                      allow_unused=True) for column in columns]
    fresh = {name: block.fresh_copy() for name, block in blocks.items()}
    keys = use_keys or (lambda block: [])
    for position, (use, _) in enumerate(calls):
        name = by_weight[use.weight]
        grads = [column_grads[position] for column_grads in per_column]
        if any(g is None for g in grads):
            continue  # this call does not reach the output
        known = keys(blocks[name])
        term = known.index(use.key) if use.key in known else 0
        rows = use.output_rows(torch.stack(grads).detach())
        fresh[name].add_capture(use.input_rows, rows, scale * use.weight_scale, 0, term=term)
    # The blocks' own first refresh, on this batch alone (an EKFAC block inverts to find its basis).
    blocks = list(fresh.values())
    forwards = {block: 1 for block in blocks}
    try:
        statistics = new_statistics(blocks, forwards, stats_memory=0.0)
        if statistics is None:
            raise ValueError("the probe batch gives non-finite curvature statistics")
        names = {block: name for name, block in fresh.items()}
        inverses = new_inverses([(b, statistics[b], damping[names[b]]) for b in blocks
                                 if b.projected_keys and b in statistics])
        if inverses is None or not add_projected_statistics(blocks, statistics, inverses, forwards, 0.0):
            raise ValueError("the probe batch gives non-finite curvature statistics")
        PendingStep(statistics, inverses).write_curvature(step_index=0)
    finally:
        for block in blocks:
            block.clear_pending()
    return {name: block for name, block in fresh.items() if block in statistics}


# --------------------------------------------------------------------------
# the probe
# --------------------------------------------------------------------------

def _group_damping(opt, weight: torch.Tensor) -> float:
    for group in opt.param_groups:
        if any(p is weight for p in group["params"]):
            return float(group["damping"])
    raise ValueError("the optimizer has no param group holding this layer's weight")


def _dense(block, damping: float = 0.0) -> torch.Tensor:
    return block.dense_curvature(damping).detach().to(device="cpu", dtype=torch.float64)


def _probe_layer(opt, block, fresh, model, loss_fn, inputs, targets, generator, samples):
    damping = _group_damping(opt, block.layer.weight)
    outputs, jac = layer_jacobian(model, None, inputs, block.layer)
    exact = _exact_from(loss_fn, outputs, targets, jac)
    grad = torch.einsum("ndp,nd->p", jac, output_gradients(loss_fn, outputs, targets))
    approx = _dense(block)
    current = _dense(fresh) if fresh is not None else None
    diagonal = torch.diag(torch.diagonal(exact))
    empirical = _outer_fisher(loss_fn, outputs, jac, output_gradients(loss_fn, outputs, targets))
    sampled = sum(_outer_fisher(loss_fn, outputs, jac,
                                output_gradients(loss_fn, outputs, _sample_targets(loss_fn, outputs, generator)))
                  for _ in range(samples)) / samples
    directions = {
        "exact": damped_direction(exact, grad, damping),
        "block": damped_direction(approx, grad, damping),
        "step": torch.linalg.solve(_dense(block, damping), grad),
        "diag": damped_direction(diagonal, grad, damping),
        "empirical": damped_direction(empirical, grad, damping),
        "sampled": damped_direction(sampled, grad, damping),
    }
    eigenvalues = torch.linalg.eigvalsh(exact)
    entry = {
        "params": int(exact.shape[0]), "structure": block.structure, "damping": damping,
        "exact_trace": float(torch.trace(exact)), "block_trace": float(torch.trace(approx)),
        "exact_eig_max": float(eigenvalues[-1]),
        "exact_below_damping": float((eigenvalues < damping).double().mean()),
        "block_error": relative_frobenius_error(approx, exact),
        "block_angle_deg": direction_angle_deg(directions["block"], directions["exact"]),
        "step_angle_deg": direction_angle_deg(directions["step"], directions["exact"]),
        "diag_error": relative_frobenius_error(diagonal, exact),
        "diag_angle_deg": direction_angle_deg(directions["diag"], directions["exact"]),
        "empirical_vs_sampled_error": relative_frobenius_error(empirical, sampled),
        "empirical_vs_sampled_angle_deg": direction_angle_deg(directions["empirical"], directions["sampled"]),
        "sampled_vs_exact_angle_deg": direction_angle_deg(directions["sampled"], directions["exact"]),
    }
    if current is not None:
        entry.update({
            "fresh_trace": float(torch.trace(current)),
            "fresh_error": relative_frobenius_error(current, exact),
            "fresh_angle_deg": direction_angle_deg(damped_direction(current, grad, damping), directions["exact"]),
            "statistics_gap": relative_frobenius_error(approx, current),
        })
    return entry, directions


def _settings(opt, warn_error: float) -> dict:
    """The optimizer settings the warnings name (plain values, logged with the result)."""
    return {"fisher": getattr(opt, "fisher", None), "stats_interval": getattr(opt, "stats_interval", None),
            "stats_memory": getattr(opt, "stats_memory", None), "warn_error": warn_error}


def probe_fisher_quality(opt, model: nn.Module, loss_fn, inputs: torch.Tensor, targets: torch.Tensor, *,
                         max_params: int = 4096, samples: int = 8, seed: int = 0,
                         warn_angle_deg: float = 45.0, warn_error: float = 1.0,
                         layers: Optional[list] = None) -> dict:
    """Exact per-layer Fisher on a probe batch against the optimizer's approximation.

    Args:
        opt: an ``ngopt.FisherDescent`` whose blocks hold statistics.
        model: the model the optimizer trains.
        loss_fn: ``nn.MSELoss``, ``nn.CrossEntropyLoss`` or ``nn.BCEWithLogitsLoss``.
        inputs, targets: the probe batch (model outputs must be [batch, features]).
        max_params: layers with more parameters are skipped (F is max_params^2 floats).
        samples: targets drawn per example for the sampled Fisher.
        seed: seed of the private generator for those draws.
        warn_angle_deg: warn when the empirical Fisher turns the damped
            natural-gradient direction further than this from the sampled one.
        warn_error: warn when a block's relative error against the exact Fisher
            exceeds this (1 is the error of the zero matrix), saying whether its
            statistics or its structure are off.
        layers: names of the blocks to probe (default: all small enough).

    Returns:
        a plain dict: ``step``, ``batch_size``, ``settings`` (the optimizer's ``fisher``,
        ``stats_interval``, ``stats_memory`` and ``warn_error``), ``layers`` {name: entry},
        ``skipped_layers`` {name: reason}, ``findings`` (the warning texts), and over all
        probed layers together ``empirical_vs_sampled_angle_deg``, ``block_angle_deg``,
        ``step_angle_deg``. Entry keys are tabled in this module's docstring (errors are
        relative Frobenius errors, angles in degrees, traces in curvature units).
    """
    _check_loss(loss_fn)
    _check_probe_arguments(max_params, samples, warn_angle_deg, warn_error)
    blocks = getattr(opt, "blocks", None)
    if not isinstance(blocks, dict):
        raise TypeError(f"opt must be an ngopt.FisherDescent (with .blocks); got {type(opt).__name__}")
    if not blocks and hasattr(opt, "assign_curvature"):
        opt.assign_curvature(inputs)  # blocks come from how the model applies its parameters
        blocks = opt.blocks
    if layers is not None:
        unknown = [name for name in layers if name not in blocks]
        if unknown:
            raise ValueError(f"layers: unknown block names {unknown}; the optimizer has {list(blocks)}")
    generator = torch.Generator().manual_seed(seed)
    result = {"step": int(opt.diagnostics()["step"]), "batch_size": int(inputs.shape[0]),
              "settings": _settings(opt, warn_error), "layers": {}, "skipped_layers": {}}
    chosen = {}
    for name, block in blocks.items():
        if layers is not None and name not in layers:
            continue
        size = sum(p.numel() for p in block.layer.params())
        if size > max_params:
            result["skipped_layers"][name] = f"{size} parameters > max_params={max_params}"
        elif not block.has_statistics:
            result["skipped_layers"][name] = "no curvature statistics yet"
        else:
            chosen[name] = block
    joined = {"exact": [], "block": [], "step": [], "empirical": [], "sampled": []}
    with evaluation_mode(model):
        damping = {name: _group_damping(opt, block.layer.weight) for name, block in chosen.items()}
        current = fresh_blocks(chosen, model, loss_fn, inputs, damping, getattr(opt, "use_keys_of", None)) \
            if chosen else {}
        for name, block in chosen.items():
            entry, directions = _probe_layer(opt, block, current.get(name), model, loss_fn, inputs, targets,
                                             generator, samples)
            result["layers"][name] = entry
            for key in joined:
                joined[key].append(directions[key])
    if result["layers"]:
        whole = {key: torch.cat(parts) for key, parts in joined.items()}
        result["block_angle_deg"] = direction_angle_deg(whole["block"], whole["exact"])
        result["step_angle_deg"] = direction_angle_deg(whole["step"], whole["exact"])
        result["empirical_vs_sampled_angle_deg"] = direction_angle_deg(whole["empirical"], whole["sampled"])
    result["findings"] = far_from_fisher(result, warn_angle_deg)
    for message in result["findings"]:
        warnings.warn(message, stacklevel=2)
    return result


# --------------------------------------------------------------------------
# reading a result: what is far off, and why
# --------------------------------------------------------------------------

def _number(value) -> float:
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else math.nan


def _statistics_cause(ratio: float, settings: dict) -> str:
    """Why the running statistics (trace ``ratio`` times this batch's) differ, as far as the settings tell."""
    memory, interval, fisher = settings.get("stats_memory"), settings.get("stats_interval"), settings.get("fisher")
    lag = (f"the running statistics lag a fast-changing Fisher (refreshed every {interval} steps, "
           f"stats_memory={memory:g}): lower stats_memory or stats_interval"
           if (memory or 0.0) > 0.0 or (interval or 1) > 1 else None)
    noise = None
    if fisher == "sampled" and ratio < 1.0 / TRACE_RATIO_WARNING:
        noise = ("the sampled Fisher undershoots: draws from a confident model rarely leave the predicted class, "
                 "so a few draws per example miss most of the expectation (raise fisher_samples or use "
                 "fisher='exact')")
    elif fisher == "sampled":
        noise = ("the sampled Fisher is a noisy estimate (a confident model's rare draws off the predicted "
                 "class weigh heavily): raise fisher_samples or use fisher='exact'")
    elif fisher == "empirical":
        noise = "fisher='empirical' is not the expected curvature: prefer fisher='sampled' or 'exact'"
    causes = [lag, noise] if ratio > 1.0 else [noise, lag]  # a lagging average of a shrinking Fisher is too big
    causes = [cause for cause in causes if cause]
    return "; or ".join(causes) or "the statistics come from other batches or weights than the probe's"


def _layer_findings(name: str, entry: dict, settings: dict) -> list:
    if "fresh_error" not in entry:
        return []
    limit = _number(settings.get("warn_error", 1.0))
    error, fresh, gap = (_number(entry.get(key)) for key in ("block_error", "fresh_error", "statistics_gap"))
    block_trace, fresh_trace = _number(entry.get("block_trace")), _number(entry.get("fresh_trace"))
    ratio = block_trace / fresh_trace if fresh_trace > 0 else math.inf
    off_scale = not 1.0 / TRACE_RATIO_WARNING <= ratio <= TRACE_RATIO_WARNING
    found = []
    if off_scale or (error > limit and gap > limit):
        found.append(f"layer {name}: the optimizer's block is far from the current Fisher (error {error:.3g}, "
                     f"trace {block_trace:.3g} against {fresh_trace:.3g} for this batch, gap to this batch's "
                     f"statistics {gap:.3g}): " + _statistics_cause(ratio, settings))
    if fresh > limit:
        found.append(f"layer {name}: the {entry.get('structure')} structure itself is far from the exact Fisher "
                     f"(error {fresh:.3g} even when built from this batch with the exact expectation): "
                     "fresher statistics will not help; a richer structure (structure='ekfac') may")
    return found


def far_from_fisher(result: dict, warn_angle_deg: float = 45.0) -> list:
    """Plain-text findings for a probe result: blocks far from the exact Fisher, and why.

    Reads only the plain dict, so a logged result gives the same texts.
    """
    settings = result.get("settings") or {}
    found = []
    for name, entry in (result.get("layers") or {}).items():
        found += _layer_findings(name, entry, settings)
    angle = _number(result.get("empirical_vs_sampled_angle_deg"))
    if angle > warn_angle_deg:
        found.append(f"the empirical Fisher turns the natural-gradient step {angle:.0f} degrees away from "
                     f"the sampled Fisher on this probe batch (threshold {warn_angle_deg:g}); it is not the "
                     "curvature here: prefer fisher='sampled' or 'exact'")
    return found


def _check_probe_arguments(max_params, samples, warn_angle_deg, warn_error) -> None:
    for name, value in (("max_params", max_params), ("samples", samples)):
        if isinstance(value, bool) or not isinstance(value, int):
            raise TypeError(f"{name} must be an int, got {type(value).__name__}")
        if value < 1:
            raise ValueError(f"{name} must be >= 1, got {value}")
    if not isinstance(warn_angle_deg, (int, float)) or not 0.0 <= warn_angle_deg <= 180.0:
        raise ValueError(f"warn_angle_deg must be a number in [0, 180], got {warn_angle_deg!r}")
    if isinstance(warn_error, bool) or not isinstance(warn_error, (int, float)) or not warn_error > 0.0:
        raise ValueError(f"warn_error must be a number > 0, got {warn_error!r}")
