"""Ids beside row numbers: the padding id of an id kind, ids of row numbers, two id tables in one dtype."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["id_fill", "ids_of", "common_ids"]


def id_fill(dtype: np.dtype) -> Any:
    """Padding id of an id dtype (-1 for integers, '' for strings)."""
    return -1 if dtype.kind in "iu" else ""


def ids_of(table_ids: np.ndarray, top_i: np.ndarray) -> np.ndarray:
    """Ids of row numbers (padding -1 -> the id dtype's fill)."""
    if table_ids.size == 0:
        return np.full(top_i.shape, id_fill(table_ids.dtype), dtype=table_ids.dtype)
    out = table_ids[np.maximum(top_i, 0)]
    return np.where(top_i >= 0, out, np.asarray(id_fill(table_ids.dtype), dtype=table_ids.dtype))


def common_ids(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two id tables in one dtype (str widths may differ between shards)."""
    if a.dtype == b.dtype:
        return a, b
    if a.dtype.kind == "U" and b.dtype.kind == "U":
        width = max(a.dtype.itemsize, b.dtype.itemsize) // 4
        return a.astype(f"<U{width}"), b.astype(f"<U{width}")
    return a.astype(np.result_type(a.dtype, b.dtype)), b.astype(np.result_type(a.dtype, b.dtype))
