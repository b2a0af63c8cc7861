"""Test support: a module's use recorded from one forward, read as the optimizer reads it.

``adapter_for(module, name, inputs)`` records ``module(inputs)`` with the use recorder
(``ngopt.uses``) and returns an object that is the use's layer adapter (sizes, gradient
matrix) with the rows of any batch: ``recorded_rows(x)`` (the call's input rows ``a``)
and ``output_rows(g)`` (output gradients ``[K, *output.shape]`` as rows ``g``).
"""
from __future__ import annotations

import torch

from ngopt.uses.recorder import record_uses


class RecordedLayer:
    def __init__(self, module: torch.nn.Module, name: str, inputs: torch.Tensor):
        self.module = module
        self.use = self._record(inputs)
        self.layer = self.use.make_layer(name)

    def _record(self, inputs):
        params = [p for p in self.module.parameters() if p.requires_grad]
        _, calls, _ = record_uses(self.module, (inputs,), {}, params, examples=int(inputs.shape[0]))
        return calls[0][0]

    def recorded_rows(self, inputs):
        return self._record(inputs).input_rows

    def output_rows(self, grads):
        return self.use.output_rows(grads)

    def __getattr__(self, name):
        return getattr(self.layer, name)


def adapter_for(module, name, inputs):
    return RecordedLayer(module, name, inputs)
