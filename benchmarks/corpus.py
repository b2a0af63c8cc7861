"""A synthetic token corpus with long-range structure, for the language-model task.

Every sequence is ``SEQUENCE_LENGTH + 1`` tokens drawn left to right by a
seeded stochastic grammar (the model reads tokens ``0..T-1`` and predicts
``1..T``):

* token 0 is ``BOS``; tokens ``1..KEY_LENGTH`` are the *key*, words drawn
  uniformly (with replacement);
* after that, each position is one of four moves, drawn with the weights in
  ``MOVE_WEIGHTS`` among the moves the position allows (renormalized):

  - ``open``: one of ``BRACKET_TYPES`` opening brackets, uniformly; allowed
    while the nesting depth is below ``MAX_DEPTH`` and there is room left to
    close every bracket;
  - ``close``: the closing bracket *matching the innermost open one*; allowed
    when a bracket is open, and forced once the positions left equal the depth;
  - ``recall``: the token ``RECALL`` followed by a copy of the key; allowed
    where the copy and every pending close still fit;
  - ``word``: a word drawn from a first-order Markov chain over the words whose
    state is the last word emitted anywhere before (key and copies included),
    so brackets in between do not reset it; each word has ``SUCCESSORS``
    possible successors with Dirichlet(1) weights.

So every sequence is balanced with properly nested, type-matched brackets of
depth at most ``MAX_DEPTH``, and every ``RECALL`` is followed by the key. The
type of a closing bracket, the copied key and the word after a bracket depend
on tokens arbitrarily far back: a model that sees only the current token (or
the current token and its position) cannot predict them, attention can.

The generator also returns the log-probability of every target token given
its whole history under the grammar itself, so the mean negative of it is the
cross-entropy of the Bayes-optimal predictor: no model can do better in
expectation over fresh data.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass

import numpy as np

SEQUENCE_LENGTH = 32  # tokens the model reads (and predicts) per sequence
KEY_LENGTH = 3
BRACKET_TYPES = 4
MAX_DEPTH = 4
WORDS = 32
SUCCESSORS = 4  # nonzero entries per row of the word transition matrix

BOS = 0
RECALL = 1
FIRST_OPEN = 2
FIRST_CLOSE = FIRST_OPEN + BRACKET_TYPES
FIRST_WORD = FIRST_CLOSE + BRACKET_TYPES
VOCABULARY = FIRST_WORD + WORDS  # 42 tokens

MOVES = ("open", "close", "recall", "word")
MOVE_WEIGHTS = np.array([0.15, 0.20, 0.06, 0.59])  # in the order of MOVES


@dataclass(frozen=True)
class Corpus:
    """Sequences ``tokens [n, SEQUENCE_LENGTH + 1]`` (int64), the per-target log-probabilities
    ``log_prob [n, SEQUENCE_LENGTH]`` of tokens ``1..T`` under the grammar, and its word chain."""

    tokens: np.ndarray
    log_prob: np.ndarray
    transitions: np.ndarray  # [WORDS, WORDS], row-stochastic

    @property
    def inputs(self) -> np.ndarray:
        return self.tokens[:, :-1]

    @property
    def targets(self) -> np.ndarray:
        return self.tokens[:, 1:]

    def optimal_cross_entropy(self) -> float:
        """Mean cross-entropy (nats per token) of the grammar's own next-token probabilities."""
        return float(-self.log_prob.mean())


def word_transitions(rng: np.random.Generator) -> np.ndarray:
    """A sparse row-stochastic matrix: ``SUCCESSORS`` distinct successors per word, Dirichlet(1) weights."""
    matrix = np.zeros((WORDS, WORDS))
    for word in range(WORDS):
        successors = rng.choice(WORDS, size=SUCCESSORS, replace=False)
        matrix[word, successors] = rng.dirichlet(np.ones(SUCCESSORS))
    return matrix


def allowed_moves(depth: int, left: int) -> np.ndarray:
    """Which of MOVES fit when ``left`` tokens (this one included) remain at nesting ``depth``."""
    if depth > 0 and left == depth:
        return np.array([False, True, False, False])  # only the pending closes still fit
    return np.array([
        depth < MAX_DEPTH and left >= depth + 2,  # the new bracket must be closable too
        depth > 0,
        left >= depth + 1 + KEY_LENGTH,
        left >= depth + 1,
    ])


