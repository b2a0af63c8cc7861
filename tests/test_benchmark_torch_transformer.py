"""The ``corpus_torch_transformer`` task: corpus_transformer's model rebuilt from torch's own layers.

Reference: ``TinyTransformer`` itself. torch documents ``nn.TransformerEncoderLayer(norm_first=True)``
as ``x + self_attn(norm1(x))`` then ``x + linear2(activation(linear1(norm2(x))))``, and
``nn.MultiheadAttention``'s packed ``in_proj_weight`` as the query, key and value weights stacked
in that order (torch.nn docs): with the weights copied across, both models compute the same function.
"""
from __future__ import annotations

import warnings

import torch

import ngopt
from benchmarks.tasks import TASKS, corpus_torch_transformer, corpus_transformer


def copy_weights(source, target):
    """TinyTransformer's weights into TorchLayersTransformer, layer by layer."""
    with torch.no_grad():
        for name in ("tokens", "positions", "norm", "read_out"):
            target.get_submodule(name).load_state_dict(source.get_submodule(name).state_dict())
        for block, layer in zip(source.blocks, target.blocks.layers):
            attention = block.attention
            layer.self_attn.in_proj_weight.copy_(torch.cat([attention.query.weight, attention.key.weight,
                                                            attention.value.weight]))
            layer.self_attn.in_proj_bias.copy_(torch.cat([attention.query.bias, attention.key.bias,
                                                          attention.value.bias]))
            layer.self_attn.out_proj.load_state_dict(attention.out.state_dict())
            layer.norm1.load_state_dict(block.norm1.state_dict())
            layer.norm2.load_state_dict(block.norm2.state_dict())
            layer.linear1.load_state_dict(block.mlp[0].state_dict())
            layer.linear2.load_state_dict(block.mlp[2].state_dict())


def test_torch_layers_model_computes_the_built_in_transformer_and_every_parameter_has_a_block():
    torch.manual_seed(0)
    reference, model = corpus_transformer(), corpus_torch_transformer()
    assert sum(p.numel() for p in model.parameters()) == sum(p.numel() for p in reference.parameters())
    copy_weights(reference, model)
    split = TASKS["corpus_torch_transformer"].load_data()
    tokens = split.train_x[:8]
    # float32, two different attention kernels: agreement to float32 round-off of a 2-block network
    torch.testing.assert_close(model(tokens), reference(tokens), rtol=1e-4, atol=1e-5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no fallback-share warning
        opt = ngopt.FisherDescent(model, TASKS["corpus_torch_transformer"].make_loss())
        opt.assign_curvature(tokens)
    assert {p for block in opt.blocks.values() for p in block.layer.params()} == set(model.parameters())
