"""Near-duplicate plans on real vectors: the failures of issue 14, each kept as a regression test.

Data: scikit-learn's bundled digits (the UCI optdigits test set, 1797 x 64; E. Alpaydin and
C. Kaynak, 1998) and the same rows at a realistic embedding width, 384, by a fixed Gaussian
random projection (cosines are preserved up to a small distortion: W. B. Johnson and
J. Lindenstrauss, 1984). References: faiss IndexFlatIP.range_search (exact search) with the
library's float64 edge rule re-applied, numpy float64 cosines, scipy's connected_components,
and the digits class labels.
"""

from __future__ import annotations

import os
import stat

import faiss
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

import densemem
from densemem.duplicates import DuplicatePlan, plan_duplicates
from densemem.duplicates._attractor import _batched_fixed_points
from densemem.errors import DenseMemWarning

RULE = 1e-6  # the documented edge rule: cosine >= threshold - 1e-6


def unit64(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def faiss_pairs(x: np.ndarray, t: float) -> set[tuple[int, int]]:
    """Every pair i < j at cosine >= t - RULE: faiss exact range search a little below t,
    then the float64 rule (faiss scores in float32)."""
    u = unit64(x).astype(np.float32)
    index = faiss.IndexFlatIP(u.shape[1])
    index.add(u)
    lims, _, lab = index.range_search(u, t - 1e-4)
    q = np.repeat(np.arange(len(u)), np.diff(lims.astype(np.int64)))
    j = lab.astype(np.int64)
    u64 = unit64(x)
    ok = (q < j) & (np.einsum("ij,ij->i", u64[q], u64[j]) >= t - RULE)
    return set(zip(q[ok].tolist(), j[ok].tolist()))


def assert_drops_meet_threshold(plan: DuplicatePlan, x: np.ndarray, t: float) -> None:
    """Every dropped row meets t against the row kept for it (ids are row numbers here)."""
    u = unit64(x)
    keep, drop = set(plan.keep_ids.tolist()), plan.drop_ids
    assert keep.isdisjoint(drop.tolist()) and len(keep) + drop.size == len(x)
    assert set(plan.duplicate_of_ids.tolist()) <= keep  # the item kept for a drop is kept
    sims = np.einsum("ij,ij->i", u[drop], u[plan.duplicate_of_ids])  # reference: numpy float64 cosine
    if drop.size:
        assert sims.min() >= t - RULE
    np.testing.assert_allclose(plan.duplicate_similarities, sims, atol=1e-6)


@pytest.fixture(scope="module")
def digits_384():
    from sklearn.datasets import load_digits

    d = load_digits().data.astype(np.float64)
    proj = np.random.default_rng(384).standard_normal((64, 384)) / np.sqrt(384)
    return (d @ proj).astype(np.float32)


@pytest.fixture(scope="module")
def digits_labels():
    from sklearn.datasets import load_digits

    return load_digits().target


@pytest.mark.parametrize("width", [64, 384])
@pytest.mark.parametrize("t", [0.9, 0.98])
@pytest.mark.parametrize("method", ["graph", "attractor"])
def test_default_plan_drops_only_items_within_threshold_of_their_kept_item(digits, digits_384, width, t, method):
    # issue 14: graph chains at 0.9 dropped 1789 of 1797 rows; attractor at 0.98 made a group with min cos 0.726
    x = digits if width == 64 else digits_384
    plan = plan_duplicates(x, t, method=method, return_pairs=True)
    assert plan.grouping == "star"
    ref = faiss_pairs(x, t)
    assert set(map(tuple, plan.pair_ids.tolist())) == ref  # every pair above t is judged (none missed)
    assert plan.n_pairs == len(ref) > 100  # attractor too: no "n_pairs": -1
    assert_drops_meet_threshold(plan, x, t)
    assert plan.summary()["lowest_kept_similarity"] >= t - RULE


def test_chain_on_digits_reproduces_the_long_chain_and_warns(digits, digits_labels):
    t = 0.9
    ref = faiss_pairs(digits, t)
    i, j = map(np.asarray, zip(*ref))
    _, lab = connected_components(coo_matrix((np.ones(i.size), (i, j)), shape=(1797, 1797)), directed=False)
    biggest = np.bincount(lab).max()  # reference: scipy connected components of the faiss pairs
    assert biggest >= 1700  # measured: 1790 of 1797 rows, all ten digit classes
    with pytest.warns(DenseMemWarning, match=r"grouping='chain' joined items far below the threshold 0\.9: "
                                             r"1 group\(s\) hold a pair at cosine < 0\.8 .* group of 1790\)"):
        chain = plan_duplicates(digits, t, grouping="chain")
    big = max(chain.groups, key=len)
    assert len(big) == biggest and np.unique(digits_labels[big.rows]).size == 10
    assert big.min_similarity < 0.5  # reported: the chain reaches far below the threshold
    star = plan_duplicates(digits, t)
    assert max(len(g) for g in star.groups) < biggest / 5
    assert_drops_meet_threshold(star, digits, t)


def test_complete_groups_meet_threshold_for_every_pair(digits_384):
    t = 0.95
    plan = plan_duplicates(digits_384, t, grouping="complete")
    u = unit64(digits_384)
    for g in plan.groups:  # reference: numpy pairwise cosines
        assert (u[g.rows] @ u[g.rows].T).min() >= t - RULE
    assert_drops_meet_threshold(plan, digits_384, t)


def test_attractor_at_098_keeps_the_threshold_on_digits(digits):
    # issue 14: one attractor group held 152 rows with smallest pairwise cosine 0.726
    t = 0.98
    plan = plan_duplicates(digits, t, method="attractor")
    u = unit64(digits)
    for g in plan.groups:
        r = int(g.rows[np.flatnonzero(g.ids == g.representative)[0]])
        assert (u[g.rows] @ u[r]).min() >= t - RULE
    info = plan.candidate_params["attractor"]
    assert info["pairs_judged"] == plan.n_pairs and 0 < info["pairs_joined"] <= plan.n_pairs


def test_batched_update_equals_dense_memory_retrieve(digits):
    """The batched step of small components against DenseMemory.retrieve (method exact) on each one."""
    u = unit64(digits)
    t = 0.97
    beta = 2.0 / (1.0 - t)
    pairs = sorted(faiss_pairs(digits, t))[:40]
    comps = np.asarray([[a, b] for a, b in pairs])  # (g, 2) rows; pairs may share a row: separate memories
    run = {"unconverged": 0, "steps": 0}
    got = _batched_fixed_points(u[comps], beta, 200, 1e-6, run)
    for g, rows in enumerate(comps):
        mem = densemem.DenseMemory.from_array(u[rows], normalize=False, beta=beta)
        res = mem.retrieve(u[rows], beta, steps=200, tol=1e-6, method="exact")
        # float64 batched steps against float32 retrieval, both stopped at a step change below
        # tol = 1e-6: near a slowly contracting fixed point the two stop a few steps apart, so the
        # states agree to a few times tol (the compiled kernel's blocked float32 sums moved the
        # worst of the 40 pairs to 1.2e-5)
        np.testing.assert_allclose(got[g], res.states, atol=3e-5)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**16), t=st.floats(0.9, 0.995), grouping=st.sampled_from(["star", "complete"]))
