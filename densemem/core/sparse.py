"""Sparse normalising maps (sparsemax, alpha-entmax): exact supports from faiss candidates, a tiled fallback.

The update is ``xi <- X.T p`` with ``p = alpha-entmax(z)``, ``z = beta X xi``:

    p_i = [(alpha - 1) z_i - tau]_+ ^ (1 / (alpha - 1)),   tau such that sum p = 1

(Peters, Niculae & Martins, ACL 2019, eq. 11; alpha = 2 is sparsemax, Martins &
Astudillo, ICML 2016). The largest weight is at most 1, so
``tau >= (alpha - 1) z_max - 1``: every row with ``z <= z_max - 1/(alpha-1)``
has weight exactly zero.

Certificate. Take candidates C = faiss's exact top-kc rows by score, and let
``tau_C`` solve the equation over C alone. If the smallest candidate has
``(alpha - 1) z_kc <= tau_C``, every omitted row (``z <= z_kc``) carries
weight 0 at ``tau_C``, so ``tau_C`` also solves the equation over all rows:
the answer over C *is* the answer over all rows, with zero omitted mass.
Otherwise kc grows fourfold (up to a cap) and the query is searched again; a query
whose support would exceed the cap is answered by the tiled pass.

The partial of a sparse map (:class:`Support`) is the support of a row set:
its rows' ``z``, ids and vectors, and its ``tau``. Adding rows can only raise
tau (the sum of weights at a fixed tau grows), so a row outside one set's
support stays outside the support of any union: two supports merge exactly by
taking their union, solving for tau once and dropping the rows left at zero
(:func:`merge_support`). Shards merge this way, in any order.

Tiled fallback (:func:`tiled_answer`). ``f(tau) = sum_i p_i(tau)`` is convex
and decreasing in tau, so Newton's method from ``tau_0 = (alpha-1) z_max - 1``
(where ``f >= 1``) rises monotonically to the root (Michelot's algorithm for
sparsemax, finite). Each Newton step is one tiled pass over the rows adding up
``f`` and ``f'`` (:class:`Sums`, additive across tiles and shards); a last pass
adds the weighted rows. No (n_queries x N) matrix is formed.

Energy. ``E(xi) = -Omega*(beta X xi)/beta + xi.xi/2 + H/beta + M^2/2`` with
``Omega(p) = (sum p^alpha - 1) / (alpha (alpha - 1))`` the Tsallis negentropy
and ``Omega*(z) = p.z - Omega(p)`` at ``p = entmax(z)`` (its convex conjugate;
Blondel, Martins & Niculae, JMLR 2020, sec. 4). ``H = (1 - N^(1-alpha)) /
(alpha (alpha - 1))`` is the largest Tsallis entropy, so ``E >= (|xi| - M)^2/2
>= 0``; the update never raises E (the concave-convex procedure, as for the
log-sum-exp energy: Yuille & Rangarajan 2003; Santos et al., ICML 2024).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import faiss
import numpy as np

from .ids import common_ids as _common
from .ids import id_fill as _id_fill
from .ids import ids_of as _ids_of
from .tiles import map_query_chunks, tile_rows_for

__all__ = [
    "WEIGHTINGS", "SparseMap", "sparse_map", "solve_tau", "entmax", "Support", "Sums", "Answer",
    "table_support", "merge_support", "table_sums", "merge_sums", "sparse_pass", "max_entropy",
]

WEIGHTINGS: tuple[str, ...] = ("softmax", "sparsemax", "entmax15", "entmax")
NAMED_ALPHA = {"sparsemax": 2.0, "entmax15": 1.5}
K_START = 8  # first candidate count of the faiss search (at least k)
GROW = 4  # candidate growth factor per search round
NEWTON_ITERS = 200
_TOL = 1e-13


@dataclass(frozen=True, slots=True)
class SparseMap:
    """A sparse normalising map: alpha-entmax with alpha in (1, 2] (2: sparsemax)."""

    name: str
    alpha: float

    @property
    def window(self) -> float:
        """``1/(alpha-1)``: rows more than this below the top ``beta*score`` get weight 0."""
        return 1.0 / (self.alpha - 1.0)


def sparse_map(weighting: str, alpha: float | None) -> SparseMap | None:
    """The map of checked options (None for softmax)."""
    if weighting == "softmax":
        return None
    return SparseMap(weighting, float(NAMED_ALPHA.get(weighting, alpha)))  # type: ignore[arg-type]


# ------------------------------------------------------------ the map itself
def _powers(u: np.ndarray, pos: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """``p = u^(1/(alpha-1))`` and ``u^(1/(alpha-1) - 1)`` (0 outside ``pos``; ``u`` is 0 there)."""
    if alpha == 2.0:
        return u, pos.astype(np.float64)
    if alpha == 1.5:
        return u * u, u
    e = 1.0 / (alpha - 1.0)
    return u ** e, np.where(pos, u ** (e - 1.0), 0.0)


def _f_fp(t: np.ndarray, tau: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """sum_i p_i(tau) and -d/dtau of it, per row of ``t = (alpha-1) z``."""
    u = t - tau[:, None]
    pos = u > 0
    p, dp = _powers(np.where(pos, u, 0.0), pos, alpha)
    return p.sum(axis=1), dp.sum(axis=1) / (alpha - 1.0)


def _weights(t: np.ndarray, tau: np.ndarray, alpha: float) -> np.ndarray:
    """p_i = [t_i - tau]_+ ^ (1/(alpha-1)) (not renormalised)."""
    with np.errstate(invalid="ignore"):
        u = t - tau[:, None]
    u = np.where(u > 0, u, 0.0)
    return u if alpha == 2.0 else u ** (1.0 / (alpha - 1.0))


def solve_tau(z: np.ndarray, alpha: float) -> np.ndarray:
    """tau per row of ``z`` (float64, -inf for a missing entry) by Newton's method from below.

    The result is at most the exact root (Newton on a convex decreasing
    function, started left of the root, stays left), so a row judged outside
    the support at it is outside the exact support too. A row with no entry
    gets tau = -inf.
    """
    t = (alpha - 1.0) * np.asarray(z, np.float64)
    tmax = t.max(axis=1) if t.shape[1] else np.full(t.shape[0], -np.inf)
    tau = np.where(np.isfinite(tmax), tmax - 1.0, -np.inf)
    act = np.flatnonzero(np.isfinite(tmax))
    for _ in range(NEWTON_ITERS):
        if act.size == 0:
            break
        f, fp = _f_fp(t[act], tau[act], alpha)
        step = (f - 1.0) / fp
        tau[act] += np.maximum(step, 0.0)
        done = (f - 1.0 <= _TOL) | (step <= _TOL * (1.0 + np.abs(tau[act])))
        act = act[~done]
    return tau


def entmax(z: Any, alpha: float) -> np.ndarray:
    """alpha-entmax of each row of ``z`` (float64), exact zeros outside the support.

    Examples
    --------
    >>> from densemem.core.sparse import entmax
    >>> entmax([[3.0, 1.0, 0.2]], 2.0).tolist()
    [[1.0, 0.0, 0.0]]
    """
    z = np.atleast_2d(np.asarray(z, np.float64))
    tau = solve_tau(z, alpha)
    p = _weights((alpha - 1.0) * z, tau, alpha)
    return p / p.sum(axis=1, keepdims=True)


def max_entropy(n: int, alpha: float) -> float:
    """Largest Tsallis alpha-entropy over n outcomes (the uniform one)."""
    return (1.0 - float(n) ** (1.0 - alpha)) / (alpha * (alpha - 1.0))


def _omega_star(pz: np.ndarray, palpha: np.ndarray, alpha: float) -> np.ndarray:
    """Omega*(z) = p.z - (sum p^alpha - 1)/(alpha (alpha - 1)) for a normalised p."""
    return pz - (palpha - 1.0) / (alpha * (alpha - 1.0))


# ------------------------------------------------------- the sparse partial
@dataclass(slots=True)
class Support:
    """The support of a row set per query: the partial of a sparse map.

    ``z`` (B, w) float64 sorted descending, -inf past the support; ``ids`` the
    rows' ids; ``rows`` (B, w, d) float32 or None; ``tau`` (B,). Where
    ``certified`` is False the support would exceed the cap (the entries are
    then empty) and the query needs the tiled pass. ``k_used``: candidates
    searched per query; ``n_rows``: rows of the set.
    """

    z: np.ndarray
    ids: np.ndarray
    rows: np.ndarray | None
    tau: np.ndarray
    certified: np.ndarray
    k_used: np.ndarray
    n_rows: int


def empty_support(b: int, d: int, ids_dtype: np.dtype, need_rows: bool) -> Support:
    """The support of an empty row set (the identity of :func:`merge_support`)."""
    return Support(
        np.full((b, 0), -np.inf), np.empty((b, 0), ids_dtype),
        np.empty((b, 0, d), np.float32) if need_rows else None,
        np.full(b, -np.inf), np.ones(b, bool), np.zeros(b, np.int64), 0,
    )


def _pack(z: np.ndarray, cols: np.ndarray, alpha: float, tau: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort each row's entries by z (descending) and keep its support, -inf padded to the widest."""
    keep = (alpha - 1.0) * z > tau[:, None]
    zz = np.where(keep, z, -np.inf)
    order = np.argsort(-zz, axis=1, kind="stable")
    width = int(keep.sum(axis=1).max()) if z.shape[0] and z.shape[1] else 0
    order = order[:, :width]
    zs = np.take_along_axis(zz, order, 1)
    return zs, np.where(np.isfinite(zs), np.take_along_axis(cols, order, 1), -1)


