"""The dense (continuous, modern Hopfield) associative memory."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from ._front import Retriever
from .core.index import CandidateIndex, IndexSettings, default_settings
from .core.rows import RowSource, TableRows, exact_knn
from .core.table import PatternTable
from .core.tiles import DEFAULT_TILE_MIB, n_threads_default
from .options import Layout, RetrievalOptions
from ._validation import check_beta, check_index_params, check_nonneg_float, check_positive_int, max_row_norm
from .errors import DenseMemWarning, IndexStaleError, InputTypeError, InputValueError
from .store._folder import StoreContent, read_store, write_store

__all__ = ["DenseMemory"]


@dataclass(frozen=True, slots=True)
class HalfRounding:
    """How far rounding to float16 moved the rows of a memory (reported when it is built).

    Attributes
    ----------
    max_distance, mean_distance : float
        Largest and mean Euclidean distance between an input row (normalized
        first under ``normalize=True``) and its stored float16 row.
    max_cosine_change : float
        Largest ``1 - cos`` between an input row and its stored row.
    """

    max_distance: float
    mean_distance: float
    max_cosine_change: float

    @classmethod
    def between(cls, given: np.ndarray, stored: np.ndarray, *, normalize: bool) -> "HalfRounding":
        """Compare input rows with the stored ones, in float64, block by block."""
        dist = np.empty(given.shape[0])
        cos = np.empty(given.shape[0])
        for a in range(0, given.shape[0], 65536):
            g = np.asarray(given[a : a + 65536], np.float64)
            if normalize:
                g = g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), np.finfo(np.float64).tiny)
            s = np.asarray(stored[a : a + 65536], np.float64)
            dist[a : a + g.shape[0]] = np.linalg.norm(g - s, axis=1)
            den = np.linalg.norm(g, axis=1) * np.linalg.norm(s, axis=1)
            cos[a : a + g.shape[0]] = 1.0 - np.einsum("ij,ij->i", g, s) / np.where(den > 0, den, 1.0)
        n = max(given.shape[0], 1)
        return cls(float(dist.max(initial=0.0)), float(dist.sum() / n), float(max(cos.max(initial=0.0), 0.0)))

    def to_dict(self) -> dict[str, float]:
        """The three figures as a plain dict."""
        return {"max_distance": self.max_distance, "mean_distance": self.mean_distance,
                "max_cosine_change": self.max_cosine_change}


class DenseMemory(Retriever):
    """A store of real-valued patterns retrieved by the softmax (modern Hopfield) update.

    Parameters
    ----------
    dim : int
        Number of features of every stored pattern.
    normalize : bool, default False
        L2-normalize stored patterns and queries (cosine geometry).
    beta : float, default 1.0
        Default inverse temperature for :meth:`retrieve` and :meth:`energy`.
    tile_mib : float, default 16.0
        Working-memory budget (MiB) of one (query chunk x tile) score block.
    n_threads : int, optional
        Threads for retrieval (default: the cores available).
    dtype : {"float32", "float16"}, default "float32"
        How the rows are kept. "float16" takes half the bytes in memory and on
        disk; retrieval is exact for the stored half values (each tile is
        widened to float32 for the products, which accumulate in float32); a
        value beyond the float16 range (65504) is refused with its row named.
        :attr:`rounding` reports how far :meth:`from_array` moved the rows.

    See Also
    --------
    DenseMemory.from_array : build a memory from an array in one call.

    Notes
    -----
    One update maps a state ``xi`` to ``X.T @ softmax(beta * X @ xi)`` and the
    energy is ``-lse(beta, X xi)/beta + xi.xi/2 + log(N)/beta + M^2/2`` with
    ``M`` the largest stored norm [1]_.

    References
    ----------
    .. [1] H. Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021,
       arXiv:2008.02217.

    Thread safety
    -------------
    Rows and ids are held as one snapshot that changes never write into:
    :meth:`add` and :meth:`remove` build new arrays and swap them in at once,
    one change at a time (a lock). Reads (:meth:`retrieve`, :meth:`energy`,
    :meth:`nearest`, :attr:`patterns`, :attr:`ids`) may run from many threads
    while another thread adds or removes; each call works on the rows and ids
    of the moment it started, so its ids belong to its rows. The candidate
    index of ``method="index"`` / ``nearest(index=True)`` is shared, not part
    of the snapshot: do not change the memory while those run.

    Two processes saving to the same store folder: one save wins whole, the
    other raises :class:`~densemem.errors.StoreBusyError` and writes nothing
    (an advisory ``fcntl`` lock beside the folder, POSIX only). Loads never
    take the lock and always see a complete store.

    Examples
    --------
    >>> import numpy as np, densemem
    >>> mem = densemem.DenseMemory.from_array(np.eye(3), beta=50.0)
    >>> int(mem.retrieve([0.9, 0.1, 0.0]).top_ids[0])
    0
    """

    def __init__(
        self,
        dim: int,
        *,
        normalize: bool = False,
        beta: float = 1.0,
        tile_mib: float = DEFAULT_TILE_MIB,
        n_threads: int | None = None,
        dtype: str = "float32",
    ) -> None:
        where = "DenseMemory"
        if dtype not in ("float32", "float16") and np.dtype(dtype) not in (np.float32, np.float16):
            raise InputValueError(f"{where}: `dtype` must be 'float32' or 'float16'; got {dtype!r}.")
        self._table = PatternTable(check_positive_int(dim, name="dim", where=where), normalize=bool(normalize),
                                   dtype=np.dtype(dtype))
        self.rounding: HalfRounding | None = None  # float16: how far rounding moved the rows of from_array
        self._beta = check_beta(beta, where=where)
        self.tile_mib = check_nonneg_float(tile_mib, name="tile_mib", where=where, strict=True)
        self.n_threads = (
            n_threads_default() if n_threads is None else check_positive_int(n_threads, name="n_threads", where=where)
        )
        self._max_norm_cache: tuple[int, float] | None = None  # (table version, M)
        self._index: Any = None  # a candidate index (see build_index); seam for the store format

    # ------------------------------------------------------------------ build
    @classmethod
    def from_array(
        cls,
        patterns: Any,
        ids: Any = None,
        *,
        normalize: bool = False,
        beta: float = 1.0,
        **options: Any,
    ) -> "DenseMemory":
        """Build a memory holding ``patterns`` (n_patterns x dim).

        Parameters
        ----------
        patterns : array-like of shape (n_patterns, dim)
            Real numbers; float64 and integers are converted to float32.
        ids : sequence of int or str, optional
            One unique id per row (default: 0, 1, 2, ...).
        normalize, beta, **options
            As for :class:`DenseMemory`.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> len(densemem.DenseMemory.from_array(np.ones((4, 2)), ids=list("abcd")))
        4
        """
        from ._validation import as_float_matrix

        where = "DenseMemory.from_array"
        arr, _ = as_float_matrix(patterns, name="patterns", where=where)
        if arr.shape[1] == 0:
            raise InputValueError(f"{where}: `patterns` must have at least one column; got shape {arr.shape}.")
        if arr is patterns:  # the table keeps its own copy; never alias the caller's buffer
            arr = arr.copy()
        allowed = {"tile_mib", "n_threads", "dtype"}
        unknown = sorted(set(options) - allowed)
        if unknown:
            raise InputTypeError(
                f"{where}: unknown option(s) {unknown}; use normalize, beta, tile_mib, n_threads or dtype.")
        mem = cls(int(arr.shape[1]), normalize=normalize, beta=beta, **options)
        mem._add(arr, ids, where=where)
        if mem._table.dtype == np.float16:
            mem.rounding = HalfRounding.between(arr, mem.patterns, normalize=mem.normalize)
        return mem

    # ------------------------------------------------------------ properties
    @property
    def dtype(self) -> str:
        """The stored rows' type: "float32", or "float16" (half the bytes; products in float32)."""
        return str(self._table.dtype)

    @property
    def dim(self) -> int:
        """Number of features of the stored patterns."""
        return self._table.dim

    @property
    def normalize(self) -> bool:
        """Whether patterns and queries are L2-normalized."""
        return self._table.normalize

    @property
    def beta(self) -> float:
        """Default inverse temperature."""
        return self._beta

    @beta.setter
    def beta(self, value: float) -> None:
        self._beta = check_beta(value, where="DenseMemory.beta")

    @property
    def patterns(self) -> np.ndarray:
        """Read-only view of the stored patterns, shape (n_patterns, dim), float32."""
        v = self._table.x.view()
        v.flags.writeable = False
        return v

    @property
    def ids(self) -> np.ndarray:
        """Read-only view of the ids, one per stored pattern (int64 or str)."""
        v = self._table.ids.view()
        v.flags.writeable = False
        return v

    @property
    def max_norm(self) -> float:
        """Largest stored pattern norm ``M`` (0.0 for an empty memory)."""
        snap = self._table.snapshot()
        cached = self._max_norm_cache
        if cached is None or cached[0] != snap.version:
            cached = (snap.version, max_row_norm(snap.x))  # float64: no overflow at 1e38, no underflow at 1e-30
            self._max_norm_cache = cached
        return cached[1]

    def __len__(self) -> int:
        return len(self._table)

    def __repr__(self) -> str:
        return (
            f"DenseMemory(n_patterns={len(self)}, dim={self.dim}, normalize={self.normalize}, "
            f"beta={self.beta:g})"
        )

    # --------------------------------------------------------------- changes
    def add(self, patterns: Any, ids: Any = None) -> np.ndarray:
        """Store new patterns and return their ids.

        Parameters
        ----------
        patterns : array-like of shape (n_new, dim)
        ids : sequence of int or str, optional
            Unique new ids; default: the next free integers.

        Returns
        -------
        ndarray of shape (n_new,)
            The ids given to the new patterns.

        Raises
        ------
        InputValueError
            Wrong width, NaN/inf, zero rows under ``normalize=True``, repeated
            or already stored ids. Nothing is stored then.

        Examples
        --------
        >>> import densemem
        >>> mem = densemem.DenseMemory(2)
        >>> mem.add([[1.0, 0.0], [0.0, 1.0]]).tolist()
        [0, 1]
        """
        return self._add(patterns, ids, where="DenseMemory.add")

    def _add(self, patterns: Any, ids: Any, *, where: str) -> np.ndarray:
        with self._table._lock:  # check and append as one change (two adders never take one id)
            x, new_ids = self._table.prepare(patterns, ids, where=where)
            self._table.append(x, new_ids)
            if self._index is not None:
                self._index.add(x, self._table.version)
        return new_ids.copy()

    def remove(self, ids: Any) -> int:
        """Remove the patterns with these ids; return how many were removed.

        Every id is checked first: an unknown id raises and removes nothing.
        ``ids`` is one id or a flat iterable of ids of the memory's kind (int
        or str); bools, floats, None and nested lists are refused.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(3))
        >>> mem.remove([1]), mem.ids.tolist()
        (1, [0, 2])
        """
        with self._table._lock:
            removed = self._table.delete(ids, where="DenseMemory.remove")
            if self._index is not None:
                self._index.stale = True  # positions shifted: rebuilt on next use
        return removed

    def positions(self, ids: Any) -> np.ndarray:
        """Row numbers in :attr:`patterns` of the given ids.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> densemem.DenseMemory.from_array(np.eye(3), ids=["a", "b", "c"]).positions(["c", "a"]).tolist()
        [2, 0]
        """
        return self._table.positions(ids, where="DenseMemory.positions")

    # ------------------------------------------------------------------ disk
    def save(self, path: Any, *, overwrite: bool = False) -> None:
        """Write the memory to a store folder (atomic; see :mod:`densemem.store`).

        An existing store at ``path`` is refused unless ``overwrite=True`` (the
        rule of every writer in densemem).

        Examples
        --------
        >>> import numpy as np, densemem, tempfile, os
        >>> folder = os.path.join(tempfile.mkdtemp(), "store")
        >>> densemem.DenseMemory.from_array(np.eye(3)).save(folder)
        >>> len(densemem.DenseMemory.load(folder))
        3
        """
        payload = self._index_payload()
        content = StoreContent(
            x=self._table.x, ids=self._table.ids, normalize=self.normalize, beta=self._beta,
            next_id=self._table.next_id,
            index_meta=None if payload is None else payload[0], index=None if payload is None else payload[1],
            max_norm=self.max_norm,
        )
        write_store(content, path, overwrite=overwrite, where="DenseMemory.save")

    @classmethod
    def load(cls, path: Any, *, mmap: bool = False, verify: bool = True) -> "DenseMemory":
        """Read a store folder written by :meth:`save` (never unpickles).

        ``mmap=True`` maps the pattern file read-only instead of reading it;
        ``verify=False`` skips the checksums (fast path for large mapped stores).

        Examples
        --------
        >>> import numpy as np, densemem, tempfile, os
        >>> folder = os.path.join(tempfile.mkdtemp(), "store")
        >>> densemem.DenseMemory.from_array(np.eye(2), ids=["x", "y"]).save(folder)
        >>> densemem.DenseMemory.load(folder, mmap=True).ids.tolist()
        ['x', 'y']
        """
        where = "DenseMemory.load"
        return cls._from_content(read_store(path, mmap=mmap, verify=verify, where=where), where=where)

    @classmethod
    def _from_table(cls, table: PatternTable, *, beta: float, **options: Any) -> "DenseMemory":
        """A memory around an already-checked table (trusted: store and shard readers)."""
        mem = cls(table.dim, normalize=table.normalize, beta=beta, **options)
        mem._table = table
        return mem

    @classmethod
    def _from_content(cls, content: StoreContent, *, where: str) -> "DenseMemory":
        """A memory from what a store folder holds (arrays checked by the reader)."""
        table = PatternTable.trusted(content.x, content.ids, normalize=content.normalize, next_id=content.next_id)
        mem = cls._from_table(table, beta=content.beta)
        if content.max_norm is not None:  # recorded by save: a mapped store needs no pass over its rows for it
            mem._max_norm_cache = (table.snapshot().version, content.max_norm)
        if content.index is not None:
            mem._restore_index(content.index_meta or {}, content.index, where=where)
        return mem

    # -------------------------------------------------------------- retrieval
    _name = "DenseMemory"

    def _layout(self) -> Layout:
        return Layout(dim=self.dim, normalize=self.normalize, count=len(self), max_norm=self.max_norm,
                      beta=self._beta, tile_mib=self.tile_mib)

    def _source(self, opts: RetrievalOptions, *, where: str) -> TableRows:
        index = None
        if opts.method == "index":
            self._fresh_index(where=where)  # fails (or rebuilds) before any pass
            index = lambda: self._fresh_index(where=where)  # noqa: E731
        snap = self._table.snapshot()  # rows and ids of one moment (see Thread safety)
        return TableRows(snap.x, snap.ids, self.max_norm, opts.method, self.tile_mib,
                         self.n_threads, opts.n_candidates, index)

    def _pinned(self) -> Any:
        return self._table.pinned()

    def _candidate_recall(self, source: RowSource, q: np.ndarray, opts: RetrievalOptions) -> float:
        assert isinstance(source, TableRows)
        return source.candidate_recall(q, opts.k, opts.measure)

    def _nearest_batch(self, q: np.ndarray, k: int, metric: str, index: bool, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        if index:
            scores, pos = self._fresh_index(where=where).search(q, k)
        else:
            scores, pos = exact_knn(q, self._table.x, k, metric, tile_mib=self.tile_mib)
        return self._table.ids_at(pos), scores

    # ----------------------------------------------------------------- index
    def build_index(self, kind: Literal["hnsw", "ivf"] = "hnsw", **params: Any) -> dict[str, Any]:
        """Build an approximate candidate index for ``method="index"`` and ``nearest(index=True)``.

        Parameters
        ----------
        kind : {"hnsw", "ivf"}, default "hnsw"
            faiss ``IndexHNSWFlat`` or ``IndexIVFFlat``, by inner product.
        **params
            HNSW: ``M`` (32), ``ef_construction`` (80), ``ef_search`` (64).
            IVF: ``nlist`` (about 4 sqrt(N), and at most N / 39 so k-means has
            39 training rows per list, faiss's own minimum advice), ``nprobe``
            (nlist / 32, at least 8), ``seed`` (0) for the k-means training.

        Returns
        -------
        dict
            The settings used.

        Notes
        -----
        ``add`` appends to the index; ``remove`` marks it stale and the next
        use rebuilds it with the same settings (with a :class:`DenseMemWarning`).

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(8))
        >>> mem.build_index("hnsw", M=8)["kind"]
        'hnsw'
        """
        where = "DenseMemory.build_index"
        if len(self) == 0:
            raise InputValueError(f"{where}: the memory is empty; add patterns first.")
        params = check_index_params(kind, params, where=where)  # before anything reaches faiss
        settings = default_settings(kind, len(self), **params)
        self._index = CandidateIndex.build(self._table.x, settings, self._table.version)
        return settings.to_dict()

    def _fresh_index(self, *, where: str) -> CandidateIndex:
        if self._index is None:
            raise InputValueError(f"{where}: no candidate index; call build_index('hnsw') or build_index('ivf') first.")
        if self._index.stale or self._index.n_rows != len(self):
            warnings.warn(
                f"{where}: patterns were removed since the index was built; rebuilding it "
                f"({self._index.settings.kind}) with the same settings.",
                DenseMemWarning,
                stacklevel=3,
            )
            self._index = CandidateIndex.build(self._table.x, self._index.settings, self._table.version)
        return self._index

    def _index_payload(self) -> tuple[dict[str, Any], Any] | None:
        """(meta, faiss index) for the store format, or None (no or stale index)."""
        if self._index is None or self._index.stale or self._index.n_rows != len(self):
            return None
        return self._index.meta(), self._index.faiss_index

    def _restore_index(self, meta: dict[str, Any], index: Any, *, where: str = "DenseMemory.load") -> None:
        """Attach an index read from a store folder (checked against the rows)."""
        if int(meta.get("n_rows", -1)) != len(self) or int(index.ntotal) != len(self):
            raise IndexStaleError(
                f"{where}: the stored index covers {index.ntotal} rows but the store holds {len(self)}."
            )
        self._index = CandidateIndex(IndexSettings(**meta["settings"]), index, len(self), self._table.version)
