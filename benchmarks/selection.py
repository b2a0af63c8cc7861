"""Picking entries of a registry by name, with an error that lists the valid names."""

from __future__ import annotations

from typing import Optional, TypeVar

Entry = TypeVar("Entry")


def select_by_name(registry: dict[str, Entry], names: Optional[list[str]], what: str) -> list[Entry]:
    """The entries of ``registry`` named in ``names``, in that order (all of them for ``None``).

    Raises ValueError naming ``what`` (the option, e.g. "tasks"), the unknown
    names and every valid name.
    """
    if names is None:
        return list(registry.values())
    valid = ", ".join(registry)
    unknown = [name for name in names if name not in registry]
    if unknown:
        raise ValueError(f"unknown {what} name(s): {', '.join(unknown)}; valid {what}: {valid}")
    if not names:
        raise ValueError(f"{what} must name at least one entry; valid {what}: {valid}")
    return [registry[name] for name in names]
