"""What the optimizer needs to know about each training criterion.

A criterion ``L = c * sum_n l_n`` is a sum of per-term negative log-likelihoods
``l_n`` scaled by the reduction coefficient ``c`` (``1/#terms`` for ``mean``,
``1`` for ``sum``).  The Fisher of ``L`` is ``c * sum_n J_n^T H_n J_n`` where
``H_n = E_{y~p(y|f_n)}[grad_f l_n grad_f l_n^T]`` is the output Fisher, which for
these criteria equals the Hessian of ``l_n`` in the network output ``f``
(Martens & Grosse 2015, sec. 9; the generalized Gauss-Newton matrix):

=====================  ===========================  ====================================
criterion              model p(y | f)               output Fisher H
=====================  ===========================  ====================================
``MSELoss``            N(f, I/2): l = ||y - f||^2   2 I
``CrossEntropyLoss``   Categorical(softmax(f))      diag(p) - p p^T
``BCEWithLogitsLoss``  Bernoulli(sigmoid(f))        diag(s (1 - s)),  s = sigmoid(f)
=====================  ===========================  ====================================

Every method returns vectors shaped like the output and already multiplied by
``c``: that is the scale a backward pass through the user's loss would give, so
the curvature blocks can treat sampled, exact and empirical gradients alike and
undo the scale once, with :meth:`reduction_scale`.
"""
from __future__ import annotations

import math

import torch
from torch import nn

SUPPORTED_REDUCTIONS = ("mean", "sum")


