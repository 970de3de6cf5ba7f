"""Sharded stores and local (cluster-free) sharded retrieval (densemem.sharding).

References: faiss IndexFlatIP / IndexFlatL2 exact search, scipy.special.logsumexp, the exact
merge of partials over disjoint rows (derived), the
certified bound of densemem.core.candidates and its sharded form in densemem.sharding._ops (derived),
hashlib's sha256 for the manifest checksums, scikit-learn's bundled digits (UCI optdigits).
"""

from __future__ import annotations

import hashlib
import json
import os

import faiss
import numpy as np
import pytest
from scipy.special import logsumexp

from densemem import DenseMemory, InputTypeError, InputValueError, StoreFormatError
from densemem.core import rows
from densemem.sharding import _ops as S
from densemem.core.candidates import CertifiedOptions
from densemem.sharding import open_sharded, shard_memory
from densemem.store._folder import manifest_text


def _ref_energy(x: np.ndarray, s: np.ndarray, beta: float) -> np.ndarray:
    """Energy of Ramsauer et al., ICLR 2021 (from memory), computed in float64 with
    scipy.special.logsumexp."""
    x64, s64 = x.astype(np.float64), s.astype(np.float64)
    lse = logsumexp(beta * s64 @ x64.T, axis=1)
    m = np.sqrt((x64 * x64).sum(1).max())
    return -lse / beta + 0.5 * (s64 * s64).sum(1) + np.log(len(x)) / beta + 0.5 * m * m


def _same(a, b, *, energy_atol: float = 2e-5) -> None:
    # derived (merge of partials over disjoint rows): the merge is an identity, so only float32
    # rounding differs
    np.testing.assert_allclose(b.states, a.states, atol=1e-5)
    np.testing.assert_array_equal(b.top_ids, a.top_ids)
    np.testing.assert_allclose(b.top_weights, a.top_weights, atol=1e-5)
    if a.energy is not None:
        np.testing.assert_allclose(b.energy, a.energy, atol=energy_atol)
    assert b.steps == a.steps


@pytest.fixture(scope="module")
def digits_mem() -> DenseMemory:
    from sklearn.datasets import load_digits

    return DenseMemory.from_array(load_digits().data.astype(np.float32), normalize=True, beta=20.0)


# ------------------------------------------------------------------ layout
@pytest.mark.parametrize("by,counts", [("round_robin", (4, 3, 3)), ("contiguous", (4, 3, 3))])
def test_layout_counts_and_checksums(tmp_path, rng, by, counts):
    x = rng.standard_normal((10, 4)).astype(np.float32)
    mem = DenseMemory.from_array(x, ids=[f"n{i}" for i in range(10)])
    before = mem.patterns.copy()
    sm = shard_memory(mem, tmp_path / "s", 3, by=by)
    assert sm.counts == counts and len(sm) == 10
    np.testing.assert_array_equal(mem.patterns, before)  # rules: inputs are never modified
    top = json.loads((tmp_path / "s" / "shards.json").read_text())
    for s in top["shards"]:
        # reference: hashlib sha256 of each shard's manifest.json
        digest = hashlib.sha256((tmp_path / "s" / s["folder"] / "manifest.json").read_bytes()).hexdigest()
        assert s["manifest_sha256"] == digest
    rows = [DenseMemory.load(f).ids.tolist() for f in sm.shard_folders]
    expect = [[f"n{i}" for i in range(j, 10, 3)] for j in range(3)] if by == "round_robin" else \
        [["n0", "n1", "n2", "n3"], ["n4", "n5", "n6"], ["n7", "n8", "n9"]]
    assert rows == expect
    assert not [p for p in os.listdir(tmp_path) if p.startswith(".")]  # no temp folders left
    info = open_sharded(tmp_path / "s").describe().to_dict()
    assert info["count"] == 10 and info["by"] == by and info["id_kind"] == "str"


def test_overwrite_replaces_a_sharded_store(tmp_path, rng):
    mem = DenseMemory.from_array(rng.standard_normal((6, 3)))
    shard_memory(mem, tmp_path / "s", 2)
    sm = shard_memory(mem, tmp_path / "s", 3, overwrite=True)
    assert open_sharded(tmp_path / "s").counts == sm.counts == (2, 2, 2)


# ------------------------------------------------------ equal to one machine
@pytest.fixture(scope="module")
def digits_sharded(tmp_path_factory, digits_mem):
    # uneven contiguous shards of 1797 rows: (450, 449, 449, 449)
    return shard_memory(digits_mem, tmp_path_factory.mktemp("digits") / "s", 4, by="contiguous")


