"""The partial-softmax kernel (densemem.core.partial) and its exact merge, tested directly.

References: scipy.special.softmax / scipy.special.logsumexp for the
one-pass values, and the derived merge identity (partials over
disjoint row sets merge exactly; associative and commutative, so any tree order gives the
same answer up to rounding) together with Milakov & Gimelshein, arXiv:1805.02867
(Milakov & Gimelshein 2018, published: running max and rescaled sum give softmax in one pass).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp, softmax

from densemem.core import exact as exact_module
from densemem.core import partial as P
from densemem.core.exact import exact_reduce

RTOL = 1e-5


def _data(seed: int, n_q: int = 5, n: int = 70, d: int = 6, beta: float = 2.0):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, d)).astype(np.float32)
    q = rng.standard_normal((n_q, d)).astype(np.float32)
    z = (np.float32(beta) * q) @ x.T  # float32, as the tiled path forms it
    return q, x, z.astype(np.float32)


def _block(z: np.ndarray, rows: np.ndarray, k: int, offset: int = 0) -> P.Partial:
    return P.block(z.copy(), rows, k=k, offset=offset)  # block overwrites z


def _gathered_subset(z: np.ndarray, x: np.ndarray, cols: np.ndarray, k: int) -> P.Partial:
    """Partial over an arbitrary (non-contiguous) row set, the same for every query."""
    b = z.shape[0]
    rows = np.broadcast_to(x[cols], (b, cols.size, x.shape[1])).copy()
    ids = np.broadcast_to(cols.astype(np.int64), (b, cols.size)).copy()
    return P.gathered(z[:, cols], rows, ids, k=k)


def _assert_finished_close(a: P.Finished, b: P.Finished, *, rtol: float = RTOL, scale: float = 1.0) -> None:
    np.testing.assert_allclose(a.lse, b.lse, rtol=rtol, atol=rtol)
    np.testing.assert_array_equal(a.top_i, b.top_i)
    np.testing.assert_allclose(a.top_w, b.top_w, rtol=rtol, atol=1e-12)
    if a.states is not None or b.states is not None:
        np.testing.assert_allclose(a.states, b.states, rtol=rtol, atol=rtol * scale)


def _random_split(rng: np.random.Generator, n: int, parts: int) -> list[np.ndarray]:
    perm = rng.permutation(n)
    cuts = np.sort(rng.choice(np.arange(1, n), size=parts - 1, replace=False))
    return [np.sort(p) for p in np.split(perm, cuts)]


def _tree_merge(parts: list[P.Partial], rng: np.random.Generator) -> P.Partial:
    """Merge in a random tree: repeatedly merge two random members, in random order."""
    pool = list(parts)
    while len(pool) > 1:
        i, j = rng.choice(len(pool), size=2, replace=False)
        a, b = pool[i], pool[j]
        pool = [p for t, p in enumerate(pool) if t not in (i, j)]
        pool.append(P.merge(a, b) if rng.random() < 0.5 else P.merge(b, a))
    return pool[0]


@pytest.mark.parametrize("seed", range(4))
def test_block_matches_scipy_softmax(seed: int) -> None:
    # Reference: scipy.special.softmax / logsumexp in float64.
    q, x, z = _data(seed)
    k = 7
    fin = P.finish(_block(z, x, k))
    z64 = z.astype(np.float64)
    p = softmax(z64, axis=1)
    np.testing.assert_allclose(fin.lse, logsumexp(z64, axis=1), rtol=RTOL)
    np.testing.assert_allclose(fin.states, p @ x.astype(np.float64), rtol=RTOL, atol=RTOL)
    order = np.argsort(-z64, axis=1)[:, :k]
    np.testing.assert_array_equal(fin.top_i, order)
    np.testing.assert_allclose(fin.top_w, np.take_along_axis(p, order, 1), rtol=RTOL)


@pytest.mark.parametrize("width", [20, 16 * 12, 16 * 12 + 5, 700])
def test_block_top_list_is_the_k_largest(width: int) -> None:
    # Reference: numpy argsort of the same scores (a naive full sort). Widths cover the
    # direct path (few groups) and the grouped path with and without leftover columns.
    rng = np.random.default_rng(width)
    z = rng.standard_normal((9, width)).astype(np.float32)
    rows = rng.standard_normal((width, 3)).astype(np.float32)
    for k in (1, 3, 11):
        fin = P.finish(_block(z, rows, k, offset=100))
        want = np.argsort(-z, axis=1, kind="stable")[:, :k] + 100
        np.testing.assert_array_equal(fin.top_i, want)
        np.testing.assert_allclose(fin.lse, logsumexp(z.astype(np.float64), axis=1), rtol=RTOL)


@pytest.mark.parametrize("k", [1, 4, 9])
def test_block_tile_exactly_k_wide(k: int) -> None:
    # Reference: scipy.special.softmax. A tile whose width equals k
    # (every memory of <= 10 patterns under the default k, or one-row tiles with k=1);
    # the kept top scores must be the scores, not the tile's exponentiated buffer.
    rng = np.random.default_rng(k)
    z = rng.standard_normal((4, k)).astype(np.float32)
    rows = rng.standard_normal((k, 3)).astype(np.float32)
    fin = P.finish(_block(z, rows, k))
    p = softmax(z.astype(np.float64), axis=1)
    order = np.argsort(-z, axis=1, kind="stable")
    np.testing.assert_allclose(fin.top_z, np.take_along_axis(z, order, 1), rtol=RTOL)
    np.testing.assert_allclose(fin.top_w, np.take_along_axis(p, order, 1), rtol=RTOL)
    # and merged with a second tile (the buffer is reused by the tiled path)
    z2 = rng.standard_normal((4, 2 * k + 40)).astype(np.float32)
    rows2 = rng.standard_normal((2 * k + 40, 3)).astype(np.float32)
    merged = P.finish(P.merge(_block(z, rows, k), _block(z2, rows2, k, offset=k)))
    zz = np.concatenate([z, z2], axis=1).astype(np.float64)
    pp = softmax(zz, axis=1)
    order = np.argsort(-zz, axis=1)[:, :k]
    np.testing.assert_array_equal(merged.top_i, order)
    np.testing.assert_allclose(merged.top_w, np.take_along_axis(pp, order, 1), rtol=RTOL)


@pytest.mark.parametrize("seed", range(6))
def test_merge_any_tree_order_equals_one_pass(seed: int) -> None:
    # Derived (merge of partials over disjoint rows): partials over disjoint row sets merge
    # exactly, in any
    # tree order (associative and commutative). Splits are random and non-contiguous.
    rng = np.random.default_rng(100 + seed)
    q, x, z = _data(seed, n=60)
    k = 5
    one = P.finish(_block(z, x, k))
    splits = _random_split(rng, x.shape[0], parts=int(rng.integers(2, 7)))
    parts = [_gathered_subset(z, x, cols, k) for cols in splits]
    for _ in range(3):
        _assert_finished_close(P.finish(_tree_merge(parts, rng)), one)


def test_merge_contiguous_blocks_equals_one_pass() -> None:
    # Derived (merge of partials over disjoint rows), through block() with offsets as the tiled
    # path uses it.
    q, x, z = _data(7, n=53)
    k = 4
    one = P.finish(_block(z, x, k))
    bounds = [0, 1, 9, 10, 31, 53]  # uneven tiles, one of a single row
    parts = [_block(z[:, a:b], x[a:b], k, offset=a) for a, b in zip(bounds[:-1], bounds[1:])]
    left = parts[0]
    for p in parts[1:]:
        left = P.merge(left, p)
    right = parts[-1]
    for p in reversed(parts[:-1]):
        right = P.merge(p, right)
    _assert_finished_close(P.finish(left), one)
    _assert_finished_close(P.finish(right), one)


def test_merge_is_commutative_and_associative_on_the_partials() -> None:
    # Derived (merge of partials over disjoint rows): the merged statistics themselves (lse = m
    # + log l, the
    # weighted sum normalized by l) do not depend on the order.
    rng = np.random.default_rng(3)
    q, x, z = _data(11, n=45)
    a, b, c = (_gathered_subset(z, x, cols, 6) for cols in _random_split(rng, 45, 3))
    ab_c = P.finish(P.merge(P.merge(a, b), c))
    a_bc = P.finish(P.merge(a, P.merge(b, c)))
    ba_c = P.finish(P.merge(P.merge(b, a), c))
    _assert_finished_close(ab_c, a_bc)
    _assert_finished_close(ab_c, ba_c)


def test_empty_partial_is_the_identity() -> None:
    # Derived (merge of partials over disjoint rows): the partial of an empty row set (m = -inf,
    # l = 0) is
    # the identity of the merge, on either side.
    q, x, z = _data(5)
    k = 6
    p = _block(z, x, k)
    e = P.empty(z.shape[0], x.shape[1], k)
    want = P.finish(p)
    for merged in (P.merge(e, p), P.merge(p, e)):
        got = P.finish(merged)
        np.testing.assert_array_equal(got.lse, want.lse)
        np.testing.assert_array_equal(got.states, want.states)
        np.testing.assert_array_equal(got.top_i, want.top_i)
        np.testing.assert_array_equal(got.top_w, want.top_w)
    both_empty = P.merge(e, e)
    assert np.all(both_empty.m == -np.inf) and np.all(both_empty.l == 0)
    assert np.all(both_empty.top_i == -1)


@pytest.mark.parametrize("seed", range(3))
def test_gathered_with_inf_padding_agrees_with_block(seed: int) -> None:
    # Reference: block() over the same rows (and scipy softmax through the test above).
    # -inf marks a missing candidate; the padded slots carry garbage rows and id -1,
    # which must have no effect. k exceeds the real candidates, so the top list pads.
    rng = np.random.default_rng(seed)
    q, x, z = _data(seed, n=12)
    n_pad = 5
    k = 15  # > 12 real candidates
    want = P.finish(_block(z, x, k, offset=0))
    b = z.shape[0]
    zz = np.concatenate([z, np.full((b, n_pad), -np.inf, np.float32)], axis=1)
    rows = np.concatenate(
        [np.broadcast_to(x, (b,) + x.shape), rng.normal(size=(b, n_pad, x.shape[1])).astype(np.float32) * 1e3],
        axis=1,
    )
    ids = np.concatenate([np.broadcast_to(np.arange(12), (b, 12)), np.full((b, n_pad), -1)], axis=1)
    # shuffle candidate order per query: gathered() must not depend on it
    order = np.argsort(rng.random(zz.shape), axis=1)
    zz = np.take_along_axis(zz, order, 1)
    ids = np.take_along_axis(ids, order, 1)
    rows = np.take_along_axis(rows, order[:, :, None], 1)
    got = P.finish(P.gathered(zz, rows, ids, k=k))
    np.testing.assert_allclose(got.lse, want.lse, rtol=RTOL)
    np.testing.assert_allclose(got.states, want.states, rtol=RTOL, atol=RTOL)
    np.testing.assert_array_equal(got.top_i, want.top_i)
    np.testing.assert_allclose(got.top_w, want.top_w, rtol=RTOL, atol=1e-12)
    assert np.all(got.top_i[:, 12:] == -1) and np.all(got.top_w[:, 12:] == 0)
    np.testing.assert_allclose(got.top_w.sum(axis=1), 1.0, rtol=RTOL)  # all rows are candidates


def test_gathered_all_missing_row_merges_as_identity() -> None:
    # Derived (merge of partials over disjoint rows): a query whose candidate set is empty (all
    # -inf) has
    # the empty partial, so merging it into a real partial leaves that partial unchanged.
    q, x, z = _data(9, n=20)
    k = 3
    real = _block(z, x, k)
    b = z.shape[0]
    missing = P.gathered(
        np.full((b, 4), -np.inf), np.zeros((b, 4, x.shape[1]), np.float32), np.full((b, 4), -1), k=k
    )
    assert np.all(missing.l == 0)
    got, want = P.finish(P.merge(missing, real)), P.finish(real)
    np.testing.assert_array_equal(got.top_i, want.top_i)
    np.testing.assert_allclose(got.lse, want.lse, rtol=1e-12)
    np.testing.assert_allclose(got.states, want.states, rtol=1e-6)


def test_merge_of_far_apart_scales_stays_finite() -> None:
    # Common practice (max-shift log-sum-exp, as in scipy.special.logsumexp): partials
    # whose maxima differ by far more than exp can represent merge without overflow.
    rows = np.eye(2, dtype=np.float32)
    hi = _block(np.array([[1e30, -1e30]], np.float32), rows, 1, offset=0)
    lo = _block(np.array([[-1e30, -2e30]], np.float32), rows, 1, offset=2)
    with np.errstate(over="raise", invalid="raise"):  # underflow to 0 is expected and fine
        fin = P.finish(P.merge(lo, hi))
    assert np.isfinite(fin.lse).all() and np.isfinite(fin.states).all()
    np.testing.assert_allclose(fin.lse, logsumexp([1e30, -1e30, -1e30, -2e30]), rtol=1e-7)
    np.testing.assert_array_equal(fin.top_i, [[0]])
    np.testing.assert_allclose(fin.states, [[1.0, 0.0]])


@pytest.mark.parametrize(
    "n_threads,chunk,split_rows",
    [(1, 512, 4096), (1, 4, 4096), (2, 4, 4096), (2, 7, 4096), (2, 512, 4096), (2, 512, 1), (2, 5, 1), (3, 4, 1)],
)
def test_exact_reduce_chunks_and_threads_match_scipy(
    n_threads: int, chunk: int, split_rows: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Reference: scipy.special.softmax / logsumexp in float64, for
    # several query-chunk sizes and thread counts, with tiles of a few rows (uneven). With
    # split_rows = 1 the threads split the 41 stored rows (14/13/14 over 3 threads) and their
    # partials are merged, in query groups of chunk * n_threads (uneven too).
    monkeypatch.setattr(exact_module, "SPLIT_ROWS", split_rows)
    rng = np.random.default_rng(chunk + n_threads)
    x = rng.standard_normal((41, 5)).astype(np.float32)
    q = rng.standard_normal((23, 5)).astype(np.float32)
    beta = 1.7
    part = exact_reduce(q, x, beta, k=6, tile_mib=1e-4, n_threads=n_threads, chunk=chunk)
    fin = P.finish(part)
    z = beta * q.astype(np.float64) @ x.astype(np.float64).T
    p = softmax(z, axis=1)
    np.testing.assert_allclose(fin.lse, logsumexp(z, axis=1), rtol=RTOL)
    np.testing.assert_allclose(fin.states, p @ x.astype(np.float64), rtol=RTOL, atol=RTOL)
    order = np.argsort(-z, axis=1)[:, :6]
    np.testing.assert_array_equal(fin.top_i, order)
    np.testing.assert_allclose(fin.top_w, np.take_along_axis(p, order, 1), rtol=RTOL)


@pytest.mark.parametrize("need_acc,moments", [(False, False), (True, True)])
def test_top_list_longer_than_the_rows_is_padded_with_minus_one(need_acc: bool, moments: bool) -> None:
    # Common practice (the -1 / -inf padding of faiss search results): with k larger than the
    # stored rows the extra places hold row -1 and score -inf, never a real-looking row number.
    # The NumPy kernel runs here (no weighted sum, or moments), with tiles of 3 rows.
    rng = np.random.default_rng(4)
    x = rng.standard_normal((7, 4)).astype(np.float32)
    q = rng.standard_normal((5, 4)).astype(np.float32)
    fin = P.finish(exact_reduce(q, x, 2.0, k=10, tile_mib=3 * 5 * 4 / 2**20, n_threads=1,
                                need_acc=need_acc, moments=moments))
    z = 2.0 * q.astype(np.float64) @ x.astype(np.float64).T
    np.testing.assert_array_equal(fin.top_i[:, :7], np.argsort(-z, axis=1))
    np.testing.assert_array_equal(fin.top_i[:, 7:], -1)
    assert np.all(fin.top_w[:, 7:] == 0)
