"""Thread arrangement of the tiled passes (densemem.core.tiles).

References: threadpoolctl's own report of each BLAS library's thread count
(``threadpool_info``); faiss.knn for the candidate search.
"""

from __future__ import annotations

import faiss
import numpy as np
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from densemem.core import tiles


def _blas_threads() -> list[int]:
    """Thread counts of NumPy's BLAS (the one the worker threads call; its count is
    process-wide, where an OpenMP-threaded BLAS such as faiss's reports per calling thread)."""
    return [int(i["num_threads"]) for i in threadpool_info()
            if i.get("user_api") == "blas" and "/numpy" in str(i.get("filepath", ""))]


def test_overlapping_worker_pools_restore_the_blas_threads() -> None:
    # Two pools whose lives overlap (A enters, B enters, A leaves, B leaves), as two calls from
    # different user threads do: BLAS runs on one thread while either is inside and gets its
    # own count back after both. With one save / restore per pool, A's exit restored 2 while B
    # still ran, and B's exit then restored the 1 it had saved, for good. (Entered from this
    # thread, because threadpoolctl lets only one live thread change OpenBLAS's limit.)
    with threadpool_limits(limits=2, user_api="blas"):
        before = _blas_threads()
        if not before or set(before) != {2}:
            pytest.skip("NumPy's BLAS is not one threadpoolctl reports and sets")
        pool_a, pool_b = tiles.blas_single_thread(), tiles.blas_single_thread()
        pool_a.__enter__()
        pool_b.__enter__()
        assert set(_blas_threads()) == {1}
        pool_a.__exit__(None, None, None)
        assert set(_blas_threads()) == {1}  # B still runs
        pool_b.__exit__(None, None, None)
        assert _blas_threads() == before


def test_search_top_of_no_queries_is_empty() -> None:
    # Common practice (faiss.knn of an empty query batch): shape (0, kc), no error.
    x = np.random.default_rng(0).standard_normal((50, 8)).astype(np.float32)
    for n_threads in (1, 2):
        s, i = tiles.search_top(np.empty((0, 8), np.float32), x, 5, tile_mib=1.0, n_threads=n_threads)
        assert s.shape == (0, 5) and i.shape == (0, 5)
    ref_s, _ = faiss.knn(np.empty((0, 8), np.float32), x, 5)
    assert ref_s.shape == (0, 5)
