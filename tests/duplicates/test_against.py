"""A new batch planned against a stored memory (densemem dedup ... --stored STORE).

Data: scikit-learn's bundled digits (UCI optdigits test set; E. Alpaydin and C. Kaynak, 1998):
the first 1200 rows are stored, the rest arrive as a new batch with planted copies (noisy copies
of stored rows, scaled copies of new rows). References: faiss IndexFlatIP.range_search on the
concatenated data (exact search) with the float64 edge rule re-applied, numpy float64 cosines,
and hashlib sha256 of every input file.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import faiss
import numpy as np
import pytest

import densemem
from densemem.cli import main
from densemem.duplicates import plan_duplicates
from densemem.errors import DenseMemWarning, InputTypeError, InputValueError

RULE = 1e-6
T = 0.98
N_STORED = 1200


def unit64(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def exact_pairs(x: np.ndarray, t: float) -> set[tuple[int, int]]:
    """Pairs i < j at cosine >= t - RULE (faiss flat range search, then the float64 rule)."""
    u = unit64(x).astype(np.float32)
    index = faiss.IndexFlatIP(u.shape[1])
    index.add(u)
    lims, _, lab = index.range_search(u, t - 1e-4)
    q = np.repeat(np.arange(len(u)), np.diff(lims.astype(np.int64)))
    j = lab.astype(np.int64)
    u64 = unit64(x)
    ok = (q < j) & (np.einsum("ij,ij->i", u64[q], u64[j]) >= t - RULE)
    return set(zip(q[ok].tolist(), j[ok].tolist()))


def sha_tree(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def setup(tmp_path_factory, digits):
    root = tmp_path_factory.mktemp("ingest")
    rng = np.random.default_rng(14)
    stored_x = digits[:N_STORED]
    new = digits[N_STORED:].astype(np.float64)
    noisy = stored_x[:80].astype(np.float64)
    noisy = noisy + rng.normal(0.0, 0.25, noisy.shape)  # near-copies of stored rows
    scaled = 3.0 * new[:30]  # exact re-encodings of new rows
    batch = np.concatenate([new, noisy, scaled]).astype(np.float32)
    densemem.DenseMemory.from_array(stored_x).save(root / "store")
    np.save(root / "new.npy", batch)
    return root, stored_x, batch


def test_incremental_plan_agrees_with_the_concatenated_data(setup, tmp_path):
    root, stored_x, batch = setup
    before = sha_tree(root)
    mem = densemem.DenseMemory.load(root / "store", mmap=True)
    b = np.load(root / "new.npy", mmap_mode="r")
    plan = plan_duplicates(b, T, stored=mem, return_pairs=True, tile_mib=0.05)  # many small chunks
    plan.write(tmp_path / "plan")
    assert sha_tree(root) == before  # sha256 of the store files and the batch file unchanged
    n = batch.shape[0]
    ids = np.arange(N_STORED, N_STORED + n)  # default: continue the stored ids, so id == concatenated row
    assert plan.keep_ids.size + plan.drop_ids.size == n
    assert set(plan.keep_ids.tolist()) | set(plan.drop_ids.tolist()) == set(ids.tolist())
    both = np.concatenate([stored_x, batch])
    ref = exact_pairs(both, T)  # reference: faiss exact range search over the concatenation
    u = unit64(both)
    # (1) every (new, stored) pair at or above the threshold was judged, and nothing else across
    cross = {(a, b_) for a, b_ in ref if a < N_STORED <= b_}
    got_cross = {(int(s), int(q)) for q, s in plan.pair_ids.tolist() if s < N_STORED}
    assert got_cross == cross and len(cross) >= 60
    # (2) a new item duplicates a stored one iff it has a stored neighbour; the one named is the most similar
    sim_s = u[N_STORED:] @ u[:N_STORED].T
    has = sim_s.max(axis=1) >= T - RULE
    kept_for = dict(zip(plan.drop_ids.tolist(), plan.duplicate_of_ids.tolist()))
    of_stored = {i for i, k in kept_for.items() if k < N_STORED}
    assert of_stored == set((ids[has]).tolist())
    for i in of_stored:
        assert kept_for[i] == int(np.argmax(sim_s[i - N_STORED]))
    assert plan.n_duplicates_of_stored == len(of_stored)
    # (3) the others get the plan they get alone
    rest = ids[~has]
    alone = plan_duplicates(batch[~has], T, ids=rest)
    assert {frozenset(g.ids.tolist()) for g in plan.groups if not g.stored.any()} == \
        {frozenset(g.ids.tolist()) for g in alone.groups}
    assert {i: k for i, k in kept_for.items() if k >= N_STORED} == \
        dict(zip(alone.drop_ids.tolist(), alone.duplicate_of_ids.tolist()))
    # the rule: every dropped item meets the threshold against the (stored or new) item kept for it
    d, k = plan.drop_ids, plan.duplicate_of_ids
    sims = np.einsum("ij,ij->i", u[d], u[k])
    assert sims.min() >= T - RULE
    np.testing.assert_allclose(plan.duplicate_similarities, sims, atol=1e-6)
    assert not set(plan.drop_ids.tolist()) & set(range(N_STORED))  # stored items are never dropped
    doc = json.loads((tmp_path / "plan" / "groups.json").read_text())  # reference: json module
    assert doc["summary"]["stored"]["n_stored"] == N_STORED
    assert doc["drop"]["duplicate_of_ids"] == plan.duplicate_of_ids.tolist()
    stored_groups = [g for g in doc["groups"] if g["stored"][0]]
    assert stored_groups and all(g["representative_id"] == g["ids"][0] < N_STORED for g in stored_groups)


def test_ivf_against_the_store_keeps_recall(setup):
    root, stored_x, batch = setup
    mem = densemem.DenseMemory.load(root / "store", mmap=True)
    exact = plan_duplicates(batch, T, stored=mem, return_pairs=True)
    ivf = plan_duplicates(batch, T, stored=mem, candidates="ivf", nlist=16, return_pairs=True)
    p = ivf.candidate_params["stored"]
    assert p["index"] == "IndexIVFFlat" and p["sample_pair_recall"] >= 0.995
    e = set(map(tuple, exact.pair_ids.tolist()))
    f = set(map(tuple, ivf.pair_ids.tolist()))
    assert f <= e and len(e & f) / len(e) >= 0.995  # reference: the exact (flat) plan above


def test_cli_stored_option_writes_the_plan_and_touches_nothing(setup, tmp_path, capsys):
    root, _, batch = setup
    before = sha_tree(root)
    code = main(["dedup", str(root / "new.npy"), str(tmp_path / "plan"), "--stored", str(root / "store"),
                 "--threshold", str(T), "--json", "--quiet"])
    assert code == 0
    summary = json.loads(capsys.readouterr().out)["summary"]
    assert sha_tree(root) == before
    api = plan_duplicates(batch, T, stored=densemem.DenseMemory.load(root / "store", mmap=True))
    assert (tmp_path / "plan" / "drop.txt").read_text().split() == [str(i) for i in api.drop_ids.tolist()]
    assert summary["n_duplicates_of_stored"] == api.n_duplicates_of_stored > 0


@pytest.mark.parametrize("argv_extra, batch_kind, message", [
    (["--threshold", "nan"], "ok", "--threshold must be a finite number"),
    (["--threshold", "1.5"], "ok", "--threshold must be less than or equal to 1"),
    ([], "narrow", "`data` has 63 features per row but the `stored` memory has 64"),
    ([], "empty", "`data` is empty"),
])
def test_cli_bad_input_leaves_no_plan_files(setup, tmp_path, capsys, argv_extra, batch_kind, message):
    root, _, batch = setup
    path = tmp_path / "b.npy"
    np.save(path, {"ok": batch, "narrow": batch[:, :63], "empty": batch[:0]}[batch_kind])
    code = main(["dedup", str(path), str(tmp_path / "plan"), "--stored", str(root / "store"), *argv_extra])
    assert code in (1, 2)
    assert message in capsys.readouterr().err
    assert not (tmp_path / "plan").exists()


def test_bad_batches_and_ids(setup):
    root, stored_x, batch = setup
    mem = densemem.DenseMemory.load(root / "store", mmap=True)
    cases = [
        (dict(data=batch[:, :63]), InputValueError, r"plan_duplicates: `data` has 63 features per row but the "
                                                   r"`stored` memory has 64"),
        (dict(data=batch[:0]), InputValueError, r"plan_duplicates: `data` is empty \(0 rows\)"),
        (dict(data=batch, ids=np.arange(batch.shape[0])), InputValueError,
         r"plan_duplicates: `ids` must be new; 707 id\(s\) are already in the `stored` memory \(first: 0 at row 0\)"),
        (dict(data=batch, ids=[f"n{i}" for i in range(batch.shape[0])]), InputTypeError,
         r"`ids` must be of the stored memory's kind \(integers\); got strings"),
        (dict(data=batch, threshold=float("nan")), InputValueError,
         r"plan_duplicates: `threshold` must be a cosine similarity in \(-1, 1\]; got nan"),
        (dict(data=batch, threshold=-1.0), InputValueError, r"`threshold` must be a cosine similarity in \(-1, 1\]"),
        (dict(data=batch, method="attractor"), InputValueError, r"`stored` works with method='graph'"),
        (dict(data=batch, candidates="hnsw"), InputValueError, r"candidates 'auto', 'exact' or 'ivf'"),
        (dict(data="new.npy"), InputTypeError, r"plan_duplicates: `data` must be a numeric array; got str"),
        (dict(data=batch.astype(str)), InputTypeError, r"`data` must hold real numbers \(float or int\); got dtype <U"),
    ]
    for kw, exc, match in cases:
        kw = {"threshold": T, **kw}
        with pytest.raises(exc, match=match):
            plan_duplicates(kw.pop("data"), kw.pop("threshold"), stored=mem, **kw)
    with pytest.raises(InputTypeError, match=r"plan_duplicates: `stored` must be a DenseMemory .* got ndarray"):
        plan_duplicates(batch, T, stored=stored_x)
    bad = batch.copy()
    bad[677, 3] = np.nan
    with pytest.raises(InputValueError, match=r"plan_duplicates: `data` contains NaN at row 677"):
        plan_duplicates(bad, T, stored=mem, tile_mib=0.05)  # found in a later chunk
    named = densemem.DenseMemory.from_array(stored_x[:5], ids=list("abcde"))
    with pytest.raises(InputValueError, match=r"has string ids, so `ids` for the new rows must be given"):
        plan_duplicates(batch, T, stored=named)
    with pytest.raises(InputValueError, match=r"`ids` must be new; 1 id\(s\) .* \(first: 'c' at row 2\)"):
        plan_duplicates(batch[:3], T, stored=named, ids=["x", "y", "c"])


def test_chain_within_the_batch_warns_too(setup):
    root, _, batch = setup
    mem = densemem.DenseMemory.load(root / "store", mmap=True)
    with pytest.warns(DenseMemWarning, match=r"grouping='chain' joined items far below the threshold 0\.93: "):
        plan = plan_duplicates(batch, 0.93, stored=mem, grouping="chain")
    assert plan.summary()["lowest_similarity"] < 2 * 0.93 - 1  # reported beside the warning


def test_a_memory_mapped_batch_stays_on_disk(setup):
    # the batch is validated without converting it whole; rows are read chunk by chunk later
    from densemem.duplicates._checks import batch_matrix

    root, _, _ = setup
    mem = densemem.DenseMemory.load(root / "store", mmap=True)
    b = np.load(root / "new.npy", mmap_mode="r")
    x, ids = batch_matrix(b, None, mem)
    assert isinstance(x, np.memmap) and np.shares_memory(x, b)
    assert ids[0] == N_STORED and ids.size == b.shape[0]
