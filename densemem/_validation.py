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
    "check_open_fraction",
    "check_unit_interval",
    "check_positive_fraction",
    "max_row_norm",
    "as_float_matrix",
    "check_patterns",
    "check_queries",
    "check_beta",
    "check_k",
    "check_positive_int",
    "check_nonneg_float",
    "check_ids",
    "check_id_list",
    "check_seed",
    "as_rng",
    "check_index_params",
    "check_search_sizes",
    "check_nearest_range",
    "check_finite_result",
    "SEED_MAX",
    "SCORE_LIMIT",
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


_INT64_MAX = int(np.iinfo(np.int64).max)


def _id_kind(v: Any) -> str:
    """'int', 'str' or the name of a type ids may not have (bool and float are not ints here)."""
    if isinstance(v, (bool, np.bool_)):
        return "bool"
    if isinstance(v, (int, np.integer)):
        return "int"
    if isinstance(v, (str, np.str_)):
        return "str"
    return type(v).__name__


def check_id_list(ids: Any, *, where: str, name: str = "ids") -> np.ndarray:
    """Return ids as a 1-D int64 or unicode array: one id or a flat iterable of ids.

    The rule for ids everywhere (adding, removing, looking up): ints stay ints
    (Python or numpy integers, within int64), strings stay strings; bools,
    floats, None, nested lists and a mix of ints and strings are refused.

    Examples
    --------
    >>> from densemem._validation import check_id_list
    >>> check_id_list((i for i in [3, 1]), where="demo").tolist()
    [3, 1]
    """
    if ids is None:
        raise InputTypeError(f"{where}: `{name}` must be an id or a list of ids (int or str); got None.")
    if isinstance(ids, (str, np.str_, int, np.integer, bool, np.bool_)):
        ids = [ids]
    elif isinstance(ids, np.ndarray):
        if ids.ndim != 1:
            raise InputValueError(f"{where}: `{name}` must be a flat list of ids (1-D); got shape {ids.shape}.")
        if ids.dtype.kind in "iu" or ids.dtype.kind == "U":
            return _checked_id_array(ids, where=where, name=name)
        ids = ids.tolist()
    elif isinstance(ids, (bytes, bytearray, dict, set, frozenset)) or not hasattr(ids, "__iter__"):
        raise InputTypeError(
            f"{where}: `{name}` must be an id or a list of ids (int or str); got {_describe(ids)}."
        )
    values = list(ids)
    kinds = [_id_kind(v) for v in values]
    for pos, (v, kind) in enumerate(zip(values, kinds)):
        if kind in ("list", "tuple", "ndarray"):
            raise InputValueError(
                f"{where}: `{name}` must be a flat list of ids; entry {pos} is a {kind} ({_describe(v)})."
            )
        if kind not in ("int", "str"):
            raise InputTypeError(
                f"{where}: every entry of `{name}` must be an int or a str; entry {pos} is {_describe(v)}."
            )
    if len(set(kinds)) > 1:
        raise InputTypeError(
            f"{where}: `{name}` must be all integers or all strings; got a mix of ints and strings."
        )
    if not values:
        return np.empty(0, dtype=np.int64)
    if kinds[0] == "str":
        return np.array([str(v) for v in values], dtype=str)
    ints = [int(v) for v in values]
    too_big = [v for v in ints if not -_INT64_MAX - 1 <= v <= _INT64_MAX]
    if too_big:
        raise InputValueError(
            f"{where}: `{name}` must fit in int64 (|id| < 2**63); got {too_big[0]}."
        )
    return np.array(ints, dtype=np.int64)


def _checked_id_array(arr: np.ndarray, *, where: str, name: str) -> np.ndarray:
    if arr.dtype.kind == "u" and arr.size and int(arr.max()) > _INT64_MAX:
        raise InputValueError(
            f"{where}: `{name}` must fit in int64 (ids < 2**63); got {int(arr.max())} (dtype {arr.dtype})."
        )
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64)
    return arr