def table_support(
    x: np.ndarray, ids: np.ndarray, q: np.ndarray, beta: float, smap: SparseMap, *, k_start: int, cap: int,
    need_rows: bool,
) -> Support:
    """The certified support of every query over one table's rows, by growing faiss top-kc searches."""
    n, d = x.shape
    b = q.shape[0]
    if n == 0 or b == 0:
        return empty_support(b, d, ids.dtype, need_rows)
    a = smap.alpha
    kc = min(n, max(k_start, 1))
    cap = min(n, max(cap, kc))
    tau = np.full(b, -np.inf)
    certified = np.zeros(b, bool)
    k_used = np.full(b, n, np.int64)
    got: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []  # (queries, z, positions)
    todo = np.arange(b)
    while todo.size:
        scores, pos = faiss.knn(q[todo], x, kc, metric=faiss.METRIC_INNER_PRODUCT)
        z = beta * scores.astype(np.float64)
        t_tau = solve_tau(z, a)
        ok = np.ones(todo.size, bool) if kc >= n else (a - 1.0) * z[:, -1] <= t_tau
        if ok.any():
            zs, ps = _pack(z[ok], pos[ok], a, t_tau[ok])
            got.append((todo[ok], zs, ps))
            tau[todo[ok]] = t_tau[ok]
            certified[todo[ok]] = True
            k_used[todo[ok]] = kc
        todo = todo[~ok]
        if kc >= cap:
            break
        kc = min(cap, GROW * kc)
    width = max([g[1].shape[1] for g in got], default=0)
    z_all = np.full((b, width), -np.inf)
    p_all = np.full((b, width), -1, np.int64)
    for sel, zs, ps in got:
        z_all[sel, : zs.shape[1]] = zs
        p_all[sel, : ps.shape[1]] = ps
    rows = None
    if need_rows:
        rows = x[np.maximum(p_all, 0)]
        rows[p_all < 0] = 0.0
    return Support(z_all, _ids_of(ids, p_all), rows, tau, certified, k_used, n)


