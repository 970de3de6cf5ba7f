"""Tests of densemem.duplicates (near-duplicate groups) against outside references.

References used: brute-force pair computation in numpy (float64), faiss
IndexFlatIP.range_search (exact inner-product search), scipy.sparse.csgraph
connected_components, scikit-learn's bundled digits (UCI optdigits; E. Alpaydin, C. Kaynak, 1998),
and Python's csv / json modules and pyarrow for reading the plan files back.
"""

from __future__ import annotations

import csv
import hashlib
import json
import sys
from pathlib import Path

import faiss
import numpy as np
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

import densemem
from densemem.duplicates import _candidates as C
from densemem.duplicates import DedupSpec, DuplicatePlan, plan_duplicates
from densemem.errors import (
    DenseMemWarning,
    InputTypeError,
    InputValueError,
    MissingExtraError,
)

RULE = 1e-6  # the documented edge rule: cosine >= threshold - 1e-6


# ------------------------------------------------------------------ helpers
def unit64(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def brute_pairs(x: np.ndarray, t: float) -> set[tuple[int, int]]:
    """Every pair i < j with float64 cosine >= t - RULE (numpy brute force)."""
    u = unit64(x)
    sim = u @ u.T
    i, j = np.nonzero(np.triu(sim >= t - RULE, k=1))
    return set(zip(i.tolist(), j.tolist()))


def gap_threshold(x: np.ndarray, quantile: float) -> float:
    """A threshold near the given quantile of pair cosines with no pair within 5e-6 of it,
    so float32/float64 rounding cannot decide an edge."""
    u = unit64(x)
    s = np.sort((u @ u.T)[np.triu_indices(len(u), 1)])
    start = int(quantile * s.size)
    for i in range(start, s.size - 1):
        if s[i + 1] - s[i] > 1e-5:
            return float((s[i] + s[i + 1]) / 2)
    raise AssertionError("no gap found")


def plan_pairs(plan: DuplicatePlan) -> set[tuple[int, int]]:
    assert plan.pair_ids is not None
    return set(map(tuple, plan.pair_ids.tolist()))


def partition(plan: DuplicatePlan) -> set[frozenset]:
    return {frozenset(g.ids.tolist()) for g in plan.groups}


def separated_rows(x: np.ndarray, max_cos: float, seed: int) -> np.ndarray:
    """Greedy subset of rows whose pairwise cosines all stay below ``max_cos``."""
    u = unit64(x)
    kept: list[int] = []
    for i in np.random.default_rng(seed).permutation(len(u)).tolist():
        if not kept or (u[kept] @ u[i]).max() < max_cos:
            kept.append(i)
    return np.asarray(sorted(kept))


def plant(base: np.ndarray, n_fam: int, rng: np.random.Generator, noise: float) -> tuple[np.ndarray, np.ndarray]:
    """Append planted copies of the first ``n_fam`` rows: an exact copy, a scaled copy
    (a re-encoding at another norm) and a copy with small pixel noise.
    Returns the data and a family label per row (-1: not planted)."""
    rows, fam = [base], [np.full(len(base), -1)]
    fam[0][:n_fam] = np.arange(n_fam)
    for f in range(n_fam):
        src = base[f]
        kinds = [src.copy(), 2.0 * src, src + rng.normal(0.0, noise, src.shape)]
        take = kinds[: 1 + f % 3]
        rows.append(np.asarray(take))
        fam.append(np.full(len(take), f))
    return np.concatenate(rows).astype(np.float32), np.concatenate(fam)


def family_pairs(fam: np.ndarray) -> set[tuple[int, int]]:
    out = set()
    for f in np.unique(fam[fam >= 0]):
        m = np.flatnonzero(fam == f).tolist()
        out |= {(a, b) for i, a in enumerate(m) for b in m[i + 1 :]}
    return out


def digest(a: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(a).view(np.uint8)).hexdigest() + str(a.dtype) + str(a.shape)


@pytest.fixture(scope="module")
def planted_digits():
    """Well-separated digits rows (pairwise cosine < 0.96) with 60 planted families."""
    from sklearn.datasets import load_digits

    d = load_digits().data.astype(np.float64)
    base = d[separated_rows(d, 0.96, seed=1)][:500]
    return plant(base, 60, np.random.default_rng(7), noise=0.3)


# ------------------------------------------------------------------ exact edges
def test_exact_edges_equal_brute_force_on_digits(digits, digits_unit):
    t = gap_threshold(digits, 0.995)
    with pytest.warns(DenseMemWarning, match=r"grouping='chain' joined items far below"):
        plan = plan_duplicates(digits, t, candidates="exact", grouping="chain", return_pairs=True)
    ref = brute_pairs(digits, t)  # reference: numpy brute force, float64
    assert len(ref) > 1000
    assert plan_pairs(plan) == ref
    # reference: faiss IndexFlatIP.range_search (keeps inner products > radius)
    lims, _, lab = _faiss_range(digits_unit, t)
    q = np.repeat(np.arange(len(digits_unit)), np.diff(lims.astype(np.int64)))
    faiss_pairs = {(a, b) for a, b in zip(q.tolist(), lab.tolist()) if a < b}
    assert plan_pairs(plan) == faiss_pairs
    # reference: scipy connected_components of the brute-force graph gives the same chain groups
    i, j = map(np.asarray, zip(*ref))
    _, lab_cc = connected_components(coo_matrix((np.ones(i.size), (i, j)), shape=(1797, 1797)), directed=False)
    ref_groups = {frozenset(np.flatnonzero(lab_cc == c).tolist()) for c in np.unique(lab_cc)}
    assert partition(plan) == {g for g in ref_groups if len(g) > 1}


def _faiss_range(xu: np.ndarray, t: float):
    index = faiss.IndexFlatIP(xu.shape[1])
    index.add(np.ascontiguousarray(xu, dtype=np.float32))
    return index.range_search(np.ascontiguousarray(xu, dtype=np.float32), t)


def test_exact_edges_equal_brute_force_on_random_data(rng):
    x = rng.standard_normal((600, 8)).astype(np.float32)
    t = gap_threshold(x, 0.995)
    plan = plan_duplicates(x, t, candidates="exact", return_pairs=True, tile_mib=0.1)  # many small chunks
    assert plan_pairs(plan) == brute_pairs(x, t)  # reference: numpy brute force
    u = unit64(x)  # reference: numpy cosine of each reported pair
    sims = np.einsum("ij,ij->i", u[plan.pair_ids[:, 0]], u[plan.pair_ids[:, 1]])
    np.testing.assert_allclose(plan.pair_similarities, sims, atol=1e-6)


def test_threshold_one_finds_exact_copies_only(digits):
    x = np.concatenate([digits[:50], digits[:10], 3.0 * digits[10:20]])
    plan = plan_duplicates(x, 1.0, return_pairs=True)
    # derived: copies and positive multiples have cosine exactly 1; distinct digits rows do not
    assert brute_pairs(x[:50], 1.0) == set()
    assert partition(plan) == {frozenset({i, 50 + i}) for i in range(20)}


# ------------------------------------------------------------------ planted duplicates
@pytest.mark.parametrize("candidates", ["exact", "ivf", "join", "hnsw"])
def test_planted_digits_precision_recall(planted_digits, candidates):
    x, fam = planted_digits
    t = 0.98
    truth = family_pairs(fam)
    u = unit64(x)
    sim = u @ u.T
    inside = np.array([sim[a, b] for a, b in truth])
    mask = np.triu(np.ones_like(sim, dtype=bool), 1)
    for a, b in truth:
        mask[a, b] = False
    assert inside.min() > t + 0.005 and sim[mask].max() < t - 0.01  # the threshold separates them
    plan = plan_duplicates(x, t, candidates=candidates, return_pairs=True, seed=3)
    found = plan_pairs(plan)
    precision = len(found & truth) / len(found)
    recall = len(found & truth) / len(truth)
    assert precision >= 0.99 and recall >= 0.99  # issue 6 target on planted copies of UCI digits
    assert plan.candidates == candidates
    expected = {frozenset(np.flatnonzero(fam == f).tolist()) for f in np.unique(fam[fam >= 0])}
    assert partition(plan) == expected


def test_ivf_pairs_against_faiss_flat_on_clustered_data(rng):
    centres = rng.standard_normal((40, 32))
    x = centres[rng.integers(0, 40, 6000)] + 0.8 * rng.standard_normal((6000, 32)) / np.sqrt(32) * np.linalg.norm(
        centres, axis=1
    ).mean()
    src = rng.integers(0, 6000, 600)
    x = np.concatenate([x, x[src] + 0.02 * rng.standard_normal((600, 32))]).astype(np.float32)
    t = 0.99
    plan = plan_duplicates(x, t, candidates="ivf", return_pairs=True, check_sample=500)
    u = unit64(x).astype(np.float32)
    lims, _, lab = _faiss_range(u, t - 1e-4)  # reference: faiss exact range search + float64 rule
    q = np.repeat(np.arange(len(u)), np.diff(lims.astype(np.int64)))
    u64 = unit64(x)
    ok = (q < lab) & (np.einsum("ij,ij->i", u64[q], u64[lab]) >= t - RULE)
    exact = set(zip(q[ok].tolist(), lab[ok].tolist()))
    found = plan_pairs(plan)
    assert len(exact) > 300
    assert found <= exact  # every reported pair is re-scored: no false edges
    assert len(found & exact) / len(exact) >= 0.995
    p = plan.candidate_params
    assert p["nprobe"] >= 1 and p["nlist"] >= 1 and 0.99 <= p["sample_pair_recall"] <= 1.0


def _faiss_exact_pairs(x: np.ndarray, t: float) -> set[tuple[int, int]]:
    """Pairs i < j by faiss IndexFlatIP.range_search (exact) at a radius below t, then the float64 rule."""
    u = unit64(x).astype(np.float32)
    lims, _, lab = _faiss_range(u, t - 1e-4)  # reference: faiss exact range search
    q = np.repeat(np.arange(len(u)), np.diff(lims.astype(np.int64)))
    u64 = unit64(x)
    ok = (q < lab) & (np.einsum("ij,ij->i", u64[q], u64[lab]) >= t - RULE)
    return set(zip(q[ok].tolist(), lab[ok].tolist()))


def test_join_with_every_list_probed_finds_every_faiss_exact_pair_on_digits(digits):
    t = gap_threshold(digits, 0.995)
    exact = _faiss_exact_pairs(digits, t)  # reference: faiss IndexFlatIP.range_search + float64 rule
    assert len(exact) > 1000
    # every list probed: the join is then a complete (blocked) brute force; small tiles cross list edges
    with pytest.warns(DenseMemWarning):
        plan = plan_duplicates(digits, t, candidates="join", grouping="chain", nlist=16, nprobe=16,
                               check_sample=0, tile_mib=0.01, return_pairs=True)
    assert plan.candidates == "join"
    assert plan_pairs(plan) == exact
    assert plan.n_pairs == len(exact)  # each unordered pair produced once


def test_join_tuned_on_digits_finds_the_faiss_exact_pairs_it_promises(digits):
    t = gap_threshold(digits, 0.995)
    exact = _faiss_exact_pairs(digits, t)  # reference: faiss IndexFlatIP.range_search + float64 rule
    with pytest.warns(DenseMemWarning):
        plan = plan_duplicates(digits, t, candidates="join", grouping="chain", check_sample=400,
                               return_pairs=True, seed=2)
    found = plan_pairs(plan)
    p = plan.candidate_params
    assert found <= exact and plan.n_pairs == len(found)  # re-scored, each pair once
    assert p["nprobe_tuning"][-1]["one_sided_recall"] >= 0.995 or p["nprobe"] == min(32, p["nlist"])
    assert p["sample_pair_recall"] >= 0.995
    assert len(found) / len(exact) >= 0.99  # the sample's recall holds on all of digits


def test_join_finds_every_planted_copy_faiss_finds(rng):
    centres = rng.standard_normal((40, 32))
    x = centres[rng.integers(0, 40, 6000)] + 0.8 * rng.standard_normal((6000, 32)) / np.sqrt(32) * np.linalg.norm(
        centres, axis=1
    ).mean()
    src = rng.integers(0, 6000, 600)
    x = np.concatenate([x, x[src] + 0.02 * rng.standard_normal((600, 32)), x[src[:100]]]).astype(np.float32)
    t = 0.99
    exact = _faiss_exact_pairs(x, t)  # reference: faiss IndexFlatIP.range_search + float64 rule
    assert len(exact) > 700
    full = plan_duplicates(x, t, candidates="join", nlist=8, nprobe=8, check_sample=0, return_pairs=True)
    assert plan_pairs(full) == exact and full.n_pairs == len(exact)
    one = C.join_pairs(unit64(x).astype(np.float32), t, nlist=64, nprobe=3, chunk=1024, tile_mib=0.05,
                       rng=np.random.default_rng(0), n_threads=1)
    two = C.join_pairs(unit64(x).astype(np.float32), t, nlist=64, nprobe=3, chunk=1024, tile_mib=0.05,
                       rng=np.random.default_rng(0), n_threads=2)
    assert np.array_equal(np.sort(one.lo * len(x) + one.hi), np.sort(two.lo * len(x) + two.hi))
    tuned = plan_duplicates(x, t, candidates="join", return_pairs=True, check_sample=500)
    found = plan_pairs(tuned)
    assert found <= exact and len(found & exact) / len(exact) >= 0.995
    assert tuned.candidate_params["nprobe"] >= C.JOIN_MIN_PROBES


# ------------------------------------------------------------------ chaining
def bridged_families(digits: np.ndarray, t: float, n_pairs: int = 8):
    """Pairs of digits rows (a, b) at cosine in [0.94, 0.955] (below t), each with a family of
    copies, joined by a bridge item at the normalized midpoint (within t of both)."""
    u = unit64(digits)
    sim = u @ u.T
    rng = np.random.default_rng(5)
    used: list[int] = []
    rows, fam = [], []
    cand = np.argwhere((sim > 0.94) & (sim < 0.955))
    made = 0
    for a, b in cand[rng.permutation(len(cand))].tolist():
        if made >= n_pairs:
            break
        if used and (sim[[a, b]][:, used].max() > 0.9):
            continue
        bridge = u[a] + u[b]
        bridge /= np.linalg.norm(bridge)
        if min(bridge @ u[a], bridge @ u[b]) < t + 0.002:
            continue
        rows += [u[a], 2.0 * u[a], u[b], 3.0 * u[b], bridge]
        fam += [2 * made, 2 * made, 2 * made + 1, 2 * made + 1, -1]
        used += [a, b]
        made += 1
    return np.asarray(rows, dtype=np.float32), np.asarray(fam)


def mixes(plan: DuplicatePlan, fam: np.ndarray) -> int:
    return sum(len({int(fam[r]) for r in g.rows if fam[r] >= 0}) > 1 for g in plan.groups)


def test_star_and_complete_keep_planted_families_apart(digits):
    t = 0.98
    x, fam = bridged_families(digits, t)
    assert (fam == -1).sum() >= 4
    with pytest.warns(DenseMemWarning, match=r"grouping='chain' joined items far below the threshold"):
        loose = plan_duplicates(x, t, grouping="chain")  # single linkage chains each pair of families
    assert mixes(loose, fam) == (fam == -1).sum()
    u = unit64(x)  # reference: numpy pairwise cosines within each group
    for mode in ("star", "complete"):
        tight = plan_duplicates(x, t, grouping=mode)
        assert tight.grouping == mode
        for g in tight.groups:
            s = u[g.rows] @ u[g.rows].T
            r = digits_row(g)
            assert (u[g.rows] @ u[r]).min() >= t - RULE  # every member meets t against the kept one
            if mode == "complete":
                assert s.min() >= t - RULE
            assert g.min_similarity == pytest.approx(s.min(), abs=1e-6)
        assert mixes(tight, fam) <= (0 if mode == "complete" else (fam == -1).sum())
    assert plan_duplicates(x, t).grouping == "star"  # the default


def test_star_is_the_default_and_every_member_meets_its_representative(digits):
    t = 0.97
    plan = plan_duplicates(digits, t)
    with pytest.warns(DenseMemWarning, match=r"lowest 0\.7\d+, in a group of"):
        loose = plan_duplicates(digits, t, grouping="chain")
    u = unit64(digits)
    for g in plan.groups:  # reference: numpy cosine to the representative
        r = u[digits_row(g)]
        assert (u[g.rows] @ r).min() >= t - RULE
    assert loose.min_similarity.min() < t  # chained members fall below t
    assert plan.n_groups >= loose.n_groups


def digits_row(g) -> int:
    return int(g.rows[np.flatnonzero(g.ids == g.representative)[0]])


# ------------------------------------------------------------------ attractor
def test_attractor_agrees_with_graph_on_separated_families(digits):
    base = digits[separated_rows(digits, 0.88, seed=2)].astype(np.float64)
    x, fam = plant(base, 40, np.random.default_rng(11), noise=0.2)
    t = 0.97
    graph = plan_duplicates(x, t)
    attr = plan_duplicates(x, t, method="attractor")
    assert attr.method == "attractor" and attr.n_pairs == graph.n_pairs
    assert attr.candidate_params["attractor"]["beta"] == pytest.approx(2.0 / (1.0 - t))  # derived in _attractor
    assert partition(attr) == partition(graph)
    assert partition(graph) == {frozenset(np.flatnonzero(fam == f).tolist()) for f in range(40)}


def test_attractor_states_are_dense_memory_fixed_points(digits):
    """The attractor grouping reuses DenseMemory.retrieve: a planted pair's final state is the
    blend of its members (metastable states average a subset of
    patterns: Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021, section 2)."""
    base = digits[separated_rows(digits, 0.88, seed=2)][:30].astype(np.float64)
    x = np.concatenate([base, base[:1] + np.random.default_rng(0).normal(0, 0.2, (1, 64))]).astype(np.float32)
    t = 0.97
    plan = plan_duplicates(x, t, method="attractor")
    assert partition(plan) == {frozenset({0, 30})}
    mem = densemem.DenseMemory.from_array(unit64(x), beta=2.0 / (1.0 - t))
    res = mem.retrieve(unit64(x)[[0, 30]], steps=300, tol=1e-7, k=2)
    np.testing.assert_allclose(res.states[0], res.states[1], atol=1e-3)
    mid = unit64(x)[[0, 30]].mean(axis=0)
    assert np.linalg.norm(res.states[0] - mid) < 0.05 * np.linalg.norm(unit64(x)[0] - unit64(x)[30]) + 1e-3


# ------------------------------------------------------------------ representatives and plan
def test_representatives_and_stats(planted_digits):
    x, _ = planted_digits
    u = unit64(x)
    score = np.random.default_rng(0).random(len(x))
    for rule in ("medoid", "first", score):
        plan = plan_duplicates(x, 0.98, representative=rule)
        for g in plan.groups:
            s = u[g.rows] @ u[g.rows].T  # reference: numpy pairwise cosines
            off = s[~np.eye(len(g), dtype=bool)]
            assert g.min_similarity == pytest.approx(off.min(), abs=1e-6)
            assert g.mean_similarity == pytest.approx(off.mean(), abs=1e-6)
            rep = digits_row(g)
            if isinstance(rule, np.ndarray):
                assert score[rep] == score[g.rows].max()
            elif rule == "first":
                assert rep == g.rows.min()
            else:  # medoid: largest summed cosine to the others (common practice)
                summed = s.sum(axis=1) - np.diag(s)
                assert summed[list(g.rows).index(rep)] == pytest.approx(summed.max(), abs=1e-6)
        keep, drop = set(plan.keep_ids.tolist()), set(plan.drop_ids.tolist())
        assert keep.isdisjoint(drop) and keep | drop == set(range(len(x)))
        assert drop == set(plan.member_ids.tolist()) - set(plan.representative_ids.tolist())


def test_memory_input_uses_its_ids(planted_digits):
    x, _ = planted_digits
    names = [f"doc{i}" for i in range(len(x))]
    mem = densemem.DenseMemory.from_array(x, ids=names)
    before = digest(mem.patterns), digest(mem.ids)
    plan = plan_duplicates(mem, 0.98)
    ref = plan_duplicates(x, 0.98)
    assert {frozenset(f"doc{i}" for i in g) for g in partition(ref)} == partition(plan)
    assert (digest(mem.patterns), digest(mem.ids)) == before


def test_inputs_and_files_unchanged_and_plan_files_parse(planted_digits, tmp_path):
    x, _ = planted_digits
    src = tmp_path / "emb.npy"
    np.save(src, x)
    file_hash = hashlib.sha256(src.read_bytes()).hexdigest()
    arr = np.load(src, mmap_mode="r")
    own = x.copy()
    own_hash = digest(own)
    plan = plan_duplicates(arr, 0.98, return_pairs=True)
    plan_duplicates(own, 0.98, method="graph", grouping="complete")
    paths = plan.write(tmp_path)
    assert hashlib.sha256(src.read_bytes()).hexdigest() == file_hash  # sha256 before/after
    assert digest(own) == own_hash
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["emb.npy", "groups.csv", "groups.json", "groups.parquet", "keep.txt", "drop.txt"]
    )  # no temp files left behind
    with open(paths["groups_csv"], newline="") as fh:  # reference: Python's csv module
        rows = list(csv.DictReader(fh))
    assert len(rows) == plan.member_ids.size
    assert [int(r["id"]) for r in rows] == plan.member_ids.tolist()
    assert sum(r["kept"] == "True" for r in rows) == plan.n_groups
    assert all(r["stored"] == "False" for r in rows)
    kept_for = dict(zip(plan.drop_ids.tolist(), plan.duplicate_of_ids.tolist()))
    assert all(int(r["representative_id"]) == kept_for[int(r["id"])] for r in rows if r["kept"] == "False")
    doc = json.loads(Path(paths["groups_json"]).read_text())  # reference: json module
    assert doc["summary"]["n_groups"] == plan.n_groups
    assert [g["ids"] for g in doc["groups"]] == [g.ids.tolist() for g in plan.groups]
    import pyarrow.parquet as pq  # reference: pyarrow's parquet reader

    table = pq.read_table(paths["groups_parquet"])
    assert table.column("id").to_pylist() == plan.member_ids.tolist()
    assert Path(paths["keep"]).read_text().split() == [str(v) for v in plan.keep_ids.tolist()]
    assert Path(paths["drop"]).read_text().split() == [str(v) for v in plan.drop_ids.tolist()]
    with pytest.raises(InputValueError, match=r"DuplicatePlan.write: .*groups.csv' already exists; pass overwrite=True"):
        plan.write(tmp_path)
    plan.write(tmp_path, overwrite=True)
    assert json.loads(json.dumps(plan.to_dict()))["n_items"] == len(x)  # to_dict is JSON-ready


