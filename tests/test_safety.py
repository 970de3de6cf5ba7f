"""Nothing wrong, nothing lost: regression tests for bad input, overflow, damaged files and races.

Each test is one failure once seen (a crash, a raw exception naming no argument, a silently
wrong result or a race) turned into a clear densemem error or a correct result.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import numpy as np
import pytest

import densemem
from densemem import DenseMemory, InputTypeError, InputValueError, StoreFormatError, plan_duplicates
from densemem._validation import (
    check_finite_result,
    check_index_params,
    check_nearest_range,
    check_search_sizes,
    check_seed,
    max_row_norm,
)
from densemem.errors import StoreBusyError
from densemem.store import _folder as storage


# ----------------------------------------------------------------- faiss guards
def test_hnsw_m_below_two_is_refused_before_faiss() -> None:
    # faiss's HNSW graph build with M = 1 kills the interpreter (seen 6 of 6); run in a child
    # process so a regression shows as a failed test, not a dead test run.
    code = textwrap.dedent(
        """
        import numpy as np, densemem
        try:
            densemem.DenseMemory.from_array(np.eye(3)).build_index("hnsw", M=1)
        except densemem.InputValueError as exc:
            print("refused:", exc)
        """
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=Path(__file__).resolve().parents[1])
    assert out.returncode == 0, out.stderr
    assert "refused: DenseMemory.build_index: `M` must be an integer >= 2; got 1." in out.stdout


@pytest.mark.parametrize(
    "kind, params, exc, match",
    [
        ("hnsw", {"M": 513}, InputValueError, r"`M` must be an integer in \[2, 512\]; got 513"),
        ("hnsw", {"ef_search": 2**31}, InputValueError, r"`ef_search` must be an integer in \[1, 2147483647\]"),
        ("hnsw", {"ef_construction": 0}, InputValueError, r"`ef_construction` must be an integer >= 1; got 0"),
        ("hnsw", {"nlist": 4}, InputValueError, r"unknown hnsw option\(s\) \['nlist'\]"),
        ("ivf", {"seed": 2**40}, InputValueError, r"`seed` must be an int in \[0, 2147483647\]; got 1099511627776"),
        ("ivf", {"seed": -1}, InputValueError, r"`seed` must be an int in \[0, 2147483647\]; got -1"),
        ("ivf", {"seed": 1.5}, InputTypeError, r"`seed` must be an int in \[0, 2147483647\]; got float 1.5"),
        ("ivf", {"nprobe": True}, InputTypeError, r"`nprobe` must be an integer >= 1; got bool True"),
        ("flat", {}, InputValueError, r"`kind` must be 'hnsw' or 'ivf'; got 'flat'"),
    ],
)
def test_index_parameters_checked_at_the_boundary(kind, params, exc, match) -> None:
    mem = DenseMemory.from_array(np.eye(8))
    with pytest.raises(exc, match=r"DenseMemory\.build_index: " + match):
        mem.build_index(kind, **params)
    with pytest.raises(exc, match=match):
        check_index_params(kind, params, where="DenseMemory.build_index")


@pytest.mark.parametrize(
    "seed, exc, match",
    [
        ("x", InputTypeError, r"plan_duplicates: `seed` must be an int in \[0, 2147483647\]; got str 'x'"),
        (1.5, InputTypeError, r"plan_duplicates: `seed` must be an int in \[0, 2147483647\]; got float 1.5"),
        (-1, InputValueError, r"plan_duplicates: `seed` must be an int in \[0, 2147483647\]; got -1"),
        (True, InputTypeError, r"plan_duplicates: `seed` must be an int in \[0, 2147483647\]; got bool True"),
    ],
)
def test_plan_duplicates_seed_rule(seed, exc, match, rng) -> None:
    x = rng.standard_normal((200, 16))
    with pytest.raises(exc, match=match):
        plan_duplicates(x, 0.9, candidates="ivf", seed=seed)


@pytest.mark.parametrize(
    "kw, match",
    [
        ({"nprobe": 2**40}, r"`nprobe` must be an integer in \[1, 2147483647\]; got 1099511627776"),
        ({"nlist": 201}, r"`nlist` must be at most the number of rows \(200, or 64 for fewer rows\); got 201"),
        ({"nprobe": 2**30}, r"`nprobe` must be at most the number of rows \(200, or 64 for fewer rows\); got 1073741824"),
        ({"k": 2**31}, r"`k` must be an integer in \[1, 2147483647\]; got 2147483648"),
    ],
)
def test_plan_duplicates_sizes_checked_before_faiss(kw, match, rng) -> None:
    # nprobe = 2**40 once asked numpy for 1.17 PiB (MemoryError) instead of a clear error
    with pytest.raises(InputValueError, match="plan_duplicates: " + match):
        plan_duplicates(rng.standard_normal((200, 16)), 0.9, candidates="ivf", **kw)
    with pytest.raises(InputValueError, match=match):
        check_search_sizes(200, where="plan_duplicates", **kw)


def test_one_seed_rule() -> None:
    assert check_seed(np.int64(7), where="w") == 7
    with pytest.raises(InputValueError, match=r"w: `seed` must be an int in \[0, 2147483647\]; got 2147483648"):
        check_seed(2**31, where="w")
    with pytest.raises(InputTypeError, match=r"w: `seed` must be an int in \[0, 2147483647\]; got NoneType None"):
        check_seed(None, where="w")


# --------------------------------------------------------------------- strict ids
@pytest.fixture
def mem3() -> DenseMemory:
    return DenseMemory.from_array(np.eye(3))


@pytest.mark.parametrize(
    "ids, exc, match",
    [
        (None, InputTypeError, r"`ids` must be an id or a list of ids \(int or str\); got None"),
        ([[0], [1]], InputValueError, r"`ids` must be a flat list of ids; entry 0 is a list"),
        (np.array([[0, 1]]), InputValueError, r"`ids` must be a flat list of ids \(1-D\); got shape \(1, 2\)"),
        (True, InputTypeError, r"every entry of `ids` must be an int or a str; entry 0 is bool True"),
        ([0.0], InputTypeError, r"every entry of `ids` must be an int or a str; entry 0 is float 0.0"),
        (np.array([1.0]), InputTypeError, r"every entry of `ids` must be an int or a str; entry 0 is float 1.0"),
        ([0, "a"], InputTypeError, r"`ids` must be all integers or all strings; got a mix of ints and strings"),
        ({0: 1}, InputTypeError, r"`ids` must be an id or a list of ids \(int or str\); got dict"),
        (2**63, InputValueError, r"`ids` must fit in int64 \(\|id\| < 2\*\*63\); got 9223372036854775808"),
    ],
)
def test_remove_refuses_what_is_not_an_id(mem3, ids, exc, match) -> None:
    # once: len(None) and unhashable-list errors; remove(True) removed id 1, remove([0.0]) id 0
    with pytest.raises(exc, match=r"DenseMemory\.remove: " + match):
        mem3.remove(ids)
    assert mem3.ids.tolist() == [0, 1, 2]


def test_remove_takes_a_generator(mem3) -> None:
    assert mem3.remove(i for i in [0]) == 1 and mem3.ids.tolist() == [1, 2]


def test_str_memory_refuses_int_ids() -> None:
    # once: remove([0, "a"]) on a str-id memory removed the id "0"
    mem = DenseMemory.from_array(np.eye(3), ids=["0", "a", "b"])
    with pytest.raises(InputTypeError, match=r"DenseMemory\.remove: `ids` must be all integers or all strings"):
        mem.remove([0, "a"])
    with pytest.raises(InputTypeError, match=r"DenseMemory\.remove: the memory uses str ids; got int `ids`"):
        mem.remove([0])
    with pytest.raises(InputTypeError, match=r"DenseMemory\.positions: the memory uses str ids; got int `ids`"):
        mem.positions(0)
    assert mem.ids.tolist() == ["0", "a", "b"]


def test_uint64_ids_beyond_int64_refused() -> None:
    # once stored as negative numbers
    big = np.array([2**63, 1, 2], dtype=np.uint64)
    with pytest.raises(InputValueError, match=r"DenseMemory\.from_array: `ids` must fit in int64 \(ids < 2\*\*63\); got 9223372036854775808 \(dtype uint64\)"):
        DenseMemory.from_array(np.eye(3), ids=big)
    with pytest.raises(InputValueError, match=r"DenseMemory\.add: `ids` must fit in int64"):
        DenseMemory(3).add(np.eye(1, 3), ids=[2**64 - 1])
    ok = DenseMemory.from_array(np.eye(3), ids=np.array([2**63 - 1, 1, 2], dtype=np.uint64))
    assert ok.ids.tolist() == [2**63 - 1, 1, 2] and ok.ids.dtype == np.int64


def test_bool_ids_refused_on_add() -> None:
    with pytest.raises(InputTypeError, match=r"DenseMemory\.from_array: every entry of `ids` must be an int or a str; entry 0 is bool True"):
        DenseMemory.from_array(np.eye(2), ids=[True, False])


# ------------------------------------------------------------------------ numerics
def test_max_norm_in_float64() -> None:
    # Reference: numpy's float64 norm (common practice). float32 squares overflow past
    # 1.8e19 and underflow below 1e-23 (IEEE 754 single precision, common practice).
    for scale in (1e38, 1e-30):
        x = np.full((4, 16), scale, dtype=np.float32)
        ref = float(np.linalg.norm(x.astype(np.float64), axis=1).max())
        mem = DenseMemory.from_array(x)
        assert mem.max_norm == pytest.approx(ref, rel=1e-12) and 0 < mem.max_norm < np.inf
        assert max_row_norm(x) == pytest.approx(ref, rel=1e-12)


def test_beta_beyond_float32_refused_for_any_norms() -> None:
    # once: beta above the float32 range with small norms gave NaN states
    mem = DenseMemory.from_array(1e-30 * np.eye(3))
    with pytest.raises(InputValueError, match=r"DenseMemory\.retrieve: `beta` = 1e\+38 is beyond the float32 score range"):
        mem.retrieve([1e-30, 0.0, 0.0], beta=1e38)
    with pytest.raises(InputValueError, match=r"DenseMemory\.energy: `beta` = 1e\+38 is beyond the float32 score range"):
        mem.energy([1e-30, 0.0, 0.0], beta=1e38)


def test_huge_query_refused_not_a_near_hang(rng) -> None:
    # once: a query of 1e38 over >= 2048 rows gave NaN states (faiss scores overflow float32) and,
    # NaN never counting as converged, steps=10**12 ran on. Now the raw scores |q| * M are checked.
    mem = DenseMemory.from_array(rng.standard_normal((2100, 16)).astype(np.float32))
    q = np.full(16, 1e38, dtype=np.float32)
    for method in ("auto", "certified", "exact"):
        with pytest.raises(InputValueError, match=r"DenseMemory\.retrieve: the largest query norm \(4e\+38\) times the largest stored norm .* exceeds the float32 score range"):
            mem.retrieve(q, beta=1e-30, steps=10**12, method=method)


def test_nearest_range_check() -> None:
    # for DenseMemory.nearest: faiss gives inf inner products and saturated (3.4e38) L2 distances
    # for a query of 1e38 (IEEE 754 single precision, common practice)
    check_nearest_range(1.0, 1.0, "l2", where="w")
    with pytest.raises(InputValueError, match=r"w: the largest query norm \(2.2e\+38\) and stored norm \(1\) give ip scores \|q\| \* M = 2.2e\+38 beyond the float32 range"):
        check_nearest_range(2.2e38, 1.0, "ip", where="w")
    with pytest.raises(InputValueError, match=r"w: .* give l2 scores \(\|q\| \+ M\)\^2 = 1e\+40 beyond the float32 range"):
        check_nearest_range(1e20, 0.0, "l2", where="w")


def test_finite_result_check() -> None:
    check_finite_result(np.zeros((2, 2)), what="states", where="w")
    bad = np.zeros((2, 2))
    bad[1, 0] = np.nan
    with pytest.raises(InputValueError, match=r"w: the states left the float range \(NaN or infinity at index \(1, 0\)\)"):
        check_finite_result(bad, what="states", where="w")


def _mp_energy(x: np.ndarray, xi: np.ndarray, beta: float, mp) -> float:
    """E = -lse(beta, X xi)/beta + xi.xi/2 + log(N)/beta + M^2/2 in 400-digit arithmetic.

    Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021, arXiv:2008.02217, eq. (2).
    """
    mp.mp.dps = 400  # beta = 5e-324 needs about 330 digits for lse - log N
    rows = [[mp.mpf(float(v)) for v in r] for r in x]
    q = [mp.mpf(float(v)) for v in xi]
    scores = [mp.fsum(a * b for a, b in zip(r, q)) for r in rows]
    b = mp.mpf(beta)
    lse_gap = mp.log(mp.fsum(mp.exp(b * s) for s in scores) / len(scores))
    m2 = max(mp.fsum(v * v for v in r) for r in rows)
    return float(-lse_gap / b + mp.fsum(v * v for v in q) / 2 + m2 / 2)


@pytest.mark.parametrize("beta", [5e-324, 1e-300, 1e-20, 1e-16, 1e-13, 1e-8, 1e-4, 1e-2])
def test_energy_exact_at_tiny_beta(digits_unit, beta) -> None:
    # once: at beta = 1e-13 the energy was off in the 4th digit, 2.5 instead of 2.67 at 1e-16,
    # 0.5 at <= 1e-20 and NaN at 5e-324 (float64 cancellation in lse - log N). Reference:
    # mpmath at 400 digits on the same float32 rows (UCI digits via scikit-learn).
    mp = pytest.importorskip("mpmath")
    x = digits_unit[:60]
    mem = DenseMemory.from_array(x)
    xi = digits_unit[100].astype(np.float64)
    got = mem.energy(xi.astype(np.float32), beta=beta)
    assert got == pytest.approx(_mp_energy(x, xi.astype(np.float32), beta, mp), rel=1e-12)


def test_energy_tiny_beta_limit_is_the_mean_score() -> None:
    # Limit beta -> 0 of lse(beta, s)/beta - log(N)/beta is the mean score (the first cumulant;
    # common practice): on np.eye(3) with xi = e_0 the energy tends to -1/3 + 1/2 + 1/2 = 2/3.
    mem = DenseMemory.from_array(np.eye(3))
    for beta in (5e-324, 1e-200, 1e-20):
        assert mem.energy([1.0, 0.0, 0.0], beta=beta) == pytest.approx(2.0 / 3.0, rel=1e-14)


# --------------------------------------------------------------------------- files
@pytest.fixture
def saved(tmp_path, rng) -> tuple[Path, DenseMemory]:
    mem = DenseMemory.from_array(rng.standard_normal((50, 8)), beta=7.5)
    path = tmp_path / "store"
    mem.save(path)
    return path, mem


def test_every_manifest_byte_flip_is_caught(saved) -> None:
    # once: one flipped byte changed the stored beta (7.5 -> 6.5) or the next id and loaded silently
    path, mem = saved
    mpath = path / "manifest.json"
    raw = mpath.read_bytes()
    silent = []
    for i in range(len(raw)):
        flipped = bytearray(raw)
        flipped[i] ^= 0x01
        mpath.write_bytes(bytes(flipped))
        for verify in (True, False):
            try:
                got = DenseMemory.load(path, verify=verify)
            except StoreFormatError:
                continue
            same = (got.beta == mem.beta and got.ids.tolist() == mem.ids.tolist()
                    and got._table._next_id == mem._table._next_id and np.array_equal(got.patterns, mem.patterns))
            if not same:
                silent.append(i)
    mpath.write_bytes(raw)
    assert silent == []
    assert DenseMemory.load(path).beta == 7.5


def test_manifest_checksum_names_the_file(saved) -> None:
    path, _ = saved
    text = (path / "manifest.json").read_text().replace('"beta": 7.5', '"beta": 6.5')
    (path / "manifest.json").write_text(text)
    with pytest.raises(StoreFormatError, match=r"DenseMemory\.load: '.*manifest\.json' does not match its own checksum \(manifest_sha256\)"):
        DenseMemory.load(path, verify=False)
    with pytest.raises(StoreFormatError, match=r"describe_store: '.*manifest\.json' does not match its own checksum"):
        densemem.store.describe_store(path, verify=False)


def test_version_one_store_still_loads(saved) -> None:
    import json

    path, mem = saved
    man = json.loads((path / "manifest.json").read_text())
    del man["manifest_sha256"]
    man["format_version"] = 1  # as written before the self-checksum
    (path / "manifest.json").write_text(json.dumps(man))
    assert DenseMemory.load(path).ids.tolist() == mem.ids.tolist()
    man["manifest_sha256"] = "0" * 64  # a version-1 manifest never carries one: damaged
    (path / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(StoreFormatError, match=r"does not match its own checksum"):
        DenseMemory.load(path)


def _claiming_header(real: bytes, shape: tuple[int, ...]) -> bytes:
    """The same .npy bytes with a header (of the same length) claiming ``shape``."""
    import ast

    hlen = int.from_bytes(real[8:10], "little")
    header = ast.literal_eval(real[10 : 10 + hlen].decode("latin1"))
    header["shape"] = shape
    text = repr(header).encode("latin1")
    assert len(text) < hlen
    return real[:10] + text.ljust(hlen - 1) + b"\n" + real[10 + hlen :]


def test_npy_claiming_256_gib_refused_before_allocation(tmp_path) -> None:
    # once: MemoryError (the claimed size was not compared with the file size first)
    p = tmp_path / "v.npy"
    np.save(p, np.eye(4, dtype=np.float32))
    p.write_bytes(_claiming_header(p.read_bytes(), (2**20, 2**16)))  # 2^36 float32 = 256 GiB
    with pytest.raises(InputValueError, match=r"read_embeddings: '.*v\.npy' is not a valid \.npy file \(its header claims 274877906944 bytes of data but the file holds 64\)"):
        densemem.read_embeddings(p)


def test_store_npy_claiming_more_than_the_file(saved) -> None:
    path, _ = saved
    raw = (path / "patterns.npy").read_bytes()
    (path / "patterns.npy").write_bytes(_claiming_header(raw, (2**20, 2**16)))
    with pytest.raises(StoreFormatError, match=r"DenseMemory\.load: '.*patterns\.npy' is not a readable \.npy file \(its header claims 274877906944 bytes"):
        DenseMemory.load(path, verify=False, mmap=True)


def _reader_escapes(p: Path, variants, **read) -> list[str]:
    """Write each damaged variant of ``p`` and read it: list what is not the reader's own error."""
    raw, escapes = p.read_bytes(), []
    for where, data in variants:
        p.write_bytes(data)
        try:
            densemem.read_embeddings(p, **read)
        except (InputValueError, InputTypeError) as exc:
            if p.name not in str(exc):
                escapes.append(f"byte {where}: does not name the file: {exc}")
        except Exception as exc:  # noqa: BLE001 -- the point: nothing else may escape
            escapes.append(f"byte {where}: {type(exc).__name__}: {exc}")
    p.write_bytes(raw)
    return escapes


