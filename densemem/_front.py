"""The one front door of retrieval, shared by a memory, a sharded store and a sharded store on Dask.

:class:`Retriever` holds ``retrieve``, ``energy`` and ``nearest`` once: it
checks the call into one :class:`~densemem.options.RetrievalOptions`, splits
the queries into batches, asks the subclass for a row source
(:meth:`Retriever._source`) and runs the one step loop
(:func:`densemem.core.steps.iterate`) over it. A subclass says only where its
rows are.
"""

from __future__ import annotations

import contextlib
from typing import Any, Literal

import numpy as np

from .core import steps as S
from .core.sparse import sparse_map
from .core.rows import RowSource
from .options import METHODS, Layout, Method, Weighting, RetrievalOptions, prepare_queries, retrieval_options
from ._validation import check_k, check_nearest_range, check_positive_int, check_queries, max_row_norm
from .errors import InputValueError
from .results import Deferred, NearestResult, RetrievalResult, resolve

__all__ = ["Retriever"]


class Retriever:
    """Base of every memory that retrieves by the softmax update (not instantiated itself)."""

    _methods: tuple[str, ...] = METHODS
    _name = "Retriever"
    _lazy_energy = True  # the energy pass runs when RetrievalResult.energy is first read

    # ------------------------------------------------------- subclass hooks
    def _layout(self) -> Layout:  # pragma: no cover - abstract
        raise NotImplementedError

    def _source(self, opts: RetrievalOptions, *, where: str) -> RowSource:  # pragma: no cover - abstract
        raise NotImplementedError

    def _nearest_batch(self, q: np.ndarray, k: int, metric: str, index: bool, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError  # pragma: no cover - abstract

    def _pinned(self) -> Any:
        """A context in which every read of the rows sees one moment (DenseMemory: its table's snapshot)."""
        return contextlib.nullcontext()

    def _candidate_recall(self, source: RowSource, q: np.ndarray, opts: RetrievalOptions) -> float:
        raise InputValueError(f"{self._name}.retrieve: candidate recall needs method='index'.")  # pragma: no cover

    # ------------------------------------------------------------ retrieve
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
        batch_size: int | None = None,
        weighting: Weighting = "softmax",
        alpha: float | None = None,
    ) -> RetrievalResult:
        """Retrieve by the update ``xi <- X.T softmax(beta X xi)`` (or a sparse map in place of softmax).

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
            - "certified": softmax over the exact top-kc rows with a bound on
              the omitted mass. kc grows along the doubling ladder (up to
              ``k_max``) only to a count the first scores predict will meet
              ``tol_mass`` and whose search costs less than the exact pass;
              otherwise the query goes "exact" at once (with 128 or more
              queries a sample prices the path first).
            - "index": softmax over the candidates of the index made by
              ``build_index`` (approximate, no bound; one memory only).
            - "auto": "exact" below 2048 stored rows; otherwise "certified"
              for the queries where the bound can hold at all (``2 beta M |q| >= ln((N - k) / tol_mass)``, since scores lie
              in ``[-M|q|, M|q|]``), "exact" for the others. Certified
              queries start at ``max(k, 16)`` candidates; one whose first
              bound exceeds ``1e4 * tol_mass`` goes to "exact" without
              growing, the others grow as in "certified".
            On a sharded store every shard applies the method to its own rows
            and the partials merge exactly.
        return_energy : bool, default True
            Give the energy of the returned states. It costs one more pass over
            the stored rows (without the weighted sums, by the same method, so
            certified queries use their certified candidates), run when
            ``result.energy`` is first read: a call that never reads it costs
            the retrieval alone. ``False``: ``energy`` is None.
        tol_mass : float, default 1e-6
            Certified/auto: largest omitted softmax fraction accepted.
        k_max : int, default 1024
            Certified/auto: most candidates per query before falling back.
        n_candidates : int, optional
            Index: candidates fetched per query (default ``max(k, 32)``).
        measure : bool or int, default False
            Index: also report candidate recall against faiss exact top-kc on
            a sample of queries (``True``: up to 256; an int: that many).
        batch_size : int, optional
            Retrieve this many queries at a time (default: all at once); the
            result is the same, the working memory smaller.
        weighting : {"softmax", "sparsemax", "entmax15", "entmax"}, default "softmax"
            The normalising map. "sparsemax" (Martins & Astudillo 2016) and
            alpha-entmax (Peters, Niculae & Martins 2019; "entmax15" is
            alpha = 1.5, "entmax" takes ``alpha``) give exactly zero weight to
            every row whose ``beta * score`` is at least ``1/(alpha-1)`` below
            the best one: the result is one stored pattern or an exact short
            blend, its size in ``support_size``. Sparse maps are always exact:
            "auto"/"certified" take faiss's top rows, grown until the smallest
            is provably outside the support (zero omitted mass), and answer a
            query whose support would exceed ``k_max`` rows by the tiled exact
            pass; "exact" uses the tiled pass for every query; "index" is not
            available. Outside the support the weight is 0 and the id is -1
            (int ids) or "" (str ids).
        alpha : float, optional
            With ``weighting="entmax"``: alpha in (1, 2] (2 is sparsemax; near
            1 approaches softmax).

        Returns
        -------
        RetrievalResult

        Raises
        ------
        InputValueError
            Empty memory, wrong query width, NaN/inf, beta <= 0, k out of range,
            unknown method, "index" without ``build_index``, unknown weighting,
            alpha outside (1, 2] or given without weighting="entmax".

        Examples
        --------
        >>> import numpy as np, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(4), beta=40.0)
        >>> res = mem.retrieve([[0.0, 0.8, 0.2, 0.0]], k=2)
        >>> res.top_ids.tolist(), np.round(res.states, 3).tolist()
        ([[1, 2]], [[0.0, 1.0, 0.0, 0.0]])
        """
        where = f"{self._name}.retrieve"
        with self._pinned():
            layout = self._layout()
            q, was_1d = prepare_queries(queries, layout, where=where)
            opts = retrieval_options(
                layout, q, where=where, methods=self._methods, beta=beta, steps=steps, tol=tol, k=k, method=method,
                return_energy=return_energy, tol_mass=tol_mass, k_max=k_max, n_candidates=n_candidates,
                measure=measure, batch_size=batch_size, weighting=weighting, alpha=alpha,
            )
            return self._retrieve_checked(q, was_1d, opts, where=where)

    def _retrieve_checked(self, q: np.ndarray, was_1d: bool, opts: RetrievalOptions, *, where: str) -> RetrievalResult:
        """Retrieval with options already checked (the CLI and the jobs call this)."""
        layout = self._layout()
        source = self._source(opts, where=where)
        size = opts.batch_size or max(1, q.shape[0])
        batches = [
            S.iterate(
                source, q[i:i + size], beta=opts.beta, steps=opts.steps, tol=opts.tol, k=opts.k, method=opts.method,
                cert=opts.certified, return_energy=opts.return_energy, count=layout.count, max_norm=layout.max_norm,
                lazy_energy=self._lazy_energy, smap=sparse_map(opts.weighting, opts.alpha),
            )
            for i in range(0, q.shape[0], size)
        ]
        fields = batches[0] if len(batches) == 1 else _join(batches, layout.count)
        if opts.measure:
            fields["candidate_recall"] = self._candidate_recall(source, q, opts)
        return S.shape_result(was_1d, **fields)

    # -------------------------------------------------------------- energy
    def energy(self, states: Any, beta: float | None = None, *, weighting: Weighting = "softmax",
               alpha: float | None = None) -> np.ndarray:
        """Log-sum-exp energy of states (computed exactly, tile by tile), or a sparse map's energy.

        ``E(xi) = -lse(beta, X xi)/beta + xi.xi/2 + log(N)/beta + M^2/2``;
        ``E >= 0`` and one update never raises it. With a sparse map the
        log-sum-exp is replaced by ``Omega*``, the convex conjugate of the
        Tsallis alpha-negentropy, and ``log(N)`` by the largest Tsallis
        entropy ``(1 - N^(1-alpha)) / (alpha (alpha-1))`` (computed exactly
        over the certified support).

        Parameters
        ----------
        states : array-like of shape (n_states, dim) or (dim,)
        beta : float, optional
        weighting, alpha
            The normalising map, as in :meth:`retrieve`.

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
        where = f"{self._name}.energy"
        with self._pinned():
            return self._energy(states, beta, where=where, weighting=weighting, alpha=alpha)

    def _energy(self, states: Any, beta: float | None, *, where: str, weighting: Any = "softmax",
                alpha: Any = None) -> Any:
        layout = self._layout()
        if layout.count == 0:
            raise InputValueError(f"{where}: the memory is empty; add patterns first.")
        s, was_1d = check_queries(states, where=where, dim=layout.dim, name="states")
        opts = retrieval_options(layout, s, where=where, beta=beta, method="exact", weighting=weighting, alpha=alpha)
        e = S.energy(self._source(opts, where=where), s, opts.beta, cert=opts.certified, count=layout.count,
                     max_norm=layout.max_norm, smap=sparse_map(opts.weighting, opts.alpha), method="auto")
        return float(e[0]) if was_1d else e

    # ------------------------------------------------------------- nearest
    def nearest(
        self,
        queries: Any,
        k: int | None = None,
        *,
        metric: Literal["ip", "l2"] = "ip",
        index: bool = False,
        batch_size: int | None = None,
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
            Search the approximate index of ``build_index`` instead (inner
            product only, one memory only), for like-for-like baselines. An
            index may find fewer than k results: the missing ones have id -1
            (int ids) or "" (str ids) and the score faiss gives them.
        batch_size : int, optional
            Search this many queries at a time (default: all at once).

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
        where = f"{self._name}.nearest"
        with self._pinned():
            return self._nearest(queries, k, metric, index, batch_size, where=where)

    def _nearest(self, queries: Any, k: Any, metric: Any, index: Any, batch_size: Any, *, where: str) -> NearestResult:
        layout = self._layout()
        q, was_1d = prepare_queries(queries, layout, where=where)
        k = min(10, layout.count) if k is None else check_k(k, n=layout.count, where=where)
        if metric not in ("ip", "l2"):
            raise InputValueError(f"{where}: `metric` must be 'ip' or 'l2'; got {metric!r}.")
        if index and metric != "ip":
            raise InputValueError(f"{where}: the candidate index ranks by inner product; use metric='ip'.")
        check_nearest_range(max_row_norm(q), layout.max_norm, metric, where=where)
        size = max(1, q.shape[0]) if batch_size is None else check_positive_int(batch_size, name="batch_size", where=where)
        parts = [self._nearest_batch(q[i:i + size], k, metric, bool(index), where=where)
                 for i in range(0, q.shape[0], size)]
        ids = np.concatenate([p[0] for p in parts]) if len(parts) > 1 else parts[0][0]
        scores = np.concatenate([p[1] for p in parts]) if len(parts) > 1 else parts[0][1]
        if was_1d:
            return NearestResult(ids=ids[0], scores=scores[0], metric=metric)
        return NearestResult(ids=ids, scores=scores, metric=metric)


_FILL = {"mass_bound": 0.0, "state_bound": 0.0, "fell_back": True}  # a batch auto answered exactly


def _join(batches: list[dict[str, Any]], count: int) -> dict[str, Any]:
    """The fields of one result from the fields of its query batches."""
    out: dict[str, Any] = {}
    keys = list(dict.fromkeys(key for b in batches for key in b))
    for key in keys:
        if key in _FILL or key == "k_used":
            fill = count if key == "k_used" else _FILL[key]
            for b in batches:
                if b.get(key) is None:
                    b[key] = np.full(b["states"].shape[0], fill)
        vals = [b.get(key) for b in batches]
        if key == "steps":
            out[key] = max(vals)
        elif key in ("beta", "weighting", "alpha"):
            out[key] = vals[0]
        elif key == "method":
            out[key] = "certified" if "certified" in vals else vals[0]
        elif key == "_energy" and any(isinstance(v, Deferred) for v in vals):
            out[key] = Deferred(lambda vals=vals: np.concatenate([resolve(v) for v in vals]))
        elif all(v is None for v in vals):
            out[key] = None
        else:
            out[key] = _concat_ids(vals) if key == "top_ids" else np.concatenate(vals)
    return out


def _concat_ids(vals: list[np.ndarray]) -> np.ndarray:
    if all(v.dtype.kind == "U" for v in vals):
        width = max(v.dtype.itemsize for v in vals) // 4
        return np.concatenate([v.astype(f"<U{width}") for v in vals])
    return np.concatenate(vals)