@pytest.mark.parametrize("method,beta,steps", [("exact", 20.0, 1), ("exact", 20.0, 3), ("certified", 60.0, 2), ("auto", 60.0, 2)])
def test_local_retrieve_equals_single_machine_on_digits(digits_mem, digits_sharded, method, beta, steps):
    # open data: scikit-learn's bundled digits (UCI optdigits)
    q = digits_mem.patterns[::90] + 0.05
    a = digits_mem.retrieve(q, beta, steps=steps, k=7, method=method)
    b = digits_sharded.retrieve(q, beta, steps=steps, k=7, method=method)
    _same(a, b, energy_atol=2e-4 / beta)
    if method == "certified":
        assert b.mass_bound is not None and np.all(b.mass_bound <= 1e-6)
    if method == "auto":  # every shard holds < 2048 rows, so auto answers exactly, as one machine on 1797 rows
        assert a.method == b.method == "exact"


def test_uneven_and_empty_shards(tmp_path, rng):
    x = rng.standard_normal((7, 5)).astype(np.float32)
    mem = DenseMemory.from_array(x, beta=2.0)
    sm = shard_memory(mem, tmp_path / "s", 9)  # 7 rows over 9 shards: two are empty
    assert sm.counts == (1,) * 7 + (0, 0)
    q = rng.standard_normal((5, 5)).astype(np.float32)
    for method in ("exact", "certified"):
        _same(mem.retrieve(q, k=7, method=method, steps=2), sm.retrieve(q, k=7, method=method, steps=2))
    # outside reference: the energy formula in float64 with scipy.special.logsumexp
    r = sm.retrieve(q, k=3, method="exact")
    np.testing.assert_allclose(r.energy, _ref_energy(x, r.states, 2.0), atol=1e-5)


@pytest.mark.parametrize("seed", range(5))
def test_random_merge_order_gives_the_same_answer(tmp_path, rng, seed):
    # derived (merge of partials over disjoint rows): the merge is associative and commutative
    x = rng.standard_normal((300, 8)).astype(np.float32)
    mem = DenseMemory.from_array(x, ids=[f"r{i}" for i in range(300)], beta=3.0)
    sm = shard_memory(mem, tmp_path / "s", 5, by="contiguous")
    new = rng.standard_normal((40, 8)).astype(np.float32)
    sm.add(new, ids=[f"new{i}" for i in range(40)])  # str ids of another width in one shard
    mem.add(new, ids=[f"new{i}" for i in range(40)])
    q = rng.standard_normal((6, 8)).astype(np.float32)
    parts = [S.shard_rows(m, "exact").reduce(q, 3.0, k=9, need_acc=True, cert=CertifiedOptions())
             for m in sm._memories("t")]
    order = np.random.default_rng(seed).permutation(len(parts))
    merged = rows.tree_merge([parts[i] for i in order], rows.merge)
    fin, ids = rows.finish(merged)
    ref = mem.retrieve(q, k=9, method="exact", return_energy=False)
    np.testing.assert_allclose(fin.states, ref.states, atol=1e-5)
    np.testing.assert_array_equal(ids, ref.top_ids)


def test_certified_state_bound_holds(tmp_path, rng):
    # derived (densemem.sharding._ops docstring): |certified state - exact state| <= 2 M eps
    x = rng.standard_normal((2000, 16)).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=True)
    sm = shard_memory(mem, tmp_path / "s", 3)
    q = mem.patterns[:20] + 0.1 * rng.standard_normal((20, 16)).astype(np.float32)
    exact = mem.retrieve(q, 25.0, k=5, method="exact")
    cert = sm.retrieve(q, 25.0, k=5, method="certified", tol_mass=1e-3)
    gap = np.linalg.norm(cert.states - exact.states, axis=1)
    assert np.all(gap <= cert.state_bound + 1e-5)
    assert np.all(cert.mass_bound <= 1e-3) and cert.method == "certified"
    assert np.any(cert.mass_bound > 0)  # the bound is actually exercised


def test_one_dimensional_query_and_ids(tmp_path, rng):
    mem = DenseMemory.from_array(np.eye(6), ids=list("abcdef"), beta=30.0)
    sm = shard_memory(mem, tmp_path / "s", 4)
    r = sm.retrieve([0, 0, 0, 0.9, 0.1, 0], k=2, method="exact")
    assert r.top_ids.tolist() == ["d", "e"] and r.states.shape == (6,) and isinstance(r.energy, float)


@pytest.mark.parametrize("metric", ["ip", "l2"])
def test_nearest_equals_faiss_flat(tmp_path, rng, metric):
    x = rng.standard_normal((500, 12)).astype(np.float32)
    sm = shard_memory(DenseMemory.from_array(x), tmp_path / "s", 3, by="contiguous")
    q = rng.standard_normal((9, 12)).astype(np.float32)
    # outside reference: faiss IndexFlatIP / IndexFlatL2 over every row
    index = faiss.IndexFlatIP(12) if metric == "ip" else faiss.IndexFlatL2(12)
    index.add(x)
    scores, pos = index.search(q, 8)
    got = sm.nearest(q, 8, metric=metric)
    np.testing.assert_array_equal(got.ids, pos)
    np.testing.assert_allclose(got.scores, scores, rtol=1e-5, atol=1e-5)


