"""The store folder: save a :class:`~densemem.DenseMemory` to disk and load it back.

Layout of a store folder::

    manifest.json    format name and version, dim, count, dtype, normalization,
                     default beta, id kind, the largest row norm (float64), the
                     sha256 and size of every file, and
                     ``manifest_sha256``: the sha256 of its own content (every other
                     key, as canonical JSON), checked on every load
    patterns.npy     float32 or float16 (count, dim), C order (the manifest's "dtype")
    ids.npy          int64 (count,) or fixed-width unicode '<U..' (count,); never object
    index.faiss      optional: a candidate index written by ``faiss.write_index``

Loads never unpickle (``np.load(..., allow_pickle=False)``), always check the
manifest's own checksum and each array header's claimed size against the file
size (before anything is allocated), and, unless ``verify=False``, check every
file against the manifest's sha256. Version 1 stores (written before the
manifest checksum) still load.

Crash safety (the write protocol)
---------------------------------
The store lives at a plain folder ``P`` (so it can be copied, zipped or moved
like any folder). Beside it, in the same parent folder, a save uses three
hidden names: ``.<name>.densemem-tmp-<random>``, ``.<name>.densemem-next`` and
``.<name>.densemem-prev``. A save runs these steps, each one a single
``os.rename`` (atomic on POSIX file systems) followed by an fsync of the parent:

1. tidy what an earlier crashed save left (see *recovery* below);
2. write every file into ``tmp``, fsync each file and the ``tmp`` folder;
3. rename ``tmp -> next``: from now on ``next`` is known to be complete;
4. rename ``P -> prev`` (skipped when there is no old store);
5. rename ``next -> P``;
6. delete ``prev``.

So at every instant one of these holds, and :func:`read_store` reads it
without changing anything on disk:

- ``P`` exists and is complete (old store before step 4, new one after step 5);
- ``P`` is missing (between steps 4 and 5): ``next`` is complete (the new
  store) and ``prev`` is the old one; the load reads ``next``.

Recovery in step 1 of the next save finishes the interrupted one: a missing
``P`` is restored from ``next`` (or from ``prev``), leftover ``tmp`` folders
and a stale ``prev``/``next`` are deleted.

Concurrent saves: a save holds an exclusive ``fcntl`` lock on the file
``.<name>.densemem-lock`` beside the store for its whole run (taken before the
recovery step). A second process (or thread) saving to the same path while the
lock is held gets :class:`~densemem.errors.StoreBusyError` at once and changes
nothing; the first save completes whole. Loads take no lock. Where ``fcntl``
does not exist (Windows) saves are not coordinated.

Examples
--------
>>> import tempfile, os, numpy as np, densemem
>>> mem = densemem.DenseMemory.from_array(np.eye(3), ids=["a", "b", "c"])
>>> path = os.path.join(tempfile.mkdtemp(), "store")
>>> mem.save(path)
>>> densemem.DenseMemory.load(path).ids.tolist()
['a', 'b', 'c']
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import secrets
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from .._util import fsync_dir, write_atomic
from ..errors import InputTypeError, InputValueError, StoreBusyError, StoreFormatError
from ._readers import NPY_ERRORS

__all__ = ["StoreContent", "write_store", "read_store", "describe_store", "StoreInfo", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "densemem-store"
FORMAT_VERSION = 2  # 2: the manifest carries manifest_sha256; 1 (no self-checksum) still loads
SELF_SHA = "manifest_sha256"
MANIFEST = "manifest.json"
PATTERNS = "patterns.npy"
IDS = "ids.npy"
INDEX = "index.faiss"
_CHUNK = 1 << 20


# --------------------------------------------------------------------- paths
def _as_path(path: Any, where: str) -> Path:
    if not isinstance(path, (str, os.PathLike)):
        raise InputTypeError(f"{where}: `path` must be a str or os.PathLike; got {type(path).__name__}.")
    p = Path(os.fspath(path))
    if p.name in ("", ".", ".."):
        raise InputValueError(f"{where}: `path` must name a folder; got {os.fspath(path)!r}.")
    return p.absolute()


def _sibling(p: Path, tag: str) -> Path:
    return p.parent / f".{p.name}.densemem-{tag}"


@contextlib.contextmanager
def save_lock(p: Path, where: str) -> Iterator[None]:
    """Hold the exclusive save lock of the store at ``p`` (or raise StoreBusyError at once)."""
    try:
        import fcntl
    except ImportError:  # no advisory locks here (Windows): saves are not coordinated
        yield
        return
    lock_path = _sibling(p, "lock")
    while True:
        fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o666)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise StoreBusyError(
                f"{where}: another save to {str(p)!r} is running (it holds {lock_path.name!r}); "
                "nothing was written. Retry when it has finished."
            ) from None
        try:
            same = os.stat(lock_path).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)  # the holder before us removed that file on release: lock the current one
    try:
        yield
    finally:
        try:
            os.unlink(lock_path)  # removed while still held, so no one can lock the stale file and go on
        finally:
            os.close(fd)


def _content_sha256(man: dict[str, Any]) -> str:
    body = {k: v for k, v in man.items() if k != SELF_SHA}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def manifest_text(man: dict[str, Any]) -> str:
    """The manifest as JSON text, sealed with the checksum of its own content."""
    return json.dumps({**man, SELF_SHA: _content_sha256(man)}, indent=2, sort_keys=True)


def _check_seal(man: dict[str, Any], mpath: Path, where: str) -> None:
    if man.get(SELF_SHA) != _content_sha256(man):
        raise StoreFormatError(
            f"{where}: {str(mpath)!r} does not match its own checksum ({SELF_SHA}); the manifest is damaged "
            "or was edited by hand."
        )


def _rename(src: Path, dst: Path) -> None:
    os.rename(src, dst)
    fsync_dir(dst.parent)


def _is_store(d: Path) -> bool:
    try:
        with open(d / MANIFEST, encoding="utf-8") as fh:
            return json.load(fh).get("format") == FORMAT_NAME
    except (OSError, ValueError, AttributeError):
        return False


def _resolve(p: Path) -> Path | None:
    """The complete store folder for ``p`` (``p`` itself or, mid-save, ``next``/``prev``)."""
    if p.exists():
        return p
    for tag in ("next", "prev"):
        alt = _sibling(p, tag)
        if alt.is_dir():
            return alt
    return None


def _recover(p: Path) -> None:
    """Finish or undo a save that was interrupted (step 1 of the protocol)."""
    nxt, prev = _sibling(p, "next"), _sibling(p, "prev")
    if not p.exists():
        if nxt.is_dir():
            _rename(nxt, p)
        elif prev.is_dir():
            _rename(prev, p)
    for stale in [nxt, prev, *p.parent.glob(f".{p.name}.densemem-tmp-*")]:
        if stale.is_dir():
            shutil.rmtree(stale)
    fsync_dir(p.parent)


# -------------------------------------------------------------------- writing
def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def _write_file(path: Path, write: Any) -> dict[str, Any]:
    with open(path, "xb") as fh:
        write(fh)
        fh.flush()
        os.fsync(fh.fileno())
    return {"sha256": _sha256(path), "bytes": path.stat().st_size}


def _write_index(path: Path, index: Any) -> dict[str, Any]:
    import faiss

    faiss.write_index(index, str(path))
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())
    return {"sha256": _sha256(path), "bytes": path.stat().st_size}


@dataclass(frozen=True, slots=True)
class StoreContent:
    """What a store folder holds: rows, ids, settings and an optional candidate index.

    The memory hands one to :func:`write_store` and builds itself from what
    :func:`read_store` returns; the store never sees a memory object.
    """

    x: np.ndarray
    ids: np.ndarray
    normalize: bool
    beta: float
    next_id: int = 0
    index_meta: dict[str, Any] | None = None
    index: Any = None  # a faiss index, or None
    max_norm: float | None = None  # largest row norm (float64), recorded so a mapped store needs no pass for it


def _manifest(content: StoreContent, ids: np.ndarray) -> dict[str, Any]:
    from .._version import __version__

    return {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "written_by": f"densemem {__version__}",
        "dim": int(content.x.shape[1]),
        "count": int(content.x.shape[0]),
        "dtype": str(np.dtype(content.x.dtype)),
        "normalize": bool(content.normalize),
        "beta": float(content.beta),
        "id_kind": "int64" if ids.dtype.kind == "i" else "str",
        "next_id": int(content.next_id),
        **({} if content.max_norm is None else {"max_norm": float(content.max_norm)}),
        "files": {},
        "index": None,
    }


def _fill_folder(content: StoreContent, tmp: Path) -> None:
    """Step 2: every file of the store, fsynced, into the fresh folder ``tmp``."""
    x = np.ascontiguousarray(content.x, dtype=np.float16 if content.x.dtype == np.float16 else np.float32)
    ids = content.ids
    ids = ids.astype(np.int64) if ids.dtype.kind in "iu" else ids.astype(f"<U{max(ids.dtype.itemsize // 4, 1)}")
    man = _manifest(content, ids)
    man["files"][PATTERNS] = _write_file(tmp / PATTERNS, lambda fh: np.save(fh, x, allow_pickle=False))
    man["files"][IDS] = _write_file(tmp / IDS, lambda fh: np.save(fh, ids, allow_pickle=False))
    if content.index is not None:
        man["files"][INDEX] = _write_index(tmp / INDEX, content.index)
        man["index"] = {"file": INDEX, "meta": content.index_meta or {}}
    text = manifest_text(man).encode("utf-8")
    _write_file(tmp / MANIFEST, lambda fh: fh.write(text))
    fsync_dir(tmp)


def write_store(content: StoreContent, path: Any, *, overwrite: bool = True, where: str = "DenseMemory.save") -> None:
    """Write ``content`` to the store folder ``path``, atomically.

    A crash at any moment leaves the old store or the new one loadable at
    ``path`` (the protocol is described in :mod:`densemem.store`).

    Parameters
    ----------
    content : StoreContent
    path : str or os.PathLike
        The store folder. Its parent must exist.
    overwrite : bool, default True
        Replace an existing store at ``path``. A folder that is not a densemem
        store (and not empty) is never replaced.

    Raises
    ------
    InputTypeError
        ``path`` is not a path.
    InputValueError
        The parent folder is missing, ``path`` is a file or a foreign folder,
        or a store exists and ``overwrite=False``.

    Examples
    --------
    >>> import tempfile, os, numpy as np, densemem
    >>> path = os.path.join(tempfile.mkdtemp(), "store")
    >>> densemem.DenseMemory.from_array(np.eye(2)).save(path)
    >>> sorted(os.listdir(path))
    ['ids.npy', 'manifest.json', 'patterns.npy']
    """
    p = _as_path(path, where)
    if not p.parent.is_dir():
        raise InputValueError(f"{where}: the parent folder of `path` does not exist: {str(p.parent)!r}.")
    with save_lock(p, where):
        _recover(p)
        _check_target(p, overwrite, where)
        tmp = _sibling(p, f"tmp-{os.getpid()}-{secrets.token_hex(4)}")
        tmp.mkdir()
        try:
            _fill_folder(content, tmp)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        nxt, prev = _sibling(p, "next"), _sibling(p, "prev")
        _rename(tmp, nxt)
        if p.exists():
            _rename(p, prev)
        _rename(nxt, p)
        if prev.exists():
            shutil.rmtree(prev)


def _check_target(p: Path, overwrite: bool, where: str) -> None:
    if not p.exists() and not p.is_symlink():
        return
    if not p.is_dir():
        raise InputValueError(f"{where}: `path` {str(p)!r} exists and is not a folder; refusing to replace it.")
    if _is_store(p):
        if not overwrite:
            raise InputValueError(
                f"{where}: a store already exists at {str(p)!r} and overwrite=False; pass overwrite=True to replace it."
            )
        return
    if any(p.iterdir()):
        raise InputValueError(
            f"{where}: {str(p)!r} is a folder that is not a densemem store; refusing to replace it."
        )


# -------------------------------------------------------------------- reading
def read_json_manifest(mpath: Path, *, name: str, version: int, missing: str, where: str,
                       unsealed: tuple[int, ...] = ()) -> dict[str, Any]:
    """Read a manifest file and check its format name, version and own checksum (shared with shard stores).

    ``missing`` is the message used when the file does not exist; ``unsealed``
    lists older versions written without the self-checksum (read without it).
    """
    try:
        with open(mpath, encoding="utf-8") as fh:
            man = json.load(fh)
    except FileNotFoundError:
        raise StoreFormatError(f"{where}: {missing}") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise StoreFormatError(f"{where}: {str(mpath)!r} is not valid JSON ({exc}).") from None
    if not isinstance(man, dict) or man.get("format") != name:
        raise StoreFormatError(f"{where}: {str(mpath)!r} is not a {name} manifest.")
    found = man.get("format_version")
    if found != version and not (found in unsealed and type(found) is int):
        older = "".join(f" (and {v})" for v in unsealed)
        raise StoreFormatError(
            f"{where}: {str(mpath)!r} has format_version {found!r}; this densemem reads version {version}{older}."
        )
    if found == version or SELF_SHA in man:  # an old version never carries the key: one that does is damaged
        _check_seal(man, mpath, where)
    return man


def _read_manifest(folder: Path, where: str) -> dict[str, Any]:
    mpath = folder / MANIFEST
    man = read_json_manifest(
        mpath, name=FORMAT_NAME, version=FORMAT_VERSION, where=where, unsealed=(1,),
        missing=f"the store has no {MANIFEST} ({str(mpath)!r} is missing).",
    )
    needed = {"dim": int, "count": int, "normalize": bool, "beta": float, "id_kind": str, "files": dict}
    for key, kind in needed.items():
        val = man.get(key)
        ok = isinstance(val, kind) or (kind is float and isinstance(val, int) and not isinstance(val, bool))
        if not ok or (kind is int and isinstance(val, bool)):
            raise StoreFormatError(f"{where}: {str(mpath)!r} has a missing or bad {key!r} entry ({val!r}).")
    return man


def _verify_file(folder: Path, name: str, entry: Any, where: str, *, hash_it: bool) -> Path:
    fpath = folder / name
    if not fpath.is_file():
        raise StoreFormatError(f"{where}: the store file {str(fpath)!r} is missing.")
    if not isinstance(entry, dict) or "sha256" not in entry:
        raise StoreFormatError(f"{where}: the manifest has no checksum for {name!r}.")
    size = fpath.stat().st_size
    if entry.get("bytes") is not None and size != entry["bytes"]:
        raise StoreFormatError(
            f"{where}: {str(fpath)!r} has {size} bytes but the manifest says {entry['bytes']} (truncated or replaced?)."
        )
    if hash_it and _sha256(fpath) != entry["sha256"]:
        raise StoreFormatError(f"{where}: checksum mismatch in {str(fpath)!r}; the file is damaged.")
    return fpath


def _npy_dtype(fpath: Path, where: str) -> np.dtype:
    """The dtype in a .npy header, read without loading (or unpickling) anything."""
    fmt = np.lib.format
    try:
        with open(fpath, "rb") as fh:
            version = fmt.read_magic(fh)
            reader = fmt.read_array_header_1_0 if version == (1, 0) else fmt.read_array_header_2_0
            shape, _, dtype = reader(fh)
            claimed = int(dtype.itemsize)
            for n in shape:
                claimed *= int(n)
            holds = os.fstat(fh.fileno()).st_size - fh.tell()
            if claimed > holds and not dtype.hasobject:  # refused before np.load allocates the claimed size
                raise ValueError(f"its header claims {claimed} bytes of data but the file holds {max(holds, 0)}")
    except NPY_ERRORS as exc:
        raise StoreFormatError(f"{where}: {str(fpath)!r} is not a readable .npy file ({exc}).") from None
    return dtype


def _load_array(fpath: Path, mmap: bool, where: str) -> np.ndarray:
    if _npy_dtype(fpath, where).hasobject:
        raise StoreFormatError(
            f"{where}: {str(fpath)!r} holds an object array; densemem never unpickles store files."
        )
    try:
        arr = np.load(fpath, mmap_mode="r" if mmap else None, allow_pickle=False)
    except NPY_ERRORS as exc:
        raise StoreFormatError(f"{where}: {str(fpath)!r} is not a readable .npy file ({exc}).") from None
    return arr


def _check_arrays(x: np.ndarray, ids: np.ndarray, man: dict[str, Any], folder: Path, where: str) -> None:
    px, pi = str(folder / PATTERNS), str(folder / IDS)
    want = man.get("dtype", "float32")
    if want not in ("float32", "float16") or x.dtype != np.dtype(want) or x.ndim != 2 or not x.flags.c_contiguous:
        raise StoreFormatError(f"{where}: {px!r} must hold a C-ordered {want} matrix; got {x.dtype} {x.shape}.")
    if x.shape != (man["count"], man["dim"]):
        raise StoreFormatError(
            f"{where}: {px!r} has shape {x.shape} but the manifest says ({man['count']}, {man['dim']})."
        )
    kind = man["id_kind"]
    good = (kind == "int64" and ids.dtype == np.int64) or (kind == "str" and ids.dtype.kind == "U")
    if not good or ids.ndim != 1 or ids.shape[0] != man["count"]:
        raise StoreFormatError(
            f"{where}: {pi!r} must hold {man['count']} ids of kind {kind}; got {ids.dtype} {ids.shape}."
        )


def read_store(path: Any, *, mmap: bool = False, verify: bool = True, where: str = "DenseMemory.load") -> StoreContent:
    """Read a store folder written by :func:`write_store`.

    Parameters
    ----------
    path : str or os.PathLike
    mmap : bool, default False
        Memory-map ``patterns.npy`` and ``ids.npy`` read-only instead of
        reading them (no copy; the memory's arrays are then read-only views of
        the files, and :meth:`~densemem.DenseMemory.add` copies on write).
    verify : bool, default True
        Check every file's sha256 against the manifest (and ids for
        uniqueness). ``verify=False`` only checks sizes, shapes and dtypes.

    Returns
    -------
    StoreContent

    Raises
    ------
    StoreFormatError
        No store at ``path``; unknown format or version; a missing,
        truncated or damaged file (the message names it); an object array.

    Examples
    --------
    >>> import tempfile, os, numpy as np, densemem
    >>> path = os.path.join(tempfile.mkdtemp(), "store")
    >>> densemem.DenseMemory.from_array(np.eye(2), beta=4.0).save(path)
    >>> densemem.DenseMemory.load(path, mmap=True).beta
    4.0
    """
    p = _as_path(path, where)
    folder = _resolve(p)
    if folder is None:
        raise StoreFormatError(f"{where}: there is no store folder at {str(p)!r}.")
    if not folder.is_dir():
        raise StoreFormatError(f"{where}: {str(folder)!r} is not a folder.")
    man = _read_manifest(folder, where)
    files = man["files"]
    px = _verify_file(folder, PATTERNS, files.get(PATTERNS), where, hash_it=verify)
    pi = _verify_file(folder, IDS, files.get(IDS), where, hash_it=verify)
    x = _load_array(px, mmap, where)
    ids = _load_array(pi, mmap, where)
    _check_arrays(x, ids, man, folder, where)
    if verify and np.unique(ids).size != ids.size:
        raise StoreFormatError(f"{where}: {str(pi)!r} repeats an id; ids must be unique.")
    return _build(man, x, ids, folder, where, verify)


def _build(man: dict[str, Any], x: np.ndarray, ids: np.ndarray, folder: Path, where: str, verify: bool) -> StoreContent:
    index_entry = man.get("index")
    meta, index = None, None
    if index_entry:
        if not isinstance(index_entry, dict) or index_entry.get("file") != INDEX:
            raise StoreFormatError(f"{where}: {str(folder / MANIFEST)!r} has a bad 'index' entry.")
        fpath = _verify_file(folder, INDEX, man["files"].get(INDEX), where, hash_it=verify)
        import faiss

        try:
            index = faiss.read_index(str(fpath))
        except RuntimeError as exc:
            raise StoreFormatError(f"{where}: {str(fpath)!r} is not a readable faiss index ({exc}).") from None
        meta = index_entry.get("meta", {})
    next_id = man.get("next_id")
    max_norm = man.get("max_norm")  # absent in stores written before it was recorded
    if max_norm is not None and (isinstance(max_norm, bool) or not isinstance(max_norm, (int, float))
                                 or not math.isfinite(max_norm) or max_norm < 0):
        raise StoreFormatError(f"{where}: {str(folder / MANIFEST)!r} has a bad 'max_norm' {max_norm!r} "
                               "(expected a finite number >= 0).")
    return StoreContent(
        x=x, ids=ids, normalize=bool(man["normalize"]), beta=float(man["beta"]),
        next_id=next_id if isinstance(next_id, int) else 0, index_meta=meta, index=index,
        max_norm=None if max_norm is None else float(max_norm),
    )


# ------------------------------------------------------------------ describe
@dataclass(frozen=True, slots=True)
class StoreInfo:
    """What :func:`describe_store` reports about a store folder.

    Attributes
    ----------
    path : str
        The folder read (a hidden sibling when a save was interrupted).
    format_version, dim, count : int
    normalize : bool
    beta : float
    id_kind : str
        "int64" or "str".
    files : dict
        File name -> {"sha256", "bytes"}.
    index : dict or None
        Index metadata when the store holds a candidate index.
    verified : bool
        Whether every checksum was checked (and matched).
    """

    path: str
    format_version: int
    dim: int
    count: int
    normalize: bool
    beta: float
    id_kind: str
    files: dict[str, Any] = field(default_factory=dict)
    index: dict[str, Any] | None = None
    verified: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python (JSON-ready) copy of every field."""
        return {name: getattr(self, name) for name in self.__dataclass_fields__}


