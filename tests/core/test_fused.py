"""The compiled tile kernel (densemem.core._fused) and the NumPy kernel it stands in for.

References: scipy.special.softmax / scipy.special.logsumexp in float64 for states, weights
and log-sum-exp; faiss.knn (brute-force inner product) for the top list; NumPy's float64
power of two for the kernel's float32 2^x (relative error a few float32 ulps). Both kernels
run in every test: the NumPy one by disabling the compiled one for the test, the compiled
one where numba is installed (else skipped, visibly).
"""

from __future__ import annotations

import faiss
import numpy as np
import pytest
from scipy.special import logsumexp, softmax

from densemem.core import _fused
from densemem.core import partial as P
from densemem.core.exact import exact_reduce


@pytest.fixture(params=["numpy", "compiled"])
def kernel(request: pytest.FixtureRequest) -> str:
    if request.param == "numpy":
        assert not _fused.set_enabled(False) and not _fused.available(10)
        request.addfinalizer(lambda: _fused.set_enabled(True))
    else:
        pytest.importorskip("numba")
        assert _fused.set_enabled(True) and _fused.available(10)
    return request.param


def _case(seed: int, n: int, d: int, n_q: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, d)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    q = x[rng.choice(n, n_q, replace=False)] + 0.3 * rng.standard_normal((n_q, d)).astype(np.float32) / np.sqrt(d)
    return x, np.ascontiguousarray(q, dtype=np.float32)


@pytest.mark.parametrize("beta,k,tile_mib", [(0.5, 1, 0.01), (8.0, 10, 0.05), (60.0, 7, 0.003), (8.0, 64, 16.0)])
def test_kernel_matches_scipy_and_faiss(kernel: str, beta: float, k: int, tile_mib: float) -> None:
    # Tiles of a few hundred rows (uneven last tile, widths not multiples of 16) over 2 threads.
    x, q = _case(3, 5003, 384, 37)
    fin = P.finish(exact_reduce(q, x, beta, k=k, tile_mib=tile_mib, n_threads=2, chunk=16))
    z = beta * (q.astype(np.float64) @ x.T.astype(np.float64))
    p = softmax(z, axis=1)
    np.testing.assert_allclose(fin.states, p @ x.astype(np.float64), rtol=0, atol=2e-6)
    np.testing.assert_allclose(fin.lse, logsumexp(z, axis=1), rtol=0, atol=1e-5 * max(1.0, beta))
    _, truth = faiss.knn(q, x, k, metric=faiss.METRIC_INNER_PRODUCT)
    assert np.mean(fin.top_i == truth) >= 0.99  # float32 near-ties may swap neighbours
    np.testing.assert_allclose(fin.top_w, np.take_along_axis(p, fin.top_i, 1), rtol=2e-5, atol=1e-12)
    assert np.all(np.diff(fin.top_z, axis=1) <= 0)  # heaviest first


def test_kernels_agree_to_float32_rounding() -> None:
    pytest.importorskip("numba")
    x, q = _case(5, 3001, 64, 50)
    beta = 20.0
    assert _fused.set_enabled(True)
    fast = P.finish(exact_reduce(q, x, beta, k=5, tile_mib=0.02, n_threads=1))
    try:
        _fused.set_enabled(False)
        slow = P.finish(exact_reduce(q, x, beta, k=5, tile_mib=0.02, n_threads=1))
    finally:
        _fused.set_enabled(True)
    np.testing.assert_array_equal(fast.top_i, slow.top_i)
    np.testing.assert_allclose(fast.states, slow.states, rtol=0, atol=1e-6)
    # The kernels differ in their float32 scores (the compiled one multiplies the queries by
    # log2 e first), so each top weight is held to the float32 error bound of its score against
    # float64: |fl(a.b) - a.b| <= gamma_d sum |a_j b_j|, gamma_d = d u / (1 - d u), u = 2^-24
    # (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed. 2002, sec. 3.1), plus
    # one rounding of each scaled query component (u each, twice for the compiled kernel);
    # a weight exp(z_i - lse) moves by at most twice the largest score error.
    u, d = 2.0**-24, x.shape[1]
    gamma = d * u / (1 - d * u)
    mag = beta * (np.abs(q).astype(np.float64) @ np.abs(x).T.astype(np.float64)).max(axis=1)
    bound = np.expm1(2 * (gamma + 3 * u) * mag) + 1e-6  # + the float32 exp and sums
    z = beta * (q.astype(np.float64) @ x.T.astype(np.float64))
    ref = np.take_along_axis(softmax(z, axis=1), fast.top_i, 1)
    for got in (fast.top_w, slow.top_w):
        assert np.all(np.abs(got / ref - 1).max(axis=1) <= bound)


