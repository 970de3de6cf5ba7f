"""The near-duplicate plan object and its files (written atomically, nothing else touched)."""

from __future__ import annotations

import csv
import io
import json
import os
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputTypeError, InputValueError
from .._util import fsync_dir, to_plain, write_atomic

__all__ = ["PLAN_FILES", "DuplicateGroup", "DuplicatePlan"]

PLAN_FILES = {
    "groups_csv": "groups.csv",
    "groups_json": "groups.json",
    "groups_parquet": "groups.parquet",
    "keep": "keep.txt",
    "drop": "drop.txt",
}
_CSV_COLUMNS = (
    "group", "id", "row", "stored", "kept", "representative_id", "similarity", "size",
    "min_similarity", "mean_similarity",
)


@dataclass(frozen=True, slots=True)
class DuplicateGroup:
    """One group of near-duplicates.

    Attributes
    ----------
    ids, rows : ndarray
        Member ids and their row numbers in the input, in input order (rows
        of stored members are rows of the stored memory).
    representative : int or str
        Id of the member kept.
    min_similarity, mean_similarity : float
        Smallest and mean cosine similarity over all member pairs.
    similarities : ndarray of float64
        Each member's cosine similarity to the representative.
    stored : ndarray of bool
        Which members are items of the stored memory (all False without ``stored``).
    """

    ids: np.ndarray
    rows: np.ndarray
    representative: Any
    min_similarity: float
    mean_similarity: float
    similarities: np.ndarray
    stored: np.ndarray

    def __len__(self) -> int:
        return int(self.rows.shape[0])


