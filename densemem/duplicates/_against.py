"""A new batch against a stored memory: which new items duplicate a stored item or another new one.

The store is only read (its memory-mapped patterns): a faiss index over a
normalized float32 copy of them is built in memory for this run, and nothing
is written back. The batch is read chunk by chunk (a memory-mapped ``.npy``
stays on disk); each chunk is searched against the store, and only the new
items that match no stored item are kept in memory for the within-batch search.

Rule (the default star rule applied to a store): stored items are always
kept; a new item with a stored item at or above the threshold is planned for
dropping as a duplicate of its most similar stored item; the remaining new
items are planned exactly as :func:`plan_duplicates` plans them alone. So every
item planned for dropping meets the threshold against the item kept for it,
whether that item is stored or new.

What "agrees with the plan of the concatenated data" means here: (1) the pairs
(new, stored) judged are every pair of the concatenated data at or above the
threshold with one end new and one end stored (exact search; IVF: up to its
measured recall); (2) a new item is a duplicate of a stored item iff it has a
stored neighbour at or above the threshold in the concatenated data, and the
stored item named is its most similar one; (3) the new items with no stored
neighbour get the plan ``plan_duplicates`` gives for them alone, which is the
plan of the concatenated data restricted to them once the rows with a stored
neighbour are set aside.
"""

from __future__ import annotations

import time
from typing import Any

import faiss
import numpy as np

from . import _candidates as C
from . import _groups as G
from ._checks import Options, batch_matrix, check_score, finite_unit_chunk
from ._judge import judge_and_group, warn_far_chains  # the within-batch plan is the ordinary one
from ._plan import DuplicatePlan

__all__ = ["plan_against"]

_STATS_ROWS = 1 << 16  # members per block of group statistics (bounded memory)


