"""Read embeddings as people keep them: .npy, .npz, .parquet, .csv and .tsv.

:func:`read_embeddings` picks the reader from the file suffix and returns an
:class:`EmbeddingTable` record (float32 vectors, optional ids, where they came
from). Files are only opened for reading; nothing is unpickled.

Examples
--------
>>> import tempfile, os, numpy as np
>>> from densemem.store import read_embeddings
>>> path = os.path.join(tempfile.mkdtemp(), "vectors.npy")
>>> np.save(path, np.eye(3))
>>> read_embeddings(path).vectors.shape
(3, 3)
"""

from __future__ import annotations

import contextlib
import csv
import os
import struct
import tokenize
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .._validation import as_float_matrix, check_ids
from ..errors import DenseMemError, InputTypeError, InputValueError, MissingExtraError

__all__ = ["EmbeddingTable", "read_embeddings", "SUFFIXES"]

SUFFIXES = (".npy", ".npz", ".parquet", ".csv", ".tsv")
_WHERE = "read_embeddings"


@dataclass(frozen=True, slots=True, repr=False)
class EmbeddingTable:
    """Vectors read from a file, with their ids when the file has them.

    Attributes
    ----------
    vectors : ndarray of shape (n_rows, dim), float32
    ids : ndarray of shape (n_rows,) (int64 or str), or None
    source : str
        The file read.
    kind : str
        The reader used: "npy", "npz", "parquet", "csv" or "tsv".
    column, id_column : str or None
        The array/column the vectors and ids came from, where that applies.
    """

    vectors: np.ndarray
    ids: np.ndarray | None
    source: str
    kind: str
    column: str | None = None
    id_column: str | None = None

    def __repr__(self) -> str:
        n, d = self.vectors.shape
        ids = "none" if self.ids is None else str(self.ids.dtype)
        return f"EmbeddingTable(n_rows={n}, dim={d}, ids={ids}, kind={self.kind!r}, source={self.source!r})"

    def to_dict(self) -> dict[str, Any]:
        """Summary (not the arrays): rows, dim, id dtype, source, kind, columns.

        Examples
        --------
        >>> import numpy as np, tempfile, os
        >>> from densemem import read_embeddings
        >>> path = os.path.join(tempfile.mkdtemp(), "e.npy")
        >>> np.save(path, np.eye(3, dtype=np.float32))
        >>> read_embeddings(path).to_dict()["n_rows"]
        3
        """
        return {
            "n_rows": int(self.vectors.shape[0]),
            "dim": int(self.vectors.shape[1]),
            "ids": None if self.ids is None else str(self.ids.dtype),
            "source": self.source,
            "kind": self.kind,
            "column": self.column,
            "id_column": self.id_column,
        }


def read_embeddings(path: Any, *, column: str | None = None, id_column: str | int | None = None) -> EmbeddingTable:
    """Read embedding vectors (and optional ids) from a file, chosen by suffix.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.npy`` (one 2-D numeric array), ``.npz`` (named arrays),
        ``.parquet`` (a list or fixed-size-list column of numbers; needs
        pyarrow), ``.csv`` or ``.tsv`` (numeric columns; the first line is a
        header when it names columns that hold numbers below it).
    column : str, optional
        ``.npz``: the array name; ``.parquet``: the vector column. Needed when
        the file holds more than one candidate.
    id_column : str or int, optional
        ``.npz``: a 1-D array of ids; ``.parquet``: a column; ``.csv``/``.tsv``:
        a header name, or a 0-based column number for files without a header.

    Returns
    -------
    EmbeddingTable

    Raises
    ------
    InputValueError
        Missing file, unknown suffix, a file that is not valid in its format
        (corrupt .npy/.npz/.parquet, CSV that is not UTF-8), object (pickled)
        arrays, ambiguous or unknown column, ragged or null vectors, NaN/inf,
        non-numeric cells, repeated ids.
    MissingExtraError
        A ``.parquet`` file without pyarrow installed.

    Examples
    --------
    >>> import tempfile, os
    >>> from densemem.store import read_embeddings
    >>> path = os.path.join(tempfile.mkdtemp(), "v.csv")
    >>> _ = open(path, "w").write("name,a,b\\nx,1,0\\ny,0,1\\n")
    >>> emb = read_embeddings(path, id_column="name")
    >>> emb.ids.tolist(), emb.vectors.tolist()
    (['x', 'y'], [[1.0, 0.0], [0.0, 1.0]])
    """
    if not isinstance(path, (str, os.PathLike)):
        raise InputTypeError(f"{_WHERE}: `path` must be a str or os.PathLike; got {type(path).__name__}.")
    p = Path(os.fspath(path))
    kind = p.suffix.lower().lstrip(".")
    if "." + kind not in SUFFIXES:
        raise InputValueError(
            f"{_WHERE}: cannot tell the format of {str(p)!r} from its suffix {p.suffix!r}; "
            f"use one of {', '.join(SUFFIXES)}."
        )
    if not p.is_file():
        raise InputValueError(f"{_WHERE}: no file at {str(p)!r}.")
    if column is not None and kind not in ("npz", "parquet"):
        raise InputValueError(f"{_WHERE}: `column` applies to .npz and .parquet files; got {column!r} for a .{kind} file.")
    reader = {"npy": _read_npy, "npz": _read_npz, "parquet": _read_parquet, "csv": _read_text, "tsv": _read_text}[kind]
    vectors, ids, col, idcol = reader(p, column, id_column)
    with _about(f"the vector data in {p.name!r}"):
        x, _ = as_float_matrix(vectors, name=_SUBJECT, where=_WHERE)
    if ids is not None:
        with _about(f"the id column {idcol!r} in {p.name!r}"):
            ids = check_ids(ids, n=x.shape[0], where=_WHERE, name=_SUBJECT)
    return EmbeddingTable(vectors=x, ids=ids, source=str(p), kind=kind, column=col, id_column=idcol)


