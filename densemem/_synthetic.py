"""Corrupted copies of stored patterns: the one generator of test queries and probes.

Used by the beta sweep (tuning), the benchmark's generated queries and the
capacity experiments. One name and one meaning per kind, with one strength
``level`` (d: the number of coordinates):

* ``"gaussian"``: add ``level * rms(x) * N(0, 1)`` to every coordinate, with
  ``rms(x) = ||x|| / sqrt(d)``, so the noise norm is about ``level * ||x||``
  whatever the width. Binary (+-1) patterns then take the sign (0 -> +1).
* ``"mask"``: exactly ``round(level * d)`` coordinates per row, chosen
  uniformly, are erased: set to 0 (continuous) or to a fresh random +-1 value
  (binary; a +-1 state has no 0). A continuous row the erasure would leave all
  zero, while it had a non-zero coordinate, is left as it was (a zero query has
  no direction); with dense rows that happens only when ``round(level * d) == d``.
* ``"flip"``: exactly ``round(level * d)`` coordinates per row change sign (a bit
  flip for +-1 patterns).
* ``"mix"``: ``(1 - level) x + level r`` with ``r`` a rival row given by the
  caller (the sweep passes each pattern's nearest rival by inner product).

The random draws are part of the meaning (so results are reproducible from a
seed): "gaussian" draws ``standard_normal((n, d))`` from ``rng``; "mask" and
"flip" draw ``random((n, d))`` from ``rng`` to choose the coordinates (nothing
when ``round(level * d) == 0``), and binary "mask" draws the new values with
``random((n, d))`` from ``value_rng``.
"""

from __future__ import annotations

import numpy as np

from .errors import InputValueError

__all__ = ["CORRUPTIONS", "corrupt"]

CORRUPTIONS = ("gaussian", "mask", "flip", "mix")


def corrupt(
    x: np.ndarray,
    kind: str,
    level: float,
    rng: np.random.Generator,
    *,
    binary: bool = False,
    value_rng: np.random.Generator | None = None,
    rivals: np.ndarray | None = None,
) -> np.ndarray:
    """Corrupted float64 copies of the rows ``x`` (``x`` itself is not modified).

    Parameters
    ----------
    x : ndarray of shape (n, d)
    kind : {"gaussian", "mask", "flip", "mix"}
    level : float
        Noise scale ("gaussian"), erased or flipped fraction, or rival weight ("mix").
    rng : numpy Generator
    binary : bool, default False
        Rows are +-1 patterns (see the module notes).
    value_rng : numpy Generator, optional
        Binary "mask": the stream of the new +-1 values (default ``rng``).
    rivals : ndarray of shape (n, d), optional
        "mix": the rival row of each row.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem._synthetic import corrupt
    >>> out = corrupt(np.ones((2, 4)), "mask", 0.5, np.random.default_rng(0))
    >>> (out == 0).sum(axis=1).tolist()
    [2, 2]
    """
    out = np.array(x, dtype=np.float64)
    n, d = out.shape
    if kind == "gaussian":
        rms = np.linalg.norm(out, axis=1, keepdims=True) / np.sqrt(d)
        out += level * rms * rng.standard_normal((n, d))
        return np.where(out >= 0, 1.0, -1.0) if binary else out
    if kind == "mix":
        if rivals is None:
            raise InputValueError("corrupt: kind 'mix' needs `rivals`.")
        return (1.0 - level) * out + level * np.asarray(rivals, dtype=np.float64)
    if kind not in ("mask", "flip"):
        raise InputValueError(f"corrupt: unknown kind {kind!r}; use one of {', '.join(CORRUPTIONS)}.")
    m = int(round(level * d))
    if m == 0:
        return out
    pick = np.argsort(rng.random((n, d)), axis=1)[:, :m]
    rows = np.arange(n)[:, None]
    if kind == "flip":
        out[rows, pick] = -out[rows, pick]
    elif binary:
        values = (rng if value_rng is None else value_rng).random((n, d))
        out[rows, pick] = np.where(values < 0.5, 1.0, -1.0)[rows, pick]
    else:
        before = out.copy()
        out[rows, pick] = 0.0
        emptied = ~(out != 0).any(axis=1) & (before != 0).any(axis=1)
        out[emptied] = before[emptied]
    return out
