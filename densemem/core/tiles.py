"""Tiling over stored rows from a memory budget, and query chunks over threads.

The exact path never forms an (n_queries x n_patterns) matrix: it walks the
stored rows in tiles of ``tile_rows`` and folds each tile's partial into a
running one. Tile size comes from a budget in MiB for the (query chunk x tile)
score block.

Threads: NumPy's element-wise passes (subtract, exp, sum) and the compiled kernel
are single-threaded, so one Python thread per core runs with single-threaded BLAS.
Each takes a contiguous range of the stored rows for a group of queries
(:func:`map_row_ranges`; the callers merge the ranges' partials or top lists), or,
for few rows or many queries, a chunk of the queries (:func:`map_query_chunks`).
``bench/exact_floor.py`` measures the arrangements against the two products alone.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Callable, TypeVar

import numpy as np
from threadpoolctl import ThreadpoolController

from . import _fused
from . import partial as P

__all__ = ["tile_rows_for", "reduce_rows", "search_top", "map_query_chunks", "map_row_ranges", "n_threads_default"]

T = TypeVar("T")

DEFAULT_TILE_MIB = 16.0


def as_f32(rows: np.ndarray, buf: np.ndarray | None = None) -> np.ndarray:
    """A tile in float32: itself, or a float32 copy of a float16 tile (exact: float16 -> float32 is lossless).

    ``buf`` (float32, at least as many elements as the tile) is reused for the copy: a copy into a
    warm buffer costs about half of a fresh ``astype``.
    """
    if rows.dtype == np.float32:
        return rows
    if buf is None or buf.size < rows.size:
        buf = np.empty(rows.size, dtype=np.float32)
    out = buf[: rows.size].reshape(rows.shape)
    _fused.widen(rows, out)
    return out


def _tile_buffer(patterns: np.ndarray, t: int) -> np.ndarray | None:
    """A reusable float32 buffer for tiles of ``t`` rows when the rows are not float32 (else None)."""
    return None if patterns.dtype == np.float32 else np.empty(t * patterns.shape[1], dtype=np.float32)


def knn_tiles(q: np.ndarray, patterns: np.ndarray, k: int, *, metric: Any, tile_mib: float) -> tuple[np.ndarray, np.ndarray]:
    """faiss exact top-k over ``patterns`` a tile at a time (for rows faiss cannot take whole: float16).

    Each tile is converted to float32 and searched with ``faiss.knn``; the top lists are
    merged by score, so the answer is the exact top-k of the stored values.
    """
    import faiss

    n = patterns.shape[0]
    k = min(k, n)
    large = metric == faiss.METRIC_INNER_PRODUCT
    best_s = np.full((q.shape[0], k), -np.inf if large else np.inf, np.float32)
    best_i = np.full((q.shape[0], k), -1, np.int64)
    t = max(k, tile_rows_for(1, tile_mib * 16) // 4)
    for start in range(0, n, t):
        rows = as_f32(patterns[start : start + t])
        s, i = faiss.knn(q, rows, min(k, rows.shape[0]), metric=metric)
        cat_s = np.concatenate([best_s, s], axis=1)
        cat_i = np.concatenate([best_i, np.where(i >= 0, i + start, -1)], axis=1)
        order = np.argsort(-cat_s if large else cat_s, axis=1, kind="stable")[:, :k]
        best_s, best_i = np.take_along_axis(cat_s, order, 1), np.take_along_axis(cat_i, order, 1)
    return best_s, best_i


def n_threads_default() -> int:
    """Cores available to this process."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def tile_rows_for(n_queries: int, tile_mib: float, dim: int | None = None) -> int:
    """Rows per tile so that an (n_queries x rows) float32 block fits ``tile_mib``.

    With ``dim``, also so that the tile's rows in float32 (``rows x dim``) fit the same
    budget: both products read the tile, and a few queries over wide rows would
    otherwise make it too large to stay in cache between them (at 100 queries and
    d = 768 the score budget alone gives 42k rows, 129 MB).
    """
    rows = int(tile_mib * 2**20 / (4 * max(n_queries, 1)))
    if dim:
        rows = min(rows, int(tile_mib * 2**20 / (4 * dim)))
    return max(rows, 1)