def describe_store(path: Any, *, verify: bool = True) -> StoreInfo:
    """Read a store's manifest (and with ``verify`` check every file) without loading it.

    Examples
    --------
    >>> import tempfile, os, numpy as np, densemem
    >>> from densemem.store import describe_store
    >>> path = os.path.join(tempfile.mkdtemp(), "store")
    >>> densemem.DenseMemory.from_array(np.eye(3)).save(path)
    >>> describe_store(path).count
    3
    """
    where = "describe_store"
    p = _as_path(path, where)
    folder = _resolve(p)
    if folder is None or not folder.is_dir():
        raise StoreFormatError(f"{where}: there is no store folder at {str(p)!r}.")
    man = _read_manifest(folder, where)
    for name, entry in man["files"].items():
        _verify_file(folder, name, entry, where, hash_it=verify)
    return StoreInfo(
        path=str(folder),
        format_version=man["format_version"],
        dim=man["dim"],
        count=man["count"],
        normalize=man["normalize"],
        beta=float(man["beta"]),
        id_kind=man["id_kind"],
        files=man["files"],
        index=man.get("index"),
        verified=verify,
    )


def set_stored_beta(path: Any, beta: float) -> float:
    """Replace the default beta in the manifest of the store folder ``path``, atomically.

    Only ``manifest.json`` changes (the arrays and their checksums stay): the
    new manifest is written to a temp file in the store folder, fsynced and
    moved over the old one with ``os.replace``, so a reader sees the old beta
    or the new one. Returns the beta that was stored before.

    Raises
    ------
    InputTypeError
        ``beta`` is not a real number.
    InputValueError
        ``beta`` is not finite and > 0.
    StoreFormatError
        ``path`` is not a complete store folder.

    Examples
    --------
    >>> import tempfile, os, numpy as np, densemem
    >>> from densemem.store._folder import set_stored_beta
    >>> path = os.path.join(tempfile.mkdtemp(), "store")
    >>> densemem.DenseMemory.from_array(np.eye(2), beta=4.0).save(path)
    >>> set_stored_beta(path, 30.0), densemem.DenseMemory.load(path).beta
    (4.0, 30.0)
    """
    where = "set_stored_beta"
    if isinstance(beta, bool) or not isinstance(beta, (int, float, np.integer, np.floating)):
        raise InputTypeError(f"{where}: `beta` must be a real number; got {type(beta).__name__}.")
    if not (np.isfinite(beta) and beta > 0):
        raise InputValueError(f"{where}: `beta` must be a finite number > 0; got {float(beta)!r}.")
    p = _as_path(path, where)
    if not p.is_dir():
        raise StoreFormatError(f"{where}: there is no store folder at {str(p)!r}.")
    man = _read_manifest(p, where)
    old = float(man["beta"])
    man["beta"] = float(beta)
    with save_lock(p, where):
        write_atomic(p / MANIFEST, manifest_text(man), where=where)  # with its own checksum, fsynced
    return old
