"""nn.MultiheadAttention and the torch transformer layers built on it, against torch itself and torch.func.

References: torch's own ``nn.MultiheadAttention`` (the capture must not change what it computes:
outputs and gradients compared bit for bit within this process, same operations on the same
thread count); the exact per-layer Fisher by ``torch.func.jacrev`` of the whole batch
(``test_reference_layers.exact_fisher``, Martens & Grosse 2015, sec. 9) for every projection block.
Treatment of positions: "expand" (Eschenhagen et al., NeurIPS 2023, sec. 3).

Measured numbers (``python -m pytest tests/test_reference_attention.py -s`` prints them).
"""
from __future__ import annotations

import copy
import warnings

import pytest
import torch
from torch import nn

import ngopt
from test_reference_blocks import EXACT_RTOL, recorded_optimizer, relative_error
from test_reference_layers import check_eigenbasis_against_exact, exact_fisher

E, HEADS, L, S, N = 8, 2, 3, 4, 5


class Attention(nn.Module):
    """``x [N, L + S, d]`` -> attention output ``[N, L, E]``: queries from the first ``L`` positions.

    ``mode``: "self" (query is key is value), "kv" (cross-attention, key is value: the packed
    weight's query rows and key/value rows see different inputs), "qkv" (three different tensors;
    with ``kdim``/``vdim`` the separate weights).
    """

    def __init__(self, mode="self", batch_first=True, need_weights=False, masks=False, **options):
        super().__init__()
        self.attention = nn.MultiheadAttention(E, HEADS, batch_first=batch_first, **options)
        self.mode, self.batch_first, self.need_weights, self.masks = mode, batch_first, need_weights, masks
        self.kdim, self.vdim = options.get("kdim", E), options.get("vdim", E)

    def forward(self, x):
        if self.mode == "self":
            query = key = value = x[:, :L]
        else:
            query, memory = x[:, :L], x[:, L:]
            key = value = memory
            if self.mode == "qkv":
                key, value = memory[..., :self.kdim], memory.flip(1)[..., -self.vdim:]
        sources = key.shape[1]
        if not self.batch_first:
            query, key, value = (t.transpose(0, 1) for t in (query, key, value))
            if self.mode == "self":
                key = value = query
            elif self.mode == "kv":
                value = key
        options = {}
        if self.masks:
            options["attn_mask"] = torch.triu(torch.ones(L, sources, dtype=torch.bool), 1)
            options["key_padding_mask"] = torch.arange(sources).expand(len(x), -1) >= sources - (
                torch.arange(len(x)) % 2).unsqueeze(1)  # every other example pads its last position
        output, weights = self.attention(query, key, value, need_weights=self.need_weights, **options)
        self.weights = weights
        return output if self.batch_first else output.transpose(0, 1)


def attention_inputs(seed=80, width=E):
    generator = torch.Generator().manual_seed(seed)
    return torch.randn(N, L + S, width, generator=generator, dtype=torch.float64)


def forward_backward(model, inputs, seed=81):
    """Output and parameter gradients of ``sum(output^2)`` (+ the attention weights when returned)."""
    torch.manual_seed(seed)  # dropout draws the same masks in both runs
    output = model(inputs)
    loss = output.square().sum() + (0.0 if model.weights is None else model.weights.square().sum())
    loss.backward()
    return output.detach(), {name: p.grad.clone() for name, p in model.named_parameters() if p.grad is not None}


