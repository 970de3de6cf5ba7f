"""Argument checks for :func:`densemem.duplicates.plan_duplicates` (the public boundary)."""

from __future__ import annotations

import numbers
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._validation import as_float_matrix, check_beta, check_ids, check_positive_int
from ..errors import DenseMemWarning, InputTypeError, InputValueError

__all__ = ["Options", "batch_matrix", "check_options", "check_score", "input_matrix", "normalized_copy"]

WHERE = "plan_duplicates"
METHODS = ("graph", "attractor")
SOURCES = ("auto", "exact", "ivf", "join", "hnsw")
GROUPINGS = ("star", "complete", "chain")
RETRIEVALS = ("exact", "auto", "certified")


@dataclass(frozen=True, slots=True)
class Options:
    threshold: float
    method: str
    candidates: str
    k: int
    grouping: str
    nlist: int | None
    nprobe: int
    check_sample: int
    target_recall: float
    beta: float | None
    steps: int
    retrieve_method: str
    tile_mib: float
    show_progress: bool | None


def _real(x: Any, name: str) -> float:
    if isinstance(x, np.ndarray) and x.ndim == 0:
        x = x.item()
    if not isinstance(x, numbers.Real) or isinstance(x, bool):
        raise InputTypeError(f"{WHERE}: `{name}` must be a real number; got {type(x).__name__} {x!r}.")
    return float(x)


def check_threshold(threshold: Any) -> float:
    t = _real(threshold, "threshold")
    if not (np.isfinite(t) and -1.0 < t <= 1.0):
        raise InputValueError(f"{WHERE}: `threshold` must be a cosine similarity in (-1, 1]; got {threshold!r}.")
    return t


def _choice(value: Any, name: str, allowed: tuple[str, ...]) -> str:
    if not isinstance(value, str) or value not in allowed:
        raise InputValueError(f"{WHERE}: `{name}` must be one of {', '.join(map(repr, allowed))}; got {value!r}.")
    return value


def check_options(**kw: Any) -> Options:
    """Validate every scalar option; return them typed."""
    t = check_threshold(kw["threshold"])
    method = _choice(kw["method"], "method", METHODS)
    cands = _choice(kw["candidates"], "candidates", SOURCES)
    grouping = _choice(kw["grouping"], "grouping", GROUPINGS)
    if method == "attractor":
        if t >= 1.0:
            raise InputValueError(
                f"{WHERE}: method='attractor' needs `threshold` < 1 (beta = 2 / (1 - threshold)); "
                "got 1.0. Use method='graph' for exact copies."
            )
    target = _real(kw["target_recall"], "target_recall")
    if not 0.0 < target <= 1.0:
        raise InputValueError(f"{WHERE}: `target_recall` must be in (0, 1]; got {kw['target_recall']!r}.")
    work = _real(kw["tile_mib"], "tile_mib")
    if not (np.isfinite(work) and work > 0):
        raise InputValueError(f"{WHERE}: `tile_mib` must be a finite number > 0; got {kw['tile_mib']!r}.")
    progress = kw["progress"]
    if progress is not None and not isinstance(progress, bool):
        raise InputTypeError(f"{WHERE}: `progress` must be True, False or None; got {progress!r}.")
    return Options(
        threshold=t,
        method=method,
        candidates=cands,
        k=check_positive_int(kw["k"], name="k", where=WHERE),
        grouping=grouping,
        nlist=None if kw["nlist"] is None else check_positive_int(kw["nlist"], name="nlist", where=WHERE),
        nprobe=check_positive_int(kw["nprobe"], name="nprobe", where=WHERE),
        check_sample=check_positive_int(kw["check_sample"], name="check_sample", where=WHERE, minimum=0),
        target_recall=target,
        beta=None if kw["beta"] is None else check_beta(kw["beta"], where=WHERE),
        steps=check_positive_int(kw["steps"], name="steps", where=WHERE),
        retrieve_method=_choice(kw["retrieve_method"], "retrieve_method", RETRIEVALS),
        tile_mib=work,
        show_progress=progress,
    )


