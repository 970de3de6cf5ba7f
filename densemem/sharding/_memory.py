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
from pydantic import BaseModel, ConfigDict, Field

from . import _ops as S
from ._store import (
    _SPLITS,
    SHARDS_FORMAT_NAME,
    SHARDS_FORMAT_VERSION,
    TOP_MANIFEST,
    _as_path,
    _check_target,
    _fill,
    _read_top,
    _swap_in,
    _write_json_atomic,
    load_shard,
)
from ..core.tiles import DEFAULT_TILE_MIB
from .._validation import check_ids, check_patterns, check_positive_int, max_row_norm
from ..errors import InputTypeError, InputValueError, StoreFormatError
from ..results import NearestResult, RetrievalResult
from ..store._folder import MANIFEST, _sha256, save_memory

__all__ = [
    "SHARDS_FORMAT_NAME",
    "SHARDS_FORMAT_VERSION",
    "ShardSpec",
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


class ShardSpec(BaseModel):
    """Options of ``densemem build --shards N [--shard-by ...]`` (validated at the CLI boundary)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    n_shards: int = Field(ge=1)
    by: Literal["round_robin", "contiguous"] = "round_robin"


# -------------------------------------------------------------------- handle
class ShardedMemory:
    """A handle on a sharded store folder: add, and retrieve exactly without a cluster.

    Build one with :func:`shard_memory` or :func:`open_sharded`; for Dask, pass
    it to :func:`densemem.sharding.retrieve`.

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

    def _layout(self) -> S.Layout:
        return S.Layout(dim=self.dim, normalize=self.normalize, count=len(self), max_norm=self.max_norm)

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
        save_memory(mem, folder)
        man = json.loads(json.dumps(self._man))
        man["shards"][target].update(
            count=len(mem), max_norm=max_row_norm(mem._table.x), manifest_sha256=_sha256(Path(folder) / MANIFEST)
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
            held = np.isin(new_ids, mem._table.ids)
            if held.any():
                raise InputValueError(
                    f"{where}: id {new_ids[held][0].item()!r} is already stored; ids must be unique."
                )
        return new_ids

    # ------------------------------------------------------------- retrieval
    def retrieve(
        self,
        queries: Any,
        beta: float | None = None,
        *,
        steps: int = 1,
        tol: float = 1e-6,
        k: int | None = None,
        method: Literal["auto", "exact", "certified"] = "auto",
        return_energy: bool = True,
        tol_mass: float = 1e-6,
        k_max: int = 1024,
    ) -> RetrievalResult:
        """Retrieve by the softmax update over every shard, in this process.

        Each shard computes its partial with the single-machine kernel and the
        partials are merged exactly, so the result equals
        :meth:`densemem.DenseMemory.retrieve` on all rows (states to float32
        rounding, identical top ids). Options are as there; ``method="index"``
        is not available on shards. Certified bounds are per shard and merged
        as described in :mod:`densemem.sharding._ops` (the reported
        ``mass_bound`` is the merged omitted mass over the merged normaliser).

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4), beta=40.0), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> sm.retrieve([[0.0, 0.8, 0.2, 0.0]], k=2, method="exact").top_ids.tolist()
        [[1, 2]]
        """
        where = "ShardedMemory.retrieve"
        args = S.check_retrieve(
            self._layout(), queries, beta, self.beta, steps=steps, tol=tol, k=k, method=method,
            return_energy=return_energy, tol_mass=tol_mass, k_max=k_max, tile_mib=DEFAULT_TILE_MIB, where=where,
        )
        mems = self._memories(where)

        def run_pass(states: np.ndarray, kk: int, need_acc: bool, cert: Any) -> S.ShardPartial:
            parts = [
                S.shard_partial(m, states, args.beta, k=kk, method=args.method, need_acc=need_acc, cert=cert)
                for m in mems
            ]
            return S.tree_merge(parts, S.merge)

        return S.run_retrieve(run_pass, self._layout(), args)

    def nearest(
        self, queries: Any, k: int | None = None, *, metric: Literal["ip", "l2"] = "ip"
    ) -> NearestResult:
        """Exact k nearest stored patterns over every shard (faiss brute force per shard, merged).

        Examples
        --------
        >>> import os, tempfile, numpy as np, densemem
        >>> from densemem.sharding import shard_memory
        >>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(3), ids=["a", "b", "c"]), os.path.join(tempfile.mkdtemp(), "s"), 2)
        >>> sm.nearest([0.1, 0.9, 0.0], k=1).ids.tolist()
        ['b']
        """
        where = "ShardedMemory.nearest"
        q, was_1d, k = S.check_nearest(self._layout(), queries, k, metric, where=where)
        parts = [S.shard_nearest(m, q, k, metric) for m in self._memories(where)]
        return S.nearest_result(S.tree_merge(parts, S.merge_nearest), was_1d)


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
    from ..dense import DenseMemory

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
