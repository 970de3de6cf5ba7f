"""The shards of a store as one row source, in this process; and nearest-neighbour merges.

Every shard is an ordinary memory, so its partial comes from the one-memory
source (:class:`densemem.core.rows.TableRows`, the same kernel as one
machine); :class:`LocalShards` merges the shard partials with
:func:`densemem.core.rows.merge` in a balanced tree and hands the result to
the one step loop. The Dask source (:mod:`densemem.sharding._dask`) differs
only in *where* the shard partials are computed.

Ids travel with the partials
----------------------------
A shard's kernel reports top rows as *its own* row numbers, which mean nothing
to other shards. :func:`shard_partial` therefore looks the ids up on the shard
and returns them beside the top list (``IdPartial.ids``). :func:`merge`
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
mass is exactly ``O = sum_s O_s`` and the merged candidate normalizer is
``L = sum_s l_s e^(m_s) = l e^m``. Hence the reported global bound

    eps = O / L <= sum_s eps_s l_s e^(m_s) / (l e^m)

is a weighted mean of the shard bounds (weights ``l_s e^(m_s) / L`` sum to 1),
so ``eps <= max_s eps_s <= tol_mass``. The quantity ``o_s = eps_s l_s`` is
carried in the partial (as ``IdPartial.bound`` times ``l``) and rescaled by the merge
exactly like ``l`` (``o = o_a e^(m_a - m) + o_b e^(m_b - m)``), so the bound
is computed, not estimated, in any merge order. The state bound
``2 M eps`` of one machine holds unchanged: the exact state is
``(L s + O t) / (L + O)`` for the candidate state ``s`` and the omitted rows'
mean ``t``, both of norm <= M, so it is within ``O / (L + O) * 2M <= 2M eps``.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any, Iterator

import numpy as np

from ..core import sparse as SP
from ..core.candidates import CertifiedOptions
from ..core.rows import IdPartial, TableRows, exact_knn, id_fill, ids_of, tree_merge
from ..core.rows import merge as merge_partials
from ..core.rows import _common_ids

SHARD_METHODS = ("auto", "exact", "certified", "index")


def shard_rows(mem: Any, method: str, n_candidates: int = 32, where: str = "ShardedMemory.retrieve") -> TableRows:
    """One shard memory as a row source (the one-machine source on its rows)."""
    index = None
    if method == "index" and len(mem):
        index = lambda: mem._fresh_index(where=where)  # noqa: E731
    return TableRows(mem.patterns, mem.ids, mem.max_norm, method, mem.tile_mib, mem.n_threads, n_candidates, index)


@dataclass(frozen=True, slots=True)
class LocalShards:
    """Every shard of a sharded store, reduced in this process and merged exactly."""

    memories: tuple[Any, ...]
    method: str
    n_candidates: int = 32

    def reduce(self, states: np.ndarray, beta: float, *, k: int, need_acc: bool, cert: CertifiedOptions) -> IdPartial:
        parts = [shard_rows(m, self.method, self.n_candidates).reduce(states, beta, k=k, need_acc=need_acc, cert=cert)
                 for m in self.memories]
        return tree_merge(parts, merge_partials)

    def sparse_support(self, states: np.ndarray, beta: float, smap: SP.SparseMap, *, k_start: int, cap: int,
                       need_rows: bool) -> SP.Support:
        """Every shard's certified support, merged by union (one tau, zeros dropped)."""
        parts = [shard_rows(m, self.method).sparse_support(states, beta, smap, k_start=k_start, cap=cap,
                                                           need_rows=need_rows) for m in self.memories]
        return tree_merge(parts, functools.partial(SP.merge_support, alpha=smap.alpha))

    def sparse_sums(self, states: np.ndarray, beta: float, alpha: float, tau: np.ndarray, *, k: int, final: bool,
                    need_acc: bool) -> SP.Sums:
        """Every shard's tiled sums at tau, added up."""
        parts = [shard_rows(m, self.method).sparse_sums(states, beta, alpha, tau, k=k, final=final, need_acc=need_acc)
                 for m in self.memories]
        return tree_merge(parts, SP.merge_sums)

    def row_blocks(self) -> Iterator[np.ndarray]:
        """Every shard's rows in blocks, shard after shard."""
        for m in self.memories:
            yield from shard_rows(m, "exact").row_blocks()


def shard_candidates(mem: Any, q: np.ndarray, kc: int) -> np.ndarray:
    """Ids of a shard's index candidates for ``q`` (kc per query, fill where missing)."""
    if not len(mem):
        return np.full((q.shape[0], kc), id_fill(mem.ids.dtype), dtype=mem.ids.dtype)
    _, pos = mem._fresh_index(where="ShardedMemory.retrieve").search(q, min(kc, len(mem)))
    return ids_of(mem.ids, pos)


def merged_candidate_recall(nearest: Any, candidates: list[np.ndarray], kc: int) -> float:
    """Mean fraction of the exact global top-kc (merged faiss search) found among every shard's candidates."""
    hits = []
    for j in range(nearest.ids.shape[0]):
        found = np.concatenate([c[j] for c in candidates])
        hits.append(np.intersect1d(nearest.ids[j], found).size)
    return float(np.mean(hits) / kc)


@dataclass(slots=True)
class ShardNearest:
    """faiss top-k of one shard (or a merge): scores and ids, best first."""

    scores: np.ndarray  # (B, k) float32; -inf (ip) / +inf (l2) padded
    ids: np.ndarray  # (B, k)
    metric: str


def shard_nearest(mem: Any, q: np.ndarray, k: int, metric: str) -> ShardNearest:
    """faiss exact top-min(k, N_s) of one shard, padded to k."""
    x, ids = mem.patterns, mem.ids
    pad = np.inf if metric == "l2" else -np.inf
    scores = np.full((q.shape[0], k), pad, np.float32)
    out_ids = np.full((q.shape[0], k), id_fill(ids.dtype), dtype=ids.dtype)
    kk = min(k, x.shape[0])
    if kk:
        s, pos = exact_knn(q, x, kk, metric)
        scores[:, :kk] = s
        out_ids[:, :kk] = ids_of(ids, pos)
    return ShardNearest(scores, out_ids, metric)


def merge_nearest(a: ShardNearest, b: ShardNearest) -> ShardNearest:
    """Keep the k best of two shard top lists (largest ip / smallest l2), best first."""
    k = max(a.scores.shape[1], b.scores.shape[1])
    ids_a, ids_b = _common_ids(a.ids, b.ids)
    scores = np.concatenate([a.scores, b.scores], axis=1)
    ids = np.concatenate([ids_a, ids_b], axis=1)
    key = scores if a.metric == "l2" else -scores
    order = np.argsort(key, axis=1, kind="stable")[:, :k]
    return ShardNearest(np.take_along_axis(scores, order, 1), np.take_along_axis(ids, order, 1), a.metric)
