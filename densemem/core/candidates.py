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

from . import _fused
from . import partial as P
from .tiles import knn_tiles, n_threads_default, search_top

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
        rows = x[safe[s : s + per]].astype(np.float32, copy=False)  # (chunk, kc, d); float16 -> float32 exactly
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
    if out.top_z.dtype != part.top_z.dtype:  # the compiled kernel's float64 scores: keep them
        out.top_z = out.top_z.astype(np.result_type(out.top_z, part.top_z))
    out.top_z[where] = part.top_z[sel]
    out.top_i[where] = part.top_i[sel]


# Cost of one exact top-kc search per query, in units of one exact pass (two products and the
# rest), 2 cores, N = 1e5, d = 128, 1000 random unit queries. On a 2-core Intel Xeon with
# AVX-512, the compiled search over row ranges: 0.54, 0.67, 1.28 and 3.69 at kc = 16, 64, 256
# and 1024, about 0.5 + 0.0031 kc (on the first machine, an older Intel one, 0.6 + 0.0014 kc
# for both the compiled search and faiss.knn). A search that costs more than the exact pass
# is never started.
SEARCH_COST = 0.5
SEARCH_COST_PER_CANDIDATE = 0.0031


def search_cost(kc: int) -> float:
    """Cost of one top-``kc`` search per query, in exact passes."""
    return SEARCH_COST + SEARCH_COST_PER_CANDIDATE * kc
AUTO_SAMPLE = 32  # most queries tried first to price the certified path for the batch
MAX_ROUNDS = 3  # searches of at least MIN_PREDICT candidates per query before the exact path answers it
MIN_PREDICT = 8  # fewer first candidates than this: the next search takes this many, unpredicted