def merge_support(a: Support, b: Support, alpha: float) -> Support:
    """The support of the union of two disjoint row sets: union, one tau, drop the zeros (exact)."""
    ia, ib = _common(a.ids, b.ids)
    z = np.concatenate([a.z, b.z], axis=1)
    cols = np.broadcast_to(np.arange(z.shape[1], dtype=np.int64), z.shape)
    tau = solve_tau(z, alpha)
    zs, cs = _pack(z, cols, alpha, tau)
    safe = np.maximum(cs, 0)
    if cs.shape[1]:
        ids = np.take_along_axis(np.concatenate([ia, ib], axis=1), safe, 1)
        ids = np.where(cs >= 0, ids, np.asarray(_id_fill(ids.dtype), dtype=ids.dtype))
    else:
        ids = np.empty(zs.shape, ia.dtype)
    rows = None
    if a.rows is not None and b.rows is not None:
        both = np.concatenate([a.rows, b.rows], axis=1)
        rows = np.take_along_axis(both, safe[:, :, None], 1) if cs.shape[1] else both[:, :0]
    return Support(zs, ids, rows, tau, a.certified & b.certified, a.k_used + b.k_used, a.n_rows + b.n_rows)


# -------------------------------------------------------- the tiled fallback
@dataclass(slots=True)
class Sums:
    """Additive sums of one tiled pass at a fixed tau (per query), mergeable across tiles and shards.

    ``f`` = sum p_i, ``fp`` = -df/dtau, ``zmax`` = largest z; with ``final``:
    ``count`` (support size), ``acc`` = sum p_i x_i (float64, or None),
    ``pz`` = sum p_i z_i, ``palpha`` = sum p_i^alpha and the top-k by z.
    """

    f: np.ndarray
    fp: np.ndarray
    zmax: np.ndarray
    count: np.ndarray | None = None
    acc: np.ndarray | None = None
    pz: np.ndarray | None = None
    palpha: np.ndarray | None = None
    top_z: np.ndarray | None = None
    top_ids: np.ndarray | None = None


