"""In-memory pattern table with ids: the data half of :class:`DenseMemory`.

Kept apart from retrieval so the store-folder and shard code can build one
from trusted arrays (for example memory-mapped files) without copying.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._validation import check_ids, check_patterns, unit_rows, unknown_id_error
from ..errors import InputTypeError, InputValueError

__all__ = ["PatternTable"]


class PatternTable:
    """Float32 rows with unique int64 or str ids, and an id -> row lookup."""

    __slots__ = ("dim", "normalize", "_x", "_ids", "_pos", "_next_id", "version")

    def __init__(self, dim: int, *, normalize: bool) -> None:
        self.dim = dim
        self.normalize = normalize
        self._x = np.empty((0, dim), dtype=np.float32)
        self._ids: np.ndarray = np.empty(0, dtype=np.int64)
        self._pos: dict[Any, int] | None = {}
        self._next_id = 0
        self.version = 0  # bumped on every change; indexes compare it

    # -- trusted construction (store loads, shards) ------------------------
    @classmethod
    def trusted(cls, x: np.ndarray, ids: np.ndarray, *, normalize: bool, next_id: int = 0) -> "PatternTable":
        """Wrap already-validated arrays (no copy; ``x`` may be read-only/mmapped).

        ``next_id`` (int ids): the next id to give, at least one above the largest held.
        """
        t = cls(int(x.shape[1]), normalize=normalize)
        t._x = x
        t._ids = ids
        t._pos = None  # built lazily
        t._next_id = max(int(ids.max()) + 1 if ids.dtype.kind == "i" and ids.size else 0, int(next_id))
        return t

    @property
    def next_id(self) -> int:
        """The next integer id :meth:`prepare` gives when none are passed."""
        return self._next_id

    @property
    def x(self) -> np.ndarray:
        return self._x

    @property
    def ids(self) -> np.ndarray:
        return self._ids

    def __len__(self) -> int:
        return int(self._x.shape[0])

    def _lookup(self) -> dict[Any, int]:
        if self._pos is None:
            self._pos = {v: i for i, v in enumerate(self._ids.tolist())}
        return self._pos

    # -- changes --------------------------------------------------------------
    def prepare(self, patterns: Any, ids: Any, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        """Validate new rows and ids against the table; change nothing."""
        x = check_patterns(patterns, where=where, dim=self.dim)
        if self.normalize:
            x = unit_rows(x, where=where, what="`patterns`")
        n = x.shape[0]
        if ids is None:
            if self._ids.dtype.kind == "U" and len(self):
                raise InputValueError(
                    f"{where}: the memory uses str ids, so `ids` must be given for new patterns."
                )
            new_ids = np.arange(self._next_id, self._next_id + n, dtype=np.int64)
        else:
            new_ids = check_ids(ids, n=n, where=where)
            if len(self) and new_ids.dtype.kind != self._ids.dtype.kind:
                kind = "int" if self._ids.dtype.kind == "i" else "str"
                raise InputTypeError(
                    f"{where}: the memory uses {kind} ids; got `ids` of dtype {new_ids.dtype}."
                )
            lookup = self._lookup()
            for v in new_ids.tolist():
                if v in lookup:
                    raise InputValueError(f"{where}: id {v!r} is already stored; ids must be unique.")
        return x.astype(np.float32, copy=False), new_ids

    def append(self, x: np.ndarray, new_ids: np.ndarray) -> None:
        """Append prepared rows (after :meth:`prepare`)."""
        start = len(self)
        ids = new_ids
        if self._ids.size and self._ids.dtype.kind == "U":
            width = max(self._ids.dtype.itemsize, new_ids.dtype.itemsize) // 4
            ids = new_ids.astype(f"<U{width}")
            self._ids = self._ids.astype(f"<U{width}")
        self._x = np.concatenate([self._x, x]) if start else np.array(x, dtype=np.float32, order="C")
        self._ids = np.concatenate([self._ids, ids]) if start else ids.copy()
        lookup = self._lookup()
        for i, v in enumerate(ids.tolist()):
            lookup[v] = start + i
        if ids.dtype.kind == "i" and ids.size:
            self._next_id = max(self._next_id, int(ids.max()) + 1)
        self.version += 1

    def ids_at(self, pos: np.ndarray) -> np.ndarray:
        """Ids of row numbers ``pos``; -1 (a missing result) maps to the missing-id marker.

        The marker is -1 for int ids and "" for str ids (as :func:`densemem.core.rows.id_fill`).
        """
        out = self._ids[np.maximum(pos, 0)]
        missing = pos < 0
        if missing.any():
            out = out.copy()
            out[missing] = "" if out.dtype.kind == "U" else -1
        return out

    def positions(self, ids: Any, *, where: str) -> np.ndarray:
        """Row numbers of ``ids`` (raises on an unknown id)."""
        if isinstance(ids, (str, int, np.integer)):
            ids = [ids]
        lookup = self._lookup()
        out = np.empty(len(ids), dtype=np.int64)
        for j, v in enumerate(np.asarray(ids).tolist()):
            pos = lookup.get(v)
            if pos is None:
                raise unknown_id_error(where, v)
            out[j] = pos
        return out

    def delete(self, ids: Any, *, where: str) -> int:
        """Remove rows by id; all ids are checked before anything changes."""
        pos = self.positions(ids, where=where)
        if np.unique(pos).size != pos.size:
            raise InputValueError(f"{where}: `ids` lists an id more than once.")
        keep = np.ones(len(self), dtype=bool)
        keep[pos] = False
        self._x = np.ascontiguousarray(self._x[keep])
        self._ids = self._ids[keep]
        self._pos = None
        self.version += 1
        return int(pos.size)
