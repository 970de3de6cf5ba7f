"""Candidate pairs for near-duplicate search: exact, IVF, blocked self-join and HNSW sources.

Every source returns pairs ``(lo, hi)`` with ``lo < hi`` (row numbers of the
normalized matrix), re-scored in float64 so a pair gets the same similarity
whichever source found it. The edge rule is ``cosine >= threshold - SLACK``.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import faiss
import numpy as np
from faiss.contrib.ivf_tools import add_preassigned, range_search_preassigned

from ..core.index import make_index, train_ivf
from ..core.tiles import blas_single_thread, n_threads_default

__all__ = [
    "SLACK",
    "PairSet",
    "choose_source",
    "chunk_rows_for",
    "exact_pairs",
    "hnsw_pairs",
    "ivf_pairs",
    "join_pairs",
    "sample_recall",
]

SLACK = 1e-6
"""Cosine tolerance of the edge rule: rounding of float32 unit vectors is
about 1e-7, so exact copies meet ``threshold=1.0``."""

_MARGIN = 2e-5
"""faiss scores in float32; search this much below the rule, then re-score."""

EXACT_MAX_WORK = 2.0**38
"""``auto`` uses exact search while n * n * d stays below this (~46k rows at d=128)."""


@dataclass(slots=True)
class PairSet:
    """Edges of the similarity graph and how they were found."""

    lo: np.ndarray  # int64
    hi: np.ndarray  # int64
    sim: np.ndarray  # float64
    source: str
    params: dict[str, Any] = field(default_factory=dict)


Progress = Callable[[str, int], Any]


def chunk_rows_for(d: int, tile_mib: float) -> int:
    """Query rows per chunk so that a chunk's working arrays stay near ``tile_mib``."""
    rows = int(tile_mib * 2**20 / (4.0 * max(d, 1) * 8))
    return max(256, min(rows, 1 << 16))


def choose_source(n: int, d: int, requested: str) -> tuple[str, str]:
    """Pick the candidate source; return (name, reason)."""
    if requested != "auto":
        return requested, "requested"
    work = float(n) * n * d
    if work <= EXACT_MAX_WORK:
        return "exact", f"n*n*d = {work:.3g} <= {EXACT_MAX_WORK:.3g}: brute force is affordable"
    return "join", (f"n*n*d = {work:.3g} > {EXACT_MAX_WORK:.3g}: blocked self-join on an inverted-file "
                    "partition (BLAS products per list)")


class _Clock:
    """Wall time of consecutive phases."""

    def __init__(self) -> None:
        self.laps: dict[str, float] = {}
        self.cpu: dict[str, float] = {}
        self._t = time.perf_counter()
        self._c = time.process_time()

    def lap(self, name: str) -> None:
        now, cpu = time.perf_counter(), time.process_time()
        self.laps[name] = round(now - self._t, 3)
        self.cpu[name] = round(cpu - self._c, 3)
        self._t, self._c = now, cpu


def _finish(lo: np.ndarray, hi: np.ndarray, sims: np.ndarray, kind: str, params: dict[str, Any],
            clock: _Clock, sample: np.ndarray | None, exact: dict[int, set[int]] | None) -> PairSet:
    """The pair set of an index-backed search, with its phase times and, when an exact
    sample was scored, the pair recall on it recorded in ``params``."""
    params["phase_seconds"] = clock.laps
    params["phase_cpu_seconds"] = clock.cpu
    pairs = PairSet(lo, hi, sims, kind, params)
    if exact is not None and sample is not None:
        params["sample_rows"] = int(sample.size)
        params["sample_pair_recall"] = sample_recall(pairs, sample, exact)
    return pairs


def _chunks(n: int, size: int) -> Iterator[tuple[int, int]]:
    for start in range(0, n, size):
        yield start, min(n, start + size)


def _bar(progress: Progress | None, desc: str, total: int) -> Any:
    return progress(desc, total) if progress is not None else None


def _tick(bar: Any, k: int) -> None:
    if bar is not None:
        bar.update(k)


def _close(bar: Any) -> None:
    if bar is not None:
        bar.close()


def _radius(threshold: float) -> float:
    return float(np.float32(threshold - SLACK - _MARGIN))


