"""Number and table formatting shared by the console output and report.md, and the load warning."""

from __future__ import annotations

from typing import Optional


def format_number(value: Optional[float], digits: int = 3) -> str:
    if value is None:
        return "-"
    if isinstance(value, int):
        return str(value)
    if value != 0 and (abs(value) < 1e-3 or abs(value) >= 1e5):
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


def format_table(headers: list[str], rows: list[list[str]], markdown: bool = False) -> str:
    """A plain aligned table for the console, or a GitHub markdown table."""
    if markdown:
        lines = ["| " + " | ".join(headers) + " |", "|" + "|".join("---" for _ in headers) + "|"]
        lines += ["| " + " | ".join(row) + " |" for row in rows]
        return "\n".join(lines)
    widths = [max(len(str(cell)) for cell in column) for column in zip(headers, *rows)]

    def line(cells):
        return "  ".join(str(cell).ljust(width) for cell, width in zip(cells, widths)).rstrip()
    return "\n".join([line(headers), line(["-" * width for width in widths])] + [line(r) for r in rows])


def contention_warning(load: Optional[float], threads: Optional[int]) -> Optional[str]:
    """A warning when other processes competed for the CPU (load average above the thread count)."""
    if load is None or threads is None or load <= threads + 0.5:
        return None
    return (f"the machine's load average reached {load:.1f} during these runs (with {threads} torch "
            "threads): other processes competed for the CPU, so wall-clock times are inflated and noisy")