def check_ids(ids: Any, *, n: int, where: str, name: str = "ids") -> np.ndarray:
    """Return ids for ``n`` new patterns (the rule of :func:`check_id_list`), no repeats."""
    arr = check_id_list(ids, where=where, name=name)
    if arr.size == 0 and n == 0:
        return np.empty(0, dtype=np.int64)
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
    norms = row_norms(x)
    zero = np.flatnonzero(norms == 0)
    if zero.size:
        raise InputValueError(
            f"{where}: {what} row {int(zero[0])} has zero norm and cannot be normalized (normalize=True); "
            "drop it first."
        )
    return (x / norms[:, None]).astype(np.float32)


SCORE_LIMIT = 1e37  # float32 scores overflow near 3.4e38; keep a margin for sums


def check_score_range(beta: float, query_norm: float, max_norm: float, *, where: str) -> None:
    """Refuse a beta or norms whose scores would leave the float32 range.

    Three limits, each of which the float32 kernels (and faiss) need whatever the
    other factors are: ``beta`` itself, the raw scores ``|q| * M`` (faiss ranks
    them without beta) and the scaled scores ``beta * |q| * M``.

    Examples
    --------
    >>> from densemem._validation import check_score_range
    >>> check_score_range(1.0, 1.0, 1.0, where="demo")  # fine: nothing raised
    """
    if not beta <= SCORE_LIMIT:
        raise InputValueError(
            f"{where}: `beta` = {beta:g} is beyond the float32 score range; use beta <= {SCORE_LIMIT:.3g}."
        )
    raw = query_norm * max_norm
    if not np.isfinite(raw) or raw > SCORE_LIMIT:
        raise InputValueError(
            f"{where}: the largest query norm ({query_norm:.3g}) times the largest stored norm "
            f"({max_norm:.3g}) exceeds the float32 score range ({SCORE_LIMIT:.3g}); rescale the queries "
            "or the patterns."
        )
    top = beta * raw
    if not np.isfinite(top) or top > SCORE_LIMIT:
        limit = SCORE_LIMIT / max(raw, np.finfo(np.float64).tiny)
        raise InputValueError(
            f"{where}: `beta` = {beta:g} times the largest query norm ({query_norm:.3g}) and stored norm "
            f"({max_norm:.3g}) exceeds the float32 score range; use beta <= {limit:.3g}."
        )


def _check_interval(x: Any, *, name: str, where: str, low_open: bool, high_open: bool) -> float:
    """A finite real number in the interval from 0 to 1, either end open or closed.

    Examples
    --------
    >>> from densemem._validation import check_open_fraction, check_unit_interval
    >>> check_open_fraction(1e-6, name="tol_mass", where="demo"), check_unit_interval(0, name="units", where="demo")
    (1e-06, 0.0)
    """
    text = f"{'(' if low_open else '['}0, 1{')' if high_open else ']'}"
    if isinstance(x, np.generic):
        x = x.item()
    if not _is_real_number(x):
        raise InputTypeError(f"{where}: `{name}` must be a number in {text}; got {_describe(x)}.")
    v = float(x)
    bad = not np.isfinite(v) or v < 0 or v > 1 or (low_open and v == 0) or (high_open and v == 1)
    if bad:
        raise InputValueError(f"{where}: `{name}` must be a number in {text}; got {x!r}.")
    return v


def check_open_fraction(x: Any, *, name: str, where: str) -> float:
    """Return ``x`` as a float in the open interval (0, 1): a tolerance such as ``tol_mass``."""
    return _check_interval(x, name=name, where=where, low_open=True, high_open=True)


def check_unit_interval(x: Any, *, name: str, where: str) -> float:
    """Return ``x`` as a float in [0, 1]: a probability or a damaged share (0 and 1 allowed)."""
    return _check_interval(x, name=name, where=where, low_open=False, high_open=False)


def check_positive_fraction(x: Any, *, name: str, where: str) -> float:
    """Return ``x`` as a float in (0, 1]: a share that may be the whole but not nothing."""
    return _check_interval(x, name=name, where=where, low_open=True, high_open=False)


_NORM_BLOCK_BYTES = 4 << 20  # one reused float64 block: bounded extra memory for large tables