def _from_lists(start: int, lims: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Turn a faiss range/knn answer for queries start.. into (query, neighbour) rows."""
    q = np.repeat(np.arange(start, start + len(lims) - 1, dtype=np.int64), np.diff(lims.astype(np.int64)))
    return q, labels.astype(np.int64, copy=False)


def rescore(xn: np.ndarray, lo: np.ndarray, hi: np.ndarray, threshold: float) -> tuple[np.ndarray, ...]:
    """Float64 cosine of each pair; keep those meeting the edge rule."""
    sims = np.empty(lo.shape[0], dtype=np.float64)
    d = xn.shape[1]
    step = max(64, (4 << 20) // (8 * max(d, 1)))  # about 4 MB per float64 block, reused (the old fixed
    u, v = np.empty((step, d)), np.empty((step, d))  # 2^18 pairs made 1.6 GB fresh blocks at d = 768)
    for a, b in _chunks(lo.shape[0], step):
        uu, vv = u[: b - a], v[: b - a]
        np.copyto(uu, xn[lo[a:b]])
        np.copyto(vv, xn[hi[a:b]])
        sims[a:b] = np.einsum("ij,ij->i", uu, vv)
    keep = sims >= threshold - SLACK
    return lo[keep], hi[keep], sims[keep]


def _unique_pairs(lo: np.ndarray, hi: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    a, b = np.minimum(lo, hi), np.maximum(lo, hi)
    key = np.unique(a * np.int64(n) + b)
    return key // n, key % n


def _collect(parts: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    if not parts:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def exact_pairs(
    xn: np.ndarray, threshold: float, *, chunk: int, progress: Progress | None = None
) -> PairSet:
    """Every pair above the rule, by faiss ``IndexFlatIP.range_search`` (brute force)."""
    n, d = xn.shape
    index = make_index("flat", d)
    index.add(xn)
    radius = _radius(threshold)
    parts = []
    bar = _bar(progress, "dedup: exact search", n)
    for a, b in _chunks(n, chunk):
        lims, _, labels = index.range_search(xn[a:b], radius)
        q, j = _from_lists(a, lims, labels)
        upper = j > q  # each pair is found from both ends; keep one
        parts.append((q[upper], j[upper]))
        _tick(bar, b - a)
    _close(bar)
    lo, hi = _collect(parts)
    lo, hi, sims = rescore(xn, lo, hi, threshold)
    return PairSet(lo, hi, sims, "exact", {"index": "IndexFlatIP", "search": "range_search"})


TRAIN_PER_LIST = 16
"""k-means sample: 16 rows per list, 8 iterations. Duplicates fall in the same or a
neighbouring cell whatever the centroids' finish; nprobe covers the boundaries."""


def default_nlist(n: int) -> int:
    """About 4 * sqrt(n) lists, rounded to a power of two, at most n // 32."""
    target = 4.0 * math.sqrt(n)
    nlist = 2 ** round(math.log2(max(target, 1.0)))
    return max(1, min(nlist, n // 32 if n >= 64 else 1))


def _train_ivf(xn: np.ndarray, nlist: int, rng: np.random.Generator) -> faiss.IndexIVFFlat:
    # spherical: unit centroids, so inner-product assignment is cosine; min_points_per_centroid=1:
    # we choose the sample size, which silences faiss' warning
    index = make_index("ivf", xn.shape[1], nlist=nlist,
                       kmeans={"spherical": True, "niter": 8, "min_points_per_centroid": 1})
    train_ivf(index, xn, TRAIN_PER_LIST * nlist, rng)
    return index


def _assign(index: Any, xn: np.ndarray, nprobe: int, chunk: int, bar: Any) -> tuple[np.ndarray, np.ndarray]:
    n = xn.shape[0]
    dq = np.empty((n, nprobe), dtype=np.float32)
    iq = np.empty((n, nprobe), dtype=np.int64)
    for a, b in _chunks(n, chunk):
        dq[a:b], iq[a:b] = index.quantizer.search(xn[a:b], nprobe)
        _tick(bar, b - a)
    return dq, iq


def _ivf_search(index: Any, x: np.ndarray, start: int, radius: float, iq: np.ndarray, dq: np.ndarray) -> tuple:
    index.nprobe = iq.shape[1]
    lims, _, labels = range_search_preassigned(index, x, radius, iq, dq)
    q, j = _from_lists(start, lims, labels)
    other = j != q
    return q[other], j[other]


def _tune_nprobe(
    index: Any, xn: np.ndarray, sample: np.ndarray, exact: dict[int, set[int]], threshold: float,
    nprobe: int, max_nprobe: int, target: float,
) -> tuple[int, list[dict[str, float]]]:
    """Smallest nprobe (doubling) whose one-sided pair recall on ``sample`` reaches ``target``."""
    radius = _radius(threshold)
    xs = np.ascontiguousarray(xn[sample])
    history = []
    while True:
        dq, iq = index.quantizer.search(xs, nprobe)
        q, j = _ivf_search(index, xs, 0, radius, iq, dq)
        found = _pair_dict(sample[q], j)
        rec = _recall(found, exact)
        history.append({"nprobe": nprobe, "one_sided_recall": rec})
        if rec >= target or nprobe >= max_nprobe:
            return nprobe, history
        nprobe = min(2 * nprobe, max_nprobe)


def ivf_pairs(
    xn: np.ndarray, threshold: float, *, nlist: int | None, nprobe: int, chunk: int,
    rng: np.random.Generator, sample: np.ndarray | None = None, target_recall: float = 0.995,
    tune: bool = True, progress: Progress | None = None,
) -> PairSet:
    """Pairs from an inverted-file index (faiss IndexIVFFlat, inner product).

    Coarse assignment is done once: the top-``nprobe`` lists of every row serve
    both for adding (the first list) and for the range search (all of them).
    """
    n = xn.shape[0]
    clock = _Clock()
    nlist = default_nlist(n) if nlist is None else min(nlist, n)
    index = _train_ivf(xn, nlist, rng)
    clock.lap("train")
    params: dict[str, Any] = {"index": "IndexIVFFlat", "search": "range_search", "nlist": nlist}
    exact = None
    if sample is not None and sample.size:
        exact = exact_sample_pairs(xn, sample, threshold)
        clock.lap("exact_sample")
    bar = _bar(progress, "dedup: assign", n)
    dq, iq = _assign(index, xn, nprobe, chunk, bar)  # once: top-1 for adding, all for searching
    _close(bar)
    for a, b in _chunks(n, chunk):
        add_preassigned(index, xn[a:b], iq[a:b, 0].copy())
    clock.lap("assign_add")
    if exact is not None and tune:
        tuned, history = _tune_nprobe(index, xn, sample, exact, threshold, nprobe, min(nlist, 256), target_recall)
        params["nprobe_tuning"] = history
        clock.lap("tune")
        if tuned != nprobe:
            nprobe = tuned
            dq, iq = _assign(index, xn, nprobe, chunk, None)
    params["nprobe"] = nprobe
    radius = _radius(threshold)
    parts = []
    bar = _bar(progress, "dedup: ivf search", n)
    for a, b in _chunks(n, chunk):
        parts.append(_ivf_search(index, xn[a:b], a, radius, iq[a:b], dq[a:b]))
        _tick(bar, b - a)
    _close(bar)
    del dq, iq
    clock.lap("search")
    lo, hi = _unique_pairs(*_collect(parts), n)
    lo, hi, sims = rescore(xn, lo, hi, threshold)
    clock.lap("rescore")
    return _finish(lo, hi, sims, "ivf", params, clock, sample, exact)


# ------------------------------------------------------------ blocked self-join
JOIN_MIN_PROBES = 2
"""The self-join's tuning starts at two probed lists: with one, a pair split by a
cell boundary is never found (at 1M rows and 2048 lists that lost 0.44 % of the
pairs at 0.98); the sample then decides whether two are enough."""

JOIN_MAX_PROBES = 32

JOIN_TILE_MIB = 8.0
"""Budget of one product block of the self-join (at most the user's ``tile_mib``)."""


def join_nlist(n: int) -> int:
    """About ``1.6 sqrt(n)`` lists, a power of two, at most ``n // 32``.

    The coarse assignment costs ``n * nlist * d`` and the join about
    ``n * nprobe * (n / nlist) * d`` (a product entry costs about 1.3 times an
    assignment entry here, with the threshold scan); the sum is least at
    ``nlist = sqrt(1.3 nprobe n)``, 1.6 sqrt(n) at two probes.
    """
    target = 1.6 * math.sqrt(n)
    nlist = 2 ** round(math.log2(max(target, 1.0)))
    return max(1, min(nlist, n // 32 if n >= 64 else 1))


def _top_lists(quantizer: Any, x: np.ndarray, p: int, chunk: int, bar: Any = None) -> np.ndarray:
    """The ``p`` nearest centroids of every row (faiss flat inner-product search), int32."""
    n = x.shape[0]
    out = np.empty((n, p), dtype=np.int32)
    for a, b in _chunks(n, max(chunk, 4096)):
        _, lab = quantizer.search(np.ascontiguousarray(x[a:b]), p)
        out[a:b] = lab
        _tick(bar, b - a)
    return out


def _probes_needed(top: np.ndarray, row_of: np.ndarray, q: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Probes each pair (q, j) needs to be joined: 1 + the rank of one end's primary list
    among the other end's lists, the better of the two ends (``top.shape[1] + 1``: not within)."""
    width = top.shape[1]
    tq, tj = top[row_of[q]], top[row_of[j]]
    need = np.full(q.shape[0], width + 1, dtype=np.int64)
    for r in range(width - 1, -1, -1):
        hit = (tq[:, r] == tj[:, 0]) | (tj[:, r] == tq[:, 0])
        need[hit] = r + 1
    return need


def _tune_probes(quantizer: Any, xn: np.ndarray, exact: dict[int, set[int]], start: int, top_p: int,
                 target: float) -> tuple[int, list[dict[str, float]]]:
    """Smallest probe count from ``start`` whose one-sided pair recall on the exact sample pairs
    reaches ``target`` (computed for every count at once from the sample rows' ranked lists)."""
    q = np.array([a for a, v in exact.items() for _ in v], dtype=np.int64)
    j = np.array([b for v in exact.values() for b in v], dtype=np.int64)
    if q.size == 0:
        return start, [{"nprobe": start, "one_sided_recall": 1.0}]
    rows = np.unique(np.concatenate([q, j]))
    row_of = np.zeros(xn.shape[0], dtype=np.int64)
    row_of[rows] = np.arange(rows.size)
    top = _top_lists(quantizer, xn[rows], top_p, 4096)
    need = _probes_needed(top, row_of, q, j)
    history = []
    for p in range(start, top_p + 1):
        rec = float(np.mean(need <= p))
        history.append({"nprobe": p, "one_sided_recall": rec})
        if rec >= target:
            return p, history
    return top_p, history


def _list_order(keys: np.ndarray, nlist: int) -> tuple[np.ndarray, np.ndarray]:
    """Row order grouped by list (stable: rows ascending within a list) and the list offsets."""
    order = np.argsort(keys, kind="stable")
    offsets = np.zeros(nlist + 1, dtype=np.int64)
    np.cumsum(np.bincount(keys, minlength=nlist), out=offsets[1:])
    return order, offsets


_SCRATCH = threading.local()


def _scratch(name: str, shape: tuple[int, int]) -> np.ndarray:
    """A float32 C-contiguous array of ``shape`` in this thread's buffer ``name``, grown when too small.

    The join's product blocks and gathered rows are reused from tile to tile and list to
    list: a fresh array per tile is a fresh mapping from the kernel above malloc's mmap
    threshold, and at 10M rows that cost more system time (page faults) than the products.
    """
    size = shape[0] * shape[1]
    bufs = getattr(_SCRATCH, "bufs", None)
    if bufs is None:
        bufs = _SCRATCH.bufs = {}
    buf = bufs.get(name)
    if buf is None or buf.size < size:
        buf = bufs[name] = np.empty(max(size, 1 << 16), dtype=np.float32)
    return buf[:size].reshape(shape)


def _join_list(xn: np.ndarray, top: np.ndarray, base: np.ndarray, others: np.ndarray, radius: float,
               tile_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """Candidate pairs of one list: (its members + the rows probing it) x its members.

    A float32 product per tile of query rows, a row max to skip rows with no
    candidate, and each unordered pair kept once: a pair (query i, member j) is
    also produced in the list of i's primary centroid when that list is among
    j's probed lists, and then only the production with ``i < j`` is kept.
    """
    s = base.size
    xb = np.take(xn, base, axis=0, out=_scratch("members", (s, xn.shape[1])))
    queries = np.concatenate([base, others])
    out_q, out_j = [], []
    for a, b in _chunks(queries.size, tile_rows):
        xq = np.take(xn, queries[a:b], axis=0, out=_scratch("queries", (b - a, xn.shape[1])))
        block = np.matmul(xq, xb.T, out=_scratch("block", (b - a, s)))
        if a < s:  # a member against itself is not a pair
            own = np.arange(a, min(b, s))
            block[own - a, own] = -np.inf
        hit = np.flatnonzero(block.max(axis=1) >= radius)
        if hit.size == 0:
            continue
        r, c = np.nonzero(block[hit] >= radius)
        qi, bj = queries[a + hit[r]], base[c]
        twice = (top[bj] == top[qi, :1]).any(axis=1)  # i's primary list is among j's: found from j too
        keep = ~twice | (qi < bj)
        out_q.append(qi[keep])
        out_j.append(bj[keep])
    if not out_q:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    return np.concatenate(out_q).astype(np.int64), np.concatenate(out_j).astype(np.int64)


def join_pairs(
    xn: np.ndarray, threshold: float, *, nlist: int | None, nprobe: int, chunk: int, tile_mib: float,
    rng: np.random.Generator, sample: np.ndarray | None = None, target_recall: float = 0.995,
    progress: Progress | None = None, n_threads: int | None = None,
) -> PairSet:
    """Pairs from a blocked self-join on an inverted-file partition (BLAS products).

    k-means centroids (faiss, spherical) are trained on a sample; every row is
    assigned to its ``nprobe`` nearest centroids (one faiss flat search, shared
    by both roles): the first is its list, all of them are the lists it probes.
    For each list, its members and the rows probing it are scored against its
    members by a float32 matrix product in tiles (one thread per core with
    single-threaded BLAS); pairs within the search radius are re-scored in
    float64 by :func:`rescore`. A pair is joined when either end's list is
    probed by the other, and produced once. With a sample, ``nprobe`` is the
    smallest count from 2 whose one-sided pair recall on the exact pairs of the
    sample rows reaches ``target_recall``.
    """
    n, d = xn.shape
    clock = _Clock()
    nlist = join_nlist(n) if nlist is None else min(nlist, n)
    index = _train_ivf(xn, nlist, rng)
    quantizer = index.quantizer
    clock.lap("train")
    params: dict[str, Any] = {"index": "IVF partition (faiss k-means, flat assignment)",
                              "search": "blocked self-join (float32 BLAS tiles)", "nlist": nlist}
    exact = None
    if sample is not None and sample.size:
        exact = exact_sample_pairs(xn, sample, threshold)
        clock.lap("exact_sample")
        nprobe, history = _tune_probes(quantizer, xn, exact, min(JOIN_MIN_PROBES, nlist),
                                       min(JOIN_MAX_PROBES, nlist), target_recall)
        params["nprobe_tuning"] = history
        clock.lap("tune")
    nprobe = max(1, min(nprobe, nlist))
    params["nprobe"] = nprobe
    bar = _bar(progress, "dedup: assign", n)
    top = _top_lists(quantizer, xn, nprobe, chunk, bar)
    _close(bar)
    del index, quantizer
    base_order, base_off = _list_order(top[:, 0], nlist)
    if nprobe > 1:
        probe_order, probe_off = _list_order(top[:, 1:].ravel(), nlist)
        probe_order //= nprobe - 1  # position in the flattened lists -> row
    else:
        probe_order, probe_off = np.empty(0, np.int64), np.zeros(nlist + 1, np.int64)
    clock.lap("assign")
    radius = _radius(threshold)
    sizes = np.diff(base_off)
    work = sizes * (sizes + np.diff(probe_off))
    lists = [int(c) for c in np.argsort(-work, kind="stable") if sizes[c] > 0]  # largest first
    bar = _bar(progress, "dedup: join", n)

    def one(c: int) -> tuple[np.ndarray, np.ndarray]:
        base = base_order[base_off[c]:base_off[c + 1]]
        others = probe_order[probe_off[c]:probe_off[c + 1]]
        rows = max(64, int(min(tile_mib, JOIN_TILE_MIB) * 2**20 / (4.0 * max(base.size, 1))))
        out = _join_list(xn, top, base, others, radius, rows)
        _tick(bar, base.size)
        return out

    threads = n_threads_default() if n_threads is None else n_threads
    if threads > 1 and len(lists) > 1:
        with blas_single_thread(), ThreadPoolExecutor(max_workers=threads) as pool:
            parts = list(pool.map(one, lists))
    else:
        parts = [one(c) for c in lists]
        _SCRATCH.__dict__.pop("bufs", None)  # the pool's threads take theirs with them
    _close(bar)
    del top, base_order, probe_order
    clock.lap("join")
    q, j = _collect(parts)
    lo, hi, sims = rescore(xn, np.minimum(q, j), np.maximum(q, j), threshold)
    clock.lap("rescore")
    params["list_size_max"] = int(sizes.max(initial=0))
    params["pairs_scored"] = int(work.sum())
    return _finish(lo, hi, sims, "join", params, clock, sample, exact)


def hnsw_pairs(
    xn: np.ndarray, threshold: float, *, k: int, m: int, ef_search: int | None, chunk: int,
    sample: np.ndarray | None = None, progress: Progress | None = None,
) -> PairSet:
    """Pairs among each row's ``k`` approximate nearest neighbours (faiss IndexHNSWFlat)."""
    n, d = xn.shape
    k = min(k + 1, n)
    ef = max(2 * k, 64) if ef_search is None else ef_search
    index = make_index("hnsw", d, M=m, ef_construction=max(40, 2 * m), ef_search=ef)
    bar = _bar(progress, "dedup: hnsw build", n)
    for a, b in _chunks(n, chunk):
        index.add(xn[a:b])
        _tick(bar, b - a)
    _close(bar)
    radius = _radius(threshold)
    parts = []
    bar = _bar(progress, "dedup: hnsw search", n)
    for a, b in _chunks(n, chunk):
        dist, lab = index.search(xn[a:b], k)
        q = np.repeat(np.arange(a, b, dtype=np.int64), k).reshape(b - a, k)
        ok = (dist >= radius) & (lab >= 0) & (lab != q)
        parts.append((q[ok], lab[ok]))
        _tick(bar, b - a)
    _close(bar)
    lo, hi = _unique_pairs(*_collect(parts), n)
    lo, hi, sims = rescore(xn, lo, hi, threshold)
    params = {"index": "IndexHNSWFlat", "search": "knn then filter", "k": k - 1, "M": m, "efSearch": ef}
    pairs = PairSet(lo, hi, sims, "hnsw", params)
    if sample is not None and sample.size:
        params["sample_rows"] = int(sample.size)
        params["sample_pair_recall"] = sample_recall(pairs, sample, exact_sample_pairs(xn, sample, threshold))
    return pairs


# ------------------------------------------------------------ sample recall
def exact_sample_pairs(xn: np.ndarray, sample: np.ndarray, threshold: float) -> dict[int, set[int]]:
    """For each sample row, every other row meeting the rule (brute force, blocked float32 GEMM).

    Blocks of the matrix are scored in place of a faiss flat index so the rows
    are not copied into an index (at a million rows that copy is 0.5 GB).
    """
    xs = np.ascontiguousarray(xn[sample])
    radius = _radius(threshold)
    step = max(1024, int(16 * 2**20 / (4 * max(1, sample.size))))
    buf = np.empty(sample.size * step, dtype=np.float32)  # one block, reused (see _scratch)
    qs, js = [], []
    for a, b in _chunks(xn.shape[0], step):
        block = np.matmul(xs, xn[a:b].T, out=buf[: sample.size * (b - a)].reshape(sample.size, b - a))
        cols = np.flatnonzero(block.max(axis=0) >= radius)  # few rows have a pair: scan only those
        qi, ji = np.nonzero(block[:, cols] >= radius)
        qs.append(sample[qi])
        js.append(cols[ji].astype(np.int64) + a)
    q, j = np.concatenate(qs), np.concatenate(js)
    other = j != q
    q, j = q[other], j[other]
    lo, hi, _ = rescore(xn, q, j, threshold)
    return _pair_dict(lo, hi)


def _pair_dict(q: np.ndarray, j: np.ndarray) -> dict[int, set[int]]:
    out: dict[int, set[int]] = {}
    for a, b in zip(q.tolist(), j.tolist()):
        out.setdefault(a, set()).add(b)
    return out


def _recall(found: dict[int, set[int]], exact: dict[int, set[int]]) -> float:
    total = sum(len(v) for v in exact.values())
    if total == 0:
        return 1.0
    hit = sum(len(v & found.get(key, set())) for key, v in exact.items())
    return hit / total


def sample_recall(pairs: PairSet, sample: np.ndarray, exact: dict[int, set[int]]) -> float:
    """Fraction of the exact pairs of the sample rows present in ``pairs`` (either end)."""
    in_s = np.zeros(int(max(pairs.hi.max(initial=0), sample.max(initial=0))) + 1, dtype=bool)
    in_s[sample] = True
    lo, hi = pairs.lo, pairs.hi
    a = in_s[lo] if lo.size else np.zeros(0, bool)
    b = in_s[hi] if hi.size else np.zeros(0, bool)
    q = np.concatenate([lo[a], hi[b]])
    j = np.concatenate([hi[a], lo[b]])
    return _recall(_pair_dict(q, j), exact)
