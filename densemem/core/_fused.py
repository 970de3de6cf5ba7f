"""Optional compiled tile kernel (numba): max, top-k, exp and sum in one visit of each row.

Installed with ``pip install densemem[fast]``. Without numba (or with the
environment variable ``DENSEMEM_KERNEL=numpy``) the NumPy kernel in
:mod:`.partial` runs instead; both are exact softmax reductions and agree to
float32 rounding. The matrix products stay with NumPy's BLAS.

The kernel works in base 2: the caller multiplies the (beta-scaled) queries by
log2(e), so each stored-row tile ``z = qz @ rows.T`` (float32, one row per query)
holds ``log2(e) beta q.x``, and ``2^(z - m) = e^(beta q.x - m ln 2)``. The kernel
folds the tile into a running partial *in place*, per query row, in one visit of
blocks of 256 entries (each block in L1 between its two loops):

1. the block max (a vectorised reduction), and a scan of the block for the top
   list only where that max beats the running k-th best (the top list is a
   min-heap whose root is that k-th best; once it has filled, scans are rare);
2. ``e = 2^(z - ref)`` written over ``z`` (for the second product) and summed
   (float32 per block, the blocks in float64). ``ref`` is the running ``m``: a
   reference, not the max. It rises to a block's max only where that max is more
   than 1 above it (the first blocks of a pass; rarely after), and then the row's
   earlier blocks and its sums are rescaled, so weights stay below 2 and no
   separate max pass precedes the exponentials;
3. ``l' = l 2^(m - m') + sum e``; the factor ``2^(m - m')`` is returned to rescale
   the weighted sum. ``lse = m + log l`` is the same for any reference.

Without weights (a candidate search) the kernel keeps the row max and the top
list only: group maxima over 16 strided column slices, then a scan of the groups
whose max beats the running k-th best.

:func:`to_natural` turns the running reference and the top scores back into natural
units at the end of a pass. Base 2 makes the range reduction exact and free of
multiplies: ``2^x = 2^n 2^r`` with ``n = round(x)`` (by adding 1.5 * 2^23) and
``r = x - n``, then a degree-5 polynomial for ``2^r`` on ``|r| <= 1/2``; a natural
exp spends three multiply-adds on ``x = n ln2 + r`` (Cody-Waite). Measured on an
AMD Zen 2 core (multiply-adds on two of its four vector pipes): 0.29 ns per
element against 0.45 for the natural form with Cephes' polynomial. Relative
error of the float32 ``2^x``: below 2e-7 (float32 rounding of the polynomial
included), like NumPy's float32 ``exp``; arguments below -126 are clamped to -126
(a weight of 1.2e-38 beside the row max's weight of 1). The extra rounding of the
queries by log2(e) is one float32 rounding of each query component, the size of
the rounding of ``beta * q`` itself.
"""

from __future__ import annotations

import os
import threading
from typing import Any

import numpy as np

__all__ = ["fold_tile", "top_rows", "to_natural", "widen", "available", "set_enabled", "LOG2E"]

LOG2E = 1.4426950408889634  # log2(e): the kernel's scores are log2(e) times the natural ones
_LN2 = 0.6931471805599453
_MAX_K = 4096  # top lists longer than this use the NumPy kernel (the kernel keeps a heap)

_kernel: Any = None
_tried = False
_lock = threading.Lock()  # query chunks run on threads: load once


def available(k: int) -> bool:
    """Whether the compiled kernel is installed, enabled and suited to top lists of ``k``."""
    return k <= _MAX_K and _load() is not None


def set_enabled(flag: bool) -> bool:
    """Use (True) or bypass (False) the compiled kernel from now on; returns whether it is in use.

    For measurements and tests that compare both kernels in one process; the
    environment variable ``DENSEMEM_KERNEL=numpy`` sets the default.
    """
    global _kernel, _tried, _widen, _top_rows
    _tried, _kernel, _widen, _top_rows = False, None, None, None
    if flag:
        _load(force=True)
    else:
        _tried = True
    return _kernel is not None


def _load(force: bool = False) -> Any:
    global _kernel, _tried
    global _widen, _top_rows
    if _tried:
        return _kernel
    with _lock:
        if _tried:
            return _kernel
        if force or os.environ.get("DENSEMEM_KERNEL", "").lower() != "numpy":
            try:
                from ._fused_numba import kernel, top_rows, widen
            except ImportError:
                kernel = widen = top_rows = None
            _kernel, _widen, _top_rows = kernel, widen, top_rows
        _tried = True
    return _kernel


_widen: Any = None
_top_rows: Any = None


def widen(rows: np.ndarray, out: np.ndarray) -> None:
    """Copy float16 ``rows`` into the float32 array ``out`` of the same shape, exactly.

    The compiled loop moves each half's bits into float32 position and rescales by
    2^112 (exact for normal and subnormal halves alike; inf and NaN kept), which runs
    at memory speed; NumPy's own float16 cast is a scalar loop about 8x slower on
    this kind of machine (``bench/wide_and_half.py`` measures both). Without the
    compiled kernel, or for a non-contiguous tile, ``np.copyto`` does the copy.
    """
    _load()
    if _widen is None or rows.dtype != np.float16 or not rows.flags.c_contiguous or not out.flags.c_contiguous:
        np.copyto(out, rows)
        return
    _widen(rows.reshape(-1).view(np.uint16), out.reshape(-1))


def fold_tile(
    z: np.ndarray, offset: int, m: np.ndarray, l: np.ndarray, top_z: np.ndarray, top_i: np.ndarray,
    *, weights: bool = True,
) -> np.ndarray:
    """Fold one tile into the running (m, l, top_z, top_i), in place; ``z`` becomes the weights.

    ``z``, ``m`` and ``top_z`` are in base-2 units (``log2(e)`` times the natural
    scores; :func:`to_natural` converts at the end) and the weights are ``2^(z - m)``.
    Returns the factor ``2^(m_old - m_new)`` per query (0 where nothing was seen yet)
    by which the caller rescales its weighted sum before adding ``z @ rows``. With
    ``weights=False`` only the max and the top list are kept (a candidate search):
    ``z`` and ``l`` are left alone.
    """
    kern = _load()
    scale = np.empty(z.shape[0], dtype=np.float64)
    kern(z, offset, m, l, top_z, top_i, scale, weights)
    return scale


def top_rows(zt: np.ndarray, offset: int, top_z: np.ndarray, top_i: np.ndarray) -> None:
    """Fold a tile laid out (stored rows x queries) into the running top lists, in place.

    ``top_z`` / ``top_i`` are min-heaps per query (root: the running k-th best), as in
    :func:`fold_tile` without weights; the row numbers are ``offset + j``.
    """
    _load()
    _top_rows(zt, offset, top_z, top_i)


def to_natural(run: Any) -> None:
    """Turn a partial folded by :func:`fold_tile` from base-2 into natural units, in place.

    ``m`` and ``top_z`` are multiplied by ln 2 in float64, and the top scores stay in
    float64: rounded back to float32 they would be up to half an ulp off the values the
    sums saw (5e-6 at beta * score = 80, enough to lift the top weights' sum above 1).
    ``l`` and the weighted sums are the same in both units.
    """
    run.m *= _LN2
    run.top_z = run.top_z.astype(np.float64) * _LN2
