"""Sharded stores that change: remove, index-backed retrieval per shard, rebalancing, crash safety.

References: each operation is compared with the same operation on one in-memory DenseMemory
holding the same rows (exact agreement of ids; states to float32 rounding, since the sum runs
over the rows in another order: common practice for float32 reductions); faiss IndexFlatIP
exact search is the truth for the index-backed candidate recall; scikit-learn's bundled digits
are the real vectors.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import faiss
import numpy as np
import pytest

from densemem import DenseMemory, InputValueError, StoreFormatError, UnknownIdError
from densemem.sharding import open_sharded, shard_memory


def _stored(p: Path) -> list[str]:
    return sorted(c.name for c in p.iterdir())


def _pair(rng: np.random.Generator, n: int = 3000, d: int = 24, shards: int = 4, str_ids: bool = False, tmp=None):
    x = rng.standard_normal((n, d)).astype(np.float32)
    ids = [f"row-{i}" for i in range(n)] if str_ids else None
    mem = DenseMemory.from_array(x, ids=ids, normalize=True, beta=15.0)
    return mem, shard_memory(mem, tmp / "s", shards)


@pytest.mark.parametrize("str_ids", [False, True])
def test_remove_matches_one_memory_and_touches_only_holders(tmp_path, rng, str_ids):
    mem, sm = _pair(rng, str_ids=str_ids, tmp=tmp_path)
    before = dict(zip(range(sm.n_shards), sm.shard_folders))
    gone = [mem.ids[i].item() for i in (0, 4, 8)]  # round robin: all three live in shard 0
    assert sm.remove(gone) == 3
    mem.remove(gone)
    assert sm.counts[0] == 750 - 3 and sm.counts[1:] == (750, 750, 750)
    assert sm.shard_folders[1:] == tuple(before[i] for i in (1, 2, 3))  # untouched shards keep their folders
    assert sm.shard_folders[0] != before[0] and not Path(before[0]).exists()  # the old folder is deleted
    q = mem.patterns[1::97] + 0.05
    a, b = mem.retrieve(q, k=6, method="exact"), open_sharded(sm.path).retrieve(q, k=6, method="exact")
    np.testing.assert_array_equal(a.top_ids, b.top_ids)
    np.testing.assert_allclose(a.states, b.states, atol=1e-6)


def test_remove_refuses_unknown_and_bad_ids_writing_nothing(tmp_path, rng):
    mem, sm = _pair(rng, tmp=tmp_path)
    listing = _stored(sm.path)
    with pytest.raises(UnknownIdError, match=r"ShardedMemory.remove: unknown id"):
        sm.remove([3, 99999])
    with pytest.raises(UnknownIdError, match=r"99998"):
        sm.remove([99998, 99999, 5])  # names the first few unknown ids
    with pytest.raises(InputValueError, match=r"ShardedMemory.remove: `ids` lists an id more than once"):
        sm.remove([1, 1])
    with pytest.raises(TypeError, match=r"ShardedMemory.remove: `ids` must be a flat sequence of integers"):
        sm.remove(["a"])
    assert _stored(sm.path) == listing and len(sm) == 3000


def test_remove_from_an_empty_shard_is_an_unknown_id(tmp_path):
    sm = shard_memory(DenseMemory.from_array(np.eye(3)), tmp_path / "s", 5)  # two empty shards
    with pytest.raises(UnknownIdError):
        sm.remove([7])
    assert sm.remove([2]) == 1 and sm.counts == (1, 1, 0, 0, 0)


def test_an_id_held_by_two_shards_is_refused_naming_both(tmp_path):
    sm = shard_memory(DenseMemory.from_array(np.eye(4)), tmp_path / "s", 2)
    sm.add([[0.5, 0.5, 0.0, 0.0]])  # id 4 in the smallest shard
    # damage the store: give shard 1's copy of id 4 also to shard 0 by rewriting shard 0 with it
    man = json.loads((sm.path / "shards.json").read_text())
    other = DenseMemory.load(sm.path / man["shards"][1]["folder"])
    zero = DenseMemory.load(sm.path / man["shards"][0]["folder"])
    zero.add(other.patterns[-1:], ids=other.ids[-1:])
    zero.save(sm.path / man["shards"][0]["folder"], overwrite=True)
    man["shards"][0]["manifest_sha256"] = __import__("hashlib").sha256(
        (sm.path / man["shards"][0]["folder"] / "manifest.json").read_bytes()).hexdigest()
    from densemem.store._folder import manifest_text  # the manifest's own checksum, as the library writes it

    (sm.path / "shards.json").write_text(manifest_text(man))
    with pytest.raises(StoreFormatError, match=r"id 3 is held by shard 0 .* and shard 1 .*damaged"):
        open_sharded(sm.path).remove([3])


def test_index_per_shard_is_persisted_kept_in_step_and_close_to_faiss_truth(tmp_path, digits):
    # open data: scikit-learn digits; truth: faiss IndexFlatIP over every row
    x = (digits / np.linalg.norm(digits, axis=1, keepdims=True)).astype(np.float32)
    mem = DenseMemory.from_array(x, beta=40.0)
    sm = shard_memory(mem, tmp_path / "s", 3)
    sm.build_index("hnsw", M=16, ef_search=128)
    sm = open_sharded(sm.path)  # the indexes come back from disk
    q = x[::7] + 0.02
    res = sm.retrieve(q, method="index", k=5, measure=True)
    assert res.method == "index" and res.candidate_recall is not None and res.candidate_recall >= 0.95
    flat = faiss.IndexFlatIP(x.shape[1])
    flat.add(x)
    _, truth = flat.search(np.ascontiguousarray(q / np.linalg.norm(q, axis=1, keepdims=True), dtype=np.float32), 1)
    assert np.mean(res.top_ids[:, 0] == mem.ids[truth[:, 0]]) >= 0.95
    sm.remove([0, 1, 2])
    sm.add(x[:2] + 0.001)
    assert all(s.get("index") for s in sm._man["shards"])  # every touched shard rebuilt its index
    again = open_sharded(sm.path).retrieve(q, method="index", k=5)
    assert not np.isin([0, 1, 2], again.top_ids).any()


def test_index_method_without_an_index_names_the_shard(tmp_path):
    sm = shard_memory(DenseMemory.from_array(np.eye(4)), tmp_path / "s", 2)
    with pytest.raises(InputValueError, match=r"ShardedMemory.retrieve: shard 0 at .* has no candidate index"):
        sm.retrieve(np.eye(4), method="index")


@pytest.mark.parametrize("target", [{"n_shards": 2}, {"n_shards": 7}, {"rows_per_shard": 500}])
def test_rebalance_keeps_ids_and_answers(tmp_path, rng, target):
    mem, sm = _pair(rng, str_ids=True, tmp=tmp_path)
    sm.add(rng.standard_normal((300, 24)), ids=[f"late-{i}" for i in range(300)])  # uneven: one shard grew
    mem.add(sm._memories("t")[0].patterns[-300:], ids=[f"late-{i}" for i in range(300)])
    q = rng.standard_normal((40, 24)).astype(np.float32)
    before = sm.retrieve(q, k=8, method="exact")
    old = set(sm.shard_folders)
    sm.rebalance(**target)
    counts = sm.counts
    assert sum(counts) == 3300 and max(counts) - min(counts) <= 1
    assert not old & set(sm.shard_folders) and not any(Path(f).exists() for f in old)
    after = open_sharded(sm.path).retrieve(q, k=8, method="exact")
    np.testing.assert_array_equal(before.top_ids, after.top_ids)
    np.testing.assert_allclose(before.states, after.states, atol=1e-6)  # float32 rounding only
    np.testing.assert_array_equal(after.top_ids, mem.retrieve(q, k=8, method="exact").top_ids)
    assert sorted(np.concatenate([m.ids for m in sm._memories("t")]).tolist()) == sorted(mem.ids.tolist())


def test_rebalance_refusals_move_nothing(tmp_path, rng):
    mem, sm = _pair(rng, tmp=tmp_path)
    listing = _stored(sm.path)
    with pytest.raises(InputValueError, match=r"give exactly one of `n_shards` and `rows_per_shard`"):
        sm.rebalance()
    with pytest.raises(InputValueError, match=r"`n_shards` = 4000 exceeds the 3000 stored rows"):
        sm.rebalance(n_shards=4000)
    shutil.rmtree(sm.path / _stored(sm.path)[2])  # a shard folder goes missing
    listing = _stored(sm.path)
    with pytest.raises(StoreFormatError, match=r"shard 2 at .* cannot be loaded"):
        sm.rebalance(n_shards=2)
    assert _stored(sm.path) == listing


# ------------------------------------------------------------- crash safety
_CRASH = textwrap.dedent(
    """
    import json, os, shutil, signal, sys, time
    import numpy as np
    from densemem import DenseMemory
    from densemem.sharding import open_sharded, shard_memory
    root, op, trials, seed = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((8000, 32)).astype(np.float32)
    base = os.path.join(root, "base")
    shard_memory(DenseMemory.from_array(x, normalize=True, beta=10.0), base, 4)
    q = x[:50] + 0.1
    extra = rng.standard_normal((2000, 32)) + 5.0
    def run(path):
        sm = open_sharded(path)
        if op == "add": sm.add(extra)
        elif op == "remove": sm.remove(list(range(0, 8000, 3)))
        elif op == "rebalance": sm.rebalance(n_shards=3)
        elif op == "index": sm.build_index("hnsw", M=8)
    def answer(path):
        sm = open_sharded(path, verify=True)
        r = sm.retrieve(q, k=5, method="exact")
        return [len(sm), r.top_ids.tolist(), sorted(s.get("index") is not None for s in sm._man["shards"])]
    old = answer(base)
    done = os.path.join(root, "done"); shutil.copytree(base, done)
    t0 = time.perf_counter(); run(done); span = time.perf_counter() - t0
    new = answer(done)
    out = []
    for t in range(trials):
        path = os.path.join(root, f"t{t}")
        shutil.copytree(base, path)
        pid = os.fork()
        if pid == 0:
            run(path)
            os._exit(0)
        time.sleep(rng.uniform(0.0, 0.9 * span))
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        try:
            got = answer(path)
            state = "old" if got == old else ("new" if got == new else "other")
        except Exception as exc:
            state = "error " + type(exc).__name__ + ": " + str(exc)[:200]
        sm = open_sharded(path)  # the next operation tidies what the killed one left
        sm.add(np.ones((1, 32)))
        named = {s["folder"] for s in sm._man["shards"]}
        stray = sorted(set(os.listdir(path)) - named - {"shards.json"})
        out.append({"killed": bool(os.WIFSIGNALED(status)), "state": state, "stray": stray})
    print(json.dumps(out))
    """
)


@pytest.mark.parametrize("op", ["add", "remove", "rebalance", "index"])
def test_kill_9_at_20_random_points_leaves_old_or_new(tmp_path, op):
    out = subprocess.run([sys.executable, "-c", _CRASH, str(tmp_path), op, "20", "3"],
                         capture_output=True, text=True, timeout=300, env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])})
    assert out.returncode == 0, out.stderr[-2000:]
    trials = json.loads(out.stdout.strip().splitlines()[-1])
    assert len(trials) == 20
    assert all(t["state"] in ("old", "new") for t in trials), [t["state"] for t in trials]
    assert all(not t["stray"] for t in trials)
    assert sum(t["killed"] for t in trials) >= 8  # kills land at random times across the measured span


def test_bad_input_names_the_sharded_call_and_writes_nothing(tmp_path):
    from densemem.sharding import open_store

    sm = shard_memory(DenseMemory.from_array(np.eye(4)), tmp_path / "s", 2)
    listing = _stored(sm.path)
    assert sm.remove([]) == 0 and _stored(sm.path) == listing  # an empty removal writes nothing
    with pytest.raises(InputValueError, match=r"ShardedMemory.build_index: `M` must be an integer >= 2"):
        sm.build_index("hnsw", M=1)
    assert _stored(sm.path) == listing
    with pytest.raises(StoreFormatError, match=r"open_store: there is no store folder"):
        open_store(tmp_path / "nope")