_SUBJECT = "subject"


@contextlib.contextmanager
def _about(subject: str) -> Iterator[None]:
    """Re-word the shared checks' "`subject` must ..." as "the vector data in 'x.npy' must ..."."""
    try:
        yield
    except (InputValueError, InputTypeError) as exc:
        if f"`{_SUBJECT}`" not in str(exc):
            raise
        raise type(exc)(str(exc).replace(f"`{_SUBJECT}`", subject, 1)) from None


_NPY_MAGIC = b"\x93NUMPY"
# what numpy's .npy header parser and loader raise on damaged bytes (the header is a Python
# literal: a damaged one can raise SyntaxError or a tokenizer error, an odd dtype TypeError)
NPY_ERRORS: tuple[type[BaseException], ...] = (
    ValueError, OSError, EOFError, SyntaxError, tokenize.TokenError, TypeError, KeyError, OverflowError,
    struct.error, zlib.error,
)
# a damaged zip can also claim encryption (RuntimeError) or an unknown compression method
_NPZ_ERRORS = NPY_ERRORS + (zipfile.BadZipFile, zipfile.LargeZipFile, NotImplementedError, RuntimeError)


def _npy_header(fh: Any, available: int | None = None) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype from a .npy header; ValueError when it is not one.

    With ``available`` (the bytes the file or member holds), a header claiming
    more data than that is refused before anything is allocated.
    """
    fmt = np.lib.format
    version = fmt.read_magic(fh)
    reader = fmt.read_array_header_1_0 if version == (1, 0) else fmt.read_array_header_2_0
    shape, _, dtype = reader(fh)
    if available is not None and not dtype.hasobject:  # object arrays are pickled (and refused)
        claimed = int(dtype.itemsize)
        for n in shape:
            claimed *= int(n)
        holds = available - fh.tell()
        if claimed > holds:
            raise ValueError(f"its header claims {claimed} bytes of data but the file holds {max(holds, 0)}")
    return shape, dtype


def _read_npy(p: Path, column: Any, id_column: Any) -> tuple[Any, Any, Any, Any]:
    if id_column is not None:
        raise InputValueError(f"{_WHERE}: a .npy file holds one array, so `id_column` does not apply; got {id_column!r}.")
    with open(p, "rb") as fh:
        if fh.read(len(_NPY_MAGIC)) != _NPY_MAGIC:
            raise InputValueError(
                f"{_WHERE}: {str(p)!r} is not a valid .npy file (it does not start with the .npy magic string)."
            )
        fh.seek(0)
        try:
            _, dtype = _npy_header(fh, os.fstat(fh.fileno()).st_size)
        except NPY_ERRORS as exc:
            raise InputValueError(f"{_WHERE}: {str(p)!r} is not a valid .npy file ({exc}).") from None
    if dtype.hasobject:
        raise InputValueError(
            f"{_WHERE}: {str(p)!r} holds an object array (pickled Python objects), which densemem does not "
            "unpickle; save the vectors as a numeric 2-D array."
        )
    try:
        arr = np.load(p, allow_pickle=False)
    except NPY_ERRORS as exc:
        raise InputValueError(f"{_WHERE}: {str(p)!r} is not a valid .npy file ({exc}).") from None
    return arr, None, None, None


def _read_npz(p: Path, column: Any, id_column: Any) -> tuple[Any, Any, Any, Any]:
    if not zipfile.is_zipfile(p):
        raise InputValueError(f"{_WHERE}: {str(p)!r} is not a valid .npz file (it is not a zip archive).")
    try:
        with np.load(p, allow_pickle=False) as z:
            names = list(z.files)
            members = set(z.zip.namelist())
            headers = {n: _member_header(p, z, n) for n in names if n + ".npy" in members}
            if column is None:
                column = _only_matrix(p, names, headers)
            for name in (column, id_column):
                if name is not None and name not in headers:
                    raise InputValueError(f"{_WHERE}: {p.name} has no array {name!r}; it holds {list(headers)}.")
                if name is not None and headers[name][1].hasobject:
                    raise _object_member(p, [name])
            vectors = z[column]
            ids = z[id_column] if id_column is not None else None
    except _NPZ_ERRORS as exc:
        if isinstance(exc, InputValueError):
            raise
        raise InputValueError(f"{_WHERE}: {str(p)!r} is not a valid .npz file ({exc}).") from None
    return vectors, ids, column, id_column


def _only_matrix(p: Path, names: list[str], headers: dict[str, Any]) -> str:
    """The one numeric 2-D member, else a message saying why none can be chosen."""
    arrays = [n for n in names if n in headers]
    two_d = [n for n in arrays if len(headers[n][0]) == 2 and not headers[n][1].hasobject]
    if len(two_d) == 1:
        return two_d[0]
    objects = [n for n in arrays if headers[n][1].hasobject]
    if not two_d and objects:
        raise _object_member(p, objects)
    raise InputValueError(f"{_WHERE}: {p.name} holds arrays {arrays}; pass `column` (--column) to choose the vectors.")


def _object_member(p: Path, names: list[str]) -> InputValueError:
    what = f"an object array {names[0]!r}" if len(names) == 1 else f"object arrays {names}"
    return InputValueError(
        f"{_WHERE}: {p.name} holds {what} (pickled Python objects), which densemem does not unpickle; "
        "save the vectors (and ids) as numeric or string arrays."
    )


def _member_header(p: Path, z: Any, name: str) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype of an npz member from its header alone."""
    try:
        with z.zip.open(name + ".npy") as fh:
            return _npy_header(fh, z.zip.getinfo(name + ".npy").file_size)
    except _NPZ_ERRORS as exc:
        raise InputValueError(f"{_WHERE}: {str(p)!r} is not a valid .npz file (member {name!r}: {exc}).") from None


