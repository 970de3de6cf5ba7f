"""The continuous (modern) Hopfield memory against Ramsauer et al. and the entropy identity.

Sources (each test names its own):
- Ramsauer, Schaefl, Lehner, et al., "Hopfield Networks is All You Need", ICLR 2021
  (arXiv:2008.02217): the update xi' = X softmax(beta X^T xi) (published), the energy, the
  storage theorem, the well-separated condition and fixed-point bound (from memory), and the
  three kinds of fixed points (abstract, published).
- The entropy identity dH/dbeta = -beta Var_p(s) of p = softmax(beta s) (a textbook
  statistical-mechanics identity, derived), checked against scipy.integrate.quad.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate
from scipy.special import softmax
from threadpoolctl import threadpool_limits

import densemem
import densemem.tuning as tu
from densemem.tuning._theory import _beta_separated, storage_bound


@pytest.fixture(autouse=True, scope="module")
def _one_blas_thread():
    """These experiments run many small products: one BLAS thread is faster and keeps a
    shared machine responsive (the results do not depend on it)."""
    with threadpool_limits(limits=1, user_api="blas"):
        yield


def _unit(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d))
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


# ------------------------------------------------------------- worked one-step example
def test_worked_one_step_attention_example():
    # Ramsauer et al. 2021 (published: the update is attention). Worked by hand: patterns
    # e1 = (1, 0), e2 = (0, 1), state xi = (1, 0), beta = ln 3. Scores beta X xi = (ln 3, 0),
    # exp -> (3, 1), weights (3/4, 1/4), new state (3/4, 1/4). Energy (from memory)
    # E = -ln(3 + 1)/beta + |xi|^2/2 + ln(2)/beta + M^2/2 = 1 - ln 2 / ln 3 = 0.369070.
    mem = densemem.DenseMemory.from_array([[1.0, 0.0], [0.0, 1.0]], beta=math.log(3.0))
    res = mem.retrieve([[1.0, 0.0]], steps=1, k=2, method="exact")
    np.testing.assert_allclose(res.states[0], [0.75, 0.25], atol=1e-6)
    np.testing.assert_allclose(res.top_weights[0], [0.75, 0.25], atol=1e-6)
    assert res.top_ids[0].tolist() == [0, 1]
    assert float(mem.energy([1.0, 0.0])) == pytest.approx(1.0 - math.log(2) / math.log(3), abs=1e-6)


# ------------------------------------------------------------------- storage theorem
@pytest.mark.parametrize("beta, k, d, p, c_want, n_want", [
    (1.0, 3.0, 20, 0.001, 3.154611, 7.4130),
    (1.0, 1.0, 75, 0.001, 1.371878, 10.9732),
])
def test_storage_theorem_constants(beta, k, d, p, c_want, n_want):
    # Ramsauer et al. 2021, storage theorem (formula from memory); the constants c and the
    # guaranteed count were worked out beforehand from the same formula, to the printed
    # digits (tolerance 1e-5 relative to the printed unit).
    c, n_stored, side = storage_bound(beta, k, d, p)
    assert c == pytest.approx(c_want, abs=1e-6)
    assert n_stored == pytest.approx(n_want, abs=1e-4)
    assert side


def test_storage_theorem_count_is_well_separated_in_practice():
    # Ramsauer et al. 2021, storage theorem (from memory): with probability 1 - p = 0.999,
    # floor(7.413) = 7 patterns uniform on the sphere of radius M = 3 sqrt(19) in d = 20 are
    # stored at beta = 1, i.e. satisfy the well-separated condition. Checked on 200 draws
    # through the library's predict_beta (each pattern's beta_separated <= 1) and by one
    # update from each pattern staying on it (relative distance < 1e-5).
    beta, k, d, p = 1.0, 3.0, 20, 0.001
    n = int(storage_bound(beta, k, d, p)[1])
    radius = k * math.sqrt(d - 1)
    rng = np.random.default_rng(2021)
    for _ in range(200):
        x = _unit(rng, n, d) * np.float32(radius)
        mem = densemem.DenseMemory.from_array(x, beta=beta)
        assert (tu.predict_beta(mem).beta_separated <= beta).all()
        st = mem.retrieve(x, steps=1, method="exact").states
        assert (np.linalg.norm(st - x, axis=1) <= 1e-5 * radius).all()


# ------------------------------------------------- well-separated example, fixed point
def test_fixed_point_bound_on_the_well_separated_example():
    # Ramsauer et al. 2021 (from memory): d = 64, N = 16 unit patterns, beta = 30. The
    # well-separated condition needs Delta_i >= 2/(beta N) + ln(2 (N-1) N beta M^2)/beta
    # = 0.323333; from within radius 1/(beta N M) = 0.0020833 of such an x_i the iteration
    # converges to a fixed point x* with ||x* - x_i|| <= 2 e (N-1) M exp(-beta Delta_i).
    # Library: predict_beta's beta_separated is <= 30 exactly for the patterns meeting the
    # condition; iterating retrieve from radius 0.002 reaches x* within the bound (plus the
    # float32 rounding of a unit vector, 1e-6), much closer than where it started.
    n, d, beta, big_m = 16, 64, 30.0, 1.0
    threshold = 2 / (beta * n) + math.log(2 * (n - 1) * n * beta * big_m**2) / beta  # 0.323333
    # the library's closed-form root of the condition puts a pattern separated by exactly
    # the threshold at beta = 30
    assert _beta_separated(np.array([threshold]), n, big_m, 0.0)[0] == pytest.approx(beta, rel=1e-9)
    rng = np.random.default_rng(64)
    x = _unit(rng, n, d)
    mem = densemem.DenseMemory.from_array(x, beta=beta)
    delta = tu.separation(mem).delta
    pred = tu.predict_beta(mem)
    np.testing.assert_array_equal(pred.beta_separated <= beta, delta >= threshold)
    ok = delta >= threshold
    assert ok.sum() >= n // 2
    direction = _unit(rng, n, d)
    start = x + np.float32(0.002) * direction
    res = mem.retrieve(start, steps=100, method="exact")
    assert res.converged.all()
    dist = np.linalg.norm(res.states.astype(np.float64) - x, axis=1)
    bound = 2 * math.e * (n - 1) * big_m * np.exp(-beta * delta)
    assert (dist[ok] <= bound[ok] + 1e-6).all(), (dist[ok], bound[ok])
    assert (dist[ok] < 0.002 / 10).all()


# --------------------------------------------------------------------- Jacobian bound
@pytest.mark.parametrize("beta", [0.3, 2.0, 8.0])
def test_jacobian_by_finite_differences_obeys_beta_m_squared(beta):
    # Ramsauer et al. 2021 (derived): the update's Jacobian is
    # J = beta X^T (diag p - p p^T) X, so ||J||_2 <= beta M^2. J of the library's one-step
    # update by central finite differences (h = 2e-3; truncation and float32 rounding ~1e-4) matches
    # the float64 formula (scipy softmax) to 1e-3 relative, and its spectral norm obeys the
    # bound (at these betas the norm is 0.11-0.21 of it).
    rng = np.random.default_rng(int(beta * 10))
    n, d = 40, 6
    x = rng.standard_normal((n, d)).astype(np.float32)
    xi = rng.standard_normal(d).astype(np.float32) * np.float32(0.5)
    mem = densemem.DenseMemory.from_array(x, beta=beta)
    h = 2e-3
    plus = np.stack([xi + h * e for e in np.eye(d, dtype=np.float32)])
    minus = np.stack([xi - h * e for e in np.eye(d, dtype=np.float32)])
    fd = ((mem.retrieve(plus, steps=1, method="exact").states.astype(np.float64)
           - mem.retrieve(minus, steps=1, method="exact").states) / (2 * h)).T
    x64 = x.astype(np.float64)
    p = softmax(beta * x64 @ xi.astype(np.float64))
    jac = beta * x64.T @ (np.diag(p) - np.outer(p, p)) @ x64
    assert np.linalg.norm(fd - jac) <= 1e-3 * np.linalg.norm(jac)
    big_m2 = float(np.max(np.sum(x64 * x64, axis=1)))
    assert np.linalg.norm(fd, 2) <= beta * big_m2 * (1 + 1e-3)


# ------------------------------------------------------------ three kinds of fixed points
def test_three_kinds_of_fixed_points_on_random_patterns_across_beta():
    # Ramsauer et al. 2021 (abstract, published): a global average of all patterns (small
    # beta), metastable averages of subsets, and single-pattern fixed points (large beta).
    # 64 random unit patterns in d = 16, iterated from each stored pattern (tuning.sweep_beta,
    # 100 steps): every fixed point global at beta <= 3, every one metastable at beta = 6
    # (participation 42 of 64), every one single from beta = 20; participation never rises.
    rng = np.random.default_rng(0)
    x = _unit(rng, 64, 16)
    mem = densemem.DenseMemory.from_array(x)
    betas = [1e-2, 1.0, 3.0, 6.0, 20.0, 1e3]
    rep = tu.sweep_beta(mem, x, sources=np.arange(64), betas=betas, steps=100)
    assert rep.fraction_global.tolist()[:3] == [1.0, 1.0, 1.0]
    assert rep.fraction_metastable[3] == 1.0
    assert 1.5 < rep.participation[3] < 63
    assert rep.fraction_single.tolist()[4:] == [1.0, 1.0]
    assert (np.diff(rep.participation) <= 1e-6 * 64).all()


# ------------------------------------------------------------------- entropy identity
def test_entropy_identity_dh_dbeta_at_1e12_in_float64():
    # derived (textbook statistical mechanics): for p = softmax(beta s),
    # dH/dbeta = -beta Var_p(s). Integrated: H(b2) - H(b1) = -int_b1^b2 beta Var_p(s) dbeta.
    # The library's entropies (tuning.sweep_beta, one update) come from float32 products
    # and float64 sums; with small integer patterns and queries and betas 0.5 and 1 every
    # product is exact, so H is float64-accurate. Reference: scipy.integrate.quad of the
    # right-hand side in float64. Tolerance 1e-12 (observed ~1e-15); H -> ln N as beta -> 0.
    rng = np.random.default_rng(12)
    x = rng.integers(-1, 2, (50, 8)).astype(np.float32)
    q = rng.integers(-2, 3, (5, 8)).astype(np.float32)
    mem = densemem.DenseMemory.from_array(x)
    b1, b2 = 0.5, 1.0
    rep = tu.sweep_beta(mem, q, betas=[b1, b2], steps=1)
    s = q.astype(np.float64) @ x.T.astype(np.float64)

    def rate(beta: float, j: int) -> float:
        p = softmax(beta * s[j])
        mean = p @ s[j]
        return -beta * float(p @ (s[j] - mean) ** 2)

    for j in range(len(q)):
        want, _ = integrate.quad(rate, b1, b2, args=(j,), epsabs=1e-14, epsrel=1e-13, limit=200)
        got = rep.entropy[1, j] - rep.entropy[0, j]
        assert got == pytest.approx(want, abs=1e-12) and got < 0
    # non-increasing over a grid of dyadic betas (exact products again), at 1e-12
    grid = tu.sweep_beta(mem, q, betas=np.arange(1, 33) / 8.0, steps=1).entropy
    assert (np.diff(grid, axis=0) <= 1e-12).all() and (np.diff(grid, axis=0) < 0).any()
    zero = tu.sweep_beta(mem, q, betas=[2.0**-30], steps=1).entropy[0]  # H = ln N - O(beta^2)
    np.testing.assert_allclose(zero, np.log(50), atol=1e-12)
