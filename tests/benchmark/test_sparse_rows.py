"""Benchmark rows for the sparse maps (``BenchSpec.weightings``, ``densemem bench --weighting``).

References: faiss IndexFlatIP (exact inner-product top-k) is the recall truth of every row; the
exact sparse rows are scored against a float64 bisection for alpha-entmax (Peters, Niculae &
Martins, "Sparse Sequence-to-Sequence Models", ACL 2019) written in the benchmark module; the
support sizes against the library call the rows time (DenseMemory.retrieve with the same map).
Open data: scikit-learn's digits.
"""

from __future__ import annotations

import json

import faiss
import numpy as np
import pytest
from pydantic import ValidationError

from densemem import DenseMemory
from densemem.benchmark import BenchSpec, run_benchmark
from densemem.cli import main


@pytest.fixture(scope="module")
def report():
    spec = BenchSpec(dataset="digits", n_queries=60, betas=[30.0], weightings=["softmax", "sparsemax", "entmax"],
                     alpha=1.5, methods=["exact", "certified"], repeats=1, warmup=0)
    return spec, run_benchmark(spec, progress=False)


def test_sparse_rows_beside_softmax_rows(report):
    _, rep = report
    maps = {(r.method, r.weighting) for r in rep.records if r.library == "densemem"}
    assert maps == {(m, w) for m in ("exact", "certified") for w in ("softmax", "sparsemax", "entmax")}
    for r in rep.records:
        if r.weighting != "softmax":
            assert r.support_size_mean is not None and r.support_size_mean >= 1
            assert r.alpha == (2.0 if r.weighting == "sparsemax" else 1.5)
            assert r.time_ratio is not None  # timed beside faiss Flat in the same run
            assert r.state_error_max is not None and r.state_error_max < 1e-4
        else:
            assert r.support_size_mean is None
    assert "support" in rep.table()


def test_sparse_rows_recall_and_support_against_outside_references(report):
    spec, rep = report
    from densemem.benchmark._data import load_data  # the same data the rows ran on

    data = load_data(spec, None, spec.seed)
    x, q = data.x, data.q
    flat = faiss.IndexFlatIP(x.shape[1])  # the exact truth (faiss, brute force)
    flat.add(x)
    truth = flat.search(q, 1)[1][:, 0]
    mem = DenseMemory.from_array(x, normalize=False)
    for w, alpha in (("sparsemax", None), ("entmax", 1.5)):
        direct = mem.retrieve(q, 30.0, k=10, method="exact", weighting=w, alpha=alpha, return_energy=False)
        row = next(r for r in rep.records if r.method == "exact" and r.weighting == w)
        assert row.support_size_mean == pytest.approx(float(np.mean(direct.support_size)))
        assert row.recall[1] == pytest.approx(float(np.mean(direct.top_ids[:, 0] == truth)))


@pytest.mark.parametrize("kw,word", [(dict(weightings=["sparsemaxx"]), "weightings"),
                                     (dict(weightings=["entmax"], alpha=2.5), "alpha"),
                                     (dict(weightings=["entmax"]), "alpha"),
                                     (dict(weightings=["softmax"], alpha=1.5), "alpha")])
def test_bad_maps_are_named(kw, word):
    with pytest.raises(ValidationError, match=word):
        BenchSpec(**kw)


def test_cli_bench_weighting_writes_sparse_rows(tmp_path, capsys):
    out = tmp_path / "b"
    assert main(["bench", "--dataset", "digits", "--queries", "30", "--betas", "30", "--methods", "exact",
                 "--weighting", "softmax", "sparsemax", "--repeats", "1", "--warmup", "0", "--no-plots",
                 "--out", str(out), "--quiet"]) == 0
    data = json.loads((out / "bench.json").read_text())
    rows = data["records"] if "records" in data else data["rows"]
    sparse = [r for r in rows if r.get("weighting") == "sparsemax"]
    assert sparse and all(r["support_size_mean"] >= 1 for r in sparse)
    capsys.readouterr()
    assert main(["bench", "--dataset", "digits", "--weighting", "entmax", "--alpha", "3", "--quick"]) != 0
    assert "alpha" in capsys.readouterr().err
