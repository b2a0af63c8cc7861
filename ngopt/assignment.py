"""Which curvature block each trainable parameter gets, and why: decided by how the model uses it.

The first recorded training forward that applies a parameter decides (``uses/``):

* one kind of use (a linear map, a convolution, an embedding lookup, a normalization,
  an elementwise scale or shift), however many calls: that use's block, over the
  parameter and the bias the calls add with it;
* two uses of one weight (a tied embedding and output layer): one block for both
  (``blocks/tied.py``);
* an operation no handler describes (``torch.cat`` of a class token, a bilinear map,
  a weight-norm reparametrization), more than two uses, or no use seen at all: the
  fallback rule, with the reason.

Blocks are named after the parameter (``encoder.fc1.weight`` -> ``encoder.fc1``,
``attn.in_proj_weight`` -> ``attn.in_proj``, ``blocks.0.gamma`` -> ``blocks.0.gamma``),
the eager model's names also under ``torch.compile``, and kept in the model's parameter order.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Dict, List, Optional

import torch
from torch import nn

from .blocks.base import LayerCurvature
from .blocks.factory import block_for_uses, make_block
from .blocks.subsample import ExampleSubsample
from .budget import BLOCKABLE_KINDS, Plan, Schedule, choose

# Uses whose forward and backward make the model's mean layer cost (the cost budget's floor): the linear
# kinds, and convolutions, whose use kind is one for the conv1d and conv2d layers it makes.
COSTED_USE_KINDS = frozenset(BLOCKABLE_KINDS) | {"convolution"}
FALLBACK_WARNING_SHARE = 0.1  # warn when more of the trainable parameters than this take the fallback rule


@dataclass(frozen=True)
class ParameterCurvature:
    """What one trainable parameter got: a block (its name, use kind and structure) or the fallback rule."""

    block: Optional[str]
    kind: Optional[str]
    structure: Optional[str]
    reason: str

    @property
    def fallback(self) -> bool:
        return self.block is None


def _rows(calls) -> int:
    """Rows per forward of one use: examples times positions, over its calls."""
    total = 0
    for call in calls:
        shape = call.use.input_rows.shape
        total += int(shape[0]) * (int(shape[1]) if len(shape) >= 2 else 1)
    return total


def block_name(parameter_name: str, model_name: str = "model") -> str:
    """``a.b.weight`` -> ``a.b``; ``a.in_proj_weight`` -> ``a.in_proj``; the model's own ``weight``: its class name."""
    if parameter_name == "weight":
        return model_name
    if parameter_name.endswith(".weight"):
        return parameter_name[:-len(".weight")]
    if parameter_name.endswith("_weight"):
        return parameter_name[:-len("_weight")]
    return parameter_name