def _store_unit_rows(patterns: np.ndarray, norms: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Unit float64 copies of some stored rows (read from the memory map)."""
    order = np.argsort(rows, kind="stable")
    out = np.empty((rows.size, patterns.shape[1]))
    out[order] = np.asarray(patterns[rows[order]], dtype=np.float64) / norms[rows[order], None]
    return out


def _batch_unit_rows(x: np.ndarray, rows: np.ndarray) -> np.ndarray:
    order = np.argsort(rows, kind="stable")
    b = np.asarray(x[rows[order]], dtype=np.float64)
    out = np.empty_like(b)
    out[order] = b / np.linalg.norm(b, axis=1, keepdims=True)
    return out


class _StoreIndex:
    """A faiss index over the stored memory's non-zero rows, normalized (built chunk by chunk)."""

    def __init__(self, patterns: np.ndarray, opt: Options, n_batch: int, rng: np.random.Generator,
                 chunk: int) -> None:
        n, d = patterns.shape
        self.patterns = patterns
        self.norms = np.empty(n)
        for a in range(0, n, chunk):
            b = np.asarray(patterns[a : a + chunk], dtype=np.float64)
            self.norms[a : a + chunk] = np.sqrt(np.einsum("ij,ij->i", b, b))
        self.valid = np.flatnonzero(self.norms > 0)
        nv = self.valid.size
        work = float(nv) * n_batch * d
        if opt.candidates == "auto":
            self.source = "exact" if work <= C.EXACT_MAX_WORK else "ivf"
            self.reason = (f"n_stored*n_batch*d = {work:.3g} {'<=' if self.source == 'exact' else '>'} "
                           f"{C.EXACT_MAX_WORK:.3g}")
        else:
            self.source, self.reason = opt.candidates, "requested"
        self.params: dict[str, Any] = {"chosen_because": self.reason, "n_stored": int(n)}
        if self.source == "exact":
            self.index = faiss.IndexFlatIP(d)
            self.params.update(index="IndexFlatIP", search="range_search")
        else:
            nlist = C.default_nlist(nv) if opt.nlist is None else min(opt.nlist, nv)
            quantizer = faiss.IndexFlatIP(d)
            self.index = faiss.IndexIVFFlat(quantizer, d, nlist, faiss.METRIC_INNER_PRODUCT)
            self.index.cp.spherical = True
            self.index.cp.niter = 8
            self.index.cp.min_points_per_centroid = 1
            n_train = min(nv, C.TRAIN_PER_LIST * nlist)
            train_rows = np.sort(rng.choice(self.valid, size=n_train, replace=False))
            self.index.train(self.unit(train_rows).astype(np.float32))
            self.index.nprobe = opt.nprobe
            self.params.update(index="IndexIVFFlat", search="range_search", nlist=nlist)
        for a in range(0, nv, chunk):
            self.index.add(self.unit(self.valid[a : a + chunk]).astype(np.float32))

    def unit(self, rows: np.ndarray) -> np.ndarray:
        return _store_unit_rows(self.patterns, self.norms, rows)

    def search(self, u: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray]:
        """(query row in u, stored row) candidates at or above the search radius."""
        lims, _, lab = self.index.range_search(np.ascontiguousarray(u, dtype=np.float32), C._radius(threshold))
        q = np.repeat(np.arange(u.shape[0], dtype=np.int64), np.diff(lims.astype(np.int64)))
        return q, self.valid[lab.astype(np.int64)]

    def exact_search(self, u: np.ndarray, threshold: float, chunk: int) -> tuple[np.ndarray, np.ndarray]:
        """The same candidates by blocked brute force over the store (the sampled recall check)."""
        radius = C._radius(threshold)
        qs, js = [], []
        u32 = np.ascontiguousarray(u, dtype=np.float32)
        for a in range(0, self.valid.size, chunk):
            rows = self.valid[a : a + chunk]
            qi, ji = np.nonzero(u32 @ self.unit(rows).astype(np.float32).T >= radius)
            qs.append(qi.astype(np.int64))
            js.append(rows[ji])
        return np.concatenate(qs), np.concatenate(js)

    def tune(self, u: np.ndarray, threshold: float, target: float, chunk: int, x64: np.ndarray) -> None:
        """Double nprobe until the pair recall of the sample rows ``u`` reaches ``target``."""
        q, j = self.exact_search(u, threshold, chunk)
        keep = self.rescore(x64, q, j) >= threshold - C.SLACK
        exact = set(zip(q[keep].tolist(), j[keep].tolist()))
        history = []
        nprobe, top = self.index.nprobe, min(self.index.nlist, 256)
        while True:
            self.index.nprobe = nprobe
            q2, j2 = self.search(u, threshold)
            rec = len(exact & set(zip(q2.tolist(), j2.tolist()))) / len(exact) if exact else 1.0
            history.append({"nprobe": nprobe, "pair_recall": rec})
            if rec >= target or nprobe >= top:
                break
            nprobe = min(2 * nprobe, top)
        self.params.update(nprobe=nprobe, nprobe_tuning=history, sample_rows=int(u.shape[0]),
                           sample_pair_recall=history[-1]["pair_recall"])

    def rescore(self, u64: np.ndarray, q: np.ndarray, j: np.ndarray) -> np.ndarray:
        return np.einsum("ij,ij->i", u64[q], self.unit(j)) if q.size else np.empty(0)


def plan_against(data: Any, stored: Any, ids: Any, representative: Any, opt: Options,
                 rng: np.random.Generator, bar: Any, t0: float) -> DuplicatePlan:
    """Plan the new batch ``data`` against the DenseMemory ``stored`` (see the module notes)."""

    x, bids = batch_matrix(data, ids, stored)
    n, d = x.shape
    rule, score = check_score(representative, n)
    chunk = C.chunk_rows_for(d, opt.tile_mib)
    store = _StoreIndex(stored.patterns, opt, n, rng, chunk)
    if store.source == "ivf" and opt.check_sample > 0:
        sample = np.sort(rng.choice(n, size=min(opt.check_sample, n), replace=False))
        norms, u = finite_unit_chunk(np.asarray(x[sample]), 0)
        ok = norms > 0
        store.tune(u[ok], opt.threshold, opt.target_recall, chunk, _batch_unit_rows(x, sample[ok]))
    else:
        store.params["nprobe"] = getattr(store.index, "nprobe", None)
    best_row = np.full(n, -1, dtype=np.int64)  # most similar stored row, per new row
    best_sim = np.full(n, np.nan)
    zero = np.zeros(n, dtype=bool)
    pq, pj, ps = [], [], []
    un_rows, un_unit = [], []
    tick = bar("dedup: batch vs store", n) if bar is not None else None
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        norms, u = finite_unit_chunk(x[a:b], a)
        nz = norms > 0
        zero[a:b] = ~nz
        q, j = store.search(u, opt.threshold)
        q, j = q[nz[q]], j[nz[q]]
        u64 = np.asarray(x[a:b], dtype=np.float64) / np.where(nz, norms, 1.0)[:, None]
        sim = store.rescore(u64, q, j)
        keep = sim >= opt.threshold - C.SLACK
        q, j, sim = q[keep], j[keep], sim[keep]
        pq.append(q + a)
        pj.append(j)
        ps.append(sim)
        if q.size:
            order = np.lexsort((j, -sim, q))  # per row: most similar first, then lowest stored row
            first = np.concatenate([[True], q[order][1:] != q[order][:-1]])
            rows = q[order][first]
            best_row[a + rows] = j[order][first]
            best_sim[a + rows] = sim[order][first]
        free = np.flatnonzero(nz & (best_row[a:b] < 0))
        un_rows.append(free + a)
        un_unit.append(u[free])
        if tick is not None:
            tick.update(b - a)
    if tick is not None:
        tick.close()
    pq_, pj_, ps_ = np.concatenate(pq), np.concatenate(pj), np.concatenate(ps)
    un = np.concatenate(un_rows)
    xu = np.concatenate(un_unit) if un.size else np.empty((0, d), np.float32)
    del un_unit
    uscore = None if score is None else score[un]
    if un.size:
        groups, reps, src2, params2, pairs2 = judge_and_group(xu, opt, rule, uscore, rng, chunk, bar)
    else:
        groups, reps, src2, params2, pairs2 = G.pack_labels(np.empty(0, np.int64)), None, "exact", {}, \
            C.PairSet(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0), "exact", {})
    stats2 = G.summarise(xu, groups, rule, uscore, reps)
    warn_far_chains(opt, stats2["min"], groups)
    del xu

    # groups around stored items: the stored item first, then its new duplicates in batch order
    matched = np.flatnonzero(best_row >= 0)
    order = np.lexsort((matched, best_row[matched]))
    m_rows, m_store = matched[order], best_row[matched][order]
    heads = np.flatnonzero(np.concatenate([[True], m_store[1:] != m_store[:-1]])) if m_rows.size else np.empty(0, np.int64)
    n_sg = heads.size
    counts = np.diff(np.concatenate([heads, [m_rows.size]])) + 1 if n_sg else np.empty(0, np.int64)
    s_off = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    s_rows = np.empty(int(s_off[-1]), np.int64)
    s_flag = np.zeros(int(s_off[-1]), bool)
    if n_sg:
        s_flag[s_off[:-1]] = True
        s_rows[s_off[:-1]] = m_store[heads]
        others = np.ones(s_rows.size, bool)
        others[s_off[:-1]] = False
        s_rows[others] = m_rows
    s_min, s_mean, s_to = _stored_group_stats(store, x, s_off, s_rows, s_flag)

    # the combined plan: stored groups, then within-batch groups
    b_rows = un[groups.members]
    b_rep = un[stats2["reps"]]
    sids = stored.ids
    member_ids = np.concatenate([_mixed_ids(sids, bids, s_rows, s_flag), bids[b_rows]])
    drop = np.zeros(n, bool)
    drop[m_rows] = True
    drop[b_rows] = True
    drop[b_rep] = False
    kept_id = np.empty(n, dtype=member_ids.dtype)
    kept_sim = np.full(n, np.nan)
    kept_id[m_rows] = sids[m_store]
    kept_sim[m_rows] = best_sim[m_rows]
    kept_id[b_rows] = bids[np.repeat(b_rep, groups.sizes)]
    kept_sim[b_rows] = stats2["to_rep"]
    drop_rows = np.flatnonzero(drop)
    pair_ids = np.concatenate([
        np.stack([bids[pq_], sids[pj_]], axis=1) if pq_.size else np.empty((0, 2), member_ids.dtype),
        np.stack([bids[un[pairs2.lo]], bids[un[pairs2.hi]]], axis=1) if pairs2.lo.size
        else np.empty((0, 2), member_ids.dtype),
    ])
    params = {"stored": store.params, "batch": {"candidates": src2, **params2}}
    return DuplicatePlan(
        threshold=opt.threshold, method=opt.method, candidates=store.source, candidate_params=params,
        grouping=opt.grouping, representative_rule=rule, n_items=n,
        n_pairs=int(pq_.size + pairs2.lo.size),
        group_offsets=np.concatenate([s_off, s_off[-1] + groups.offsets[1:]]).astype(np.int64),
        member_ids=member_ids, member_rows=np.concatenate([s_rows, b_rows]),
        member_stored=np.concatenate([s_flag, np.zeros(b_rows.size, bool)]),
        similarities=np.concatenate([s_to, stats2["to_rep"]]),
        representative_ids=np.concatenate([sids[s_rows[s_off[:-1]]] if n_sg else sids[:0], bids[b_rep]]),
        representative_rows=np.concatenate([s_rows[s_off[:-1]], b_rep]).astype(np.int64),
        representative_stored=np.concatenate([np.ones(n_sg, bool), np.zeros(len(groups), bool)]),
        min_similarity=np.concatenate([s_min, stats2["min"]]),
        mean_similarity=np.concatenate([s_mean, stats2["mean"]]),
        keep_ids=bids[~drop], drop_ids=bids[drop_rows],
        duplicate_of_ids=kept_id[drop_rows], duplicate_similarities=kept_sim[drop_rows],
        excluded_zero_ids=bids[zero], seconds=time.perf_counter() - t0,
        stored={"n_stored": int(len(stored)), "dim": int(d), "n_stored_zero": int(len(stored) - store.valid.size)},
        pair_ids=pair_ids, pair_similarities=np.concatenate([ps_, pairs2.sim]),
    )


