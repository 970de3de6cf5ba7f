"""Exact softmax reduction over all stored rows (tiled, threaded)."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from . import partial as P
from .tiles import map_query_chunks, reduce_rows, tile_rows_for

__all__ = ["exact_reduce"]


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
    stored rows in tiles sized so that one (chunk x tile) block fits ``tile_mib``.
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