Sampler = tuple[list[int], list[float], list[float]]  # outcomes, cumulative chances, log chances


def sampler(weights: np.ndarray) -> Sampler:
    """The outcomes of nonzero weight with their normalized chances, as lists for fast draws."""
    outcomes = np.flatnonzero(weights)
    chances = weights[outcomes] / weights[outcomes].sum()
    return outcomes.tolist(), np.cumsum(chances).tolist(), np.log(chances).tolist()


def move_table(total: int) -> dict[tuple[int, int], Sampler]:
    """Per (depth, tokens left): a sampler over the indices of the allowed MOVES."""
    return {(depth, left): sampler(MOVE_WEIGHTS * allowed_moves(depth, left))
            for depth in range(MAX_DEPTH + 1) for left in range(max(depth, 1), total + 1)}


def _pick(cumulative: list[float], draw: float) -> int:
    """Inverse-CDF draw: the first index whose cumulative chance exceeds ``draw`` (rounding-safe)."""
    return min(bisect.bisect_right(cumulative, draw), len(cumulative) - 1)


def _sequence(key: list[int], draws: list[list[float]], moves: dict[tuple[int, int], Sampler],
              words: list[Sampler]) -> tuple[list[int], list[float]]:
    """One sequence from its key and its uniform draws ``[positions][3]`` (move, bracket, word);
    ``words[state]`` draws the successor of word ``state``."""
    total = SEQUENCE_LENGTH + 1
    tokens = [BOS] + [FIRST_WORD + word for word in key]
    log_prob = [-math.log(WORDS)] * KEY_LENGTH
    stack: list[int] = []
    state = key[-1]
    while len(tokens) < total:
        position = len(tokens)
        allowed, cumulative, log_chances = moves[len(stack), total - position]
        pick = _pick(cumulative, draws[position][0])
        move, move_log_prob = MOVES[allowed[pick]], log_chances[pick]
        if move == "open":
            kind = min(int(draws[position][1] * BRACKET_TYPES), BRACKET_TYPES - 1)
            stack.append(kind)
            tokens.append(FIRST_OPEN + kind)
            log_prob.append(move_log_prob - math.log(BRACKET_TYPES))
        elif move == "close":
            tokens.append(FIRST_CLOSE + stack.pop())
            log_prob.append(move_log_prob)
        elif move == "recall":
            tokens += [RECALL] + [FIRST_WORD + word for word in key]
            log_prob += [move_log_prob] + [0.0] * KEY_LENGTH  # the copy is certain
            state = key[-1]
        else:
            successors, cumulative, log_chances = words[state]
            pick = _pick(cumulative, draws[position][2])
            state = successors[pick]
            tokens.append(FIRST_WORD + state)
            log_prob.append(move_log_prob + log_chances[pick])
    return tokens, log_prob


def generate(n_sequences: int, seed: int) -> Corpus:
    """``n_sequences`` sequences of the grammar; the word chain and the draws both come from ``seed``."""
    if n_sequences < 1:
        raise ValueError(f"n_sequences must be at least 1, got {n_sequences}")
    rng = np.random.default_rng(seed)
    transitions = word_transitions(rng)
    keys = rng.integers(WORDS, size=(n_sequences, KEY_LENGTH)).tolist()
    draws = rng.random((n_sequences, SEQUENCE_LENGTH + 1, 3)).tolist()
    moves = move_table(SEQUENCE_LENGTH + 1)
    words = [sampler(row) for row in transitions]
    tokens = np.empty((n_sequences, SEQUENCE_LENGTH + 1), dtype=np.int64)
    log_prob = np.empty((n_sequences, SEQUENCE_LENGTH))
    for index in range(n_sequences):
        row, row_log_prob = _sequence(keys[index], draws[index], moves, words)
        tokens[index] = row
        log_prob[index] = row_log_prob
    return Corpus(tokens, log_prob, transitions)
