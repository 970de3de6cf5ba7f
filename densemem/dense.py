"""The dense (continuous, modern Hopfield) associative memory."""

from __future__ import annotations

import functools
import warnings
from typing import Any, Callable, Literal, TypeVar

import faiss
import numpy as np

from .core import partial as P
from .core import steps as R
from .core.candidates import CertifiedOptions
from .core.index import CandidateIndex, default_settings
from .core.table import PatternTable
from .core.tiles import DEFAULT_TILE_MIB, n_threads_default
from ._validation import (
    check_beta,
    check_fraction,
    check_index_params,
    check_k,
    check_nonneg_float,
    check_positive_int,
    check_queries,
    check_score_range,
    max_row_norm,
    unit_rows,
)
from .errors import DenseMemWarning, IndexStaleError, InputTypeError, InputValueError
from .results import NearestResult, RetrievalResult

__all__ = ["DenseMemory"]

Method = Literal["auto", "exact", "certified", "index"]
_F = TypeVar("_F", bound=Callable[..., Any])


def _one_snapshot(method: _F) -> _F:
    """Run a reading method on the rows and ids of one moment (see *Thread safety*)."""

    @functools.wraps(method)
    def reading(self: "DenseMemory", *args: Any, **kwargs: Any) -> Any:
        with self._table.pinned():
            return method(self, *args, **kwargs)

    return reading  # type: ignore[return-value]

_METHODS = ("auto", "exact", "certified", "index")


