"""Turn user input into clean arrays and numbers, or raise a clear error.

Every public entry point calls these first and passes its own name as ``where``,
so the message reads ``DenseMemory.retrieve: `beta` must be ...``. Internals
trust what comes out of here.
"""

from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from .errors import InputTypeError, InputValueError, UnknownIdError

__all__ = [
    "unit_rows",
    "check_score_range",
    "check_fraction",
    "max_row_norm",
    "as_float_matrix",
    "check_patterns",
    "check_queries",
    "check_beta",
    "check_k",
    "check_positive_int",
    "check_nonneg_float",
    "check_ids",
    "as_rng",
]


def _describe(x: Any) -> str:
    if isinstance(x, np.ndarray):
        return f"an array of shape {x.shape} and dtype {x.dtype}"
    return f"{type(x).__name__} {x!r}"[:120]


def as_float_matrix(x: Any, *, name: str, where: str, allow_1d: bool = False) -> tuple[np.ndarray, bool]:
    """Return ``x`` as a C-contiguous float32 matrix and whether it was 1-D.

    Accepts any real numeric array-like (float64 and integers are converted).
    Rejects ragged, object, complex, boolean, string and >2-D input, and names
    the first row holding NaN or infinity.
    """
    if isinstance(x, (str, bytes)) or x is None:
        raise InputTypeError(f"{where}: `{name}` must be a numeric array; got {_describe(x)}.")
    try:
        arr = np.asarray(x)
    except ValueError as exc:  # ragged nested lists
        raise InputValueError(
            f"{where}: `{name}` must be a rectangular numeric array; got ragged input ({exc})."
        ) from None
    if arr.dtype == object:
        raise InputTypeError(
            f"{where}: `{name}` must be a rectangular numeric array; got an object array "
            "(ragged rows or mixed types?)."
        )
    if arr.dtype.kind not in "fiu":
        raise InputTypeError(
            f"{where}: `{name}` must hold real numbers (float or int); got dtype {arr.dtype}."
        )
    was_1d = arr.ndim == 1
    if was_1d and allow_1d:
        arr = arr[None, :]
    if arr.ndim != 2:
        expect = "1-D or 2-D" if allow_1d else "2-D (n_rows, n_features)"
        raise InputValueError(f"{where}: `{name}` must be {expect}; got {arr.ndim}-D of shape {arr.shape}.")
    if arr.dtype.kind == "f" and arr.size:
        finite = np.isfinite(arr)
        if not finite.all():
            bad_row = int(np.flatnonzero(~finite.all(axis=1))[0])
            what = "NaN" if np.isnan(arr[bad_row]).any() else "infinity"
            raise InputValueError(
                f"{where}: `{name}` contains {what} at row {bad_row}; clean or drop it first."
            )
        if arr.dtype.itemsize > 4:
            big = np.abs(arr) > np.finfo(np.float32).max
            if big.any():
                bad_row = int(np.flatnonzero(big.any(axis=1))[0])
                raise InputValueError(
                    f"{where}: `{name}` holds a value at row {bad_row} too large for float32 "
                    f"(largest is {float(np.finfo(np.float32).max):.3g})."
                )
    out = np.ascontiguousarray(arr, dtype=np.float32)
    return out, was_1d


def check_patterns(x: Any, *, where: str, dim: int | None = None, name: str = "patterns") -> np.ndarray:
    """Validate stored patterns: a 2-D finite float32 array with ``dim`` columns."""
    arr, _ = as_float_matrix(x, name=name, where=where)
    if dim is not None and arr.shape[1] != dim:
        raise InputValueError(
            f"{where}: `{name}` have {arr.shape[1]} features but the memory stores "
            f"{dim}-dimensional patterns."
        )
    return arr


def check_queries(x: Any, *, where: str, dim: int, name: str = "queries") -> tuple[np.ndarray, bool]:
    """Validate queries: 1-D (one query) or 2-D, finite, with ``dim`` features.

    Returns the (n_queries, dim) float32 array and whether the input was 1-D.
    """
    arr, was_1d = as_float_matrix(x, name=name, where=where, allow_1d=True)
    if arr.shape[1] != dim:
        raise InputValueError(
            f"{where}: `{name}` have {arr.shape[1]} features but the memory stores "
            f"{dim}-dimensional patterns."
        )
    if arr.shape[0] == 0:
        raise InputValueError(f"{where}: `{name}` is empty (0 rows); pass at least one query.")
    return arr, was_1d


def _is_real_number(x: Any) -> bool:
    return isinstance(x, numbers.Real) and not isinstance(x, bool)


def check_beta(beta: Any, *, where: str, name: str = "beta") -> float:
    """Return ``beta`` as a finite float > 0."""
    if isinstance(beta, (np.ndarray, np.generic)) and np.ndim(beta) == 0:
        beta = beta.item()
    if not _is_real_number(beta):
        raise InputTypeError(f"{where}: `{name}` must be a finite number > 0; got {_describe(beta)}.")
    b = float(beta)
    if not np.isfinite(b) or b <= 0:
        raise InputValueError(f"{where}: `{name}` must be a finite number > 0; got {beta!r}.")
    return b


def check_positive_int(x: Any, *, name: str, where: str, minimum: int = 1) -> int:
    """Return ``x`` as an int >= ``minimum``."""
    if isinstance(x, np.integer):
        x = int(x)
    if not isinstance(x, int) or isinstance(x, bool):
        raise InputTypeError(f"{where}: `{name}` must be an integer >= {minimum}; got {_describe(x)}.")
    if x < minimum:
        raise InputValueError(f"{where}: `{name}` must be an integer >= {minimum}; got {x}.")
    return x


