"""Retrieval orchestration for :class:`densemem.DenseMemory`: method choice, iteration, energy.

The class in ``dense.py`` holds the public surface (validation, docstrings);
these functions hold the loop: one pass of a method over the current states
(:func:`reduce`), repeated by :func:`iterate` until the states stop moving.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any, Callable

import faiss
import numpy as np

from . import partial as P
from .candidates import bound_can_hold, certified_reduce, index_reduce
from .exact import exact_reduce
from .lse import lse_energy
from ..results import RetrievalResult

if TYPE_CHECKING:
    from ..dense import DenseMemory

AUTO_K_START = 16  # auto: first candidate count
AUTO_SMALL_N = 2048  # auto: below this many stored rows, exact is cheaper than any search
AUTO_GIVE_UP = 1e4  # auto: a first bound above tol_mass * this goes exact without growing


def reduce(
    mem: "DenseMemory", states: np.ndarray, beta: float, *, k: int, method: str, need_acc: bool, opts: dict[str, Any]
) -> tuple[P.Finished, dict[str, Any]]:
    """One pass of the chosen method: softmax statistics for ``states``."""
    x = mem._table.x

    def exact(q: np.ndarray, kk: int, acc: bool) -> P.Partial:
        return exact_reduce(q, x, beta, k=kk, tile_mib=mem.tile_mib, n_threads=mem.n_threads, need_acc=acc)

    info: dict[str, Any] = {}
    cert = opts.get("certified")
    if method == "auto" and len(mem) < AUTO_SMALL_N:
        method = "exact"  # a search's fixed cost exceeds two small products
    if method == "auto":
        cert = dataclasses.replace(opts["certified"], give_up=AUTO_GIVE_UP, k_start=max(k, AUTO_K_START))
        can = bound_can_hold(beta, np.linalg.norm(states, axis=1), mem.max_norm, len(mem), k, cert.tol_mass)
        method = "certified" if can.any() else "exact"
        if method == "certified" and not can.all():
            part, info = auto_split(mem, states, beta, k, need_acc, cert, can, exact)
            return P.finish(part), info
    if method == "exact":
        part = exact(states, k, need_acc)
    elif method == "certified":
        part, info = certified_reduce(x, states, beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
    else:
        index = mem._fresh_index(where="DenseMemory.retrieve")
        part, info = index_reduce(
            x, states, beta, k=k, n_candidates=opts["n_candidates"], need_acc=need_acc,
            search=index.search, tile_mib=mem.tile_mib,
        )
    return P.finish(part), info

def auto_split(mem: "DenseMemory", states, beta, k, need_acc, cert, can, exact):  # type: ignore[no-untyped-def]
    """auto: certified for queries whose bound can hold, exact for the rest."""
    from .candidates import _put

    part = P.empty(states.shape[0], mem.dim, k, need_acc=need_acc)
    sub, info_c = certified_reduce(mem._table.x, states[can], beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
    _put(part, np.flatnonzero(can), sub, np.arange(int(can.sum())))
    rest = np.flatnonzero(~can)
    _put(part, rest, exact(states[rest], k, need_acc), np.arange(rest.size))
    n_q = states.shape[0]
    info = {
        "mass_bound": np.zeros(n_q),
        "k_used": np.full(n_q, len(mem), dtype=np.int64),
        "fell_back": ~can,
    }
    for key in info:
        info[key][can] = info_c[key]
    return part, info


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


def run_steps(one_pass: OnePass, q: np.ndarray, *, steps: int, tol: float, max_norm: float, k: int) -> Steps:
    """Repeat ``one_pass`` on the queries still moving, at most ``steps`` times.

    ``one_pass(states)`` returns (new states, top ids, top weights, per-query
    info arrays). A query stops once its state moves by at most ``tol * M``.
    Shared by one machine (:func:`iterate`) and sharded stores (``_shard_ops``).
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
    mem: "DenseMemory",
    q: np.ndarray,
    was_1d: bool,
    beta: float,
    steps: int,
    tol: float,
    k: int,
    method: str,
    return_energy: bool,
    opts: dict[str, Any],
) -> RetrievalResult:
    def one_pass(states: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        fin, info = reduce(mem, states, beta, k=k, method=method, need_acc=True, opts=opts)
        assert fin.states is not None
        return fin.states, mem._table.ids_at(fin.top_i), fin.top_w, info

    run = run_steps(one_pass, q, steps=steps, tol=tol, max_norm=mem.max_norm, k=k)
    energy = energy_of(mem, run.states, beta, method, opts) if return_energy else None
    info_all = run.info
    if "mass_bound" in info_all:
        info_all["state_bound"] = 2.0 * mem.max_norm * info_all["mass_bound"]
    used = method
    if method == "auto":
        certified_any = "fell_back" in info_all and not bool(np.all(info_all["fell_back"]))
        used = "certified" if certified_any else "exact"
    return shape_result(
        was_1d,
        states=run.states,
        top_ids=run.ids,
        top_weights=run.weights,
        energy=energy,
        steps=run.done,
        converged=run.converged,
        method=used,
        **info_all,
    )


def energy_of(mem: "DenseMemory", states: np.ndarray, beta: float, method: str, opts: dict[str, Any]) -> np.ndarray:
    if "certified" in opts:
        cert = opts["certified"]
        opts = {**opts, "certified": dataclasses.replace(cert, k_start=max(cert.k_start, AUTO_K_START))}
    fin, _ = reduce(mem, states, beta, k=0, method=method, need_acc=False, opts=opts)
    x = mem._table.x
    return lse_energy(fin.lse, states, beta, n=len(mem), max_norm=mem.max_norm,
                      row_blocks=lambda: (x[a : a + 8192] for a in range(0, x.shape[0], 8192)))


def candidate_recall(mem: "DenseMemory", q: np.ndarray, n_cand: int, k: int, n_sample: int) -> float:
    """Mean fraction of faiss exact top-kc found by the index, on a query sample."""
    kc = min(len(mem), max(n_cand, k))
    rng = np.random.default_rng(0)
    sel = np.sort(rng.choice(q.shape[0], min(n_sample, q.shape[0]), replace=False))
    _, exact_pos = faiss.knn(q[sel], mem._table.x, kc, metric=faiss.METRIC_INNER_PRODUCT)
    _, got = mem._fresh_index(where="DenseMemory.retrieve").search(q[sel], kc)
    hits = [np.intersect1d(a, b[b >= 0]).size for a, b in zip(exact_pos, got)]
    return float(np.mean(hits) / kc)


def _store_info(acc: dict[str, Any], info: dict[str, Any], active: np.ndarray, n_q: int) -> None:
    """Write one step's per-query method info into full-length arrays."""
    for key, val in info.items():
        if isinstance(val, np.ndarray) and val.shape[:1] == active.shape:
            if key not in acc:
                acc[key] = np.zeros(n_q, dtype=val.dtype)
            acc[key][active] = val
        else:
            acc[key] = val


def replace(result: RetrievalResult, **changes: Any) -> RetrievalResult:
    return dataclasses.replace(result, **changes)


def shape_result(was_1d: bool, **fields: Any) -> RetrievalResult:
    if was_1d:
        for key, val in fields.items():
            if isinstance(val, np.ndarray) and val.ndim >= 1:
                fields[key] = val[0]
        if fields.get("energy") is not None:
            fields["energy"] = float(fields["energy"])
        fields["converged"] = bool(fields["converged"])
    return RetrievalResult(**fields)
