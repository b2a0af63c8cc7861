"""What the optimizer needs to know about each loss call.

A supported loss call, by a criterion object or by the functional form, in the
user's code or inside the model, is a weighted sum of per-term negative
log-likelihoods of the model output ``z`` it receives:

    L = sum_n w_n l_n(z_n, y_n),     w_n = dL/dl_n,

where the weights come from the user's backward pass (``1/#terms`` for
``reduction="mean"``, ``1`` for ``"sum"``, anything for ``"none"``; zero for
terms the loss ignores; times any scaling the user's code applies afterwards).
The Fisher of ``L`` is then ``sum_n w_n J_n^T H_n J_n`` where
``H_n = E_{y~p(y|z_n)}[grad l grad l^T]`` is the output Fisher of one term, which
for these likelihoods equals the Hessian of ``l_n`` in ``z_n`` (Martens & Grosse
2015, sec. 9; the generalized Gauss-Newton matrix):

=========================================  ===========================  ==============================
loss                                       model p(y | z)               output Fisher H per term
=========================================  ===========================  ==============================
``mse_loss`` / ``nn.MSELoss``              N(z, I/2): l = (y - z)^2     2
``cross_entropy`` / ``nn.CrossEntropyLoss``  Categorical(softmax(z))     diag(p) - p p^T
``binary_cross_entropy_with_logits``       Bernoulli(sigmoid(z))        s (1 - s),  s = sigmoid(z)
=========================================  ===========================  ==============================

Label smoothing keeps ``H`` (the smoothed loss is linear in the log-softmax with
weights summing to one); element weights of ``mse_loss`` and
``binary_cross_entropy_with_logits`` become term weights.  Class weights and
``pos_weight`` depend on the label, so the loss is no longer one likelihood:
those calls are not supported for ``fisher="sampled"``/``"exact"``.

Every vector method returns *unit-scale* quantities (no reduction factor): the
term weights are applied once, by :class:`LossCall`, so that sampled, exact and
empirical statistics share one convention and a low-precision backward never
sees vectors of size ``1/#terms``.
"""
from __future__ import annotations

import functools
import inspect
import math
from dataclasses import dataclass, field
from typing import Callable, Dict, Optional, Tuple

import torch
from torch import nn
import torch.nn.functional as F

from .sampling import categorical_draws

SUPPORTED_REDUCTIONS = ("mean", "sum", "none")


class UnsupportedLoss(ValueError):
    """A loss call whose curvature has no closed form here (the message says why)."""