def test_zero_vectors_are_listed_excluded_and_kept():
    x = np.array([[1.0, 0.0], [0.0, 0.0], [1.0, 1e-4], [0.0, 0.0], [0.0, 1.0]], dtype=np.float32)
    with pytest.warns(DenseMemWarning, match=r"2 zero vector\(s\) .*\(ids 1, 3\)"):
        plan = plan_duplicates(x, 0.99)
    assert plan.excluded_zero_ids.tolist() == [1, 3]
    assert partition(plan) == {frozenset({0, 2})}  # derived: cos = 1/sqrt(1 + 1e-8)
    assert plan.keep_ids.tolist() == [0, 1, 3, 4]


def test_progress_bar_on_stderr(capsys):
    x = np.eye(4, dtype=np.float32)
    plan_duplicates(x, 0.9, progress=True)
    assert "dedup" in capsys.readouterr().err
    plan_duplicates(x, 0.9, progress=False)
    assert capsys.readouterr().err == ""


def test_auto_choice_is_reported():
    assert C.choose_source(1797, 64, "auto")[0] == "exact"
    name, why = C.choose_source(1_000_000, 128, "auto")
    assert name == "join" and "inverted-file" in why
    plan = plan_duplicates(np.eye(3), 0.9)
    assert plan.candidates == "exact" and "brute force" in plan.candidate_params["chosen_because"]