def input_matrix(data: Any, ids: Any) -> tuple[np.ndarray, np.ndarray]:
    """The (n, d) float32 rows and their ids, from an array or a DenseMemory (never copied back)."""
    from ..dense import DenseMemory

    if isinstance(data, DenseMemory):
        if ids is not None:
            raise InputValueError(
                f"{WHERE}: `ids` must be None when `data` is a DenseMemory (its own ids are used)."
            )
        x, all_ids = data.patterns, data.ids
    else:
        x, _ = as_float_matrix(data, name="data", where=WHERE)
        all_ids = np.arange(x.shape[0], dtype=np.int64) if ids is None else None
    if x.shape[0] == 0:
        raise InputValueError(f"{WHERE}: `data` is empty (0 rows); pass at least one row.")
    if x.shape[1] == 0:
        raise InputValueError(f"{WHERE}: `data` has 0 features per row; pass at least one column.")
    if all_ids is None:
        all_ids = check_ids(ids, n=x.shape[0], where=WHERE)
    return x, all_ids


def check_score(representative: Any, n: int) -> tuple[str, np.ndarray | None]:
    """The representative rule and, for a quality-score array, the scores (float64, finite, length n)."""
    if isinstance(representative, str):
        return _choice(representative, "representative", ("medoid", "first")), None
    if representative is None or isinstance(representative, (bool, numbers.Number)):
        raise InputTypeError(
            f"{WHERE}: `representative` must be 'medoid', 'first' or an array of one quality score per row; "
            f"got {representative!r}."
        )
    arr = np.asarray(representative)
    if arr.dtype.kind not in "fiu":
        raise InputTypeError(
            f"{WHERE}: `representative` scores must be real numbers; got dtype {arr.dtype}."
        )
    if arr.ndim != 1 or arr.shape[0] != n:
        raise InputValueError(
            f"{WHERE}: `representative` scores must have shape ({n},), one per row of `data`; "
            f"got shape {arr.shape}."
        )
    score = arr.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(score))
    if bad.size:
        raise InputValueError(f"{WHERE}: `representative` score at row {int(bad[0])} is not finite.")
    return "quality", score


