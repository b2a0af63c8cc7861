"""Models as users bring them: ngopt beside AdamW on models built from transformers' and timm's configs.

Needs ``transformers`` and ``timm`` (no downloads: every model is built from a config with random
weights).  timm's torchvision pulls its own torch build, so install them into a separate environment
that still sees this checkout::

    python -m venv --system-site-packages /tmp/clients
    /tmp/clients/bin/pip install transformers timm
    PYTHONPATH=. /tmp/clients/bin/python scripts/client_models.py

For every model the script makes its own learnable data (token sequences from a fixed random Markov
chain, padded with the ignored label -100; images whose class sets a pattern under noise), trains a
copy with ``ngopt.FisherDescent`` at its defaults and a copy with ``torch.optim.AdamW(lr=1e-3)`` on the
same batches, in turns, and prints per model: the share of trainable parameters on the fallback rule
(from ``FisherDescent.curvature_assignment()``), the median step time of each and their ratio, and
the losses at the start, after the last step, over the last five steps (mean) and on held-out
data (the mean over ``HELD_OUT_BATCHES`` batches that neither optimizer trained on, in training mode as
the training batches were: batch norm on each batch's own moments, dropout on).  Language models
train through ``labels=`` (the loss computed inside the model), as their own training loops do.
Training batches of 8-16 examples make noisy measures, so ``--seeds 0,1,2`` repeats every model from
other initial weights and data and adds a summary: on how many seeds fisher-descent ends below AdamW by
each measure.  ``--device cuda`` trains both copies on a GPU, from the same batches (drawn on the CPU),
with each step timed after the device has finished it.
"""
from __future__ import annotations

import argparse
import copy
import json
import statistics
import os
import sys
import time
import warnings
from dataclasses import dataclass
from typing import Callable, List

import torch
from torch import nn

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # the checkout, not an install
import ngopt  # noqa: E402
from benchmarks.cli import parse_options, parse_seeds  # noqa: E402


# ----------------------------------------------------------------------------------------- data
def markov_tokens(vocab: int, batch: int, length: int, generator: torch.Generator, pad_fraction: float = 0.25):
    """Sequences from a fixed random Markov chain (each token has 4 likely successors), the last
    ``pad_fraction`` of some sequences labelled -100 (padding)."""
    transitions = torch.Generator().manual_seed(1234)
    successors = torch.randint(0, vocab, (vocab, 4), generator=transitions)
    tokens = torch.empty(batch, length, dtype=torch.long)
    tokens[:, 0] = torch.randint(0, vocab, (batch,), generator=generator)
    for t in range(1, length):
        choice = torch.randint(0, 4, (batch,), generator=generator)
        tokens[:, t] = successors[tokens[:, t - 1], choice]
    labels = tokens.clone()
    padded = torch.rand(batch, generator=generator) < 0.5
    cut = int(length * (1 - pad_fraction))
    labels[padded, cut:] = -100
    return tokens, labels


def pattern_images(classes: int, batch: int, size: int, generator: torch.Generator):
    """Images whose class picks one of ``classes`` fixed random patterns, under noise of equal size."""
    patterns = torch.randn(classes, 3, size, size, generator=torch.Generator().manual_seed(4321))
    labels = torch.randint(0, classes, (batch,), generator=generator)
    return patterns[labels] + torch.randn(batch, 3, size, size, generator=generator), labels


# ----------------------------------------------------------------------------------------- models
@dataclass
class Client:
    name: str
    build: Callable[[], nn.Module]
    batch: Callable[[torch.Generator], tuple]          # -> model inputs (kwargs) and the loss's labels
    loss: Callable[[nn.Module, dict], torch.Tensor]


def _lm_batch(vocab, batch=8, length=32):
    def make(generator):
        tokens, labels = markov_tokens(vocab, batch, length, generator)
        return {"input_ids": tokens, "labels": labels}
    return make


def _lm_loss(model, inputs):
    return model(**inputs).loss


def _image_batch(classes=10, batch=16, size=32):
    def make(generator):
        images, labels = pattern_images(classes, batch, size, generator)
        return {"images": images, "labels": labels}
    return make


def _image_loss(model, inputs):
    return nn.functional.cross_entropy(model(inputs["images"]), inputs["labels"])


