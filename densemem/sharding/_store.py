"""The on-disk side of sharded stores: the top manifest, atomic writes, loading one shard.

See :mod:`densemem.sharding` for the layout. Each shard is a plain store folder
written by :func:`densemem.store.save_memory`; this module adds ``shards.json``.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
from pathlib import Path
from typing import Any

import numpy as np

from .._util import fsync_dir, write_atomic
from .._validation import max_row_norm
from ..dense import DenseMemory
from ..errors import InputValueError, StoreFormatError
from ..store._folder import (
    MANIFEST,
    StoreContent,
    _sha256,
    manifest_text,
    read_json_manifest,
    write_store,
)

SHARDS_FORMAT_NAME = "densemem-shards"
SHARDS_FORMAT_VERSION = 2  # 2: shards.json carries manifest_sha256 (its own checksum); 1 still opens
TOP_MANIFEST = "shards.json"
_SPLITS = ("round_robin", "contiguous")


# ------------------------------------------------------------------ helpers
def _shard_name(i: int) -> str:
    return f"shard-{i:05d}"


def _write_json_atomic(path: Path, payload: dict[str, Any]) -> None:
    """Write ``path`` atomically (see :func:`densemem._util.write_atomic`)."""
    write_atomic(path, manifest_text(payload))


# ------------------------------------------------------------------- updates
def new_shard_name() -> str:
    """A fresh shard folder name: updates never rewrite a folder ``shards.json`` points to."""
    return f"shard-{secrets.token_hex(6)}"


def write_shard(p: Path, mem: Any, where: str) -> dict[str, Any]:
    """Write ``mem`` as a new shard folder under ``p``; return its ``shards.json`` entry."""
    name = new_shard_name()
    folder = p / name
    mem.save(folder, overwrite=False)
    return {"folder": name, "count": len(mem), "max_norm": max_row_norm(mem.patterns),
            "manifest_sha256": _sha256(folder / MANIFEST)}


def commit(p: Path, man: dict[str, Any]) -> None:
    """Move the store to ``man`` (one atomic replace of ``shards.json``), then tidy up.

    Every shard folder ``man`` names is complete before this is called, so a
    crash at any instant leaves ``shards.json`` naming either the old complete
    set of folders or the new one.
    """
    man = dict(man)
    man["count"] = sum(int(s["count"]) for s in man["shards"])
    _write_json_atomic(p / TOP_MANIFEST, man)
    tidy(p, man)


def tidy(p: Path, man: dict[str, Any]) -> None:
    """Delete what an interrupted update left: shard folders ``man`` does not name, temp files."""
    keep = {str(s["folder"]) for s in man["shards"]} | {TOP_MANIFEST}
    for child in p.iterdir():
        name = child.name
        if name in keep:
            continue
        ours = name.startswith(("shard-", ".shard-", f".{Path(TOP_MANIFEST).stem}.tmp-"))
        if not ours:
            continue
        if child.is_dir() and not child.is_symlink():
            shutil.rmtree(child, ignore_errors=True)
        else:
            child.unlink(missing_ok=True)


def _is_sharded(d: Path) -> bool:
    try:
        with open(d / TOP_MANIFEST, encoding="utf-8") as fh:
            return json.load(fh).get("format") == SHARDS_FORMAT_NAME
    except (OSError, ValueError, AttributeError):
        return False


def load_shard(folder: str, checksum: str, *, verify: bool, where: str, number: int) -> Any:
    """Load one shard memory-mapped after checking its manifest against ``checksum``.

    Raises a :class:`StoreFormatError` naming the shard folder when the shard is
    missing, damaged or was rewritten since the top manifest was written.
    """
    mpath = Path(folder) / MANIFEST
    try:
        found = _sha256(mpath)
    except OSError as exc:
        raise StoreFormatError(
            f"{where}: shard {number} at {folder!r} cannot be loaded: {mpath.name} is unreadable ({exc.strerror})."
        ) from None
    if found != checksum:
        raise StoreFormatError(
            f"{where}: shard {number} at {folder!r} does not match {TOP_MANIFEST} (its manifest checksum "
            "changed: rewritten or interrupted during add?)."
        )
    try:
        return DenseMemory.load(folder, mmap=True, verify=verify)
    except (StoreFormatError, OSError) as exc:
        raise StoreFormatError(f"{where}: shard {number} at {folder!r} cannot be loaded: {exc}") from None


# ------------------------------------------------------------------ building
def _split(n: int, n_shards: int, by: str) -> list[np.ndarray]:
    if by == "round_robin":
        return [np.arange(i, n, n_shards) for i in range(n_shards)]
    return np.array_split(np.arange(n), n_shards)


def _fill(memory: Any, tmp: Path, n_shards: int, by: str) -> dict[str, Any]:
    x_all, ids = memory.patterns, memory.ids
    shards = []
    for i, rows in enumerate(_split(len(memory), n_shards, by)):
        x = np.ascontiguousarray(x_all[rows])
        folder = tmp / _shard_name(i)
        write_store(StoreContent(x=x, ids=ids[rows].copy(), normalize=memory.normalize, beta=memory.beta),
                    folder, where="shard_memory")
        shards.append({
            "folder": folder.name, "count": int(rows.size), "max_norm": max_row_norm(x),
            "manifest_sha256": _sha256(folder / MANIFEST),
        })
    from .._version import __version__
    return {
        "format": SHARDS_FORMAT_NAME, "format_version": SHARDS_FORMAT_VERSION,
        "written_by": f"densemem {__version__}", "dim": int(memory.dim), "normalize": bool(memory.normalize),
        "beta": float(memory.beta), "id_kind": "int64" if ids.dtype.kind in "iu" else "str",
        "count": len(memory), "next_id": memory._table.next_id, "by": by, "shards": shards,
    }


def _check_target(p: Path, overwrite: bool, where: str) -> None:
    if not p.exists():
        return
    if not p.is_dir():
        raise InputValueError(f"{where}: `path` {str(p)!r} exists and is not a folder; refusing to replace it.")
    if _is_sharded(p):
        if not overwrite:
            raise InputValueError(
                f"{where}: a sharded store already exists at {str(p)!r} and overwrite=False; "
                "pass overwrite=True to replace it."
            )
    elif any(p.iterdir()):
        raise InputValueError(f"{where}: {str(p)!r} is a folder that is not a sharded store; refusing to replace it.")


def _swap_in(tmp: Path, p: Path) -> None:
    """Rename the finished folder into place (an old store is moved aside, then deleted)."""
    prev = p.parent / f".{p.name}.densemem-shards-prev"
    if prev.exists():
        shutil.rmtree(prev)
    if p.exists():
        os.rename(p, prev)
    os.rename(tmp, p)
    fsync_dir(p.parent)
    if prev.exists():
        shutil.rmtree(prev)


def _read_top(p: Path, where: str) -> dict[str, Any]:
    mpath = p / TOP_MANIFEST
    man = read_json_manifest(
        mpath, name=SHARDS_FORMAT_NAME, version=SHARDS_FORMAT_VERSION, where=where, unsealed=(1,),
        missing=f"there is no sharded store at {str(p)!r} ({TOP_MANIFEST} is missing).",
    )
    shards = man.get("shards")
    keys = {"folder", "count", "max_norm", "manifest_sha256"}
    if not isinstance(shards, list) or not shards or not all(isinstance(s, dict) and keys <= s.keys() for s in shards):
        raise StoreFormatError(f"{where}: {str(mpath)!r} has a missing or bad 'shards' list.")
    for key in ("dim", "count", "normalize", "beta", "id_kind", "next_id", "by"):
        if key not in man:
            raise StoreFormatError(f"{where}: {str(mpath)!r} has no {key!r} entry.")
    return man