def _set_byte(raw: bytes, i: int, value: int) -> bytes:
    out = bytearray(raw)
    out[i] = value
    return bytes(out)


def test_npy_and_npz_byte_flips_give_the_readers_error(tmp_path) -> None:
    # found by the fuzz harness: a damaged .npy header (a Python literal) raised SyntaxError or
    # tokenize.TokenError, a damaged .npz RuntimeError ("encrypted") or NotImplementedError
    x = np.arange(24, dtype=np.float32).reshape(6, 4)
    npy, npz = tmp_path / "e.npy", tmp_path / "e.npz"
    np.save(npy, x)
    np.savez(npz, vectors=x, ids=np.arange(6))
    raw = npy.read_bytes()
    header_damage = [(i, _set_byte(raw, i, v)) for i in range(128) for v in (0x00, ord("("), ord("'"))]
    raw = npz.read_bytes()
    zip_damage = [(i, _set_byte(raw, i, raw[i] ^ v)) for i in range(len(raw)) for v in (0x01, 0xFF)]
    assert _reader_escapes(npy, header_damage) == []
    assert _reader_escapes(npz, zip_damage) == []


def test_parquet_byte_flips_give_the_readers_error(tmp_path, digits) -> None:
    # once: UnicodeDecodeError from 36 of 2,511 single-byte flips
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    p = tmp_path / "e.parquet"
    table = pa.table({"vec": list(digits[:12, :8].astype(np.float32)), "name": [f"row-{i}" for i in range(12)]})
    pq.write_table(table, p)
    raw = p.read_bytes()
    assert _reader_escapes(p, [(i, _set_byte(raw, i, raw[i] ^ 0xFF)) for i in range(len(raw))], id_column="name") == []


