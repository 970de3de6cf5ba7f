"""Embedding readers (densemem.store) against files written by numpy, pyarrow and csv."""

from __future__ import annotations

import builtins
import csv

import numpy as np
import pytest

from densemem import InputTypeError, InputValueError, MissingExtraError
from densemem.store import EmbeddingTable, read_embeddings

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")


@pytest.fixture
def small(digits):
    """First 50 rows of scikit-learn's digits (real data; integers 0..16 survive every format exactly)."""
    return digits[:50]


def _write_csv(path, rows, delim=","):
    with open(path, "w", newline="") as fh:
        csv.writer(fh, delimiter=delim).writerows(rows)


def test_npy(tmp_path, small):
    np.save(tmp_path / "v.npy", small.astype(np.float64))
    emb = read_embeddings(tmp_path / "v.npy")
    np.testing.assert_array_equal(emb.vectors, small)
    assert emb.vectors.dtype == np.float32 and emb.ids is None and emb.kind == "npy"
    assert emb.to_dict()["n_rows"] == 50 and "n_rows=50" in repr(emb)
    assert isinstance(emb, EmbeddingTable)


def test_npz_named_and_ambiguous(tmp_path, small):
    names = np.array([f"scan-{i}" for i in range(50)])
    np.savez(tmp_path / "one.npz", vectors=small, names=names)
    emb = read_embeddings(tmp_path / "one.npz", id_column="names")
    np.testing.assert_array_equal(emb.vectors, small)
    assert emb.ids.tolist() == names.tolist() and emb.column == "vectors"
    np.savez(tmp_path / "two.npz", a=small, b=small[:, :10])
    with pytest.raises(InputValueError, match=r"holds arrays \['a', 'b'\]; pass `column`"):
        read_embeddings(tmp_path / "two.npz")
    assert read_embeddings(tmp_path / "two.npz", column="b").vectors.shape == (50, 10)
    with pytest.raises(InputValueError, match=r"has no array 'c'; it holds \['a', 'b'\]"):
        read_embeddings(tmp_path / "two.npz", column="c")


def test_npz_object_member_not_unpickled(tmp_path, small):
    np.savez(tmp_path / "o.npz", vectors=small, ids=np.array([object()] * 50, dtype=object))
    with pytest.raises(InputValueError, match=r"o.npz holds an object array 'ids' \(pickled Python objects\)"):
        read_embeddings(tmp_path / "o.npz", id_column="ids")
    assert read_embeddings(tmp_path / "o.npz").column == "vectors"  # the object member is never loaded


@pytest.mark.parametrize("shape", [(3,), (2, 2)])
def test_npz_holding_only_an_object_array(tmp_path, shape):
    # a single object member: say so, rather than "pass `column`" or "pickled data"
    np.savez(tmp_path / "one.npz", v=np.full(shape, None, dtype=object))
    with pytest.raises(InputValueError, match=r"^read_embeddings: one.npz holds an object array 'v' "
                                              r"\(pickled Python objects\), which densemem does not unpickle"):
        read_embeddings(tmp_path / "one.npz")


def test_npy_object_array_refused(tmp_path):
    np.save(tmp_path / "o.npy", np.array([[1, "a"]], dtype=object), allow_pickle=True)
    with pytest.raises(InputValueError, match=r"'.*o.npy' holds an object array \(pickled Python objects\)"):
        read_embeddings(tmp_path / "o.npy")


@pytest.mark.parametrize("suffix", [".npy", ".npz"])
def test_garbage_numpy_files_are_named_invalid(tmp_path, suffix):
    # bytes that are no .npy (magic string "\x93NUMPY", the numpy format spec) and no zip
    path = tmp_path / ("g" + suffix)
    path.write_bytes(b"not an array at all " * 8)
    with pytest.raises(InputValueError, match=rf"^read_embeddings: '.*g\{suffix}' is not a valid \{suffix} file"):
        read_embeddings(path)


def test_truncated_numpy_files_are_named_invalid(tmp_path, small):
    np.save(tmp_path / "v.npy", small)
    (tmp_path / "t.npy").write_bytes((tmp_path / "v.npy").read_bytes()[:60])  # header cut short
    with pytest.raises(InputValueError, match=r"'.*t.npy' is not a valid .npy file \(.*header"):
        read_embeddings(tmp_path / "t.npy")
    import zipfile

    np.savez(tmp_path / "z.npz", v=small)
    with zipfile.ZipFile(tmp_path / "z.npz", "a") as z:
        z.writestr("junk.npy", b"nope")  # a member that is no .npy array
    with pytest.raises(InputValueError, match=r"'.*z.npz' is not a valid .npz file \(member 'junk'"):
        read_embeddings(tmp_path / "z.npz")