def reduce_rows(
    qz: np.ndarray,
    patterns: np.ndarray,
    *,
    k: int,
    tile_rows: int,
    need_acc: bool = True,
    moments: bool = False,
    helpers: ThreadPoolExecutor | None = None,
) -> P.Partial:
    """Fold all stored rows, tile by tile, into one partial.

    Parameters
    ----------
    qz : ndarray of shape (n_queries, dim), float32
        Queries already multiplied by beta (so the GEMM gives z = beta * score).
    patterns : ndarray of shape (n_patterns, dim), float32
    k : int
        Top-list size.
    tile_rows : int
        Stored rows per tile.
    need_acc : bool
        Whether the weighted sum (second GEMM) is needed.
    moments : bool
        Whether to carry the entropy / participation sums (see :mod:`.partial`).
    helpers : ThreadPoolExecutor, optional
        Threads that share each tile's element-wise work (the float16 widening and the
        compiled kernel) while the products use BLAS's own threads: for a batch too
        small to split by queries (see :func:`densemem.core.exact.exact_reduce`).
    """
    n, dim = patterns.shape
    b = qz.shape[0]
    run = P.empty(b, dim, k, need_acc=need_acc, moments=moments)
    if n == 0:
        return run
    t = min(tile_rows, n)
    if need_acc and not moments and _fused.available(k):
        return _reduce_fused(qz, patterns, run, t, helpers=helpers)
    buf = np.empty(b * t, dtype=np.float32)
    wide = _tile_buffer(patterns, t)
    first = True
    for start in range(0, n, t):
        rows = as_f32(patterns[start : start + t], wide)
        width = rows.shape[0]
        z = buf[: b * width].reshape(b, width)
        np.matmul(qz, rows.T, out=z)
        blk = P.block(z, rows, k=k, offset=start, need_acc=need_acc, moments=moments)
        run = blk if first else P.merge(run, blk)
        first = False
    return run


def _reduce_fused(
    qz: np.ndarray, patterns: np.ndarray, run: P.Partial, t: int, *, helpers: ThreadPoolExecutor | None = None
) -> P.Partial:
    """:func:`reduce_rows` with the compiled tile kernel (:mod:`._fused`): one visit per tile row.

    With ``helpers`` the widening of a float16 tile is split by stored rows and the
    kernel by queries (both release the GIL), the calling thread taking one part.
    """
    assert run.acc is not None
    b, n = qz.shape[0], patterns.shape[0]
    qz = qz * np.float32(_fused.LOG2E)  # the kernel works in base 2 (see :mod:`._fused`)
    buf = np.empty(b * t, dtype=np.float32)
    wide = _tile_buffer(patterns, t)
    parts = 1 if helpers is None else helpers._max_workers + 1  # noqa: SLF001 - our own pool
    scale = np.empty(b, dtype=np.float64)
    for start in range(0, n, t):
        tile = patterns[start : start + t]
        width = tile.shape[0]
        if wide is not None and parts > 1:
            rows = wide[: tile.size].reshape(tile.shape)
            _split(helpers, parts, width, lambda sl: _fused.widen(tile[sl], rows[sl]))
        else:
            rows = as_f32(tile, wide)
        z = buf[: b * width].reshape(b, width)
        np.matmul(qz, rows.T, out=z)
        if parts > 1:
            def fold(sl: slice) -> None:
                scale[sl] = _fused.fold_tile(z[sl], start, run.m[sl], run.l[sl], run.top_z[sl], run.top_i[sl])
            _split(helpers, parts, b, fold)
        else:
            scale[:] = _fused.fold_tile(z, start, run.m, run.l, run.top_z, run.top_i)
        run.acc *= scale.astype(np.float32)[:, None]
        run.acc += z @ rows
    _fused.to_natural(run)
    return run


