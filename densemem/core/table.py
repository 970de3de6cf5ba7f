"""In-memory pattern table with ids: the data half of :class:`DenseMemory`.

Kept apart from retrieval so the store-folder and shard code can build one
from trusted arrays (for example memory-mapped files) without copying.

Thread safety: rows and ids live together in one immutable :class:`Snapshot`.
Changes never write into the arrays of a published snapshot (copy on write):
they build new arrays and swap the snapshot in one assignment, under the
table's lock, so concurrent changes apply one after the other. A reader that
takes :meth:`PatternTable.snapshot` once sees rows and ids of one moment,
whatever changes run meanwhile. :meth:`PatternTable.pinned` goes further: inside
it, every read of the table from that thread (``x``, ``ids``, ``ids_at``,
``len``) answers from the snapshot taken on entry.
"""

from __future__ import annotations

import contextlib
import threading
from dataclasses import dataclass
from typing import Any, Iterator

import numpy as np

from .._validation import to_half, check_id_list, check_ids, check_patterns, unit_rows, unknown_id_error
from ..errors import InputTypeError, InputValueError

__all__ = ["PatternTable", "Snapshot"]


@dataclass(frozen=True, slots=True)
class Snapshot:
    """Rows and ids of one moment (never written after publication) and the table version."""

    x: np.ndarray
    ids: np.ndarray
    version: int

    def ids_at(self, pos: np.ndarray) -> np.ndarray:
        """Ids of row numbers ``pos``; -1 (a missing result) maps to the missing-id marker.

        The marker is -1 for int ids and "" for str ids (as :func:`densemem.core.rows.id_fill`).
        """
        out = self.ids[np.maximum(pos, 0)]
        missing = pos < 0
        if missing.any():
            out = out.copy()
            out[missing] = "" if out.dtype.kind == "U" else -1
        return out


