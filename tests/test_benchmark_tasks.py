"""Tests of the language-model and residual-CNN benchmark tasks and of the curvature rows.

The corpus checks compare the generated sequences with what the docstring of
benchmarks/corpus.py says about them, with Pearson's chi-square test from
scipy.stats for the stated probabilities; the model checks use definitions
(causal masking) and ngopt's public diagnostics; the short runs go through
the harness as ``python -m benchmarks --quick`` does, with fewer steps, one
thread and the first examples of each data set, so that each takes seconds.
"""

from __future__ import annotations

import csv
import json
import math
import runpy
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch
from scipy import stats
from torch import nn

import ngopt
from benchmarks import corpus, datasets
from benchmarks.cli import main
from benchmarks.optimizers import (DEFAULT_OPTIMIZERS, OPTIMIZERS, resolve_optimizers,
                                   with_natural_gradient_options)
from benchmarks.evaluation import accuracy
from benchmarks.tasks import TASKS, CausalSelfAttention, corpus_transformer, digits_resnet

NEW_TASKS = ["corpus_transformer", "digits_resnet"]
P_FLOOR = 1e-3  # chi-square p-values below this would mean the stated probabilities are wrong


def parse(sequence):
    """Walk one sequence as the corpus docstring describes it.

    Yields (position, move, depth, tokens left, chain state) for every token
    after the key that a move produced; the tokens copied after RECALL are
    checked here and not yielded. Raises AssertionError on anything the
    docstring rules out.
    """
    tokens = [int(token) for token in sequence]
    total = len(tokens)
    assert tokens[0] == corpus.BOS
    key = tokens[1:1 + corpus.KEY_LENGTH]
    assert all(corpus.FIRST_WORD <= token < corpus.VOCABULARY for token in key)
    stack, state, position = [], key[-1] - corpus.FIRST_WORD, 1 + corpus.KEY_LENGTH
    while position < total:
        token, left = tokens[position], total - position
        if corpus.FIRST_OPEN <= token < corpus.FIRST_CLOSE:
            yield position, "open", len(stack), left, state
            stack.append(token - corpus.FIRST_OPEN)
            assert len(stack) <= corpus.MAX_DEPTH
        elif corpus.FIRST_CLOSE <= token < corpus.FIRST_WORD:
            yield position, "close", len(stack), left, state
            assert stack and stack.pop() == token - corpus.FIRST_CLOSE  # matches the innermost open
        elif token == corpus.RECALL:
            yield position, "recall", len(stack), left, state
            copy = tokens[position + 1:position + 1 + corpus.KEY_LENGTH]
            assert copy == key
            position += corpus.KEY_LENGTH
            state = key[-1] - corpus.FIRST_WORD
        else:
            assert corpus.FIRST_WORD <= token < corpus.VOCABULARY
            yield position, "word", len(stack), left, state
            state = token - corpus.FIRST_WORD
        position += 1
    assert position == total and not stack  # balanced: every bracket closed by the end


def moves_of(sequences):
    return [event for sequence in sequences for event in parse(sequence)]


@pytest.fixture(scope="module")
def data():
    return datasets.token_corpus()


@pytest.fixture(scope="module")
def events(data):
    return moves_of(data.tokens)


def test_corpus_is_deterministic_under_its_seed():
    first, again, other = corpus.generate(40, seed=3), corpus.generate(40, seed=3), corpus.generate(40, seed=4)
    np.testing.assert_array_equal(first.tokens, again.tokens)
    np.testing.assert_array_equal(first.log_prob, again.log_prob)
    assert not np.array_equal(first.tokens, other.tokens)
    with pytest.raises(ValueError, match="n_sequences"):
        corpus.generate(0, seed=3)