# -------------------------------------------------------------------- add
def test_add_routes_to_smallest_shard_and_matches_single_machine(tmp_path, rng):
    x = rng.standard_normal((11, 4)).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=True, beta=4.0)
    sm = shard_memory(mem, tmp_path / "s", 3, by="contiguous")  # (4, 4, 3)
    new = rng.standard_normal((2, 4))
    assert sm.add(new).tolist() == [11, 12]
    assert sm.counts == (4, 4, 5)
    assert mem.add(new).tolist() == [11, 12]
    again = open_sharded(tmp_path / "s")
    assert again.counts == (4, 4, 5) and len(again) == 13
    q = rng.standard_normal((4, 4)).astype(np.float32)
    _same(mem.retrieve(q, k=5, method="exact"), again.retrieve(q, k=5, method="exact"))
    assert again.add(rng.standard_normal((1, 4))).tolist() == [13] and again.counts == (5, 4, 5)


@pytest.mark.parametrize(
    "ids,exc,match",
    [
        ([3], InputValueError, r"ShardedMemory.add: id 3 is already stored"),
        (["z"], InputTypeError, r"ShardedMemory.add: the memory uses int ids"),
        ([7, 7], InputValueError, r"repeats the id 7"),
    ],
)
def test_add_rejects_bad_ids(tmp_path, rng, ids, exc, match):
    sm = shard_memory(DenseMemory.from_array(rng.standard_normal((5, 2))), tmp_path / "s", 2)
    with pytest.raises(exc, match=match):
        sm.add(rng.standard_normal((len(ids), 2)), ids=ids)
    assert open_sharded(tmp_path / "s").counts == (3, 2)  # nothing written


def test_add_needs_ids_for_str_memory_and_the_right_width(tmp_path, rng):
    sm = shard_memory(DenseMemory.from_array(np.eye(2), ids=["a", "b"]), tmp_path / "s", 2)
    with pytest.raises(InputValueError, match=r"ShardedMemory.add: the memory uses str ids, so `ids` must be given"):
        sm.add([[1.0, 0.0]])
    with pytest.raises(InputValueError, match=r"ShardedMemory.add: `patterns` have 3 features but the memory stores 2"):
        sm.add([[1.0, 0.0, 0.0]], ids=["c"])


# ----------------------------------------------------------------- errors
def test_shard_memory_argument_errors(tmp_path, rng):
    mem = DenseMemory.from_array(rng.standard_normal((4, 2)))
    with pytest.raises(InputTypeError, match=r"shard_memory: `memory` must be a DenseMemory; got ndarray"):
        shard_memory(np.eye(2), tmp_path / "a", 2)
    with pytest.raises(InputValueError, match=r"shard_memory: `n_shards` must be an integer >= 1; got 0"):
        shard_memory(mem, tmp_path / "a", 0)
    with pytest.raises(InputValueError, match=r"shard_memory: `by` must be 'round_robin' or 'contiguous'; got 'hash'"):
        shard_memory(mem, tmp_path / "a", 2, by="hash")  # type: ignore[arg-type]
    with pytest.raises(InputTypeError, match=r"shard_memory: `path` must be a str or os.PathLike; got int"):
        shard_memory(mem, 5, 2)
    with pytest.raises(InputValueError, match=r"shard_memory: `path` must name a folder"):
        shard_memory(mem, "..", 2)
    with pytest.raises(InputValueError, match=r"shard_memory: the parent folder of `path` does not exist"):
        shard_memory(mem, tmp_path / "no" / "s", 2)
    shard_memory(mem, tmp_path / "s", 2)
    with pytest.raises(InputValueError, match=r"a sharded store already exists at .* and overwrite=False"):
        shard_memory(mem, tmp_path / "s", 2)
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "notes.txt").write_text("mine")
    with pytest.raises(InputValueError, match=r"is a folder that is not a sharded store; refusing to replace it"):
        shard_memory(mem, tmp_path / "other", 2, overwrite=True)
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputValueError, match=r"exists and is not a folder; refusing to replace it"):
        shard_memory(mem, tmp_path / "file", 2)


