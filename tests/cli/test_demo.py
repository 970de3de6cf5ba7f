"""The invented-archive demo (densemem.cli.demo): its report files are written atomically."""

from __future__ import annotations

import os

import pytest

from densemem.cli import demo
from densemem.errors import InputValueError

SMALL = {"n_photos": 120, "n_queries": 20, "plots": False}


def _visible(folder):
    return sorted(p.name for p in folder.iterdir())


def test_report_files_go_through_os_replace(tmp_path, monkeypatch):
    # summary.md and tuning.txt are moved into place by os.replace from a temp file in the
    # same folder (the atomic-rename idiom, common practice); no temp file is left behind
    moved = []
    real = os.replace

    def spy(src, dst):
        moved.append((os.fspath(src), os.fspath(dst)))
        real(src, dst)

    monkeypatch.setattr(os, "replace", spy)
    rep = demo.run_demo(tmp_path / "rep", **SMALL)
    out = tmp_path / "rep"
    for name in ("summary.md", "tuning.txt"):
        src = [s for s, d in moved if d == str(out / name)]
        assert len(src) == 1 and os.path.dirname(src[0]) == str(out)
        assert (out / name).read_text(encoding="utf-8").strip()
    assert rep.files["summary"] == str(out / "summary.md")
    assert not [n for n in _visible(out) if ".tmp-" in n]


def test_rerun_replaces_demo_files_and_keeps_others(tmp_path):
    out = tmp_path / "rep"
    demo.run_demo(out, seed=0, **SMALL)
    (out / "notes.txt").write_text("mine")
    first = (out / "summary.md").read_text(encoding="utf-8")
    with pytest.raises(InputValueError, match=r"run_demo: `out` .*rep' is a folder that already holds files; "
                       r"pass overwrite=True"):
        demo.run_demo(out, seed=0, **{**SMALL, "n_queries": 30})
    assert (out / "summary.md").read_text(encoding="utf-8") == first
    demo.run_demo(out, seed=0, overwrite=True, **{**SMALL, "n_queries": 30})
    second = (out / "summary.md").read_text(encoding="utf-8")
    assert second != first
    # the query count is reported as written, not merely some number containing "30"
    assert "30 faded prints" in second and "20 faded prints" not in second
    assert "20 faded prints" in first
    assert (out / "notes.txt").read_text() == "mine"
    assert not [n for n in _visible(out) if ".tmp-" in n]


def test_failed_write_keeps_the_old_file_whole(tmp_path, monkeypatch):
    path = tmp_path / "summary.md"
    demo._write_text(path, "old report\n")
    assert path.read_text(encoding="utf-8") == "old report\n"

    def fail(fd):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(OSError, match="disk full"):
        demo._write_text(path, "new report that never lands\n")
    assert path.read_text(encoding="utf-8") == "old report\n"
    assert _visible(tmp_path) == ["summary.md"]


def test_figures_written_atomically(tmp_path):
    pytest.importorskip("matplotlib")
    from matplotlib.figure import Figure

    fig = Figure()
    fig.subplots().plot([0, 1], [1, 0])
    demo._save_figure(fig, tmp_path / "p.png")
    assert (tmp_path / "p.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (open standard)
    assert _visible(tmp_path) == ["p.png"]


def test_out_must_be_a_folder(tmp_path):
    f = tmp_path / "file.txt"
    f.write_text("keep me")
    with pytest.raises(InputValueError, match=r"run_demo: `out` must be a folder; .*file.txt' is a file"):
        demo.run_demo(f, **SMALL)
    assert f.read_text() == "keep me"