def test_next_token_split_has_the_stated_shapes():
    split = datasets.next_tokens()
    length = corpus.SEQUENCE_LENGTH
    assert tuple(split.train_x.shape) == (datasets.CORPUS_TRAIN, length) == tuple(split.train_y.shape)
    assert tuple(split.test_x.shape) == (datasets.CORPUS_TEST, length) == tuple(split.test_y.shape)
    assert split.train_x.dtype == split.train_y.dtype == torch.int64
    # targets are the inputs shifted by one position
    assert torch.equal(split.train_y[:, :-1], split.train_x[:, 1:])
    assert torch.equal(split.test_y[:, :-1], split.test_x[:, 1:])
    assert int(split.train_x.min()) == corpus.BOS and int(split.train_y.max()) < corpus.VOCABULARY
    assert torch.equal(datasets.next_tokens().train_x, split.train_x)  # same data on every call


def test_every_sequence_is_balanced_and_recalls_its_key(data, events):
    # parse() asserts nesting, type matching, depth, balance and the copies; here: the structure is common
    moves = [move for _, move, *_ in events]
    counts = {move: moves.count(move) for move in corpus.MOVES}
    assert counts["open"] == counts["close"] > len(data.tokens)  # more than one bracket pair per sequence
    recalls = (data.tokens == corpus.RECALL).any(axis=1).mean()
    assert recalls > 0.3
    deep = sum(1 for _, move, depth, *_ in events if move == "open" and depth >= 2)
    assert deep > 0.05 * counts["open"]  # nested brackets, so matching needs more than the last open


def test_moves_follow_their_weights_where_all_are_allowed(events):
    # all four moves allowed: 0 < depth < MAX_DEPTH and room for a copy plus the pending closes
    free = [move for _, move, depth, left, _ in events
            if 0 < depth < corpus.MAX_DEPTH and left >= depth + 2 + corpus.KEY_LENGTH]
    observed = np.array([free.count(move) for move in corpus.MOVES])
    expected = corpus.MOVE_WEIGHTS / corpus.MOVE_WEIGHTS.sum() * len(free)
    assert stats.chisquare(observed, expected).pvalue > P_FLOOR  # Pearson's chi-square (scipy.stats)
    # at depth 0 no close is possible; the other weights are renormalized
    top = [move for _, move, depth, left, _ in events if depth == 0 and left >= 2 + corpus.KEY_LENGTH]
    observed = np.array([top.count(move) for move in ("open", "recall", "word")])
    weights = corpus.MOVE_WEIGHTS[[0, 2, 3]]
    assert top.count("close") == 0
    assert stats.chisquare(observed, weights / weights.sum() * len(top)).pvalue > P_FLOOR


def test_bracket_types_and_keys_are_uniform(data, events):
    opens = [int(data.tokens[index][position]) for index, sequence in enumerate(data.tokens)
             for position, move, *_ in parse(sequence) if move == "open"]
    kinds = np.bincount(np.array(opens) - corpus.FIRST_OPEN, minlength=corpus.BRACKET_TYPES)
    assert stats.chisquare(kinds).pvalue > P_FLOOR  # equal expected counts by default
    keys = data.tokens[:, 1:1 + corpus.KEY_LENGTH].ravel() - corpus.FIRST_WORD
    assert stats.chisquare(np.bincount(keys, minlength=corpus.WORDS)).pvalue > P_FLOOR


def test_words_follow_the_markov_chain_across_brackets(data):
    transitions = data.transitions
    np.testing.assert_allclose(transitions.sum(axis=1), 1.0, rtol=1e-12)
    assert ((transitions > 0).sum(axis=1) == corpus.SUCCESSORS).all()
    counts = np.zeros_like(transitions)
    for sequence in data.tokens:
        for position, move, _, _, state in parse(sequence):
            if move == "word":
                counts[state, sequence[position] - corpus.FIRST_WORD] += 1
    assert counts[transitions == 0].sum() == 0  # no word outside its state's successors
    p_values = []
    for state in range(corpus.WORDS):
        support = transitions[state] > 0
        if counts[state].sum() >= 50:  # enough draws for the chi-square approximation
            observed = counts[state, support]
            p_values.append(stats.chisquare(observed, transitions[state, support] * observed.sum()).pvalue)
    assert len(p_values) >= corpus.WORDS // 2
    assert min(p_values) > P_FLOOR / len(p_values)  # Bonferroni over the states tested


