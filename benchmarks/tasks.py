"""The built-in benchmark tasks: data, model, loss, target and budget of each.

A task is fixed data plus a model recipe; the harness decides how it is
trained. Every target below is a training-loss value that the well-tuned runs
reach inside the ``--quick`` budget (so a quick run already says something)
and that still demands real progress from where training starts; the reason
for each value is written beside it and copied into the report.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional

import torch
from torch import nn

from benchmarks import datasets
from benchmarks.selection import select_by_name


@dataclass(frozen=True)
class Task:
    """One benchmark problem.

    ``widest_width`` is the widest hidden width d of an all-linear network; the
    harness uses it with the batch size B for the per-step cost floor
    1 + 2d/(3B) of natural gradient over SGD (``None`` for networks where that
    estimate does not apply). ``floor_goal`` marks the MLP tasks on which the
    step-time goal is judged.
    """

    name: str
    description: str
    load_data: Callable[[], datasets.Split]
    build_model: Callable[[], nn.Module]
    make_loss: Callable[[], nn.Module]
    metric: str  # "accuracy" (higher is better) or "mse" (lower is better)
    target_loss: float
    target_reason: str
    batch_size: int
    steps: int
    quick_steps: int
    widest_width: Optional[int] = None
    floor_goal: bool = False
    reference: Optional[str] = None  # published figure to compare the test metric with
    reference_band: Optional[tuple[float, float]] = None

    @property
    def higher_is_better(self) -> bool:
        return self.metric == "accuracy"


def mlp(widths: list[int], activation: type[nn.Module]) -> nn.Sequential:
    """Linear layers of the given widths with ``activation`` between them (none after the last)."""
    layers: list[nn.Module] = []
    for index, (fan_in, fan_out) in enumerate(zip(widths[:-1], widths[1:])):
        if index > 0:
            layers.append(activation())
        layers.append(nn.Linear(fan_in, fan_out))
    return nn.Sequential(*layers)


AUTOENCODER_WIDTHS = [64, 256, 128, 64, 32, 8, 32, 64, 128, 256, 64]
DIGITS_MLP_WIDTHS = [64, 128, 128, 10]
MNIST1D_MLP_WIDTHS = [40, 256, 256, 10]


def digits_cnn() -> nn.Sequential:
    """Two 3x3 convolutions on the 8x8 digits, one 2x2 pooling, a linear read-out."""
    return nn.Sequential(
        nn.Conv2d(1, 16, kernel_size=3, padding=1),
        nn.ReLU(),
        nn.Conv2d(16, 32, kernel_size=3, padding=1),
        nn.ReLU(),
        nn.MaxPool2d(2),
        nn.Flatten(),
        nn.Linear(32 * 4 * 4, 10),
    )


def accuracy(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    return (outputs.argmax(dim=1) == labels).float().mean().item()


def mean_squared_error(outputs: torch.Tensor, targets: torch.Tensor) -> float:
    return torch.mean((outputs - targets) ** 2).item()


METRICS = {"accuracy": accuracy, "mse": mean_squared_error}

CLASSIFIER_FIT_REASON = (
    "the training set fitted almost exactly: cross-entropy 0.01 is a geometric-mean probability of "
    "0.99 on the true class, more than two decades below log 10 = 2.30 at chance, and the test "
    "accuracy has long stopped improving; well-tuned runs reach it within the quick budget"
)


TASKS: dict[str, Task] = {
    task.name: task
    for task in [
        Task(
            name="digits_autoencoder",
            description="deep tanh autoencoder 64-256-128-64-32-8-32-64-128-256-64 on the digits, "
            "mean squared reconstruction error, batch 512",
            load_data=datasets.digits_reconstruction,
            build_model=lambda: mlp(AUTOENCODER_WIDTHS, nn.Tanh),
            make_loss=nn.MSELoss,
            metric="mse",
            target_loss=0.02,
            target_reason="a bit over a quarter of the error of reconstructing every digit as the mean "
            "training image (about 0.073, the plateau where badly conditioned runs stall), so the "
            "8-unit code has to carry the shape of each digit; well-tuned runs reach it within the "
            "quick budget",
            batch_size=512,
            steps=2000,
            quick_steps=600,
            widest_width=256,
        ),
        Task(
            name="digits_mlp",
            description="MLP classifier 64-128-128-10 (ReLU) on the digits, cross-entropy, batch 256",
            load_data=datasets.digits_vectors,
            build_model=lambda: mlp(DIGITS_MLP_WIDTHS, nn.ReLU),
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=0.01,
            target_reason=CLASSIFIER_FIT_REASON,
            batch_size=256,
            steps=1000,
            quick_steps=300,
            widest_width=128,
            floor_goal=True,
        ),
        Task(
            name="digits_cnn",
            description="convolutional classifier (two 3x3 conv layers, 2x2 max-pool, linear read-out) "
            "on the 8x8 digit images, cross-entropy, batch 256",
            load_data=datasets.digits_images,
            build_model=digits_cnn,
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=0.01,
            target_reason=CLASSIFIER_FIT_REASON,
            batch_size=256,
            steps=1000,
            quick_steps=300,
        ),
        Task(
            name="mnist1d_mlp",
            description="MLP classifier 40-256-256-10 (ReLU) on mnist1d (package generator, default "
            "arguments: 4000 train / 1000 test), cross-entropy, batch 256",
            load_data=datasets.mnist1d,
            build_model=lambda: mlp(MNIST1D_MLP_WIDTHS, nn.ReLU),
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=0.1,
            target_reason="mnist1d is far harder than the digits (an MLP generalizes to only about 68%), "
            "so the target asks for a near fit of the training set: cross-entropy 0.1 is a geometric-mean "
            "probability of 0.90 on the true class, from log 10 = 2.30 at chance; well-tuned runs "
            "reach it within the quick budget",
            batch_size=256,
            steps=1500,
            quick_steps=500,
            widest_width=256,
            floor_goal=True,
            reference="published MLP test accuracy on mnist1d is about 68% "
            "(Greydanus 2020; quoted from memory)",
            reference_band=(0.55, 0.80),
        ),
        Task(
            name="ill_conditioned_regression",
            description=f"linear least squares, {datasets.REGRESSION_FEATURES} correlated features with "
            f"scales spread over {datasets.REGRESSION_SCALE_DECADES:g} decades, noise std "
            f"{datasets.REGRESSION_NOISE_STD:g}, batch 256",
            load_data=datasets.ill_conditioned_regression,
            build_model=lambda: nn.Linear(datasets.REGRESSION_FEATURES, 1),
            make_loss=nn.MSELoss,
            metric="mse",
            target_loss=0.02,
            target_reason="twice the noise variance 0.01 (the least-squares optimum on the training "
            "set is just under 0.01): every latent direction must be fitted, including those carried "
            "by the features of scale 1e-3, which gradient descent reaches slowly and a method "
            "invariant to the feature scales reaches in a few steps",
            batch_size=256,
            steps=1500,
            quick_steps=400,
        ),
    ]
}


def resolve_tasks(names: Optional[list[str]]) -> list[Task]:
    """The tasks with the given names, in the order given (all tasks for ``None``)."""
    return select_by_name(TASKS, names, "tasks")
