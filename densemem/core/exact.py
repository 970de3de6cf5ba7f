"""Exact softmax reduction over all stored rows (tiled, threaded)."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from . import _fused
from . import partial as P
from .tiles import map_query_chunks, reduce_rows, tile_rows_for

__all__ = ["exact_reduce", "FUSED_TILE_MIB"]

# Score tile of the compiled kernel's pass (per thread). The kernel reads each tile once
# between the two products, so the tile should stay in the shared cache: on a 2-core AMD
# Zen 2 (16 MiB L3) exact / two products measured 1.12 with 2 MiB tiles against 1.25 with
# 16 MiB (bench/exact_floor.py; N = 200k, d = 128); at d = 768 the two were level.
FUSED_TILE_MIB = 2.0


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

    Queries are split into one contiguous chunk per thread; each chunk walks the
    stored rows in tiles sized so that one (chunk x tile) block fits ``tile_mib``
    (at most :data:`FUSED_TILE_MIB` where the compiled kernel runs on chunks).
    With ``moments`` the partial also carries the sums behind the entropy and
    participation ratio of each query's full weight vector (same pass).
    """
    qz = np.ascontiguousarray(queries * np.float32(beta), dtype=np.float32)
    n_q = qz.shape[0]
    dim = patterns.shape[1]
    if n_threads > 1 and n_q <= chunk:
        # One chunk: the products run on BLAS's own threads and the tile's element-wise
        # work (float16 widening, the compiled kernel) is split over the same cores.
        with ThreadPoolExecutor(max_workers=n_threads - 1) as helpers:
            return reduce_rows(qz, patterns, k=k, tile_rows=tile_rows_for(n_q, tile_mib, dim),
                               need_acc=need_acc, moments=moments, helpers=helpers)

    if need_acc and not moments and _fused.available(k):
        # one chunk per thread, each with its own cache-sized tile. Not for the single chunk
        # above: it hands each tile's element-wise work to the helpers, and smaller tiles mean
        # more hand-offs (100 queries over 1M x 768 float16: 4.1 s with 16 MiB tiles, 4.7 s
        # with 2 MiB, medians of 6 on the Zen 2 machine)
        tile_mib = min(tile_mib, FUSED_TILE_MIB)

    def run(sl: slice) -> P.Partial:
        part = qz[sl]
        rows = tile_rows_for(part.shape[0], tile_mib, dim)
        return reduce_rows(part, patterns, k=k, tile_rows=rows, need_acc=need_acc, moments=moments)

    parts = map_query_chunks(run, n_q, n_threads=n_threads, chunk=chunk)
    if len(parts) == 1:
        return parts[0]
    return P.Partial(
        m=np.concatenate([p.m for p in parts]),
        l=np.concatenate([p.l for p in parts]),
        acc=np.concatenate([p.acc for p in parts]) if need_acc else None,  # type: ignore[misc]
        top_z=np.concatenate([p.top_z for p in parts]),
        top_i=np.concatenate([p.top_i for p in parts]),
        s=np.concatenate([p.s for p in parts]) if moments else None,  # type: ignore[misc]
        q=np.concatenate([p.q for p in parts]) if moments else None,  # type: ignore[misc]
    )