def test_vector_check_messages_name_the_file(tmp_path):
    np.save(tmp_path / "s.npy", np.array([["a", "b"]]))
    with pytest.raises(InputTypeError, match=r"^read_embeddings: the vector data in 's.npy' must hold real numbers"):
        read_embeddings(tmp_path / "s.npy")
    np.save(tmp_path / "one.npy", np.arange(3.0))
    with pytest.raises(InputValueError, match=r"the vector data in 'one.npy' must be 2-D"):
        read_embeddings(tmp_path / "one.npy")
    _write_csv(tmp_path / "d.csv", [["k", "a"], ["7", "1"], ["7", "2"]])
    with pytest.raises(InputValueError, match=r"^read_embeddings: the id column 'k' in 'd.csv' repeats the id"):
        read_embeddings(tmp_path / "d.csv", id_column="k")


@pytest.mark.parametrize("fixed", [True, False])
def test_parquet_list_columns(tmp_path, small, fixed):
    typ = pa.list_(pa.float32(), 64) if fixed else pa.list_(pa.float32())
    table = pa.table({"photo": [f"p{i}" for i in range(50)], "emb": pa.array(small.tolist(), type=typ)})
    pq.write_table(table, tmp_path / "v.parquet")
    emb = read_embeddings(tmp_path / "v.parquet", id_column="photo")
    np.testing.assert_array_equal(emb.vectors, small)
    assert emb.ids[3] == "p3" and emb.column == "emb"


def test_parquet_errors(tmp_path, small):
    pq.write_table(pa.table({"a": [[1.0, 2.0], [3.0]]}), tmp_path / "ragged.parquet")
    with pytest.raises(InputValueError, match="is ragged: row 1 has 1 numbers, row 0 has 2"):
        read_embeddings(tmp_path / "ragged.parquet")
    pq.write_table(pa.table({"a": [[1.0], None]}), tmp_path / "null.parquet")
    with pytest.raises(InputValueError, match="has a missing vector at row 1"):
        read_embeddings(tmp_path / "null.parquet")
    pq.write_table(pa.table({"a": [[1.0], [None]]}), tmp_path / "inner.parquet")
    with pytest.raises(InputValueError, match="1 missing numbers inside its vectors"):
        read_embeddings(tmp_path / "inner.parquet")
    pq.write_table(pa.table({"a": [["x"], ["y"]]}), tmp_path / "str.parquet")
    with pytest.raises(InputValueError, match="must hold numbers; got lists of string"):
        read_embeddings(tmp_path / "str.parquet")
    pq.write_table(pa.table({"a": [[1.0]], "b": [[2.0]], "i": [None]}), tmp_path / "two.parquet")
    with pytest.raises(InputValueError, match=r"has 2 list columns among \['a', 'b', 'i'\]; pass `column`"):
        read_embeddings(tmp_path / "two.parquet")
    with pytest.raises(InputValueError, match="has no column 'zz'"):
        read_embeddings(tmp_path / "two.parquet", column="a", id_column="zz")
    with pytest.raises(InputValueError, match="column 'i' has 1 missing ids"):
        read_embeddings(tmp_path / "two.parquet", column="a", id_column="i")
    pq.write_table(pa.table({"a": [1.0], "l": [[1.0]]}), tmp_path / "scalar.parquet")
    with pytest.raises(InputValueError, match="must be a list or fixed-size list of numbers; got double"):
        read_embeddings(tmp_path / "scalar.parquet", column="a")


def test_corrupt_parquet_is_an_input_error(tmp_path, small):
    path = tmp_path / "x.parquet"
    path.write_bytes(b"PAR1 but not really a parquet file")
    with pytest.raises(InputValueError, match=r"^read_embeddings: '.*x.parquet' is not a readable parquet file \("):
        read_embeddings(path)
    table = pa.table({"v": pa.array([[1.0, 2.0]] * 20, pa.list_(pa.float64()))})
    pq.write_table(table, tmp_path / "cut.parquet")
    data = (tmp_path / "cut.parquet").read_bytes()
    footer = int.from_bytes(data[-8:-4], "little")  # parquet format: footer length, then "PAR1"
    body = len(data) - footer - 12
    (tmp_path / "cut.parquet").write_bytes(data[:4] + b"\xff" * body + data[-footer - 8:])  # pages wiped
    assert pq.read_schema(tmp_path / "cut.parquet").names == ["v"]  # the schema still reads
    with pytest.raises(InputValueError, match=r"'.*cut.parquet' is not a readable parquet file"):
        read_embeddings(tmp_path / "cut.parquet")


def test_parquet_without_pyarrow(tmp_path, monkeypatch):
    (tmp_path / "v.parquet").write_bytes(b"PAR1")
    real_import = builtins.__import__

    def no_pyarrow(name, *args, **kw):
        if name.startswith("pyarrow"):
            raise ImportError(name)
        return real_import(name, *args, **kw)

    monkeypatch.setattr(builtins, "__import__", no_pyarrow)
    with pytest.raises(MissingExtraError, match=r"pip install densemem\[parquet\]"):
        read_embeddings(tmp_path / "v.parquet")


