"""Sparse maps (sparsemax, alpha-entmax) over sharded stores, in this process and on a Dask cluster.

References: the single-machine DenseMemory with the same map (itself checked against the sort-based
sparsemax of Martins & Astudillo, ICML 2016, Algorithm 1, and the entmax bisection of Peters,
Niculae & Martins, ACL 2019, in tests/core/test_sparse.py); the merge of supports is derived in
densemem/core/sparse.py (adding rows only raises tau, so a union of supports holds the support).
"""

from __future__ import annotations

import functools
import logging

import numpy as np
import pytest

from densemem import DenseMemory
from densemem.core import sparse as SP
from densemem.core.rows import tree_merge
from densemem.sharding import _ops as S
from densemem.sharding import shard_memory


def _same(a, b) -> None:
    # derived: the union merge is an identity; only float32 rounding may differ
    np.testing.assert_allclose(b.states, a.states, atol=1e-5)
    np.testing.assert_array_equal(b.top_ids, a.top_ids)
    np.testing.assert_allclose(b.top_weights, a.top_weights, atol=1e-5)
    np.testing.assert_array_equal(b.support_size, a.support_size)
    np.testing.assert_allclose(b.energy, a.energy, atol=1e-5)
    assert b.steps == a.steps


@pytest.fixture(scope="module")
def stores(tmp_path_factory):
    rng = np.random.default_rng(11)
    x = rng.standard_normal((2500, 32)).astype(np.float32)
    mem = DenseMemory.from_array(x, ids=[f"r{i}" for i in range(2500)], normalize=True)
    root = tmp_path_factory.mktemp("sparse")
    sm = shard_memory(mem, root / "s", 5, by="contiguous")
    small = DenseMemory.from_array(x[:6], normalize=True)
    sm_empty = shard_memory(small, root / "e", 8)  # 6 rows over 8 shards: two empty
    q = (mem.patterns[::125] + 0.15 * rng.standard_normal((20, 32))).astype(np.float32)
    return mem, sm, small, sm_empty, q


@pytest.mark.parametrize("weighting,alpha,beta", [("sparsemax", None, 25.0), ("entmax15", None, 10.0),
                                                  ("entmax", 1.3, 4.0)])
@pytest.mark.parametrize("method", ["auto", "exact"])
def test_local_shards_equal_one_machine(stores, weighting, alpha, beta, method):
    mem, sm, *_ = stores
    q = stores[4]
    a = mem.retrieve(q, beta, weighting=weighting, alpha=alpha, method=method, steps=2, k=6)
    b = sm.retrieve(q, beta, weighting=weighting, alpha=alpha, method=method, steps=2, k=6)
    _same(a, b)
    # a small cap sends the wide supports to the tiled pass on every shard, with the same answer
    c = sm.retrieve(q, beta, weighting=weighting, alpha=alpha, method=method, steps=2, k=6, k_max=4)
    _same(a, c)


def test_empty_shards(stores):
    _, _, small, sm_empty, _ = stores
    q = np.random.default_rng(2).standard_normal((4, 32)).astype(np.float32)
    for method in ("auto", "exact"):
        _same(small.retrieve(q, 3.0, weighting="sparsemax", method=method, k=6),
              sm_empty.retrieve(q, 3.0, weighting="sparsemax", method=method, k=6))


@pytest.mark.parametrize("seed", range(3))
def test_support_merge_is_order_free(stores, seed):
    # derived (core/sparse.py): the union merge is associative and commutative
    mem, sm, *_ = stores
    q = stores[4]
    smap = SP.SparseMap("entmax15", 1.5)
    parts = [S.shard_rows(m, "auto").sparse_support(q, 12.0, smap, k_start=16, cap=1024, need_rows=True)
             for m in sm._memories("test")]
    order = np.random.default_rng(seed).permutation(len(parts))
    merged = tree_merge([parts[i] for i in order], functools.partial(SP.merge_support, alpha=1.5))
    one = mem._source(mem_opts(mem, q), where="test").sparse_support(q, 12.0, smap, k_start=16, cap=1024,
                                                                     need_rows=True)
    np.testing.assert_array_equal(merged.ids, one.ids)
    np.testing.assert_allclose(merged.tau, one.tau, atol=1e-9)


def mem_opts(mem, q):
    from densemem.options import retrieval_options

    return retrieval_options(mem._layout(), q, where="test", method="auto")


# ------------------------------------------------------------------- Dask
distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def client():
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=logging.CRITICAL)
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.mark.parametrize("weighting,alpha,beta,k_max", [("sparsemax", None, 25.0, 1024), ("entmax", 1.5, 6.0, 8)])
def test_dask_equals_one_machine(client, stores, weighting, alpha, beta, k_max):
    mem, sm, *_ = stores
    q = stores[4]
    a = mem.retrieve(q, beta, weighting=weighting, alpha=alpha, steps=2, k=6, k_max=k_max)
    with sm.on_cluster(client, timeout=120) as cluster:
        b = cluster.retrieve(q, beta, weighting=weighting, alpha=alpha, steps=2, k=6, k_max=k_max)
        e = cluster.energy(b.states, beta, weighting=weighting, alpha=alpha)
    _same(a, b)
    np.testing.assert_allclose(e, mem.energy(b.states, beta, weighting=weighting, alpha=alpha), atol=1e-5)
    if k_max == 8:
        assert b.fell_back.any()  # the tiled pass ran on the workers