def normalized_copy(x: np.ndarray, ids: np.ndarray, chunk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit-norm float32 copy of the non-zero rows, their row numbers, and the zero rows.

    Norms are taken in float64. Zero rows have no direction: they are left out
    and a DenseMemWarning names them.
    """
    n, d = x.shape
    norms = np.empty(n)
    for a in range(0, n, chunk):
        block = x[a : a + chunk].astype(np.float64)
        norms[a : a + chunk] = np.sqrt(np.einsum("ij,ij->i", block, block))
    zero = np.flatnonzero(norms == 0)
    valid = np.flatnonzero(norms > 0) if zero.size else np.arange(n)
    if zero.size:
        shown = ", ".join(repr(v) for v in ids[zero[:5]].tolist())
        more = f" and {zero.size - 5} more" if zero.size > 5 else ""
        warnings.warn(
            f"{WHERE}: {zero.size} zero vector(s) have no cosine similarity and were left out "
            f"(ids {shown}{more}); they are listed in `excluded_zero_ids` and kept.",
            DenseMemWarning,
            stacklevel=3,
        )
    xn = np.empty((valid.size, d), dtype=np.float32)
    for a in range(0, valid.size, chunk):
        rows = valid[a : a + chunk] if zero.size else slice(a, a + chunk)  # a slice reads without a gather
        xn[a : a + chunk] = x[rows].astype(np.float64) / norms[rows, None]
    return xn, valid, zero


def check_stored(stored: Any) -> Any:
    """``stored`` must be a DenseMemory (for instance ``DenseMemory.load(folder, mmap=True)``)."""
    from ..dense import DenseMemory

    if not isinstance(stored, DenseMemory):
        raise InputTypeError(
            f"{WHERE}: `stored` must be a DenseMemory (e.g. DenseMemory.load(folder, mmap=True)); "
            f"got {type(stored).__name__}."
        )
    if len(stored) == 0:
        raise InputValueError(f"{WHERE}: `stored` holds no patterns; there is nothing to compare against.")
    return stored


def batch_matrix(data: Any, ids: Any, stored: Any) -> tuple[np.ndarray, np.ndarray]:
    """The new batch as it is (a memory map stays one: nothing is converted whole) and its ids.

    Finiteness is checked chunk by chunk later, while the rows are normalized.
    Default ids continue the stored memory's integer ids (largest + 1, + 2, ...);
    a memory with string ids needs explicit ``ids``. Ids shared with the stored
    memory are refused.
    """
    from ..dense import DenseMemory

    if isinstance(data, DenseMemory):
        if ids is not None:
            raise InputValueError(f"{WHERE}: `ids` must be None when `data` is a DenseMemory (its own ids are used).")
        x, ids = data.patterns, data.ids
    elif isinstance(data, (str, bytes)) or data is None:
        raise InputTypeError(f"{WHERE}: `data` must be a numeric array; got {type(data).__name__}.")
    else:
        try:
            x = data if isinstance(data, np.ndarray) else np.asarray(data)
        except ValueError as exc:
            raise InputValueError(f"{WHERE}: `data` must be a rectangular numeric array; got ragged input ({exc}).") from None
        if x.dtype.kind not in "fiu":
            raise InputTypeError(f"{WHERE}: `data` must hold real numbers (float or int); got dtype {x.dtype}.")
        if x.ndim != 2:
            raise InputValueError(f"{WHERE}: `data` must be 2-D (n_rows, n_features); got {x.ndim}-D of shape {x.shape}.")
    if x.shape[0] == 0:
        raise InputValueError(f"{WHERE}: `data` is empty (0 rows); pass at least one row.")
    if x.shape[1] != stored.dim:
        raise InputValueError(
            f"{WHERE}: `data` has {x.shape[1]} features per row but the `stored` memory has {stored.dim}; "
            "a batch must have the store's width."
        )
    sids = stored.ids
    if ids is None:
        if sids.dtype.kind not in "iu":
            raise InputValueError(
                f"{WHERE}: the `stored` memory has string ids, so `ids` for the new rows must be given "
                "(one unique id per row, none already stored)."
            )
        start = int(sids.max()) + 1
        return x, np.arange(start, start + x.shape[0], dtype=np.int64)
    bids = check_ids(ids, n=x.shape[0], where=WHERE)
    if (bids.dtype.kind == "U") != (sids.dtype.kind == "U"):
        raise InputTypeError(
            f"{WHERE}: `ids` must be of the stored memory's kind ({'strings' if sids.dtype.kind == 'U' else 'integers'}); "
            f"got {'strings' if bids.dtype.kind == 'U' else 'integers'}."
        )
    shared = np.flatnonzero(np.isin(bids, sids))
    if shared.size:
        raise InputValueError(
            f"{WHERE}: `ids` must be new; {shared.size} id(s) are already in the `stored` memory "
            f"(first: {bids[shared[0]].item()!r} at row {int(shared[0])})."
        )
    return x, bids


def finite_unit_chunk(block: np.ndarray, start: int, name: str = "data") -> tuple[np.ndarray, np.ndarray]:
    """Float64 norms and a unit float32 copy of one chunk (zero rows stay zero); names a NaN/inf row."""
    b = np.asarray(block, dtype=np.float64)
    finite = np.isfinite(b)
    if not finite.all():
        bad = int(np.flatnonzero(~finite.all(axis=1))[0])
        what = "NaN" if np.isnan(b[bad]).any() else "infinity"
        raise InputValueError(f"{WHERE}: `{name}` contains {what} at row {start + bad}; clean or drop it first.")
    norms = np.sqrt(np.einsum("ij,ij->i", b, b))
    safe = np.where(norms > 0, norms, 1.0)
    return norms, (b / safe[:, None]).astype(np.float32)