def _top(z: np.ndarray, ids: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The k largest z per row with their ids, largest first (-inf padded)."""
    w = z.shape[1]
    if w > k:
        sel = np.argpartition(-z, k - 1, axis=1)[:, :k] if k else np.empty((z.shape[0], 0), np.int64)
        z, ids = np.take_along_axis(z, sel, 1), np.take_along_axis(ids, sel, 1)
    elif w < k:
        z = np.concatenate([z, np.full((z.shape[0], k - w), -np.inf)], axis=1)
        ids = np.concatenate([ids, np.full((ids.shape[0], k - w), _id_fill(ids.dtype), ids.dtype)], axis=1)
    order = np.argsort(-z, axis=1, kind="stable")
    return np.take_along_axis(z, order, 1), np.take_along_axis(ids, order, 1)


def table_sums(
    x: np.ndarray, ids: np.ndarray, q: np.ndarray, beta: float, alpha: float, tau: np.ndarray, *, k: int,
    final: bool, need_acc: bool, tile_mib: float, n_threads: int,
) -> Sums:
    """One tiled pass of one table at the given tau (tau = +inf: only z_max)."""
    n, d = x.shape
    b = q.shape[0]
    qz = np.ascontiguousarray(q * np.float32(beta), dtype=np.float32)
    live = np.isfinite(tau)

    def run(sl: slice) -> Sums:
        qb, tb, lb = qz[sl], tau[sl], live[sl]
        m = qb.shape[0]
        out = Sums(np.zeros(m), np.zeros(m), np.full(m, -np.inf))
        if final:
            out.count, out.pz, out.palpha = np.zeros(m, np.int64), np.zeros(m), np.zeros(m)
            out.acc = np.zeros((m, d)) if need_acc else None
            out.top_z, out.top_ids = np.full((m, k), -np.inf), np.full((m, k), -1, np.int64)
        step = max(1, tile_rows_for(m, tile_mib / 8))  # about six float64 copies of the tile sit beside it
        for start in range(0, n, step):
            rows = x[start:start + step]
            z32 = qb @ rows.T
            np.maximum(out.zmax, z32.max(axis=1), out=out.zmax)
            if final and k:
                cols = np.broadcast_to(np.arange(start, start + rows.shape[0], dtype=np.int64), z32.shape)
                tz, ti = _top(z32.astype(np.float64), cols, k)
                out.top_z, out.top_ids = _top(np.concatenate([out.top_z, tz], 1),
                                              np.concatenate([out.top_ids, ti], 1), k)
            if not lb.any():
                continue
            z = z32.astype(np.float64)
            u = (alpha - 1.0) * z - tb[:, None]
            pos = u > 0
            if not pos.any():
                continue
            u[~pos] = 0.0
            p, dp = _powers(u, pos, alpha)
            out.f += p.sum(axis=1)
            out.fp += dp.sum(axis=1) / (alpha - 1.0)
            if final:
                out.count += pos.sum(axis=1)
                out.pz += (p * np.where(pos, z, 0.0)).sum(axis=1)
                out.palpha += (p ** alpha).sum(axis=1)
                if out.acc is not None:
                    out.acc += p @ rows.astype(np.float64)
        return out

    parts = map_query_chunks(run, b, n_threads=n_threads, chunk=256) if b else [run(slice(0, 0))]
    out = parts[0] if len(parts) == 1 else _concat_sums(parts)
    if final and out.top_ids is not None:
        out.top_ids = _ids_of(ids, out.top_ids)
    return out


def _concat_sums(parts: list[Sums]) -> Sums:
    vals = {}
    for name in Sums.__slots__:  # type: ignore[attr-defined]
        got = [getattr(p, name) for p in parts]
        vals[name] = None if got[0] is None else np.concatenate(got)
    return Sums(**vals)


def empty_sums(b: int, d: int, k: int, ids_dtype: np.dtype, *, final: bool, need_acc: bool) -> Sums:
    """The sums of an empty row set."""
    out = Sums(np.zeros(b), np.zeros(b), np.full(b, -np.inf))
    if final:
        out.count, out.pz, out.palpha = np.zeros(b, np.int64), np.zeros(b), np.zeros(b)
        out.acc = np.zeros((b, d)) if need_acc else None
        out.top_z = np.full((b, k), -np.inf)
        out.top_ids = np.full((b, k), _id_fill(ids_dtype), ids_dtype)
    return out


def merge_sums(a: Sums, b: Sums) -> Sums:
    """Sums over the union of two disjoint row sets."""
    out = Sums(a.f + b.f, a.fp + b.fp, np.maximum(a.zmax, b.zmax))
    if a.count is not None and b.count is not None:
        out.count, out.pz, out.palpha = a.count + b.count, a.pz + b.pz, a.palpha + b.palpha  # type: ignore[operator]
        out.acc = None if a.acc is None or b.acc is None else a.acc + b.acc
        assert a.top_z is not None and b.top_z is not None and a.top_ids is not None and b.top_ids is not None
        ia, ib = _common(a.top_ids, b.top_ids)
        out.top_z, out.top_ids = _top(np.concatenate([a.top_z, b.top_z], 1), np.concatenate([ia, ib], 1),
                                      a.top_z.shape[1])
    return out


# ------------------------------------------------------------------ driver
class SparseSource(Protocol):
    """What a row source offers for sparse maps (one table, local shards, Dask shards)."""

    def sparse_support(self, states: np.ndarray, beta: float, smap: SparseMap, *, k_start: int, cap: int,
                       need_rows: bool) -> Support: ...

    def sparse_sums(self, states: np.ndarray, beta: float, alpha: float, tau: np.ndarray, *, k: int, final: bool,
                    need_acc: bool) -> Sums: ...


@dataclass(slots=True)
class Answer:
    """One sparse update per query: states, top ids and weights, support size, Omega* and the path."""

    states: np.ndarray | None
    top_ids: np.ndarray
    top_w: np.ndarray
    support: np.ndarray
    omega: np.ndarray
    k_used: np.ndarray
    fell_back: np.ndarray


def _from_support(sup: Support, alpha: float, k: int) -> Answer:
    t = (alpha - 1.0) * sup.z
    p = _weights(t, sup.tau, alpha)
    s = p.sum(axis=1, keepdims=True)
    p = np.divide(p, s, out=np.zeros_like(p), where=s > 0)
    states = None
    if sup.rows is not None:
        states = np.einsum("bw,bwd->bd", p.astype(np.float32), sup.rows)  # float32, as the softmax paths
    zfin = np.where(p > 0, sup.z, 0.0)
    omega = _omega_star((p * zfin).sum(axis=1), (p ** alpha).sum(axis=1), alpha)
    top_w, top_ids = _first(p, sup.ids, k)
    b = p.shape[0]
    return Answer(states, top_ids, top_w, (p > 0).sum(axis=1), omega, sup.k_used, np.zeros(b, bool))


def _first(p: np.ndarray, ids: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The first k columns (support sorted by z), zero-weight entries given the fill id."""
    b, w = p.shape
    fill = np.asarray(_id_fill(ids.dtype), dtype=ids.dtype)
    top_w = np.zeros((b, k))
    top_ids = np.full((b, k), fill, dtype=ids.dtype)
    c = min(k, w)
    top_w[:, :c] = p[:, :c]
    top_ids[:, :c] = np.where(p[:, :c] > 0, ids[:, :c], fill)
    return top_w, top_ids


def tiled_answer(source: SparseSource, states: np.ndarray, beta: float, alpha: float, *, k: int,
                 need_acc: bool, n_rows: int) -> Answer:
    """The exact answer by Newton passes over every row (no candidates, no n_queries x N matrix)."""
    b = states.shape[0]
    first = source.sparse_sums(states, beta, alpha, np.full(b, np.inf), k=k, final=False, need_acc=False)
    tau = (alpha - 1.0) * first.zmax - 1.0
    act = np.arange(b)
    for _ in range(NEWTON_ITERS):
        if act.size == 0:
            break
        s = source.sparse_sums(states[act], beta, alpha, tau[act], k=k, final=False, need_acc=False)
        step = (s.f - 1.0) / s.fp
        tau[act] += np.maximum(step, 0.0)
        done = (s.f - 1.0 <= _TOL) | (step <= _TOL * (1.0 + np.abs(tau[act])))
        act = act[~done]
    fin = source.sparse_sums(states, beta, alpha, tau, k=k, final=True, need_acc=need_acc)
    assert fin.top_z is not None and fin.top_ids is not None and fin.pz is not None and fin.palpha is not None
    f = fin.f
    p_top = _weights((alpha - 1.0) * fin.top_z, tau, alpha) / f[:, None]
    fill = np.asarray(_id_fill(fin.top_ids.dtype), dtype=fin.top_ids.dtype)
    top_ids = np.where(p_top > 0, fin.top_ids, fill)
    states_out = None if fin.acc is None else (fin.acc / f[:, None]).astype(np.float32)
    omega = _omega_star(fin.pz / f, fin.palpha / f ** alpha, alpha)
    assert fin.count is not None
    return Answer(states_out, top_ids, p_top, fin.count.astype(np.int64), omega, np.full(b, n_rows, np.int64),
                  np.ones(b, bool))


def _combine(b: int, k: int, parts: list[tuple[np.ndarray, Answer]]) -> Answer:
    """One answer from answers of disjoint query subsets."""
    ids_dt = parts[0][1].top_ids
    for _, p in parts[1:]:
        ids_dt, _ = _common(ids_dt, p.top_ids)
    dims = [p.states.shape[1] for _, p in parts if p.states is not None]
    out = Answer(
        np.zeros((b, dims[0]), np.float32) if dims else None,
        np.full((b, k), _id_fill(ids_dt.dtype), ids_dt.dtype), np.zeros((b, k)), np.zeros(b, np.int64),
        np.zeros(b), np.zeros(b, np.int64), np.zeros(b, bool),
    )
    for sel, p in parts:
        if out.states is not None and p.states is not None:
            out.states[sel] = p.states
        out.top_ids[sel] = p.top_ids
        for name in ("top_w", "support", "omega", "k_used", "fell_back"):
            getattr(out, name)[sel] = getattr(p, name)
    return out


def sparse_pass(source: SparseSource, states: np.ndarray, beta: float, smap: SparseMap, *, k: int, need_acc: bool,
                exact: bool, k_start: int, cap: int, n_rows: int) -> Answer:
    """One sparse update of every query: certified candidates where the support fits ``cap``, tiled otherwise."""
    b = states.shape[0]
    parts: list[tuple[np.ndarray, Answer]] = []
    rest = np.arange(b)
    if not exact:
        sup = source.sparse_support(states, beta, smap, k_start=k_start, cap=cap, need_rows=need_acc)
        ok = sup.certified
        if ok.any():
            sub = Support(sup.z[ok], sup.ids[ok], None if sup.rows is None else sup.rows[ok], sup.tau[ok],
                          ok[ok], sup.k_used[ok], sup.n_rows)
            parts.append((np.flatnonzero(ok), _from_support(sub, smap.alpha, k)))
        rest = np.flatnonzero(~ok)
    if rest.size:
        parts.append((rest, tiled_answer(source, states[rest], beta, smap.alpha, k=k, need_acc=need_acc,
                                         n_rows=n_rows)))
    if len(parts) == 1 and parts[0][0].size == b:
        return parts[0][1]
    return _combine(b, k, parts)


def sparse_energy(source: SparseSource, states: np.ndarray, beta: float, smap: SparseMap, *, exact: bool,
                  k_start: int, cap: int, count: int, max_norm: float) -> np.ndarray:
    """``-Omega*(beta X xi)/beta + |xi|^2/2 + H_max/beta + M^2/2`` (>= 0)."""
    ans = sparse_pass(source, states, beta, smap, k=0, need_acc=False, exact=exact, k_start=k_start, cap=cap,
                      n_rows=count)
    sq = np.einsum("ij,ij->i", states.astype(np.float64), states.astype(np.float64))
    return -ans.omega / beta + 0.5 * sq + max_entropy(count, smap.alpha) / beta + 0.5 * max_norm * max_norm

