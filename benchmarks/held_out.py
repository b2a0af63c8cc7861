"""The held-out benchmark tasks: problems on which FisherDescent's defaults are checked, never tuned.

The built-in tasks (:mod:`benchmarks.tasks`) are where defaults are chosen.
These differ from them in data (tabular medical data, a synthetic nonlinear
regression, generated many-class data), depth, loss (binary cross-entropy
with logits) and batch size (16 to 256), so that a default fitted to the
built-in tasks meets problems it was not fitted to. They run only when asked
for (``--tasks held-out``, or by name) and the report sets them apart.

Each target was set from a pilot of SGD (momentum 0.9) and Adam over their lr
grids at the quick budget, fisher-descent not consulted: a training loss the
better-tuned of them reaches within the quick budget on both seeds, well past
the start and not in the first few steps.
"""

from __future__ import annotations

from dataclasses import replace

from torch import nn

from benchmarks import datasets
from benchmarks.tasks import CLASSIFIER_FIT_REASON, Task, mlp

BREAST_CANCER_WIDTHS = [30, 64, 32, 1]
FRIEDMAN_WIDTHS = [datasets.FRIEDMAN_FEATURES, 32, 32, 32, 32, 32, 32, 1]
LAYER_NORM_WIDTH = 128
MANY_CLASS_WIDTHS = [datasets.MANY_CLASS_FEATURES, 512, datasets.MANY_CLASSES]


def shape_text(widths: list[int]) -> str:
    """Layer widths as a description writes them: 30-64-32-1."""
    return "-".join(str(width) for width in widths)


CONV1D_CHANNELS = 16


def mnist1d_conv1d(channels: int = CONV1D_CHANNELS) -> nn.Sequential:
    """Three 1-D convolutions (the last two with stride 2) over the 40 samples, a linear read-out."""
    return nn.Sequential(
        nn.Conv1d(1, channels, kernel_size=5, padding=2),
        nn.ReLU(),
        nn.Conv1d(channels, channels, kernel_size=5, padding=2, stride=2),
        nn.ReLU(),
        nn.Conv1d(channels, channels, kernel_size=3, padding=1, stride=2),
        nn.ReLU(),
        nn.Flatten(),
        nn.Linear(channels * 10, 10),
    )


def layer_norm_mlp(width: int = LAYER_NORM_WIDTH) -> nn.Sequential:
    """64-width-width-10 with layer norm then GELU after each hidden linear layer."""
    return nn.Sequential(
        nn.Linear(64, width), nn.LayerNorm(width), nn.GELU(),
        nn.Linear(width, width), nn.LayerNorm(width), nn.GELU(),
        nn.Linear(width, 10),
    )


BREAST_CANCER_REASON = (
    "binary cross-entropy 0.03 is a geometric-mean probability of 0.97 on the true label, from log 2 = 0.69 at "
    "chance: the training set nearly fitted, a loss that minibatches of 16 examples make noisy, so a run has to "
    "get there and stay there; in a pilot SGD and Adam at their best lrs reached it by step 220 of the quick "
    "budget on both seeds"
)

FRIEDMAN_REASON = (
    "mean squared error 0.1 in units of the target's variance: a third of the best linear fit's 0.30 (least "
    "squares on the training set), so the network must model the sine and the square, and 2.5 times the noise "
    "floor 0.041; in a pilot SGD and Adam at their best lrs reached it by step 420 of the quick budget on both "
    "seeds"
)

CONV1D_REASON = (
    "cross-entropy 0.25 is a geometric-mean probability of 0.78 on the true class, from log 10 = 2.30 at chance; "
    "in a pilot SGD and Adam at their best lrs reached it after 290 to 380 of the 400 quick steps on both seeds"
)

MANY_CLASS_REASON = (
    "the training set fitted almost exactly: cross-entropy 0.03 is a geometric-mean probability of 0.97 on the "
    "true class, from log 20 = 3.00 at chance, while the test accuracy stays near 63% (two clusters per class "
    "overlap); in a pilot SGD and Adam at their best lrs reached it by step 220 of the quick budget on both seeds"
)

HELD_OUT_TASKS: dict[str, Task] = {
    task.name: replace(task, held_out=True)
    for task in [
        Task(
            name="breast_cancer_mlp",
            description=f"MLP {shape_text(BREAST_CANCER_WIDTHS)} (ReLU) on scikit-learn's breast-cancer data (standardized features, "
            "455 train / 114 test), binary cross-entropy with logits, batch 16",
            load_data=datasets.breast_cancer, build_model=lambda: mlp(BREAST_CANCER_WIDTHS, nn.ReLU),
            make_loss=nn.BCEWithLogitsLoss, metric="accuracy",
            target_loss=0.03, target_reason=BREAST_CANCER_REASON,
            batch_size=16, steps=1000, quick_steps=300, widest_width=64,
        ),
        Task(
            name="friedman1_deep_mlp",
            description=f"deep narrow tanh MLP {shape_text(FRIEDMAN_WIDTHS)} on scikit-learn's "
            f"make_friedman1 (noise std {datasets.FRIEDMAN_NOISE_STD:g}, standardized inputs and target, 2048 train / 512 "
            "test), mean squared error, batch 32",
            load_data=datasets.friedman1, build_model=lambda: mlp(FRIEDMAN_WIDTHS, nn.Tanh),
            make_loss=nn.MSELoss, metric="mse",
            target_loss=0.1, target_reason=FRIEDMAN_REASON,
            batch_size=32, steps=1500, quick_steps=500, widest_width=32,
        ),
        Task(
            name="mnist1d_conv1d",
            description="1-D convolutional classifier on mnist1d as one-channel sequences of 40 (three "
            f"nn.Conv1d layers, {CONV1D_CHANNELS} channels, kernels 5-5-3, the last two with stride 2; "
            "linear read-out), cross-entropy, batch 128",
            load_data=datasets.mnist1d_sequences, build_model=mnist1d_conv1d,
            make_loss=nn.CrossEntropyLoss, metric="accuracy",
            target_loss=0.25, target_reason=CONV1D_REASON,
            batch_size=128, steps=1200, quick_steps=400,
        ),
        Task(
            name="digits_layernorm_mlp",
            description=f"MLP 64-{LAYER_NORM_WIDTH}-{LAYER_NORM_WIDTH}-10 on the digits with layer norm and "
            "GELU after each hidden layer, cross-entropy, batch 64",
            load_data=datasets.digits_vectors, build_model=layer_norm_mlp,
            make_loss=nn.CrossEntropyLoss, metric="accuracy",
            target_loss=0.01, target_reason=CLASSIFIER_FIT_REASON,
            batch_size=64, steps=1000, quick_steps=300,
        ),
        Task(
            name="many_class_wide_mlp",
            description=f"wide shallow MLP {shape_text(MANY_CLASS_WIDTHS)} (ReLU) on scikit-learn's "
            f"make_classification ({datasets.MANY_CLASSES} classes, two clusters each, 40 standardized "
            "features, 4000 train / 1000 test), cross-entropy, batch 256",
            load_data=datasets.many_classes, build_model=lambda: mlp(MANY_CLASS_WIDTHS, nn.ReLU),
            make_loss=nn.CrossEntropyLoss, metric="accuracy",
            target_loss=0.03, target_reason=MANY_CLASS_REASON,
            batch_size=256, steps=1000, quick_steps=300, widest_width=512,
        ),
    ]
}
