"""Store folder: round trips, crash safety, damaged files (densemem.store)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import densemem
from densemem import DenseMemory, InputTypeError, InputValueError, StoreFormatError
from densemem.store import _folder as storage
from densemem.store import describe_store


def save_memory(mem: DenseMemory, path, **kw) -> None:  # the store's one writer, through the memory
    mem.save(path, **kw)


load_memory = DenseMemory.load


def _mem(rng: np.random.Generator, n: int = 40, d: int = 8, *, str_ids: bool = False, normalize: bool = False):
    x = rng.standard_normal((n, d)).astype(np.float32)
    ids = [f"photo-{i:04d}" for i in range(n)] if str_ids else None
    return DenseMemory.from_array(x, ids, normalize=normalize, beta=3.5)


def _same_retrieval(a: DenseMemory, b: DenseMemory, q: np.ndarray) -> None:
    ra, rb = a.retrieve(q, k=5, steps=3), b.retrieve(q, k=5, steps=3)
    # derived: the same float32 rows in the same order give bit-identical results
    np.testing.assert_array_equal(ra.states, rb.states)
    np.testing.assert_array_equal(ra.top_ids, rb.top_ids)
    np.testing.assert_array_equal(ra.energy, rb.energy)


# ------------------------------------------------------------------ round trip
@pytest.mark.parametrize("str_ids", [False, True])
@pytest.mark.parametrize("normalize", [False, True])
@pytest.mark.parametrize("mmap", [False, True])
def test_round_trip(tmp_path, rng, str_ids, normalize, mmap):
    mem = _mem(rng, str_ids=str_ids, normalize=normalize)
    path = tmp_path / "store"
    save_memory(mem, path)
    back = load_memory(path, mmap=mmap)
    assert (len(back), back.dim, back.normalize, back.beta) == (len(mem), mem.dim, mem.normalize, mem.beta)
    np.testing.assert_array_equal(back.ids, mem.ids)
    assert back.ids.dtype == mem.ids.dtype and back.ids.dtype != object
    np.testing.assert_array_equal(back.patterns, mem.patterns)
    _same_retrieval(mem, back, rng.standard_normal((6, mem.dim)).astype(np.float32))
    if mmap:  # PatternTable.trusted wraps the file mapping, no copy
        assert isinstance(back._table.x, np.memmap)


def test_mmap_store_accepts_additions_and_next_id_survives(tmp_path, rng):
    mem = _mem(rng, n=10)
    mem.remove([9])  # next free id stays 10: ids are never reused
    save_memory(mem, tmp_path / "s")
    back = DenseMemory.load(tmp_path / "s", mmap=True, verify=False)
    assert back.add(rng.standard_normal((2, mem.dim))).tolist() == [10, 11]
    assert len(back) == 11 and len(load_memory(tmp_path / "s")) == 9  # file untouched


def test_save_over_existing_and_empty_folder(tmp_path, rng):
    path = tmp_path / "s"
    path.mkdir()  # an empty folder may be used
    save_memory(_mem(rng, n=5), path)
    save_memory(_mem(rng, n=7), path, overwrite=True)
    assert len(load_memory(path)) == 7
    assert sorted(os.listdir(tmp_path)) == ["s"]  # no hidden leftovers


@pytest.mark.parametrize("kind", ["hnsw", "ivf"])
def test_index_round_trip(tmp_path, rng, kind):
    mem = _mem(rng, n=300, normalize=True)
    mem.build_index(kind)
    save_memory(mem, tmp_path / "s")
    assert (tmp_path / "s" / "index.faiss").is_file()
    info = describe_store(tmp_path / "s")
    assert info.index is not None and "index.faiss" in info.files
    q = rng.standard_normal((5, mem.dim)).astype(np.float32)
    for mmap in (False, True):
        back = load_memory(tmp_path / "s", mmap=mmap)
        assert back._index is not None
        # the same faiss structure searched twice gives the same candidates (faiss read_index/write_index)
        np.testing.assert_array_equal(back.nearest(q, k=4, index=True).ids, mem.nearest(q, k=4, index=True).ids)
        _same_retrieval(mem, back, q)


def test_stale_index_is_not_written(tmp_path, rng):
    mem = _mem(rng, n=50)
    mem.build_index("hnsw")
    mem.remove([0])
    save_memory(mem, tmp_path / "s")
    assert not (tmp_path / "s" / "index.faiss").exists()
    assert describe_store(tmp_path / "s").index is None


def test_describe_store(tmp_path, rng):
    save_memory(_mem(rng, n=12, d=5, str_ids=True), tmp_path / "s")
    info = describe_store(tmp_path / "s")
    assert (info.count, info.dim, info.id_kind, info.verified) == (12, 5, "str", True)
    assert json.loads(json.dumps(info.to_dict()))["files"]["patterns.npy"]["bytes"] > 0
    with pytest.raises(StoreFormatError, match="describe_store: there is no store folder"):
        describe_store(tmp_path / "none")


# ------------------------------------------------------------- crash safety
_CRASH_HELPER = textwrap.dedent(
    """
    import os, signal, sys, time
    import numpy as np
    from densemem import DenseMemory
    path, trials, seed = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
    rng = np.random.default_rng(seed)
    mems = [DenseMemory.from_array(np.full((n, 32), v, np.float32), beta=2.0) for n, v in ((60000, 1.0), (40000, 2.0))]
    mems[0].save(path)
    t0 = time.perf_counter(); mems[1].save(path, overwrite=True); mems[0].save(path, overwrite=True); span = (time.perf_counter() - t0) / 2
    print("ready", span, flush=True)
    for t in range(trials):
        sys.stdin.readline()
        pid = os.fork()
        if pid == 0:
            mems[(t + 1) % 2].save(path, overwrite=True)
            os._exit(0)
        time.sleep(rng.uniform(0.0, 1.1 * span))
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        print("done", int(os.WIFSIGNALED(status)), flush=True)
    """
)


def test_sigkill_during_save_leaves_old_or_new(tmp_path):
    path = tmp_path / "store"
    trials = 30
    proc = subprocess.Popen(
        [sys.executable, "-c", _CRASH_HELPER, str(path), str(trials), "7"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    try:
        assert proc.stdout.readline().startswith("ready")
        killed, seen = 0, set()
        for _ in range(trials):
            proc.stdin.write("go\n")
            proc.stdin.flush()
            line = proc.stdout.readline().split()
            assert line[0] == "done"
            killed += int(line[1])
            mem = load_memory(path, verify=True)  # must always load and verify
            content = (len(mem), float(mem.patterns[0, 0]))
            assert content in {(60000, 1.0), (40000, 2.0)}  # the old store or the new one
            assert float(mem.patterns.min()) == float(mem.patterns.max())  # no mix of the two
            seen.add(content)
    finally:
        proc.stdin.close()
        proc.wait(timeout=60)
    assert killed >= 20  # at least 20 saves really were killed part-way
    save_memory(DenseMemory.from_array(np.ones((3, 32))), path, overwrite=True)  # the next save tidies up
    assert sorted(os.listdir(tmp_path)) == ["store"]


class _Crash(BaseException):
    pass


def test_crash_at_every_filesystem_step(tmp_path, rng, monkeypatch):
    """Stop the save before each rename/delete/file write in turn (derived: enumerates every step)."""
    old, new = _mem(rng, n=8), _mem(rng, n=11)
    real = {"rename": storage._rename, "rmtree": storage.shutil.rmtree, "write": storage._write_file}
    n_steps = None
    step = 0
    while n_steps is None or step < n_steps:
        path = tmp_path / f"s{step}"
        save_memory(old, path)
        counter = {"n": 0}

        def gate(name, *args, _c=counter, _stop=step, **kw):
            if _c["n"] == _stop:
                raise _Crash
            _c["n"] += 1
            return real[name](*args, **kw)

        monkeypatch.setattr(storage, "_rename", lambda *a: gate("rename", *a))
        monkeypatch.setattr(storage.shutil, "rmtree", lambda *a, **k: gate("rmtree", *a, **k))
        monkeypatch.setattr(storage, "_write_file", lambda *a: gate("write", *a))
        try:
            save_memory(new, path, overwrite=True)
            finished = True
        except _Crash:
            finished = False
        monkeypatch.undo()
        got = load_memory(path)
        assert len(got) in (8, 11)
        np.testing.assert_array_equal(got.patterns, (old if len(got) == 8 else new).patterns)
        save_memory(new, path, overwrite=True)  # recovery then a clean save
        assert len(load_memory(path)) == 11
        if finished:
            n_steps = step
        step += 1
    assert n_steps is not None and n_steps >= 6


def test_load_reads_next_when_crashed_between_renames(tmp_path, rng):
    """Simulate the state between protocol steps 4 and 5: only prev and next exist."""
    path = tmp_path / "s"
    save_memory(_mem(rng, n=4), path)
    save_memory(_mem(rng, n=6), tmp_path / "other")
    os.rename(path, tmp_path / ".s.densemem-prev")
    os.rename(tmp_path / "other", tmp_path / ".s.densemem-next")
    before = sorted(os.listdir(tmp_path))
    assert len(load_memory(path)) == 6
    assert sorted(os.listdir(tmp_path)) == before  # loading changes nothing on disk
    save_memory(_mem(rng, n=9), path, overwrite=True)
    assert sorted(os.listdir(tmp_path)) == ["s"]


# ---------------------------------------------------------------- bad stores
def _rewrite_manifest(path: Path, **changes) -> None:
    man = json.loads((path / "manifest.json").read_text())
    man.update(changes)
    (path / "manifest.json").write_text(storage.manifest_text(man))  # re-sealed: only the edit is wrong


def _replace_array(path: Path, name: str, arr: np.ndarray, *, pickle: bool = False) -> None:
    """Write an array file and update the manifest's checksum so only the content is wrong."""
    np.save(path / name, arr, allow_pickle=pickle)
    man = json.loads((path / "manifest.json").read_text())
    man["files"][name] = {"sha256": storage._sha256(path / name), "bytes": (path / name).stat().st_size}
    (path / "manifest.json").write_text(storage.manifest_text(man))  # re-sealed: only the edit is wrong