def _needed_k(z: np.ndarray, part: P.Partial, n: int, tol_mass: float) -> np.ndarray:
    """Candidates the bound would need, predicted from the scores in hand (inf: hopeless).

    With kc sorted candidate scores z_1 >= ... >= z_kc the bound at K candidates is
    at most N exp(z_K - m) / l_kc, so K must reach the rank where z falls to
    ``z* = m + ln(tol_mass l_kc / N)``. The decline per doubling of the rank is
    read off the last doubling in hand, z_(kc/2) - z_kc, and carried on
    linearly in log K. For scores with a Gaussian-like tail the decline per
    doubling grows with the rank, so this overestimates K (it errs towards the
    exact path, which is always safe).
    """
    b, kc = z.shape
    out = np.full(b, np.inf)
    if kc < 4 or b == 0:  # callers search at least MIN_PREDICT first
        return out
    z_last, z_half = z[:, -1], z[:, kc // 2 - 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        target = part.m + np.log(tol_mass * part.l / n)
        drop = z_half - z_last
        doublings = np.ceil(np.maximum(z_last - target, 0.0) / drop)
    ok = (drop > 0) & np.isfinite(doublings) & (doublings <= 30)
    out[ok] = kc * np.exp2(np.maximum(doublings[ok], 1.0))
    return out


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
    """Certified softmax over faiss exact top-kc candidates, grown per query where it pays.

    kc starts at ``max(k, k_start)`` and grows along the doubling ladder
    ``kc * 2^j`` (capped at ``k_max`` and N). A query whose bound exceeds
    ``tol_mass`` gets a second (at most a third) search, on the first rung that
    reaches the candidate count the scores in hand predict (:func:`_needed_k`),
    and only if that count is within ``k_max``;
    otherwise, or if that search fails too, it goes to ``exact(q_subset, k,
    need_acc)`` (reported in ``fell_back``). A search costs about half an exact
    pass, so a query costs at most a failed first search plus the exact pass.
    With a finite ``give_up`` (auto) the path is also priced before it is
    taken: with more than ``4 * AUTO_SAMPLE`` queries, an evenly spaced sample
    of ``AUTO_SAMPLE`` runs first, and when its mean cost (searches times
    ``SEARCH_COST`` plus exact answers) is not below one exact pass the other
    queries go to exact at once; queries whose first bound exceeds
    ``tol_mass * give_up`` go to exact without a second search.
    """
    n, d = x.shape
    b = q.shape[0]
    out = _empty_out(b, d, k, need_acc)
    bound = np.zeros(b)
    k_used = np.zeros(b, dtype=np.int64)
    fell_back = np.zeros(b, dtype=bool)
    state = (out, bound, k_used)
    todo = np.arange(b)
    n_sample = min(AUTO_SAMPLE, b // 16)  # at most 1/16 of the batch
    if n_sample >= 8:
        # the sample runs its first search only; the searches it would grow to are priced by the
        # counts its scores predict (a second and third round on the sample cost more than the
        # pricing saves where the answer is "exact")
        sample = np.unique(np.linspace(0, b - 1, n_sample).round().astype(np.int64))
        s_exact, searches, s_grow, s_more = _certify(x, q, sample, beta, k, need_acc, opts, state, rounds=1)
        cost = (searches + s_more + s_exact.size) / sample.size
        rest = np.setdiff1d(todo, sample)
        if cost >= 1.0:
            to_exact = np.concatenate([s_exact, s_grow, rest])
        else:
            r_exact, _, _, _ = _certify(x, q, np.sort(np.concatenate([s_grow, rest])), beta, k, need_acc, opts, state)
            to_exact = np.concatenate([s_exact, r_exact])
    else:
        to_exact, _, _, _ = _certify(x, q, todo, beta, k, need_acc, opts, state)
    to_exact = np.sort(to_exact)
    if to_exact.size:
        fell_back[to_exact] = True
        _put(out, to_exact, exact(q[to_exact], k, need_acc), np.arange(to_exact.size))
        k_used[to_exact] = n
        bound[to_exact] = 0.0
    return out, {"mass_bound": bound, "k_used": k_used, "fell_back": fell_back}


def _certify(
    x: np.ndarray, q: np.ndarray, todo: np.ndarray, beta: float, k: int, need_acc: bool,
    opts: CertifiedOptions, state: tuple[P.Partial, np.ndarray, np.ndarray], *, rounds: int | None = None,
) -> tuple[np.ndarray, float, np.ndarray, float]:
    """Search candidates for queries ``todo``; certified answers go into ``state``.

    Returns the queries left for the exact path, the cost of the searches run (in exact
    passes, :func:`search_cost` per query and search), and, where ``rounds`` stopped the
    growth early, the queries that would have grown and the predicted cost of their next
    searches.
    """
    out, bound, k_used = state
    n = x.shape[0]
    kc0 = min(n, max(opts.k_start, k, 1))
    k_cap = min(n, max(opts.k_max, kc0))
    give_up = math.isfinite(opts.give_up)
    k_affordable = int((1.0 - SEARCH_COST) / SEARCH_COST_PER_CANDIDATE)
    left: list[np.ndarray] = []
    stopped: list[np.ndarray] = []
    searches = more = 0.0
    # (queries, kc) groups still to search, and the round each is in
    groups: list[tuple[np.ndarray, int, int]] = [(todo, kc0, 0)] if todo.size else []
    while groups:
        idx, kc, rnd = groups.pop()
        scores, pos = _search(q[idx], x, kc, opts.tile_mib)
        searches += idx.size * search_cost(kc)
        part = _gather_partial(x, scores, pos, beta, k=k, need_acc=need_acc, tile_mib=opts.tile_mib)
        z = beta * scores.astype(np.float64)
        eps = _mass_bound(part, z[:, -1], n - kc)
        ok = eps <= opts.tol_mass
        _put(out, idx[ok], part, ok)
        bound[idx[ok]] = eps[ok]
        k_used[idx[ok]] = kc
        bad = ~ok
        if kc >= k_cap or rnd + 1 >= MAX_ROUNDS:
            left.append(idx[bad])
            continue
        need = np.full(idx.size, np.inf)
        if kc < MIN_PREDICT:  # too few scores to read a decline from: go to the rung >= MIN_PREDICT
            need[bad] = MIN_PREDICT
        else:
            need[bad] = _needed_k(z[bad], _rows(part, bad), n, opts.tol_mass)
        # grow only to a count within k_max whose search costs less than the exact pass
        hopeless = bad & (need > min(k_cap, k_affordable))
        if give_up and rnd == 0:
            hopeless |= bad & (eps > opts.tol_mass * opts.give_up)
        left.append(idx[hopeless])
        grow = bad & ~hopeless
        if grow.any() and rounds is not None and rnd + 1 >= rounds:
            rung = np.ceil(np.log2(np.maximum(need[grow], 2 * kc) / kc0))
            want = np.minimum(k_cap, kc0 * 2**rung)
            stopped.append(idx[grow])
            more += float(sum(search_cost(int(w)) for w in want))
            continue
        if grow.any():
            # the next rung of the doubling ladder kc0 * 2^j that reaches the predicted count
            rung = np.ceil(np.log2(np.maximum(need[grow], 2 * kc) / kc0))
            want = np.minimum(k_cap, kc0 * 2**rung).astype(np.int64)
            for kk in np.unique(want):
                groups.append((idx[grow][want == kk], int(kk), rnd + (kc >= MIN_PREDICT)))
    empty = np.empty(0, np.int64)
    return (np.concatenate(left) if left else empty), searches, (np.concatenate(stopped) if stopped else empty), more


def _search(q: np.ndarray, x: np.ndarray, kc: int, tile_mib: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact top-kc by inner product, best first: the compiled tile kernel where it applies, else faiss."""
    if _fused.available(kc):
        return search_top(q, x, kc, tile_mib=tile_mib, n_threads=n_threads_default())
    if x.dtype != np.float32:  # float16 rows: searched a tile at a time, never copied whole
        return knn_tiles(q, x, kc, metric=faiss.METRIC_INNER_PRODUCT, tile_mib=tile_mib)
    return faiss.knn(q, x, kc, metric=faiss.METRIC_INNER_PRODUCT)


def _rows(part: P.Partial, sel: np.ndarray) -> P.Partial:
    """The partial restricted to rows ``sel`` (m and l only: what the predictor reads)."""
    return P.Partial(m=part.m[sel], l=part.l[sel], acc=None, top_z=part.top_z[sel], top_i=part.top_i[sel])


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
