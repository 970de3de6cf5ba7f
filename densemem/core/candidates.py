"""Softmax over candidate rows: the certified and index-backed paths.

Both hand per-query candidate sets to the same kernel as the exact path
(:func:`densemem.core.partial.gathered`), so there is one implementation of the
update.

Certified bound. With candidates C (the exact top-kc by score, kc = |C|) and
z = beta * score, every omitted row has z <= z_kc (the smallest candidate), so
the omitted mass is at most (N - kc) exp(z_kc - m) relative to the candidate
normalizer l = sum_C exp(z - m). The omitted *fraction* of the full softmax is
therefore at most eps = (N - kc) exp(z_kc - m) / l, and the state, a convex
blend of rows of norm <= M, moves by at most 2 M eps when the omitted rows are
put back.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import faiss
import numpy as np

from . import partial as P
__all__ = ["CertifiedOptions", "certified_reduce", "index_reduce", "bound_can_hold"]


@dataclass(frozen=True, slots=True)
class CertifiedOptions:
    tol_mass: float = 1e-6
    k_start: int = 0  # 0: the reported k
    k_max: int = 1024
    tile_mib: float = 16.0
    give_up: float = math.inf  # after the first search, eps > tol_mass * give_up goes exact at once


def _gather_partial(
    x: np.ndarray, scores: np.ndarray, pos: np.ndarray, beta: float, *, k: int, need_acc: bool, tile_mib: float
) -> P.Partial:
    """Kernel over per-query candidates, chunked so gathered rows fit ``tile_mib``."""
    b, kc = pos.shape
    valid = pos >= 0
    z = np.where(valid, beta * scores.astype(np.float64), -np.inf)
    safe = np.where(valid, pos, 0)
    if not need_acc:
        return P.gathered(z, None, pos, k=k)
    per = max(1, int(tile_mib * 2**20 // (4 * kc * x.shape[1])))
    out = P.empty(b, x.shape[1], k)
    for s in range(0, b, per):
        rows = x[safe[s : s + per]]  # (chunk, kc, d)
        sel = np.arange(s, min(b, s + per))
        _put(out, sel, P.gathered(z[sel], rows, pos[sel], k=k), np.arange(sel.size))
    return out


def _mass_bound(part: P.Partial, z_last: np.ndarray, n_omitted: int) -> np.ndarray:
    """eps = (N - kc) exp(z_kc - m) / l, computed in log space."""
    if n_omitted <= 0:
        return np.zeros_like(part.m)
    with np.errstate(over="ignore", divide="ignore"):
        log_eps = math.log(n_omitted) + (z_last - part.m) - np.log(part.l)
        return np.exp(np.minimum(log_eps, 700.0))


def bound_can_hold(beta: float, q_norms: np.ndarray, max_norm: float, n: int, k: int, tol_mass: float) -> np.ndarray:
    """Necessary condition for the certified bound, per query, before any search.

    Scores lie in [-M |q|, M |q|], so beta (s_1 - s_k) <= 2 beta M |q|. The
    bound needs (N - k) exp(-beta (s_1 - s_k)) <= tol_mass, hence it can only
    hold where 2 beta M |q| >= ln((N - k) / tol_mass).
    """
    if n <= k:
        return np.ones(q_norms.shape, dtype=bool)
    need = math.log((n - k) / tol_mass)
    return 2.0 * beta * max_norm * q_norms >= need


def _empty_out(b: int, d: int, k: int, need_acc: bool) -> P.Partial:
    return P.empty(b, d, k, need_acc=need_acc)


def _put(out: P.Partial, where: np.ndarray, part: P.Partial, sel: np.ndarray) -> None:
    """Copy rows ``sel`` of ``part`` into rows ``where`` of ``out``."""
    out.m[where] = part.m[sel]
    out.l[where] = part.l[sel]
    if out.acc is not None and part.acc is not None:
        out.acc[where] = part.acc[sel]
    out.top_z[where] = part.top_z[sel]
    out.top_i[where] = part.top_i[sel]


def certified_reduce(
    x: np.ndarray,
    q: np.ndarray,
    beta: float,
    *,
    k: int,
    need_acc: bool,
    opts: CertifiedOptions,
    exact: Callable[[np.ndarray, int, bool], P.Partial],
) -> tuple[P.Partial, dict[str, np.ndarray]]:
    """Certified softmax over faiss exact top-kc candidates, growing kc per query.

    kc starts at ``max(k, k_start)`` and doubles for the queries whose bound
    exceeds ``tol_mass``, up to ``k_max``; the queries still failing then are
    answered by ``exact(q_subset, k, need_acc)`` (reported in ``fell_back``).
    With a finite ``give_up``, queries whose first bound exceeds
    ``tol_mass * give_up`` skip the growth and go to exact at once.
    """
    n, d = x.shape
    b = q.shape[0]
    kc = min(n, max(opts.k_start, k, 1))
    k_cap = min(n, max(opts.k_max, kc))
    out = _empty_out(b, d, k, need_acc)
    bound = np.zeros(b)
    k_used = np.zeros(b, dtype=np.int64)
    fell_back = np.zeros(b, dtype=bool)
    todo = np.arange(b)
    straight: list[np.ndarray] = []
    first = True
    while True:
        scores, pos = faiss.knn(q[todo], x, kc, metric=faiss.METRIC_INNER_PRODUCT)
        part = _gather_partial(x, scores, pos, beta, k=k, need_acc=need_acc, tile_mib=opts.tile_mib)
        eps = _mass_bound(part, beta * scores[:, -1].astype(np.float64), n - kc)
        ok = eps <= opts.tol_mass
        _put(out, todo[ok], part, ok)
        bound[todo[ok]] = eps[ok]
        k_used[todo[ok]] = kc
        if first and math.isfinite(opts.give_up):
            hopeless = ~ok & (eps > opts.tol_mass * opts.give_up)
            straight.append(todo[hopeless])
            ok = ok | hopeless
        first = False
        todo = todo[~ok]
        if todo.size == 0 or kc >= k_cap:
            break
        kc = min(k_cap, 2 * kc)
    todo = np.sort(np.concatenate([todo, *straight]))
    if todo.size:
        fell_back[todo] = True
        ex = exact(q[todo], k, need_acc)
        _put(out, todo, ex, np.arange(todo.size))
        k_used[todo] = n
    return out, {"mass_bound": bound, "k_used": k_used, "fell_back": fell_back}


def index_reduce(
    x: np.ndarray,
    q: np.ndarray,
    beta: float,
    *,
    k: int,
    n_candidates: int,
    need_acc: bool,
    search: Callable[[np.ndarray, int], tuple[np.ndarray, np.ndarray]],
    tile_mib: float,
) -> tuple[P.Partial, dict[str, np.ndarray]]:
    """Softmax over the candidates an approximate index returns (no guarantee)."""
    kc = min(x.shape[0], max(n_candidates, k, 1))
    scores, pos = search(q, kc)
    part = _gather_partial(x, scores, pos, beta, k=k, need_acc=need_acc, tile_mib=tile_mib)
    return part, {"k_used": (pos >= 0).sum(axis=1).astype(np.int64)}
