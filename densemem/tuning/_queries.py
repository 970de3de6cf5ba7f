"""Corrupted copies of stored patterns, used as test queries by the beta sweep.

Three corruption models, each with one strength ``level``:

* ``"gaussian"``: ``x + e`` with ``e ~ N(0, (level * ||x||)^2 / d * I)``, so the
  noise norm is about ``level * ||x||`` whatever the dimension.
* ``"mask"``: a random fraction ``level`` of the coordinates set to 0 (a mask
  that would zero every non-zero coordinate of a row is not applied to it).
* ``"mix"``: ``(1 - level) x + level x_r`` with ``x_r`` the pattern's nearest
  rival by inner product (faiss top-2, as in :func:`densemem.tuning.separation`); ``level``
  below 0.5 keeps the source the larger part.
"""

from __future__ import annotations

import numpy as np

__all__ = ["CORRUPTIONS", "corrupt"]

CORRUPTIONS = ("gaussian", "mask", "mix")


def corrupt(
    patterns: np.ndarray,
    rows: np.ndarray,
    *,
    corruption: str,
    level: float,
    rng: np.random.Generator,
    rivals: np.ndarray | None = None,
) -> np.ndarray:
    """Corrupted copies of ``patterns[rows]`` (float32, a new array).

    ``rivals`` (row number of the nearest rival of each ``patterns[rows]``,
    aligned with ``rows``) is needed for "mix".
    """
    x = patterns[rows].astype(np.float64)
    n, d = x.shape
    if corruption == "gaussian":
        scale = level * np.linalg.norm(x, axis=1, keepdims=True) / np.sqrt(d)
        out = x + scale * rng.standard_normal((n, d))
    elif corruption == "mask":
        keep = rng.random((n, d)) >= level
        out = np.where(keep, x, 0.0)
        emptied = ~(out != 0).any(axis=1) & (x != 0).any(axis=1)
        out[emptied] = x[emptied]
    else:
        assert corruption == "mix" and rivals is not None
        out = (1.0 - level) * x + level * patterns[rivals].astype(np.float64)
    return out.astype(np.float32)