def test_csv_field_beyond_the_csv_limit(tmp_path) -> None:
    # Python's csv module refuses fields over csv.field_size_limit() (131072 characters by default)
    p = tmp_path / "e.csv"
    p.write_text("1,2\n3," + "4" * 200_000 + "\n")
    with pytest.raises(InputValueError, match=r"read_embeddings: '.*e\.csv' is not readable as delimited text \(field larger than field limit"):
        densemem.read_embeddings(p)


# ---------------------------------------------------------------------- concurrency
def test_retrievals_see_one_snapshot_while_another_thread_removes() -> None:
    # once: readers racing remove got top ids shifted by the removed count (~1 read in 1000).
    # Row j is the unit vector e_j (width 256) with id j: a query e_j has its weight on id j
    # whenever j is stored, so a confident answer naming another id is a torn read.
    n = 256
    mem = DenseMemory.from_array(np.eye(n, dtype=np.float32), beta=60.0)
    stop = threading.Event()
    torn: list[tuple[int, int]] = []
    errors: list[BaseException] = []

    def writer() -> None:
        r = np.random.default_rng(1)
        while not stop.is_set():
            gone = r.choice(n, 8, replace=False)
            mem.remove(gone.tolist())
            mem.add(np.eye(n, dtype=np.float32)[gone], ids=gone.tolist())

    def reader(seed: int) -> None:
        r = np.random.default_rng(seed)
        try:
            for _ in range(40):
                want = r.choice(n, 16, replace=False)
                res = mem.retrieve(np.eye(n, dtype=np.float32)[want], k=1, method="exact", return_energy=False)
                for j, t, w in zip(want, res.top_ids[:, 0], res.top_weights[:, 0]):
                    if w > 0.5 and t != j:
                        torn.append((int(j), int(t)))
        except BaseException as exc:  # noqa: BLE001 -- reported below
            errors.append(exc)

    threads = [threading.Thread(target=reader, args=(s,)) for s in range(4)]
    w = threading.Thread(target=writer)
    w.start()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    stop.set()
    w.join()
    assert errors == [] and torn == []
    assert sorted(mem.ids.tolist()) == list(range(n))


