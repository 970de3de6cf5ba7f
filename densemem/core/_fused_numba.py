"""The numba source of :mod:`._fused` (imported only where numba is installed)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from llvmlite import ir
from numba import njit
from numba.core import types
from numba.extending import intrinsic

_GROUP = 16
_SUM_BLOCK = 256
LOG2E = np.float32(1.4426950408889634)
LN2_HI = np.float32(0.693359375)  # ln 2 split in two for the range reduction (Cephes)
LN2_LO = np.float32(-2.12194440e-4)
LOWEST = np.float32(-87.0)  # exp below this is 0 (float32 underflow)
TWO112 = np.float32(2.0**112)  # 2^(127 - 15): float32 exponent bias over float16's


@intrinsic
def as_f32(typingctx: Any, x: Any) -> Any:
    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.FloatType())

    return types.float32(types.int32), codegen


@njit(inline="always", fastmath=True)
def exp32(x: Any) -> Any:
    """float32 e^x for x <= 0 (Cephes expf: x = n ln2 + r, polynomial in r, times 2^n).

    Every step stays in float32 / int32 (floor in float32, then a 32-bit integer for the
    exponent), so the loop vectorises: an int64 there (``math.floor``) cost 3x.
    """
    x = max(x, LOWEST)
    nf = np.floor(x * LOG2E + np.float32(0.5))
    r = x - nf * LN2_HI - nf * LN2_LO
    p = np.float32(1.9875691500e-4)
    p = p * r + np.float32(1.3981999507e-3)
    p = p * r + np.float32(8.3334519073e-3)
    p = p * r + np.float32(4.1665795894e-2)
    p = p * r + np.float32(1.6666665459e-1)
    p = p * r + np.float32(5.0000001201e-1)
    p = p * r * r + r + np.float32(1.0)
    return p * as_f32((np.int32(nf) + np.int32(127)) << np.int32(23))


@njit(nogil=True, boundscheck=False, cache=True)
def widen(src: Any, dst: Any) -> None:
    """float16 bits ``src`` (uint16, flat) to float32 ``dst`` (flat), exactly; see :func:`densemem.core._fused.widen`."""
    for i in range(src.shape[0]):
        h = np.int32(src[i])
        a = h & 0x7FFF
        if a >= 0x7C00:  # inf and NaN keep their class (stores hold neither; arrays passed in may)
            v = as_f32(np.int32(0x7F800000 | ((a & 0x3FF) << 13)))
        else:  # normal and subnormal halves alike: the bits moved up, times 2^112
            v = as_f32(np.int32(a << 13)) * TWO112
        dst[i] = -v if h & 0x8000 else v


@njit(inline="always", boundscheck=False)
def heap_replace(hz: Any, hi: Any, v: Any, idx: Any) -> Any:
    """Replace the root of the min-heap (hz, hi) by (v, idx), sift it down; return the new root."""
    k = hz.shape[0]
    p = 0
    while True:
        c = 2 * p + 1
        if c >= k:
            break
        if c + 1 < k and hz[c + 1] < hz[c]:
            c += 1
        if hz[c] >= v:
            break
        hz[p] = hz[c]
        hi[p] = hi[c]
        p = c
    hz[p] = v
    hi[p] = idx
    return hz[0]


@njit(nogil=True, fastmath=True, boundscheck=False, cache=True)
def kernel(z: Any, offset: Any, m: Any, l: Any, top_z: Any, top_i: Any, scale: Any, weights: Any) -> None:
    """See :func:`densemem.core._fused.fold_tile` (``weights`` False: max and top-k only)."""
    b, w = z.shape
    k = top_z.shape[1]
    g_n = w // _GROUP
    main = g_n * _GROUP
    gm = np.empty(max(g_n, 1), dtype=np.float32)
    for i in range(b):
        row = z[i]
        for g in range(g_n):
            gm[g] = row[g]
        for c in range(1, _GROUP):
            base = c * g_n
            for g in range(g_n):
                v = row[base + g]
                gm[g] = v if v > gm[g] else gm[g]
        # the top list is a min-heap: its root top_z[i, 0] is the running k-th best
        thr = top_z[i, 0] if k > 0 else np.float32(np.inf)
        mx = np.float32(-np.inf)
        for g in range(g_n):
            gv = gm[g]
            if gv > mx:
                mx = gv
            if gv > thr:
                for c in range(_GROUP):
                    v = row[c * g_n + g]
                    if v > thr:
                        thr = heap_replace(top_z[i], top_i[i], v, offset + c * g_n + g)
        for j in range(main, w):
            v = row[j]
            if v > mx:
                mx = v
            if v > thr:
                thr = heap_replace(top_z[i], top_i[i], v, offset + j)
        m_old = m[i]
        m_new = max(m_old, np.float64(mx))
        if not weights:
            m[i] = m_new
            continue
        a = math.exp(m_old - m_new) if m_old > -np.inf else 0.0
        mf = np.float32(m_new)
        # float32 sums of 256 terms (vectorised; fixed-length blocks, or LLVM keeps the loop
        # scalar), added in float64
        s = 0.0
        for bi in range(w // _SUM_BLOCK):
            blk = row[bi * _SUM_BLOCK : (bi + 1) * _SUM_BLOCK]
            sb = np.float32(0.0)
            for j in range(_SUM_BLOCK):
                e = exp32(blk[j] - mf)
                blk[j] = e
                sb += e
            s += np.float64(sb)
        sb = np.float32(0.0)
        for j in range((w // _SUM_BLOCK) * _SUM_BLOCK, w):
            e = exp32(row[j] - mf)
            row[j] = e
            sb += e
        s += np.float64(sb)
        l[i] = l[i] * a + s
        m[i] = m_new
        scale[i] = a