def test_property_planted_copies_found_and_rule_kept(digits, seed, t, grouping):
    rng = np.random.default_rng(seed)
    base = digits[rng.choice(len(digits), 300, replace=False)].astype(np.float64)
    src = rng.integers(0, 300, 60)
    noise = rng.normal(0.0, 1.0, (60, 64))
    noise *= (np.linalg.norm(base[src], axis=1) * rng.uniform(0.0, 0.15, 60) / np.linalg.norm(noise, axis=1))[:, None]
    x = np.concatenate([base, base[src] * rng.uniform(0.5, 2.0, (60, 1)) + noise]).astype(np.float32)
    plan = plan_duplicates(x, t, grouping=grouping, return_pairs=True)
    assert set(map(tuple, plan.pair_ids.tolist())) == faiss_pairs(x, t)  # every true pair is flagged
    assert_drops_meet_threshold(plan, x, t)


@pytest.mark.parametrize("mask", [0o022, 0o077, 0o002])
def test_plan_files_follow_the_umask(tmp_path, mask):
    # issue 14: plan files were written 0600 whatever the umask (mkstemp's mode)
    old = os.umask(mask)
    try:
        files = plan_duplicates(np.eye(3), 0.9).write(tmp_path / "plan")
        ref = tmp_path / "plain.txt"  # reference: a file made by open(), which honours the umask
        ref.write_text("x")
    finally:
        os.umask(old)
    want = stat.S_IMODE(ref.stat().st_mode)
    assert want == 0o666 & ~mask
    for path in files.values():
        assert stat.S_IMODE(os.stat(path).st_mode) == want
