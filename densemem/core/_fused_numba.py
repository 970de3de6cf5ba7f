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
MAGIC = np.float32(1.5 * 2.0**23)  # x + MAGIC rounds x to an integer, kept in the low bits
LOWEST2 = np.float32(-126.0)  # 2^x below this is 0 here (float32's smallest normal is 2^-126)
# 2^r ~ 1 + E2_1 r + ... + E2_5 r^5 on [-1/2, 1/2]: a least-squares fit of the relative error,
# reweighted towards equal ripple (fitted for this module against float64 2**r; max 9.3e-8)
E2_1 = np.float32(0.6931470036506653)
E2_2 = np.float32(0.24022242426872253)
E2_3 = np.float32(0.05550733581185341)
E2_4 = np.float32(0.009671458974480629)
E2_5 = np.float32(0.0013264568988233805)
F32_LOWEST = np.float32(-np.finfo(np.float32).max)
F32_MAX = np.float32(np.finfo(np.float32).max)
RAISE = np.float32(1.0)  # the reference stays within 1 (base 2) of the row max: see kernel()
TWO112 = np.float32(2.0**112)  # 2^(127 - 15): float32 exponent bias over float16's


@intrinsic
def as_f32(typingctx: Any, x: Any) -> Any:
    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.FloatType())

    return types.float32(types.int32), codegen


@intrinsic
def max32(typingctx: Any, a: Any, b: Any) -> Any:
    """float32 max as LLVM's ``maxnum`` (a vector ``vmaxps`` in a loop).

    The plain ``b if b > a else a`` over an array element becomes a masked store
    (``vmaskmovps``), microcoded and about 3x slower on AMD Zen 2.
    """
    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        f = ir.FloatType()
        fn = builder.module.declare_intrinsic("llvm.maxnum", [f], ir.FunctionType(f, [f, f]))
        return builder.call(fn, args, fastmath=("fast",))

    return types.float32(types.float32, types.float32), codegen


# Fast-math flags for the exp: every one except reassociation, which would fold the
# rounding ``(x + MAGIC) - MAGIC`` back to ``x``; the loops that call it keep them all.
_EXP_FLAGS = {"nnan", "ninf", "nsz", "arcp", "contract", "afn"}


@intrinsic
def as_i32(typingctx: Any, x: Any) -> Any:
    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.IntType(32))

    return types.int32(types.float32), codegen


