"""Sparse normalising maps on retrieve (sparsemax, alpha-entmax): exact supports, energy, margin.

Outside references, each named beside its check:
- sort-based sparsemax, Martins & Astudillo, "From Softmax to Sparsemax", ICML 2016, Algorithm 1
  (written below in NumPy);
- bisection for alpha-entmax, Peters, Niculae & Martins, "Sparse Sequence-to-Sequence Models",
  ACL 2019, Algorithm 1 with p_i = [(alpha-1) z_i - tau]_+^(1/(alpha-1)) (eq. 11);
- sparsemax as the Euclidean projection onto the simplex (Martins & Astudillo 2016, eq. 2),
  solved with scipy.optimize.minimize (SLSQP);
- scipy.special.softmax for the alpha -> 1 limit (Peters et al. 2019, sec. 2: entmax tends to softmax);
- the Fenchel-Young margin: Blondel, Martins & Niculae, "Learning with Fenchel-Young Losses",
  JMLR 2020, Prop. 7 (the alpha-Tsallis loss has margin 1/(alpha-1)); Santos, Niculae, McNamee &
  Martins, ICML 2024 (arXiv:2402.13725), Prop. 3 (exact retrieval in one step beyond it);
- the energy -Omega*(beta X xi)/beta + |xi|^2/2 and its descent under the update (concave-convex
  procedure): Santos et al. 2024, eq. 9 and Prop. 2; Omega the Tsallis negentropy (Blondel et al.
  2020, eq. 11);
- faiss exact search (IndexFlatIP) for the single-item case; scikit-learn's bundled digits (UCI optdigits).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize
from scipy.special import softmax

from densemem import DenseMemory, InputTypeError, InputValueError
from densemem.core.sparse import entmax, max_entropy

ALPHAS = {"sparsemax": 2.0, "entmax15": 1.5}


# --------------------------------------------------------------- references
def ref_sparsemax(z: np.ndarray) -> np.ndarray:
    """Martins & Astudillo 2016, Algorithm 1: sort, k(z) = max{k : 1 + k z_(k) > sum_{j<=k} z_(j)}."""
    z = np.asarray(z, np.float64)
    out = np.empty_like(z)
    for r, row in enumerate(z):
        s = np.sort(row)[::-1]
        cs = np.cumsum(s)
        ks = np.arange(1, s.size + 1)
        k = ks[1 + ks * s > cs].max()
        tau = (cs[k - 1] - 1.0) / k
        out[r] = np.maximum(row - tau, 0.0)
    return out


def ref_entmax_bisect(z: np.ndarray, alpha: float, iters: int = 200) -> np.ndarray:
    """Peters, Niculae & Martins 2019, Algorithm 1 (bisection on tau in [max - 1, max - (1/n)^(alpha-1)])."""
    t = (alpha - 1.0) * np.asarray(z, np.float64)
    n = t.shape[1]
    lo = t.max(axis=1) - 1.0
    hi = t.max(axis=1) - (1.0 / n) ** (alpha - 1.0)
    for _ in range(iters):
        mid = 0.5 * (lo + hi)
        p = np.maximum(t - mid[:, None], 0.0) ** (1.0 / (alpha - 1.0))
        big = p.sum(axis=1) >= 1.0
        lo = np.where(big, mid, lo)
        hi = np.where(big, hi, mid)
    p = np.maximum(t - lo[:, None], 0.0) ** (1.0 / (alpha - 1.0))
    return p / p.sum(axis=1, keepdims=True)


def ref_energy(x: np.ndarray, s: np.ndarray, beta: float, alpha: float) -> np.ndarray:
    """-Omega*(beta X xi)/beta + |xi|^2/2 + H_max/beta + M^2/2, Omega* = p.z - (sum p^a - 1)/(a(a-1))."""
    x64, s64 = x.astype(np.float64), s.astype(np.float64)
    z = beta * s64 @ x64.T
    p = ref_sparsemax(z) if alpha == 2.0 else ref_entmax_bisect(z, alpha)
    omega = (p * z).sum(1) - ((p ** alpha).sum(1) - 1.0) / (alpha * (alpha - 1.0))
    n = x.shape[0]
    h = (1.0 - n ** (1.0 - alpha)) / (alpha * (alpha - 1.0))
    m = np.linalg.norm(x64, axis=1).max()
    return -omega / beta + 0.5 * (s64 * s64).sum(1) + h / beta + 0.5 * m * m


def _unit(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _noisy(rng: np.random.Generator, x: np.ndarray, n: int, noise: float) -> np.ndarray:
    q = x[:n] + noise * rng.standard_normal((n, x.shape[1])).astype(np.float32) / np.sqrt(x.shape[1])
    return (q / np.linalg.norm(q, axis=1, keepdims=True)).astype(np.float32)


def _ref_weights(x: np.ndarray, q: np.ndarray, beta: float, alpha: float) -> np.ndarray:
    z = beta * q.astype(np.float64) @ x.astype(np.float64).T
    return ref_sparsemax(z) if alpha == 2.0 else ref_entmax_bisect(z, alpha)


# ------------------------------------------------------------- the map itself
def test_sparsemax_matches_sort_based_reference(rng):
    # Martins & Astudillo 2016, Algorithm 1
    z = rng.standard_normal((50, 40)) * rng.uniform(0.1, 5.0, size=(50, 1))
    np.testing.assert_allclose(entmax(z, 2.0), ref_sparsemax(z), atol=1e-12)


@pytest.mark.parametrize("alpha", [1.1, 1.25, 1.5, 1.75, 2.0])
def test_entmax_matches_bisection_reference(rng, alpha):
    # Peters, Niculae & Martins 2019, Algorithm 1 (bisection)
    z = rng.standard_normal((40, 30)) * 3.0
    np.testing.assert_allclose(entmax(z, alpha), ref_entmax_bisect(z, alpha), atol=1e-9)


def test_sparsemax_is_the_euclidean_projection_onto_the_simplex(rng):
    # Martins & Astudillo 2016, eq. 2: sparsemax(z) = argmin_{p in simplex} |p - z|^2, via scipy SLSQP
    for _ in range(5):
        z = rng.standard_normal(6) * 1.5
        res = minimize(lambda p: np.sum((p - z) ** 2), np.full(6, 1 / 6), method="SLSQP",
                       bounds=[(0, 1)] * 6, constraints=[{"type": "eq", "fun": lambda p: p.sum() - 1}],
                       options={"ftol": 1e-14, "maxiter": 500})
        assert res.success
        np.testing.assert_allclose(entmax(z[None], 2.0)[0], res.x, atol=1e-6)


def test_alpha_near_one_approaches_softmax(rng):
    # Peters et al. 2019, sec. 2: alpha-entmax -> softmax as alpha -> 1 (scipy.special.softmax)
    z = rng.standard_normal((5, 12))
    far = np.abs(entmax(z, 1.5) - softmax(z, axis=1)).max()
    near = np.abs(entmax(z, 1.001) - softmax(z, axis=1)).max()
    assert near < 2e-3 and near < far / 50


# -------------------------------------------------------------- on retrieve
@pytest.mark.parametrize("weighting", ["sparsemax", "entmax15"])
@pytest.mark.parametrize("beta", [2.0, 15.0, 60.0])
def test_retrieve_weights_and_states_match_reference_on_digits(digits_unit, weighting, beta):
    # open data: scikit-learn's digits; references: Algorithm 1 of Martins & Astudillo 2016 /
    # bisection of Peters et al. 2019, over every stored row in float64
    x = digits_unit
    q = (x[::60] + 0.02).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=False)
    alpha = ALPHAS[weighting]
    p = _ref_weights(x, q, beta, alpha)
    tol = 1e-5 + 1e-6 * beta  # scores are float32 products (as on the softmax path): z errs by ~beta * 1e-6
    for method in ("auto", "certified", "exact"):
        res = mem.retrieve(q, beta, weighting=weighting, k=8, method=method)
        np.testing.assert_allclose(res.states, p @ x.astype(np.float64), atol=tol)
        np.testing.assert_array_equal(res.support_size, (p > 0).sum(1))
        ref_top = np.sort(p, axis=1)[:, ::-1][:, :8]
        np.testing.assert_allclose(res.top_weights, ref_top, atol=tol)
        assert res.weighting == weighting and res.alpha == alpha
        # the ids with nonzero weight are the reference's support (heaviest first); the rest are -1
        for j in range(q.shape[0]):
            s = int(res.support_size[j])
            assert set(res.top_ids[j][: min(s, 8)].tolist()) <= set(np.flatnonzero(p[j] > 0).tolist())
            assert np.all(res.top_ids[j][s:] == -1) and np.all(res.top_weights[j][s:] == 0.0)


def test_candidate_grown_answer_equals_all_rows_answer(rng):
    # derived (the certificate of core/sparse.py): faiss candidates grown until the smallest is outside
    # the support give the all-rows answer; a small k_max forces the tiled pass on the wide supports
    x = _unit(rng, 6000, 384)
    q = _noisy(rng, x, 40, noise=1.5)
    mem = DenseMemory.from_array(x, normalize=False)
    for weighting, beta in (("sparsemax", 30.0), ("entmax15", 30.0), ("entmax15", 6.0)):
        exact = mem.retrieve(q, beta, weighting=weighting, method="exact", k=5, steps=2)
        grown = mem.retrieve(q, beta, weighting=weighting, method="certified", k=5, steps=2)
        capped = mem.retrieve(q, beta, weighting=weighting, method="certified", k=5, steps=2, k_max=16)
        assert exact.fell_back.all() and exact.method == "exact"
        for r in (grown, capped):
            np.testing.assert_allclose(r.states, exact.states, atol=1e-5)
            np.testing.assert_allclose(r.top_weights, exact.top_weights, atol=1e-5)
            np.testing.assert_array_equal(r.support_size, exact.support_size)
            np.testing.assert_allclose(r.energy, exact.energy, atol=1e-5)
        wide = exact.support_size > 16
        np.testing.assert_array_equal(capped.fell_back, wide)  # tiled exactly where the support exceeds the cap
        assert not grown.fell_back[~wide].any()
        assert np.all(grown.mass_bound == 0.0)  # the certificate omits nothing


def test_alpha_two_equals_sparsemax(rng):
    # definition (Peters et al. 2019, sec. 3): 2-entmax is sparsemax
    x = _unit(rng, 500, 32)
    q = _noisy(rng, x, 10, noise=1.0)
    mem = DenseMemory.from_array(x)
    a = mem.retrieve(q, 10.0, weighting="sparsemax", steps=2)
    b = mem.retrieve(q, 10.0, weighting="entmax", alpha=2.0, steps=2)
    np.testing.assert_array_equal(a.states, b.states)
    np.testing.assert_array_equal(a.top_ids, b.top_ids)
    np.testing.assert_array_equal(a.energy, b.energy)


def test_alpha_near_one_retrieval_approaches_softmax_retrieval(rng):
    # Peters et al. 2019, sec. 2 (entmax -> softmax as alpha -> 1); reference: scipy.special.softmax
    x = _unit(rng, 300, 16)
    q = _noisy(rng, x, 6, noise=1.0)
    mem = DenseMemory.from_array(x)
    z = 4.0 * q.astype(np.float64) @ x.T.astype(np.float64)
    ref = softmax(z, axis=1) @ x.astype(np.float64)
    near = mem.retrieve(q, 4.0, weighting="entmax", alpha=1.001, method="exact").states
    far = mem.retrieve(q, 4.0, weighting="entmax", alpha=1.5, method="exact").states
    assert np.abs(near - ref).max() < 5e-3 < np.abs(far - ref).max()


@pytest.mark.parametrize("alpha", [2.0, 1.5, 1.25])
def test_fenchel_young_margin_gives_exact_single_item_recall(rng, alpha):
    # Blondel et al. 2020 Prop. 7 / Santos et al. 2024 Prop. 3: beta * (x_i.x_i - max_j x_i.x_j) >= 1/(alpha-1)
    # returns x_i exactly in one step; just below it another item keeps weight. faiss IndexFlatIP gives the gap.
    import faiss

    x = _unit(rng, 400, 48)
    mem = DenseMemory.from_array(x, normalize=False)
    flat = faiss.IndexFlatIP(48)
    flat.add(x)
    s, _ = flat.search(x, 2)
    gap = (s[:, 0] - s[:, 1]).astype(np.float64)  # own score 1 minus the largest other score
    i = int(np.argmin(gap))  # the hardest pattern sets the margin
    beta_margin = 1.0 / ((alpha - 1.0) * gap[i])
    at = mem.retrieve(x[i], beta_margin * (1 + 1e-4), weighting="entmax", alpha=alpha)
    assert at.support_size == 1 and at.top_weights[0] == 1.0 and at.top_ids[0] == i
    np.testing.assert_array_equal(at.states, x[i])  # bit for bit the stored row
    below = mem.retrieve(x[i], beta_margin * (1 - 1e-3), weighting="entmax", alpha=alpha)
    assert below.support_size == 2 and 0 < below.top_weights[1] < below.top_weights[0] < 1
    # every pattern is exactly retrievable at the largest per-pattern margin beta
    every = mem.retrieve(x, 1.0 / ((alpha - 1.0) * gap.min()) * (1 + 1e-4), weighting="entmax", alpha=alpha)
    assert np.all(every.support_size == 1)
    np.testing.assert_array_equal(every.states, x)


def test_energy_matches_reference_and_is_nonnegative(digits_unit):
    # Santos et al. 2024, eq. 9 with the Tsallis negentropy (Blondel et al. 2020, eq. 11), in float64
    x = digits_unit
    mem = DenseMemory.from_array(x, normalize=False)
    q = (x[::100] * 0.8 + 0.01).astype(np.float32)
    for weighting, beta in (("sparsemax", 5.0), ("entmax15", 20.0), ("sparsemax", 80.0)):
        a = ALPHAS[weighting]
        e = mem.energy(q, beta, weighting=weighting)
        np.testing.assert_allclose(e, ref_energy(x, q, beta, a), atol=1e-5)
        assert np.all(e >= -1e-6)
        r = mem.retrieve(q, beta, weighting=weighting)
        np.testing.assert_allclose(r.energy, ref_energy(x, r.states, beta, a), atol=1e-5)
    assert max_entropy(1797, 1.0 + 1e-9) == pytest.approx(np.log(1797), rel=1e-6)  # Tsallis -> Shannon


_MEM = DenseMemory.from_array(_unit(np.random.default_rng(5), 200, 12), normalize=False)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), beta=st.floats(0.5, 60.0), alpha=st.sampled_from([1.2, 1.5, 2.0]))
def test_energy_never_rises_along_iterations(seed, beta, alpha):
    # Santos et al. 2024, Prop. 2 (concave-convex procedure): E(xi_{t+1}) <= E(xi_t)
    r = np.random.default_rng(seed)
    s = r.standard_normal((3, 12)).astype(np.float32)
    energies = [_MEM.energy(s, beta, weighting="entmax", alpha=alpha)]
    for _ in range(4):
        s = _MEM.retrieve(s, beta, weighting="entmax", alpha=alpha, method="exact", return_energy=False).states
        energies.append(_MEM.energy(s, beta, weighting="entmax", alpha=alpha))
    e = np.array(energies)
    assert np.all(np.diff(e, axis=0) <= 1e-5 * (1 + np.abs(e[:-1])))


def test_str_ids_batches_and_one_dimensional_query(rng):
    x = _unit(rng, 300, 16)
    mem = DenseMemory.from_array(x, ids=[f"p{i}" for i in range(300)])
    q = _noisy(rng, x, 9, noise=0.8)
    whole = mem.retrieve(q, 20.0, weighting="sparsemax", k=4)
    parts = mem.retrieve(q, 20.0, weighting="sparsemax", k=4, batch_size=4)
    np.testing.assert_array_equal(whole.top_ids, parts.top_ids)
    np.testing.assert_array_equal(whole.states, parts.states)
    np.testing.assert_array_equal(whole.support_size, parts.support_size)
    one = mem.retrieve(q[0], 20.0, weighting="sparsemax", k=4)
    assert one.top_ids.shape == (4,) and int(one.support_size) == int(whole.support_size[0])
    assert all(t == "" for t in one.top_ids[int(one.support_size):])
    assert one.to_dict()["weighting"] == "sparsemax"


def test_softmax_default_has_no_support_size(rng):
    mem = DenseMemory.from_array(_unit(rng, 50, 8))
    r = mem.retrieve(_unit(rng, 2, 8))
    assert r.support_size is None and r.weighting == "softmax" and r.alpha is None


# ---------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kw,exc,match",
    [
        (dict(weighting="entmax", alpha=1.0), InputValueError, r"DenseMemory.retrieve: `alpha` must be a number in \(1, 2\]; got 1.0"),
        (dict(weighting="entmax", alpha=2.5), InputValueError, r"`alpha` must be a number in \(1, 2\]; got 2.5"),
        (dict(weighting="entmax", alpha=float("nan")), InputValueError, r"`alpha` must be a number in \(1, 2\]; got nan"),
        (dict(weighting="entmax", alpha="1.5"), InputTypeError, r"`alpha` must be a number in \(1, 2\]; got str"),
        (dict(weighting="entmax"), InputValueError, r"weighting='entmax' needs `alpha`"),
        (dict(weighting="sparsemax", alpha=1.5), InputValueError, r"`alpha` applies to weighting='entmax' only"),
        (dict(weighting="sparsemx"), InputValueError, r"DenseMemory.retrieve: unknown `weighting` 'sparsemx'; use one of"),
        (dict(weighting=2), InputTypeError, r"`weighting` must be one of 'softmax'"),
        (dict(weighting="sparsemax", method="index"), InputValueError, r"weighting='sparsemax' needs an exact candidate search"),
    ],
)
def test_bad_weighting_arguments(rng, kw, exc, match):
    mem = DenseMemory.from_array(_unit(rng, 20, 4))
    with pytest.raises(exc, match=match):
        mem.retrieve(_unit(rng, 1, 4), 2.0, **kw)


def test_bad_weighting_on_energy(rng):
    mem = DenseMemory.from_array(_unit(rng, 20, 4))
    with pytest.raises(InputValueError, match=r"DenseMemory.energy: unknown `weighting` 'soft'"):
        mem.energy(_unit(rng, 1, 4), 2.0, weighting="soft")