@pytest.fixture
def store(tmp_path, rng) -> Path:
    path = tmp_path / "s"
    save_memory(_mem(rng, n=20), path)
    return path


def test_flipped_byte_is_a_checksum_error(store):
    raw = bytearray((store / "patterns.npy").read_bytes())
    raw[-5] ^= 0x40
    (store / "patterns.npy").write_bytes(bytes(raw))
    with pytest.raises(StoreFormatError, match=r"checksum mismatch in .*patterns\.npy"):
        load_memory(store)
    assert len(load_memory(store, verify=False)) == 20  # verify=False skips hashing (sizes still checked)


def test_truncated_file(store):
    raw = (store / "ids.npy").read_bytes()
    (store / "ids.npy").write_bytes(raw[:-8])
    with pytest.raises(StoreFormatError, match=r"ids\.npy.* bytes but the manifest says"):
        load_memory(store, verify=False)


def test_bad_version(store):
    _rewrite_manifest(store, format_version=99)
    with pytest.raises(StoreFormatError, match=r"manifest\.json.*format_version 99.*reads version 2"):
        load_memory(store)


class _Trap:
    """Unpickling this would create a marker file."""

    marker = ""

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def test_object_ids_are_refused_and_never_unpickled(store):
    trap = _Trap()
    trap.marker = str(store.parent / "EXECUTED")
    _replace_array(store, "ids.npy", np.array([trap] * 20, dtype=object), pickle=True)
    for mmap in (False, True):
        with pytest.raises(StoreFormatError, match=r"ids\.npy.*object array.*never unpickles"):
            load_memory(store, mmap=mmap)
    assert not (store.parent / "EXECUTED").exists()


