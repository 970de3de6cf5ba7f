"""Input checks for the binary memories (private).

Each function takes the caller's name (``where``, e.g. ``"BinaryMemory.retrieve"``) so the
message says which public entry point refused the value; each returns a clean value or raises
an :mod:`densemem.errors` class. Inside the binary modules values are trusted after this.
"""

from __future__ import annotations

import numbers

import numpy as np

from .._validation import as_rng, check_unit_interval  # noqa: F401  (the shared rules, used as chk.*)
from ..errors import InputTypeError, InputValueError

STATES = ("pm1", "01")
MODES = ("async", "sync")


def check_choice(value: object, name: str, choices: tuple[str, ...], where: str) -> str:
    """Return `value` if it is one of `choices`, else raise naming the options."""
    if not isinstance(value, str) or value not in choices:
        options = ", ".join(repr(c) for c in choices)
        raise InputValueError(f"{where}: `{name}` must be one of {options}; got {value!r}.")
    return value


def _numeric_array(values: object, name: str, where: str) -> np.ndarray:
    try:
        arr = np.asarray(values)
    except ValueError:  # ragged nested sequences
        raise InputValueError(
            f"{where}: `{name}` has rows of different lengths; every row must have one "
            "value per unit."
        ) from None
    if arr.dtype.kind not in "biuf":
        raise InputTypeError(
            f"{where}: `{name}` must hold numbers (-1/+1 or 0/1); got dtype {arr.dtype}."
        )
    return arr


def _first(mask: np.ndarray) -> str:
    row, col = np.argwhere(mask)[0]
    return f"row {row}, column {col}"


def check_binary(values: object, name: str, states: str, where: str) -> np.ndarray:
    """Validate a 2-D (or 1-D: one row) binary array and return it as +-1 int8.

    `states` is ``"pm1"`` (values -1/+1) or ``"01"`` (values 0/1); the 0/1 form is mapped
    exactly by s = 2v - 1. The input is never modified.
    """
    arr = _numeric_array(values, name, where)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2:
        raise InputValueError(
            f"{where}: `{name}` must be a 2-D array of shape (n, n_units); got shape {arr.shape}."
        )
    if arr.shape[0] == 0:
        raise InputValueError(f"{where}: `{name}` is empty; give at least one row.")
    if arr.shape[1] == 0:
        raise InputValueError(f"{where}: `{name}` has 0 units per row; give at least one.")
    if arr.dtype.kind == "f" and np.isnan(arr).any():
        raise InputValueError(
            f"{where}: `{name}` contains NaN at {_first(np.isnan(arr))}; binary values only."
        )
    is_one, is_zero, is_minus = arr == 1, arr == 0, arr == -1
    bad = ~(is_one | is_zero | is_minus)
    if bad.any():
        row, col = np.argwhere(bad)[0]
        raise InputValueError(
            f"{where}: `{name}` must be binary; got the value {arr[row, col].item()!r} at "
            f"row {row}, column {col}."
        )
    if is_zero.any() and is_minus.any():
        raise InputValueError(
            f"{where}: `{name}` mixes 0/1 and -1/+1 values (0 at {_first(is_zero)}, -1 at "
            f"{_first(is_minus)}); use one form throughout."
        )
    if states == "pm1" and is_zero.any():
        raise InputValueError(
            f"{where}: `{name}` contains 0 (at {_first(is_zero)}) but states='pm1' expects "
            "-1/+1 values; pass states='01' for 0/1 data."
        )
    if states == "01" and is_minus.any():
        raise InputValueError(
            f"{where}: `{name}` contains -1 (at {_first(is_minus)}) but states='01' expects "
            "0/1 values; pass states='pm1' for -1/+1 data."
        )
    if states == "01":
        return (2 * arr.astype(np.int8) - 1).astype(np.int8)
    return arr.astype(np.int8)


def check_width(arr: np.ndarray, n_units: int, name: str, where: str) -> np.ndarray:
    """Raise unless `arr` has `n_units` columns."""
    if arr.shape[1] != n_units:
        raise InputValueError(
            f"{where}: `{name}` have {arr.shape[1]} units but the memory has {n_units} units."
        )
    return arr


def check_int(value: object, name: str, where: str, *, minimum: int) -> int:
    """Return `value` as int if it is an integer >= `minimum` (bool refused)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise InputValueError(
            f"{where}: `{name}` must be an integer >= {minimum}; got {value!r}."
        )
    return int(value)


def check_vector(value: object, n_units: int, name: str, where: str) -> np.ndarray:
    """Return a finite float64 vector of length `n_units` (a scalar is broadcast)."""
    arr = _numeric_array(value, name, where).astype(np.float64)
    if arr.ndim == 0:
        arr = np.full(n_units, float(arr))
    if arr.shape != (n_units,):
        raise InputValueError(
            f"{where}: `{name}` must be a scalar or have shape ({n_units},); got shape "
            f"{arr.shape}."
        )
    if not np.isfinite(arr).all():
        raise InputValueError(
            f"{where}: `{name}` must be finite; got {arr[~np.isfinite(arr)][0]!r} at index "
            f"{np.flatnonzero(~np.isfinite(arr))[0]}."
        )
    return arr


def check_weights(weights: object, where: str) -> np.ndarray:
    """Return a finite, square, symmetric float64 weight matrix (a copy)."""
    arr = _numeric_array(weights, "weights", where).astype(np.float64)
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] == 0:
        raise InputValueError(
            f"{where}: `weights` must be a non-empty square matrix; got shape {arr.shape}."
        )
    if not np.isfinite(arr).all():
        raise InputValueError(f"{where}: `weights` must be finite; found NaN or inf.")
    asym = float(np.max(np.abs(arr - arr.T)))
    if asym > 1e-12 * max(1.0, float(np.max(np.abs(arr)))):
        raise InputValueError(
            f"{where}: `weights` must be symmetric (the energy and convergence guarantees need "
            f"W = W.T); got max |W - W.T| = {asym:.3g}."
        )
    return (arr + arr.T) / 2.0
