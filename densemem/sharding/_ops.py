"""Per-shard partials, their exact merge with ids, and the retrieval loop over shards.

Shared by the local sharded path (:mod:`densemem.sharding`) and the Dask path
(:mod:`densemem.sharding`): both compute one :class:`ShardPartial` per shard
with :func:`shard_partial` (the same kernel as one machine), merge them with
:func:`merge` in any tree order, and turn the merged partial into a
:class:`~densemem.RetrievalResult` with :func:`iterate`. Only *where* the shard
partials are computed differs (a loop in this process, or Dask tasks).

Ids travel with the partials
----------------------------
A shard's kernel reports top rows as *its own* row numbers, which mean nothing
to other shards. :func:`shard_partial` therefore looks the ids up on the shard
and returns them beside the top list (``ShardPartial.ids``). :func:`merge`
hands the kernel's :func:`densemem.core.partial.merge` a copy of both partials
whose ``top_i`` are column numbers into the two id tables laid side by side, so
the merged ``top_i`` say which id each kept entry came from. No global row
numbering (and no global id table) is ever needed.

Certified bound across shards
-----------------------------
Shard ``s`` reduces its candidates to ``(m_s, l_s)`` and certifies that the
softmax mass of its omitted rows is ``O_s <= eps_s * l_s * e^(m_s)`` (its own
bound, ``eps_s = (N_s - kc_s) e^(z_kc,s - m_s) / l_s``; 0 where the shard fell
back to its exact path). The shards hold disjoint rows, so the merged omitted
mass is exactly ``O = sum_s O_s`` and the merged candidate normaliser is
``L = sum_s l_s e^(m_s) = l e^m``. Hence the reported global bound

    eps = O / L <= sum_s eps_s l_s e^(m_s) / (l e^m)

is a weighted mean of the shard bounds (weights ``l_s e^(m_s) / L`` sum to 1),
so ``eps <= max_s eps_s <= tol_mass``. The quantity ``o_s = eps_s l_s`` is
carried in the partial (``ShardPartial.omitted``) and rescaled by the merge
exactly like ``l`` (``o = o_a e^(m_a - m) + o_b e^(m_b - m)``), so the bound
is computed, not estimated, in any merge order. The state bound
``2 M eps`` of one machine holds unchanged: the exact state is
``(L s + O t) / (L + O)`` for the candidate state ``s`` and the omitted rows'
mean ``t``, both of norm <= M, so it is within ``O / (L + O) * 2M <= 2M eps``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import faiss
import numpy as np

from ..core import partial as P
from ..core.candidates import CertifiedOptions, bound_can_hold, certified_reduce
from ..core.exact import exact_reduce
from ..core.steps import AUTO_GIVE_UP, AUTO_K_START, auto_split, run_steps, shape_result
from .._validation import (
    check_beta,
    check_fraction,
    check_k,
    check_nonneg_float,
    check_positive_int,
    check_queries,
    check_score_range,
    max_row_norm,
    unit_rows,
)
from ..errors import InputValueError
from ..results import NearestResult, RetrievalResult

SHARD_METHODS = ("auto", "exact", "certified")


@dataclass(slots=True)
class ShardPartial:
    """A kernel partial over one shard (or a merge of shards), with ids and bounds."""

    part: P.Partial
    ids: np.ndarray  # (B, k) ids of part.top_i entries (fill where top_i < 0)
    omitted: np.ndarray | None = None  # (B,) eps_s * l_s in the partial's reference m
    k_used: np.ndarray | None = None  # (B,) candidates used (sum over shards)
    fell_back: np.ndarray | None = None  # (B,) any shard fell back to exact
    certified: bool = False  # some shard answered some query by certified candidates


@dataclass(slots=True)
class ShardNearest:
    """faiss top-k of one shard (or a merge): scores and ids, best first."""

    scores: np.ndarray  # (B, k) float32; -inf (ip) / +inf (l2) padded
    ids: np.ndarray  # (B, k)
    metric: str


def id_fill(dtype: np.dtype) -> Any:
    """Padding id of an id dtype (-1 for integers, '' for strings)."""
    return -1 if dtype.kind in "iu" else ""


def _ids_of(table_ids: np.ndarray, top_i: np.ndarray) -> np.ndarray:
    if table_ids.size == 0:
        return np.full(top_i.shape, id_fill(table_ids.dtype), dtype=table_ids.dtype)
    out = table_ids[np.maximum(top_i, 0)]
    return np.where(top_i >= 0, out, np.asarray(id_fill(table_ids.dtype), dtype=table_ids.dtype))


# ------------------------------------------------------------------ one shard
def shard_partial(
    mem: Any,
    states: np.ndarray,
    beta: float,
    *,
    k: int,
    method: str,
    need_acc: bool,
    cert: CertifiedOptions,
) -> ShardPartial:
    """The partial of one shard memory for ``states`` by the single-machine kernel.

    ``method`` "exact" is :func:`densemem.core.exact.exact_reduce`; "certified" is
    :func:`densemem.core.candidates.certified_reduce` (falling back per query to the
    exact kernel on this shard); "auto" splits the queries as one machine does,
    judged at this shard's size.
    """
    x = mem._table.x
    n_q, n = states.shape[0], x.shape[0]
    if n == 0:  # an empty shard: the identity of the merge
        part = P.empty(n_q, mem.dim, k, need_acc=need_acc)
        zeros = np.zeros(n_q) if method != "exact" else None
        return ShardPartial(
            part, _ids_of(mem._table.ids, part.top_i), omitted=zeros,
            k_used=None if zeros is None else np.zeros(n_q, np.int64),
            fell_back=None if zeros is None else np.zeros(n_q, bool),
        )

    def exact(q: np.ndarray, kk: int, acc: bool) -> P.Partial:
        return exact_reduce(q, x, beta, k=kk, tile_mib=mem.tile_mib, n_threads=mem.n_threads, need_acc=acc)

    if method == "exact":
        part = exact(states, k, need_acc)
        return ShardPartial(part, _ids_of(mem._table.ids, part.top_i))
    if method == "auto":
        cert = dataclasses.replace(cert, give_up=AUTO_GIVE_UP, k_start=max(k, cert.k_start, AUTO_K_START))
        can = bound_can_hold(beta, np.linalg.norm(states, axis=1), mem.max_norm, n, k, cert.tol_mass)
        if not can.any():
            part = exact(states, k, need_acc)
            info = {"mass_bound": np.zeros(n_q), "k_used": np.full(n_q, n, np.int64), "fell_back": np.ones(n_q, bool)}
        elif can.all():
            part, info = certified_reduce(x, states, beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
        else:
            part, info = auto_split(mem, states, beta, k, need_acc, cert, can, exact)
    else:
        part, info = certified_reduce(x, states, beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
    fell = np.asarray(info["fell_back"], bool)
    return ShardPartial(
        part,
        _ids_of(mem._table.ids, part.top_i),
        omitted=np.asarray(info["mass_bound"], np.float64) * part.l,
        k_used=np.asarray(info["k_used"], np.int64),
        fell_back=fell,
        certified=bool((~fell).any()),
    )


def shard_nearest(mem: Any, q: np.ndarray, k: int, metric: str) -> ShardNearest:
    """faiss exact top-min(k, N_s) of one shard, padded to k."""
    x, ids = mem._table.x, mem._table.ids
    pad = np.inf if metric == "l2" else -np.inf
    scores = np.full((q.shape[0], k), pad, np.float32)
    out_ids = np.full((q.shape[0], k), id_fill(ids.dtype), dtype=ids.dtype)
    kk = min(k, x.shape[0])
    if kk:
        fm = faiss.METRIC_INNER_PRODUCT if metric == "ip" else faiss.METRIC_L2
        s, pos = faiss.knn(q, x, kk, metric=fm)
        scores[:, :kk] = s
        out_ids[:, :kk] = _ids_of(ids, pos)
    return ShardNearest(scores, out_ids, metric)


# ----------------------------------------------------------------------- merge
def _common_ids(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two id tables in one dtype (str widths may differ between shards)."""
    if a.dtype == b.dtype:
        return a, b
    if a.dtype.kind == "U" and b.dtype.kind == "U":
        width = max(a.dtype.itemsize, b.dtype.itemsize) // 4
        return a.astype(f"<U{width}"), b.astype(f"<U{width}")
    return a.astype(np.result_type(a.dtype, b.dtype)), b.astype(np.result_type(a.dtype, b.dtype))