def test_missing_file_and_missing_store(store, tmp_path):
    (store / "ids.npy").unlink()
    with pytest.raises(StoreFormatError, match=r"store file .*ids\.npy.* is missing"):
        load_memory(store)
    (store / "manifest.json").unlink()
    with pytest.raises(StoreFormatError, match=r"no manifest\.json"):
        load_memory(store)
    with pytest.raises(StoreFormatError, match="there is no store folder at"):
        load_memory(tmp_path / "nothing")
    (tmp_path / "f").write_text("x")
    with pytest.raises(StoreFormatError, match="is not a folder"):
        load_memory(tmp_path / "f")


@pytest.mark.parametrize(
    ("content", "match"),
    [
        ("{not json", "is not valid JSON"),
        ('{"format": "something-else"}', "is not a densemem-store manifest"),
        ('["a"]', "is not a densemem-store manifest"),
    ],
)
def test_bad_manifest_text(store, content, match):
    (store / "manifest.json").write_text(content)
    with pytest.raises(StoreFormatError, match=match):
        load_memory(store)


@pytest.mark.parametrize(
    ("changes", "match"),
    [
        ({"dim": "eight"}, "bad 'dim' entry"),
        ({"count": True}, "bad 'count' entry"),
        ({"count": 21}, r"has shape \(20, 8\) but the manifest says \(21, 8\)"),
        ({"id_kind": "str"}, r"ids\.npy.* must hold 20 ids of kind str"),
        ({"index": {"file": "../x"}}, "bad 'index' entry"),
    ],
)
def test_manifest_entries_checked(store, changes, match):
    _rewrite_manifest(store, **changes)
    with pytest.raises(StoreFormatError, match=match):
        load_memory(store)


def test_manifest_without_checksum(store):
    man = json.loads((store / "manifest.json").read_text())
    del man["files"]["patterns.npy"]
    (store / "manifest.json").write_text(storage.manifest_text(man))  # re-sealed: only the edit is wrong
    with pytest.raises(StoreFormatError, match=r"no checksum for 'patterns\.npy'"):
        load_memory(store)


