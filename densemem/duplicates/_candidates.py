"""Candidate pairs for near-duplicate search: exact, IVF and HNSW sources from faiss.

Every source returns pairs ``(lo, hi)`` with ``lo < hi`` (row numbers of the
normalized matrix), re-scored in float64 so a pair gets the same similarity
whichever source found it. The edge rule is ``cosine >= threshold - SLACK``.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import faiss
import numpy as np
from faiss.contrib.ivf_tools import add_preassigned, range_search_preassigned

from ..core.index import make_index, train_ivf

__all__ = [
    "SLACK",
    "PairSet",
    "choose_source",
    "chunk_rows_for",
    "exact_pairs",
    "hnsw_pairs",
    "ivf_pairs",
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
    return "ivf", f"n*n*d = {work:.3g} > {EXACT_MAX_WORK:.3g}: inverted-file index"


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
    step = 1 << 18
    for a, b in _chunks(lo.shape[0], step):
        u = xn[lo[a:b]].astype(np.float64)
        v = xn[hi[a:b]].astype(np.float64)
        sims[a:b] = np.einsum("ij,ij->i", u, v)
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
    params["phase_seconds"] = clock.laps
    params["phase_cpu_seconds"] = clock.cpu
    pairs = PairSet(lo, hi, sims, "ivf", params)
    if exact is not None:
        params["sample_rows"] = int(sample.size)
        params["sample_pair_recall"] = sample_recall(pairs, sample, exact)
    return pairs


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
    step = max(1024, int(64 * 2**20 / (4 * max(1, sample.size))))
    qs, js = [], []
    for a, b in _chunks(xn.shape[0], step):
        qi, ji = np.nonzero(xs @ xn[a:b].T >= radius)
        qs.append(sample[qi])
        js.append(ji.astype(np.int64) + a)
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