class PatternTable:
    """Float32 (or float16) rows with unique int64 or str ids, and an id -> row lookup."""

    __slots__ = ("dim", "normalize", "dtype", "_snap", "_pos", "_next_id", "_lock", "_pins")

    def __init__(self, dim: int, *, normalize: bool, dtype: Any = np.float32) -> None:
        self.dim = dim
        self.normalize = normalize
        self.dtype = np.dtype(dtype)  # float32, or float16 (half the bytes; products still in float32)
        self._snap = Snapshot(np.empty((0, dim), dtype=self.dtype), np.empty(0, dtype=np.int64), 0)
        self._pos: tuple[int, dict[Any, int]] | None = (0, {})  # (version it matches, id -> row)
        self._next_id = 0
        self._lock = threading.RLock()  # serialises changes; readers never wait
        self._pins = threading.local()  # per thread: the snapshot a reading call pinned

    # -- trusted construction (store loads, shards) ------------------------
    @classmethod
    def trusted(cls, x: np.ndarray, ids: np.ndarray, *, normalize: bool, next_id: int = 0) -> "PatternTable":
        """Wrap already-validated arrays (no copy; ``x`` may be read-only/mmapped).

        ``next_id`` (int ids): the next id to give, at least one above the largest held.
        """
        t = cls(int(x.shape[1]), normalize=normalize, dtype=x.dtype)
        t._snap = Snapshot(x, ids, 0)
        t._pos = None  # built lazily
        t._next_id = max(int(ids.max()) + 1 if ids.dtype.kind == "i" and ids.size else 0, int(next_id))
        return t

    @property
    def next_id(self) -> int:
        """The next integer id :meth:`prepare` gives when none are passed."""
        return self._next_id

    def snapshot(self) -> Snapshot:
        """Rows and ids of one moment: the pinned snapshot of this thread, else the current one."""
        pinned = getattr(self._pins, "snap", None)
        return self._snap if pinned is None else pinned

    @contextlib.contextmanager
    def pinned(self) -> Iterator[Snapshot]:
        """Within the block, this thread's reads see the snapshot taken on entry (re-entrant)."""
        outer = getattr(self._pins, "snap", None)
        if outer is not None:
            yield outer
            return
        self._pins.snap = self._snap
        try:
            yield self._pins.snap
        finally:
            self._pins.snap = None

    @property
    def x(self) -> np.ndarray:
        return self.snapshot().x

    @property
    def ids(self) -> np.ndarray:
        return self.snapshot().ids

    @property
    def version(self) -> int:
        """Bumped on every change; indexes compare it."""
        return self.snapshot().version

    def __len__(self) -> int:
        return int(self.snapshot().x.shape[0])

    def _lookup(self, snap: Snapshot | None = None) -> dict[Any, int]:
        """id -> row of ``snap`` (default: the current snapshot), rebuilt when stale."""
        snap = self._snap if snap is None else snap
        pos = self._pos
        if pos is None or pos[0] != snap.version:
            table = {v: i for i, v in enumerate(snap.ids.tolist())}
            if snap is self._snap:
                self._pos = (snap.version, table)
            return table
        return pos[1]

    # -- changes --------------------------------------------------------------
    def prepare(self, patterns: Any, ids: Any, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        """Validate new rows and ids against the table; change nothing."""
        x = check_patterns(patterns, where=where, dim=self.dim)
        if self.normalize:
            x = unit_rows(x, where=where, what="`patterns`")
        n = x.shape[0]
        cur = self._snap.ids
        if ids is None:
            if cur.dtype.kind == "U" and cur.size:
                raise InputValueError(
                    f"{where}: the memory uses str ids, so `ids` must be given for new patterns."
                )
            new_ids = np.arange(self._next_id, self._next_id + n, dtype=np.int64)
        else:
            new_ids = check_ids(ids, n=n, where=where)
            if cur.size and new_ids.dtype.kind != cur.dtype.kind:
                kind = "int" if cur.dtype.kind == "i" else "str"
                raise InputTypeError(
                    f"{where}: the memory uses {kind} ids; got `ids` of dtype {new_ids.dtype}."
                )
            lookup = self._lookup()
            for v in new_ids.tolist():
                if v in lookup:
                    raise InputValueError(f"{where}: id {v!r} is already stored; ids must be unique.")
        if self.dtype == np.float16:
            x = to_half(x, where=where, name="patterns")
        return x.astype(self.dtype, copy=False), new_ids

    def append(self, x: np.ndarray, new_ids: np.ndarray) -> None:
        """Append prepared rows (after :meth:`prepare`): new arrays, one swap."""
        with self._lock:
            old = self._snap
            start = int(old.x.shape[0])
            ids, cur = new_ids, old.ids
            if cur.size and cur.dtype.kind == "U":
                width = max(cur.dtype.itemsize, new_ids.dtype.itemsize) // 4
                ids = new_ids.astype(f"<U{width}")
                cur = cur.astype(f"<U{width}")
            xs = np.concatenate([old.x, x]) if start else np.array(x, dtype=self.dtype, order="C")
            all_ids = np.concatenate([cur, ids]) if start else ids.copy()
            lookup = self._lookup(old)
            if ids.dtype.kind == "i" and ids.size:
                self._next_id = max(self._next_id, int(ids.max()) + 1)
            new = Snapshot(xs, all_ids, old.version + 1)
            self._pos = None
            self._snap = new
            for i, v in enumerate(ids.tolist()):  # the old lookup grows into the new one, in place
                lookup[v] = start + i
            self._pos = (new.version, lookup)

    def ids_at(self, pos: np.ndarray) -> np.ndarray:
        """Ids of row numbers ``pos`` (see :meth:`Snapshot.ids_at`)."""
        return self.snapshot().ids_at(pos)

    def _check_kind(self, wanted: np.ndarray, *, where: str) -> None:
        cur = self._snap.ids
        if wanted.size and cur.size and (wanted.dtype.kind == "U") != (cur.dtype.kind == "U"):
            have = "str" if cur.dtype.kind == "U" else "int"
            got = "str" if wanted.dtype.kind == "U" else "int"
            raise InputTypeError(f"{where}: the memory uses {have} ids; got {got} `ids`.")

    def positions(self, ids: Any, *, where: str) -> np.ndarray:
        """Row numbers of ``ids`` (raises on an unknown id or an id of the other kind)."""
        wanted = check_id_list(ids, where=where)
        self._check_kind(wanted, where=where)
        lookup = self._lookup(self._snap)
        out = np.empty(wanted.size, dtype=np.int64)
        for j, v in enumerate(wanted.tolist()):
            pos = lookup.get(v)
            if pos is None:
                raise unknown_id_error(where, v)
            out[j] = pos
        return out

    def delete(self, ids: Any, *, where: str) -> int:
        """Remove rows by id; all ids are checked before anything changes (new arrays, one swap)."""
        with self._lock:
            pos = self.positions(ids, where=where)
            if np.unique(pos).size != pos.size:
                raise InputValueError(f"{where}: `ids` lists an id more than once.")
            old = self._snap
            keep = np.ones(old.x.shape[0], dtype=bool)
            keep[pos] = False
            self._snap = Snapshot(np.ascontiguousarray(old.x[keep]), old.ids[keep], old.version + 1)
            return int(pos.size)
