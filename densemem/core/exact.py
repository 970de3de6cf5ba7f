"""Exact softmax reduction over all stored rows (tiled, threaded)."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from . import _fused
from . import partial as P
from .tiles import map_query_chunks, map_row_ranges, n_threads_default, reduce_rows, tile_rows_for

__all__ = ["exact_reduce", "FUSED_TILE_MIB"]

# Score tile of the compiled kernel's pass (per thread). The kernel reads each tile once
# between the two products, so the tile should stay in the thread's share of the last-level
# cache: a quarter of that share, between 2 and 16 MiB. On a 2-core AMD Zen 2 (16 MiB L3) that
# is 2 MiB, where exact / two products measured 1.12 against 1.25 with 16 MiB; on a 2-core
# Intel Xeon with AVX-512 whose L3 reads 480 MiB it is 16 MiB, 3 % faster than 2 MiB
# (bench/exact_floor.py; N = 200k, d = 128).
def _fused_tile_mib(n_threads: int) -> float:
    base = "/sys/devices/system/cpu/cpu0/cache/index3/"
    try:
        with open(base + "level") as f:
            if f.read().strip() != "3":
                return 2.0
        with open(base + "size") as f:
            text = f.read().strip()
    except OSError:
        return 2.0
    units = {"K": 2**10, "M": 2**20, "G": 2**30}
    try:
        size = float(text[:-1]) * units[text[-1].upper()] if text[-1].isalpha() else float(text)
    except (ValueError, KeyError, IndexError):
        return 2.0
    return float(min(16.0, max(2.0, size / 2**20 / (4 * max(n_threads, 1)))))


FUSED_TILE_MIB = _fused_tile_mib(n_threads_default())
# Stored rows per thread from which the threads split the stored rows rather than the queries.
SPLIT_ROWS = 4096


def exact_reduce(
    queries: np.ndarray,
    patterns: np.ndarray,
    beta: float,
    *,
    k: int,
    tile_mib: float,
    n_threads: int,
    need_acc: bool = True,
    chunk: int = 512,
    moments: bool = False,
) -> P.Partial:
    """Partial of every query over every stored row.

    With several threads and at least ``SPLIT_ROWS`` stored rows per thread, the
    queries go in groups of ``chunk * n_threads`` and, within a group, each thread
    folds its own contiguous range of stored rows; the threads' partials are then
    merged (exactly: :func:`densemem.core.partial.merge`). Otherwise each thread takes
    contiguous query chunks of at most ``chunk`` and walks all stored rows. Tiles are
    sized so that one (queries x tile) block fits ``tile_mib`` (at most
    :data:`FUSED_TILE_MIB` where the compiled kernel runs on a thread's own tiles). With ``moments`` the
    partial also carries the sums behind the entropy and participation ratio of each
    query's full weight vector (same pass).

    Splitting the rows, every thread reads its share of the rows (not all) and its
    products keep the whole group's queries: on 2 cores (Intel Xeon, AVX-512; N = 200k)
    it ran 10-25 % faster than splitting the queries from 32 to 2,000 queries at
    d = 128 and d = 768, float32 and float16 rows, and faster than one query chunk
    on BLAS's threads with the tile's element-wise work handed to a helper.
    """
    qz = np.ascontiguousarray(queries * np.float32(beta), dtype=np.float32)
    n_q = qz.shape[0]
    n, dim = patterns.shape
    # the compiled kernel's tile where each thread walks its own tiles (not on the single-chunk
    # path below, which hands each tile to helper threads: more tiles meant more hand-offs)
    own_tile = min(tile_mib, FUSED_TILE_MIB) if need_acc and not moments and _fused.available(k) else tile_mib
    if n_threads > 1 and n >= SPLIT_ROWS * n_threads and n_q > 0:
        group = max(chunk, 1) * n_threads

        def over_rows(qs: np.ndarray, lo: int, hi: int) -> P.Partial:
            rows = tile_rows_for(qs.shape[0], own_tile, dim)
            part = reduce_rows(qs, patterns[lo:hi], k=k, tile_rows=rows, need_acc=need_acc, moments=moments)
            part.top_i = np.where(part.top_i >= 0, part.top_i + lo, -1)
            return part

        groups: list[P.Partial] = []
        for g in range(0, n_q, group):
            qs = qz[g : g + group]
            parts = map_row_ranges(lambda lo, hi: over_rows(qs, lo, hi), n, n_threads=n_threads)
            merged = parts[0]
            for p in parts[1:]:
                merged = P.merge(merged, p)
            groups.append(merged)
        return groups[0] if len(groups) == 1 else _concat(groups, need_acc, moments)

    if n_threads > 1 and n_q <= chunk:
        # One chunk: the products run on BLAS's own threads and the tile's element-wise
        # work (float16 widening, the compiled kernel) is split over the same cores.
        with ThreadPoolExecutor(max_workers=n_threads - 1) as helpers:
            return reduce_rows(qz, patterns, k=k, tile_rows=tile_rows_for(n_q, tile_mib, dim),
                               need_acc=need_acc, moments=moments, helpers=helpers)

    def run(sl: slice) -> P.Partial:
        part = qz[sl]
        rows = tile_rows_for(part.shape[0], own_tile, dim)
        return reduce_rows(part, patterns, k=k, tile_rows=rows, need_acc=need_acc, moments=moments)

    parts = map_query_chunks(run, n_q, n_threads=n_threads, chunk=chunk)
    if len(parts) == 1:
        return parts[0]
    return _concat(parts, need_acc, moments)


def _concat(parts: list[P.Partial], need_acc: bool, moments: bool) -> P.Partial:
    """Partials of consecutive query chunks, stacked."""
    return P.Partial(
        m=np.concatenate([p.m for p in parts]),
        l=np.concatenate([p.l for p in parts]),
        acc=np.concatenate([p.acc for p in parts]) if need_acc else None,  # type: ignore[misc]
        top_z=np.concatenate([p.top_z for p in parts]),
        top_i=np.concatenate([p.top_i for p in parts]),
        s=np.concatenate([p.s for p in parts]) if moments else None,  # type: ignore[misc]
        q=np.concatenate([p.q for p in parts]) if moments else None,  # type: ignore[misc]
    )