def _split(pool: ThreadPoolExecutor | None, parts: int, n: int, fn: Callable[[slice], None]) -> None:
    """``fn`` over ``parts`` contiguous slices of ``range(n)``: one on this thread, the rest on ``pool``."""
    bounds = [n * i // parts for i in range(parts + 1)]
    slices = [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
    assert pool is not None
    futures = [pool.submit(fn, sl) for sl in slices[1:]]
    if slices:
        fn(slices[0])
    for f in futures:
        f.result()


SMALL_BATCH = 512  # queries per thread up to which search_top splits the stored rows, not the queries
# Queries up to which search_top's product is rows @ q.T (scores laid out one stored row per
# line): BLAS packs the small side, and for a few queries this orientation ran faster on a
# 2-core Xeon (one thread, 100k x 128 rows: 8 queries 4.8 ms against 9.4, 32 queries 8.6
# against 12.0, 128 queries 23.5 against 27.9, 512 queries level).
ROWS_FIRST_BATCH = 128


def search_top(
    q: np.ndarray, patterns: np.ndarray, kc: int, *, tile_mib: float, n_threads: int
) -> tuple[np.ndarray, np.ndarray]:
    """Exact top-``kc`` stored rows by inner product, best first: (scores, row numbers).

    The compiled kernel's max-and-top-k visit of each tile after the first product
    (NumPy's BLAS), with no exponentials and no second product; callers check
    :func:`densemem.core._fused.available` first.
    """
    n = patterns.shape[0]
    qf = np.ascontiguousarray(q, dtype=np.float32)
    b_all = qf.shape[0]
    if b_all == 0:
        return np.empty((0, kc), np.float32), np.empty((0, kc), np.int64)

    def run(qs: slice, rs: slice) -> tuple[np.ndarray, np.ndarray]:
        part = qf[qs]
        b = part.shape[0]
        lo, hi = rs.start, rs.stop
        if b <= ROWS_FIRST_BATCH:  # scores within 1 MiB and the rows' tile within 4 MiB (measured best)
            t = max(1, min(tile_rows_for(b, min(tile_mib, 1.0)), int(2**20 / patterns.shape[1]), hi - lo))
        else:
            t = min(tile_rows_for(b, tile_mib), max(hi - lo, 1))
        top_z = np.full((b, kc), -np.inf, dtype=np.float32)
        top_i = np.full((b, kc), -1, dtype=np.int64)
        m = np.full(b, -np.inf)
        buf = np.empty(b * t, dtype=np.float32)
        wide = _tile_buffer(patterns, t)
        for start in range(lo, hi, t):
            rows = as_f32(patterns[start : min(start + t, hi)], wide)
            if b <= ROWS_FIRST_BATCH:
                zt = buf[: b * rows.shape[0]].reshape(rows.shape[0], b)
                np.matmul(rows, part.T, out=zt)
                _fused.top_rows(zt, start, top_z, top_i)
            else:
                z = buf[: b * rows.shape[0]].reshape(b, rows.shape[0])
                np.matmul(part, rows.T, out=z)
                _fused.fold_tile(z, start, m, m, top_z, top_i, weights=False)
        return top_z, top_i

    if n_threads > 1 and b_all <= SMALL_BATCH * n_threads and n >= 2 * n_threads * kc:
        # one stored-row range per thread, then the top lists merged: every thread reads its
        # share of the rows, not all, and a product with few query rows costs about as much as reading
        # its tile (BLAS packs it). Over 200k x 128 on 2 cores: 32 queries (auto's sample)
        # 23 ms split by queries, 16 ms by rows; 1,024 queries 191 ms and 180 ms
        parts = map_row_ranges(lambda lo, hi: run(slice(0, b_all), slice(lo, hi)), n, n_threads=n_threads)
        top_z = np.concatenate([p[0] for p in parts], axis=1)
        top_i = np.concatenate([p[1] for p in parts], axis=1)
    else:
        # many queries, or few rows: one query chunk per thread (not BLAS's own threads: they
        # spin after a call, and the exact pass that often follows ran 8 % slower beside them)
        chunk = min(512, max(1, -(-b_all // max(n_threads, 1))))
        parts = map_query_chunks(lambda qs: run(qs, slice(0, n)), b_all, n_threads=n_threads, chunk=chunk)
        top_z = np.concatenate([p[0] for p in parts])
        top_i = np.concatenate([p[1] for p in parts])
    # best first, equal scores by row number (which of several tied rows at the k-th place is
    # kept depends on the tiling and the split)
    order = np.lexsort((top_i, -top_z), axis=1)[:, :kc]
    return np.take_along_axis(top_z, order, 1), np.take_along_axis(top_i, order, 1)


class _SingleThreadBlas:
    """Process-wide single-threaded BLAS while any worker pool of densemem runs.

    Entries are counted under a lock: the first limits, the last restores. Pools whose
    lives overlap (calls from several user threads) would otherwise restore each other's
    limit in the wrong order and leave BLAS on one thread for good. (threadpoolctl lets
    only one live thread change a pthreads OpenBLAS's limit; from the others the limit is
    a no-op and the products may share the cores with BLAS's own threads.)

    The library scan behind the limit (reading the process's memory map) runs once per
    process: it cost 0.7 ms per call, a tenth of a one-query retrieval over 200k rows. It
    covers the BLAS libraries loaded by then (NumPy's and faiss's, both loaded by
    ``import densemem``); the worker threads call only NumPy's products.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._count = 0
        self._controller: ThreadpoolController | None = None
        self._limiter: Any = None

    def __enter__(self) -> None:
        with self._lock:
            if self._count == 0:
                if self._controller is None:
                    self._controller = ThreadpoolController()
                self._limiter = self._controller.limit(limits=1, user_api="blas")
            self._count += 1

    def __exit__(self, *exc: object) -> None:
        with self._lock:
            self._count -= 1
            if self._count == 0 and self._limiter is not None:
                self._limiter.restore_original_limits()
                self._limiter = None


_SINGLE_BLAS = _SingleThreadBlas()


def blas_single_thread() -> _SingleThreadBlas:
    """A context in which BLAS runs on one thread (worker pools use it; see :class:`_SingleThreadBlas`)."""
    return _SINGLE_BLAS


def map_row_ranges(fn: Callable[[int, int], T], n_rows: int, *, n_threads: int) -> list[T]:
    """Run ``fn(lo, hi)`` on ``n_threads`` contiguous ranges of ``range(n_rows)``, one per thread.

    The threads run with single-threaded BLAS, as in :func:`map_query_chunks`.
    """
    bounds = [n_rows * i // n_threads for i in range(n_threads + 1)]
    ranges = list(zip(bounds[:-1], bounds[1:]))
    if n_threads <= 1:
        return [fn(lo, hi) for lo, hi in ranges]
    with blas_single_thread():
        with ThreadPoolExecutor(max_workers=n_threads) as pool:
            return list(pool.map(lambda ab: fn(*ab), ranges))


def map_query_chunks(
    fn: Callable[[slice], T], n_queries: int, *, n_threads: int, chunk: int = 256
) -> list[T]:
    """Run ``fn`` on contiguous query slices of at most ``chunk`` rows.

    With several threads the slices go to a pool of ``n_threads`` workers with
    single-threaded BLAS (NumPy's element-wise passes are single-threaded, so
    this keeps every core busy through the whole pipeline). With one slice,
    ``fn`` runs once with the BLAS library's own threads.
    """
    bounds = list(range(0, n_queries, chunk)) + [n_queries]
    slices = [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:])]
    if n_threads <= 1 or len(slices) == 1:
        return [fn(s) for s in slices]
    with blas_single_thread():
        with ThreadPoolExecutor(max_workers=n_threads) as pool:
            return list(pool.map(fn, slices))
