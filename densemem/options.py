"""Retrieval options, validated once at the public boundary into one typed value.

Every front door (:meth:`densemem.DenseMemory.retrieve`,
:meth:`densemem.ShardedMemory.retrieve`, the same on a Dask cluster, and the
``densemem retrieve`` command) turns the user's keywords into one
:class:`RetrievalOptions` with :func:`retrieval_options`; everything below
trusts it and never checks an option again (not per query batch, not per
shard). The default beta is resolved here and only here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from .core.candidates import CertifiedOptions
from .core.sparse import NAMED_ALPHA, WEIGHTINGS
from ._validation import (
    check_beta,
    check_open_fraction,
    check_k,
    check_nonneg_float,
    check_positive_int,
    check_queries,
    check_score_range,
    max_row_norm,
    unit_rows,
)
from .errors import InputTypeError, InputValueError

__all__ = ["Layout", "Method", "METHODS", "Weighting", "WEIGHTINGS", "check_weighting", "RetrievalOptions", "retrieval_options", "prepare_queries"]

Method = Literal["auto", "exact", "certified", "index"]
METHODS: tuple[str, ...] = ("auto", "exact", "certified", "index")
Weighting = Literal["softmax", "sparsemax", "entmax15", "entmax"]
MEASURE_SAMPLE = 256  # measure=True: candidate recall on up to this many queries


@dataclass(frozen=True, slots=True)
class Layout:
    """What a front door knows of the rows it retrieves from (one memory or every shard)."""

    dim: int
    normalize: bool
    count: int
    max_norm: float
    beta: float  # the memory's default beta
    tile_mib: float


@dataclass(frozen=True, slots=True)
class RetrievalOptions:
    """Checked retrieval options: what one call asked for, with every default resolved.

    Attributes
    ----------
    beta : float
        Inverse temperature (the memory's own beta when the call gave none).
    steps : int
        Most updates per query.
    tol : float
        A query stops once its state moves by at most ``tol * M``.
    k : int
        Heaviest stored items reported per query.
    method : {"auto", "exact", "certified", "index"}
        The retrieval path asked for.
    certified : CertifiedOptions
        Candidate growth and the omitted-mass tolerance of "certified" and "auto".
    n_candidates : int
        "index": candidates fetched per query.
    measure : int
        "index": queries sampled for candidate recall (0: none).
    return_energy : bool
        Also compute the energy of the returned states (one more pass).
    batch_size : int or None
        Queries per batch (None: all at once).
    weighting : {"softmax", "sparsemax", "entmax15", "entmax"}
        The normalising map of the update.
    alpha : float or None
        Its alpha in (1, 2] (2 for sparsemax, 1.5 for entmax15; None for softmax).
    """

    beta: float
    steps: int
    tol: float
    k: int
    method: str
    certified: CertifiedOptions
    n_candidates: int
    measure: int
    return_energy: bool
    batch_size: int | None
    weighting: str = "softmax"
    alpha: float | None = None


def prepare_queries(queries: Any, layout: Layout, *, where: str, name: str = "queries") -> tuple[np.ndarray, bool]:
    """Queries as float32 rows of the memory's width (unit rows under ``normalize``)."""
    if layout.count == 0:
        raise InputValueError(f"{where}: the memory is empty; add patterns first.")
    q, was_1d = check_queries(queries, where=where, dim=layout.dim, name=name)
    if layout.normalize:
        q = unit_rows(q, where=where, what="query")
    return q, was_1d


def _check_measure(measure: Any, method: str, where: str) -> int:
    if not isinstance(measure, (bool, int, np.integer)):
        raise InputTypeError(f"{where}: `measure` must be True/False or a number of queries; got {measure!r}.")
    if measure is not False and method != "index":
        raise InputValueError(f"{where}: `measure` applies to method='index' only; got method={method!r}.")
    if measure is True:
        return MEASURE_SAMPLE
    if measure is False:
        return 0
    return check_positive_int(int(measure), name="measure", where=where)


def check_weighting(weighting: Any, alpha: Any, *, where: str) -> tuple[str, float | None]:
    """``(weighting, alpha)`` checked: a known map name, and alpha in (1, 2] for "entmax" only."""
    if not isinstance(weighting, str):
        raise InputTypeError(f"{where}: `weighting` must be one of {', '.join(map(repr, WEIGHTINGS))}; "
                             f"got {type(weighting).__name__}.")
    if weighting not in WEIGHTINGS:
        raise InputValueError(f"{where}: unknown `weighting` {weighting!r}; use one of {', '.join(map(repr, WEIGHTINGS))}.")
    if weighting != "entmax":
        if alpha is not None:
            raise InputValueError(f"{where}: `alpha` applies to weighting='entmax' only; got alpha={alpha!r} "
                                  f"with weighting={weighting!r}.")
        return weighting, NAMED_ALPHA.get(weighting)
    if alpha is None:
        raise InputValueError(f"{where}: weighting='entmax' needs `alpha`, a number in (1, 2]; got None.")
    if isinstance(alpha, np.generic):
        alpha = alpha.item()
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)):
        raise InputTypeError(f"{where}: `alpha` must be a number in (1, 2]; got {type(alpha).__name__}.")
    a = float(alpha)
    if not (np.isfinite(a) and 1.0 < a <= 2.0):
        raise InputValueError(f"{where}: `alpha` must be a number in (1, 2]; got {alpha!r}.")
    return weighting, a


