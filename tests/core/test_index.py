"""Index-backed retrieval (method="index", nearest(index=True), build_index) against faiss.

References: faiss IndexFlatIP exact search and faiss's own IndexHNSWFlat / IndexIVFFlat built
with the same parameters; scipy.special.softmax in float64; the
certified path (method="certified"), itself checked against scipy in tests/test_certified.py.
All data are invented: random unit vectors and noisy copies of them.
"""

from __future__ import annotations

import contextlib
import warnings

import faiss
import numpy as np
import pytest
from _helpers import noisy_unit_copies
from _helpers import unit_rows_f32 as _unit
from scipy.special import softmax

from densemem import DenseMemory
from densemem.errors import DenseMemWarning, IndexStaleError, InputTypeError, InputValueError


# ----------------------------------------------------------------------------- helpers
def flat_ip_search(x: np.ndarray, q: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """faiss IndexFlatIP exact inner-product search."""
    index = faiss.IndexFlatIP(x.shape[1])
    index.add(np.ascontiguousarray(x, dtype=np.float32))
    return index.search(np.ascontiguousarray(q, dtype=np.float32), k)


def recall_of(found: np.ndarray, exact: np.ndarray) -> float:
    """Mean over queries of |found ∩ exact| / kc, faiss's -1 (missing) entries ignored."""
    kc = exact.shape[1]
    return float(np.mean([np.intersect1d(a, b[b >= 0]).size / kc for a, b in zip(exact, found)]))


@contextlib.contextmanager
def one_faiss_thread():
    """HNSW insertion is parallel in faiss; one thread makes two builds identical."""
    before = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        yield
    finally:
        faiss.omp_set_num_threads(before)


@pytest.fixture(scope="module")
def separated() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented clustered data: 800 random unit centres in d=64, five unit members each at cosine
    ~0.96 to their centre (4000 rows); 200 unit queries at cosine 0.95 to one member each. Within
    a cluster the softmax blends several rows at beta 40-60; other clusters are far."""
    rng = np.random.default_rng(77)
    centres = _unit(rng.standard_normal((800, 64)))
    members = np.repeat(centres, 5, axis=0)
    g = rng.standard_normal(members.shape)
    g -= np.sum(g * members, axis=1, keepdims=True) * members
    g /= np.linalg.norm(g, axis=1, keepdims=True)
    x = _unit(members + 0.3 * g)
    rows = rng.choice(4000, 200, replace=False)
    q = noisy_unit_copies(rng, x, rows, np.full(200, 0.95))
    return x, q, rows


# ----------------------------------------------------------- index vs certified / exact
@pytest.mark.parametrize(
    "kind, params",
    [("hnsw", {"ef_search": 256}), ("ivf", {"nlist": 32, "nprobe": 32})],
)
@pytest.mark.parametrize("beta", [40.0, 60.0])
def test_generous_index_equals_certified(separated, kind: str, params: dict, beta: float) -> None:
    # Issue 3: with a generous efSearch / nprobe = nlist the index-backed path agrees with the
    # certified one (checked against scipy softmax in test_certified.py) for >= 99% of queries.
    # The states blend the rows of one cluster, so "states close" is not only "top-1 equal".
    x, q, rows = separated
    mem = DenseMemory.from_array(x)
    used = mem.build_index(kind, **params)
    assert used["kind"] == kind and all(used[key] == val for key, val in params.items())
    res = mem.retrieve(q, beta, method="index", n_candidates=64, return_energy=False)
    cert = mem.retrieve(q, beta, method="certified", return_energy=False)
    assert res.method == "index" and res.mass_bound is None and res.candidate_recall is None
    assert np.all(res.k_used == 64)
    assert np.mean(cert.top_weights[:, 0] < 0.99) > 0.3  # real blends, not one-hot states
    same_top = res.top_ids[:, 0] == cert.top_ids[:, 0]
    close = np.linalg.norm(res.states - cert.states, axis=1) <= 1e-5
    assert np.mean(same_top & close) >= 0.99, (np.mean(same_top), np.mean(close))
    # Reference: scipy.special.softmax in float64 over all rows, for the agreeing queries.
    p = softmax(beta * q.astype(np.float64) @ x.astype(np.float64).T, axis=1)
    ok = same_top & close
    np.testing.assert_allclose(res.states[ok], (p @ x.astype(np.float64))[ok], rtol=0, atol=2e-5)


def test_index_parameters_reach_faiss(separated) -> None:
    # Reference: faiss's own attributes (IndexHNSWFlat.hnsw.efSearch / efConstruction,
    # IndexIVFFlat.nlist / nprobe) on the index the memory hands to the store seam.
    x, _, _ = separated
    mem = DenseMemory.from_array(x[:1500])
    mem.build_index("hnsw", M=12, ef_construction=50, ef_search=77)
    meta, index = mem._index_payload()
    assert isinstance(index, faiss.IndexHNSWFlat) and index.ntotal == 1500
    assert index.hnsw.efSearch == 77 and index.hnsw.efConstruction == 50
    assert index.metric_type == faiss.METRIC_INNER_PRODUCT
    assert meta["n_rows"] == 1500 and meta["settings"]["M"] == 12
    mem.build_index("ivf", nlist=20, nprobe=7)
    meta, index = mem._index_payload()
    assert faiss.extract_index_ivf(index).nlist == 20 and index.nprobe == 7
    assert index.metric_type == faiss.METRIC_INNER_PRODUCT and index.ntotal == 1500


# -------------------------------------------------------------------- candidate recall
@pytest.mark.parametrize(
    "kind, params",
    [
        ("hnsw", {"M": 4, "ef_construction": 16, "ef_search": 8}),  # deliberately poor
        ("ivf", {"nlist": 40, "nprobe": 2}),  # deliberately poor
        ("hnsw", {"ef_search": 512}),  # generous
    ],
)
def test_candidate_recall_matches_faiss(separated, kind: str, params: dict) -> None:
    # Reference: faiss IndexFlatIP exact top-kc intersected with the index's own
    # faiss search (the payload index), kc = max(n_candidates, k). 120 queries <= the default
    # sample of 256, so every query is measured.
    x, _, _ = separated
    rng = np.random.default_rng(3)
    q = _unit(rng.standard_normal((120, x.shape[1])))  # random queries: hard for an ANN index
    mem = DenseMemory.from_array(x)
    mem.build_index(kind, **params)
    res = mem.retrieve(q, 10.0, method="index", k=10, n_candidates=20, measure=True, return_energy=False)
    _, exact = flat_ip_search(x, q, 20)
    _, index = mem._index_payload()
    _, found = index.search(q, 20)
    want = recall_of(found, exact)
    assert res.candidate_recall == pytest.approx(want, abs=1e-12)
    if "M" in params or "nprobe" in params:
        assert res.candidate_recall < 0.99  # the poor index really misses candidates
    else:
        assert res.candidate_recall >= 0.99
    # An explicit sample size covering every query measures the same thing.
    res2 = mem.retrieve(q, 10.0, method="index", k=10, n_candidates=20, measure=500, return_energy=False)
    assert res2.candidate_recall == pytest.approx(want, abs=1e-12)


def test_measure_must_be_positive(separated) -> None:
    x, q, _ = separated
    mem = DenseMemory.from_array(x[:500])
    mem.build_index("hnsw", M=8)
    with pytest.raises(InputValueError, match=r"DenseMemory.retrieve: `measure` must be an integer >= 1; got -2\."):
        mem.retrieve(q[:3], method="index", measure=-2)


# ------------------------------------------------------------------------------ sync
def test_add_after_build_keeps_the_index_in_step() -> None:
    # A new pattern must be found by the index (faiss index.add appends, positions follow).
    # Reference: faiss IndexFlatIP top-1 over the grown store.
    rng = np.random.default_rng(8)
    x = _unit(rng.standard_normal((1000, 32)))
    mem = DenseMemory.from_array(x)
    mem.build_index("hnsw", ef_search=128)
    new = _unit(rng.standard_normal((3, 32)))
    mem.add(new, ids=[5000, 5001, 5002])
    q = noisy_unit_copies(rng, new, np.arange(3), np.full(3, 0.9))
    with warnings.catch_warnings():
        warnings.simplefilter("error", DenseMemWarning)  # no rebuild for an append
        res = mem.retrieve(q, 40.0, method="index", return_energy=False)
        near = mem.nearest(q, k=1, index=True)
    _, top1 = flat_ip_search(np.vstack([x, new]), q, 1)
    np.testing.assert_array_equal(top1[:, 0], [1000, 1001, 1002])
    np.testing.assert_array_equal(res.top_ids[:, 0], [5000, 5001, 5002])
    np.testing.assert_array_equal(near.ids[:, 0], [5000, 5001, 5002])
    meta, index = mem._index_payload()
    assert meta["n_rows"] == index.ntotal == 1003


def test_remove_makes_the_next_use_rebuild_with_a_warning() -> None:
    # After remove() positions shift; the next index use must rebuild (DenseMemWarning) and then
    # answer like an index built from scratch on the remaining rows. References: faiss
    # IndexFlatIP top-1, and a fresh memory + build_index with the same settings (one faiss
    # thread, so both HNSW graphs are built identically).
    rng = np.random.default_rng(9)
    x = _unit(rng.standard_normal((1000, 32)))
    mem = DenseMemory.from_array(x)
    mem.build_index("hnsw", ef_search=128)
    gone = np.arange(0, 1000, 7)
    assert mem.remove(gone) == gone.size
    assert mem._index_payload() is None  # documented: None for a stale index
    keep = np.setdiff1d(np.arange(1000), gone)
    q = noisy_unit_copies(rng, x, np.array([0, 7, 1, 2, 3]), np.full(5, 0.9))
    with one_faiss_thread():
        with pytest.warns(
            DenseMemWarning,
            match=r"DenseMemory.retrieve: patterns were removed since the index was built; "
            r"rebuilding it \(hnsw\) with the same settings\.",
        ):
            res = mem.retrieve(q, 40.0, method="index", return_energy=False)
        fresh = DenseMemory.from_array(x[keep], ids=keep)
        fresh.build_index("hnsw", ef_search=128)
    assert not np.isin(res.top_ids, gone).any()
    _, top1 = flat_ip_search(x[keep], q, 1)
    np.testing.assert_array_equal(res.top_ids[:, 0], keep[top1[:, 0]])
    want = fresh.retrieve(q, 40.0, method="index", return_energy=False)
    np.testing.assert_array_equal(res.top_ids, want.top_ids)
    np.testing.assert_allclose(res.states, want.states, rtol=0, atol=1e-6)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DenseMemWarning)  # rebuilt once, not on every call
        mem.retrieve(q, 40.0, method="index", return_energy=False)
    meta, index = mem._index_payload()
    assert meta["n_rows"] == index.ntotal == keep.size
    assert meta["settings"]["ef_search"] == 128  # same settings after the rebuild


def test_remove_then_add_then_nearest_rebuilds_and_finds_the_new_row() -> None:
    # remove() leaves the index stale, so a later add() must not append to it; nearest(index=True)
    # rebuilds (warning names nearest) and finds the new row. Reference: faiss IndexFlatIP.
    rng = np.random.default_rng(10)
    x = _unit(rng.standard_normal((800, 16)))
    mem = DenseMemory.from_array(x)
    mem.build_index("ivf", nlist=16, nprobe=16)
    mem.remove([3, 4, 5])
    new = _unit(rng.standard_normal((1, 16)))
    mem.add(new, ids=[9999])
    q = noisy_unit_copies(rng, new, np.array([0]), np.array([0.95]))
    with pytest.warns(DenseMemWarning, match=r"DenseMemory.nearest: patterns were removed since the index was built"):
        near = mem.nearest(q, k=3, index=True)
    exact = mem.nearest(q, k=3)  # faiss brute force (faiss.knn)
    assert near.ids[0, 0] == 9999
    np.testing.assert_array_equal(near.ids, exact.ids)  # nprobe = nlist: exhaustive


# ----------------------------------------------------- nearest(index=True) is faiss itself
def test_nearest_index_equals_faiss_hnsw_with_same_parameters(separated) -> None:
    # Reference: faiss IndexHNSWFlat(d, M, METRIC_INNER_PRODUCT) with the same efConstruction and
    # efSearch, built in the same process (one thread, so both graphs are built identically).
    x, _, _ = separated
    rng = np.random.default_rng(4)
    q = _unit(rng.standard_normal((100, x.shape[1])))
    mem = DenseMemory.from_array(x[:3000])
    with one_faiss_thread():
        mem.build_index("hnsw", M=16, ef_construction=40, ef_search=24)
        own = faiss.IndexHNSWFlat(x.shape[1], 16, faiss.METRIC_INNER_PRODUCT)
        own.hnsw.efConstruction = 40
        own.add(np.ascontiguousarray(x[:3000]))
    own.hnsw.efSearch = 24
    scores, pos = own.search(q, 10)
    near = mem.nearest(q, k=10, index=True)
    np.testing.assert_array_equal(near.ids, pos)
    np.testing.assert_allclose(near.scores, scores, rtol=1e-6, atol=1e-6)
    _, exact = flat_ip_search(x[:3000], q, 10)
    assert recall_of(pos, exact) < 1.0  # the index really is approximate here


def test_nearest_index_equals_faiss_ivf_with_same_parameters(separated) -> None:
    # Reference: faiss IndexIVFFlat over an IndexFlatIP quantizer, k-means seed 0, trained on the
    # same rows (N = 1200 <= 64 nlist, so the memory trains on every row), same nprobe.
    x, _, _ = separated
    rng = np.random.default_rng(6)
    q = _unit(rng.standard_normal((100, x.shape[1])))
    xs = np.ascontiguousarray(x[:1200])
    mem = DenseMemory.from_array(xs)
    mem.build_index("ivf", nlist=24, nprobe=3, seed=0)
    quantizer = faiss.IndexFlatIP(x.shape[1])
    own = faiss.IndexIVFFlat(quantizer, x.shape[1], 24, faiss.METRIC_INNER_PRODUCT)
    own.cp.seed = 0
    own.train(xs)
    own.add(xs)
    own.nprobe = 3
    scores, pos = own.search(q, 10)
    near = mem.nearest(q, k=10, index=True)
    found = pos >= 0
    np.testing.assert_array_equal(near.ids[found], pos[found])
    np.testing.assert_allclose(near.scores[found], scores[found], rtol=1e-6, atol=1e-6)


# ----------------------------------------------------------------- missing candidates
def _starved_ivf(ids=None) -> tuple[DenseMemory, np.ndarray, np.ndarray]:
    """IVF with nprobe=1 over many small lists: some queries get fewer than 30 results.

    Returns the memory, the queries and faiss's own positions (payload index, k=30)."""
    rng = np.random.default_rng(12)
    x = _unit(rng.standard_normal((600, 16)))
    q = _unit(rng.standard_normal((40, 16)))
    mem = DenseMemory.from_array(x, ids=ids)
    mem.build_index("ivf", nlist=60, nprobe=1)
    _, index = mem._index_payload()
    _, pos = index.search(q, 30)
    assert (pos < 0).any()  # faiss itself marks the missing results with -1 (common practice)
    return mem, q, pos


@pytest.mark.parametrize("kind_of_ids", ["int", "str"])
def test_index_retrieve_marks_missing_candidates(kind_of_ids: str) -> None:
    # Reference: the index's own faiss search (label -1 = missing). Documented (RetrievalResult):
    # missing entries have weight 0 and id -1 (int ids) or "" (str ids); the real ids are the
    # faiss labels, each named at most once.
    ids = None if kind_of_ids == "int" else np.array([f"item{i}" for i in range(600)])
    marker = -1 if kind_of_ids == "int" else ""
    mem, q, pos = _starved_ivf(ids)
    res = mem.retrieve(q, 10.0, method="index", k=30, n_candidates=30, return_energy=False)
    stored = mem.ids
    for i in range(len(q)):
        found = pos[i][pos[i] >= 0]
        real = res.top_ids[i][res.top_ids[i] != marker]
        assert sorted(real.tolist()) == sorted(stored[found].tolist())
        assert np.unique(real).size == real.size
        assert np.all(res.top_weights[i][res.top_ids[i] == marker] == 0.0)
        assert np.sum(res.top_ids[i] == marker) == np.sum(pos[i] < 0)
    np.testing.assert_array_equal(res.k_used, (pos >= 0).sum(axis=1))


def test_nearest_index_marks_missing_results() -> None:
    # Same reference, for nearest(index=True): faiss's labels in faiss's order, -1 where missing.
    mem, q, pos = _starved_ivf()
    near = mem.nearest(q, k=30, index=True)
    np.testing.assert_array_equal(near.ids, np.where(pos >= 0, mem.ids[np.maximum(pos, 0)], -1))


# ---------------------------------------------------------------------------- store seam
@pytest.mark.parametrize("kind, params", [("hnsw", {"M": 8, "ef_search": 12}), ("ivf", {"nlist": 16, "nprobe": 2})])
def test_payload_restores_identical_index_results(separated, kind: str, params: dict) -> None:
    # The store seam: (meta, faiss index) round-tripped through faiss.serialize_index /
    # deserialize_index (faiss's own persistence) into a fresh memory with the same rows gives
    # the same index results. Deliberately poor parameters, so a default index would differ.
    x, q, _ = separated
    rng = np.random.default_rng(5)
    qr = _unit(rng.standard_normal((60, x.shape[1])))
    mem = DenseMemory.from_array(x[:2000], ids=np.arange(2000) * 3)
    mem.build_index(kind, **params)
    assert DenseMemory.from_array(x[:10])._index_payload() is None  # no index: None
    meta, index = mem._index_payload()
    assert isinstance(meta, dict) and meta["n_rows"] == 2000 and meta["settings"]["kind"] == kind
    restored_index = faiss.deserialize_index(faiss.serialize_index(index))
    fresh = DenseMemory.from_array(x[:2000], ids=np.arange(2000) * 3)
    fresh._restore_index(dict(meta), restored_index)
    for queries in (q[:60], qr):
        a = mem.retrieve(queries, 20.0, method="index", return_energy=False)
        b = fresh.retrieve(queries, 20.0, method="index", return_energy=False)
        np.testing.assert_array_equal(a.top_ids, b.top_ids)
        np.testing.assert_array_equal(a.states, b.states)
        np.testing.assert_array_equal(mem.nearest(queries, index=True).ids, fresh.nearest(queries, index=True).ids)
    # The poor index really differs from exact search on the random queries (faiss IndexFlatIP),
    # so identical results show the restored settings were used.
    _, exact = flat_ip_search(x[:2000], qr, 10)
    assert recall_of(fresh.nearest(qr, index=True).ids // 3, exact) < 1.0


def test_restore_with_a_row_count_mismatch_raises(separated) -> None:
    x, _, _ = separated
    mem = DenseMemory.from_array(x[:500])
    mem.build_index("hnsw", M=8)
    meta, index = mem._index_payload()
    fewer = DenseMemory.from_array(x[:499])
    with pytest.raises(IndexStaleError, match=r"the stored index covers 500 rows but the store holds 499\."):
        fewer._restore_index(meta, index)


# -------------------------------------------------------------------------------- errors
@pytest.fixture
def mem8() -> DenseMemory:
    return DenseMemory.from_array(np.eye(8, dtype=np.float32), beta=10.0)


def test_index_method_without_build_index(mem8: DenseMemory) -> None:
    with pytest.raises(
        InputValueError,
        match=r"DenseMemory.retrieve: no candidate index; call build_index\('hnsw'\) or build_index\('ivf'\) first\.",
    ):
        mem8.retrieve(np.eye(8)[:2], method="index")


def test_nearest_index_without_build_index(mem8: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=r"DenseMemory.nearest: no candidate index; call build_index"):
        mem8.nearest(np.eye(8)[:2], index=True)


def test_nearest_index_is_inner_product_only(mem8: DenseMemory) -> None:
    mem8.build_index("hnsw", M=4)
    with pytest.raises(InputValueError, match=r"DenseMemory.nearest: the candidate index ranks by inner product; use metric='ip'\."):
        mem8.nearest(np.eye(8)[:2], index=True, metric="l2")


@pytest.mark.parametrize("kind", ["flat", "HNSW", "", None])
def test_build_index_unknown_kind(mem8: DenseMemory, kind) -> None:
    with pytest.raises(InputValueError, match=rf"DenseMemory.build_index: `kind` must be 'hnsw' or 'ivf'; got {kind!r}\."):
        mem8.build_index(kind)


def test_build_index_unknown_option(mem8: DenseMemory) -> None:
    with pytest.raises(
        InputValueError,
        match=r"DenseMemory.build_index: unknown hnsw option\(s\) \['efSearch'\]; use \['M', 'ef_construction', "
        r"'ef_search', 'seed'\]\.",
    ):
        mem8.build_index("hnsw", efSearch=100)


def test_build_index_nprobe_above_nlist(mem8: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=r"DenseMemory.build_index: `nprobe` \(5\) must be at most `nlist` \(2\)\."):
        mem8.build_index("ivf", nlist=2, nprobe=5)


@pytest.mark.parametrize("name", ["M", "ef_construction", "ef_search", "nlist", "nprobe"])
def test_build_index_options_must_be_positive_integers(mem8: DenseMemory, name: str) -> None:
    kind = "ivf" if name in ("nlist", "nprobe") else "hnsw"
    least = 2 if name == "M" else 1  # HNSW M = 1 crashes faiss's graph build
    with pytest.raises(InputValueError, match=rf"DenseMemory.build_index: `{name}` must be an integer >= {least}; got 0\."):
        mem8.build_index(kind, **{name: 0})
    with pytest.raises(InputTypeError, match=rf"DenseMemory.build_index: `{name}` must be an integer >= {least}; got"):
        mem8.build_index(kind, **{name: 2.5})


def test_build_index_nlist_above_row_count(mem8: DenseMemory) -> None:
    # k-means needs at least nlist training rows (faiss Clustering); asking for more lists than
    # stored rows must be refused at the public boundary with a message naming `nlist`.
    with pytest.raises(InputValueError, match=r"DenseMemory.build_index: `nlist`"):
        mem8.build_index("ivf", nlist=20, nprobe=1)


def test_build_index_on_empty_memory() -> None:
    with pytest.raises(InputValueError, match=r"DenseMemory.build_index: the memory is empty; add patterns first\."):
        DenseMemory(4).build_index("hnsw")
