"""The step loop: repeat one pass of a row source until the states stop moving; then the energy.

Written once, for every caller: one memory, a sharded store in this process and
a sharded store on a Dask cluster all hand :func:`iterate` a
:class:`~densemem.core.rows.RowSource`, and get the same
:class:`~densemem.results.RetrievalResult`. The energy pass (:func:`energy`)
is the same source reduced without weighted sums.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Callable

import numpy as np

from . import sparse as SP
from .candidates import CertifiedOptions
from .._validation import check_finite_result
from .lse import lse_energy
from .rows import AUTO_K_START, RowSource, finish
from ..results import Deferred, RetrievalResult

__all__ = ["Steps", "run_steps", "iterate", "energy", "shape_result"]


@dataclasses.dataclass(slots=True)
class Steps:
    """What :func:`run_steps` returns: final states and the last update's answers."""

    states: np.ndarray
    ids: np.ndarray
    weights: np.ndarray
    converged: np.ndarray
    done: int
    info: dict[str, Any]


OnePass = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]]


def run_steps(
    one_pass: OnePass, q: np.ndarray, *, steps: int, tol: float, max_norm: float, k: int, where: str = "retrieve"
) -> Steps:
    """Repeat ``one_pass`` on the queries still moving, at most ``steps`` times.

    ``one_pass(states)`` returns (new states, top ids, top weights, per-query
    info arrays). A query stops once its state moves by at most ``tol * M``.
    """
    n_q = q.shape[0]
    state = q.copy()
    ids_out: np.ndarray | None = None
    top_w = np.zeros((n_q, k))
    converged = np.zeros(n_q, dtype=bool)
    info_all: dict[str, Any] = {}
    active = np.arange(n_q)
    scale = max(max_norm, np.finfo(np.float32).tiny)
    done = 0
    for _ in range(steps):
        new, ids, weights, info = one_pass(state[active])
        check_finite_result(new, what="states", where=where)
        if ids_out is None or (ids.dtype.kind == "U" and ids.dtype.itemsize > ids_out.dtype.itemsize):
            grown = np.full((n_q, k), "" if ids.dtype.kind == "U" else -1, dtype=ids.dtype)
            if ids_out is not None:
                grown[:] = ids_out
            ids_out = grown
        moved = np.linalg.norm(new - state[active], axis=1)
        state[active], ids_out[active], top_w[active] = new, ids, weights
        now = moved <= tol * scale
        converged[active] = now
        _store_info(info_all, info, active, n_q)
        done += 1
        active = active[~now]
        if active.size == 0:
            break
    assert ids_out is not None
    return Steps(state, ids_out, top_w, converged, done, info_all)


