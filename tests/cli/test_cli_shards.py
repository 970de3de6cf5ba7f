"""``densemem build --shards`` and ``--scheduler``: the CLI over sharded stores.

Reference: the single-store CLI run on the same data (itself checked against scipy in
test_cli.py), and a faiss IndexFlatIP top-1 (exact search). Shards merge exactly
(derived merge of partials), so answers must agree.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import faiss
import numpy as np
import pytest


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "densemem", *args], cwd=cwd, capture_output=True, text=True, timeout=240)


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("shardcli")
    rng = np.random.default_rng(7)
    x = rng.standard_normal((3001, 24)).astype(np.float32)
    np.save(d / "x.npy", x)
    np.save(d / "q.npy", x[:6] + 0.05 * rng.standard_normal((6, 24)).astype(np.float32))
    assert _cli("build", "x.npy", "one", "--normalize", "--beta", "25", cwd=d).returncode == 0
    r = _cli("build", "x.npy", "sh", "--normalize", "--beta", "25", "--shards", "3", cwd=d)
    assert r.returncode == 0, r.stderr
    return d


def test_sharded_build_info_and_retrieve_equal_single_store(data: Path) -> None:
    info = _cli("info", "sh", "--json", cwd=data)
    assert info.returncode == 0, info.stderr
    assert json.loads(info.stdout)["n_shards"] == 3
    one = json.loads(_cli("retrieve", "one", "q.npy", "-k", "4", "--json", cwd=data).stdout)
    sh = json.loads(_cli("retrieve", "sh", "q.npy", "-k", "4", "--json", cwd=data).stdout)
    for a, b in zip(one["queries"], sh["queries"]):
        assert a["top_ids"] == b["top_ids"]
        np.testing.assert_allclose(a["top_weights"], b["top_weights"], rtol=1e-4, atol=1e-7)
    # faiss exact search on the normalized rows names the same top-1 (beta 25 is sharp here).
    x = np.load(data / "x.npy")
    q = np.load(data / "q.npy")
    xn = x / np.linalg.norm(x, axis=1, keepdims=True)
    qn = q / np.linalg.norm(q, axis=1, keepdims=True)
    _, top = faiss.knn(qn, xn, 1, metric=faiss.METRIC_INNER_PRODUCT)
    assert [rec["top_ids"][0] for rec in sh["queries"]] == top[:, 0].tolist()


def test_scheduler_run_equals_local(data: Path) -> None:
    dist = pytest.importorskip("distributed")
    with dist.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        r = _cli("nearest", "sh", "q.npy", "-k", "3", "--json", "--scheduler", cluster.scheduler_address, cwd=data)
    assert r.returncode == 0, r.stderr
    local = json.loads(_cli("nearest", "sh", "q.npy", "-k", "3", "--json", cwd=data).stdout)
    assert [q["ids"] for q in json.loads(r.stdout)["queries"]] == [q["ids"] for q in local["queries"]]


@pytest.mark.parametrize(
    "args, message",
    [
        (("retrieve", "sh", "q.npy", "--scheduler", "nowhere"), "--scheduler must be a Dask scheduler address"),
        (("retrieve", "one", "q.npy", "--scheduler", "tcp://127.0.0.1:1"), "--scheduler needs a sharded store"),
        (("build", "x.npy", "bad", "--shards", "0"), "--shards must be greater than or equal to 1"),
        (("build", "x.npy", "bad", "--shards", "2", "--dtype", "float8"), "invalid choice: 'float8'"),
    ],
)
def test_sharded_usage_errors_exit_2_with_one_line(data: Path, args: tuple, message: str) -> None:
    r = _cli(*args, cwd=data)
    assert r.returncode == 2, (r.returncode, r.stderr)
    assert message in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_rebalance_command_keeps_every_answer(data: Path, tmp_path: Path) -> None:
    # The same query file against the same rows in 3 then 5 shards: identical top ids (the exact
    # merge), weights to float32 rounding; the single store is the outside reference.
    import shutil

    shutil.copytree(data / "sh", tmp_path / "sh")
    shutil.copy(data / "q.npy", tmp_path / "q.npy")
    before = json.loads(_cli("retrieve", "sh", "q.npy", "-k", "4", "--json", cwd=tmp_path).stdout)
    r = _cli("rebalance", "sh", "--shards", "5", "--json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert sum(json.loads(r.stdout)["counts_after"]) == 3001 and len(json.loads(r.stdout)["counts_after"]) == 5
    after = json.loads(_cli("retrieve", "sh", "q.npy", "-k", "4", "--json", cwd=tmp_path).stdout)
    for a, b in zip(before["queries"], after["queries"]):
        assert a["top_ids"] == b["top_ids"]
        np.testing.assert_allclose(a["top_weights"], b["top_weights"], rtol=1e-5, atol=1e-7)
    bad = _cli("rebalance", "sh", cwd=tmp_path)
    assert bad.returncode == 2 and "one of the arguments --shards --rows is required" in bad.stderr
    single = _cli("rebalance", str(data / "one"), "--shards", "2", cwd=tmp_path)
    assert single.returncode == 2 and "is not a sharded store" in single.stderr


def test_sharded_build_with_an_index_per_shard(data: Path, tmp_path: Path) -> None:
    # Each shard gets its own HNSW index at build; index-backed retrieval then runs per shard and merges.
    # Reference: faiss exact search for the truth of the heaviest item (beta 25 on normalized rows is sharp).
    import shutil

    shutil.copy(data / "x.npy", tmp_path / "x.npy")
    shutil.copy(data / "q.npy", tmp_path / "q.npy")
    r = _cli("build", "x.npy", "ix", "--normalize", "--beta", "25", "--shards", "2", "--index", "hnsw", "--json",
             cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["index"]["kind"] == "hnsw"
    got = json.loads(_cli("retrieve", "ix", "q.npy", "-k", "3", "--method", "index", "--json", cwd=tmp_path).stdout)
    assert got["method"] == "index"
    x, q = np.load(tmp_path / "x.npy"), np.load(tmp_path / "q.npy")
    xn = x / np.linalg.norm(x, axis=1, keepdims=True)
    qn = q / np.linalg.norm(q, axis=1, keepdims=True)
    _, top = faiss.knn(qn, xn, 1, metric=faiss.METRIC_INNER_PRODUCT)
    assert [rec["top_ids"][0] for rec in got["queries"]] == top[:, 0].tolist()


def test_retrieve_json_reports_bounds_and_candidate_recall(data: Path, tmp_path: Path) -> None:
    # The certified bound (mass_bound, state_bound = 2 M mass_bound, fell_back, k_used) and the
    # index's candidate recall reach --json, as the library reports them (faiss exact search is the
    # recall's reference inside the library).
    cert = json.loads(_cli("retrieve", "one", "q.npy", "-k", "3", "--method", "certified", "--json", cwd=data).stdout)
    rec = cert["queries"][0]
    assert {"mass_bound", "state_bound", "fell_back", "k_used"} <= rec.keys()
    assert rec["state_bound"] == pytest.approx(2.0 * rec["mass_bound"], abs=1e-12)  # normalized rows: M = 1
    import shutil

    shutil.copy(data / "x.npy", tmp_path / "x.npy")
    shutil.copy(data / "q.npy", tmp_path / "q.npy")
    assert _cli("build", "x.npy", "ix", "--normalize", "--beta", "25", "--index", "hnsw", cwd=tmp_path).returncode == 0
    idx = json.loads(_cli("retrieve", "ix", "q.npy", "-k", "3", "--method", "index", "--measure", "--json",
                          cwd=tmp_path).stdout)
    assert 0.9 <= idx["candidate_recall"] <= 1.0 and "renormalized" in idx["weights_over"]
    assert all("k_used" in r for r in idx["queries"])


def test_tune_reports_the_sparse_exact_recall_beta(data: Path) -> None:
    # The Fenchel-Young margin (Blondel, Martins & Niculae, JMLR 2020): sparsemax returns a stored
    # pattern exactly once beta * Delta_i >= 1; the library checks its beta by retrieval.
    r = _cli("tune", "one", "--weighting", "sparsemax", "--json", "-q", cwd=data)
    assert r.returncode == 0, r.stderr
    ex = json.loads(r.stdout)["exact_recall"]
    assert ex["weighting"] == "sparsemax" and ex["beta"] > 0
    bad = _cli("tune", "one", "--weighting", "entmax", "--alpha", "3", cwd=data)
    assert bad.returncode == 2 and "alpha" in bad.stderr