def test_table_snapshot_pairs_rows_and_ids() -> None:
    mem = DenseMemory.from_array(np.arange(12, dtype=np.float32).reshape(6, 2))
    snap = mem._table.snapshot()
    mem.remove([0, 1])
    assert snap.x.shape == (6, 2) and snap.ids.tolist() == list(range(6))  # the old moment, whole
    with mem._table.pinned() as pinned:
        mem.remove([2])  # this thread changes it: the pinned reads keep the moment they started with
        assert len(mem._table) == 4 and pinned.ids.tolist() == [2, 3, 4, 5]
    assert mem.ids.tolist() == [3, 4, 5]


def test_two_saves_one_wins_whole_the_other_gets_a_clear_error(tmp_path, rng, monkeypatch) -> None:
    first = DenseMemory.from_array(rng.standard_normal((40, 8)), beta=2.0)
    second = DenseMemory.from_array(rng.standard_normal((30, 8)), beta=3.0)
    path = tmp_path / "store"
    inside, release = threading.Event(), threading.Event()
    real_fill = storage._fill_folder

    def slow_fill(memory, tmp):
        inside.set()
        assert release.wait(30)
        real_fill(memory, tmp)

    monkeypatch.setattr(storage, "_fill_folder", slow_fill)
    t = threading.Thread(target=first.save, args=(path,))
    t.start()
    assert inside.wait(30)
    monkeypatch.setattr(storage, "_fill_folder", real_fill)
    with pytest.raises(StoreBusyError, match=r"DenseMemory\.save: another save to '.*store' is running .* nothing was written"):
        second.save(path, overwrite=True)
    release.set()
    t.join()
    got = DenseMemory.load(path)
    assert got.beta == 2.0 and np.array_equal(got.patterns, first.patterns)
    assert sorted(os.listdir(tmp_path)) == ["store"]  # no lock or temp file left beside it
    second.save(path, overwrite=True)  # the lock is free again
    assert DenseMemory.load(path).beta == 3.0


def test_save_lock_across_processes(tmp_path, rng) -> None:
    path = tmp_path / "store"
    holder = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import sys
            from pathlib import Path
            from densemem.store._folder import save_lock
            with save_lock(Path({str(path)!r}), "holder"):
                print("held", flush=True)
                sys.stdin.readline()
        """)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, cwd=Path(__file__).resolve().parents[1],
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        mem = DenseMemory.from_array(rng.standard_normal((10, 4)))
        with pytest.raises(StoreBusyError, match=r"DenseMemory\.save: another save to .* is running"):
            mem.save(path)
        assert not path.exists()
    finally:
        holder.communicate("\n", timeout=60)
    mem.save(path)
    assert len(DenseMemory.load(path)) == 10


def test_spec_seeds_follow_the_seed_rule() -> None:
    # once: run_benchmark(seed=2**31) reached faiss's C int (cp.seed) and overflowed
    with pytest.raises(InputValueError, match=r"run_benchmark: bad option `seed`: input should be less than or equal to 2147483647"):
        densemem.run_benchmark(seed=2**31)
    from densemem.capacity import CapacitySpec

    with pytest.raises(ValueError, match=r"less than or equal to 2147483647"):
        CapacitySpec(models=["hebbian"], dims=[8], seed=2**31)