def test_log_probabilities_are_the_grammar_chances(data):
    # Recompute every target's chance from the docstring's rules alone and compare.
    weight = dict(zip(corpus.MOVES, corpus.MOVE_WEIGHTS))
    for sequence, log_prob in zip(data.tokens[:300], data.log_prob[:300]):
        expected = np.full(len(sequence) - 1, np.nan)
        expected[:corpus.KEY_LENGTH] = -math.log(corpus.WORDS)
        for position, move, depth, left, state in parse(sequence):
            if depth > 0 and left == depth:
                allowed = {"close"}
            else:
                allowed = {name for name, fits in [
                    ("open", depth < corpus.MAX_DEPTH and left >= depth + 2), ("close", depth > 0),
                    ("recall", left >= depth + 1 + corpus.KEY_LENGTH), ("word", left >= depth + 1)] if fits}
            chance = weight[move] / sum(weight[name] for name in allowed)
            if move == "open":
                chance /= corpus.BRACKET_TYPES
            elif move == "word":
                chance *= data.transitions[state, sequence[position] - corpus.FIRST_WORD]
            elif move == "recall":
                expected[position:position + corpus.KEY_LENGTH] = 0.0  # the copy is certain
            expected[position - 1] = math.log(chance)
        np.testing.assert_allclose(log_prob, expected, rtol=1e-12, atol=1e-12)


def test_optimal_loss_is_below_every_predictor_on_fresh_data(data):
    # Gibbs' inequality (Cover & Thomas, Elements of Information Theory, thm 2.6.3): on fresh data no
    # predictor beats the true conditional probabilities in expected log-loss. Here a smoothed
    # (token, position) model fitted on the training sequences, scored on the test sequences.
    train, test = datasets.CORPUS_TRAIN, slice(datasets.CORPUS_TRAIN, None)
    length, vocabulary = corpus.SEQUENCE_LENGTH, corpus.VOCABULARY
    counts = np.ones((vocabulary, length, vocabulary))  # add-one smoothing
    positions = np.broadcast_to(np.arange(length), data.inputs[:train].shape)
    np.add.at(counts, (data.inputs[:train], positions, data.targets[:train]), 1)
    model = counts / counts.sum(axis=2, keepdims=True)
    positions = np.broadcast_to(np.arange(length), data.inputs[test].shape)
    context_free = -np.log(model[data.inputs[test], positions, data.targets[test]]).mean()
    floor = -data.log_prob[test].mean()
    assert floor < context_free - 0.3  # long-range structure carries a good part of the information
    assert data.optimal_cross_entropy() == pytest.approx(-data.log_prob.mean())


def test_transformer_is_causal_and_returns_class_dim_one_logits():
    torch.manual_seed(0)
    model = corpus_transformer().eval()
    tokens = datasets.next_tokens().train_x[:3]
    logits = model(tokens)
    assert tuple(logits.shape) == (3, corpus.VOCABULARY, corpus.SEQUENCE_LENGTH)
    changed = tokens.clone()
    changed[:, 10] = (changed[:, 10] + 1) % corpus.VOCABULARY
    other = model(changed)
    # causal masking (Vaswani et al., NeurIPS 2017, sec. 3.2.3): position t sees tokens 0..t only
    torch.testing.assert_close(other[:, :, :10], logits[:, :, :10], rtol=0, atol=0)
    assert not torch.allclose(other[:, :, 10:], logits[:, :, 10:])
    # nn.CrossEntropyLoss takes [N, C, T] logits with [N, T] targets (torch.nn docs): the mean over
    # every position equals the loss on the flattened [N*T, C] layout
    targets = datasets.next_tokens().train_y[:3]
    flat = nn.functional.cross_entropy(logits.transpose(1, 2).reshape(-1, corpus.VOCABULARY), targets.reshape(-1))
    torch.testing.assert_close(nn.CrossEntropyLoss()(logits, targets), flat)
    # accuracy over every position, as numpy counts it
    predicted = logits.detach().numpy().argmax(axis=1)
    assert accuracy(logits, targets) == pytest.approx(float((predicted == targets.numpy()).mean()))


