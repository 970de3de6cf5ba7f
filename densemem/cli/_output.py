"""Printing for the ``densemem`` command: plain tables, JSON, progress on stderr."""

from __future__ import annotations

import json
import sys
from typing import Any, Iterable, Iterator, Sequence

import numpy as np

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


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return str(value)
    if hasattr(value, "__fspath__"):
        return str(value)
    return value


def to_json(data: Any) -> str:
    """JSON text of plain data, numpy values and paths included."""
    return json.dumps(_plain(data), indent=2, sort_keys=False)


def progress(items: Iterable[Any], *, total: int | None, desc: str, quiet: bool) -> Iterator[Any]:
    """Wrap ``items`` in a tqdm bar on stderr, only when stderr is a terminal and not quiet."""
    if quiet or not sys.stderr.isatty():
        yield from items
        return
    try:
        from tqdm import tqdm
    except ImportError:
        yield from items
        return
    yield from tqdm(items, total=total, desc=desc, file=sys.stderr, leave=False)