@dataclass(frozen=True, slots=True, repr=False)
class DuplicatePlan:
    """What :func:`densemem.duplicates.plan_duplicates` returns: groups and a keep/drop plan.

    Nothing is removed anywhere: the plan lists what a caller could drop.
    Groups are packed: group ``g`` holds ``member_ids[group_offsets[g]:group_offsets[g+1]]``.
    Against a stored memory, a group is a stored item (kept) with the new
    items that duplicate it, or new items only; keep and drop lists hold new
    items only.

    Attributes
    ----------
    threshold : float
        Cosine similarity at or above which two items are near-duplicates.
    method : str
        "graph" or "attractor".
    candidates : str
        Where candidate pairs came from: "exact", "ivf" or "hnsw".
    candidate_params : dict
        The source's settings and checks (index, nlist, nprobe, k, sample pair
        recall, beta, steps, why it was chosen, ...).
    grouping : str
        "star" (every member meets the threshold against the representative),
        "complete" (every pair meets it) or "chain" (connected components).
    representative_rule : str
        "medoid", "first" or "quality".
    n_items, n_pairs : int
        Input rows (new rows against a stored memory); pairs judged (every
        candidate pair at or above the threshold, for both methods).
    group_offsets : ndarray of int64, shape (n_groups + 1,)
    member_ids, member_rows : ndarray, shape (n_members,)
    member_stored : ndarray of bool, shape (n_members,)
        True for members that are items of the stored memory.
    similarities : ndarray of float64, shape (n_members,)
        Each member's cosine similarity to its group's representative.
    representative_ids, representative_rows : ndarray, shape (n_groups,)
    representative_stored : ndarray of bool, shape (n_groups,)
        True where the item kept is a stored item.
    min_similarity, mean_similarity : ndarray of float64, shape (n_groups,)
    keep_ids : ndarray
        Every id not dropped, in input order (representatives, singletons and
        excluded zero vectors).
    drop_ids : ndarray
        Non-representative members of every group, in input order.
    duplicate_of_ids : ndarray, shape (n_drop,)
        For each dropped id, the id kept for it (its group's representative).
    duplicate_similarities : ndarray of float64, shape (n_drop,)
        Cosine similarity of each dropped item to the item kept for it.
    excluded_zero_ids : ndarray
        Rows with zero norm: no cosine exists, so they were left out of the search.
    seconds : float
        Wall time of the search.
    stored : dict or None
        The stored memory compared against (``n_stored``, ``dim``), or None.
    pair_ids : ndarray of shape (n_pairs, 2) or None
        With ``return_pairs=True``: the ids at both ends of every pair judged.
    pair_similarities : ndarray of float64, shape (n_pairs,), or None
        Their cosine similarities.
    """

    threshold: float
    method: str
    candidates: str
    candidate_params: dict
    grouping: str
    representative_rule: str
    n_items: int
    n_pairs: int
    group_offsets: np.ndarray
    member_ids: np.ndarray
    member_rows: np.ndarray
    member_stored: np.ndarray
    similarities: np.ndarray
    representative_ids: np.ndarray
    representative_rows: np.ndarray
    representative_stored: np.ndarray
    min_similarity: np.ndarray
    mean_similarity: np.ndarray
    keep_ids: np.ndarray
    drop_ids: np.ndarray
    duplicate_of_ids: np.ndarray
    duplicate_similarities: np.ndarray
    excluded_zero_ids: np.ndarray
    seconds: float
    stored: dict | None = None
    pair_ids: np.ndarray | None = None
    pair_similarities: np.ndarray | None = None

    # ----------------------------------------------------------- access
    @property
    def n_groups(self) -> int:
        """Number of groups (each with at least two members)."""
        return int(self.group_offsets.shape[0] - 1)

    def __len__(self) -> int:
        return self.n_groups

    def group(self, g: int) -> DuplicateGroup:
        """Group number ``g`` as a :class:`DuplicateGroup`.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> x = np.array([[1.0, 0.0], [1.0, 0.001], [0.0, 1.0]])
        >>> plan = densemem.plan_duplicates(x, threshold=0.99)
        >>> plan.group(0).ids.tolist()
        [0, 1]
        """
        if not isinstance(g, (int, np.integer)) or isinstance(g, bool):
            raise InputTypeError(f"DuplicatePlan.group: `g` must be an integer; got {type(g).__name__}.")
        if not 0 <= int(g) < self.n_groups:
            raise InputValueError(
                f"DuplicatePlan.group: `g` must be in [0, {self.n_groups}); got {g}."
            )
        a, b = int(self.group_offsets[g]), int(self.group_offsets[g + 1])
        return DuplicateGroup(
            ids=self.member_ids[a:b],
            rows=self.member_rows[a:b],
            representative=self.representative_ids[g].item(),
            min_similarity=float(self.min_similarity[g]),
            mean_similarity=float(self.mean_similarity[g]),
            similarities=self.similarities[a:b],
            stored=self.member_stored[a:b],
        )

    @property
    def groups(self) -> tuple[DuplicateGroup, ...]:
        """Every group, built on access."""
        return tuple(self.group(g) for g in range(self.n_groups))

    def __repr__(self) -> str:
        return (
            f"DuplicatePlan(n_items={self.n_items}, n_groups={self.n_groups}, "
            f"drop={self.drop_ids.shape[0]}, threshold={self.threshold:g}, method={self.method!r}, "
            f"candidates={self.candidates!r}, grouping={self.grouping!r})"
        )

    def summary(self) -> dict[str, Any]:
        """Scalars and settings (no per-member arrays), JSON-ready.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> x = np.array([[1.0, 0.0], [1.0, 0.001], [0.0, 1.0]])
        >>> plan = densemem.plan_duplicates(x, threshold=0.99)
        >>> plan.summary()["n_groups"]
        1
        """
        return {
            "threshold": self.threshold,
            "method": self.method,
            "candidates": self.candidates,
            "candidate_params": to_plain(self.candidate_params),
            "grouping": self.grouping,
            "representative_rule": self.representative_rule,
            "n_items": self.n_items,
            "n_pairs": self.n_pairs,
            "n_groups": self.n_groups,
            "n_keep": int(self.keep_ids.shape[0]),
            "n_drop": int(self.drop_ids.shape[0]),
            "n_excluded_zero": int(self.excluded_zero_ids.shape[0]),
            "lowest_similarity": _lowest(self.min_similarity),
            "lowest_kept_similarity": _lowest(self.duplicate_similarities),
            "stored": None if self.stored is None else to_plain(self.stored),
            "n_duplicates_of_stored": self.n_duplicates_of_stored,
            "seconds": self.seconds,
        }

    @property
    def n_duplicates_of_stored(self) -> int:
        """New items planned for dropping whose kept item is a stored item (0 without ``stored``)."""
        if self.stored is None or self.drop_ids.size == 0:
            return 0
        sizes = np.diff(self.group_offsets)
        return int(np.sum((sizes - 1)[self.representative_stored]))

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python (JSON-ready) copy of every field.

        Examples
        --------
        >>> import numpy as np, densemem
        >>> x = np.array([[1.0, 0.0], [1.0, 0.001], [0.0, 1.0]])
        >>> plan = densemem.plan_duplicates(x, threshold=0.99)
        >>> plan.to_dict()["threshold"]
        0.99
        """
        return {f.name: to_plain(getattr(self, f.name)) for f in fields(self)}

    # ----------------------------------------------------------- files
    def write(self, folder: str | os.PathLike[str], *, overwrite: bool = False) -> dict[str, str]:
        """Write the plan files into ``folder`` (created if missing).

        Files: ``groups.csv`` and ``groups.parquet`` (one row per member;
        parquet only when pyarrow is installed), ``groups.json`` (summary,
        groups, excluded zero vectors), ``keep.txt`` and ``drop.txt`` (one id a
        line). Each is written to a temporary file in ``folder``, flushed to
        disk and renamed into place. With ``overwrite=True`` a plan file this
        plan does not write (``groups.parquet`` from an earlier run with
        pyarrow, when pyarrow is now missing) is removed, so the folder never
        mixes two plans; no file of any other name is touched.

        Returns
        -------
        dict
            File role -> path written.

        Raises
        ------
        InputValueError
            A plan file (any of the names above) exists and ``overwrite`` is
            False, or ``folder`` is a file.

        Examples
        --------
        >>> import numpy as np, tempfile, densemem.duplicates as dd
        >>> plan = dd.plan_duplicates(np.array([[1.0, 0.0], [1.0, 0.0], [0.0, 1.0]]))
        >>> sorted(plan.write(tempfile.mkdtemp()))[:2]
        ['drop', 'groups_csv']
        """
        where = "DuplicatePlan.write"
        out = Path(folder)
        if out.exists() and not out.is_dir():
            raise InputValueError(f"{where}: `folder` must be a folder; {str(out)!r} is a file.")
        blobs = self._blobs()
        targets = {role: out / PLAN_FILES[role] for role in blobs}
        if not overwrite:
            there = [str(out / name) for name in PLAN_FILES.values() if (out / name).exists()]
            if there:
                raise InputValueError(
                    f"{where}: {there[0]!r} already exists; pass overwrite=True or choose another folder."
                )
        out.mkdir(parents=True, exist_ok=True)
        for role, data in blobs.items():
            write_atomic(targets[role], data)
        for role, name in PLAN_FILES.items():  # stale files of an earlier plan, own names only
            if role not in targets:
                stale = out / name
                if stale.is_file() or stale.is_symlink():
                    stale.unlink()
        fsync_dir(out)
        return {role: str(p) for role, p in targets.items()}

    def _kept_mask(self) -> np.ndarray:
        sizes = np.diff(self.group_offsets)
        return (self.member_rows == np.repeat(self.representative_rows, sizes)) & (
            self.member_stored == np.repeat(self.representative_stored, sizes)
        )

    def _member_table(self) -> dict[str, np.ndarray]:
        sizes = np.diff(self.group_offsets)
        gid = np.repeat(np.arange(self.n_groups), sizes)
        return {
            "group": gid,
            "id": self.member_ids,
            "row": self.member_rows,
            "stored": self.member_stored,
            "kept": self._kept_mask(),
            "representative_id": np.repeat(self.representative_ids, sizes),
            "similarity": self.similarities,
            "size": np.repeat(sizes, sizes),
            "min_similarity": np.repeat(self.min_similarity, sizes),
            "mean_similarity": np.repeat(self.mean_similarity, sizes),
        }

    def _blobs(self) -> dict[str, bytes]:
        table = self._member_table()
        blobs = {
            "groups_csv": _csv_bytes(table),
            "groups_json": self._json_bytes(),
            "keep": _lines(self.keep_ids),
            "drop": _lines(self.drop_ids),
        }
        parquet = _parquet_bytes(table)
        if parquet is not None:
            blobs["groups_parquet"] = parquet
        return blobs

    def _json_bytes(self) -> bytes:
        groups = []
        for g in range(self.n_groups):
            a, b = int(self.group_offsets[g]), int(self.group_offsets[g + 1])
            groups.append({
                "group": g,
                "representative_id": self.representative_ids[g].item(),
                "ids": self.member_ids[a:b].tolist(),
                "rows": self.member_rows[a:b].tolist(),
                "stored": self.member_stored[a:b].tolist(),
                "similarities": self.similarities[a:b].tolist(),
                "min_similarity": float(self.min_similarity[g]),
                "mean_similarity": float(self.mean_similarity[g]),
            })
        doc = {
            "summary": self.summary(),
            "groups": groups,
            "drop": {
                "ids": self.drop_ids.tolist(),
                "duplicate_of_ids": self.duplicate_of_ids.tolist(),
                "similarities": self.duplicate_similarities.tolist(),
            },
            "excluded_zero_ids": self.excluded_zero_ids.tolist(),
        }
        return (json.dumps(doc, indent=1) + "\n").encode("utf-8")


def _lowest(values: np.ndarray) -> float | None:
    return float(values.min()) if values.size else None


def _csv_bytes(table: dict[str, np.ndarray]) -> bytes:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(_CSV_COLUMNS)
    cols = [table[c].tolist() for c in _CSV_COLUMNS]
    for row in zip(*cols):
        w.writerow([repr(v) if isinstance(v, float) else v for v in row])
    return buf.getvalue().encode("utf-8")


def _lines(ids: np.ndarray) -> bytes:
    return "".join(f"{v}\n" for v in ids.tolist()).encode("utf-8")


def _parquet_bytes(table: dict[str, np.ndarray]) -> bytes | None:
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        return None
    buf = pa.BufferOutputStream()
    pq.write_table(pa.table({c: table[c] for c in _CSV_COLUMNS}), buf)
    return buf.getvalue().to_pybytes()