def _as_columns(p: P.Partial, start: int) -> P.Partial:
    """``p`` with top_i replaced by column numbers start.. (-1 kept for padding)."""
    cols = np.arange(start, start + p.top_i.shape[1], dtype=np.int64)[None, :]
    return P.Partial(m=p.m, l=p.l, acc=p.acc, top_z=p.top_z, top_i=np.where(p.top_i >= 0, cols, -1))


def _sum(a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray | None:
    return None if a is None and b is None else (b if a is None else a if b is None else a + b)


def merge(a: ShardPartial, b: ShardPartial) -> ShardPartial:
    """Merge the partials of two disjoint shard sets exactly (ids and bounds included)."""
    ka = a.part.top_i.shape[1]
    ids_a, ids_b = _common_ids(a.ids, b.ids)
    part = P.merge(_as_columns(a.part, 0), _as_columns(b.part, ka))
    table = np.concatenate([ids_a, ids_b], axis=1)
    slots = np.concatenate([a.part.top_i, b.part.top_i], axis=1)
    col = np.maximum(part.top_i, 0)
    ids = np.take_along_axis(table, col, 1)
    ids = np.where(part.top_i >= 0, ids, np.asarray(id_fill(table.dtype), dtype=table.dtype))
    part.top_i = np.where(part.top_i >= 0, np.take_along_axis(slots, col, 1), -1)
    omitted = None
    if a.omitted is not None or b.omitted is not None:
        ea, eb = P._rescale(a.part.m, part.m), P._rescale(b.part.m, part.m)
        oa = a.omitted if a.omitted is not None else np.zeros_like(part.m)
        ob = b.omitted if b.omitted is not None else np.zeros_like(part.m)
        omitted = oa * ea + ob * eb
    fell = None if a.fell_back is None and b.fell_back is None else (
        (a.fell_back if a.fell_back is not None else False) | (b.fell_back if b.fell_back is not None else False)
    )
    return ShardPartial(part, ids, omitted, _sum(a.k_used, b.k_used), fell, a.certified or b.certified)


def merge_nearest(a: ShardNearest, b: ShardNearest) -> ShardNearest:
    """Keep the k best of two shard top lists (largest ip / smallest l2), best first."""
    k = max(a.scores.shape[1], b.scores.shape[1])
    ids_a, ids_b = _common_ids(a.ids, b.ids)
    scores = np.concatenate([a.scores, b.scores], axis=1)
    ids = np.concatenate([ids_a, ids_b], axis=1)
    key = scores if a.metric == "l2" else -scores
    order = np.argsort(key, axis=1, kind="stable")[:, :k]
    return ShardNearest(np.take_along_axis(scores, order, 1), np.take_along_axis(ids, order, 1), a.metric)


def tree_merge(items: Sequence[Any], fn: Callable[[Any, Any], Any]) -> Any:
    """Pairwise (balanced tree) merge of a non-empty list with ``fn``."""
    level = list(items)
    while len(level) > 1:
        nxt = [fn(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


# ------------------------------------------------------------------ the loop
@dataclass(frozen=True, slots=True)
class Layout:
    """What the loop needs to know about the whole sharded memory."""

    dim: int
    normalize: bool
    count: int
    max_norm: float


def prepare_queries(queries: Any, layout: Layout, *, where: str) -> tuple[np.ndarray, bool]:
    """Validate (and under ``normalize`` normalise) queries, as one machine does."""
    if layout.count == 0:
        raise InputValueError(f"{where}: the sharded memory is empty; add patterns first.")
    q, was_1d = check_queries(queries, where=where, dim=layout.dim)
    if layout.normalize:
        q = unit_rows(q, where=where, what="query")
    return q, was_1d


@dataclass(frozen=True, slots=True)
class RetrieveArgs:
    """Validated retrieval options (shared by the local and the Dask paths)."""

    q: np.ndarray
    was_1d: bool
    beta: float
    steps: int
    tol: float
    k: int
    method: str
    cert: CertifiedOptions
    return_energy: bool


def check_retrieve(
    layout: Layout, queries: Any, beta: Any, default_beta: float, *, steps: Any, tol: Any, k: Any, method: Any,
    return_energy: Any, tol_mass: Any, k_max: Any, tile_mib: float, where: str,
) -> RetrieveArgs:
    """Validate retrieval options once, at the public boundary."""
    q, was_1d = prepare_queries(queries, layout, where=where)
    if method not in SHARD_METHODS:
        raise InputValueError(
            f"{where}: unknown `method` {method!r}; sharded retrieval uses one of {', '.join(SHARD_METHODS)}."
        )
    cert = CertifiedOptions(
        tol_mass=check_fraction(tol_mass, name="tol_mass", where=where),
        k_max=check_positive_int(k_max, name="k_max", where=where),
        tile_mib=tile_mib,
    )
    beta = default_beta if beta is None else check_beta(beta, where=where)
    check_score_range(beta, max_row_norm(q), layout.max_norm, where=where)
    return RetrieveArgs(
        q=q,
        was_1d=was_1d,
        beta=beta,
        steps=check_positive_int(steps, name="steps", where=where),
        tol=check_nonneg_float(tol, name="tol", where=where),
        k=min(10, layout.count) if k is None else check_k(k, n=layout.count, where=where),
        method=method,
        cert=cert,
        return_energy=bool(return_energy),
    )


def check_nearest(layout: Layout, queries: Any, k: Any, metric: Any, *, where: str) -> tuple[np.ndarray, bool, int]:
    """Validate nearest-neighbour options: (queries, was_1d, k)."""
    q, was_1d = prepare_queries(queries, layout, where=where)
    k = min(10, layout.count) if k is None else check_k(k, n=layout.count, where=where)
    if metric not in ("ip", "l2"):
        raise InputValueError(f"{where}: `metric` must be 'ip' or 'l2'; got {metric!r}.")
    return q, was_1d, k


def run_retrieve(run_pass: PassFn, layout: Layout, a: RetrieveArgs) -> RetrievalResult:
    """:func:`iterate` with validated arguments."""
    return iterate(
        run_pass, layout, a.q, a.was_1d, a.beta, steps=a.steps, tol=a.tol, k=a.k, method=a.method,
        cert=a.cert, return_energy=a.return_energy,
    )


PassFn = Callable[[np.ndarray, int, bool, CertifiedOptions], ShardPartial]
"""run_pass(states, k, need_acc, cert) -> the merged partial of every shard (method bound in)."""


def _finish(sp: ShardPartial) -> tuple[P.Finished, np.ndarray]:
    """finish() of a merged partial, with ids in the same (heaviest first) order."""
    part = _as_columns(sp.part, 0)
    fin = P.finish(part)
    col = np.maximum(fin.top_i, 0)
    ids = np.take_along_axis(sp.ids, col, 1)
    fin.top_i = np.where(fin.top_i >= 0, np.take_along_axis(sp.part.top_i, col, 1), -1)
    return fin, ids


def iterate(
    run_pass: PassFn,
    layout: Layout,
    q: np.ndarray,
    was_1d: bool,
    beta: float,
    *,
    steps: int,
    tol: float,
    k: int,
    method: str,
    cert: CertifiedOptions,
    return_energy: bool,
) -> RetrievalResult:
    """Repeat shard passes until the states stop moving (one pass per step), as one machine does."""
    certified = False

    def one_pass(states: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        nonlocal certified
        sp = run_pass(states, k, True, cert)
        fin, ids = _finish(sp)
        assert fin.states is not None
        info: dict[str, Any] = {}
        if sp.omitted is not None:
            certified = certified or sp.certified
            info = {"mass_bound": _bound(sp), "k_used": sp.k_used, "fell_back": sp.fell_back}
            info = {key: v for key, v in info.items() if v is not None}
        return fin.states, ids, fin.top_w, info

    run = run_steps(one_pass, q, steps=steps, tol=tol, max_norm=layout.max_norm, k=k)
    energy = energy_of(run_pass, layout, run.states, beta, cert) if return_energy else None
    info = run.info
    if "mass_bound" in info:
        info["state_bound"] = 2.0 * layout.max_norm * info["mass_bound"]
    used = method if method != "auto" else ("certified" if certified else "exact")
    return shape_result(
        was_1d, states=run.states, top_ids=run.ids, top_weights=run.weights, energy=energy,
        steps=run.done, converged=run.converged, method=used, **info,
    )


def _bound(sp: ShardPartial) -> np.ndarray:
    """Global omitted fraction: merged omitted mass over the merged normaliser."""
    assert sp.omitted is not None
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(sp.part.l > 0, sp.omitted / sp.part.l, 0.0)


def energy_of(run_pass: PassFn, layout: Layout, states: np.ndarray, beta: float, cert: CertifiedOptions) -> np.ndarray:
    """``-lse/beta + |xi|^2/2 + log(N)/beta + M^2/2`` from one pass without weighted sums.

    Certified searches of this pass start at >= 16 candidates, as on one machine.
    """
    sp = run_pass(states, 0, False, dataclasses.replace(cert, k_start=max(cert.k_start, AUTO_K_START)))
    lse = sp.part.m + np.log(sp.part.l)
    sq = np.einsum("ij,ij->i", states.astype(np.float64), states.astype(np.float64))
    m = layout.max_norm
    return -lse / beta + 0.5 * sq + math.log(layout.count) / beta + 0.5 * m * m


def nearest_result(merged: ShardNearest, was_1d: bool) -> NearestResult:
    if was_1d:
        return NearestResult(ids=merged.ids[0], scores=merged.scores[0], metric=merged.metric)
    return NearestResult(ids=merged.ids, scores=merged.scores, metric=merged.metric)
