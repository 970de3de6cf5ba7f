"""Exact retrieval over a Dask cluster (densemem.sharding), against one machine.

One LocalCluster (2 worker processes, 1 thread each, loopback) is shared by the module.
References: the single-machine DenseMemory (itself tested against scipy and faiss), faiss
IndexFlatIP / IndexFlatL2, the exact merge of partials (derived).
Dask's rescheduling of a lost worker's tasks is documented Dask behaviour (common practice).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from concurrent.futures import ThreadPoolExecutor

import faiss
import numpy as np
import pytest

from densemem import (
    DenseMemory,
    InputTypeError,
    InputValueError,
    MissingExtraError,
    StoreFormatError,
)
from densemem.sharding import _dask as D
from densemem.sharding import open_sharded, shard_memory

distributed = pytest.importorskip("distributed")


def _on(store, client, retries=2, timeout=None):
    sm = open_sharded(store) if isinstance(store, (str, os.PathLike)) else store
    return sm.on_cluster(client, retries=retries, timeout=timeout)


def _retrieve(store, q, beta=None, *, client, retries=2, timeout=None, **kw):
    """One call through the cluster front door (ShardedMemory.on_cluster(...).retrieve)."""
    with _on(store, client, retries, timeout) as cluster:
        return cluster.retrieve(q, beta, **kw)


def _nearest(store, q, k=None, *, client, retries=2, timeout=None, **kw):
    with _on(store, client, retries, timeout) as cluster:
        return cluster.nearest(q, k, **kw)


@pytest.fixture(scope="module")
def client():
    import logging

    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
        silence_logs=logging.CRITICAL,
    )
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    rng = np.random.default_rng(7)
    x = rng.standard_normal((3000, 24)).astype(np.float32)
    mem = DenseMemory.from_array(x, ids=[f"item-{i}" for i in range(3000)], normalize=True, beta=12.0)
    root = tmp_path_factory.mktemp("dist")
    # uneven contiguous shards, then an empty shard: 3000 rows over 7 shards by contiguous blocks,
    # plus a store with more shards than a tiny memory
    sm = shard_memory(mem, root / "uneven", 7, by="contiguous")
    small = DenseMemory.from_array(x[:5], beta=12.0)
    sm_empty = shard_memory(small, root / "empty", 7)  # 5 rows over 7 shards: two empty shards
    q = mem.patterns[::150] + 0.2 * rng.standard_normal((20, 24)).astype(np.float32)
    return mem, sm, small, sm_empty, q


def _same(a, b) -> None:
    # derived (merge of partials over disjoint rows): the merge is an identity; only float32
    # rounding may differ
    np.testing.assert_allclose(b.states, a.states, atol=1e-5)
    np.testing.assert_array_equal(b.top_ids, a.top_ids)
    np.testing.assert_allclose(b.top_weights, a.top_weights, atol=1e-5)
    np.testing.assert_allclose(b.energy, a.energy, atol=1e-5)
    assert (b.steps, b.method) == (a.steps, a.method)


@pytest.mark.parametrize("method,beta,steps", [("exact", 12.0, 1), ("exact", 12.0, 4), ("certified", 40.0, 2)])
def test_retrieve_equals_single_machine(client, data, method, beta, steps):
    mem, sm, *_ = data
    q = data[4]
    a = mem.retrieve(q, beta, steps=steps, k=6, method=method)
    b = _retrieve(sm, q, beta, steps=steps, k=6, method=method, client=client, timeout=60)
    _same(a, b)
    if method == "certified":
        assert np.all(b.mass_bound <= 1e-6) and np.all(b.state_bound == 2 * sm.max_norm * b.mass_bound)


@pytest.mark.parametrize("method", ["exact", "certified"])
def test_empty_shards_and_a_path_argument(client, data, method):
    _, _, small, sm_empty, _ = data
    assert 0 in sm_empty.counts
    q = np.random.default_rng(3).standard_normal((4, 24)).astype(np.float32)
    a = small.retrieve(q, steps=2, k=5, method=method)
    b = _retrieve(str(sm_empty.path), q, steps=2, k=5, method=method, client=client, timeout=60)
    _same(a, b)


@pytest.mark.parametrize("metric", ["ip", "l2"])
def test_nearest_equals_faiss_flat(client, data, metric):
    mem, sm, *_ = data
    q = data[4]
    # outside reference: faiss flat index over all rows
    index = faiss.IndexFlatIP(24) if metric == "ip" else faiss.IndexFlatL2(24)
    index.add(mem.patterns)
    scores, pos = index.search(q / np.linalg.norm(q, axis=1, keepdims=True), 9)  # the memory normalizes
    got = _nearest(sm, q, 9, metric=metric, client=client, timeout=60)
    np.testing.assert_array_equal(got.ids, mem.ids[pos])
    np.testing.assert_allclose(got.scores, scores, rtol=1e-5, atol=1e-5)
    one = _nearest(sm, q[0], 3, metric=metric, client=client)
    assert one.ids.tolist() == mem.ids[pos[0, :3]].tolist()


def test_workers_load_each_shard_once(client, data):
    mem, sm, *_ = data
    q = data[4]
    for _ in range(3):
        _retrieve(sm, q, steps=2, k=3, method="exact", client=client)
    loads = client.run(lambda: [f for f in D._LOADS if "uneven" in f])
    for folders in loads.values():
        # each worker process loaded each shard at most once (the per-process cache)
        assert len(folders) == len(set(folders))
    assert set().union(*map(set, loads.values())) == set(sm.shard_folders)


def test_one_dimensional_query(client, data):
    mem, sm, *_ = data
    a = mem.retrieve(data[4][0], k=4, method="exact")
    b = _retrieve(sm, data[4][0], k=4, method="exact", client=client)
    assert b.states.shape == (24,) and isinstance(b.energy, float)
    assert b.top_ids.tolist() == a.top_ids.tolist()


def test_missing_shard_file_is_a_clear_error(client, tmp_path):
    mem = DenseMemory.from_array(np.random.default_rng(1).standard_normal((40, 4)))
    sm = shard_memory(mem, tmp_path / "s", 3)
    os.remove(tmp_path / "s" / "shard-00002" / "ids.npy")
    with pytest.raises(
        StoreFormatError,
        match=r"ClusterShards.retrieve: shard 2 at .*shard-00002' cannot be loaded: .*ids.npy' is missing",
    ):
        _retrieve(sm, np.ones(4), client=client, retries=0, timeout=60)


def test_argument_errors(client, data):
    _, sm, *_ = data
    with pytest.raises(InputTypeError, match=r"ShardedMemory.on_cluster: `client` must be a dask.distributed.Client"):
        _retrieve(sm, np.ones(24), client=42)
    with pytest.raises(InputValueError, match=r"ClusterShards.retrieve: shard 0 at .* has no candidate index"):
        _retrieve(sm, np.ones(24), method="index", client=client)  # type: ignore[arg-type]
    with pytest.raises(InputValueError, match=r"ShardedMemory.on_cluster: `retries` must be an integer >= 0; got -1"):
        _retrieve(sm, np.ones(24), client=client, retries=-1)
    with pytest.raises(InputValueError, match=r"ShardedMemory.on_cluster: `timeout` must be a finite number > 0"):
        _retrieve(sm, np.ones(24), client=client, timeout=0)
    with pytest.raises(TimeoutError, match=r"ClusterShards.retrieve: no answer within timeout="):
        _retrieve(sm, np.ones((2000, 24)), client=client, timeout=1e-4)


def test_cluster_without_workers_is_an_error(data):
    _, sm, *_ = data
    with distributed.LocalCluster(n_workers=0, processes=False, dashboard_address=":0") as cluster:
        with pytest.raises(InputValueError, match=r"ClusterShards.nearest: the Dask cluster has no workers"):
            _nearest(sm, np.ones(24), client=cluster.scheduler_address)  # an address string


def test_missing_extra_says_how_to_install(monkeypatch, data):
    _, sm, *_ = data
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed now raises ImportError
    with pytest.raises(MissingExtraError, match=r"pip install densemem\[dist\]"):
        _retrieve(sm, np.ones(24), client="tcp://127.0.0.1:1")
    assert sm.retrieve(np.ones(24), method="exact").states.shape == (24,)  # the local path still works


def test_killing_a_worker_mid_query_still_gives_the_right_answer(client, tmp_path):
    # Dask reschedules the tasks of a lost worker on another one (common practice); the shard
    # is loaded again there from the shared folder. Kept last: it restarts a worker.
    rng = np.random.default_rng(11)
    x = rng.standard_normal((100_000, 32)).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=True, beta=4.0)  # beta M^2 = 4: rounding is not amplified
    sm = shard_memory(mem, tmp_path / "big", 2, by="contiguous")
    q = rng.standard_normal((300, 32)).astype(np.float32)
    expect = mem.retrieve(q, k=5, method="exact")
    with ThreadPoolExecutor(1) as pool:
        job = pool.submit(_retrieve, sm, q, k=5, method="exact", client=client, timeout=120)
        victim, t0 = None, time.monotonic()
        while victim is None and time.monotonic() - t0 < 60 and not job.done():
            busy = {w: keys for w, keys in client.processing().items() if any("densemem-shard" in str(k) for k in keys)}
            victim = next(iter(busy), None)
            time.sleep(0.02)
        assert victim is not None, "no shard task was seen running"
        async def _exit_now() -> None:  # a coroutine: run(wait=False) needs one
            os._exit(1)

        client.run(_exit_now, workers=[victim], wait=False)
        got = job.result(timeout=150)  # bounded: an answer, not a hang
    assert victim not in client.scheduler_info()["workers"]
    # the query went on after the kill: live workers (the survivor, or the restarted process)
    # loaded both shards, so the victim's shard was computed again elsewhere
    loads = client.run(lambda: [f for f in D._LOADS if "big" in f])
    assert set().union(*map(set, loads.values())) == set(sm.shard_folders)
    np.testing.assert_allclose(got.states, expect.states, atol=1e-5)
    np.testing.assert_array_equal(got.top_ids, expect.top_ids)
    np.testing.assert_allclose(got.energy, expect.energy, atol=1e-5)


def test_index_method_on_the_cluster_equals_local_shards(client, tmp_path):
    # Same per-shard HNSW indexes (persisted beside each shard), so the workers and this process
    # see the same candidates and the exact merge gives the same answer (float32 rounding aside).
    rng = np.random.default_rng(4)
    x = rng.standard_normal((6000, 24)).astype(np.float32)
    sm = shard_memory(DenseMemory.from_array(x, normalize=True, beta=20.0), tmp_path / "ix", 3)
    sm.build_index("hnsw", M=16, ef_search=64)
    q = x[::300] + 0.05
    local = open_sharded(sm.path).retrieve(q, k=5, method="index")
    remote = _retrieve(sm.path, q, k=5, method="index", client=client, timeout=60)
    np.testing.assert_array_equal(local.top_ids, remote.top_ids)
    np.testing.assert_allclose(local.states, remote.states, atol=1e-6)
    assert remote.method == "index"


def test_index_built_on_the_workers_equals_one_built_here(client, tmp_path):
    # The same settings on the same rows give the same faiss HNSW graph (faiss builds it
    # deterministically single-threaded per shard: common practice), so answers agree.
    rng = np.random.default_rng(6)
    x = rng.standard_normal((4000, 16)).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=True, beta=20.0)
    here = shard_memory(mem, tmp_path / "here", 2)
    there = shard_memory(mem, tmp_path / "there", 2)
    here.build_index("ivf", nlist=16, nprobe=16)
    with there.on_cluster(client) as cluster:
        assert cluster.build_index("ivf", nlist=16, nprobe=16)["kind"] == "ivf"
    q = x[::200] + 0.05
    a = open_sharded(here.path).retrieve(q, k=5, method="index")
    b = open_sharded(there.path).retrieve(q, k=5, method="index")
    np.testing.assert_array_equal(a.top_ids, b.top_ids)
    assert sorted(p.name for p in (tmp_path / "there").iterdir() if p.name != "shards.json") == sorted(
        Path(f).name for f in open_sharded(there.path).shard_folders)