class OutputLikelihood:
    """Closed-form facts about one criterion: reduction scale, samples, exact Fisher."""

    name = "criterion"

    def __init__(self, loss_fn: nn.Module):
        reduction = getattr(loss_fn, "reduction", None)
        if reduction not in SUPPORTED_REDUCTIONS:
            raise ValueError(
                f"loss_fn: reduction={reduction!r} is not supported for fisher='sampled'/'exact'; "
                f"use one of {SUPPORTED_REDUCTIONS}")
        self.reduction = reduction

    def num_terms(self, output: torch.Tensor) -> int:
        """Number of terms the ``mean`` reduction divides by."""
        return output.numel()

    def check_input(self, output: torch.Tensor) -> None:
        """Raise a clear error if the criterion's input cannot carry this likelihood."""

    def describe_columns(self, output: torch.Tensor) -> str:
        """What the exact Fisher's columns per example are, in words."""
        return f"one per output element, {output[0].numel() if output.dim() else 1} per example"

    def hessian_product(self, output: torch.Tensor, vector: torch.Tensor) -> torch.Tensor:
        """``c * H u`` for a direction ``u`` shaped like the output: the output Hessian of ``L``."""
        raise NotImplementedError

    def reduction_scale(self, output: torch.Tensor) -> float:
        """The coefficient ``c`` in ``L = c * sum_n l_n``."""
        return 1.0 / self.num_terms(output) if self.reduction == "mean" else 1.0

    def sampled_output_grads(self, output: torch.Tensor, generator: torch.Generator,
                             num_samples: int) -> torch.Tensor:
        """``c * grad_f l(f, y)`` for ``y`` drawn from the model; shape ``[num_samples, *output.shape]``."""
        raise NotImplementedError

    def exact_columns(self, output: torch.Tensor, examples: int) -> torch.Tensor:
        """Exact-Fisher columns that never join two terms of one network example.

        A column may touch one term of every example: their cross terms vanish,
        because an example's terms depend on that example alone.  When the
        criterion's rows are example-major positions (``logits.view(-1, V)`` of
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

    def exact_output_grad_columns(self, output: torch.Tensor) -> torch.Tensor:
        """Columns ``c * S_k`` with ``sum_k S_k S_k^T = H`` for every term; shape ``[K, *output.shape]``.

        Each column touches one output position of every example, so a backward
        pass per column never mixes two terms of the same example.
        """
        raise NotImplementedError


class SquaredError(OutputLikelihood):
    """``nn.MSELoss``: ``l = (y - f)^2`` per element is the NLL of N(f, 1/2), up to a constant."""

    name = "squared error"

    def sampled_output_grads(self, output, generator, num_samples):
        noise = torch.randn((num_samples,) + output.shape, generator=generator,
                            device=output.device, dtype=output.dtype)
        # y = f + noise / sqrt(2)  =>  grad_f (y - f)^2 = -sqrt(2) * noise; the sign is irrelevant.
        return noise * (math.sqrt(2.0) * self.reduction_scale(output))

    def exact_output_grad_columns(self, output):
        value = math.sqrt(2.0) * self.reduction_scale(output)
        return _one_hot_columns(output, torch.full_like(output, value))

    def hessian_product(self, output, vector):
        return vector * (2.0 * self.reduction_scale(output))


class BinaryCrossEntropy(OutputLikelihood):
    """``nn.BCEWithLogitsLoss`` without ``weight``/``pos_weight``."""

    name = "binary cross-entropy"

    def __init__(self, loss_fn):
        super().__init__(loss_fn)
        if getattr(loss_fn, "weight", None) is not None or getattr(loss_fn, "pos_weight", None) is not None:
            raise ValueError("loss_fn: BCEWithLogitsLoss with weight/pos_weight is not supported for "
                             "fisher='sampled'/'exact'; use fisher='empirical' or drop the weights")

    def sampled_output_grads(self, output, generator, num_samples):
        prob = torch.sigmoid(output.detach())
        uniform = torch.rand((num_samples,) + output.shape, generator=generator,
                             device=output.device, dtype=output.dtype)
        draws = (uniform < prob).to(output.dtype)
        return (prob - draws) * self.reduction_scale(output)

    def exact_output_grad_columns(self, output):
        prob = torch.sigmoid(output.detach())
        return _one_hot_columns(output, torch.sqrt(prob * (1 - prob)) * self.reduction_scale(output))

    def hessian_product(self, output, vector):
        prob = torch.sigmoid(output.detach())
        return vector * (prob * (1 - prob)) * self.reduction_scale(output)


class CrossEntropy(OutputLikelihood):
    """``nn.CrossEntropyLoss`` over class dimension 1, no class weights, no label smoothing.

    Positions with the criterion's ``ignore_index`` still count in the curvature:
    targets are drawn from the model, so every position is asked about.
    """

    name = "cross-entropy"

    def __init__(self, loss_fn):
        super().__init__(loss_fn)
        if getattr(loss_fn, "weight", None) is not None:
            raise ValueError("loss_fn: CrossEntropyLoss with class weights is not supported for "
                             "fisher='sampled'/'exact'; use fisher='empirical'")
        if getattr(loss_fn, "label_smoothing", 0.0):
            raise ValueError("loss_fn: CrossEntropyLoss with label_smoothing is not supported for "
                             "fisher='sampled'/'exact'; use fisher='empirical'")

    def num_terms(self, output):
        self._check_shape(output)
        return output.numel() // output.shape[1]

    @staticmethod
    def _check_shape(output):
        if output.dim() < 2:
            raise ValueError("CrossEntropyLoss curvature needs logits shaped [batch, classes, ...]; "
                             f"got shape {tuple(output.shape)}")

    def check_input(self, output):
        self._check_shape(output)

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
        return (weighted - prob * weighted.sum(dim=1, keepdim=True)) * self.reduction_scale(output)

    def sampled_output_grads(self, output, generator, num_samples):
        prob = torch.softmax(output.detach(), dim=1)
        classes = prob.shape[1]
        flat = prob.movedim(1, -1).reshape(-1, classes)
        if not bool(torch.isfinite(flat).all()):
            # Non-finite logits: hand back non-finite gradients so the step is skipped, not crashed.
            return torch.full((num_samples,) + output.shape, float("nan"), dtype=output.dtype,
                              device=output.device)
        draws = torch.multinomial(flat, num_samples, replacement=True, generator=generator)  # [terms, S]
        onehot = torch.nn.functional.one_hot(draws.T, classes).to(prob.dtype)              # [S, terms, C]
        onehot = onehot.reshape((num_samples,) + prob.movedim(1, -1).shape).movedim(-1, 2)
        return (prob.unsqueeze(0) - onehot) * self.reduction_scale(output)

    def exact_output_grad_columns(self, output):
        # H = diag(p) - p p^T = S S^T with columns S_k = sqrt(p_k) (e_k - p), one per class k
        # (and, for outputs with positions, one per class and position).
        prob = torch.softmax(output.detach(), dim=1)
        scale = self.reduction_scale(output)
        classes = prob.shape[1]
        eye = torch.eye(classes, dtype=prob.dtype, device=prob.device)
        columns = []
        for k in range(classes):
            e_k = eye[k].reshape((1, classes) + (1,) * (prob.dim() - 2))
            column = torch.sqrt(prob[:, k:k + 1]) * (e_k - prob) * scale
            columns.append(column)
        stacked = torch.stack(columns)  # [C, *output.shape]
        if prob.dim() == 2:
            return stacked
        return _split_positions(stacked)


def _one_hot_columns(output: torch.Tensor, values: torch.Tensor) -> torch.Tensor:
    """One column per element position of an example: column j is ``values`` at j, zero elsewhere."""
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


LIKELIHOODS = {
    nn.MSELoss: SquaredError,
    nn.CrossEntropyLoss: CrossEntropy,
    nn.BCEWithLogitsLoss: BinaryCrossEntropy,
}


def likelihood_for(loss_fn) -> OutputLikelihood:
    """The closed-form likelihood of a supported criterion, or a clear error."""
    for cls, likelihood in LIKELIHOODS.items():
        if type(loss_fn) is cls:
            return likelihood(loss_fn)
    names = ", ".join(f"nn.{cls.__name__}" for cls in LIKELIHOODS)
    raise ValueError(f"loss_fn: fisher='sampled'/'exact' support {names}; got {type(loss_fn).__name__}. "
                     "Use fisher='empirical' for other criteria.")


def empirical_reduction_scale(loss_fn, output, batch_size: int) -> float:
    """``c`` for the empirical Fisher, so that it estimates the Fisher of ``L = c sum_n l_n``.

    For a supported criterion this is the criterion's own ``c`` (``1/#terms`` for
    ``mean``), which makes the empirical Fisher agree with the Fisher at the true
    parameters (Casella & Berger: E[score score^T] = I).  For any other criterion the
    loss is taken to be a mean over the leading (batch) dimension, or a sum when the
    criterion says ``reduction='sum'``.
    """
    if isinstance(output, torch.Tensor):
        try:
            return likelihood_for(loss_fn).reduction_scale(output)
        except ValueError:
            pass
    reduction = getattr(loss_fn, "reduction", "mean") if loss_fn is not None else "mean"
    return 1.0 if reduction == "sum" else 1.0 / batch_size