def check_nonneg_float(x: Any, *, name: str, where: str, strict: bool = False) -> float:
    """Return ``x`` as a finite float >= 0 (> 0 when ``strict``)."""
    if isinstance(x, np.generic):
        x = x.item()
    if not _is_real_number(x):
        raise InputTypeError(f"{where}: `{name}` must be a finite number; got {_describe(x)}.")
    v = float(x)
    bad = not np.isfinite(v) or v < 0 or (strict and v == 0)
    if bad:
        rule = "> 0" if strict else ">= 0"
        raise InputValueError(f"{where}: `{name}` must be a finite number {rule}; got {x!r}.")
    return v


def check_k(k: Any, *, n: int, where: str, name: str = "k") -> int:
    """Return ``k`` as an int with 1 <= k <= n (``n`` stored patterns)."""
    k = check_positive_int(k, name=name, where=where)
    if k > n:
        raise InputValueError(
            f"{where}: `{name}` must be at most the number of stored patterns ({n}); got {k}."
        )
    return k


def check_ids(ids: Any, *, n: int, where: str, name: str = "ids") -> np.ndarray:
    """Return ids as a 1-D int64 or fixed-width unicode array of length ``n``, no repeats."""
    if isinstance(ids, (str, bytes, int, np.integer)):
        ids = [ids]
    if not isinstance(ids, np.ndarray):
        ids = list(ids)
        kinds = {"str" if isinstance(v, str) else "int" if isinstance(v, (int, np.integer)) and not isinstance(v, bool) else type(v).__name__ for v in ids}
        if len(kinds) > 1:
            raise InputTypeError(
                f"{where}: `{name}` must be all integers or all strings; got a mix of {', '.join(sorted(kinds))}."
            )
    arr = np.asarray(ids)
    if arr.ndim != 1:
        raise InputValueError(f"{where}: `{name}` must be 1-D; got shape {arr.shape}.")
    if arr.size == 0 and n == 0:
        return np.empty(0, dtype=np.int64)
    if arr.dtype.kind in "iu":
        arr = arr.astype(np.int64)
    elif arr.dtype.kind == "U":
        pass
    elif arr.dtype.kind == "O" and all(isinstance(v, str) for v in arr):
        arr = arr.astype(str)
    else:
        raise InputTypeError(
            f"{where}: `{name}` must be integers or strings (not mixed); got dtype {arr.dtype}."
        )
    if arr.shape[0] != n:
        raise InputValueError(f"{where}: `{name}` has {arr.shape[0]} entries for {n} patterns.")
    uniq, counts = np.unique(arr, return_counts=True)
    if uniq.size != arr.size:
        dup = uniq[counts > 1][0].item()
        raise InputValueError(f"{where}: `{name}` repeats the id {dup!r}; ids must be unique.")
    return arr


def unit_rows(x: np.ndarray, *, where: str, what: str) -> np.ndarray:
    """L2-normalize float32 rows (norms in float64, so huge entries do not overflow).

    ``what`` names the rows in the error, e.g. "query" or "`patterns`".
    """
    norms = np.sqrt(np.einsum("ij,ij->i", x.astype(np.float64), x.astype(np.float64)))
    zero = np.flatnonzero(norms == 0)
    if zero.size:
        raise InputValueError(
            f"{where}: {what} row {int(zero[0])} has zero norm and cannot be normalized (normalize=True); "
            "drop it first."
        )
    return (x / norms[:, None]).astype(np.float32)


_SCORE_LIMIT = 1e37  # float32 scores overflow near 3.4e38; keep a margin for sums


def check_score_range(beta: float, query_norm: float, max_norm: float, *, where: str) -> None:
    """Refuse a beta whose scores beta * |q| * M would overflow float32."""
    top = beta * query_norm * max_norm
    if not np.isfinite(top) or top > _SCORE_LIMIT:
        limit = _SCORE_LIMIT / max(query_norm * max_norm, np.finfo(np.float64).tiny)
        raise InputValueError(
            f"{where}: `beta` = {beta:g} times the largest query norm ({query_norm:.3g}) and stored norm "
            f"({max_norm:.3g}) exceeds the float32 score range; use beta <= {limit:.3g}."
        )


def check_fraction(x: Any, *, name: str, where: str) -> float:
    """Return ``x`` as a float in the open interval (0, 1)."""
    val = check_nonneg_float(x, name=name, where=where, strict=True)
    if val >= 1:
        raise InputValueError(f"{where}: `{name}` must be a fraction in (0, 1); got {x!r}.")
    return val


def max_row_norm(x: np.ndarray) -> float:
    """Largest L2 norm of the rows of ``x`` (computed in float64)."""
    return float(np.sqrt(np.max(np.einsum("ij,ij->i", x.astype(np.float64), x.astype(np.float64)))))


def unknown_id_error(where: str, missing: Any) -> UnknownIdError:
    """Build the error for an id the memory does not hold."""
    return UnknownIdError(f"{where}: unknown id {missing!r}; the memory holds no pattern with it.")


def as_rng(seed: Any) -> np.random.Generator:
    """Normalize ``seed`` (None, int or Generator) with ``np.random.default_rng``."""
    if isinstance(seed, np.random.Generator):
        return seed
    return np.random.default_rng(seed)
