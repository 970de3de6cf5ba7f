"""Frozen result objects returned by densemem's retrieval calls."""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Callable

import numpy as np

from ._util import to_plain

__all__ = ["RetrievalResult", "NearestResult"]


def _short(value: Any) -> str:
    if isinstance(value, np.ndarray):
        return f"array(shape={value.shape}, dtype={value.dtype})"
    return repr(value)


class Deferred:
    """A value computed on first read (see :attr:`RetrievalResult.energy`)."""

    __slots__ = ("_make",)

    def __init__(self, make: Callable[[], Any]) -> None:
        self._make = make

    def __call__(self) -> Any:
        return self._make()


def resolve(value: Any) -> Any:
    """``value``, or what a :class:`Deferred` computes."""
    return value() if isinstance(value, Deferred) else value


def _public(name: str) -> str:
    return name[1:] if name.startswith("_") else name


class _ResultMixin:
    """One base for results and reports: a short repr and ``to_dict()`` over the public fields."""

    __slots__ = ()

    def __repr__(self) -> str:
        body = ", ".join(
            f"{_public(f.name)}={_short(getattr(self, _public(f.name)))}" for f in fields(self)  # type: ignore[arg-type]
        )
        return f"{type(self).__name__}({body})"

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python (JSON-ready) copy of every field."""
        return {_public(f.name): to_plain(getattr(self, _public(f.name))) for f in fields(self)}  # type: ignore[arg-type]


@dataclass(frozen=True, slots=True, repr=False)
class RetrievalResult(_ResultMixin):
    """What :meth:`densemem.DenseMemory.retrieve` returns.

    For a 1-D query every per-query field drops its leading axis.

    Attributes
    ----------
    states : ndarray of shape (n_queries, dim), float32
        The retrieved states after the last update.
    top_ids : ndarray of shape (n_queries, k)
        Ids of the heaviest stored items in the last update, heaviest first.
        With ``method="index"`` an index may return fewer than k candidates:
        the missing entries have weight 0 and id -1 (int ids) or "" (str ids).
    top_weights : ndarray of shape (n_queries, k), float64
        Their weights under the normalising map (softmax, or a sparse map:
        exactly 0 outside the support, where the id is -1 or "").
    energy : ndarray of shape (n_queries,) or None
        Log-sum-exp energy of ``states`` (None with ``return_energy=False``).
    steps : int
        Updates done (the most any query needed).
    converged : ndarray of shape (n_queries,), bool
        Whether the last update moved the state by at most ``tol`` times the
        largest stored norm.
    method : str
        The retrieval path used: "exact", "certified" or "index".
    mass_bound : ndarray of shape (n_queries,) or None
        Certified path: upper bound on the softmax mass outside the candidates
        in the last update (0 where the query fell back to exact). Sparse
        maps: 0 everywhere (the candidates provably hold the whole support).
    state_bound : ndarray of shape (n_queries,) or None
        Certified path: upper bound on the distance to the exact state,
        ``2 * M * mass_bound``.
    k_used : ndarray of shape (n_queries,) or None
        Certified/index paths: candidates used per query in the last update.
    fell_back : ndarray of shape (n_queries,), bool, or None
        Certified path: queries answered by the exact path instead.
    candidate_recall : float or None
        Index path with ``measure=True``: fraction of faiss's exact top-kc
        (kc = the candidates fetched, ``max(n_candidates, k)``) that the index
        found, averaged over a sample of queries.
    beta : float or None
        The inverse temperature used (the memory's own when the call gave none).
    support_size : ndarray of shape (n_queries,), int64, or None
        Sparse maps: stored items with nonzero weight in the last update (1:
        a stored pattern returned exactly). None for softmax.
    weighting : str
        The normalising map: "softmax", "sparsemax", "entmax15" or "entmax".
    alpha : float or None
        The map's alpha (None for softmax).
    """

    states: np.ndarray
    top_ids: np.ndarray
    top_weights: np.ndarray
    _energy: Any  # ndarray, None, or a Deferred computed on first read
    steps: int
    converged: np.ndarray
    method: str = "exact"
    mass_bound: np.ndarray | None = None
    state_bound: np.ndarray | None = None
    k_used: np.ndarray | None = None
    fell_back: np.ndarray | None = None
    candidate_recall: float | None = None
    beta: float | None = None
    support_size: np.ndarray | None = None
    weighting: str = "softmax"
    alpha: float | None = None

    def __reduce__(self) -> Any:  # pickles with its energy computed (a Deferred holds the rows)
        values = [self.energy if f.name == "_energy" else getattr(self, f.name) for f in fields(self)]
        return (type(self), tuple(values))

    @property
    def energy(self) -> Any:
        """Log-sum-exp energy of ``states`` (see the class Attributes)."""
        value = self._energy
        if isinstance(value, Deferred):
            value = value()
            object.__setattr__(self, "_energy", value)
        return value


@dataclass(frozen=True, slots=True, repr=False)
class NearestResult(_ResultMixin):
    """What :meth:`densemem.DenseMemory.nearest` returns.

    Attributes
    ----------
    ids : ndarray of shape (n_queries, k)
        Ids of the nearest stored items, nearest first.
    scores : ndarray of shape (n_queries, k), float32
        Inner products (``metric="ip"``) or squared Euclidean distances
        (``metric="l2"``).
    metric : str
    """

    ids: np.ndarray
    scores: np.ndarray
    metric: str = "ip"
