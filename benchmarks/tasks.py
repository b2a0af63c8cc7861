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
import torch.nn.functional as F
from torch import nn

from benchmarks import corpus, datasets


@dataclass(frozen=True)
class Task:
    """One benchmark problem.

    ``widest_width`` is the widest hidden width d of an all-linear network; the
    report sets the measured step-time ratio of natural gradient over SGD
    beside the flop-count estimate 1 + 2d/(3B) with it and the batch size B
    (``None`` for networks where that estimate does not apply).
    """

    name: str
    description: str
    load_data: Callable[[], datasets.Split]
    build_model: Callable[[], nn.Module]
    make_loss: Callable[[], nn.Module]
    metric: Optional[str]  # "accuracy" (higher is better), "mse" or "loss" (lower is better), or None
    target_loss: float
    target_reason: str
    batch_size: int
    steps: int
    quick_steps: int
    widest_width: Optional[int] = None
    reference: Optional[str] = None  # published figure to compare the test metric with
    reference_band: Optional[tuple[float, float]] = None
    held_out: bool = False  # a problem the defaults are checked on, never tuned on (benchmarks/held_out.py)

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


class ResidualBlock(nn.Module):
    """conv-BN-ReLU-conv-BN plus the identity, then ReLU (He et al., CVPR 2016).

    The convolutions have no bias: the batch norm right after each one has its
    own shift, so a bias would be redundant (common practice).
    """

    def __init__(self, channels: int):
        super().__init__()
        self.conv1 = nn.Conv2d(channels, channels, kernel_size=3, padding=1, bias=False)
        self.norm1 = nn.BatchNorm2d(channels)
        self.conv2 = nn.Conv2d(channels, channels, kernel_size=3, padding=1, bias=False)
        self.norm2 = nn.BatchNorm2d(channels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = torch.relu(self.norm1(self.conv1(x)))
        return torch.relu(x + self.norm2(self.conv2(y)))


RESNET_CHANNELS = 16


def digits_resnet(channels: int = RESNET_CHANNELS) -> nn.Sequential:
    """A 3x3 conv stem with batch norm, two residual blocks, global average pooling, a linear head."""
    return nn.Sequential(
        nn.Conv2d(1, channels, kernel_size=3, padding=1, bias=False),
        nn.BatchNorm2d(channels),
        nn.ReLU(),
        ResidualBlock(channels),
        ResidualBlock(channels),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
        nn.Linear(channels, 10),
    )


class CausalSelfAttention(nn.Module):
    """Multi-head softmax attention over earlier positions only, with nn.Linear projections.

    The projections are separate modules called as modules (not the fused
    weights of nn.MultiheadAttention), so a curvature block can see each of them.
    """

    def __init__(self, width: int, heads: int):
        super().__init__()
        if width % heads:
            raise ValueError(f"width must be a multiple of heads, got width={width}, heads={heads}")
        self.heads = heads
        self.query = nn.Linear(width, width)
        self.key = nn.Linear(width, width)
        self.value = nn.Linear(width, width)
        self.out = nn.Linear(width, width)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        n, t, width = h.shape
        head_width = width // self.heads

        def split(x: torch.Tensor) -> torch.Tensor:  # [n, t, width] -> [n, heads, t, head_width]
            return x.reshape(n, t, self.heads, head_width).transpose(1, 2)

        q, k, v = split(self.query(h)), split(self.key(h)), split(self.value(h))
        # softmax(q k^T / sqrt(d_head) + causal mask) v in one fused kernel: a third of the step time
        # of the written-out product on CPU, and the same function (checked in the tests)
        mixed = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        return self.out(mixed.transpose(1, 2).reshape(n, t, width))


class TransformerBlock(nn.Module):
    """Pre-norm block: h + attention(LN(h)), then h + MLP(LN(h)) with a GELU MLP."""

    def __init__(self, width: int, heads: int, hidden: int):
        super().__init__()
        self.norm1 = nn.LayerNorm(width)
        self.attention = CausalSelfAttention(width, heads)
        self.norm2 = nn.LayerNorm(width)
        self.mlp = nn.Sequential(nn.Linear(width, hidden), nn.GELU(), nn.Linear(hidden, width))

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        h = h + self.attention(self.norm1(h))
        return h + self.mlp(self.norm2(h))


class TinyTransformer(nn.Module):
    """Causal language model: token and learned position embeddings, pre-norm blocks, a final
    LayerNorm and an untied linear read-out.

    ``forward`` maps tokens ``[n, T]`` to logits ``[n, vocabulary, T]``: the
    layout nn.CrossEntropyLoss takes with targets ``[n, T]`` (class dim 1),
    so the model returns the very tensor the criterion is applied to.
    """

    def __init__(self, vocabulary: int, max_length: int, width: int, heads: int, hidden: int, depth: int):
        super().__init__()
        self.tokens = nn.Embedding(vocabulary, width)
        self.positions = nn.Embedding(max_length, width)
        self.blocks = nn.Sequential(*[TransformerBlock(width, heads, hidden) for _ in range(depth)])
        self.norm = nn.LayerNorm(width)
        self.read_out = nn.Linear(width, vocabulary)

    def forward(self, tokens: torch.Tensor) -> torch.Tensor:
        n, t = tokens.shape
        # Positions expanded to [n, t], so the position embedding sees a batch like every other layer.
        positions = torch.arange(t, device=tokens.device).expand(n, t)
        h = self.blocks(self.tokens(tokens) + self.positions(positions))
        return self.read_out(self.norm(h)).transpose(1, 2)


TRANSFORMER_SHAPE = {"width": 32, "heads": 2, "hidden": 64, "depth": 2}


def corpus_transformer() -> TinyTransformer:
    return TinyTransformer(corpus.VOCABULARY, corpus.SEQUENCE_LENGTH, **TRANSFORMER_SHAPE)


class TorchLayersTransformer(nn.Module):
    """The same language model built from torch's own layers: ``nn.TransformerEncoderLayer``
    (pre-norm, GELU, no dropout) with a causal mask, so the attention is ``nn.MultiheadAttention``
    with its packed in-projection; logits ``[n, vocabulary, T]`` as for ``TinyTransformer``.
    """

    def __init__(self, vocabulary: int, max_length: int, width: int, heads: int, hidden: int, depth: int):
        super().__init__()
        self.tokens = nn.Embedding(vocabulary, width)
        self.positions = nn.Embedding(max_length, width)
        layer = nn.TransformerEncoderLayer(width, heads, dim_feedforward=hidden, dropout=0.0, activation="gelu",
                                           batch_first=True, norm_first=True)
        self.blocks = nn.TransformerEncoder(layer, depth, enable_nested_tensor=False)
        self.norm = nn.LayerNorm(width)
        self.read_out = nn.Linear(width, vocabulary)
        self.register_buffer("causal", nn.Transformer.generate_square_subsequent_mask(max_length), persistent=False)

    def forward(self, tokens: torch.Tensor) -> torch.Tensor:
        n, t = tokens.shape
        positions = torch.arange(t, device=tokens.device).expand(n, t)
        h = self.blocks(self.tokens(tokens) + self.positions(positions), mask=self.causal[:t, :t], is_causal=True)
        return self.read_out(self.norm(h)).transpose(1, 2)


def corpus_torch_transformer() -> TorchLayersTransformer:
    return TorchLayersTransformer(corpus.VOCABULARY, corpus.SEQUENCE_LENGTH, **TRANSFORMER_SHAPE)


CLASSIFIER_FIT_REASON = (
    "the training set fitted almost exactly: cross-entropy 0.01 is a geometric-mean probability of "
    "0.99 on the true class, more than two decades below log 10 = 2.30 at chance, and the test "
    "accuracy has long stopped improving; well-tuned runs reach it within the quick budget"
)

RESNET_REASON = (
    CLASSIFIER_FIT_REASON + ". The training loss is evaluated in eval() mode, so with batch norm's "
    "running statistics, which lag behind weights that move fast"
)

LANGUAGE_MODEL_REASON = (
    "between the grammar's own cross-entropy on the training sequences, 1.69 nats per token (the Bayes "
    "limit: only memorizing gets below it), and 2.30, the best training loss of any predictor that sees "
    "just the current token and its position (the maximum-likelihood table of those counts; 2.91 for the "
    "current token alone), from log 42 = 3.74 at chance: it cannot be reached without attending to "
    "earlier tokens (the innermost open bracket, the key to recall, the word before a bracket); "
    "well-tuned runs reach it within the quick budget"
)

TORCH_LAYERS_REASON = "the same target as corpus_transformer, for the same reason: " + LANGUAGE_MODEL_REASON.split(
    ". Measured:")[0]


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
        Task(
            name="digits_resnet",
            description=f"residual CNN on the 8x8 digit images: 3x3 conv stem ({RESNET_CHANNELS} "
            "channels) with batch norm, two residual blocks (conv-BN-ReLU-conv-BN + skip), global "
            "average pooling, linear read-out; cross-entropy, batch 128",
            load_data=datasets.digits_images,
            build_model=digits_resnet,
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=0.01,
            target_reason=RESNET_REASON,
            batch_size=128,
            steps=1000,
            quick_steps=200,
        ),
        Task(
            name="corpus_transformer",
            description=f"causal transformer language model ({TRANSFORMER_SHAPE['depth']} pre-norm blocks, "
            f"width {TRANSFORMER_SHAPE['width']}, {TRANSFORMER_SHAPE['heads']} heads, GELU MLP "
            f"{TRANSFORMER_SHAPE['hidden']}) on a synthetic bracket-and-recall grammar (vocabulary "
            f"{corpus.VOCABULARY}, sequences of {corpus.SEQUENCE_LENGTH} tokens, {datasets.CORPUS_TRAIN} "
            "training sequences), next-token cross-entropy over every position, batch 64",
            load_data=datasets.next_tokens,
            build_model=corpus_transformer,
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=2.0,
            target_reason=LANGUAGE_MODEL_REASON,
            batch_size=64,
            steps=1000,
            quick_steps=300,
        ),
        Task(
            name="corpus_torch_transformer",
            description="corpus_transformer's language model and data, the blocks built from torch's own "
            "nn.TransformerEncoderLayer (pre-norm, GELU, causal mask; nn.MultiheadAttention with its packed "
            "in-projection)",
            load_data=datasets.next_tokens,
            build_model=corpus_torch_transformer,
            make_loss=nn.CrossEntropyLoss,
            metric="accuracy",
            target_loss=2.0,
            target_reason=TORCH_LAYERS_REASON,
            batch_size=64,
            steps=1000,
            quick_steps=300,
        ),
    ]
}


# Run when named with --tasks: the built-in language model rebuilt from torch's own layers.
ON_REQUEST_TASKS = ("corpus_torch_transformer",)
