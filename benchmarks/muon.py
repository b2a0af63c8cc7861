"""The ``muon`` row: torch's own ``torch.optim.Muon`` on the hidden weight matrices, AdamW on the rest.

The split is the usual one for Muon (torch's documentation of ``Muon``: it is
for the 2-D parameters of hidden layers; embeddings, the output layer, biases
and gains take a standard method such as AdamW):

- Muon: every 2-D parameter, except those of embedding modules and of the
  read-out, taken to be the last module holding a 2-D weight in the order the
  model registers its modules (where the built-in models, and most others,
  define it);
- AdamW: everything else: embeddings, the read-out, biases, norm parameters,
  and convolution kernels (4-D), which torch's Muon does not accept.

One lr serves both parts: Muon runs with ``adjust_lr_fn="match_rms_adamw"``,
which scales its orthogonalized update to the size of an AdamW update (torch's
documentation: with it Muon "can directly reuse the learning rate and weight
decay tuned for AdamW"), so the row is tuned over one lr grid like every other.
Weight decay is AdamW's default, 0.01, on both parts; Muon keeps its momentum
0.95 with Nesterov (torch's defaults). The lr is constant over the run.
"""

from __future__ import annotations

import functools
import time
from typing import Optional

import torch
from torch import nn

from benchmarks.composite import CompositeOptimizer

MATRIX_RULE = "Muon"
REST_RULE = "AdamW"
EMBEDDINGS = (nn.Embedding, nn.EmbeddingBag)


def muon_available() -> Optional[str]:
    """None when this torch has ``torch.optim.Muon``, else why the row cannot run."""
    if hasattr(torch.optim, "Muon"):
        return None
    return f"torch {torch.__version__} has no torch.optim.Muon (a newer torch has it)"


# A CPU with native bfloat16 arithmetic (AVX512-BF16, AMX) multiplies bfloat16 matrices about as fast as
# float32 ones; one without it (AVX2 only) emulates them tens of times slower (measured on an AMD EPYC:
# 250-290 ms per Muon step of the autoencoder against 11.5 ms per fisher-descent step).  Between the two
# lies a wide gap, so a coarse threshold separates them despite timing noise.
SLOW_BFLOAT16_RATIO = 4.0


def bfloat16_product_ratio(size: int = 256, repeats: int = 7) -> float:
    """Time of a ``size``-square bfloat16 matrix product over a float32 one on the CPU.

    The fastest of a few repeats each, on one thread: other work on the machine only ever adds time.
    """
    def fastest_seconds(dtype):
        a = torch.randn(size, size).to(dtype)
        a @ a  # the first call sets up kernels
        times = []
        for _ in range(repeats):
            started = time.perf_counter()
            a @ a
            times.append(time.perf_counter() - started)
        return min(times)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # one thread: waits for busy cores would swamp the products' own times
    try:
        return fastest_seconds(torch.bfloat16) / max(fastest_seconds(torch.float32), 1e-9)
    finally:
        torch.set_num_threads(threads)


@functools.lru_cache(maxsize=None)
def muon_slow_here() -> Optional[str]:
    """None when this CPU multiplies bfloat16 matrices natively, else why a default run leaves muon out.

    torch's Muon orthogonalizes in bfloat16; on a CPU that emulates it, a muon run takes minutes and its
    times measure the emulation, not the method.
    """
    ratio = bfloat16_product_ratio()
    if ratio <= SLOW_BFLOAT16_RATIO:
        return None
    return (f"this CPU multiplies bfloat16 matrices {ratio:.0f}x slower than float32 ones (no native bfloat16), "
            "and torch's Muon orthogonalizes in bfloat16: its times would measure that; "
            "--optimizers ...,muon runs it anyway")


def owned_matrices(model: nn.Module) -> list[tuple[nn.Module, nn.Parameter]]:
    """(module, 2-D parameter) for each module's own 2-D parameters, in registration order."""
    return [(module, param) for module in model.modules()
            for param in module.parameters(recurse=False) if param.ndim == 2]


def hidden_matrices(model: nn.Module) -> list[nn.Parameter]:
    """The 2-D trainable parameters of hidden layers: not embeddings, not the read-out."""
    owned = owned_matrices(model)
    excluded = {id(param) for module, param in owned if isinstance(module, EMBEDDINGS)}
    if owned:
        read_out = owned[-1][0]
        excluded |= {id(param) for param in read_out.parameters(recurse=False)}
    chosen, seen = [], set()
    for _, param in owned:
        if param.requires_grad and id(param) not in excluded and id(param) not in seen:
            chosen.append(param)
            seen.add(id(param))
    return chosen


def split_parameters(model: nn.Module) -> dict[str, list[nn.Parameter]]:
    """The model's trainable parameters by the rule that updates them (a rule with none is left out)."""
    matrices = hidden_matrices(model)
    ids = {id(param) for param in matrices}
    rest = [param for param in model.parameters() if param.requires_grad and id(param) not in ids]
    return {name: params for name, params in ((MATRIX_RULE, matrices), (REST_RULE, rest)) if params}


def build_muon(model: nn.Module, loss_fn: nn.Module, lr: Optional[float], weight_decay: float) -> CompositeOptimizer:
    """Muon on the hidden matrices and AdamW on the rest, at one lr (each part's default when None)."""
    reason = muon_available()
    if reason is not None:
        raise RuntimeError(f"optimizer muon: {reason}")
    keywords = {"weight_decay": weight_decay} if lr is None else {"lr": lr, "weight_decay": weight_decay}
    makers = {MATRIX_RULE: lambda params: torch.optim.Muon(params, adjust_lr_fn="match_rms_adamw", **keywords),
              REST_RULE: lambda params: torch.optim.AdamW(params, **keywords)}
    return CompositeOptimizer({name: makers[name](params) for name, params in split_parameters(model).items()})
