"""Printing for the ``densemem`` command: plain tables, JSON, progress on stderr."""

from __future__ import annotations

import json
from typing import Any, Iterable, Sequence

import numpy as np

from .._util import progress, to_plain

__all__ = ["table", "to_json", "progress", "fmt"]


def fmt(value: Any) -> str:
    """One table cell."""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (float, np.floating)):
        return f"{float(value):.4g}"
    if value is None:
        return "-"
    return str(value)


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], title: str | None = None) -> str:
    """A fixed-width text table (left-aligned text, right-aligned numbers)."""
    cells = [[fmt(c) for c in r] for r in rows]
    raw = [list(r) for r in rows] if not isinstance(rows, list) else rows
    widths = [len(h) for h in headers]
    for r in cells:
        widths = [max(w, len(c)) for w, c in zip(widths, r)]
    numeric = [
        all(isinstance(r[j], (int, float, np.number)) and not isinstance(r[j], bool) for r in raw) and bool(raw)
        for j in range(len(headers))
    ]

    def line(parts: Sequence[str]) -> str:
        out = [p.rjust(w) if num else p.ljust(w) for p, w, num in zip(parts, widths, numeric)]
        return "  ".join(out).rstrip()

    lines = [title] if title else []
    lines += [line(list(headers)), line(["-" * w for w in widths])]
    lines += [line(r) for r in cells]
    return "\n".join(lines)


def to_json(data: Any) -> str:
    """JSON text of plain data, numpy values and paths included."""
    return json.dumps(to_plain(data), indent=2, sort_keys=False)