class CurvatureAssignment:
    """The blocks of one optimizer, built as uses are seen; see the module docstring."""

    def __init__(self, model: nn.Module, optimizer, structure: str, weight_sharing: str,
                 stats_fraction: Optional[float], seed: int, cost_budget: Optional[float] = None,
                 max_factor_size: Optional[int] = None, pinned_structures: Optional[dict] = None):
        self.optimizer = optimizer
        self.structure, self.weight_sharing = structure, weight_sharing
        self.stats_fraction = stats_fraction
        self.cost_budget, self.max_factor_size = cost_budget, max_factor_size
        self.pinned = dict(pinned_structures or {})
        self.model_name = type(model).__name__
        self.names: Dict[nn.Parameter, str] = {}
        for name, param in model.named_parameters():
            self.names.setdefault(param, name)
        self.order = {param: index for index, param in enumerate(self.names)}
        self.blocks: Dict[str, LayerCurvature] = {}
        self.block_of: Dict[nn.Parameter, LayerCurvature] = {}     # weight and bias -> block
        self.use_keys: Dict[LayerCurvature, list] = {}                # block -> the keys of its uses
        self.decided: Dict[nn.Parameter, ParameterCurvature] = {}
        self.seen_forward = False
        # One generator for all blocks, apart from the sampled targets' (seed + 1: a different stream).
        self.subsample_generator = torch.Generator().manual_seed(seed + 1)
        self._subsamples: Dict[float, ExampleSubsample] = {}
        self._warned_new_use = set()
        self._pins_checked = False
        self.mean_layer_flops = 0.0

    # -- deciding -----------------------------------------------------------------------------
    def assign(self, record) -> None:
        """Give every call of a recorded forward its block, building blocks for parameters seen first."""
        uses: Dict[nn.Parameter, Dict[tuple, list]] = {}
        for call in record.calls:
            uses.setdefault(call.use.weight, {}).setdefault(call.use.key, []).append(call)
        if record.calls or record.unrecognized:
            self.seen_forward = True
        self._measure_model(record)
        for param, functions in record.unrecognized.items():
            if param not in self.decided and param not in self.block_of:
                self._fall_back(param, f"applied by {'; '.join(sorted(functions))}")
        claimed_biases = {}
        for param, by_key in uses.items():
            for key in by_key:
                if key[2] is not None:
                    claimed_biases.setdefault(key[2], set()).add(param)
        for param in sorted(uses, key=lambda p: self.order.get(p, len(self.order))):
            block = self.block_of.get(param)
            if block is None and param not in self.decided:
                block = self._decide(param, uses[param], record, claimed_biases)
            elif block is not None and record.statistics:
                block = self._revisit(block, uses[param])
            for key, calls in uses[param].items():
                self._attach(block, param, key, calls)
        self.blocks = dict(sorted(self.blocks.items(), key=lambda item: self.order.get(item[1].layer.weight, 0)))
        if self.seen_forward and not self._pins_checked:
            self._pins_checked = True
            self._warn_unknown_pins()

    def _warn_unknown_pins(self) -> None:
        """After the first forward that assigned blocks: a pinned name that is no block is a typo (or a
        layer the forward never applied), and it would otherwise be ignored without a word."""
        unknown = sorted(set(self.pinned) - set(self.blocks))
        if unknown:
            known = ", ".join(list(self.blocks)[:8]) + (", ..." if len(self.blocks) > 8 else "")
            warnings.warn(f"pinned_structures names no curvature block: {', '.join(map(repr, unknown))}; the "
                          f"blocks are named as in print(opt): {known}", stacklevel=4)

    def _decide(self, param, by_key, record, claimed_biases) -> Optional[LayerCurvature]:
        biases = {key[2] for key in by_key if key[2] is not None}
        if param in record.unrecognized:
            functions = "; ".join(sorted(record.unrecognized[param]))
            return self._fall_back(param, f"also applied by {functions}")
        for bias in biases:
            if bias in record.unrecognized or len(claimed_biases.get(bias, ())) > 1 or bias in self.block_of:
                return self._fall_back(param, f"its bias {self.names.get(bias, '?')} has other uses")
        name = block_name(self.names.get(param, f"parameter{len(self.decided)}"), self.model_name)
        layers = [calls[0].use.make_layer(name) for calls in by_key.values()]
        rows = {layer.kind: _rows(calls) for layer, calls in zip(layers, by_key.values())}
        block, why = block_for_uses(layers, self.structure_of(name), self.optimizer.state[param],
                                    self.weight_sharing, plan=lambda layer: self.plan(layer, rows[layer.kind]))
        if block is None:
            return self._fall_back(param, why)
        group = self.optimizer.group_index(param)
        for bias in biases:
            if self.optimizer.group_index(bias) != group:
                raise ValueError(f"param_groups: {name}: its weight and bias must be in the same group")
        self._give_subsample(block)
        self.blocks[name] = block
        self.use_keys[block] = list(by_key)
        for member in block.layer.params():
            self.block_of[member] = block
            self.decided[member] = ParameterCurvature(name, block.layer.kind, block.structure,
                                                      "applied by " + " and ".join(l.kind for l in layers))
        return block

    def _measure_model(self, record) -> None:
        """The mean forward and backward flops per layer of this forward (linear maps and convolutions):
        the budget's floor, so that a layer cheap beside the model keeps its whole factors."""
        flops, layers = 0.0, set()
        for call in record.calls:
            if call.use.key[0] in COSTED_USE_KINDS:
                flops += 6.0 * _rows([call]) * call.use.weight.numel()
                layers.add(call.use.key)
        if layers:
            self.mean_layer_flops = flops / len(layers)

    def structure_of(self, name: str) -> str:
        """The structure a block gets: pinned by name, or the optimizer's."""
        return self.pinned.get(name, self.structure)

    def plan(self, layer, rows: int) -> Plan:
        """Structure and factor forms within the cost budget (``budget.py``); pinned layers keep theirs."""
        pinned = layer.name in self.pinned
        fraction = self.stats_fraction if self.stats_fraction is not None else layer.default_stats_fraction
        schedule = Schedule(self.optimizer.stats_interval, self.optimizer.inverse_interval, fraction)
        return choose(layer.kind, layer.in_dim, layer.out_dim, rows, self.structure_of(layer.name),
                      None if pinned else self.cost_budget, self.max_factor_size, schedule,
                      mean_layer_flops=self.mean_layer_flops)

    def _revisit(self, block: LayerCurvature, by_key) -> LayerCurvature:
        """A refresh whose batch differs from the one a layer's form was chosen for (by more than 2x in
        rows) chooses again; a new form starts from this refresh's statistics."""
        plan = block.plan
        if plan is None or len(by_key) != 1:
            return block
        rows = _rows(next(iter(by_key.values())))
        if plan.rows and 0.5 <= rows / plan.rows <= 2.0:
            return block
        new_plan = self.plan(block.layer, rows)
        if (new_plan.structure, new_plan.blocks) == (plan.structure, plan.blocks):
            block.plan = new_plan
            return block
        state = self.optimizer.state[block.layer.weight]
        for key in list(block.statistic_keys) + list(block.inverse_keys) + list(block.projected_keys):
            state.pop(key, None)
        fresh = make_block(block.layer, new_plan.structure, state, self.weight_sharing, new_plan.blocks)
        fresh.plan, fresh.subsample = new_plan, block.subsample
        name = block.layer.name
        self.blocks[name] = fresh
        self.use_keys[fresh] = self.use_keys.pop(block)
        for member in block.layer.params():
            self.block_of[member] = fresh
            previous = self.decided[member]
            self.decided[member] = ParameterCurvature(name, fresh.layer.kind, fresh.structure, previous.reason)
        return fresh

    def _fall_back(self, param, reason: str) -> None:
        self.decided[param] = ParameterCurvature(None, None, None, reason)
        return None

    def _attach(self, block, param, key, calls) -> None:
        if block is None:
            return
        keys = self.use_keys[block]
        if key not in keys:
            if param not in self._warned_new_use:
                self._warned_new_use.add(param)
                warnings.warn(f"{block.layer.name}: applied in a new way ({key[0]}) after its block was built from "
                              f"the first forward that used it; those calls add no curvature", stacklevel=6)
            return
        for call in calls:
            call.block, call.term = block, keys.index(key)

    def _give_subsample(self, block) -> None:
        fraction = self.stats_fraction if self.stats_fraction is not None else block.layer.default_stats_fraction
        if fraction < 1.0:
            if fraction not in self._subsamples:
                self._subsamples[fraction] = ExampleSubsample(fraction, generator=self.subsample_generator)
            block.subsample = self._subsamples[fraction]

    # -- reading ------------------------------------------------------------------------------
    def parameters(self, trainable: List[nn.Parameter]) -> Dict[str, ParameterCurvature]:
        """Every trainable parameter of the optimizer, by name, with what it got."""
        result = {}
        for param in sorted(trainable, key=lambda p: self.order.get(p, len(self.order))):
            name = self.names.get(param, "(outside the model)")
            decided = self.decided.get(param)
            if decided is None:
                why = "not applied in any recorded training forward" if self.seen_forward else \
                    "blocks are assigned at the first training forward"
                decided = ParameterCurvature(None, None, None, why)
            result[name] = decided
        return result

    def warn_fallback_share(self, trainable: List[nn.Parameter]) -> None:
        """Warn once when more than a tenth of the trainable parameters take the fallback rule."""
        total = sum(p.numel() for p in trainable)
        outside = [(self.names.get(p, "?"), p.numel(), self.decided.get(p)) for p in trainable
                   if p not in self.block_of]
        count = sum(n for _, n, _ in outside)
        if not total or count <= FALLBACK_WARNING_SHARE * total:
            return
        largest = sorted(outside, key=lambda item: -item[1])[:3]
        named = "; ".join(f"{name} ({n}: {d.reason if d else 'no use seen'})" for name, n, d in largest)
        warnings.warn(f"{count / total:.0%} of the trainable parameters ({count} of {total}) have no curvature "
                      f"block and take the fallback rule; the largest: {named}. opt.curvature_assignment() "
                      "lists every parameter", stacklevel=6)