def row_norms(x: np.ndarray) -> np.ndarray:
    """L2 norms of the rows of ``x`` in float64 (float32 rows of 1e38 or 1e-30 neither
    overflow nor underflow there), in blocks so the float64 copy stays small.

    The float64 block is one reused buffer of about 4 MB: a fresh float64 copy per block
    cost more in page faults than the sums (2M x 768 float16 rows took 6.3 s with it, 2.2 s without).
    """
    n, d = x.shape
    out = np.empty(n, dtype=np.float64)
    step = max(1, min(n, _NORM_BLOCK_BYTES // (8 * max(d, 1))))
    wide = np.empty((step, d), dtype=np.float64)
    for a in range(0, n, step):
        rows = x[a : a + step]
        block = wide[: rows.shape[0]]
        np.copyto(block, rows, casting="unsafe")  # as np.asarray(rows, float64) would
        out[a : a + block.shape[0]] = np.sqrt(np.einsum("ij,ij->i", block, block))
    return out


def max_row_norm(x: np.ndarray) -> float:
    """Largest L2 norm of the rows of ``x`` (float64; 0.0 for no rows).

    Examples
    --------
    >>> import numpy as np
    >>> from densemem._validation import max_row_norm
    >>> max_row_norm(np.array([[3e38, 3e38]], dtype=np.float32)) > 3.4e38  # its square overflows float32
    True
    """
    if x.shape[0] == 0 or x.shape[1] == 0:
        return 0.0
    return float(np.max(row_norms(x)))


def unknown_id_error(where: str, missing: Any) -> UnknownIdError:
    """Build the error for an id the memory does not hold."""
    return UnknownIdError(f"{where}: unknown id {missing!r}; the memory holds no pattern with it.")


SEED_MAX = 2**31 - 1  # faiss takes a C int; one rule for every seed


def check_seed(seed: Any, *, where: str, name: str = "seed") -> int:
    """Return ``seed`` as an int in [0, 2**31 - 1] (the one seed rule; faiss takes a C int).

    Examples
    --------
    >>> from densemem._validation import check_seed
    >>> check_seed(7, where="demo")
    7
    """
    if isinstance(seed, np.integer):
        seed = int(seed)
    if not isinstance(seed, int) or isinstance(seed, bool):
        raise InputTypeError(
            f"{where}: `{name}` must be an int in [0, {SEED_MAX}]; got {_describe(seed)}."
        )
    if not 0 <= seed <= SEED_MAX:
        raise InputValueError(f"{where}: `{name}` must be an int in [0, {SEED_MAX}]; got {seed}.")
    return seed


def as_rng(seed: Any, *, where: str, name: str = "seed") -> np.random.Generator:
    """A numpy Generator from ``seed``: None (fresh entropy), an int (:func:`check_seed`) or a Generator.

    Examples
    --------
    >>> from densemem._validation import as_rng
    >>> float(as_rng(0, where="demo").random()) == float(as_rng(0, where="demo").random())
    True
    """
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is None:
        return np.random.default_rng()
    return np.random.default_rng(check_seed(seed, where=where, name=name))


# faiss parameters (HNSW M >= 2: M = 1 crashes the interpreter in faiss's graph build; every
# other count must fit the C int faiss stores it in, and M is kept to a graph that fits memory)
_HNSW_M_MAX = 512
_C_INT_MAX = 2**31 - 1


def check_index_params(kind: Any, params: dict[str, Any], *, where: str) -> dict[str, Any]:
    """Check faiss index parameters before any reaches faiss; return them as ints.

    HNSW: ``M`` in [2, 512], ``ef_construction`` and ``ef_search`` in [1, 2**31 - 1];
    IVF: ``nlist`` and ``nprobe`` in [1, 2**31 - 1]; ``seed`` by :func:`check_seed`.

    Examples
    --------
    >>> from densemem._validation import check_index_params
    >>> check_index_params("hnsw", {"M": 8}, where="demo")
    {'M': 8}
    """
    if kind not in ("hnsw", "ivf"):
        raise InputValueError(f"{where}: `kind` must be 'hnsw' or 'ivf'; got {kind!r}.")
    allowed = {"hnsw": ("M", "ef_construction", "ef_search", "seed"), "ivf": ("nlist", "nprobe", "seed")}[kind]
    unknown = sorted(set(params) - set(allowed))
    if unknown:
        raise InputValueError(f"{where}: unknown {kind} option(s) {unknown}; use {sorted(allowed)}.")
    out: dict[str, Any] = {}
    for key, val in params.items():
        if key == "seed":
            out[key] = check_seed(val, where=where)
            continue
        low, high = (2, _HNSW_M_MAX) if key == "M" else (1, _C_INT_MAX)
        v = check_positive_int(val, name=key, where=where, minimum=low)
        if v > high:
            raise InputValueError(f"{where}: `{key}` must be an integer in [{low}, {high}]; got {v}.")
        out[key] = v
    return out


_SMALL_LISTS = 64  # list counts always accepted (callers clamp them to tiny data)


def check_search_sizes(n_rows: int, *, where: str, **counts: Any) -> None:
    """Check faiss list and candidate counts (``nlist``, ``nprobe``, ``k``...) before faiss sees them.

    Each given count (None: the default is chosen later) must be an int in
    [1, 2**31 - 1] (faiss stores them as C ints); ``nlist`` and ``nprobe`` must also
    be at most ``max(n_rows, 64)`` (no more lists than rows to put in them; small
    counts stay allowed for small data, which the callers clamp), so no count can
    make faiss allocate far beyond the data.

    Examples
    --------
    >>> from densemem._validation import check_search_sizes
    >>> check_search_sizes(100, where="demo", nlist=10, nprobe=None)  # fine: nothing raised
    """
    for key, val in counts.items():
        if val is None:
            continue
        v = check_positive_int(val, name=key, where=where)
        if v > _C_INT_MAX:
            raise InputValueError(f"{where}: `{key}` must be an integer in [1, {_C_INT_MAX}]; got {v}.")
        if key in ("nlist", "nprobe") and v > max(n_rows, _SMALL_LISTS):
            raise InputValueError(
                f"{where}: `{key}` must be at most the number of rows ({n_rows}, or {_SMALL_LISTS} for fewer "
                f"rows); got {v}."
            )


def check_nearest_range(query_norm: float, max_norm: float, metric: str, *, where: str) -> None:
    """Refuse queries whose faiss scores would leave float32 (inf inner products, saturated L2).

    Inner products are at most ``|q| M``; squared L2 distances at most ``(|q| + M)^2``.

    Examples
    --------
    >>> from densemem._validation import check_nearest_range
    >>> check_nearest_range(1.0, 1.0, "l2", where="demo")  # fine: nothing raised
    """
    top = query_norm * max_norm if metric == "ip" else (query_norm + max_norm) ** 2
    if not np.isfinite(top) or top > SCORE_LIMIT:
        what = "|q| * M" if metric == "ip" else "(|q| + M)^2"
        raise InputValueError(
            f"{where}: the largest query norm ({query_norm:.3g}) and stored norm ({max_norm:.3g}) give "
            f"{metric} scores {what} = {top:.3g} beyond the float32 range ({SCORE_LIMIT:.3g}); rescale the "
            "queries or the patterns."
        )


def check_finite_result(arr: np.ndarray, *, what: str, where: str) -> None:
    """Raise when a computed result holds NaN or infinity (never hand one back as a state).

    Examples
    --------
    >>> import numpy as np
    >>> from densemem._validation import check_finite_result
    >>> check_finite_result(np.ones(3), what="states", where="demo")  # fine: nothing raised
    """
    finite = np.isfinite(arr)
    if not finite.all():
        bad = np.argwhere(~finite)[0]
        raise InputValueError(
            f"{where}: the {what} left the float range (NaN or infinity at index {tuple(int(i) for i in bad)}); "
            "the inputs are too large or beta too high for float32 scores -- rescale them or lower beta."
        )


HALF_MAX = float(np.finfo(np.float16).max)  # 65504


def to_half(x: np.ndarray, *, where: str, name: str) -> np.ndarray:
    """``x`` rounded to float16; a value beyond the float16 range is refused with its row named.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem._validation import to_half
    >>> to_half(np.array([[1.0, 2.5]], np.float32), where="demo", name="patterns").dtype
    dtype('float16')
    """
    big = np.abs(x) > HALF_MAX
    if big.any():
        row = int(np.flatnonzero(big.any(axis=1))[0])
        raise InputValueError(
            f"{where}: `{name}` holds {float(np.abs(x[row]).max()):.6g} at row {row}, beyond the float16 range "
            f"(largest is {HALF_MAX:g}); keep this memory in float32 or scale the rows."
        )
    return np.ascontiguousarray(x, dtype=np.float16)