def clients(vocab: int = 256) -> List[Client]:
    import timm
    from transformers import (BertConfig, BertForSequenceClassification, GPT2Config, GPT2LMHeadModel, LlamaConfig,
                              LlamaForCausalLM)

    def llama():
        return LlamaForCausalLM(LlamaConfig(vocab_size=vocab, hidden_size=64, intermediate_size=128,
                                            num_hidden_layers=2, num_attention_heads=4, num_key_value_heads=2,
                                            max_position_embeddings=64))

    def gpt2():
        return GPT2LMHeadModel(GPT2Config(vocab_size=vocab, n_positions=64, n_embd=64, n_layer=2, n_head=4,
                                          bos_token_id=0, eos_token_id=0))

    def bert():
        return BertForSequenceClassification(BertConfig(vocab_size=vocab, hidden_size=64, num_hidden_layers=2,
                                                        num_attention_heads=4, intermediate_size=128,
                                                        max_position_embeddings=64, num_labels=3))

    def bert_batch(generator):
        tokens, _ = markov_tokens(vocab, 8, 32, generator, pad_fraction=0.0)
        return {"input_ids": tokens, "labels": tokens[:, 0] % 3}

    def image_model(name, **options):
        return lambda: timm.create_model(name, pretrained=False, num_classes=10, **options)

    return [
        Client("llama (causal LM, labels=)", llama, _lm_batch(vocab), _lm_loss),
        Client("gpt2 (causal LM, tied head)", gpt2, _lm_batch(vocab), _lm_loss),
        Client("bert (classifier, labels=)", bert, bert_batch, _lm_loss),
        Client("timm resnet18", image_model("resnet18"), _image_batch(), _image_loss),
        Client("timm vit_tiny", image_model("vit_tiny_patch16_224", img_size=32, patch_size=4), _image_batch(),
               _image_loss),
        Client("timm convnext_atto", image_model("convnext_atto"), _image_batch(), _image_loss),
        Client("timm efficientnet_b0", image_model("efficientnet_b0"), _image_batch(), _image_loss),
        Client("timm mobilenetv3_small", image_model("mobilenetv3_small_100"), _image_batch(), _image_loss),
    ]


# ----------------------------------------------------------------------------------------- the run
# Held-out batches per model: one batch of 8-16 examples is a noisy measure; the mean over eight independent
# batches has sqrt(8), about 2.8 times, less spread from the draw of examples.
HELD_OUT_BATCHES = 8


def fallback_share(opt: ngopt.FisherDescent, model: nn.Module) -> tuple:
    numel = {name: p.numel() for name, p in model.named_parameters() if p.requires_grad}
    assignment = opt.curvature_assignment()
    fallback = {name: entry.reason for name, entry in assignment.items() if entry.fallback}
    count = sum(numel.get(name, 0) for name in fallback)
    return count / sum(numel.values()), fallback


def on_device(inputs: dict, device: torch.device) -> dict:
    return {key: value.to(device) for key, value in inputs.items()}


def synchronize(device: torch.device) -> None:
    """Wait for the device's queued work, so a step's time is its own (a no-op on the CPU)."""
    if device.type == "cuda":
        torch.cuda.synchronize(device)


def train_side_by_side(client: Client, steps: int, seed: int, options: dict,
                       device: torch.device = torch.device("cpu")) -> dict:
    torch.manual_seed(seed)
    base = client.build().to(device)
    base.train()
    models = {"fisher-descent": base, "adamw": copy.deepcopy(base)}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        optimizers = {"fisher-descent": ngopt.FisherDescent(models["fisher-descent"], **options),
                      "adamw": torch.optim.AdamW(models["adamw"].parameters(), lr=1e-3)}
    generator = torch.Generator().manual_seed(seed + 1)
    # drawn on the CPU, so every device trains on the same batches
    batches = [on_device(client.batch(generator), device) for _ in range(steps)]
    held_out_generator = torch.Generator().manual_seed(seed + 2)
    held_out = [on_device(client.batch(held_out_generator), device) for _ in range(HELD_OUT_BATCHES)]
    losses = {name: [] for name in models}
    seconds = {name: [] for name in models}
    for step, inputs in enumerate(batches):
        for name in models:  # in turns: the machine's speed drifts alike for both
            model, opt = models[name], optimizers[name]
            synchronize(device)
            started = time.perf_counter()
            with warnings.catch_warnings(record=True) as more:
                warnings.simplefilter("always")
                opt.zero_grad()
                loss = client.loss(model, inputs)
                loss.backward()
                opt.step()
            synchronize(device)
            seconds[name].append(time.perf_counter() - started)
            losses[name].append(float(loss.detach()))
            caught.extend(more)
    evaluated = {}
    for name, model in models.items():
        with torch.no_grad():  # in training mode, as the training batches were
            evaluated[name] = statistics.fmean(float(client.loss(model, inputs)) for inputs in held_out)
    share, reasons = fallback_share(optimizers["fisher-descent"], models["fisher-descent"])
    step = {name: statistics.median(values[1:]) for name, values in seconds.items()}
    return {"model": client.name, "seed": seed, "parameters": sum(p.numel() for p in base.parameters()),
            "fallback_share": share, "fallback": reasons,
            "first_loss": losses["fisher-descent"][0], "fisher_descent_loss": losses["fisher-descent"][-1],
            "adamw_loss": losses["adamw"][-1],
            # one batch's loss is noisy (small batches, batch norm): the mean of the last five as well
            "fisher_descent_last5": statistics.fmean(losses["fisher-descent"][-5:]),
            "adamw_last5": statistics.fmean(losses["adamw"][-5:]),
            "fisher_descent_held_out": evaluated["fisher-descent"], "adamw_held_out": evaluated["adamw"],
            "fisher_descent_step_ms": 1e3 * step["fisher-descent"], "adamw_step_ms": 1e3 * step["adamw"],
            "step_ratio": step["fisher-descent"] / step["adamw"],
            "skipped": optimizers["fisher-descent"].diagnostics()["skipped_steps"],
            "warnings": sorted({str(w.message)[:160] for w in caught})}