@njit(fastmath=_EXP_FLAGS, cache=True)
def exp2_32(x: Any) -> Any:
    """float32 2^x for -126 <= x <= 127 (clamped below): 2^n 2^r, n = round(x), r = x - n in [-1/2, 1/2].

    n comes from adding 1.5 * 2^23 (the sum's last bit is the units digit, so the add
    rounds x to an integer, and the sum's low bits are n itself); r is then exact, and
    2^r is a degree-5 polynomial (relative error 9e-8 on [-1/2, 1/2]; 1.8e-7 evaluated in
    float32). All of it is adds and fused multiply-adds in float32 / int32, so the
    loop vectorises; with no multiply by ln 2 in the range reduction, only the
    polynomial and the final scaling use the multiply units.
    """
    x = max32(x, LOWEST2)
    t = x + MAGIC
    r = x - (t - MAGIC)
    p = E2_5 * r + E2_4
    p = p * r + E2_3
    p = p * r + E2_2
    p = p * r + E2_1
    p = p * r + np.float32(1.0)
    return p * as_f32((as_i32(t) + np.int32(127)) << np.int32(23))


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
def max_top(z: Any, offset: Any, m: Any, top_z: Any, top_i: Any) -> None:
    """Row maxima into ``m`` and the running top lists, no weights (a candidate search).

    Group maxima over 16 strided column slices (an element-wise max), then only the
    groups whose max beats the running k-th best are scanned.
    """
    b, w = z.shape
    k = top_z.shape[1]
    # groups: g_n a multiple of 8 so that every element-wise loop runs whole vectors
    g_n = (w // (_GROUP * 8)) * 8
    main = g_n * _GROUP
    gm = np.empty(max(g_n, 1), dtype=np.float32)
    for i in range(b):
        row = z[i]
        mx = F32_LOWEST  # finite: the fast-math flags promise no infinities
        if g_n:
            for g in range(g_n):
                gm[g] = row[g]
            for c in range(1, _GROUP):
                seg = row[c * g_n : (c + 1) * g_n]  # a slice: its index is known >= 0, no wraparound test
                for g in range(g_n):
                    gm[g] = max32(gm[g], seg[g])
            for g in range(g_n):
                mx = max32(mx, gm[g])
        # the top list is a min-heap: its root top_z[i, 0] is the running k-th best
        thr = top_z[i, 0] if k > 0 else F32_MAX  # finite, as above
        for g in range(g_n):
            if gm[g] > thr:
                for c in range(_GROUP):
                    v = row[c * g_n + g]
                    if v > thr:
                        thr = heap_replace(top_z[i], top_i[i], v, offset + c * g_n + g)
        for j in range(main, w):
            v = row[j]
            mx = max32(mx, v)
            if v > thr:
                thr = heap_replace(top_z[i], top_i[i], v, offset + j)
        m[i] = max(m[i], np.float64(mx))


@njit(nogil=True, fastmath=True, boundscheck=False, cache=True)
def top_rows(zt: Any, offset: Any, top_z: Any, top_i: Any) -> None:
    """The running top lists from a tile laid out one stored row per line (rows x queries).

    For a few queries the product ``rows @ q.T`` runs faster than ``q @ rows.T`` (BLAS
    packs the small side). Each stored row is one vector of the queries' scores; its
    largest margin over the queries' k-th bests (a vectorised reduction) says whether
    any query's list changes, and only then are the queries scanned. Scores must be
    finite (the fast-math flags promise it; the public boundary rejects non-finite input):
    a NaN in one query's scores would hide the row from every query.
    """
    w, b = zt.shape
    k = top_z.shape[1]
    if k == 0:
        return
    thr = np.empty(b, dtype=np.float32)
    for i in range(b):
        thr[i] = max(top_z[i, 0], F32_LOWEST)  # finite: the fast-math flags promise no infinities
    for j in range(w):
        r = zt[j]
        gap = F32_LOWEST
        for i in range(b):
            gap = max32(gap, r[i] - thr[i])
        if gap > 0:
            for i in range(b):
                v = r[i]
                if v > thr[i]:
                    thr[i] = max(heap_replace(top_z[i], top_i[i], v, offset + j), F32_LOWEST)


@njit(inline="always", fastmath=True, boundscheck=False)
def _block_max(blk: Any, n: Any) -> Any:
    """max of ``blk[:n]`` (a vectorised reduction)."""
    bm = F32_LOWEST
    for j in range(n):
        bm = max32(bm, blk[j])
    return bm


@njit(inline="always", fastmath=True, boundscheck=False)
def _exp_sum(blk: Any, n: Any, rf: Any) -> Any:
    """``blk[:n] = 2^(blk - rf)`` in place; their float32 sum."""
    sb = np.float32(0.0)
    for j in range(n):
        e = exp2_32(blk[j] - rf)
        blk[j] = e
        sb += e
    return sb


@njit(nogil=True, fastmath=True, boundscheck=False, cache=True)
def kernel(z: Any, offset: Any, m: Any, l: Any, top_z: Any, top_i: Any, scale: Any, weights: Any) -> None:
    """See :func:`densemem.core._fused.fold_tile` (``weights`` False: max and top-k only).

    One visit of each row, block by block (256 entries, in L1 between the two loops):
    the block's max (loads only), a scan for the top list where that max beats the
    running k-th best (rare once the list has filled), then
    ``2^(z - ref)`` in place and its sum. ``ref`` is the running reference (``m``); it
    rises to a block's max only where that max is more than ``RAISE`` above it (the
    first block of the first tile; rarely after), rescaling the row's earlier blocks,
    so weights stay below ``2^RAISE`` and no pass of the row precedes the exponentials.
    ``RAISE`` is 1: the subtraction ``z - ref`` rounds by half an ulp of its result, so a
    reference far below the max costs accuracy at the heaviest weights (with 60, top
    weights on 768-wide photo patches summed to 1 + 1.4e-6 at beta = 40; with 1, 6e-8).
    """
    if not weights:
        max_top(z, offset, m, top_z, top_i)
        return
    b, w = z.shape
    k = top_z.shape[1]
    n_full = w // _SUM_BLOCK
    for i in range(b):
        row = z[i]
        had = l[i] > 0.0  # a reference from earlier tiles (l = 0 before anything is seen)
        rf = np.float32(m[i]) if had else F32_LOWEST
        thr = max(top_z[i, 0], F32_LOWEST) if k > 0 else F32_MAX
        a = 1.0
        s = 0.0
        for bi in range(n_full + 1):
            lo = bi * _SUM_BLOCK
            n = _SUM_BLOCK if bi < n_full else w - lo
            if n <= 0:
                break
            blk = row[lo : lo + n]
            if n == _SUM_BLOCK:  # a constant trip count: LLVM vectorises only such loops here
                bm = _block_max(blk, _SUM_BLOCK)
            else:
                bm = _block_max(blk, n)
            if bm > thr:
                for j in range(n):
                    v = blk[j]
                    if v > thr:
                        thr = max(heap_replace(top_z[i], top_i[i], v, offset + lo + j), F32_LOWEST)
            if bm > rf + RAISE:
                f = math.exp2(np.float64(rf) - np.float64(bm)) if rf > F32_LOWEST else 0.0
                ff = np.float32(f)
                for j in range(lo):
                    row[j] *= ff
                s *= f
                a *= f
                rf = bm
            if n == _SUM_BLOCK:
                sb = _exp_sum(blk, _SUM_BLOCK, rf)
            else:
                sb = _exp_sum(blk, n, rf)
            s += np.float64(sb)
        m[i] = np.float64(rf) if rf > F32_LOWEST else m[i]
        l[i] = l[i] * a + s
        scale[i] = a if had else 0.0