def test_spec_round_trip(planted_digits):
    x, _ = planted_digits
    spec = DedupSpec.model_validate_json('{"threshold": 0.98, "grouping": "complete"}')
    assert partition(spec.run(x)) == partition(plan_duplicates(x, 0.98, grouping="complete"))
    score = np.arange(len(x), dtype=float)
    q = DedupSpec(representative="quality").run(x, quality=score)
    assert q.representative_rule == "quality"


# ------------------------------------------------------------------ bad input
X3 = np.array([[1.0, 0.0], [1.0, 0.0], [0.0, 1.0]], dtype=np.float32)


@pytest.mark.parametrize(
    "kwargs, exc, match",
    [
        ({"threshold": 1.5}, InputValueError, r"`threshold` must be a cosine similarity in \(-1, 1\]; got 1.5"),
        ({"threshold": -1.0}, InputValueError, r"`threshold` must be .* got -1.0"),
        ({"threshold": float("nan")}, InputValueError, r"`threshold` must be .* got nan"),
        ({"threshold": "high"}, InputTypeError, r"`threshold` must be a real number; got str 'high'"),
        ({"method": "cluster"}, InputValueError, r"`method` must be one of 'graph', 'attractor'; got 'cluster'"),
        ({"candidates": "lsh"}, InputValueError, r"`candidates` must be one of .*; got 'lsh'"),
        ({"grouping": "maybe"}, InputValueError, r"`grouping` must be one of 'star', 'complete', 'chain'; got 'maybe'"),
        ({"retrieve_method": "fast"}, InputValueError, r"`retrieve_method` must be one of"),
        ({"representative": "best"}, InputValueError, r"`representative` must be one of 'medoid', 'first'"),
        ({"representative": None}, InputTypeError, r"`representative` must be 'medoid', 'first' or an array"),
        ({"representative": np.array(["a", "b", "c"])}, InputTypeError, r"scores must be real numbers; got dtype <U1"),
        ({"representative": np.ones(2)}, InputValueError, r"must have shape \(3,\), one per row of `data`; got shape \(2,\)"),
        ({"representative": np.array([1.0, np.nan, 0.0])}, InputValueError, r"score at row 1 is not finite"),
        ({"method": "attractor", "threshold": 1.0}, InputValueError, r"method='attractor' needs `threshold` < 1"),
        ({"target_recall": 0.0}, InputValueError, r"`target_recall` must be in \(0, 1\]; got 0.0"),
        ({"tile_mib": 0}, InputValueError, r"`tile_mib` must be a finite number > 0; got 0"),
        ({"progress": "yes"}, InputTypeError, r"`progress` must be True, False or None; got 'yes'"),
        ({"k": 0}, InputValueError, r"plan_duplicates: `k` must be an integer >= 1; got 0"),
        ({"check_sample": -1}, InputValueError, r"`check_sample` must be an integer >= 0; got -1"),
        ({"beta": -2.0}, InputValueError, r"plan_duplicates: `beta` must be a finite number > 0; got -2.0"),
        ({"ids": [1, 2]}, InputValueError, r"plan_duplicates: `ids` has 2 entries for 3 patterns"),
    ],
)
def test_bad_options(kwargs, exc, match):
    kw = {"threshold": 0.9, **kwargs}
    with pytest.raises(exc, match=match):
        plan_duplicates(X3, **kw)