MEASURES = (("last batch", "fisher_descent_loss", "adamw_loss"),
            ("last five", "fisher_descent_last5", "adamw_last5"),
            ("held-out", "fisher_descent_held_out", "adamw_held_out"))


def summary(rows: List[dict]) -> str:
    """Per model, over its seeds: how often fisher-descent ended below AdamW by each measure."""
    header = ("| model | seeds | fisher-descent below AdamW: " + " / ".join(name for name, _, _ in MEASURES)
              + " | median step ratio |")
    lines = [header, "|---|---|---|---|"]
    for model in dict.fromkeys(r["model"] for r in rows):  # first-seen order
        mine = [r for r in rows if r["model"] == model]
        below = [sum(r[ours] < r[theirs] for r in mine) for _, ours, theirs in MEASURES]
        lines.append(f"| {model} | {', '.join(str(r['seed']) for r in mine)} | "
                     + " / ".join(f"{k} of {len(mine)}" for k in below)
                     + f" | {statistics.median(r['step_ratio'] for r in mine):.2f} |")
    return "\n".join(lines)


def table(rows: List[dict]) -> str:
    header = ("| model | parameters | on fallback | loss at start | fisher-descent after | AdamW after "
              "| last 5 batches fisher-descent / AdamW | held-out fisher-descent / AdamW "
              "| step ms fisher-descent / AdamW (ratio) |")
    lines = [header, "|" + "---|" * 9]
    several = len({r["seed"] for r in rows}) > 1
    for r in rows:
        name = f"{r['model']}, seed {r['seed']}" if several else r["model"]
        lines.append(f"| {name} | {r['parameters']:,} | {100 * r['fallback_share']:.2f}% | {r['first_loss']:.3f} | "
                     f"{r['fisher_descent_loss']:.3f} | {r['adamw_loss']:.3f} | {r['fisher_descent_last5']:.3f} / "
                     f"{r['adamw_last5']:.3f} | {r['fisher_descent_held_out']:.3f} / "
                     f"{r['adamw_held_out']:.3f} | {r['fisher_descent_step_ms']:.0f} / {r['adamw_step_ms']:.0f} "
                     f"({r['step_ratio']:.2f}) |")
    return "\n".join(lines)


def argument_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--steps", type=int, default=30, help="training steps per model (default 30)")
    parser.add_argument("--seeds", default="1", help="a count N (seeds 0..N-1) or a comma-separated list "
                                                     "(default 1: seed 0)")
    parser.add_argument("--only", nargs="*", default=None, help="substrings of the model names to run")
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's)")
    parser.add_argument("--device", default="cpu", help="where the models train, e.g. cuda (default cpu)")
    parser.add_argument("--json", default=None, help="also write the rows to this file")
    parser.add_argument("--option", action="append", help="a FisherDescent option KEY=VALUE (repeatable)")
    return parser


def main(argv=None) -> int:
    parser = argument_parser()
    args = parser.parse_args(argv)
    try:
        seeds = parse_seeds(args.seeds)
    except ValueError as error:
        parser.error(f"--seeds: {error}")
    if args.threads:
        torch.set_num_threads(args.threads)
    try:
        device = torch.device(args.device)
    except RuntimeError as error:
        parser.error(f"--device: {error}")
    if device.type == "cuda" and not torch.cuda.is_available():
        parser.error("--device: cuda asked for, but torch sees no CUDA device")
    try:
        chosen = clients()
    except ImportError as error:
        print(f"needs transformers and timm ({error}); see this script's docstring", file=sys.stderr)
        return 2
    if args.only:
        chosen = [c for c in chosen if any(s in c.name for s in args.only)]
    rows = []
    for client, seed in ((client, seed) for client in chosen for seed in seeds):
        row = train_side_by_side(client, args.steps, seed, parse_options(args.option or []), device)
        rows.append(row)
        print(f"{row['model']} (seed {seed}): fallback {100 * row['fallback_share']:.2f}%, "
              f"losses {row['first_loss']:.3f} -> fisher-descent {row['fisher_descent_loss']:.3f} / "
              f"AdamW {row['adamw_loss']:.3f}, "
              f"step ratio {row['step_ratio']:.2f}",
              flush=True)
        for name, why in row["fallback"].items():
            print(f"    fallback: {name}: {why}")
        for message in row["warnings"]:
            print(f"    warning: {message}")
    print()
    where = torch.cuda.get_device_name(device) if device.type == "cuda" else f"{torch.get_num_threads()} threads"
    print(f"torch {torch.__version__}, {args.steps} steps, seeds {', '.join(map(str, seeds))}, "
          f"{where}, options {args.option or 'defaults'}")
    print(table(rows))
    if len(seeds) > 1:
        print()
        print(summary(rows))
    if args.json:
        with open(args.json, "w") as handle:
            json.dump(rows, handle, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