def _pyarrow() -> Any:
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.parquet as pq
    except ImportError:
        raise MissingExtraError(
            f"{_WHERE}: reading .parquet needs pyarrow; install it with: pip install densemem[parquet]"
        ) from None
    return pa, pc, pq


def _read_parquet(p: Path, column: Any, id_column: Any) -> tuple[Any, Any, Any, Any]:
    pa, pc, pq = _pyarrow()
    try:
        return _parquet_columns(p, column, id_column, pa, pc, pq)
    except DenseMemError:
        raise
    except _DECODE_ERRORS + (pa.ArrowException,) as exc:  # damaged bytes surface as any of these
        raise _not_parquet(p, exc) from None


# what a damaged file can raise from inside pyarrow or while decoding its cells
_DECODE_ERRORS: tuple[type[BaseException], ...] = (
    OSError, ValueError, UnicodeDecodeError, KeyError, IndexError, TypeError, OverflowError, EOFError,
)


def _parquet_columns(p: Path, column: Any, id_column: Any, pa: Any, pc: Any, pq: Any) -> tuple[Any, Any, Any, Any]:
    schema = pq.read_schema(p)
    names = schema.names
    if column is None:
        lists = [f.name for f in schema if pa.types.is_list(f.type) or pa.types.is_fixed_size_list(f.type)
                 or pa.types.is_large_list(f.type)]
        if len(lists) != 1:
            raise InputValueError(
                f"{_WHERE}: {p.name} has {len(lists)} list columns among {names}; pass `column` (--column) "
                "naming the vector column."
            )
        column = lists[0]
    for name in (column, id_column):
        if name is not None and name not in names:
            raise InputValueError(f"{_WHERE}: {p.name} has no column {name!r}; it has {names}.")
    table = pq.read_table(p, columns=[c for c in (column, id_column) if c is not None])
    col = table.column(column).combine_chunks()
    vectors = _list_column_to_matrix(col, pa, pc, f"{p.name} column {column!r}")
    ids = None
    if id_column is not None:
        idcol = table.column(id_column)
        if idcol.null_count:
            raise InputValueError(f"{_WHERE}: {p.name} column {id_column!r} has {idcol.null_count} missing ids.")
        ids = np.asarray(idcol.to_pylist())
    return vectors, ids, column, id_column


def _not_parquet(p: Path, exc: Exception) -> InputValueError:
    return InputValueError(f"{_WHERE}: {str(p)!r} is not a readable parquet file ({type(exc).__name__}: {exc}).")


