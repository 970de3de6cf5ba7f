"""Sharded stores: one memory split over several store folders, retrieved exactly.

Layout of a sharded store (a plain folder)::

    shards.json      format name and version, dim, normalisation, default beta,
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
renames it into place; :meth:`ShardedMemory.add` rewrites one shard with
:func:`densemem.store.save_memory` (its own crash-safe protocol) and then
replaces ``shards.json`` by write-fsync-rename. A crash between those two
steps leaves a shard whose manifest no longer matches ``shards.json``; opening
the store then raises a :class:`~densemem.StoreFormatError` naming that shard
instead of serving mixed data. Only one process may write at a time.

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

import json
import os
import secrets
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from . import _ops as S
from ._dask import ClusterShards
from ._store import (
    _SPLITS,
    SHARDS_FORMAT_NAME,
    SHARDS_FORMAT_VERSION,
    TOP_MANIFEST,
    _as_path,
    _check_target,
    _fill,
    _is_sharded,
    _max_norm,
    _read_top,
    _swap_in,
    _write_json_atomic,
    load_shard,
)
from .._front import Retriever
from ..dense import DenseMemory
from ..core.rows import tree_merge
from ..core.tiles import DEFAULT_TILE_MIB
from ..options import Layout, RetrievalOptions
from .._validation import check_ids, check_patterns, check_positive_int
from ..errors import InputTypeError, InputValueError, StoreFormatError
from ..store._folder import MANIFEST, _sha256

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
    mass over the merged normaliser). For Dask, :meth:`on_cluster` gives the
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
        """Whether patterns and queries are L2-normalised."""
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
        target = int(np.argmin(self.counts))
        entry = self._man["shards"][target]
        mem = load_shard(self.shard_folders[target], entry["manifest_sha256"], verify=self._verify, where=where,
                         number=target)
        mem._add(x, new_ids, where=where)
        folder = self.shard_folders[target]
        mem.save(folder, overwrite=True)
        man = json.loads(json.dumps(self._man))
        man["shards"][target].update(
            count=len(mem), max_norm=_max_norm(mem.patterns), manifest_sha256=_sha256(Path(folder) / MANIFEST)
        )
        man["count"] = sum(int(s["count"]) for s in man["shards"])
        if new_ids.dtype.kind == "i" and new_ids.size:
            man["next_id"] = max(int(man["next_id"]), int(new_ids.max()) + 1)
        man["id_kind"] = "int64" if new_ids.dtype.kind == "i" else "str"
        _write_json_atomic(self._path / TOP_MANIFEST, man)
        self._man = man
        self._cache.pop(target, None)
        return new_ids.copy()

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
        return S.LocalShards(tuple(self._memories(where)), opts.method)

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
    if isinstance(path, (str, os.PathLike)) and _is_sharded(Path(os.fspath(path))):
        return open_sharded(path, verify=verify)
    return DenseMemory.load(path, mmap=mmap, verify=verify)