class OutputLikelihood:
    """Closed-form facts about one kind of loss with one call's options."""

    name = "loss"
    function: Callable = None

    def __init__(self, reduction: str = "mean", element_weight: Optional[torch.Tensor] = None):
        if reduction not in SUPPORTED_REDUCTIONS:
            raise UnsupportedLoss(f"reduction={reduction!r} is not supported; use one of {SUPPORTED_REDUCTIONS}")
        self.reduction = reduction
        self.element_weight = element_weight

    # -- terms ------------------------------------------------------------------------------
    def check_input(self, output: torch.Tensor) -> None:
        """Raise a clear error if the loss's input cannot carry this likelihood."""

    def term_shape(self, output: torch.Tensor) -> torch.Size:
        """The shape of the per-term losses (every element, for elementwise likelihoods)."""
        return output.shape

    def spread(self, values: torch.Tensor, output: torch.Tensor) -> torch.Tensor:
        """Per-term values broadcast against ``output``."""
        return values

    def valid_terms(self, output: torch.Tensor, target) -> Optional[torch.Tensor]:
        """Boolean mask of the terms the loss counts; None when it counts every term."""
        return None

    def term_weights(self, output: torch.Tensor, target, loss_grad: torch.Tensor) -> torch.Tensor:
        """``w_n = dL/dl_n`` per term from ``loss_grad = dL/d(loss value)``, the user's backward."""
        shape = self.term_shape(output)
        valid = self.valid_terms(output, target)
        if self.reduction == "none":
            weights = loss_grad.detach().to(output.dtype).expand(shape)
        else:
            count = math.prod(shape) if valid is None else int(valid.sum())
            scale = 1.0 / max(count, 1) if self.reduction == "mean" else 1.0
            weights = loss_grad.detach().to(output.dtype).reshape(()).mul(scale).expand(shape)
        if self.element_weight is not None:
            weights = weights * self.element_weight.to(output.dtype).expand(shape)
        if valid is not None:
            weights = weights * valid.to(output.dtype)
        return weights

    # -- the per-term likelihood ----------------------------------------------------------------
    def term_losses(self, output: torch.Tensor, target) -> torch.Tensor:
        """``l_n`` per term, without reduction or element weights (zero where the loss ignores the term)."""
        raise NotImplementedError

    def sampled_output_grads(self, output: torch.Tensor, generator: torch.Generator,
                             num_samples: int) -> torch.Tensor:
        """``grad_z l(z, y)`` per term for ``y`` drawn from the model; ``[num_samples, *output.shape]``."""
        raise NotImplementedError

    def exact_output_grad_columns(self, output: torch.Tensor) -> torch.Tensor:
        """Columns ``S_k`` with ``sum_k S_k S_k^T = H`` for every term; ``[K, *output.shape]``.

        Each column touches one output position of every term, so a backward pass per
        column never mixes two positions of the same term.
        """
        raise NotImplementedError

    def hessian_product(self, output: torch.Tensor, vector: torch.Tensor) -> torch.Tensor:
        """``H_n u_n`` per term for a direction ``u`` shaped like the output."""
        raise NotImplementedError

    def describe_columns(self, output: torch.Tensor) -> str:
        """What the exact Fisher's columns per example are, in words."""
        return f"one per output element, {output[0].numel() if output.dim() else 1} per example"

    # -- exact columns that keep examples apart -----------------------------------------------
    def exact_columns(self, output: torch.Tensor, examples: int) -> torch.Tensor:
        """Exact-Fisher columns that never join two terms of one network example.

        A column may touch one term of every example: their cross terms vanish,
        because an example's terms depend on that example alone.  When the
        loss's rows are example-major positions (``logits.view(-1, V)`` of
        ``[examples, T, V]``, or a shifted ``logits[:, :-1]`` flattened the same
        way), the rows of one example are split over separate columns.
        """
        rows = output.shape[0] if output.dim() else 1
        if output.dim() == 0 or examples <= 0 or rows == examples or rows % examples:
            return self.exact_output_grad_columns(output)
        grouped = self.group_positions(output, examples)
        return self.ungroup_columns(self.exact_output_grad_columns(grouped), output.shape)

    def group_positions(self, output: torch.Tensor, examples: int) -> torch.Tensor:
        """``[examples * P, ...]`` as ``[examples, P, ...]`` (positions after the batch dimension)."""
        return output.reshape((examples, output.shape[0] // examples) + tuple(output.shape[1:]))

    def ungroup_columns(self, columns: torch.Tensor, shape) -> torch.Tensor:
        return columns.reshape((columns.shape[0],) + tuple(shape))


class SquaredError(OutputLikelihood):
    """``mse_loss``: ``l = (y - z)^2`` per element is the NLL of N(z, 1/2), up to a constant."""

    name = "squared error"
    function = F.mse_loss

    def term_losses(self, output, target):
        return (output - target).square()

    def sampled_output_grads(self, output, generator, num_samples):
        noise = torch.randn((num_samples,) + output.shape, generator=generator,
                            device=output.device, dtype=output.dtype)
        # y = z + noise / sqrt(2)  =>  grad_z (y - z)^2 = -sqrt(2) * noise; the sign is irrelevant.
        return noise * math.sqrt(2.0)

    def exact_output_grad_columns(self, output):
        return _one_hot_columns(output, torch.full_like(output, math.sqrt(2.0)))

    def hessian_product(self, output, vector):
        return vector * 2.0


class BinaryCrossEntropy(OutputLikelihood):
    """``binary_cross_entropy_with_logits`` without ``pos_weight``."""

    name = "binary cross-entropy"
    function = F.binary_cross_entropy_with_logits

    def term_losses(self, output, target):
        return F.binary_cross_entropy_with_logits(output, target.to(output.dtype), reduction="none")

    def sampled_output_grads(self, output, generator, num_samples):
        prob = torch.sigmoid(output.detach())
        uniform = torch.rand((num_samples,) + output.shape, generator=generator,
                             device=output.device, dtype=output.dtype)
        draws = (uniform < prob).to(output.dtype)
        return prob - draws

    def exact_output_grad_columns(self, output):
        prob = torch.sigmoid(output.detach())
        return _one_hot_columns(output, torch.sqrt(prob * (1 - prob)))

    def hessian_product(self, output, vector):
        prob = torch.sigmoid(output.detach())
        return vector * (prob * (1 - prob))


class CrossEntropy(OutputLikelihood):
    """``cross_entropy`` over class dimension 1 (class-index or class-probability targets).

    Terms whose target is ``ignore_index`` carry no curvature and, under
    ``reduction="mean"``, do not count in the mean (as in torch).
    """

    name = "cross-entropy"
    function = F.cross_entropy

    def __init__(self, reduction="mean", ignore_index: int = -100, label_smoothing: float = 0.0):
        super().__init__(reduction)
        self.ignore_index = ignore_index
        self.label_smoothing = float(label_smoothing)

    @staticmethod
    def _check_shape(output):
        if output.dim() < 2:
            raise ValueError("cross-entropy curvature needs logits shaped [batch, classes, ...]; "
                             f"got shape {tuple(output.shape)}")

    def check_input(self, output):
        self._check_shape(output)

    def term_shape(self, output):
        return output.shape[:1] + output.shape[2:]

    def spread(self, values, output):
        return values.unsqueeze(1)

    def valid_terms(self, output, target):
        if isinstance(target, torch.Tensor) and not target.is_floating_point():
            return target != self.ignore_index
        return None

    def term_losses(self, output, target):
        return F.cross_entropy(output, target, ignore_index=self.ignore_index, reduction="none",
                               label_smoothing=self.label_smoothing)

    def group_positions(self, output, examples):
        # [examples * P, C, *rest] -> [examples, C, P, *rest]: classes stay on dimension 1
        return super().group_positions(output, examples).movedim(2, 1)

    def ungroup_columns(self, columns, shape):
        return columns.movedim(2, 3).reshape((columns.shape[0],) + tuple(shape))

    def describe_columns(self, output):
        positions = output[0, 0].numel()
        return f"{output.shape[1]} classes x {positions} positions per example"

    def hessian_product(self, output, vector):
        # (diag(p) - p p^T) u along the class dimension
        prob = torch.softmax(output.detach(), dim=1)
        weighted = prob * vector
        return weighted - prob * weighted.sum(dim=1, keepdim=True)

    def sampled_output_grads(self, output, generator, num_samples):
        prob = torch.softmax(output.detach(), dim=1)
        classes = prob.shape[1]
        flat = prob.movedim(1, -1).reshape(-1, classes)
        if not bool(torch.isfinite(flat).all()):
            # Non-finite logits: hand back non-finite gradients so the step is skipped, not crashed.
            return torch.full((num_samples,) + output.shape, float("nan"), dtype=output.dtype,
                              device=output.device)
        draws = categorical_draws(flat, num_samples, generator)  # [terms, S]
        # p - e_y for each draw y: the drawn class's entry lowered by one in a copy of p (no one-hot
        # tensor, which for a large vocabulary would be several times the size of the logits).
        grads = flat.unsqueeze(0).expand(num_samples, -1, -1).clone()                        # [S, terms, C]
        index = draws.T.unsqueeze(-1)
        grads.scatter_add_(2, index, torch.full(index.shape, -1.0, dtype=grads.dtype, device=grads.device))
        return grads.reshape((num_samples,) + prob.movedim(1, -1).shape).movedim(-1, 2)

    def exact_output_grad_columns(self, output):
        # H = diag(p) - p p^T = S S^T with columns S_k = sqrt(p_k) (e_k - p), one per class k
        # (and, for outputs with positions, one per class and position).
        prob = torch.softmax(output.detach(), dim=1)
        classes = prob.shape[1]
        eye = torch.eye(classes, dtype=prob.dtype, device=prob.device)
        columns = []
        for k in range(classes):
            e_k = eye[k].reshape((1, classes) + (1,) * (prob.dim() - 2))
            columns.append(torch.sqrt(prob[:, k:k + 1]) * (e_k - prob))
        stacked = torch.stack(columns)  # [C, *output.shape]
        if prob.dim() == 2:
            return stacked
        return _split_positions(stacked)


def _one_hot_columns(output: torch.Tensor, values: torch.Tensor) -> torch.Tensor:
    """One column per element position of an example: column j is ``values`` at j, zero elsewhere."""
    if output.dim() == 0:
        return values.reshape(1)
    per_example = output[0].numel()
    eye = torch.eye(per_example, dtype=output.dtype, device=output.device)
    flat = values.reshape(output.shape[0], per_example)
    columns = eye.unsqueeze(1) * flat.unsqueeze(0)  # [K, N, per_example]
    return columns.reshape((per_example,) + output.shape)


def _split_positions(columns: torch.Tensor) -> torch.Tensor:
    """Turn class columns ``[C, N, C, *pos]`` into class-and-position columns ``[C*P, N, C, *pos]``."""
    classes, batch = columns.shape[0], columns.shape[1]
    positions = columns[0, 0, 0].numel()
    flat = columns.reshape(classes, batch, classes, positions)
    eye = torch.eye(positions, dtype=columns.dtype, device=columns.device)
    split = flat.unsqueeze(1) * eye.reshape(1, positions, 1, 1, positions)
    return split.reshape((classes * positions,) + columns.shape[1:])


# ----------------------------------------------------------------------------------------- loss calls
@dataclass
class LossCall:
    """One call of a supported loss: its likelihood, input ``z``, target and (later) term weights.

    ``weights`` (``dL/dl_n`` per term) are set when the user's backward reaches the
    call's value; until then the call's curvature is unknown.
    """

    likelihood: OutputLikelihood
    input: Optional[torch.Tensor]
    target: object
    value: float
    weights: Optional[torch.Tensor] = None
    # Where the call sits, for replaying it: ("forward", k) for the k-th call inside the model's
    # forward, ("after", tape) for a call in the user's code after the forward.
    origin: Tuple = ()
    extra: Dict = field(default_factory=dict)

    def set_weights(self, loss_grad: Optional[torch.Tensor], value: Optional[torch.Tensor] = None) -> None:
        """Weights from ``dL/d(value)``; with the value, also the call's share ``sum_n w_n l_n`` of ``L``."""
        if loss_grad is None or self.input is None:
            self.weights = None
            return
        self.weights = self.likelihood.term_weights(self.input, self.target, loss_grad)
        if value is not None:
            self.extra["weighted_value"] = float((loss_grad.double() * value.detach().double()).sum())

    def rescale(self, factor: float) -> None:
        """Multiply the weights by ``factor`` (a loss scale the gradients were divided by)."""
        if self.weights is not None:
            self.weights = self.weights * factor
        if "weighted_value" in self.extra:
            self.extra["weighted_value"] *= factor

    def weighted_loss(self, term_losses: torch.Tensor) -> float:
        """``sum_n w_n l_n`` for per-term losses at any weights (the user's loss, to first order in l)."""
        return float((self.weights.double() * term_losses.double()).sum())

    def fisher_vectors(self, mode: str, generator, num_samples: int, examples: int):
        """``(V, s)``: output-gradient vectors ``[K, *z.shape]`` and ``s`` with ``G = s sum g g^T``.

        The term weights enter as ``sqrt(w_n / w_max)`` on the vectors and ``w_max`` in ``s``,
        so the vectors stay of unit size.  Terms the user ascends (``w_n < 0``) add nothing.
        """
        z = self.input.detach()
        weights = self.weights.clamp(min=0.0)
        top = float(weights.max()) if weights.numel() else 0.0
        if not top > 0.0 or not math.isfinite(top):
            return None, 0.0
        root = self.likelihood.spread(torch.sqrt(weights / top), z)
        if mode == "sampled":
            vectors = self.likelihood.sampled_output_grads(z, generator, num_samples)
            return vectors * root, top / num_samples
        return self.likelihood.exact_columns(z, examples) * root, top

    def empirical_scale(self) -> float:
        """``1 / mean w_n`` over the counted terms: the empirical Fisher of uniform weights is exact."""
        weights = self.weights
        counted = weights[weights != 0]
        mean = float(counted.mean()) if counted.numel() else 0.0
        return 1.0 / mean if mean > 0 else 0.0

    def release(self) -> None:
        self.input = None


def recorded_total(calls) -> Optional[float]:
    """The user's loss as the training backward saw it, ``sum_n w_n l_n`` over ``calls``; None when a call's
    share is unknown (its backward did not reach it)."""
    values = [call.extra.get("weighted_value") for call in calls]
    return None if any(value is None for value in values) else sum(values)


# ----------------------------------------------------------------------------------------- recognition
def _legacy_reduction(size_average, reduce, reduction: str) -> str:
    if size_average is None and reduce is None:
        return reduction
    from torch.nn import _reduction
    return _reduction.legacy_get_string(size_average, reduce, emit_warning=False)


@functools.lru_cache(maxsize=None)
def _signature(function) -> inspect.Signature:
    """A loss function's signature, built once: ``inspect.signature`` costs tens of microseconds,
    and every recorded loss call binds its arguments."""
    return inspect.signature(function)


def _bound(function, args, kwargs) -> dict:
    arguments = _signature(function).bind(*args, **kwargs)
    arguments.apply_defaults()
    return dict(arguments.arguments)


def likelihood_from_arguments(function, args, kwargs) -> Tuple[OutputLikelihood, torch.Tensor, object]:
    """``(likelihood, z, target)`` of a functional loss call; raises :class:`UnsupportedLoss` with the reason."""
    a = _bound(function, args, kwargs)
    reduction = _legacy_reduction(a.get("size_average"), a.get("reduce"), a["reduction"])
    if function is F.cross_entropy:
        if a["weight"] is not None:
            raise UnsupportedLoss("cross-entropy with class weights is not one likelihood (the weight depends "
                                  "on the label)")
        return CrossEntropy(reduction, a["ignore_index"], a["label_smoothing"]), a["input"], a["target"]
    if function is F.mse_loss:
        return SquaredError(reduction, a.get("weight")), a["input"], a["target"]
    if function is F.binary_cross_entropy_with_logits:
        if a["pos_weight"] is not None:
            raise UnsupportedLoss("binary cross-entropy with pos_weight is not one likelihood (the weight "
                                  "depends on the label)")
        return BinaryCrossEntropy(reduction, a["weight"]), a["input"], a["target"]
    raise UnsupportedLoss(f"{getattr(function, '__name__', function)} has no closed-form curvature here")


LOSS_FUNCTIONS = (F.cross_entropy, F.mse_loss, F.binary_cross_entropy_with_logits)
# Criterion objects and the functional form each of their forwards calls.
CRITERIA = {nn.MSELoss: F.mse_loss, nn.CrossEntropyLoss: F.cross_entropy,
            nn.BCEWithLogitsLoss: F.binary_cross_entropy_with_logits}


def criterion_arguments(loss_fn: nn.Module, output, target) -> Tuple[Callable, tuple, dict]:
    """The functional call a supported criterion object makes for ``loss_fn(output, target)``."""
    function = CRITERIA[type(loss_fn)]
    kwargs = {"reduction": loss_fn.reduction}
    if function is F.cross_entropy:
        kwargs.update(weight=loss_fn.weight, ignore_index=loss_fn.ignore_index,
                      label_smoothing=loss_fn.label_smoothing)
    elif function is F.binary_cross_entropy_with_logits:
        kwargs.update(weight=loss_fn.weight, pos_weight=loss_fn.pos_weight)
    elif "weight" in _signature(F.mse_loss).parameters and getattr(loss_fn, "weight", None) is not None:
        kwargs["weight"] = loss_fn.weight
    return function, (output, target), kwargs


def likelihood_for(loss_fn) -> OutputLikelihood:
    """The closed-form likelihood of a supported criterion object, or a clear ``ValueError``."""
    if type(loss_fn) not in CRITERIA:
        names = ", ".join(f"nn.{cls.__name__}" for cls in CRITERIA)
        raise ValueError(f"loss_fn: fisher='sampled'/'exact' support {names} (and their functional forms); got "
                         f"{type(loss_fn).__name__}. Use fisher='empirical' for other criteria.")
    function, _, kwargs = criterion_arguments(loss_fn, None, None)
    try:
        likelihood, _, _ = likelihood_from_arguments(function, (None, None), kwargs)
    except UnsupportedLoss as error:
        raise ValueError(f"loss_fn: {error}; use fisher='empirical'") from None
    return likelihood