def _list_column_to_matrix(col: Any, pa: Any, pc: Any, label: str) -> np.ndarray:
    t = col.type
    if not (pa.types.is_list(t) or pa.types.is_fixed_size_list(t) or pa.types.is_large_list(t)):
        raise InputValueError(f"{_WHERE}: {label} must be a list or fixed-size list of numbers; got {t}.")
    if col.null_count:
        row = int(np.flatnonzero(col.is_null().to_numpy(zero_copy_only=False))[0])
        raise InputValueError(f"{_WHERE}: {label} has a missing vector at row {row}.")
    n = len(col)
    lengths = pc.list_value_length(col).to_numpy(zero_copy_only=False)
    if n and (lengths != lengths[0]).any():
        row = int(np.flatnonzero(lengths != lengths[0])[0])
        raise InputValueError(
            f"{_WHERE}: {label} is ragged: row {row} has {int(lengths[row])} numbers, row 0 has {int(lengths[0])}."
        )
    values = pc.list_flatten(col)
    if not (pa.types.is_floating(values.type) or pa.types.is_integer(values.type)):
        raise InputValueError(f"{_WHERE}: {label} must hold numbers; got lists of {values.type}.")
    if values.null_count:
        raise InputValueError(f"{_WHERE}: {label} has {values.null_count} missing numbers inside its vectors.")
    width = int(lengths[0]) if n else 0
    return values.to_numpy(zero_copy_only=False).reshape(n, width)


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def _read_text(p: Path, column: Any, id_column: Any) -> tuple[Any, Any, Any, Any]:
    delim = "\t" if p.suffix.lower() == ".tsv" else ","
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.reader(fh, delimiter=delim) if r and any(c.strip() for c in r)]
    except UnicodeDecodeError as exc:
        bad = exc.object[exc.start : exc.start + 1].hex()
        raise InputValueError(
            f"{_WHERE}: {str(p)!r} is not UTF-8 text (cannot decode byte 0x{bad}); save it as UTF-8."
        ) from None
    except csv.Error as exc:  # e.g. a NUL byte
        raise InputValueError(f"{_WHERE}: {str(p)!r} is not readable as delimited text ({exc}).") from None
    if not rows:
        raise InputValueError(f"{_WHERE}: {str(p)!r} has no rows.")
    header = _detect_header(rows)
    body = rows[1:] if header else rows
    width = len(rows[0])
    for line_no, r in enumerate(body, start=2 if header else 1):
        if len(r) != width:
            raise InputValueError(f"{_WHERE}: {p.name} line {line_no} has {len(r)} fields; line 1 has {width}.")
    id_pos = _id_position(p, header, id_column, width)
    keep = [j for j in range(width) if j != id_pos]
    cells = np.array(body, dtype=str).reshape(len(body), width) if body else np.empty((0, width), str)
    try:
        vectors = cells[:, keep].astype(np.float64)
    except ValueError:
        i, j = next((i, j) for i, r in enumerate(cells[:, keep]) for j, c in enumerate(r) if not _is_number(c))
        name = header[keep[j]] if header else f"column {keep[j]}"
        hint = "" if id_column is not None else "; pass `id_column` (--id-column) if it holds ids"
        raise InputValueError(
            f"{_WHERE}: {p.name} line {i + (2 if header else 1)}, {name}: {str(cells[i, keep[j]])!r} is not a number{hint}."
        ) from None
    ids = None
    label = None
    if id_pos is not None:
        raw = [c.strip() for c in cells[:, id_pos]]
        ids = np.array([int(c) for c in raw], np.int64) if all(_is_int(c) for c in raw) else np.array(raw, dtype=str)
        label = header[id_pos] if header else str(id_pos)
    return vectors, ids, None, label


def _is_int(cell: str) -> bool:
    try:
        int(cell)
    except ValueError:
        return False
    return True


def _detect_header(rows: list[list[str]]) -> list[str] | None:
    """The first row is a header when some cell in it is not a number while the
    cell below it is (or, for a one-row file, when none of its cells is a number)."""
    first = rows[0]
    if len(rows) == 1:
        return [c.strip() for c in first] if not any(_is_number(c) for c in first) else None
    second = rows[1]
    named = any(not _is_number(a) and _is_number(b) for a, b in zip(first, second))
    return [c.strip() for c in first] if named else None


def _id_position(p: Path, header: list[str] | None, id_column: Any, width: int) -> int | None:
    if id_column is None:
        return None
    if header is not None and str(id_column) in header:
        return header.index(str(id_column))
    if isinstance(id_column, int) or (isinstance(id_column, str) and id_column.isdigit()):
        pos = int(id_column)
        if 0 <= pos < width:
            return pos
    known = f"its columns are {header}" if header else f"it has no header and {width} columns (use 0..{width - 1})"
    raise InputValueError(f"{_WHERE}: {p.name} has no id column {id_column!r}; {known}.")