@pytest.mark.parametrize(
    "data, exc, match",
    [
        (np.array([[1.0, 0.0], [np.nan, 1.0]]), InputValueError, r"`data` contains NaN at row 1; clean or drop it"),
        (np.array([[1.0, 0.0], [1.0, 0.0], [np.inf, 1.0]]), InputValueError, r"`data` contains infinity at row 2"),
        (np.empty((0, 4)), InputValueError, r"plan_duplicates: `data` is empty \(0 rows\)"),
        (np.empty((3, 0)), InputValueError, r"`data` has 0 features per row"),
        (np.ones(5), InputValueError, r"`data` must be 2-D \(n_rows, n_features\); got 1-D"),
        ("embeddings.npy", InputTypeError, r"`data` must be a numeric array; got str"),
        ([[1.0, 2.0], [3.0]], InputValueError, r"`data` must be a rectangular numeric array"),
    ],
)
def test_bad_data(data, exc, match):
    with pytest.raises(exc, match=match):
        plan_duplicates(data, 0.9)


def test_memory_with_ids_and_missing_tqdm(monkeypatch):
    mem = densemem.DenseMemory.from_array(X3)
    with pytest.raises(InputValueError, match=r"`ids` must be None when `data` is a DenseMemory"):
        plan_duplicates(mem, 0.9, ids=[0, 1, 2])
    monkeypatch.setitem(sys.modules, "tqdm", None)  # import tqdm now raises ImportError
    with pytest.raises(MissingExtraError, match=r"`progress=True` needs tqdm"):
        plan_duplicates(X3, 0.9, progress=True)


