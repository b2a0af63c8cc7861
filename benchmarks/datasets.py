"""Offline data for the built-in and the held-out benchmark tasks.

Nothing here touches the network: scikit-learn ships the digits and the
breast-cancer data and generates the Friedman #1 regression and the
many-class problem, the ``mnist1d`` package generates its data set from
templates on the fly, and the ill-conditioned regression and the token corpus
are synthetic. Every loader
returns a :class:`Split` of float32 (or int64 label) tensors, int64 tokens for
the corpus, and is cached, so a benchmark run builds each data set once.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import torch

from benchmarks import corpus

# The train/test split of the digits is fixed (independent of the run seed) so
# that every optimizer and seed sees the same training set.
DIGITS_SPLIT_SEED = 0
DIGITS_TRAIN_FRACTION = 0.8


@dataclass(frozen=True)
class Split:
    """Training and test tensors of one data set."""

    train_x: torch.Tensor
    train_y: torch.Tensor
    test_x: torch.Tensor
    test_y: torch.Tensor


def _to_split(train_x, train_y, test_x, test_y, label_dtype) -> Split:
    return Split(
        torch.as_tensor(np.ascontiguousarray(train_x), dtype=torch.float32),
        torch.as_tensor(np.ascontiguousarray(train_y), dtype=label_dtype),
        torch.as_tensor(np.ascontiguousarray(test_x), dtype=torch.float32),
        torch.as_tensor(np.ascontiguousarray(test_y), dtype=label_dtype),
    )


@functools.lru_cache(maxsize=None)
def _digits_arrays():
    """Digits pixels scaled to [0, 1] (the raw values are 0..16), labels, and a fixed split."""
    from sklearn.datasets import load_digits

    digits = load_digits()
    pixels = digits.data.astype(np.float64) / 16.0
    order = np.random.RandomState(DIGITS_SPLIT_SEED).permutation(len(pixels))
    n_train = int(DIGITS_TRAIN_FRACTION * len(pixels))
    return pixels, digits.target.astype(np.int64), order[:n_train], order[n_train:]


def digits_vectors() -> Split:
    """Digits as 64-vectors with class labels (1437 train / 360 test)."""
    pixels, labels, train, test = _digits_arrays()
    return _to_split(pixels[train], labels[train], pixels[test], labels[test], torch.int64)


def digits_images() -> Split:
    """Digits as 1x8x8 images with class labels, same split as :func:`digits_vectors`."""
    pixels, labels, train, test = _digits_arrays()
    images = pixels.reshape(-1, 1, 8, 8)
    return _to_split(images[train], labels[train], images[test], labels[test], torch.int64)


def digits_reconstruction() -> Split:
    """Digits as 64-vectors whose target is the input itself (autoencoding)."""
    pixels, _, train, test = _digits_arrays()
    return _to_split(pixels[train], pixels[train], pixels[test], pixels[test], torch.float32)


@functools.lru_cache(maxsize=None)
def mnist1d() -> Split:
    """The mnist1d data set built by its package's own generator with its default arguments.

    ``mnist1d.data.make_dataset`` draws from templates with a fixed seed (42 by
    default), so the result is the same on every machine: 4000 training and
    1000 test sequences of length 40 and ten classes. ``get_dataset`` is not
    used because it tries a download first.
    """
    from mnist1d.data import get_dataset_args, make_dataset

    state = np.random.get_state()  # the generator reseeds numpy's global RNG
    try:
        data = make_dataset(get_dataset_args())
    finally:
        np.random.set_state(state)
    return _to_split(data["x"], data["y"], data["x_test"], data["y_test"], torch.int64)


# Ill-conditioned regression: the numbers that define it.
REGRESSION_FEATURES = 32
REGRESSION_TRAIN = 2048
REGRESSION_TEST = 1024
REGRESSION_SCALE_DECADES = 3.0  # feature scales from 1 down to 1e-3
REGRESSION_CORRELATION = 0.9  # neighbouring latent features correlate (rho^|i-j|)
REGRESSION_NOISE_STD = 0.1
REGRESSION_SEED = 1234


def regression_design(n_features: int = REGRESSION_FEATURES) -> tuple[np.ndarray, np.ndarray]:
    """Feature scales s and the latent covariance Sigma of the regression inputs.

    Inputs are x = z * s with z ~ N(0, Sigma), Sigma_ij = rho^|i-j|, and s
    log-spaced over ``REGRESSION_SCALE_DECADES`` decades, so the input
    covariance diag(s) Sigma diag(s) has a condition number of roughly
    10^(2 * decades) times cond(Sigma).
    """
    scales = np.logspace(0.0, -REGRESSION_SCALE_DECADES, n_features)
    index = np.arange(n_features)
    covariance = REGRESSION_CORRELATION ** np.abs(index[:, None] - index[None, :])
    return scales, covariance


@functools.lru_cache(maxsize=None)
def ill_conditioned_regression() -> Split:
    """Linear data y = x w* + noise whose features span orders of magnitude in scale.

    The true weights are w*_j = u_j / s_j, so every latent direction carries a
    comparable share of the signal: a method that ignores the small-scale
    features cannot fit the data. The signal is normalized to unit variance on
    the training set and the noise has standard deviation 0.1, so the best
    achievable mean squared error is about 0.01 * (1 - d / n).
    """
    rng = np.random.RandomState(REGRESSION_SEED)
    scales, covariance = regression_design()
    chol = np.linalg.cholesky(covariance)
    n_total = REGRESSION_TRAIN + REGRESSION_TEST
    latent = rng.standard_normal((n_total, REGRESSION_FEATURES)) @ chol.T
    inputs = latent * scales
    weights = rng.standard_normal(REGRESSION_FEATURES) / scales
    signal = inputs @ weights
    signal_std = signal[:REGRESSION_TRAIN].std()
    targets = signal / signal_std + REGRESSION_NOISE_STD * rng.standard_normal(n_total)
    targets = targets[:, None]
    return _to_split(
        inputs[:REGRESSION_TRAIN], targets[:REGRESSION_TRAIN],
        inputs[REGRESSION_TRAIN:], targets[REGRESSION_TRAIN:], torch.float32,
    )


# Token corpus of the language-model task: the numbers that define it.
CORPUS_TRAIN = 1024
CORPUS_TEST = 512
CORPUS_SEED = 7


@functools.lru_cache(maxsize=None)
def token_corpus() -> corpus.Corpus:
    """The grammar's sequences, training ones first (see :mod:`benchmarks.corpus`)."""
    return corpus.generate(CORPUS_TRAIN + CORPUS_TEST, CORPUS_SEED)