def _mixed_ids(sids: np.ndarray, bids: np.ndarray, rows: np.ndarray, flag: np.ndarray) -> np.ndarray:
    """Ids of members that are stored (``flag``) or new rows."""
    out = np.empty(rows.size, dtype=np.concatenate([sids[:0], bids[:0]]).dtype)  # the common dtype
    out[flag] = sids[rows[flag]]
    out[~flag] = bids[rows[~flag]]
    return out


def _stored_group_stats(store: _StoreIndex, x: np.ndarray, off: np.ndarray, rows: np.ndarray,
                        flag: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Min/mean pairwise cosine and cosine to the stored item, for groups built around stored items.

    Groups are processed in blocks of about ``_STATS_ROWS`` members, so memory
    stays bounded however many new items duplicate stored ones.
    """
    n_g = off.shape[0] - 1
    mins, means, to = np.empty(n_g), np.empty(n_g), np.empty(rows.size)
    g = 0
    while g < n_g:
        h = int(np.searchsorted(off, off[g] + _STATS_ROWS, side="right")) - 1
        h = max(h, g + 1)
        a, b = int(off[g]), int(off[h])
        r, f = rows[a:b], flag[a:b]
        local = np.empty((b - a, x.shape[1]))
        if f.any():
            local[f] = store.unit(r[f])
        if (~f).any():
            local[~f] = _batch_unit_rows(x, r[~f])
        packed = G.Packed(off[g : h + 1] - a, np.arange(b - a, dtype=np.int64))
        st = G.summarise(local, packed, "first", None, off[g:h] - a)
        mins[g:h], means[g:h], to[a:b] = st["min"], st["mean"], st["to_rep"]
        g = h
    return mins, means, to