@pytest.mark.parametrize(
    ("name", "arr", "match"),
    [
        ("patterns.npy", np.zeros((20, 8)), r"patterns\.npy.* C-ordered float32 matrix; got float64"),
        ("patterns.npy", np.asfortranarray(np.zeros((20, 8), np.float32)), "C-ordered float32"),
        ("ids.npy", np.zeros(20, np.int64), r"ids\.npy.* repeats an id"),
        ("ids.npy", np.arange(20, dtype=np.int32), r"ids\.npy.* must hold 20 ids of kind int64"),
    ],
)
def test_wrong_arrays(store, name, arr, match):
    _replace_array(store, name, arr)
    with pytest.raises(StoreFormatError, match=match):
        load_memory(store)


def test_not_an_npy_file(store):
    (store / "ids.npy").write_bytes(b"garbage!" * 10)
    _replace_array_checksum_only(store, "ids.npy")
    with pytest.raises(StoreFormatError, match=r"ids\.npy.* is not a readable \.npy file"):
        load_memory(store)
    raw = (store / "patterns.npy").read_bytes()
    (store / "ids.npy").write_bytes(raw[:-40])  # a valid header whose data is cut short
    _replace_array_checksum_only(store, "ids.npy")
    with pytest.raises(StoreFormatError, match=r"ids\.npy.* is not a readable \.npy file"):
        load_memory(store)


def _replace_array_checksum_only(path: Path, name: str) -> None:
    man = json.loads((path / "manifest.json").read_text())
    man["files"][name] = {"sha256": storage._sha256(path / name), "bytes": (path / name).stat().st_size}
    (path / "manifest.json").write_text(storage.manifest_text(man))  # re-sealed: only the edit is wrong


def test_unreadable_index_file(store, monkeypatch):
    (store / "index.faiss").write_bytes(b"not an index")
    _replace_array_checksum_only(store, "index.faiss")
    _rewrite_manifest(store, index={"file": "index.faiss", "meta": {}})
    monkeypatch.setattr(DenseMemory, "_restore_index", lambda self, meta, idx: None, raising=False)
    with pytest.raises(StoreFormatError, match=r"index\.faiss.* is not a readable faiss index"):
        load_memory(store)


# ---------------------------------------------------------------- bad saves
def test_save_refusals(tmp_path, rng):
    mem = _mem(rng, n=3)
    with pytest.raises(InputTypeError, match="DenseMemory.save: `path` must be a str or os.PathLike; got int"):
        save_memory(mem, 5)
    with pytest.raises(InputValueError, match="`path` must name a folder; got '.'"):
        save_memory(mem, ".")
    with pytest.raises(InputValueError, match="parent folder of `path` does not exist"):
        save_memory(mem, tmp_path / "no" / "s")
    (tmp_path / "file").write_text("keep me")
    with pytest.raises(InputValueError, match="exists and is not a folder; refusing"):
        save_memory(mem, tmp_path / "file")
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("keep me")
    with pytest.raises(InputValueError, match="is a folder that is not a densemem store; refusing"):
        save_memory(mem, tmp_path / "mine")
    assert (tmp_path / "mine" / "notes.txt").read_text() == "keep me"
    save_memory(mem, tmp_path / "s")
    with pytest.raises(InputValueError, match="a store already exists at .* overwrite=False"):
        mem.save(tmp_path / "s", overwrite=False)
    assert densemem.DenseMemory.load(tmp_path / "s").dim == 8


# ---------------------------------------------------------------- the recorded max norm
def test_max_norm_recorded_and_read_without_a_pass(tmp_path, rng, monkeypatch):
    x = (rng.standard_normal((300, 16)) * 3).astype(np.float16)
    mem = DenseMemory.from_array(x, normalize=False, dtype="float16")
    path = tmp_path / "s"
    save_memory(mem, path)
    man = json.loads((path / "manifest.json").read_text())
    # reference: float64 norms by NumPy of the stored values (every half is exact in float64)
    want = float(np.sqrt((np.asarray(mem.patterns, np.float64) ** 2).sum(axis=1)).max())
    assert man["max_norm"] == want
    import densemem.dense as dense_module

    def no_pass(_x):
        raise AssertionError("the max norm was recomputed over the rows")

    monkeypatch.setattr(dense_module, "max_row_norm", no_pass)
    mapped = load_memory(path, mmap=True)
    assert mapped.max_norm == want
    mapped.retrieve(np.asarray(mem.patterns[:3], np.float32), beta=2.0)  # the stop rule reads it


def test_store_without_max_norm_still_loads(store):
    man = json.loads((store / "manifest.json").read_text())
    want = man.pop("max_norm")
    (store / "manifest.json").write_text(storage.manifest_text(man))
    assert load_memory(store, mmap=True).max_norm == want  # computed from the rows, as before


@pytest.mark.parametrize("bad", [-1.0, "2", True, [1.0]])
def test_bad_max_norm_refused(store, bad):
    _rewrite_manifest(store, max_norm=bad)
    with pytest.raises(StoreFormatError, match="max_norm"):
        load_memory(store)