class DenseMemory:
    """A store of real-valued patterns retrieved by the softmax (modern Hopfield) update.

    Parameters
    ----------
    dim : int
        Number of features of every stored pattern.
    normalize : bool, default False
        L2-normalise stored patterns and queries (cosine geometry).
    beta : float, default 1.0
        Default inverse temperature for :meth:`retrieve` and :meth:`energy`.
    tile_mib : float, default 16.0
        Working-memory budget (MiB) of one (query chunk x tile) score block.
    n_threads : int, optional
        Threads for retrieval (default: the cores available).

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
    ) -> None:
        where = "DenseMemory"
        self._table = PatternTable(check_positive_int(dim, name="dim", where=where), normalize=bool(normalize))
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
        allowed = {"tile_mib", "n_threads"}
        unknown = sorted(set(options) - allowed)
        if unknown:
            raise InputTypeError(f"{where}: unknown option(s) {unknown}; use normalize, beta, tile_mib or n_threads.")
        mem = cls(int(arr.shape[1]), normalize=normalize, beta=beta, **options)
        mem._add(arr, ids, where=where)
        return mem

    # ------------------------------------------------------------ properties
    @property
    def dim(self) -> int:
        """Number of features of the stored patterns."""
        return self._table.dim

    @property
    def normalize(self) -> bool:
        """Whether patterns and queries are L2-normalised."""
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
    def save(self, path: Any, *, overwrite: bool = True) -> None:
        """Write the memory to a store folder (atomic; see :mod:`densemem.store`).

        Examples
        --------
        >>> import numpy as np, densemem, tempfile, os
        >>> folder = os.path.join(tempfile.mkdtemp(), "store")
        >>> densemem.DenseMemory.from_array(np.eye(3)).save(folder)
        >>> len(densemem.DenseMemory.load(folder))
        3
        """
        from .store._folder import save_memory

        save_memory(self, path, overwrite=overwrite)

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
        from .store._folder import load_memory

        return load_memory(path, mmap=mmap, verify=verify)

    # -------------------------------------------------------------- retrieval
    def _prepare_queries(self, queries: Any, *, where: str) -> tuple[np.ndarray, bool]:
        if len(self) == 0:
            raise InputValueError(f"{where}: the memory is empty; add patterns first.")
        q, was_1d = check_queries(queries, where=where, dim=self.dim)
        if self.normalize:
            q = unit_rows(q, where=where, what="query")
        return q, was_1d

    def _reduce(
        self, states: np.ndarray, beta: float, *, k: int, method: str, need_acc: bool, opts: dict[str, Any]
    ) -> tuple[P.Finished, dict[str, Any]]:
        return R.reduce(self, states, beta, k=k, method=method, need_acc=need_acc, opts=opts)

    @_one_snapshot
    def retrieve(
        self,
        queries: Any,
        beta: float | None = None,
        *,
        steps: int = 1,
        tol: float = 1e-6,
        k: int | None = None,
        method: Method = "auto",
        return_energy: bool = True,
        tol_mass: float = 1e-6,
        k_max: int = 1024,
        n_candidates: int | None = None,
        measure: bool | int = False,
    ) -> RetrievalResult:
        """Retrieve by the softmax update ``xi <- X.T softmax(beta X xi)``.

        Parameters
        ----------
        queries : array-like of shape (n_queries, dim) or (dim,)
            Start states. A 1-D query gives results without the query axis.
        beta : float, optional
            Inverse temperature; None uses the memory's :attr:`beta`. Large beta returns the
            best-matching stored pattern; small beta blends many.
        steps : int, default 1
            Most updates to do. With ``steps > 1`` a query stops once its state
            moves by at most ``tol * M`` (M: largest stored norm).
        tol : float, default 1e-6
        k : int, optional
            Heaviest stored items to report per query (default: 10, or every
            stored item when fewer are held). An explicit ``k`` above the
            number of stored patterns is an error.
        method : {"auto", "exact", "certified", "index"}, default "auto"
            - "exact": every stored row, in tiles (two matrix products).
            - "certified": softmax over faiss's exact top-kc rows with a bound
              on the omitted mass; kc doubles (up to ``k_max``) until the bound
              is at most ``tol_mass``, then the query falls back to "exact".
            - "index": softmax over the candidates of the index made by
              :meth:`build_index` (approximate, no bound).
            - "auto": "exact" below 2048 stored rows; otherwise "certified"
              for the queries where the bound can hold at all (``2 beta M |q| >= ln((N - k) / tol_mass)``, since scores lie
              in ``[-M|q|, M|q|]``), "exact" for the others. Certified
              queries start at ``max(k, 16)`` candidates; one whose first
              bound exceeds ``1e4 * tol_mass`` goes to "exact" without
              growing, the others grow as in "certified".
        return_energy : bool, default True
            Compute the energy of the returned states (one more pass over the
            stored rows, without the weighted sum).
        tol_mass : float, default 1e-6
            Certified/auto: largest omitted softmax fraction accepted.
        k_max : int, default 1024
            Certified/auto: most candidates per query before falling back.
        n_candidates : int, optional
            Index: candidates fetched per query (default ``max(k, 32)``).
        measure : bool or int, default False
            Index: also report candidate recall against faiss exact top-kc on
            a sample of queries (``True``: up to 256; an int: that many).

        Returns
        -------
        RetrievalResult

        Raises
        ------
        InputValueError
            Empty memory, wrong query width, NaN/inf, beta <= 0, k out of range,
            unknown method, "index" without :meth:`build_index`.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(4), beta=40.0)
        >>> res = mem.retrieve([[0.0, 0.8, 0.2, 0.0]], k=2)
        >>> res.top_ids.tolist(), np.round(res.states, 3).tolist()
        ([[1, 2]], [[0.0, 1.0, 0.0, 0.0]])
        """
        where = "DenseMemory.retrieve"
        q, was_1d = self._prepare_queries(queries, where=where)
        beta = self._beta if beta is None else check_beta(beta, where=where)
        steps = check_positive_int(steps, name="steps", where=where)
        tol = check_nonneg_float(tol, name="tol", where=where)
        k = min(10, len(self)) if k is None else check_k(k, n=len(self), where=where)
        check_score_range(beta, max_row_norm(q), self.max_norm, where=where)
        if method not in _METHODS:
            raise InputValueError(f"{where}: unknown `method` {method!r}; use one of {', '.join(_METHODS)}.")
        opts: dict[str, Any] = {
            "certified": CertifiedOptions(
                tol_mass=check_fraction(tol_mass, name="tol_mass", where=where),
                k_max=check_positive_int(k_max, name="k_max", where=where),
                tile_mib=self.tile_mib,
            ),
            "n_candidates": max(k, 32)
            if n_candidates is None
            else check_positive_int(n_candidates, name="n_candidates", where=where),
        }
        if method == "index":
            self._fresh_index(where=where)
        result = R.iterate(self, q, was_1d, beta, steps, tol, k, method, return_energy, opts)
        if measure is not False and method != "index":
            raise InputValueError(f"{where}: `measure` applies to method='index' only; got method={method!r}.")
        if not isinstance(measure, (bool, int, np.integer)):
            raise InputTypeError(f"{where}: `measure` must be True/False or a number of queries; got {measure!r}.")
        if method == "index" and measure:
            n_sample = 256 if measure is True else check_positive_int(int(measure), name="measure", where=where)
            recall = R.candidate_recall(self, q, opts["n_candidates"], k, n_sample)
            result = R.replace(result, candidate_recall=recall)
        return result

    @_one_snapshot
    def energy(self, states: Any, beta: float | None = None) -> np.ndarray:
        """Log-sum-exp energy of states (computed exactly, tile by tile).

        ``E(xi) = -lse(beta, X xi)/beta + xi.xi/2 + log(N)/beta + M^2/2``;
        ``E >= 0`` and one update never raises it.

        Parameters
        ----------
        states : array-like of shape (n_states, dim) or (dim,)
        beta : float, optional

        Returns
        -------
        ndarray of shape (n_states,), float64 (a float for a 1-D state)

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(2), beta=1.0)
        >>> bool(mem.energy([1.0, 0.0]) >= 0)
        True
        """
        where = "DenseMemory.energy"
        if len(self) == 0:
            raise InputValueError(f"{where}: the memory is empty; add patterns first.")
        s, was_1d = check_queries(states, where=where, dim=self.dim, name="states")
        beta = self._beta if beta is None else check_beta(beta, where=where)
        check_score_range(beta, max_row_norm(s), self.max_norm, where=where)
        e = R.energy_of(self, s, beta, "exact", {})
        return float(e[0]) if was_1d else e

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

    def _restore_index(self, meta: dict[str, Any], index: Any) -> None:
        """Attach an index read from a store folder (checked against the rows)."""
        from .core.index import IndexSettings

        if int(meta.get("n_rows", -1)) != len(self) or int(index.ntotal) != len(self):
            raise IndexStaleError(
                f"DenseMemory.load: the stored index covers {index.ntotal} rows but the store holds {len(self)}."
            )
        self._index = CandidateIndex(IndexSettings(**meta["settings"]), index, len(self), self._table.version)

    @_one_snapshot
    def nearest(
        self,
        queries: Any,
        k: int | None = None,
        *,
        metric: Literal["ip", "l2"] = "ip",
        index: bool = False,
    ) -> NearestResult:
        """Exact k nearest stored patterns by faiss brute-force search.

        Parameters
        ----------
        queries : array-like of shape (n_queries, dim) or (dim,)
        k : int, optional
            Default 10, or every stored item when fewer are held.
        metric : {"ip", "l2"}, default "ip"
            Inner product (cosine when ``normalize=True``; faiss
            ``METRIC_INNER_PRODUCT``) or squared Euclidean distance
            (``METRIC_L2``).
        index : bool, default False
            Search the approximate index of :meth:`build_index` instead
            (inner product only), for like-for-like baselines. An index may
            find fewer than k results: the missing ones have id -1 (int ids)
            or "" (str ids) and the score faiss gives them.

        Returns
        -------
        NearestResult

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(3), ids=["a", "b", "c"])
        >>> mem.nearest([0.1, 0.9, 0.0], k=1).ids.tolist()
        ['b']
        """
        where = "DenseMemory.nearest"
        q, was_1d = self._prepare_queries(queries, where=where)
        k = min(10, len(self)) if k is None else check_k(k, n=len(self), where=where)
        if metric not in ("ip", "l2"):
            raise InputValueError(f"{where}: `metric` must be 'ip' or 'l2'; got {metric!r}.")
        if index:
            if metric != "ip":
                raise InputValueError(f"{where}: the candidate index ranks by inner product; use metric='ip'.")
            scores, pos = self._fresh_index(where=where).search(q, k)
        else:
            fm = faiss.METRIC_INNER_PRODUCT if metric == "ip" else faiss.METRIC_L2
            scores, pos = faiss.knn(q, self._table.x, k, metric=fm)
        ids = self._table.ids_at(pos)
        if was_1d:
            return NearestResult(ids=ids[0], scores=scores[0], metric=metric)
        return NearestResult(ids=ids, scores=scores, metric=metric)


