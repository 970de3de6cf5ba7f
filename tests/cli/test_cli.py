"""The ``densemem`` command end to end (subprocess) and its error paths (in process)."""

from __future__ import annotations

import csv
import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.special import softmax

from densemem.cli import main

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

ROOT = Path(__file__).resolve().parents[2]
# subprocesses import the densemem of this checkout, not whichever one is installed
ENV = {**os.environ, "PYTHONWARNINGS": "ignore",
       "PYTHONPATH": os.pathsep.join([str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])])}


def _cmd(*args: str) -> list[str]:
    return [sys.executable, "-m", "densemem", *args]


def _run(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(_cmd(*args), cwd=cwd, capture_output=True, text=True, env=ENV, timeout=120)


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def files(tmp_path_factory, digits_unit_module):
    """The first 300 scikit-learn digits (unit norm) written in every input format."""
    d = tmp_path_factory.mktemp("inputs")
    x = digits_unit_module[:300]
    ids = np.array([f"digit-{i}" for i in range(len(x))])
    np.save(d / "v.npy", x)
    np.savez(d / "v.npz", vectors=x, names=ids)
    pq.write_table(pa.table({"name": ids, "emb": pa.array(x.tolist(), type=pa.list_(pa.float32(), 64))}),
                   d / "v.parquet")
    for suffix, delim in ((".csv", ","), (".tsv", "\t")):
        with open(d / f"v{suffix}", "w", newline="") as fh:
            w = csv.writer(fh, delimiter=delim)
            w.writerow(["name"] + [f"f{j}" for j in range(64)])
            w.writerows([[n] + [repr(float(v)) for v in row] for n, row in zip(ids, x)])
    np.save(d / "q.npy", x[:7] + 0.05)
    return d, x, ids


@pytest.fixture(scope="module")
def digits_unit_module():
    from sklearn.datasets import load_digits

    x = load_digits().data.astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _has_dedup() -> bool:
    from densemem.cli import _jobs as _cli_jobs

    return _cli_jobs._has("duplicates")


def test_end_to_end(files, tmp_path):
    d, x, ids = files
    before = {p.name: _sha(p) for p in d.iterdir()}
    builds = {
        "npy": ("v.npy",),
        "npz": ("v.npz", "--id-column", "names"),
        "parquet": ("v.parquet", "--id-column", "name"),
        "csv": ("v.csv", "--id-column", "name"),
        "tsv": ("v.tsv", "--id-column", "name"),
    }
    procs = {k: subprocess.Popen(_cmd("build", str(d / a[0]), str(tmp_path / f"s-{k}"), *a[1:], "--beta", "30",
                                      "--json"), cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                 text=True, env=ENV) for k, a in builds.items()}
    for k, p in procs.items():
        so, se = p.communicate(timeout=120)
        assert p.returncode == 0, (k, se)
        assert json.loads(so)["count"] == 300
    from densemem import DenseMemory

    for k in builds:  # every format gives the same stored rows (reference: the numpy array written)
        mem = DenseMemory.load(tmp_path / f"s-{k}")
        np.testing.assert_allclose(mem.patterns, x, rtol=0, atol=1e-7)
        if k != "npy":
            assert mem.ids.tolist() == ids.tolist()

    q = np.load(d / "q.npy")
    runs = {
        "info": ("info", str(tmp_path / "s-parquet"), "--json"),
        "retrieve": ("retrieve", str(tmp_path / "s-csv"), str(d / "q.npy"), "-k", "3", "--method", "exact", "--json"),
        "nearest": ("nearest", str(tmp_path / "s-npy"), str(d / "q.npy"), "-k", "2"),
        "dedup": ("dedup", str(d / "v.npz"), str(tmp_path / "plan"), "--id-column", "names", "--threshold", "0.97",
                  "--json"),
    }
    if not _has_dedup():
        del runs["dedup"]
    procs = {k: subprocess.Popen(_cmd(*a), cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                 env=ENV) for k, a in runs.items()}
    res = {}
    for k, p in procs.items():
        so, se = p.communicate(timeout=120)
        assert p.returncode == 0, (k, se)
        res[k] = so
    assert json.loads(res["info"])["verified"] is True

    got = json.loads(res["retrieve"])
    p = softmax(30.0 * q.astype(np.float64) @ x.T.astype(np.float64), axis=1)  # reference: scipy softmax
    top = np.argsort(-p, axis=1)[:, :3]
    assert [r["top_ids"] for r in got["queries"]] == ids[top].tolist()
    np.testing.assert_allclose([r["top_weights"] for r in got["queries"]], np.take_along_axis(p, top, 1), rtol=1e-4)

    assert "nearest ids" in res["nearest"]
    brute = np.argsort(-(q @ x.T), axis=1)[:, 0]  # reference: numpy brute-force inner product
    first = [line.split()[1] for line in res["nearest"].splitlines()[3:]]
    assert first == [str(i) for i in brute]

    if "dedup" in res:
        assert {"keep", "drop"} <= set(json.loads(res["dedup"])["files"])
        kept = (tmp_path / "plan" / "keep.txt").read_text().split()
        dropped = (tmp_path / "plan" / "drop.txt").read_text().split()
        assert len(kept) + len(dropped) == 300 and not set(kept) & set(dropped)

    assert {p.name: _sha(p) for p in d.iterdir()} == before  # inputs byte-identical


def test_error_exits_and_messages(files, tmp_path):
    d, _, _ = files
    cases = [
        (("retrieve", "st"), 2, "the following arguments are required: queries"),
        (("build", str(d / "v.npy"), str(tmp_path / "s"), "--beta", "-2"), 2, "--beta must be greater than 0; got -2.0"),
        (("frobnicate",), 2, "invalid choice: 'frobnicate'"),
        (("info", str(tmp_path / "nothing")), 1, "there is no store folder"),
    ]
    procs = [subprocess.Popen(_cmd(*a), cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=ENV) for a, _, _ in cases]
    debug = subprocess.Popen(_cmd("info", str(tmp_path / "nothing"), "--debug"), cwd=tmp_path,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=ENV)
    for (args, code, msg), p in zip(cases, procs):
        so, se = p.communicate(timeout=60)
        assert p.returncode == code, (args, se)
        assert se.count("\n") == 1 and msg in se and so == ""  # one line, no traceback
    _, se = debug.communicate(timeout=60)
    assert debug.returncode == 1 and "Traceback" in se  # --debug shows it
    assert not (tmp_path / "s").exists()


def test_demo_small_and_help(tmp_path):
    res = _run("demo", "--out", str(tmp_path / "rep"), "--photos", "150", "--json", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    rep = json.loads(res.stdout)
    assert "invented" in rep["label"]
    text = (tmp_path / "rep" / "summary.md").read_text()
    assert "Invented data" in text
    # derived: a large beta puts the state on one photo, a small one on the theme blend
    assert rep["sharp"]["photo_cos"] > rep["blended"]["photo_cos"]
    assert rep["blended"]["blend_size"] > rep["sharp"]["blend_size"]
    assert (tmp_path / "rep" / "store" / "manifest.json").is_file()


# ----------------------------------------------------------- in process
def test_help_on_every_level(capsys):
    assert main(["--help"]) == 0
    top = capsys.readouterr().out
    commands = [c for c in ("build", "info", "retrieve", "nearest", "demo", "tune", "dedup", "capacity") if c in top]
    assert {"build", "info", "retrieve", "nearest", "demo"} <= set(commands)
    for c in commands:
        assert main([c, "--help"]) == 0
        assert "example:\n  densemem " + c in capsys.readouterr().out


def test_in_process_errors(files, tmp_path, capsys):
    d, _, _ = files
    assert main(["build", str(d / "v.npy"), str(tmp_path / "s"), "--json"]) == 0
    capsys.readouterr()
    assert main(["build", str(d / "v.npy"), str(tmp_path / "s")]) == 1
    assert "a store already exists" in capsys.readouterr().err
    assert main(["retrieve", str(tmp_path / "s"), str(d / "q.npy"), "--steps", "0"]) == 2
    assert "--steps must be greater than or equal to 1; got 0." in capsys.readouterr().err
    (tmp_path / "old.npy").write_bytes(b"x")
    assert main(["retrieve", str(tmp_path / "s"), str(d / "q.npy"), "--states-out", str(tmp_path / "old.npy")]) == 2
    assert "--states-out must name a new .npy file" in capsys.readouterr().err
    assert main(["retrieve", str(tmp_path / "s"), str(d / "q.npy"), "--states-out", str(tmp_path / "st.npy"),
                 "--chunk", "3", "--beta", "5"]) == 0
    assert np.load(tmp_path / "st.npy").shape == (7, 64) and "beta=5" in capsys.readouterr().out
    assert main(["nearest", str(tmp_path / "s"), str(d / "v.txt")]) == 1
    assert "cannot tell the format" in capsys.readouterr().err
    assert main(["demo", "--photos", "3"]) == 2
    assert "--photos must be greater than or equal to 50; got 3." in capsys.readouterr().err


def test_job_commands_in_process(files, tmp_path, capsys):
    d, _, _ = files
    assert main(["build", str(d / "v.npy"), str(tmp_path / "s")]) == 0
    capsys.readouterr()
    from densemem.cli import _jobs as _cli_jobs

    if _cli_jobs._has("tuning"):
        assert main(["tune", str(tmp_path / "s"), "--n-betas", "4", "--n-queries", "16", "--json"]) == 0
        assert "separation" in json.loads(capsys.readouterr().out)
        assert main(["tune", str(tmp_path / "s"), "--level", "-1"]) == 2
        assert "--level must be greater than or equal to 0; got -1.0." in capsys.readouterr().err
    if _cli_jobs._has("capacity"):
        (tmp_path / "c.csv").write_text("keep")
        assert main(["capacity", "--models", "hebbian", "--dims", "8", "--csv", str(tmp_path / "c.csv")]) == 2
        assert "--csv must name a new file" in capsys.readouterr().err
        assert (tmp_path / "c.csv").read_text() == "keep"