@pytest.mark.parametrize("suffix,delim", [(".csv", ","), (".tsv", "\t")])
def test_text_with_header_and_ids(tmp_path, small, suffix, delim):
    rows = [["photo"] + [f"f{j}" for j in range(64)]] + [[f"p{i}"] + [f"{v:g}" for v in r] for i, r in enumerate(small)]
    _write_csv(tmp_path / f"v{suffix}", rows, delim)
    emb = read_embeddings(tmp_path / f"v{suffix}", id_column="photo")
    np.testing.assert_array_equal(emb.vectors, small)
    assert emb.ids[0] == "p0" and emb.id_column == "photo"


def test_csv_without_header_integer_ids(tmp_path, small):
    _write_csv(tmp_path / "v.csv", [[str(100 + i)] + [f"{v:g}" for v in r] for i, r in enumerate(small)])
    emb = read_embeddings(tmp_path / "v.csv", id_column=0)
    np.testing.assert_array_equal(emb.vectors, small)
    assert emb.ids.dtype == np.int64 and emb.ids[:2].tolist() == [100, 101]
    plain = read_embeddings(tmp_path / "v.csv")  # no header: every column is a feature
    assert plain.vectors.shape == (50, 65)


def test_csv_errors(tmp_path):
    _write_csv(tmp_path / "s.csv", [["id", "a", "b"], ["x", "1", "2"], ["y", "3", "oops"]])
    with pytest.raises(InputValueError, match=r"s.csv line 2, id: 'x' is not a number; pass `id_column`"):
        read_embeddings(tmp_path / "s.csv")
    with pytest.raises(InputValueError, match=r"line 3, b: 'oops' is not a number\.$"):
        read_embeddings(tmp_path / "s.csv", id_column="id")
    with pytest.raises(InputValueError, match=r"has no id column 'name'; its columns are \['id', 'a', 'b'\]"):
        read_embeddings(tmp_path / "s.csv", id_column="name")
    _write_csv(tmp_path / "r.csv", [["1", "2"], ["3"]])
    with pytest.raises(InputValueError, match="line 2 has 1 fields; line 1 has 2"):
        read_embeddings(tmp_path / "r.csv")
    _write_csv(tmp_path / "n.csv", [["1", "2"], ["3", "4"]])
    with pytest.raises(InputValueError, match=r"no header and 2 columns \(use 0..1\)"):
        read_embeddings(tmp_path / "n.csv", id_column=5)
    (tmp_path / "e.csv").write_text("\n\n")
    with pytest.raises(InputValueError, match="has no rows"):
        read_embeddings(tmp_path / "e.csv")
    _write_csv(tmp_path / "n.csv", [["1", "nan"]])
    with pytest.raises(InputValueError, match="contains NaN at row 0"):
        read_embeddings(tmp_path / "n.csv")
    _write_csv(tmp_path / "d.csv", [["k", "a"], ["7", "1"], ["7", "2"]])
    with pytest.raises(InputValueError, match=r"repeats the id (np.int64\()?7"):
        read_embeddings(tmp_path / "d.csv", id_column="k")


@pytest.mark.parametrize("suffix", [".csv", ".tsv"])
def test_text_that_is_not_utf8(tmp_path, suffix):
    path = tmp_path / ("latin" + suffix)
    path.write_bytes("name,a\nZoë,1\n".encode("latin-1"))
    with pytest.raises(InputValueError, match=rf"^read_embeddings: '.*latin\{suffix}' is not UTF-8 text "
                                              r"\(cannot decode byte 0xeb\)"):
        read_embeddings(path)


def test_path_errors(tmp_path):
    with pytest.raises(InputValueError, match=r"suffix '.txt'; use one of .npy, .npz, .parquet, .csv, .tsv"):
        read_embeddings(tmp_path / "v.txt")
    with pytest.raises(InputValueError, match="no file at"):
        read_embeddings(tmp_path / "missing.npy")
    with pytest.raises(InputTypeError, match="`path` must be a str or os.PathLike; got int"):
        read_embeddings(3)
    np.save(tmp_path / "v.npy", np.eye(2))
    with pytest.raises(InputValueError, match="`column` applies to .npz and .parquet files"):
        read_embeddings(tmp_path / "v.npy", column="x")
    with pytest.raises(InputValueError, match="`id_column` does not apply"):
        read_embeddings(tmp_path / "v.npy", id_column="x")


def test_inputs_unchanged(tmp_path, small):
    np.save(tmp_path / "v.npy", small)
    before = (tmp_path / "v.npy").read_bytes()
    read_embeddings(tmp_path / "v.npy").vectors[:] = 0  # the returned array is a private copy
    assert (tmp_path / "v.npy").read_bytes() == before