def test_attention_is_the_masked_softmax_product():
    # Vaswani et al., NeurIPS 2017, eq. 1 and sec. 3.2.3, written out in float64 from the module's weights
    torch.manual_seed(0)
    attention = CausalSelfAttention(width=8, heads=2).double()
    h = torch.randn(3, 5, 8, dtype=torch.float64)
    q, k, v = (layer(h).reshape(3, 5, 2, 4).transpose(1, 2)
               for layer in (attention.query, attention.key, attention.value))
    scores = q @ k.transpose(-2, -1) / math.sqrt(4)
    scores = scores.masked_fill(torch.ones(5, 5, dtype=torch.bool).triu(1), float("-inf"))
    mixed = (torch.softmax(scores, dim=-1) @ v).transpose(1, 2).reshape(3, 5, 8)
    torch.testing.assert_close(attention(h), attention.out(mixed), rtol=1e-10, atol=1e-12)
    with pytest.raises(ValueError, match="multiple of heads"):
        CausalSelfAttention(width=8, heads=3)


@pytest.mark.parametrize("task_name, build", [("corpus_transformer", corpus_transformer),
                                              ("digits_resnet", digits_resnet)])
def test_every_linear_and_convolution_gets_a_curvature_block(task_name, build):
    torch.manual_seed(0)
    model = build()
    layers = {name for name, module in model.named_modules() if type(module) in (nn.Linear, nn.Conv2d)}
    calls = {name: 0 for name in layers}
    for name, module in model.named_modules():
        if name in layers:
            module.register_forward_hook(lambda *_, name=name: calls.__setitem__(name, calls[name] + 1))
    split, loss_fn = TASKS[task_name].load_data(), TASKS[task_name].make_loss()
    # The fixed rule: the quadratic rule's own evaluations would run further forwards.
    optimizer = ngopt.FisherDescent(model, loss_fn, stats_interval=1, inverse_interval=1, step_rule="fixed",
                                    damping_rule="fixed")
    optimizer.zero_grad()
    loss_fn(model(split.train_x[:16]), split.train_y[:16]).backward()
    optimizer.step()
    assert set(calls.values()) == {1}  # every projection is called as a module, once per forward
    # API.md: diagnostics()["layers"] has one entry per curvature block
    assert layers <= set(optimizer.diagnostics()["layers"])
    expected = {"corpus_transformer": 6 * 2 + 1, "digits_resnet": 5 + 1}[task_name]
    assert len(layers) == expected


def test_resnet_shapes_and_batch_norm():
    torch.manual_seed(0)
    model = digits_resnet()
    images = datasets.digits_images().train_x[:7]
    assert tuple(model(images).shape) == (7, 10)
    norms = [module for module in model.modules() if isinstance(module, nn.BatchNorm2d)]
    assert len(norms) == 5
    # train mode updates the running statistics once per forward (torch.nn.BatchNorm2d documentation)
    assert all(int(norm.num_batches_tracked) == 1 for norm in norms)


CURVATURE_ROWS = ["fisher-descent", "fisher-descent-diag", "fisher-descent-ekfac", "fisher-descent-ekfac-gradient"]


@pytest.mark.parametrize("name", CURVATURE_ROWS)
def test_curvature_rows_build_their_curvature_untuned_like_the_headline_row(name):
    spec = OPTIMIZERS[name]
    optimizer = spec.build(nn.Linear(3, 2), nn.MSELoss(), None)
    assert isinstance(optimizer, ngopt.FisherDescent)
    assert optimizer.structure == {"fisher-descent": "kfac", "fisher-descent-diag": "diag",
                                   "fisher-descent-ekfac": "ekfac",
                                   "fisher-descent-ekfac-gradient": "ekfac-gradient"}[name]
    assert spec.lr_grid(3) == OPTIMIZERS["fisher-descent"].lr_grid(3) == [None]  # no lr grid: the library default