def test_compiled_exp_is_float32_accurate() -> None:
    pytest.importorskip("numba")
    # One tile row holding the arguments (base-2 units, as the kernel takes them): after the
    # fold, z holds 2^(z - max z) = 2^z (max 0). Reference: NumPy's float64 power of two.
    t = -np.linspace(0.0, 120.0, 240_001).astype(np.float32)
    z = t[None, :].copy()
    m, l = np.full(1, -np.inf), np.zeros(1)
    top_z, top_i = np.full((1, 1), -np.inf, np.float32), np.full((1, 1), -1, np.int64)
    scale = _fused.fold_tile(z, 0, m, l, top_z, top_i)
    ref = 2.0 ** t.astype(np.float64)
    assert np.max(np.abs(z[0] - ref) / ref) < 2.5e-7  # a few float32 ulps (u = 6e-8)
    assert m[0] == 0.0 and scale[0] == 0.0 and top_i[0, 0] == 0
    # Summed in float32 over blocks of 256 terms, the blocks added in float64: the recursive-sum
    # bound |error| <= (n - 1) u sum|x| with n = 256, u = 2^-24 (Higham, "Accuracy and Stability of
    # Numerical Algorithms", 2nd ed. 2002, eq. 4.4) over positive terms gives this relative bound.
    assert l[0] == pytest.approx(z[0].astype(np.float64).sum(), rel=255 * 2.0**-24)
    assert l[0] == pytest.approx(ref.sum(), rel=1e-7)
    # Below 2^-126 (float32's smallest normal) the argument is clamped: weights stay >= 0, finite.
    z = np.array([[0.0, -126.0, -150.0, -1e30]], np.float32)
    m, l = np.full(1, -np.inf), np.zeros(1)
    _fused.fold_tile(z, 0, m, l, top_z, top_i)
    assert np.all(np.isfinite(z)) and z[0, 0] == 1.0 and z[0, 1] == pytest.approx(2.0**-126, rel=2.5e-7)
    assert np.all(z[0, 2:] <= 2.0**-126)


def test_widen_matches_ieee_cast_on_every_half(kernel: str) -> None:
    # Reference: NumPy's float16 -> float32 cast (IEEE 754-2008 binary16 to binary32, exact for
    # every value), over all 65,536 bit patterns: zeros, subnormals, normals, inf and NaN.
    bits = np.arange(2**16, dtype=np.uint32).astype(np.uint16)
    half = bits.view(np.float16).reshape(256, 256)
    out = np.full(half.shape, 7.0, np.float32)
    _fused.widen(half, out)
    ref = half.astype(np.float32)
    finite = np.isfinite(ref)
    assert np.array_equal(out[finite].view(np.uint32), ref[finite].view(np.uint32))
    assert np.array_equal(np.isnan(out), np.isnan(ref)) and np.array_equal(out[np.isinf(ref)], ref[np.isinf(ref)])


def test_float16_exact_pass_split_over_threads_equals_one_thread(kernel: str) -> None:
    # Reference: scipy.special.softmax in float64 over the float16 rows widened by NumPy.
    rng = np.random.default_rng(3)
    x = (rng.standard_normal((5000, 96)) / np.sqrt(96)).astype(np.float16)
    q = np.ascontiguousarray(x[:40].astype(np.float32) + np.float32(0.02))
    one = exact_reduce(q, x, 8.0, k=5, tile_mib=0.05, n_threads=1)
    two = exact_reduce(q, x, 8.0, k=5, tile_mib=0.05, n_threads=2)  # one chunk: tile work split
    f1, f2 = P.finish(one), P.finish(two)
    w = softmax(8.0 * q.astype(np.float64) @ x.astype(np.float64).T, axis=1)
    ref = w @ x.astype(np.float64)
    assert np.abs(f1.states - ref).max() < 1e-5 and np.abs(f2.states - ref).max() < 1e-5
    assert np.array_equal(f1.top_i, f2.top_i)
    np.testing.assert_allclose(f1.lse, f2.lse, rtol=1e-12)


