"""Commands a practitioner can trust: errors name flags, exit codes, warnings, capped capacities, bench columns.

Data: scikit-learn's bundled digits (UCI optdigits, 1797 x 64) and breast cancer
(Wisconsin diagnostic, 569 x 30) sets.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy.special import softmax

import densemem
from densemem.cli import main
from densemem.cli import _main as cli_main
from densemem.errors import InputTypeError, InputValueError, StoreFormatError


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from sklearn.datasets import load_breast_cancer, load_digits

    d = tmp_path_factory.mktemp("data")
    digits = load_digits().data.astype(np.float32)
    cancer = load_breast_cancer().data.astype(np.float32)
    np.save(d / "digits.npy", digits)
    np.save(d / "cancer.npy", cancer)
    np.save(d / "empty.npy", np.zeros((0, 64), np.float32))
    assert main(["build", str(d / "digits.npy"), str(d / "store"), "--normalize", "-q"]) == 0
    return d, digits, cancer


def _err(capsys) -> str:
    return capsys.readouterr().err


# ------------------------------------------------------------ inputs and flags
@pytest.mark.parametrize("command", ["retrieve", "nearest"])
def test_empty_query_file_names_the_argument(data, capsys, command):
    d, _, _ = data
    capsys.readouterr()
    assert main([command, str(d / "store"), str(d / "empty.npy")]) == 1
    err = _err(capsys)
    assert "QUERIES: " in err and "empty.npy' holds no query vectors (0 rows)" in err
    assert "concatenate" not in err


def test_bench_quick_on_bundled_digits_uses_all_rows(capsys):
    assert main(["bench", "--quick", "--dataset", "digits", "--methods", "exact", "--betas", "8", "--k", "1",
                 "--json", "-q"]) == 0
    recs = json.loads(capsys.readouterr().out)["records"]
    assert {r["n"] for r in recs} == {1797}  # the size of scikit-learn's digits set
    for r in recs:  # x base is recomputable: the baseline's time is in the record and the table
        if r["time_ratio"] is not None:
            assert r["time_ratio"] == pytest.approx(r["time_s"] / r["baseline_time_s"], rel=1e-9)


def test_bench_table_shows_base_time_and_faiss_memory():
    from densemem.benchmark import run_benchmark

    rep = run_benchmark(dataset="unit", n=2000, dim=32, n_queries=20, betas=[8], methods=["exact", "faiss-hnsw"],
                        ef_search=[16], repeats=3, warmup=0, progress=False)
    from densemem.benchmark._output import table_rows

    assert "base ms" in rep.table() and "held MiB" in rep.table()
    heads, rows = table_rows(rep.records, [1, 10])
    row = dict(zip(heads, next(r for r in rows if r[0] == "exact")))
    t_ms, base_ms, ratio = float(row["time ms"]), float(row["base ms"]), float(row["x base"])
    assert t_ms / base_ms == pytest.approx(ratio, rel=0.02, abs=0.01)  # from the printed cells alone
    flat = next(r for r in rep.records if r.method == "faiss-flat")
    # IndexFlatIP stores the float32 vectors: n * d * 4 bytes plus a small header (faiss index_io)
    assert flat.held_mib == pytest.approx(2000 * 32 * 4 / 2**20, rel=0.01)
    hnsw = next(r for r in rep.records if r.method == "faiss-hnsw")
    assert hnsw.held_mib > flat.held_mib  # HNSW keeps the vectors and its graph links
    exact = next(r for r in rep.records if r.method == "exact")
    assert exact.held_mib == pytest.approx(2000 * 32 * 4 / 2**20)


def test_save_refuses_an_existing_store_unless_asked(tmp_path):
    mem = densemem.DenseMemory.from_array(np.eye(3))
    mem.save(tmp_path / "s")
    other = densemem.DenseMemory.from_array(2 * np.eye(3))
    with pytest.raises(InputValueError,
                       match=r"DenseMemory.save: a store already exists at .*/s' and overwrite=False; pass overwrite"):
        other.save(tmp_path / "s")
    np.testing.assert_array_equal(densemem.DenseMemory.load(tmp_path / "s").patterns, np.eye(3))
    other.save(tmp_path / "s", overwrite=True)
    np.testing.assert_array_equal(densemem.DenseMemory.load(tmp_path / "s").patterns, 2 * np.eye(3))


def test_errors_name_the_flags_not_keyword_arguments(data, tmp_path, capsys):
    d, _, _ = data
    assert main(["build", str(d / "digits.npy"), str(d / "store")]) == 1
    err = _err(capsys)
    assert "pass --overwrite to replace it" in err and "overwrite=" not in err
    assert main(["retrieve", str(d / "store"), str(d / "digits.npy"), "--method", "index"]) == 1
    err = _err(capsys)
    assert "--index hnsw" in err and "build_index(" not in err
    (tmp_path / "demo").mkdir()
    (tmp_path / "demo" / "mine.txt").write_text("keep")
    assert main(["demo", "--out", str(tmp_path / "demo"), "--photos", "60"]) == 1
    err = _err(capsys)
    assert "already holds files; pass --overwrite" in err
    assert sorted(p.name for p in (tmp_path / "demo").iterdir()) == ["mine.txt"]


def test_one_got_and_no_internal_class_name(capsys):
    assert main(["capacity", "--models", "nosuchmodel"]) == 2
    err = _err(capsys)
    assert err.count("got") == 1 and "got 'nosuchmodel'." in err
    assert "CapacitySpec" not in err and err.startswith("densemem capacity: error: --models must be ")


def test_nan_threshold_must_be_finite(data, capsys):
    d, _, _ = data
    assert main(["dedup", str(d / "digits.npy"), str(d / "plan-nan"), "--threshold", "nan"]) == 2
    assert "--threshold must be a finite number; got nan." in _err(capsys)
    assert not (d / "plan-nan").exists()


@pytest.mark.parametrize("args, flag", [
    (["capacity", "--dims", "0"], "--dims must be greater than or equal to 2"),
    (["capacity", "--dims", "x"], "argument --dims: invalid int value"),
    (["tune", "STORE", "--plot", "out.txt"], "--plot must name a .png file"),
    (["capacity", "--plot", "c.txt"], "--plot must name a .png file"),
    (["retrieve", "STORE", "QUERIES", "--states-out", "missing/s.npy"], "--states-out must be in an existing folder"),
    (["tune", "STORE", "--html", "t.txt"], "--html must name an .html file"),
    (["build", "DIGITS", "SHARDED", "--shards", "5000"], "--shards must be at most the number of rows (1797"),
    (["tune", "STORE", "--target", "none", "--write-beta"], "--write-beta needs a chosen beta"),
    # values the library refuses are usage errors too when they came as options
    (["nearest", "STORE", "QUERIES", "-k", "99999"], "--k must be at most the number of stored patterns (1797)"),
    (["build", "DIGITS", "SHARDED", "--column", "x"], "--column applies to .npz and .parquet files"),
    (["capacity", "--corruption", "flip:2"], "--corruption: the flip fraction must be in [0, 1]; got 2.0."),
])
def test_usage_errors_exit_2_and_name_the_option(data, tmp_path, capsys, args, flag):
    d, _, _ = data
    subs = {"STORE": str(d / "store"), "QUERIES": str(d / "digits.npy"), "DIGITS": str(d / "digits.npy"),
            "SHARDED": str(tmp_path / "sharded"), "out.txt": str(tmp_path / "out.txt"),
            "c.txt": str(tmp_path / "c.txt"), "missing/s.npy": str(tmp_path / "missing" / "s.npy"),
            "t.txt": str(tmp_path / "t.txt")}
    assert main([subs.get(a, a) for a in args]) == 2
    err = _err(capsys)
    assert flag in err and err.count("\n") == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # nothing written, no empty shard folders


def test_warnings_print_without_a_source_path(data, monkeypatch, capsys):
    d, _, _ = data

    def warn(a):
        warnings.warn("the store is large; retrieval may be slow", densemem.errors.DenseMemWarning)
        return {}, "ok"

    monkeypatch.setattr(cli_main, "_run_info", warn)
    assert main(["info", str(d / "store")]) == 0
    err = _err(capsys)
    assert err == "densemem info: warning: the store is large; retrieval may be slow\n"


# -------------------------------------------------------- raw-norm collapse
def test_raw_store_where_queries_collapse_is_flagged(data, tmp_path, capsys):
    d, _, cancer = data
    # reference: numpy brute-force inner products; one long row wins nearly every row's search
    first = np.argmax(cancer.astype(np.float64) @ cancer.T.astype(np.float64), axis=1)
    assert np.mean(first == np.arange(len(cancer))) < 0.05
    assert main(["build", str(d / "cancer.npy"), str(tmp_path / "raw"), "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    (warning,) = got["warnings"]
    top = int(np.bincount(first).argmax())
    assert f"id {top} is first for" in warning and "--normalize" in warning
    assert main(["tune", str(tmp_path / "raw"), "--n-betas", "4", "--n-queries", "16", "-q"]) == 0
    text = capsys.readouterr().out
    assert "find themselves first by inner product" in text and "--normalize" in text
    assert main(["build", str(d / "cancer.npy"), str(tmp_path / "cos"), "--normalize", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["warnings"] == []


# ------------------------------------------------------------------ capacity
def test_capacity_marks_capped_searches(tmp_path, capsys, monkeypatch):
    # pseudo-inverse rule (Personnaz et al. 1986): with more patterns than units the projector is the
    # identity, so every state is a fixed point and the search runs into its cap; Hebbian fails early.
    args = ["capacity", "--models", "hebbian", "pseudo_inverse", "--dims", "12", "16", "--n-trials", "1",
            "--max-patterns", "64", "-q"]
    assert main([*args, "--csv", str(tmp_path / "c.csv")]) == 0
    text = capsys.readouterr().out
    lines = [ln for ln in text.splitlines() if ln.startswith(("hebbian", "pseudo_inverse"))]
    assert all(">= 64 (cap)" in ln for ln in lines if ln.startswith("pseudo_inverse"))
    assert not any("(cap)" in ln for ln in lines if ln.startswith("hebbian"))
    assert "success at capacity" in text and "first failing count" in text
    import csv

    rows = list(csv.DictReader(open(tmp_path / "c.csv")))
    assert "fail_rate" not in rows[0] and {"success_rate", "success_at_first_fail"} <= set(rows[0])
    for r in rows:
        if r["model"] == "hebbian":  # the rate at the first failing count is a failing success rate
            assert float(r["success_at_first_fail"]) < 1 - float(r["delta"]) <= float(r["success_rate"])
        else:
            assert r["capped"] == "True" and r["success_at_first_fail"] == ""

    pytest.importorskip("matplotlib")
    import matplotlib.axes
    from densemem.capacity import capacity_curve, plot_capacity

    curve = capacity_curve(["hebbian", "pseudo_inverse"], [12, 16], n_trials=1, max_patterns=64, progress=False)
    drawn = []
    real = matplotlib.axes.Axes.plot

    def spy(self, *a, **kw):
        drawn.append((kw.get("label", ""), list(a[0]) if a else [], a[2] if len(a) > 2 else ""))
        return real(self, *a, **kw)

    monkeypatch.setattr(matplotlib.axes.Axes, "plot", spy)
    plot_capacity(curve, tmp_path / "c.png")
    measured = [dims for label, dims, _ in drawn if "measured" in label]
    capped = [(dims, style) for label, dims, style in drawn if "search cap reached" in label]
    assert measured == [[12.0, 16.0]]  # hebbian only: the capped model has no measured line
    assert capped == [([12.0, 16.0], "^")]  # drawn as open markers, not joined
    assert not any("from memory" in label for label, _, _ in drawn)


def test_demo_refuses_non_empty_folder_unless_asked(tmp_path, capsys):
    out = tmp_path / "d"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    assert main(["demo", "--out", str(out), "--photos", "60", "--no-plots", "-q"]) == 1
    capsys.readouterr()
    assert main(["demo", "--out", str(out), "--photos", "60", "--no-plots", "-q", "--overwrite"]) == 0
    assert (out / "notes.txt").read_text() == "mine" and (out / "summary.md").is_file()


# --------------------------------------------------------------------- tune
def test_tune_in_words_and_write_beta(data, tmp_path, capsys):
    d, digits, _ = data
    x = digits / np.linalg.norm(digits, axis=1, keepdims=True)
    np.save(tmp_path / "unit.npy", x[:500])
    store = tmp_path / "st"
    assert main(["build", str(tmp_path / "unit.npy"), str(store), "--beta", "1"]) == 0
    capsys.readouterr()
    assert main(["tune", str(store), "--n-betas", "6", "--n-queries", "64", "-q"]) == 0
    text = capsys.readouterr().out
    first = text.splitlines()[0]
    assert first.startswith("verdict: for sharp recall use beta = ")
    for words in ("legend", "regimes", "single ", "metastable ", "global ", "predicted against measured",
                  "x the measured beta", "apply it: densemem tune"):
        assert words in text
    assert densemem.DenseMemory.load(store).beta == 1.0  # not written without --write-beta
    assert main(["tune", str(store), "--n-betas", "6", "--n-queries", "64", "-q", "--write-beta", "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    beta = got["written_beta"]
    assert beta == pytest.approx(got["choice"]["beta"]) and got["verdict"].startswith("verdict:")
    assert densemem.DenseMemory.load(store, verify=True).beta == pytest.approx(beta)
    q = x[:5] + 0.01
    np.save(tmp_path / "q.npy", q)
    assert main(["retrieve", str(store), str(tmp_path / "q.npy"), "-k", "3", "--method", "exact", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["beta"] == pytest.approx(beta)  # retrieve uses the stored beta by default
    p = softmax(beta * q.astype(np.float64) @ x[:500].T.astype(np.float64), axis=1)  # reference: scipy softmax
    np.testing.assert_allclose([r["top_weights"][0] for r in res["queries"]], p.max(axis=1), rtol=1e-3)


def test_set_stored_beta_checks_its_arguments(tmp_path):
    from densemem.store._folder import set_stored_beta

    densemem.DenseMemory.from_array(np.eye(3), beta=2.0).save(tmp_path / "s")
    before = (tmp_path / "s" / "patterns.npy").read_bytes()
    with pytest.raises(InputValueError, match=r"set_stored_beta: `beta` must be a finite number > 0; got nan"):
        set_stored_beta(tmp_path / "s", float("nan"))
    with pytest.raises(InputValueError, match=r"set_stored_beta: `beta` must be a finite number > 0; got -1.0"):
        set_stored_beta(tmp_path / "s", -1.0)
    with pytest.raises(InputTypeError, match=r"set_stored_beta: `beta` must be a real number; got str"):
        set_stored_beta(tmp_path / "s", "5")
    with pytest.raises(StoreFormatError, match=r"set_stored_beta: there is no store folder at .*nothing"):
        set_stored_beta(tmp_path / "nothing", 5.0)
    assert set_stored_beta(tmp_path / "s", 7.5) == 2.0
    assert densemem.DenseMemory.load(tmp_path / "s", verify=True).beta == 7.5
    assert (tmp_path / "s" / "patterns.npy").read_bytes() == before
    assert sorted(p.name for p in (tmp_path / "s").iterdir()) == ["ids.npy", "manifest.json", "patterns.npy"]


def test_tune_progress_bar_on_request_only(capsys):
    pytest.importorskip("tqdm")
    import densemem.tuning as t

    mem = densemem.DenseMemory.from_array(np.eye(6))
    t.tune_beta(mem, t.TuneSpec(n_betas=4, n_queries=8), progress=True)
    assert "tune" in capsys.readouterr().err
    t.tune_beta(mem, t.TuneSpec(n_betas=4, n_queries=8))  # default: no bar
    assert capsys.readouterr().err == ""


def test_every_option_has_help():
    import argparse

    from densemem.cli._main import build_parser

    parser = build_parser()
    subs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    missing = [f"{name} {'/'.join(act.option_strings) or act.dest}"
               for name, sub in subs.choices.items() for act in sub._actions
               if not isinstance(act, argparse._HelpAction) and not act.help]
    assert missing == []
    assert "--no-chaining" not in subs.choices["dedup"].format_help()  # read as a double negative


def _stderr_on_a_terminal(args: list[str]) -> str:
    """Run the command with stderr on a pseudo-terminal of 120 columns; return what it wrote there."""
    import os
    import subprocess
    import sys

    fcntl = pytest.importorskip("fcntl")
    termios = pytest.importorskip("termios")
    import struct

    master, slave = os.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 120, 0, 0))
    proc = subprocess.Popen([sys.executable, "-m", "densemem", *args], stdout=subprocess.DEVNULL, stderr=slave)
    os.close(slave)
    out = b""
    while True:
        try:
            chunk = os.read(master, 65536)
        except OSError:  # the terminal closed with the process
            break
        if not chunk:
            break
        out += chunk
    os.close(master)
    assert proc.wait(timeout=120) == 0
    return out.decode(errors="replace")


def test_tune_progress_on_a_terminal_only(data):
    pytest.importorskip("tqdm")
    d, _, _ = data
    args = ["tune", str(d / "store"), "--n-betas", "4", "--n-queries", "32"]
    shown = _stderr_on_a_terminal(args)
    assert "tune: 100%" in shown  # the bar reached its planned number of runs
    assert _stderr_on_a_terminal([*args, "-q"]) == ""
    import subprocess
    import sys

    piped = subprocess.run([sys.executable, "-m", "densemem", *args], capture_output=True, text=True, timeout=120)
    assert piped.returncode == 0 and piped.stderr == ""


def test_tune_refuses_a_sharded_store_by_name(data, tmp_path, capsys):
    d, _, _ = data
    assert main(["build", str(d / "digits.npy"), str(tmp_path / "sh"), "--normalize", "--shards", "2", "-q"]) == 0
    capsys.readouterr()
    assert main(["tune", str(tmp_path / "sh"), "--write-beta"]) == 1
    assert "STORE: tune works on a single store; " in capsys.readouterr().err