def test_curvature_rows_run_on_request_and_keep_their_curvature_under_overrides():
    # the untuned method and the tuned baselines by default; the curvature rows are extra
    assert [spec.name for spec in resolve_optimizers(None)] == list(DEFAULT_OPTIMIZERS) == [
        "fisher-descent", "sgd", "adam", "adamw-cosine", "muon"]
    assert [spec.name for spec in resolve_optimizers(["fisher-descent-diag", "sgd"])] == ["fisher-descent-diag", "sgd"]
    tuned = with_natural_gradient_options(OPTIMIZERS["fisher-descent-diag"], {"structure": "kfac", "momentum": 0.0})
    optimizer = tuned.build(nn.Linear(3, 2), nn.MSELoss(), 0.1)
    assert optimizer.structure == "diag" and optimizer.param_groups[0]["momentum"] == 0.0
    assert "structure='diag'" in tuned.label and "momentum=0.0" in tuned.label


def first_examples(load, n_train: int, n_test: int):
    """The task's own loader cut to its first examples: the same harness path at a fraction of the
    cost of evaluating the whole training set after every step."""
    def load_subset():
        split = load()
        return datasets.Split(split.train_x[:n_train], split.train_y[:n_train],
                              split.test_x[:n_test], split.test_y[:n_test])
    return load_subset


@pytest.mark.parametrize("task_name", NEW_TASKS)
def test_quick_run_of_the_new_task_with_every_row(task_name, tmp_path, monkeypatch):
    rows = ["sgd", "adam", "adamw-cosine", "fisher-descent", "fisher-descent-diag", "fisher-descent-ekfac"]
    rows += ["muon"] if hasattr(torch.optim, "Muon") else []
    task = TASKS[task_name]
    monkeypatch.setitem(TASKS, task_name, replace(task, load_data=first_examples(task.load_data, 256, 64)))
    steps = 3
    argv = ["--quick", "--tasks", task_name, "--optimizers", ",".join(rows), "--steps", str(steps),
            "--grid", "1", "--seeds", "1", "--threads", "1", "--out", str(tmp_path), "--no-progress"]
    assert main(argv) == 0
    entry = json.loads((tmp_path / "results.json").read_text())["tasks"][0]
    assert entry["task"] == task_name and entry["target_loss"] == TASKS[task_name].target_loss
    assert sorted(run["method"] for run in entry["runs"]) == sorted(rows)
    for run in entry["runs"]:
        assert run["steps_run"] == steps and not run["diverged"], run["method"]
        assert math.isfinite(run["final_train_loss"]) and 0 <= run["final_test_metric"] <= 1



# ---------------------------------------------------------------- task files (--task-file)

TASK_FILE = '''
import torch
from torch import nn

generator = torch.Generator().manual_seed(0)
x = torch.randn(256, 4, generator=generator)
y = (x[:, 0] + 0.5 * x[:, 1] > 0).long()
train_data = (x[:192], y[:192])
test_data = (x[192:], y[192:])
criterion = nn.CrossEntropyLoss()
batch_size = 64
steps = 8
EXTRA


def make_model():
    return nn.Sequential(nn.Linear(4, 8), nn.PReLU(8), nn.Linear(8, 2))
'''


def task_file(tmp_path, extra="", replace_text=None, name="my_problem.py"):
    text = TASK_FILE.replace("EXTRA", extra)
    for old, new in (replace_text or {}).items():
        assert old in text
        text = text.replace(old, new)
    path = tmp_path / name
    path.write_text(text)
    return path


def keys_of(results):
    entry = results["tasks"][0]
    return (set(results), set(entry), {key for run in entry["runs"] for key in run},
            {key for summary in entry["summary"].values() for key in summary})


