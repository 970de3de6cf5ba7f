"""Sharded stores: one memory split over several store folders, retrieved exactly.

Layout of a sharded store (a plain folder)::

    shards.json      format name and version, dim, normalization, default beta,
                     id kind, total count, next free id, how rows were split,
                     and per shard: its folder, count, largest norm and the
                     sha256 of its manifest.json
    shard-00000/     a store folder (densemem.store format, unchanged)
    shard-00001/
    ...

Each shard manifest already holds the sha256 of the shard's arrays, so the top
manifest's checksums pin every byte of every shard. Shards keep the *original*
ids of their rows, so a shard's answers need no global id table.

Writes are atomic: :func:`shard_memory` fills a hidden sibling folder and
renames it into place. Every update (``add``, ``remove``, ``build_index``,
``rebalance``) is copy-on-write: the shards it changes are written as *new*
folders (each by the store's own crash-safe save), then ``shards.json`` is
replaced in one step (write, fsync, rename, fsync of the folder), and only
then are the folders it no longer names deleted. So at every instant
``shards.json`` names a complete set of folders, the old one or the new one; a
kill at any point leaves a store that opens, verifies and answers as before or
as after, and the next update deletes what was left. Only one process may
update a store at a time; readers that opened it earlier keep their mapped
shards.

Retrieval without a cluster (:meth:`ShardedMemory.retrieve`,
:meth:`ShardedMemory.nearest`) loops over the shards in this process and
merges their partials exactly, so it returns what one machine holding every
row returns. :mod:`densemem.sharding` runs the same per-shard kernel on
Dask workers.

Examples
--------
>>> import os, tempfile, numpy as np, densemem
>>> from densemem.sharding import shard_memory
>>> mem = densemem.DenseMemory.from_array(np.eye(5), beta=30.0)
>>> sm = shard_memory(mem, os.path.join(tempfile.mkdtemp(), "sharded"), 2)
>>> sm.counts, int(sm.retrieve([0.0, 0.0, 0.9, 0.1, 0.0], method="exact").top_ids[0])
((3, 2), 2)
"""

from __future__ import annotations

import contextlib
import json
import os
import secrets
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Literal

import numpy as np

from . import _ops as S
from ._dask import ClusterShards
from ._store import (
    _SPLITS,
    SHARDS_FORMAT_NAME,
    SHARDS_FORMAT_VERSION,
    TOP_MANIFEST,
    _check_target,
    _fill,
    _is_sharded,
    commit,
    tidy,
    write_shard,
    _read_top,
    _swap_in,
    _write_json_atomic,
    load_shard,
)
from .._front import Retriever
from ..dense import DenseMemory
from ..core.rows import tree_merge
from ..core.table import PatternTable
from ..core.tiles import DEFAULT_TILE_MIB
from ..options import Layout, RetrievalOptions
from .._validation import check_ids, check_index_params, check_patterns, check_positive_int, unknown_id_error
from ..errors import InputTypeError, InputValueError, StoreFormatError
from ..store._folder import MANIFEST, _as_path, _sha256, read_store

__all__ = [
    "SHARDS_FORMAT_NAME",
    "SHARDS_FORMAT_VERSION",
    "ShardedMemory",
    "ShardedStoreInfo",
    "open_sharded",
    "shard_memory",
]