def test_open_errors_name_the_shard(tmp_path, rng):
    mem = DenseMemory.from_array(rng.standard_normal((6, 2)))
    with pytest.raises(StoreFormatError, match=r"open_sharded: there is no sharded store at .*shards.json is missing"):
        open_sharded(tmp_path / "nothing")
    sm = shard_memory(mem, tmp_path / "s", 3)
    top = tmp_path / "s" / "shards.json"
    man = json.loads(top.read_text())
    man["format_version"] = 99
    top.write_text(json.dumps(man))
    with pytest.raises(StoreFormatError, match=r"has format_version 99; this densemem reads version 2"):
        open_sharded(tmp_path / "s")
    top.write_text("{not json")
    with pytest.raises(StoreFormatError, match=r"is not valid JSON"):
        open_sharded(tmp_path / "s")
    top.write_text(json.dumps({"format": "other"}))
    with pytest.raises(StoreFormatError, match=r"is not a densemem-shards manifest"):
        open_sharded(tmp_path / "s")
    man["format_version"] = 2
    top.write_text(manifest_text({**man, "shards": []}))
    with pytest.raises(StoreFormatError, match=r"has a missing or bad 'shards' list"):
        open_sharded(tmp_path / "s")
    top.write_text(manifest_text({k: v for k, v in man.items() if k != "next_id"}))
    with pytest.raises(StoreFormatError, match=r"has no 'next_id' entry"):
        open_sharded(tmp_path / "s")
    top.write_text(manifest_text(man))
    open_sharded(tmp_path / "s")
    (tmp_path / "s" / "shard-00001" / "manifest.json").write_text("{}")
    with pytest.raises(StoreFormatError, match=r"open_sharded: shard 1 at .*shard-00001' does not match shards.json"):
        open_sharded(tmp_path / "s")
    with pytest.raises(StoreFormatError, match=r"ShardedMemory.retrieve: shard 1 at .*shard-00001' does not match"):
        sm.retrieve(np.ones(2))
    os.remove(tmp_path / "s" / "shard-00001" / "manifest.json")
    with pytest.raises(StoreFormatError, match=r"open_sharded: shard 1 at .*shard-00001' is missing"):
        open_sharded(tmp_path / "s")
    with pytest.raises(StoreFormatError, match=r"ShardedMemory.retrieve: shard 1 at .*shard-00001' cannot be loaded"):
        sm.retrieve(np.ones(2))


def test_missing_shard_file_is_a_clear_error(tmp_path, rng):
    sm = shard_memory(DenseMemory.from_array(rng.standard_normal((6, 2))), tmp_path / "s", 2)
    os.remove(tmp_path / "s" / "shard-00000" / "patterns.npy")
    with pytest.raises(
        StoreFormatError, match=r"ShardedMemory.nearest: shard 0 at .*shard-00000' cannot be loaded: .*patterns.npy' is missing"
    ):
        sm.nearest(np.ones(2), 2)


def test_retrieve_argument_errors(tmp_path, rng):
    sm = shard_memory(DenseMemory.from_array(rng.standard_normal((6, 2))), tmp_path / "s", 2)
    with pytest.raises(InputValueError, match=r"ShardedMemory.retrieve: shard 0 at .* has no candidate index"):
        sm.retrieve(np.ones(2), method="index")  # type: ignore[arg-type]
    with pytest.raises(InputValueError, match=r"ShardedMemory.retrieve: `k` must be at most the number of stored patterns \(6\)"):
        sm.retrieve(np.ones(2), k=7)
    with pytest.raises(InputValueError, match=r"ShardedMemory.retrieve: `?queries`? have 3 features"):
        sm.retrieve(np.ones(3))
    with pytest.raises(InputValueError, match=r"ShardedMemory.nearest: `metric` must be 'ip' or 'l2'; got 'cos'"):
        sm.nearest(np.ones(2), metric="cos")  # type: ignore[arg-type]
    empty = shard_memory(DenseMemory(2), tmp_path / "e", 2)
    with pytest.raises(InputValueError, match=r"ShardedMemory.retrieve: the memory is empty; add patterns first"):
        empty.retrieve(np.ones(2))
    unit = shard_memory(DenseMemory.from_array(np.eye(2), normalize=True), tmp_path / "u", 2)
    with pytest.raises(InputValueError, match=r"ShardedMemory.nearest: query row 0 has zero norm"):
        unit.nearest(np.zeros(2))


def test_sharded_retrieve_refuses_what_one_machine_refuses(tmp_path) -> None:
    # The sharded path validates with the same rules as DenseMemory.retrieve (float32 score
    # range, IEEE 754 single precision: common practice; tol_mass a fraction).
    import densemem

    sm = densemem.shard_memory(densemem.DenseMemory.from_array(np.eye(4)), tmp_path / "s", 2)
    with pytest.raises(densemem.InputValueError, match=r"`beta` = 1e\+300 is beyond the float32 score range; use beta <= 1e\+37"):
        sm.retrieve([1.0, 0.0, 0.0, 0.0], beta=1e300)
    with pytest.raises(densemem.InputValueError, match=r"`tol_mass` must be a number in \(0, 1\); got 2\."):
        sm.retrieve([1.0, 0.0, 0.0, 0.0], tol_mass=2)