def next_tokens() -> Split:
    """Next-token prediction on the corpus: inputs ``[n, T]`` and targets ``[n, T]`` (shifted by one), int64.

    Targets keep the sequence layout, so ``nn.CrossEntropyLoss`` takes logits
    ``[n, vocabulary, T]`` and every position is a term of the mean.
    """
    tokens = torch.as_tensor(token_corpus().tokens)
    train, test = tokens[:CORPUS_TRAIN], tokens[CORPUS_TRAIN:]
    return Split(train[:, :-1].contiguous(), train[:, 1:].contiguous(),
                 test[:, :-1].contiguous(), test[:, 1:].contiguous())


# Held-out data sets (benchmarks/held_out.py): each split is fixed by its own seed, and features and
# regression targets are standardized with the training set's mean and standard deviation.
HELD_OUT_SPLIT_SEED = 0
HELD_OUT_TRAIN_FRACTION = 0.8


def _standardize(train: np.ndarray, test: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Both sets shifted and scaled by the training set's per-column mean and standard deviation."""
    mean, std = train.mean(axis=0), train.std(axis=0)
    std = np.where(std > 0, std, 1.0)
    return (train - mean) / std, (test - mean) / std


def _fixed_split(n: int) -> tuple[np.ndarray, np.ndarray]:
    order = np.random.RandomState(HELD_OUT_SPLIT_SEED).permutation(n)
    n_train = int(HELD_OUT_TRAIN_FRACTION * n)
    return order[:n_train], order[n_train:]


@functools.lru_cache(maxsize=None)
def breast_cancer() -> Split:
    """scikit-learn's breast-cancer data: 30 standardized features, label 1 for benign as a float
    column ``[n, 1]`` (the layout nn.BCEWithLogitsLoss takes with one logit); 455 train / 114 test."""
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer()
    train, test = _fixed_split(len(data.target))
    train_x, test_x = _standardize(data.data[train], data.data[test])
    labels = data.target.astype(np.float64)[:, None]
    return _to_split(train_x, labels[train], test_x, labels[test], torch.float32)


# Friedman #1 regression: the numbers that define it.
FRIEDMAN_SAMPLES = 2560  # 2048 train / 512 test
FRIEDMAN_FEATURES = 10  # the first 5 carry the signal, the others are noise
FRIEDMAN_NOISE_STD = 1.0
FRIEDMAN_SEED = 3


@functools.lru_cache(maxsize=None)
def friedman1() -> Split:
    """scikit-learn's make_friedman1: y = 10 sin(pi x1 x2) + 20 (x3 - 0.5)^2 + 10 x4 + 5 x5 + noise,
    x uniform on [0, 1]^10; inputs and target standardized, the target a column ``[n, 1]``."""
    from sklearn.datasets import make_friedman1

    inputs, targets = make_friedman1(n_samples=FRIEDMAN_SAMPLES, n_features=FRIEDMAN_FEATURES,
                                     noise=FRIEDMAN_NOISE_STD, random_state=FRIEDMAN_SEED)
    train, test = _fixed_split(FRIEDMAN_SAMPLES)
    train_x, test_x = _standardize(inputs[train], inputs[test])
    train_y, test_y = _standardize(targets[train, None], targets[test, None])
    return _to_split(train_x, train_y, test_x, test_y, torch.float32)


def friedman1_noise_floor() -> float:
    """The noise variance in the standardized target's units: no model's expected error is below it."""
    from sklearn.datasets import make_friedman1

    _, targets = make_friedman1(n_samples=FRIEDMAN_SAMPLES, n_features=FRIEDMAN_FEATURES,
                                noise=FRIEDMAN_NOISE_STD, random_state=FRIEDMAN_SEED)
    return FRIEDMAN_NOISE_STD ** 2 / targets[_fixed_split(FRIEDMAN_SAMPLES)[0]].var()


def mnist1d_sequences() -> Split:
    """mnist1d as one-channel sequences ``[n, 1, 40]`` for 1-D convolutions, same split as :func:`mnist1d`."""
    split = mnist1d()
    return Split(split.train_x[:, None, :], split.train_y, split.test_x[:, None, :], split.test_y)


# Many-class problem: the numbers that define it.
MANY_CLASSES = 20
MANY_CLASS_SAMPLES = 5000  # 4000 train / 1000 test
MANY_CLASS_FEATURES = 40
MANY_CLASS_INFORMATIVE = 30
MANY_CLASS_SEED = 5


@functools.lru_cache(maxsize=None)
def many_classes() -> Split:
    """scikit-learn's make_classification: 20 classes, 2 Gaussian clusters each on a 30-dimensional
    informative subspace, 40 features (5 redundant combinations, 5 noise), no flipped labels;
    standardized features."""
    from sklearn.datasets import make_classification

    inputs, labels = make_classification(
        n_samples=MANY_CLASS_SAMPLES, n_features=MANY_CLASS_FEATURES, n_informative=MANY_CLASS_INFORMATIVE,
        n_redundant=5, n_classes=MANY_CLASSES, n_clusters_per_class=2, flip_y=0.0,
        random_state=MANY_CLASS_SEED)
    train, test = _fixed_split(MANY_CLASS_SAMPLES)
    train_x, test_x = _standardize(inputs[train], inputs[test])
    return _to_split(train_x, labels[train], test_x, labels[test], torch.int64)