def test_task_file_run_writes_the_files_of_a_builtin_task(tmp_path):
    rows = "fisher-descent,sgd,adam"
    tiny = ["--steps", "3", "--grid", "1", "--seeds", "2", "--optimizers", rows, "--no-progress"]
    mine = tmp_path / "mine"
    assert main(["--task-file", str(task_file(tmp_path, "target_loss = 0.4")), "--out", str(mine)] + tiny) == 0
    builtin = tmp_path / "builtin"
    assert main(["--tasks", "digits_mlp", "--out", str(builtin)] + tiny) == 0
    ours, theirs = (json.loads((folder / "results.json").read_text()) for folder in (mine, builtin))
    assert keys_of(ours) == keys_of(theirs)  # the same schema as a built-in task, field for field
    entry = ours["tasks"][0]
    assert entry["task"] == "my_problem" and entry["target_loss"] == 0.4 and entry["batch_size"] == 64
    assert entry["test_metric"] == "accuracy" and 0 <= entry["summary"]["fisher-descent"]["final_test_metric"] <= 1
    assert sorted(run["method"] for run in entry["runs"]) == sorted(rows.split(",") * 2)
    for name in ("curves.csv", "report.md"):
        assert (mine / name).read_text().splitlines()[0] == (builtin / name).read_text().splitlines()[0]
    assert (mine / "loss_my_problem.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    report = (mine / "report.md").read_text()
    assert "## Verdict" in report and "## my_problem" in report and "set in my_problem.py" in report


def test_task_file_report_gives_the_share_of_parameters_under_the_fallback_rule(tmp_path):
    out = tmp_path / "out"
    argv = ["--task-file", str(task_file(tmp_path, "target_loss = 0.4")), "--steps", "2", "--grid", "1",
            "--seeds", "1", "--optimizers", "fisher-descent", "--out", str(out), "--no-progress"]
    assert main(argv) == 0
    summary = json.loads((out / "results.json").read_text())["tasks"][0]["summary"]
    coverage = summary["fisher-descent"]["parameter_coverage"]
    # nn.PReLU has no curvature block (README: supported layers), so its 8 weights take the fallback rule;
    # the count by hand: Linear(4, 8) 40, PReLU(8) 8, Linear(8, 2) 18
    assert (coverage["parameters"], coverage["fallback_parameters"]) == (66, 8)
    assert coverage["fallback_tensors"] == ["1.weight"]
    assert "12.1% of the parameters (8 of 66)" in (out / "report.md").read_text()


def test_task_file_without_a_target_gets_one_from_a_pilot_run(tmp_path, capsys):
    from benchmarks.pilot import back_off

    # a tenth of the way back on a log scale: 0.01 * (1 / 0.01) ** 0.1 = 10 ** -1.8
    assert back_off(0.01, 1.0) == pytest.approx(10 ** -1.8, rel=1e-12)
    assert back_off(-2.0, 1.0) == pytest.approx(-1.7, rel=1e-12)  # linear where the loss is not positive
    out = tmp_path / "out"
    argv = ["--task-file", str(task_file(tmp_path)), "--steps", "6", "--grid", "1", "--seeds", "1",
            "--optimizers", "sgd,adam", "--out", str(out), "--no-progress"]
    assert main(argv) == 0
    entry = json.loads((out / "results.json").read_text())["tasks"][0]
    assert "pilot run" in entry["target_reason"] and "my_problem.py sets none" in entry["target_reason"]
    initial = entry["runs"][0]
    with (out / "curves.csv").open(newline="") as handle:
        start = [float(row["train_loss"]) for row in csv.DictReader(handle) if row["step"] == "0"]
    # same seed, same initial weights as the pilot: the target lies below the starting loss
    assert entry["target_loss"] < min(start) and f"{start[0]:.4g}" in entry["target_reason"]
    assert initial["final_train_loss"] is not None
    assert "proposing one from a pilot run" in capsys.readouterr().out


def test_task_file_data_may_be_a_dataset(tmp_path):
    from benchmarks.task_file import load_task_file

    path = task_file(tmp_path, "target_loss = 0.4\ntrain_data = torch.utils.data.TensorDataset(*train_data)")
    task = load_task_file(path)
    split = task.load_data()
    namespace = runpy.run_path(str(path))
    assert torch.equal(split.train_x, namespace["x"][:192]) and torch.equal(split.train_y, namespace["y"][:192])


BAD_TASK_FILES = [
    ({"def make_model():": "def build():"}, "defines no model factory: add `def make_model()"),
    ({"criterion = nn.CrossEntropyLoss()": "criterion = nn.functional.cross_entropy"},
     "criterion must be a torch.nn.Module instance .* got function .*plain function"),
    ({"criterion = nn.CrossEntropyLoss()": "criterion = nn.CrossEntropyLoss"}, "with parentheses"),
    ({"criterion = nn.CrossEntropyLoss()": "criterion = nn.MSELoss()"},
     r"MSELoss cannot compare the model's output \(shape \[4, 2\]\) and the targets \(shape \[4\], torch.int64\)"),
    # nn.MSELoss broadcasts [4, 1] against [4] with only a warning (torch.nn.MSELoss): an error here
    ({"criterion = nn.CrossEntropyLoss()": "criterion = nn.MSELoss()", ".long()": ".float()",
      "nn.Linear(8, 2))": "nn.Linear(8, 1))"},
     r"MSELoss does not fit the model's output \(shape \[4, 1\]\) and the targets \(shape \[4\]"),
    ({"nn.Linear(4, 8)": "nn.Linear(5, 8)"},
     r"the model does not accept the training inputs \(a batch of shape \[4, 4\]"),
    ({"nn.Linear(8, 2))": "nn.Linear(8, 2), nn.Flatten(0))"},
     r"CrossEntropyLoss cannot compare the model's output \(shape \[8\]\)"),
    ({"train_data = (x[:192], y[:192])": "train_data = (x[:192], y[:100])"},
     "train_data has 192 inputs but 100 targets"),
    ({"train_data = (x[:192], y[:192])": "train_dataset = (x, y)"}, "defines no train_data"),
    ({"steps = 8": "steps = 0"}, "steps must be a positive integer, got 0"),
    ({"batch_size = 64": ""}, "defines no batch_size"),
    ({"steps = 8": "steps = 8\ntarget_loss = 'low'"}, "target_loss must be a finite number"),
    ({"steps = 8": "steps = 8\nmetric = 'f1'"}, "metric must be one of accuracy, mse, loss"),
    ({"test_data = (x[192:], y[192:])": "test_data = (x[192:, :3], y[192:])"},
     r"test_data inputs have rows of shape \[3\], train_data inputs rows of shape \[4\]"),
    ({"steps = 8": "steps = 8\nundefined_name + 1"},  # the line after "steps = 8", counted from 1
     rf"running the file raised NameError \(line {TASK_FILE.splitlines().index('steps = 8') + 2}\)"),
]


@pytest.mark.parametrize("changes, message", BAD_TASK_FILES, ids=[m[:30] for _, m in BAD_TASK_FILES])
def test_each_bad_task_file_gets_its_own_message(tmp_path, changes, message):
    from benchmarks.task_file import TaskFileError, load_task_file

    with pytest.raises(TaskFileError, match=message):
        load_task_file(task_file(tmp_path, replace_text=changes))


def test_bad_task_file_stops_the_command_before_any_training(tmp_path, capsys):
    path = task_file(tmp_path, replace_text={"criterion = nn.CrossEntropyLoss()": "criterion = nn.MSELoss()"})
    with pytest.raises(SystemExit) as stopped:
        main(["--task-file", str(path), "--out", str(tmp_path / "out"), "--no-progress"])
    assert stopped.value.code == 2  # argparse's usage-error status, with the message
    assert "my_problem.py: MSELoss cannot compare" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()
    with pytest.raises(SystemExit):
        main(["--task-file", str(tmp_path / "missing.py")])
    assert "no such file" in capsys.readouterr().err


def test_example_task_file_loads_and_fits_its_shapes():
    from benchmarks.task_file import load_task_file

    task = load_task_file(Path(__file__).resolve().parent.parent / "examples" / "my_task.py")
    assert task.name == "my_task" and task.target_loss is not None and task.metric == "accuracy"
    assert task.quick_steps < task.steps