# -------------------------------------------------------------------- report
@dataclass(frozen=True, slots=True)
class ShardedStoreInfo:
    """What :meth:`ShardedMemory.describe` reports.

    Attributes
    ----------
    path : str
        The sharded store folder.
    dim, count, n_shards : int
    normalize : bool
    beta : float
    id_kind : str
        "int64" or "str".
    by : str
        How the rows were first split ("round_robin" or "contiguous").
    shards : list of dict
        Per shard: folder, count, max_norm, manifest_sha256.
    """

    path: str
    dim: int
    count: int
    n_shards: int
    normalize: bool
    beta: float
    id_kind: str
    by: str
    shards: list[dict[str, Any]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python (JSON-ready) copy of every field."""
        return {name: getattr(self, name) for name in self.__dataclass_fields__}


# -------------------------------------------------------------------- handle
class ShardedMemory(Retriever):
    """A handle on a sharded store folder: add, and retrieve exactly, here or on a Dask cluster.

    Build one with :func:`shard_memory` or :func:`open_sharded`. ``retrieve``,
    ``energy`` and ``nearest`` are those of :class:`densemem.DenseMemory` (one
    front door, the same options; ``method="index"`` is not available on
    shards): every shard computes its partial with the one-machine kernel and
    the partials merge exactly, so the result equals one memory holding every
    row (states to float32 rounding, identical top ids). Certified bounds are
    per shard and merged (the reported ``mass_bound`` is the merged omitted
    mass over the merged normalizer). For Dask, :meth:`on_cluster` gives the
    same calls run by the workers.

    Examples
    --------
    >>> import os, tempfile, numpy as np, densemem
    >>> from densemem.sharding import shard_memory
    >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4)), os.path.join(tempfile.mkdtemp(), "s"), 3)
    >>> len(sm), sm.n_shards
    (4, 3)
    """

    def __init__(self, path: Path, manifest: dict[str, Any], *, verify: bool = True) -> None:
        self._path = path
        self._man = manifest
        self._verify = verify
        self._cache: dict[int, tuple[str, Any]] = {}

    # ------------------------------------------------------------ properties
    @property
    def path(self) -> Path:
        """The sharded store folder."""
        return self._path

    @property
    def dim(self) -> int:
        """Number of features of the stored patterns."""
        return int(self._man["dim"])

    @property
    def normalize(self) -> bool:
        """Whether patterns and queries are L2-normalized."""
        return bool(self._man["normalize"])

    @property
    def beta(self) -> float:
        """Default inverse temperature."""
        return float(self._man["beta"])

    @property
    def n_shards(self) -> int:
        """Number of shards."""
        return len(self._man["shards"])

    @property
    def counts(self) -> tuple[int, ...]:
        """Patterns held by each shard."""
        return tuple(int(s["count"]) for s in self._man["shards"])

    @property
    def max_norm(self) -> float:
        """Largest stored pattern norm ``M`` over every shard."""
        return max((float(s["max_norm"]) for s in self._man["shards"]), default=0.0)

    @property
    def shard_folders(self) -> tuple[str, ...]:
        """Absolute shard folder paths (what workers must be able to read)."""
        return tuple(str(self._path / s["folder"]) for s in self._man["shards"])

    @property
    def checksums(self) -> tuple[str, ...]:
        """sha256 of each shard's manifest.json, as recorded in shards.json."""
        return tuple(str(s["manifest_sha256"]) for s in self._man["shards"])

    def __len__(self) -> int:
        return int(self._man["count"])

    def __repr__(self) -> str:
        return f"ShardedMemory(path={str(self._path)!r}, n_patterns={len(self)}, n_shards={self.n_shards})"

    def _layout(self) -> Layout:
        return Layout(dim=self.dim, normalize=self.normalize, count=len(self), max_norm=self.max_norm,
                      beta=self.beta, tile_mib=DEFAULT_TILE_MIB)

    def describe(self) -> ShardedStoreInfo:
        """A report of the top manifest (no shard is loaded).

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(3)), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> [s["count"] for s in sm.describe().shards]
        [2, 1]
        """
        m = self._man
        return ShardedStoreInfo(
            path=str(self._path), dim=self.dim, count=len(self), n_shards=self.n_shards,
            normalize=self.normalize, beta=self.beta, id_kind=str(m["id_kind"]), by=str(m["by"]),
            shards=[dict(s) for s in m["shards"]],
        )

    # ---------------------------------------------------------------- shards
    def _memories(self, where: str) -> list[Any]:
        """Every shard, memory-mapped, loaded once per manifest checksum."""
        out = []
        for i, (folder, checksum) in enumerate(zip(self.shard_folders, self.checksums)):
            hit = self._cache.get(i)
            if hit is None or hit[0] != checksum:
                hit = (checksum, load_shard(folder, checksum, verify=self._verify, where=where, number=i))
                self._cache[i] = hit
            out.append(hit[1])
        return out

    # -------------------------------------------------------------- changes
    def add(self, patterns: Any, ids: Any = None) -> np.ndarray:
        """Store new patterns in the smallest shard and return their ids.

        The shard is rewritten atomically, then ``shards.json``.

        Parameters
        ----------
        patterns : array-like of shape (n_new, dim)
        ids : sequence of int or str, optional
            Unique new ids (not held by any shard); default: the next free integers.

        Returns
        -------
        ndarray of shape (n_new,)

        Raises
        ------
        InputValueError
            Wrong width, NaN/inf, zero rows under ``normalize=True``, repeated
            or already stored ids, missing ids for a memory with str ids.
        InputTypeError
            Ids of the other kind (int vs str) than the stored ones.

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(3)), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> sm.add([[1.0, 1.0, 0.0]]).tolist(), sm.counts
        ([3], (2, 2))
        """
        where = "ShardedMemory.add"
        x = check_patterns(patterns, where=where, dim=self.dim)
        new_ids = self._new_ids(ids, x.shape[0], where)
        with self._updating():
            target = int(np.argmin(self.counts))
            mem = self._memories(where)[target]
            mem._add(x, new_ids, where=where)  # a mapped shard copies on write: its folder is untouched
            man = self._next_manifest()
            man["shards"][target] = self._entry(mem, man["shards"][target], where)
            if new_ids.dtype.kind == "i" and new_ids.size:
                man["next_id"] = max(int(man["next_id"]), int(new_ids.max()) + 1)
            man["id_kind"] = "int64" if new_ids.dtype.kind == "i" else "str"
            self._commit(man)
        return new_ids.copy()

    # -------------------------------------------------- update protocol
    def _next_manifest(self) -> dict[str, Any]:
        return json.loads(json.dumps(self._man))

    def _entry(self, mem: Any, old: dict[str, Any], where: str) -> dict[str, Any]:
        """Write ``mem`` as a new shard folder (its index rebuilt if it had one); its manifest entry."""
        settings = old.get("index")
        if settings:
            mem.build_index(**settings)
        entry = write_shard(self._path, mem, where)
        if settings:
            entry["index"] = dict(settings)
        return entry

    def _commit(self, man: dict[str, Any]) -> None:
        commit(self._path, man)
        self._man = _read_top(self._path, "ShardedMemory")
        self._cache.clear()

    @contextlib.contextmanager
    def _updating(self) -> Iterator[None]:
        """An update: tidy what an interrupted one left; on failure forget shards changed in memory."""
        tidy(self._path, self._man)
        try:
            yield
        except BaseException:
            self._cache.clear()
            raise

    def remove(self, ids: Any) -> int:
        """Remove the patterns with these ids; only the shards that hold them are rewritten.

        Every id is checked first: an unknown id raises naming the first few,
        and nothing is written. Each touched shard is written as a new folder,
        then ``shards.json`` is replaced in one step (see the module notes).

        Parameters
        ----------
        ids : int, str or sequence of them

        Returns
        -------
        int
            How many patterns were removed.

        Raises
        ------
        UnknownIdError
            An id no shard holds.
        StoreFormatError
            An id held by two shards (a damaged store; both are named).

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4)), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> sm.remove([1, 2]), sm.counts
        (2, (1, 1))
        """
        where = "ShardedMemory.remove"
        wanted = _id_list(ids, self._man["id_kind"], where)
        if not wanted:
            return 0  # nothing to remove: nothing is written
        mems = self._memories(where)
        holders: dict[Any, int] = {}
        for i, mem in enumerate(mems):
            if not len(mem):
                continue
            held = np.asarray(wanted, dtype=mem.ids.dtype) if wanted else np.empty(0, mem.ids.dtype)
            for v in held[np.isin(held, mem.ids)].tolist():
                if v in holders:
                    raise StoreFormatError(
                        f"{where}: id {v!r} is held by shard {holders[v]} ({self.shard_folders[holders[v]]!r}) "
                        f"and shard {i} ({self.shard_folders[i]!r}); the store is damaged."
                    )
                holders[v] = i
        missing = [v for v in wanted if v not in holders]
        if missing:
            raise unknown_id_error(where, missing[0] if len(missing) == 1 else missing[:5])
        with self._updating():
            man = self._next_manifest()
            for i in sorted(set(holders.values())):
                mine = [v for v, s in holders.items() if s == i]
                mems[i].remove(mine)
                man["shards"][i] = self._entry(mems[i], man["shards"][i], where)
            self._commit(man)
        return len(holders)

    def build_index(self, kind: Literal["hnsw", "ivf"] = "hnsw", **params: Any) -> dict[str, Any]:
        """Build a candidate index in every shard (persisted beside it) for ``method="index"``.

        Parameters and settings are those of :meth:`densemem.DenseMemory.build_index`,
        applied to each shard's rows; ``add`` and ``remove`` keep each touched
        shard's index in step (it is rebuilt with the same settings).

        Returns
        -------
        dict
            The settings asked for.

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(8)), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> sm.build_index("hnsw", M=8)["kind"]
        'hnsw'
        """
        where = "ShardedMemory.build_index"
        settings = {"kind": kind, **check_index_params(kind, params, where=where)}  # named here, before any shard
        mems = self._memories(where)
        for i, mem in enumerate(mems):
            if len(mem):
                mem.build_index(**settings)  # checks the settings before anything is written
        with self._updating():
            man = self._next_manifest()
            for i, mem in enumerate(mems):
                entry = write_shard(self._path, mem, where)
                entry["index"] = settings if len(mem) else None
                man["shards"][i] = entry
            self._commit(man)
        return dict(settings)

    def rebalance(self, *, n_shards: int | None = None, rows_per_shard: int | None = None) -> "ShardedMemory":
        """Split and merge shards to ``n_shards`` of near-equal size (or about ``rows_per_shard`` rows each).

        Rows move between shard folders in order, one new shard at a time, so
        at most one new shard's rows are held in memory; ids are unchanged and
        so is every answer (the same rows, merged exactly). Indexes are rebuilt
        with their settings. The old folders are deleted once the new
        ``shards.json`` is in place.

        Parameters
        ----------
        n_shards : int, optional
        rows_per_shard : int, optional
            Exactly one of the two.

        Returns
        -------
        ShardedMemory
            This store, rebalanced.

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(6)), os.path.join(tempfile.mkdtemp(), "s"), 4)
        >>> sm.rebalance(n_shards=2).counts
        (3, 3)
        """
        where = "ShardedMemory.rebalance"
        if (n_shards is None) == (rows_per_shard is None):
            raise InputValueError(f"{where}: give exactly one of `n_shards` and `rows_per_shard`.")
        total = len(self)
        if n_shards is None:
            per = check_positive_int(rows_per_shard, name="rows_per_shard", where=where)
            n_shards = max(1, -(-total // per))
        n_shards = check_positive_int(n_shards, name="n_shards", where=where)
        if total and n_shards > total:
            raise InputValueError(f"{where}: `n_shards` = {n_shards} exceeds the {total} stored rows; "
                                  "a shard would be empty.")
        mems = self._memories(where)  # every folder present and matching, before anything is written
        settings = next((s.get("index") for s in self._man["shards"] if s.get("index")), None)
        sizes = [len(a) for a in np.array_split(np.arange(total), n_shards)]
        with self._updating():
            man = self._next_manifest()
            man["shards"], man["by"] = [], "contiguous"
            rows = _Rows(mems)
            id_dtype = np.dtype(np.int64) if self._man["id_kind"] == "int64" else np.dtype("<U1")
            for size in sizes:
                x, ids = rows.take(size, self.dim, id_dtype)
                part = DenseMemory._from_table(
                    PatternTable.trusted(x, ids, normalize=self.normalize), beta=self.beta)
                man["shards"].append(self._entry(part, {"index": settings}, where))
            self._commit(man)
        return self

    def _new_ids(self, ids: Any, n: int, where: str) -> np.ndarray:
        kind = self._man["id_kind"]
        if ids is None:
            if kind == "str" and len(self):
                raise InputValueError(f"{where}: the memory uses str ids, so `ids` must be given for new patterns.")
            start = int(self._man["next_id"])
            return np.arange(start, start + n, dtype=np.int64)
        new_ids = check_ids(ids, n=n, where=where)
        if len(self) and (new_ids.dtype.kind == "i") != (kind == "int64"):
            want = "int" if kind == "int64" else "str"
            raise InputTypeError(f"{where}: the memory uses {want} ids; got `ids` of dtype {new_ids.dtype}.")
        for mem in self._memories(where):
            held = np.isin(new_ids, mem.ids)
            if held.any():
                raise InputValueError(
                    f"{where}: id {new_ids[held][0].item()!r} is already stored; ids must be unique."
                )
        return new_ids

    # ------------------------------------------------------------- retrieval
    _methods = S.SHARD_METHODS
    _name = "ShardedMemory"

    def _source(self, opts: RetrievalOptions, *, where: str) -> Any:
        mems = tuple(self._memories(where))
        if opts.method == "index":
            for i, m in enumerate(mems):
                if len(m) and m._index is None:
                    raise InputValueError(f"{where}: shard {i} at {self.shard_folders[i]!r} has no candidate index; "
                                          "call build_index('hnsw') or build_index('ivf') on the sharded store first.")
        return S.LocalShards(mems, opts.method, opts.n_candidates)

    def _candidate_recall(self, source: Any, q: np.ndarray, opts: RetrievalOptions) -> float:
        kc = min(len(self), max(opts.n_candidates, opts.k))
        sel = np.sort(np.random.default_rng(0).choice(q.shape[0], min(opts.measure, q.shape[0]), replace=False))
        mems = self._memories(f"{self._name}.retrieve")
        exact = tree_merge([S.shard_nearest(m, q[sel], kc, "ip") for m in mems], S.merge_nearest)
        return S.merged_candidate_recall(exact, [S.shard_candidates(m, q[sel], kc) for m in mems], kc)

    def _nearest_batch(self, q: np.ndarray, k: int, metric: str, index: bool, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        if index:
            raise InputValueError(f"{where}: the candidate index is not available on a sharded store; "
                                  "shards use faiss exact search.")
        parts = [S.shard_nearest(m, q, k, metric) for m in self._memories(where)]
        merged = tree_merge(parts, S.merge_nearest)
        return merged.ids, merged.scores

    def on_cluster(
        self, client: Any, *, retries: int = 2, timeout: float | None = None, verify: bool = True
    ) -> "ClusterShards":
        """This store on a Dask cluster: the same ``retrieve``, ``energy`` and ``nearest``, run by the workers.

        Parameters
        ----------
        client : dask.distributed.Client or str
            A connected client, or a scheduler address ("tcp://host:8786"; a
            client is then made here and closed by :meth:`ClusterShards.close`
            or at the end of a ``with`` block).
        retries : int, default 2
            Times Dask reruns a task that raised (worker loss is handled by the
            scheduler separately).
        timeout : float, optional
            Seconds to wait for each call before raising ``TimeoutError``.
        verify : bool, default True
            Workers check shard files' sha256 when they first load a shard.

        Returns
        -------
        ClusterShards
            Use it as a context manager; every call on it uses the one client.

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4)), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> with sm.on_cluster("tcp://127.0.0.1:8786") as cluster:  # doctest: +SKIP
        ...     cluster.retrieve(np.eye(4)).top_ids[:, 0].tolist()
        [0, 1, 2, 3]
        """
        return ClusterShards(self, client, retries=retries, timeout=timeout, verify=verify)


def _id_list(ids: Any, id_kind: str, where: str) -> list[Any]:
    """Ids to remove as a list of Python ints or strs (one kind, no repeats)."""
    if isinstance(ids, (str, int, np.integer)) and not isinstance(ids, bool):
        ids = [ids]
    if ids is None or isinstance(ids, (bool, float, dict)) or not hasattr(ids, "__len__"):
        raise InputTypeError(f"{where}: `ids` must be an id or a sequence of ids; got {type(ids).__name__}.")
    arr = np.asarray(ids)
    want = "i" if id_kind == "int64" else "U"
    if arr.size and (arr.ndim != 1 or arr.dtype.kind != want):
        kind = "integers" if want == "i" else "strings"
        raise InputTypeError(f"{where}: `ids` must be a flat sequence of {kind} (the store's id kind); "
                             f"got an array of dtype {arr.dtype} and shape {arr.shape}.")
    out = arr.tolist()
    if len(set(out)) != len(out):
        raise InputValueError(f"{where}: `ids` lists an id more than once.")
    return out


def _row_stream(mems: list[Any]) -> Any:
    """(rows, ids) blocks of every shard in order, read from the mapped files a block at a time."""
    block = 65536
    for mem in mems:
        x, ids = mem.patterns, mem.ids
        for s in range(0, len(mem), block):
            yield x[s:s + block], ids[s:s + block]


class _Rows:
    """Every shard's rows in order, handed out ``size`` at a time (copies of the mapped blocks)."""

    def __init__(self, mems: list[Any]) -> None:
        self._blocks = _row_stream(mems)
        self._left: tuple[np.ndarray, np.ndarray] | None = None

    def take(self, size: int, dim: int, id_dtype: np.dtype) -> tuple[np.ndarray, np.ndarray]:
        xs, ids, got = [np.empty((0, dim), np.float32)], [np.empty(0, id_dtype)], 0
        while got < size:
            if self._left is not None:
                (x, i), self._left = self._left, None
            else:
                x, i = next(self._blocks)
            need = size - got
            if len(x) > need:
                self._left = (x[need:], i[need:])
                x, i = x[:need], i[:need]
            xs.append(np.array(x, dtype=np.float32))
            ids.append(np.array(i))
            got += len(x)
        return np.ascontiguousarray(np.concatenate(xs)), _concat_ids(ids)


def _concat_ids(parts: list[np.ndarray]) -> np.ndarray:
    kinds = {p.dtype.kind for p in parts if p.size}
    if kinds == {"U"}:
        width = max(p.dtype.itemsize for p in parts if p.size) // 4
        return np.concatenate([p.astype(f"<U{width}") for p in parts if p.size])
    return np.concatenate([p.astype(np.int64) for p in parts])


def shard_memory(
    memory: Any,
    path: Any,
    n_shards: int,
    *,
    by: Literal["round_robin", "contiguous"] = "round_robin",
    overwrite: bool = False,
) -> ShardedMemory:
    """Split ``memory`` into ``n_shards`` store folders under ``path`` (atomic).

    Parameters
    ----------
    memory : DenseMemory
        Left unchanged.
    path : str or os.PathLike
        The sharded store folder to create (its parent must exist).
    n_shards : int
        Shards to write; more shards than patterns gives empty shards.
    by : {"round_robin", "contiguous"}, default "round_robin"
        Row ``i`` goes to shard ``i % n_shards``, or the rows are cut into
        ``n_shards`` contiguous blocks of near-equal size.
    overwrite : bool, default False
        Replace an existing sharded store at ``path``.

    Returns
    -------
    ShardedMemory

    Raises
    ------
    InputTypeError
        ``memory`` is not a DenseMemory, or ``path`` is not a path.
    InputValueError
        Bad ``n_shards`` or ``by``; missing parent folder; ``path`` exists
        (and ``overwrite=False``, or it is not a sharded store).

    Examples
    --------
    >>> import os, tempfile, numpy as np, densemem
    >>> from densemem.sharding import shard_memory
    >>> sm = shard_memory(densemem.DenseMemory.from_array(np.ones((5, 2))), os.path.join(tempfile.mkdtemp(), "s"), 2, by="contiguous")
    >>> sm.counts
    (3, 2)
    """

    where = "shard_memory"
    if not isinstance(memory, DenseMemory):
        raise InputTypeError(f"{where}: `memory` must be a DenseMemory; got {type(memory).__name__}.")
    n_shards = check_positive_int(n_shards, name="n_shards", where=where)
    if by not in _SPLITS:
        raise InputValueError(f"{where}: `by` must be 'round_robin' or 'contiguous'; got {by!r}.")
    p = _as_path(path, where)
    if not p.parent.is_dir():
        raise InputValueError(f"{where}: the parent folder of `path` does not exist: {str(p.parent)!r}.")
    _check_target(p, overwrite, where)
    tmp = p.parent / f".{p.name}.densemem-shards-tmp-{os.getpid()}-{secrets.token_hex(4)}"
    tmp.mkdir()
    try:
        man = _fill(memory, tmp, n_shards, by)
        _write_json_atomic(tmp / TOP_MANIFEST, man)
        _swap_in(tmp, p)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return ShardedMemory(p, man)


# ------------------------------------------------------------------- opening
def open_sharded(path: Any, *, verify: bool = True) -> ShardedMemory:
    """Open a sharded store folder written by :func:`shard_memory`.

    Every shard folder must exist and its manifest must match the checksum in
    ``shards.json``; shards themselves are loaded (memory-mapped) on first use.

    Parameters
    ----------
    path : str or os.PathLike
    verify : bool, default True
        When shards are loaded, check every file's sha256 (else sizes, shapes
        and dtypes only).

    Raises
    ------
    StoreFormatError
        No sharded store at ``path``; unknown format; a shard folder missing
        or not matching ``shards.json`` (the message names it).

    Examples
    --------
    >>> import os, tempfile, numpy as np, densemem
    >>> from densemem.sharding import shard_memory, open_sharded
    >>> path = os.path.join(tempfile.mkdtemp(), "s")
    >>> _ = shard_memory(densemem.DenseMemory.from_array(np.eye(3)), path, 2)
    >>> open_sharded(path).counts
    (2, 1)
    """
    where = "open_sharded"
    p = _as_path(path, where)
    if not p.exists() and (p.parent / f".{p.name}.densemem-shards-prev").is_dir():
        p = p.parent / f".{p.name}.densemem-shards-prev"  # a replace was interrupted: the old store
    man = _read_top(p, where)
    for i, s in enumerate(man["shards"]):
        folder = p / str(s["folder"])
        if not (folder / MANIFEST).is_file():
            raise StoreFormatError(f"{where}: shard {i} at {str(folder)!r} is missing (no {MANIFEST}).")
        if _sha256(folder / MANIFEST) != s["manifest_sha256"]:
            raise StoreFormatError(
                f"{where}: shard {i} at {str(folder)!r} does not match {TOP_MANIFEST} (its manifest checksum "
                "changed: rewritten or interrupted during add?)."
            )
    return ShardedMemory(p, man, verify=verify)


def is_sharded_store(path: Any) -> bool:
    """Whether ``path`` is a sharded store folder (it holds a ``shards.json`` of this format).

    Examples
    --------
    >>> import tempfile
    >>> from densemem.sharding import is_sharded_store
    >>> is_sharded_store(tempfile.mkdtemp())
    False
    """
    return isinstance(path, (str, os.PathLike)) and _is_sharded(Path(os.fspath(path)))


def open_store(path: Any, *, mmap: bool = False, verify: bool = True) -> Any:
    """Open a store folder of either kind: a :class:`~densemem.DenseMemory` or a :class:`ShardedMemory`.

    Parameters
    ----------
    path : str or os.PathLike
        A store folder (``manifest.json``) or a sharded store folder (``shards.json``).
    mmap : bool, default False
        One store: memory-map its arrays (shards are always memory-mapped).
    verify : bool, default True
        Check checksums as :meth:`densemem.DenseMemory.load` and :func:`open_sharded` do.

    Returns
    -------
    DenseMemory or ShardedMemory
        Both answer ``retrieve``, ``energy`` and ``nearest`` with the same options.

    Examples
    --------
    >>> import os, tempfile, numpy as np, densemem
    >>> from densemem.sharding import open_store, shard_memory
    >>> base = tempfile.mkdtemp()
    >>> densemem.DenseMemory.from_array(np.eye(3)).save(os.path.join(base, "one"))
    >>> _ = shard_memory(densemem.DenseMemory.from_array(np.eye(3)), os.path.join(base, "many"), 2)
    >>> type(open_store(os.path.join(base, "one"))).__name__, type(open_store(os.path.join(base, "many"))).__name__
    ('DenseMemory', 'ShardedMemory')
    """
    if is_sharded_store(path):
        return open_sharded(path, verify=verify)
    return DenseMemory._from_content(read_store(path, mmap=mmap, verify=verify, where="open_store"), where="open_store")