def quiet_optimizer(model, loss_fn=None, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ngopt.FisherDescent(model, loss_fn or nn.MSELoss(), stats_interval=1, inverse_interval=1, **options)


ATTENTION_SETTINGS = {
    "self": dict(mode="self"),
    "self-seq-first-masks-weights": dict(mode="self", batch_first=False, masks=True, need_weights=True),
    "self-causal-masks-dropout": dict(mode="self", masks=True, dropout=0.3),
    "kv-cross": dict(mode="kv", masks=True),
    "kv-cross-seq-first-weights": dict(mode="kv", batch_first=False, need_weights=True),
    "qkv-separate-tensors": dict(mode="qkv", masks=True, need_weights=True, dropout=0.2),
    "qkv-kdim-vdim": dict(mode="qkv", kdim=5, vdim=3, masks=True),
    "qkv-kdim-vdim-seq-first": dict(mode="qkv", batch_first=False, kdim=5, vdim=3, need_weights=True),
    "bias-kv-zero-attn": dict(mode="self", add_bias_kv=True, add_zero_attn=True, masks=True),
    "no-bias": dict(mode="kv", bias=False),
}


@pytest.mark.parametrize("setting", list(ATTENTION_SETTINGS))
def test_capture_leaves_outputs_and_gradients_bit_identical(setting):
    # The recorded forward replaces torch's F.multi_head_attention_forward by the same operations in
    # the same order: outputs and every parameter gradient must equal torch's own bit for bit (one
    # process, same ops), and every projection block must have received its statistics.
    torch.manual_seed(82)
    model = Attention(**ATTENTION_SETTINGS[setting]).double()
    inputs = attention_inputs()
    reference = forward_backward(copy.deepcopy(model), inputs)
    opt = quiet_optimizer(model, fisher="empirical")
    captured = forward_backward(model, inputs)
    assert torch.equal(captured[0], reference[0])
    for name, grad in reference[1].items():
        assert torch.equal(captured[1][name], grad), name
    assert len(opt._capture.records) == 1 and len(opt._capture.records[0].calls) >= 2
    opt.step()
    assert all(block.has_statistics for block in opt.blocks.values())
    expected = {"attention.in_proj", "attention.out_proj"} if "kdim" not in setting else \
        {"attention.q_proj", "attention.k_proj", "attention.v_proj", "attention.out_proj"}
    if "bias" not in setting and "kdim" in setting:
        expected.add("attention.in_proj_bias")
    assert set(opt.blocks) == expected


@pytest.mark.parametrize("mode, options", [("kv", {}), ("qkv", dict(kdim=5, vdim=3))])
def test_frozen_in_projections_leave_the_output_projection_its_block(mode, options):
    torch.manual_seed(89)
    model = Attention(mode, masks=True, **options).double()
    for name, param in model.attention.named_parameters():
        param.requires_grad_(name.startswith("out_proj"))
    inputs = attention_inputs()
    reference = forward_backward(copy.deepcopy(model), inputs)
    opt = quiet_optimizer(model, fisher="empirical")
    captured = forward_backward(model, inputs)
    assert torch.equal(captured[0], reference[0])
    assert set(captured[1]) == {"attention.out_proj.weight", "attention.out_proj.bias"}
    for name, grad in reference[1].items():
        assert torch.equal(captured[1][name], grad), name
    assert list(opt.blocks) == ["attention.out_proj"]
    opt.step()
    assert opt.blocks["attention.out_proj"].has_statistics


def recorded_attention(model, inputs, structure, **options):
    targets = torch.randn(N, L, E, generator=torch.Generator().manual_seed(83), dtype=torch.float64)
    return recorded_optimizer(model, nn.MSELoss(), inputs, targets, structure=structure, **options)


@pytest.mark.parametrize("batch_first", [True, False])
def test_output_projection_is_exact_for_a_per_position_squared_error(batch_first):
    # out_proj's outputs are the model outputs, one per query position, under a Gaussian (MSE) loss:
    # F = 2c sum_{n,t} (a a^T) (x) I, so the expand Kronecker form is exact (Martens & Grosse 2015,
    # sec. 3 for one position; Eschenhagen et al. 2023, sec. 3 for expand), EKFAC too, and the
    # diagonal block is diag(F).
    torch.manual_seed(84)
    model = Attention("self", batch_first=batch_first).double()
    inputs = attention_inputs()
    reference = exact_fisher(model, model.attention.out_proj, inputs, "dense", "mse")
    for structure in ("kfac", "ekfac", "diag"):
        opt = recorded_attention(copy.deepcopy(model), inputs, structure)
        estimate = opt.blocks["attention.out_proj"].dense_curvature()
        expected = reference if structure != "diag" else torch.diag(torch.diagonal(reference))
        assert relative_error(estimate, expected) <= 1e-10, structure


IN_PROJECTIONS = {
    # setting: (model options, {block: parameter names})
    "self": (dict(mode="self"), {"attention.in_proj": ("in_proj_weight", "in_proj_bias")}),
    "kv-cross": (dict(mode="kv"), {"attention.in_proj": ("in_proj_weight", "in_proj_bias")}),
    "qkv-separate-tensors": (dict(mode="qkv", batch_first=False), {"attention.in_proj": ("in_proj_weight",
                                                                                          "in_proj_bias")}),
    "kdim-vdim": (dict(mode="qkv", kdim=5, vdim=3), {
        "attention.q_proj": ("q_proj_weight",), "attention.k_proj": ("k_proj_weight",),
        "attention.v_proj": ("v_proj_weight",), "attention.in_proj_bias": ("in_proj_bias",)}),
}


@pytest.mark.parametrize("setting", list(IN_PROJECTIONS))
def test_in_projection_blocks_against_the_exact_fisher(setting):
    # The query/key/value projections feed the softmax, so no Kronecker form is exact: the K-FAC
    # error is measured and printed; EKFAC is never further from the Fisher than K-FAC (George et al.
    # 2018: diagonal in the same eigenbasis, Frobenius-closest), and the diagonal block is the exact
    # diagonal, since the per-example gradient is the exact sum over the calls' positions (the rows a
    # call does not cover get zero output gradients).
    options, blocks = IN_PROJECTIONS[setting]
    torch.manual_seed(85)
    model = Attention(**options).double()
    inputs = attention_inputs()
    kfac = recorded_attention(copy.deepcopy(model), inputs, "kfac")
    ekfac = recorded_attention(copy.deepcopy(model), inputs, "ekfac")
    diag = recorded_attention(copy.deepcopy(model), inputs, "diag")
    reduced = recorded_attention(copy.deepcopy(model), inputs, "kfac", weight_sharing="reduce")
    for name, parameter_names in blocks.items():
        reference = exact_fisher(model, model.attention, inputs, "dense", "mse", parameter_names)
        kfac_error = relative_error(kfac.blocks[name].dense_curvature(), reference)
        ekfac_error = check_eigenbasis_against_exact(ekfac.blocks[name], reference, kfac_error)
        assert relative_error(torch.diagonal(diag.blocks[name].dense_curvature()), torch.diagonal(reference)) \
            <= EXACT_RTOL, name
        reduce_error = relative_error(reduced.blocks[name].dense_curvature(), reference)
        print(f"{setting} {name}: K-FAC {kfac_error:.3g} (reduce {reduce_error:.3g}), EKFAC {ekfac_error:.3g} "
              "relative Frobenius error")
        if name.endswith("in_proj_bias"):
            # A constant input: with positions summed first ("reduce", always used for this block) the
            # Kronecker factor G = sum_n g_n g_n^T is the exact Fisher of the bias.
            assert kfac_error <= 1e-10
        assert kfac_error < 1.0  # not vacuous: the block carries a good part of the Fisher


# ----------------------------------------------------------------------------- torch's transformer layers
class TinyLanguageModel(nn.Module):
    """Embedding -> 2 x nn.TransformerEncoderLayer (causal) -> linear read-out; logits ``[N, V, T]``."""

    def __init__(self, vocab=12, width=32, heads=4, layers=2, length=6):
        super().__init__()
        self.embed = nn.Embedding(vocab, width)
        self.position = nn.Embedding(length, width)
        layer = nn.TransformerEncoderLayer(width, heads, dim_feedforward=2 * width, dropout=0.0, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, layers, enable_nested_tensor=False)
        self.readout = nn.Linear(width, vocab)
        self.register_buffer("mask", nn.Transformer.generate_square_subsequent_mask(length), persistent=False)

    def forward(self, tokens):
        positions = torch.arange(tokens.shape[1], device=tokens.device).expand_as(tokens)
        hidden = self.encoder(self.embed(tokens) + self.position(positions), mask=self.mask, is_causal=True)
        return self.readout(hidden).transpose(1, 2)


def counting_sequences(n=64, vocab=12, length=7, seed=86):
    """Next token = previous + step (mod vocab), ``step`` of the sequence given by its first two tokens."""
    generator = torch.Generator().manual_seed(seed)
    start = torch.randint(0, vocab, (n, 1), generator=generator)
    step = torch.randint(1, 3, (n, 1), generator=generator)
    sequences = (start + step * torch.arange(length)) % vocab
    return sequences[:, :-1], sequences[:, 1:]


def test_transformer_encoder_language_model_trains_with_no_fallback_parameters():
    # Every parameter of torch's encoder layers has a block (no warning at all, nothing on the
    # fallback rule), the recorded forward/backward equals torch's own bit for bit, and 20 steps of
    # FisherDescent more than halve the loss of a learnable next-token rule.
    torch.manual_seed(87)
    model = TinyLanguageModel()
    tokens, targets = counting_sequences()
    reference = copy.deepcopy(model)
    nn.functional.cross_entropy(reference(tokens), targets).backward()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        loss_fn = nn.CrossEntropyLoss()
        opt = ngopt.FisherDescent(model, loss_fn, stats_interval=2, inverse_interval=4, seed=0)
        losses = []
        for step in range(20):
            opt.zero_grad()
            loss = loss_fn(model(tokens), targets)
            loss.backward()
            if step == 0:
                for (name, p), q in zip(model.named_parameters(), reference.parameters()):
                    assert torch.equal(p.grad, q.grad), name
            opt.step()
            losses.append(float(loss.detach()))
    assert "fallback rule" not in repr(opt)
    covered = {p for block in opt.blocks.values() for p in block.layer.params()}
    assert covered == set(model.parameters())
    kinds = {block.layer.kind for block in opt.blocks.values()}
    assert kinds == {"embedding", "attention_in", "attention_out", "linear", "layer_norm"}
    print(f"transformer LM: loss {losses[0]:.3f} -> {losses[-1]:.3f} in 20 steps")
    assert losses[-1] < 0.5 * losses[0], losses
    assert opt.diagnostics()["skipped_steps"] == 0


def test_encoder_decoder_transformer_is_covered_and_eval_keeps_torch_inference_path():
    # nn.Transformer: self-attention in both stacks, cross-attention (key is value = memory) in the
    # decoder. All parameters get blocks, every block receives statistics, the recorded pass equals
    # torch's own; in eval() the output is torch's inference path, untouched by the capture.
    torch.manual_seed(88)
    model = nn.Transformer(16, 2, num_encoder_layers=1, num_decoder_layers=1, dim_feedforward=24, dropout=0.0,
                           batch_first=True).double()
    source = torch.randn(4, 5, 16, dtype=torch.float64)
    target = torch.randn(4, 3, 16, dtype=torch.float64)

    class Wrapped(nn.Module):
        def __init__(self, inner):
            super().__init__()
            self.inner = inner

        def forward(self, x):
            return self.inner(x, target, tgt_mask=nn.Transformer.generate_square_subsequent_mask(3, dtype=x.dtype))

    wrapped = Wrapped(model)
    reference = copy.deepcopy(wrapped)
    expected = reference(source)
    expected.square().sum().backward()
    opt = quiet_optimizer(wrapped, fisher="empirical")
    output = wrapped(source)
    output.square().sum().backward()
    assert torch.equal(output, expected)
    for (name, p), q in zip(wrapped.named_parameters(), reference.parameters()):
        assert torch.equal(p.grad, q.grad), name
    opt.step()
    assert {p for b in opt.blocks.values() for p in b.layer.params()} == set(wrapped.parameters())
    assert all(block.has_statistics for block in opt.blocks.values())

    wrapped.eval()
    reference.load_state_dict(wrapped.state_dict())
    reference.eval()
    with torch.no_grad():
        assert torch.equal(wrapped(source), reference(source))