def retrieval_options(
    layout: Layout,
    q: np.ndarray,
    *,
    where: str,
    methods: tuple[str, ...] = METHODS,
    beta: Any = None,
    steps: Any = 1,
    tol: Any = 1e-6,
    k: Any = None,
    method: Any = "auto",
    return_energy: Any = True,
    tol_mass: Any = 1e-6,
    k_max: Any = 1024,
    n_candidates: Any = None,
    measure: Any = False,
    batch_size: Any = None,
    weighting: Any = "softmax",
    alpha: Any = None,
) -> RetrievalOptions:
    """Check every retrieval keyword once; ``q`` (already prepared) is checked against beta's score range."""
    if method not in methods:
        if method in METHODS:
            raise InputValueError(
                f"{where}: `method` {method!r} is not available on a sharded store; use one of {', '.join(methods)}."
            )
        raise InputValueError(f"{where}: unknown `method` {method!r}; use one of {', '.join(methods)}.")
    b = layout.beta if beta is None else check_beta(beta, where=where)
    check_score_range(b, max_row_norm(q), layout.max_norm, where=where)
    kk = min(10, layout.count) if k is None else check_k(k, n=layout.count, where=where)
    wname, a = check_weighting(weighting, alpha, where=where)
    if wname != "softmax" and method == "index":
        raise InputValueError(f"{where}: weighting={wname!r} needs an exact candidate search; method='index' "
                              "gives approximate candidates. Use method='auto', 'certified' or 'exact'.")
    return RetrievalOptions(
        beta=b,
        steps=check_positive_int(steps, name="steps", where=where),
        tol=check_nonneg_float(tol, name="tol", where=where),
        k=kk,
        method=method,
        certified=CertifiedOptions(
            tol_mass=check_open_fraction(tol_mass, name="tol_mass", where=where),
            k_max=check_positive_int(k_max, name="k_max", where=where),
            tile_mib=layout.tile_mib,
        ),
        n_candidates=max(kk, 32)
        if n_candidates is None
        else check_positive_int(n_candidates, name="n_candidates", where=where),
        measure=_check_measure(measure, method, where),
        return_energy=bool(return_energy),
        batch_size=None if batch_size is None else check_positive_int(batch_size, name="batch_size", where=where),
        weighting=wname,
        alpha=a,
    )