def test_plan_access_and_write_errors(tmp_path):
    plan = plan_duplicates(X3, 0.9)
    assert plan.group(0).ids.tolist() == [0, 1]
    with pytest.raises(InputValueError, match=r"DuplicatePlan.group: `g` must be in \[0, 1\); got 1"):
        plan.group(1)
    with pytest.raises(InputTypeError, match=r"DuplicatePlan.group: `g` must be an integer; got str"):
        plan.group("0")
    f = tmp_path / "file.txt"
    f.write_text("keep me")
    with pytest.raises(InputValueError, match=r"`folder` must be a folder; .*file.txt' is a file"):
        plan.write(f)
    assert f.read_text() == "keep me"


def test_rewrite_without_pyarrow_removes_the_stale_parquet(tmp_path, monkeypatch):
    # a folder written with pyarrow, rewritten (overwrite=True) without it: the old
    # groups.parquet would describe the old plan, so it goes; files of other names stay
    old = plan_duplicates(X3, 0.9)
    old.write(tmp_path)
    (tmp_path / "notes.txt").write_text("mine")
    (tmp_path / "groups.parquet.bak").write_text("mine too")
    assert (tmp_path / "groups.parquet").exists()
    monkeypatch.setitem(sys.modules, "pyarrow", None)  # `import pyarrow` now fails
    monkeypatch.setitem(sys.modules, "pyarrow.parquet", None)
    new = plan_duplicates(X3, 0.999)
    with pytest.raises(InputValueError, match=r"DuplicatePlan.write: .*groups.csv' already exists"):
        new.write(tmp_path)
    paths = new.write(tmp_path, overwrite=True)
    assert "groups_parquet" not in paths
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["groups.csv", "groups.json", "keep.txt", "drop.txt", "notes.txt", "groups.parquet.bak"])
    assert (tmp_path / "notes.txt").read_text() == "mine"
    doc = json.loads((tmp_path / "groups.json").read_text())  # reference: json module
    assert doc["summary"]["threshold"] == 0.999


def test_stale_parquet_alone_blocks_a_write_without_overwrite(tmp_path, monkeypatch):
    # an earlier plan's groups.parquet counts as a plan file even when this plan writes none
    (tmp_path / "groups.parquet").write_bytes(b"old plan")
    monkeypatch.setitem(sys.modules, "pyarrow", None)
    with pytest.raises(InputValueError, match=r"DuplicatePlan.write: .*groups.parquet' already exists; "
                                              r"pass overwrite=True"):
        plan_duplicates(X3, 0.9).write(tmp_path)
    assert (tmp_path / "groups.parquet").read_bytes() == b"old plan"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["groups.parquet"]


def test_spec_errors():
    from pydantic import ValidationError

    with pytest.raises(ValidationError, match=r"threshold\n  Input should be less than or equal to 1"):
        DedupSpec(threshold=1.5)
    with pytest.raises(ValidationError, match=r"Extra inputs are not permitted"):
        DedupSpec(treshold=0.9)
    with pytest.raises(InputValueError, match=r"DedupSpec.run: representative='quality' needs `quality` scores"):
        DedupSpec(representative="quality").run(X3)
