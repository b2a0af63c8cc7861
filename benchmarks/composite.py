"""Several torch optimizers, each over its own parameters, stepped together as one optimizer.

The harness, torch's lr schedulers and ``zero_grad`` see one
``torch.optim.Optimizer``: its ``param_groups`` are the parts' own group dicts
(the very objects, not copies), so an lr that a scheduler or the harness
writes into a group reaches the part that owns it; ``step`` steps every part
after the closure; ``state_dict`` holds each part's.
"""

from __future__ import annotations

from collections import ChainMap
from typing import Callable, Optional

import torch


def _check_parts(parts: dict[str, torch.optim.Optimizer]) -> None:
    if not isinstance(parts, dict) or not parts:
        raise ValueError(f"parts must be a non-empty dict of name -> torch optimizer, got {parts!r}")
    seen: dict[int, str] = {}
    for name, part in parts.items():
        if not isinstance(part, torch.optim.Optimizer):
            raise TypeError(f"parts[{name!r}] must be a torch.optim.Optimizer, got {type(part).__name__}")
        for group in part.param_groups:
            for param in group["params"]:
                if id(param) in seen:
                    raise ValueError(f"a parameter of shape {list(param.shape)} is in both parts "
                                     f"{seen[id(param)]!r} and {name!r}; each parameter belongs to one part")
                seen[id(param)] = name


class CompositeOptimizer(torch.optim.Optimizer):
    """``parts`` (name -> optimizer over disjoint parameters) stepped as one optimizer."""

    def __init__(self, parts: dict[str, torch.optim.Optimizer]):
        _check_parts(parts)
        params = [param for part in parts.values() for group in part.param_groups for param in group["params"]]
        # The base class sets up hooks and profiling; its own copies of the groups are replaced
        # by the parts' groups, so that every lr change lands where the parts read it.
        super().__init__(params, defaults={})
        self.parts = dict(parts)
        self._share_parts()

    def _share_parts(self) -> None:
        """Point param_groups and state at the parts' own (again after a load, which replaces them)."""
        self.param_groups = [group for part in self.parts.values() for group in part.param_groups]
        self.state = ChainMap(*(part.state for part in self.parts.values()))

    @torch.no_grad()
    def step(self, closure: Optional[Callable[[], torch.Tensor]] = None) -> Optional[torch.Tensor]:
        """Evaluate ``closure`` once (with gradients), then step every part on those gradients."""
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        for part in self.parts.values():
            part.step()
        return loss

    def state_dict(self) -> dict:
        return {"parts": {name: part.state_dict() for name, part in self.parts.items()}}

    def load_state_dict(self, state_dict: dict) -> None:
        saved = state_dict.get("parts") if isinstance(state_dict, dict) else None
        if not isinstance(saved, dict) or set(saved) != set(self.parts):
            raise ValueError(f"state_dict must hold the parts {sorted(self.parts)} under 'parts', got "
                             f"{sorted(saved) if isinstance(saved, dict) else type(state_dict).__name__}")
        for name, part in self.parts.items():
            part.load_state_dict(saved[name])
        self._share_parts()
