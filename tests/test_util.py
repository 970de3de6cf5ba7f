"""The shared helpers: the atomic writer, the JSON converter, the progress bar, the corruption kinds."""

from __future__ import annotations

import json
import os
import stat
import sys

import numpy as np
import pytest

from densemem import InputValueError, MissingExtraError
from densemem._synthetic import CORRUPTIONS, corrupt
from densemem._util import progress, progress_bar, replacing, to_plain, write_atomic


# ----------------------------------------------------------------- atomic writer
def test_written_file_follows_the_umask(tmp_path) -> None:
    # POSIX: a new file gets 0o666 & ~umask (common practice); tempfile.mkstemp's 0o600 would not
    old = os.umask(0o022)
    try:
        p = write_atomic(tmp_path / "a.json", "{}")
    finally:
        os.umask(old)
    assert stat.S_IMODE(p.stat().st_mode) == 0o644
    assert p.read_text() == "{}" and sorted(os.listdir(tmp_path)) == ["a.json"]


def test_failed_write_leaves_the_old_file_and_no_temp(tmp_path, monkeypatch) -> None:
    p = write_atomic(tmp_path / "r.txt", b"old")

    def fail(fd):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(OSError, match="disk full"):
        write_atomic(p, b"new")
    monkeypatch.undo()
    assert p.read_bytes() == b"old" and sorted(os.listdir(tmp_path)) == ["r.txt"]


def test_no_overwrite_refuses_an_existing_file(tmp_path) -> None:
    p = write_atomic(tmp_path / "c.csv", "1")
    with pytest.raises(InputValueError, match=r"demo: '.*c\.csv' exists; pass overwrite=True to replace it\."):
        write_atomic(p, "2", overwrite=False, where="demo")
    assert p.read_text() == "1" and sorted(os.listdir(tmp_path)) == ["c.csv"]


def test_replacing_moves_with_os_replace(tmp_path, monkeypatch) -> None:
    moved = []
    real = os.replace
    monkeypatch.setattr(os, "replace", lambda a, b: (moved.append((str(a), str(b))), real(a, b)))
    with replacing(tmp_path / "fig.png") as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".png"
        tmp.write_bytes(b"png")
    assert moved == [(str(tmp), str(tmp_path / "fig.png"))]


# ------------------------------------------------------------------ JSON
def test_to_plain_is_json_ready() -> None:
    # JSON (RFC 8259) has no NaN or infinity: they become null
    doc = to_plain({"a": np.float32(0.5), "b": np.array([[1, 2]]), "c": (np.nan, np.inf), 1: np.bool_(True),
                    "p": __import__("pathlib").Path("/x")})
    assert doc == {"a": 0.5, "b": [[1, 2]], "c": [None, None], "1": True, "p": "/x"}
    assert json.loads(json.dumps(doc, allow_nan=False)) == doc


# -------------------------------------------------------------- progress
def test_progress_quiet_and_not_a_terminal(capsys) -> None:
    assert list(progress(range(3), total=3, desc="x", quiet=False)) == [0, 1, 2]  # stderr is captured: no bar
    assert list(progress(range(2), total=2, desc="x", quiet=True)) == [0, 1]
    assert capsys.readouterr().err == ""
    bar = progress_bar(total=2, desc="shown", show=True)
    bar.update(2)
    bar.close()
    assert "shown" in capsys.readouterr().err


def test_progress_needs_tqdm_only_when_asked(monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "tqdm", None)  # import tqdm now raises ImportError
    progress_bar(total=1, desc="x", show=None).close()  # quietly nothing
    with pytest.raises(MissingExtraError, match=r"demo: `progress=True` needs tqdm; install it with: pip install densemem\[progress\]"):
        progress_bar(total=1, desc="x", show=True, where="demo")


# ------------------------------------------------------ corruption kinds
def test_corruption_kinds_have_one_meaning(rng) -> None:
    x = rng.standard_normal((50, 384))
    before = x.copy()
    m = int(round(0.3 * 384))  # 115 coordinates exactly, in every row
    masked = corrupt(x, "mask", 0.3, np.random.default_rng(1))
    assert ((masked == 0).sum(axis=1) == m).all() and ((masked == 0) | (masked == x)).all()
    flipped = corrupt(x, "flip", 0.3, np.random.default_rng(1))
    assert ((flipped == -x).sum(axis=1) == m).all()
    assert np.array_equal(masked == 0, flipped == -x)  # the same draws choose the same coordinates
    # gaussian: noise norm about level * ||x|| (chi distribution with d = 384, common practice)
    noisy = corrupt(x, "gaussian", 0.5, np.random.default_rng(2))
    ratio = np.linalg.norm(noisy - x, axis=1) / np.linalg.norm(x, axis=1)
    assert float(np.mean(ratio)) == pytest.approx(0.5, rel=0.02)
    pm1 = np.where(x >= 0, 1.0, -1.0)
    erased = corrupt(pm1, "mask", 0.3, np.random.default_rng(1), binary=True, value_rng=np.random.default_rng(3))
    assert set(np.unique(erased)) == {-1.0, 1.0}
    assert np.array_equal(x, before) and CORRUPTIONS == ("gaussian", "mask", "flip", "mix")


def test_mask_never_empties_a_row() -> None:
    x = np.zeros((1, 10))
    x[0, 3] = 2.0  # one non-zero coordinate: a mask of 9 of 10 may hit it
    outs = [corrupt(x, "mask", 0.9, np.random.default_rng(s)) for s in range(20)]
    assert all((o != 0).any() for o in outs)


def test_corrupt_unknown_kind() -> None:
    with pytest.raises(InputValueError, match=r"corrupt: unknown kind 'blur'; use one of gaussian, mask, flip, mix"):
        corrupt(np.ones((1, 2)), "blur", 0.1, np.random.default_rng(0))
    with pytest.raises(InputValueError, match=r"corrupt: kind 'mix' needs `rivals`"):
        corrupt(np.ones((1, 2)), "mix", 0.1, np.random.default_rng(0))