def iterate(
    source: RowSource,
    q: np.ndarray,
    *,
    beta: float,
    steps: int,
    tol: float,
    k: int,
    method: str,
    cert: CertifiedOptions,
    return_energy: bool,
    count: int,
    max_norm: float,
    lazy_energy: bool = False,
    smap: SP.SparseMap | None = None,
) -> dict[str, Any]:
    """The fields of a :class:`RetrievalResult` for 2-D queries ``q`` (see :func:`shape_result`).

    ``smap``: a sparse map (sparsemax, alpha-entmax) instead of softmax; see
    :func:`sparse_iterate`.
    """
    if smap is not None:
        return sparse_iterate(source, q, beta=beta, steps=steps, tol=tol, k=k, method=method, cert=cert,
                              return_energy=return_energy, count=count, max_norm=max_norm,
                              lazy_energy=lazy_energy, smap=smap)
    certified = False

    def one_pass(states: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        nonlocal certified
        sp = source.reduce(states, beta, k=k, need_acc=True, cert=cert)
        fin, ids = finish(sp)
        assert fin.states is not None
        if sp.bound is not None:
            certified = certified or sp.certified
        info = {"mass_bound": sp.bound, "k_used": sp.k_used, "fell_back": sp.fell_back}
        info = {key: v for key, v in info.items() if v is not None}
        return fin.states, ids, fin.top_w, info

    run = run_steps(one_pass, q, steps=steps, tol=tol, max_norm=max_norm, k=k)
    info = run.info
    if "mass_bound" in info:
        info["state_bound"] = 2.0 * max_norm * info["mass_bound"]
    used = method if method != "auto" else ("certified" if certified else "exact")
    e: Any = None
    if return_energy:
        states = run.states
        e = Deferred(lambda: energy(source, states, beta, cert=cert, count=count, max_norm=max_norm))
        if not lazy_energy:
            e = e()
    return dict(
        states=run.states, top_ids=run.ids, top_weights=run.weights, _energy=e,
        steps=run.done, converged=run.converged, method=used, beta=beta, **info,
    )


def _sparse_args(method: str, k: int, cert: CertifiedOptions, count: int) -> dict[str, Any]:
    return dict(exact=method == "exact", k_start=min(count, max(k, SP.K_START)), cap=max(cert.k_max, k))


def sparse_iterate(source: Any, q: np.ndarray, *, beta: float, steps: int, tol: float, k: int, method: str,
                   cert: CertifiedOptions, return_energy: bool, count: int, max_norm: float, lazy_energy: bool,
                   smap: SP.SparseMap) -> dict[str, Any]:
    """The step loop with a sparse map: every pass exact (certified supports, tiled where they exceed the cap)."""
    args = _sparse_args(method, k, cert, count)
    answered_by_candidates = False

    def one_pass(states: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        nonlocal answered_by_candidates
        ans = SP.sparse_pass(source, states, beta, smap, k=k, need_acc=True, n_rows=count, **args)
        answered_by_candidates = answered_by_candidates or bool((~ans.fell_back).any())
        assert ans.states is not None
        info = {"support_size": ans.support, "k_used": ans.k_used, "fell_back": ans.fell_back,
                "mass_bound": np.zeros(states.shape[0])}
        return ans.states, ans.top_ids, ans.top_w, info

    run = run_steps(one_pass, q, steps=steps, tol=tol, max_norm=max_norm, k=k)
    info = run.info
    info["state_bound"] = np.zeros(q.shape[0])
    used = method if method != "auto" else ("certified" if answered_by_candidates else "exact")
    e: Any = None
    if return_energy:
        states = run.states
        e = Deferred(lambda: SP.sparse_energy(source, states, beta, smap, count=count, max_norm=max_norm, **args))
        if not lazy_energy:
            e = e()
    return dict(
        states=run.states, top_ids=run.ids, top_weights=run.weights, _energy=e, steps=run.done,
        converged=run.converged, method=used, beta=beta, weighting=smap.name, alpha=smap.alpha, **info,
    )


def energy(
    source: RowSource, states: np.ndarray, beta: float, *, cert: CertifiedOptions, count: int, max_norm: float,
    smap: SP.SparseMap | None = None, method: str = "exact",
) -> np.ndarray:
    """``-(lse - log N)/beta + |xi|^2/2 + M^2/2`` from one pass without weighted sums.

    Certified searches of this pass start at >= 16 candidates. Where ``beta``
    times the score spread is small, :func:`densemem.core.lse.lse_energy`
    recomputes the difference from the source's rows in float64. With a sparse
    map ``smap``: ``-Omega*/beta + |xi|^2/2 + H_max/beta + M^2/2``
    (:func:`densemem.core.sparse.sparse_energy`).
    """
    if smap is not None:
        return SP.sparse_energy(source, states, beta, smap, count=count, max_norm=max_norm,
                                **_sparse_args(method, 0, cert, count))
    sp = source.reduce(states, beta, k=0, need_acc=False, cert=dataclasses.replace(
        cert, k_start=max(cert.k_start, AUTO_K_START)))
    with np.errstate(divide="ignore"):
        lse = sp.part.m + np.log(sp.part.l)
    return lse_energy(lse, states, beta, n=count, max_norm=max_norm, row_blocks=source.row_blocks)


def _store_info(acc: dict[str, Any], info: dict[str, Any], active: np.ndarray, n_q: int) -> None:
    """Write one step's per-query method info into full-length arrays."""
    for key, val in info.items():
        if isinstance(val, np.ndarray) and val.shape[:1] == active.shape:
            if key not in acc:
                acc[key] = np.zeros(n_q, dtype=val.dtype)
            acc[key][active] = val
        else:
            acc[key] = val


def shape_result(was_1d: bool, **fields: Any) -> RetrievalResult:
    """A :class:`RetrievalResult`, without the query axis for a 1-D query."""
    if was_1d:
        for key, val in fields.items():
            if isinstance(val, np.ndarray) and val.ndim >= 1 and key != "_energy":
                fields[key] = val[0]
        e = fields.get("_energy")
        if isinstance(e, Deferred):
            fields["_energy"] = Deferred(lambda: float(e()[0]))
        elif e is not None:
            fields["_energy"] = float(np.asarray(e).reshape(-1)[0])
        fields["converged"] = bool(fields["converged"])
    return RetrievalResult(**fields)