@pytest.mark.parametrize("order", ["rising", "falling"])
def test_lazy_reference_rises_over_a_far_larger_tile(kernel: str, order: str) -> None:
    # The compiled kernel keeps a reference that rises only where a block's max is more than 1
    # above it (rescaling the row's earlier blocks). Stored rows c_j q0 + noise with c_j rising
    # from 0 to 6 under beta = 200: the scores climb by about 70 (base 2) per block of 256 rows,
    # so in "rising" order nearly every block raises the reference (a missed rescale of the
    # earlier blocks fails this test); in "falling" order the first block holds the max.
    # Reference: scipy.special.softmax / logsumexp in float64; faiss.knn for the top list.
    rng = np.random.default_rng(11)
    n, d, beta = 6000, 16, 200.0
    q0 = rng.standard_normal(d)
    q0 /= np.linalg.norm(q0)
    c = np.linspace(0.0, 6.0, n) if order == "rising" else np.linspace(6.0, 0.0, n)
    x = (c[:, None] * q0 + 0.1 * rng.standard_normal((n, d))).astype(np.float32)
    q = q0 + 0.05 * rng.standard_normal((9, d))
    q = np.ascontiguousarray(q / np.linalg.norm(q, axis=1, keepdims=True), dtype=np.float32)
    fin = P.finish(exact_reduce(q, x, beta, k=4, tile_mib=0.2, n_threads=1))  # 3,276-row tiles
    z = beta * (q.astype(np.float64) @ x.T.astype(np.float64))
    np.testing.assert_allclose(fin.lse, logsumexp(z, axis=1), rtol=0, atol=1e-5 * np.abs(z).max())
    p = softmax(z, axis=1)
    np.testing.assert_allclose(fin.states, p @ x.astype(np.float64), rtol=0, atol=1e-4)
    _, truth = faiss.knn(q, x, 4, metric=faiss.METRIC_INNER_PRODUCT)
    assert np.array_equal(fin.top_i[:, 0], truth[:, 0])
    np.testing.assert_allclose(fin.top_w[:, 0], p[np.arange(9), fin.top_i[:, 0]], rtol=1e-3)
    assert np.all(np.isfinite(fin.states)) and np.all(fin.top_w.sum(axis=1) <= 1 + 1e-5)


@pytest.mark.parametrize(
    "n_threads,small_batch,rows_first", [(1, 512, 0), (1, 512, 512), (2, 0, 0), (2, 512, 0), (2, 512, 512), (3, 512, 512)]
)
def test_search_top_matches_faiss_on_digits(n_threads: int, small_batch: int, rows_first: int,
                                            digits_unit: np.ndarray, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: faiss.knn (brute-force inner product) on the UCI optdigits rows bundled with
    # scikit-learn. small_batch 0: the threads split the queries; 512: they split the stored
    # rows (1,797 over 2 or 3 threads, uneven) and the top lists are merged. rows_first 512:
    # the product is rows @ q.T and the top lists are kept from the (rows x queries) tile.
    # Duplicate digit images tie, so the lists must agree as score sets, and as ids wherever
    # scores differ.
    pytest.importorskip("numba")
    from densemem.core import tiles

    assert _fused.set_enabled(True)
    monkeypatch.setattr(tiles, "SMALL_BATCH", small_batch)
    monkeypatch.setattr(tiles, "ROWS_FIRST_BATCH", rows_first)
    x = np.ascontiguousarray(digits_unit)
    q = np.ascontiguousarray(x[::7] + 0.05 * np.random.default_rng(3).standard_normal((257, 64)).astype(np.float32))
    kc = 24
    got_s, got_i = tiles.search_top(q, x, kc, tile_mib=0.05, n_threads=n_threads)  # tiles of 50-200 rows
    ref_s, ref_i = faiss.knn(q, x, kc, metric=faiss.METRIC_INNER_PRODUCT)
    np.testing.assert_allclose(got_s, ref_s, rtol=0, atol=2e-6)
    assert np.all(np.diff(got_s, axis=1) <= 0)  # best first
    exact_scores = np.take_along_axis(q.astype(np.float64) @ x.T.astype(np.float64), got_i, 1)
    np.testing.assert_allclose(exact_scores, got_s, atol=2e-6)  # each id carries its own score
    gaps = np.abs(ref_s[:, :, None] - ref_s[:, None, :]) + np.eye(kc)  # to the nearest other score
    distinct = gaps.min(axis=2) > 1e-5
    assert distinct.mean() > 0.5  # the check below has ids to compare
    np.testing.assert_array_equal(got_i[distinct], ref_i[distinct])
