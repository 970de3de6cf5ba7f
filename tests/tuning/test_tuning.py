"""Tests of densemem.tuning: separation, predicted beta, sweep, bisection choice, reports."""

from __future__ import annotations

import itertools
import json
import math
import re
import sys

import faiss
import numpy as np
import pytest
from pydantic import ValidationError
from scipy.optimize import brentq
from scipy.special import lambertw, softmax
from scipy.stats import entropy as scipy_entropy

import densemem
import densemem.tuning as tu
from densemem.core import exact as exact_module
from densemem.core import partial as P
from densemem.core.exact import exact_reduce
from densemem._synthetic import corrupt
from densemem.errors import InputTypeError, InputValueError, MissingExtraError, UnknownIdError


def unit_rows(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def np_separation(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Naive in-test reference: Delta_i and rival row from the full float64 Gram matrix."""
    g = x.astype(np.float64) @ x.astype(np.float64).T
    off = g.copy()
    np.fill_diagonal(off, -np.inf)
    rival = off.argmax(axis=1)
    return np.diag(g) - off[np.arange(len(x)), rival], rival


def one_step(mem: densemem.DenseMemory, q: np.ndarray, beta: float) -> densemem.RetrievalResult:
    return mem.retrieve(q, beta, steps=1, k=1, method="exact", return_energy=False)


def ball_queries(rng: np.random.Generator, x: np.ndarray, i: int, rival: int, r: float) -> np.ndarray:
    """Queries at distance exactly r from x_i: two random directions and the direction of the rival."""
    dirs = rng.standard_normal((3, x.shape[1]))
    dirs[2] = x[rival].astype(np.float64) - x[i]
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    return (x[i].astype(np.float64) + r * dirs).astype(np.float32)


# ------------------------------------------------------------ separation
def test_separation_matches_numpy_bruteforce(rng: np.random.Generator) -> None:
    # Reference: naive numpy Gram matrix (float64). Unequal norms make faiss's top hit
    # another (longer) pattern for some rows: the rival must still exclude row i.
    x = unit_rows(rng, 300, 12) * rng.uniform(0.5, 2.0, size=(300, 1)).astype(np.float32)
    mem = densemem.DenseMemory.from_array(x, ids=[f"p{i}" for i in range(300)])
    rep = tu.separation(mem)
    delta, rival = np_separation(x)
    np.testing.assert_allclose(rep.delta, delta, atol=1e-5)
    assert np.mean(rep.rival_rows == rival) > 0.99  # float32 near-ties may swap a rival
    assert (rep.delta <= 0).any()  # the unequal norms do produce negative separations
    assert rep.rival_ids.tolist() == [f"p{j}" for j in rep.rival_rows]
    assert rep.summary["delta_min"] == pytest.approx(delta.min(), abs=1e-5)
    assert rep.inseparable_ids.tolist() == [f"p{i}" for i in np.flatnonzero(rep.delta <= rep.tol)]


def test_separation_digits_matches_faiss_top2(digits_unit: np.ndarray) -> None:
    # Reference: faiss IndexFlatIP exact top-2 on scikit-learn's bundled digits (UCI optdigits).
    mem = densemem.DenseMemory.from_array(digits_unit)
    rep = tu.separation(mem)
    flat = faiss.IndexFlatIP(64)
    flat.add(digits_unit)
    scores, pos = flat.search(digits_unit, 2)
    assert (pos[:, 0] == np.arange(len(digits_unit))).all()  # unit norms: each row is its own best hit
    np.testing.assert_allclose(rep.delta, 1.0 - scores[:, 1], atol=2e-6)
    assert np.mean(rep.rival_rows == pos[:, 1]) > 0.995
    assert rep.summary["fraction_inseparable"] == 0.0


def test_separation_planted_duplicate_is_inseparable(rng: np.random.Generator) -> None:
    # Derived: an exact copy has Delta = 0 against its twin, whatever beta.
    x = unit_rows(rng, 50, 8)
    x = np.vstack([x, x[7:8]])
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.separation(mem)
    assert sorted(rep.inseparable_ids.tolist()) == [7, 50]
    assert rep.rival_ids[7] == 50 and rep.rival_ids[50] == 7
    pred = tu.predict_beta(mem, separation_report=rep)
    assert np.isinf(pred.beta_separated[[7, 50]]).all() and np.isfinite(np.delete(pred.beta_separated, [7, 50])).all()


@pytest.mark.parametrize("index", ["hnsw", "ivf"])
def test_separation_index_backed_never_underestimates(rng: np.random.Generator, index: str) -> None:
    # Derived: an approximate search can only miss the best rival, so Delta can only grow;
    # against the exact faiss top-2 most rivals agree (common practice: HNSW/IVF recall).
    x = unit_rows(rng, 2000, 16)
    mem = densemem.DenseMemory.from_array(x)
    exact = tu.separation(mem)
    approx = tu.separation(mem, index=index)
    assert approx.index == index
    assert (approx.delta >= exact.delta - 1e-6).all()
    assert np.mean(approx.rival_rows == exact.rival_rows) > 0.8


# ------------------------------------------------------- predicted beta
def test_beta_separated_is_the_large_root_of_the_condition(rng: np.random.Generator) -> None:
    # Ramsauer et al. 2021 (from memory): Delta >= 2/(beta N) + ln(2 (N-1) N beta M^2) / beta.
    # Reference: scipy.optimize.brentq on that inequality as written, on [1/Delta, 1e9];
    # and the Lambert W closed form from scipy.special.lambertw.
    x = unit_rows(rng, 40, 6) * np.float32(1.7)
    mem = densemem.DenseMemory.from_array(x)
    pred = tu.predict_beta(mem)
    n, m = len(x), mem.max_norm
    delta = tu.separation(mem).delta

    def gap(beta: float, d: float) -> float:
        return d - (2.0 / (beta * n) + math.log(2 * (n - 1) * n * beta * m * m) / beta)

    for i in range(n):
        ref = brentq(gap, 1.0 / delta[i], 1e9, args=(delta[i],), xtol=1e-12, rtol=1e-12)
        assert pred.beta_separated[i] == pytest.approx(ref, rel=1e-8)
        for b in ref * np.geomspace(1.0 + 1e-7, 1e4, 30):  # holds from the root on, for good
            assert gap(b, delta[i]) >= 0
        assert gap(ref * (1 - 1e-5), delta[i]) < 0
    c = 2.0 / n + np.log(2 * (n - 1) * n * m * m)
    closed = -lambertw(-delta * np.exp(-c), k=-1).real / delta
    np.testing.assert_allclose(pred.beta_separated, closed, rtol=1e-10)
    np.testing.assert_allclose(pred.radius_separated, 1.0 / (pred.beta_separated * n * m), rtol=1e-12)


def _check_sphere_maps_into_itself(mem: densemem.DenseMemory, x: np.ndarray, rng: np.random.Generator) -> int:
    pred = tu.predict_beta(mem)
    rep = tu.separation(mem)
    n, m = len(x), mem.max_norm
    checked = 0
    for i in np.flatnonzero(np.isfinite(pred.beta_separated)):
        for beta in (pred.beta_separated[i], 4.0 * pred.beta_separated[i]):
            r = 1.0 / (beta * n * m)
            q = ball_queries(rng, x, i, int(rep.rival_rows[i]), r)
            res = one_step(mem, q, beta)
            dist = np.linalg.norm(res.states.astype(np.float64) - x[i], axis=1)
            assert (dist <= r * (1 + 1e-4) + 2e-7).all(), (i, beta, dist, r)  # 2e-7: float32 states
            assert (res.top_ids[:, 0] == i).all()
            checked += 1
    return checked


def test_predicted_beta_is_conservative_random(rng: np.random.Generator) -> None:
    # Ramsauer et al. 2021, the well-separated condition (from memory), with the separation
    # Delta_i (definition from memory; the one-step bound is derived): at or
    # above the predicted beta the
    # update maps the ball of radius 1/(beta N M) around x_i into itself; checked with exact
    # one-step retrieval from points on the ball's surface (random and towards the rival).
    x = unit_rows(rng, 60, 16)
    assert _check_sphere_maps_into_itself(densemem.DenseMemory.from_array(x), x, rng) == 120


def test_predicted_beta_is_conservative_digits(digits_unit: np.ndarray, rng: np.random.Generator) -> None:
    # Same claim on scikit-learn's bundled digits (UCI optdigits), first 120 normalized rows.
    x = np.ascontiguousarray(digits_unit[:120])
    assert _check_sphere_maps_into_itself(densemem.DenseMemory.from_array(x), x, rng) == 240


@pytest.mark.parametrize("data", ["random", "digits"])
def test_one_step_bound_beta_is_conservative(data: str, rng: np.random.Generator, digits_unit: np.ndarray) -> None:
    # Ramsauer et al. 2021: the one-step bound (derived) ||f(xi) - x_i|| <= 2 M (N-1)
    # exp(-beta (Delta_i - 2 M r)) for ||xi - x_i|| <= r, with the separation Delta_i defined
    # as in Ramsauer et al. 2021 (definition from memory); at beta_bound the exact one-step
    # error is within error_tol.
    x = unit_rows(rng, 80, 16) if data == "random" else np.ascontiguousarray(digits_unit[:200])
    radius = 0.02 if data == "random" else 1e-3
    mem = densemem.DenseMemory.from_array(x)
    pred = tu.predict_beta(mem, radius=radius, error_tol=0.01)
    rep = tu.separation(mem)
    finite = np.flatnonzero(np.isfinite(pred.beta_bound))
    assert finite.size > 0.9 * len(x)
    for i in finite[:80]:
        q = ball_queries(rng, x, i, int(rep.rival_rows[i]), radius)
        res = one_step(mem, q, pred.beta_bound[i])
        assert (np.linalg.norm(res.states.astype(np.float64) - x[i], axis=1) <= 0.01 + 1e-6).all()
    # The closed form puts the entry-7 bound exactly at error_tol.
    b, m = pred.beta_bound[finite], mem.max_norm
    bound = 2 * m * (len(x) - 1) * np.exp(-b * (rep.delta[finite] - 2 * m * radius))
    np.testing.assert_allclose(bound, 0.01, rtol=1e-9)
    # Where Delta_i <= 2 M r the bound proves nothing: inf.
    assert (np.isinf(pred.beta_bound) == (rep.delta <= 2 * mem.max_norm * radius)).all()


def test_target_beta_covers_the_fraction(rng: np.random.Generator) -> None:
    # Derived: the target beta is the smallest beta at or above which target_fraction of the
    # per-pattern betas lie (an order statistic), for both criteria.
    x = unit_rows(rng, 150, 8)
    mem = densemem.DenseMemory.from_array(x)
    for frac in (0.5, 0.9, 0.99, 1.0):
        pred = tu.predict_beta(mem, radius=0.01, target_fraction=frac)
        for per, tgt in ((pred.beta_separated, pred.beta_target_separated), (pred.beta_bound, pred.beta_target_bound)):
            assert np.mean(per <= tgt) >= frac
            assert np.mean(per < tgt) < frac
    assert pred.beta_target_separated == pred.beta_separated.max()


# ------------------------------------------------------- weights / sweep
def test_partial_moments_match_scipy_on_uneven_tiles(rng: np.random.Generator) -> None:
    # Reference: scipy.special.softmax and scipy.stats.entropy (Shannon entropy -sum p ln p);
    # participation ratio 1 / sum p^2 from the same scipy weights. Tiles of a few rows and
    # query chunks of 7 over 2 threads make every tile, merge and chunk boundary uneven.
    # With split_rows 1 the two threads split the stored rows and their moments are merged.
    x = rng.standard_normal((1003, 10)).astype(np.float32)
    q = rng.standard_normal((37, 10)).astype(np.float32)
    for beta, need_acc, split_rows in itertools.product((1e-9, 0.2, 3.0), (True, False), (4096, 1)):
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(exact_module, "SPLIT_ROWS", split_rows)
            part = exact_reduce(q, x, beta, k=3, tile_mib=0.002, n_threads=2, chunk=7, need_acc=need_acc,
                                moments=True)
        fin = P.finish(part)
        p = softmax(beta * (q.astype(np.float64) @ x.T.astype(np.float64)), axis=1)
        np.testing.assert_allclose(fin.entropy, scipy_entropy(p, axis=1), atol=2e-6)
        np.testing.assert_allclose(fin.participation, 1.0 / np.sum(p * p, axis=1), rtol=1e-5)
    plain = P.finish(exact_reduce(q, x, 3.0, k=3, tile_mib=0.002, n_threads=2, chunk=7))
    assert plain.entropy is None and plain.participation is None  # only when asked


def test_gathered_moments_match_scipy_with_missing_candidates(rng: np.random.Generator) -> None:
    # Reference: scipy.special.softmax / scipy.stats.entropy over each query's present
    # candidates; -inf marks a missing candidate and must weigh nothing.
    z = rng.standard_normal((6, 40)) * 4.0
    ids = np.tile(np.arange(40), (6, 1))
    z[:, 30:] = -np.inf
    ids[:, 30:] = -1
    fin = P.finish(P.gathered(z, None, ids, k=2, moments=True))
    p = softmax(z[:, :30].astype(np.float32).astype(np.float64), axis=1)
    np.testing.assert_allclose(fin.entropy, scipy_entropy(p, axis=1), atol=1e-9)
    np.testing.assert_allclose(fin.participation, 1.0 / np.sum(p * p, axis=1), rtol=1e-9)
    # Split the candidates in two disjoint halves: the merge rescales the moments exactly.
    a = P.gathered(z[:, :13], None, ids[:, :13], k=2, moments=True)
    b = P.gathered(z[:, 13:], None, ids[:, 13:], k=2, moments=True)
    both = P.finish(P.merge(a, b))
    np.testing.assert_allclose(both.entropy, fin.entropy, atol=1e-12)
    np.testing.assert_allclose(both.participation, fin.participation, rtol=1e-12)


def test_entropy_non_increasing_in_beta_and_ln_n_at_zero(rng: np.random.Generator) -> None:
    # Derived (textbook identity): dH/dbeta = -beta Var_p(s) <= 0 per query, H(0) = ln N.
    x = unit_rows(rng, 400, 16)
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.sweep_beta(mem, betas=np.geomspace(1e-8, 1e3, 40), n_queries=64, level=0.3)
    assert (np.diff(rep.entropy, axis=0) <= 1e-6).all()
    np.testing.assert_allclose(rep.entropy[0], np.log(400), atol=1e-6)
    assert (np.diff(rep.blend_size) <= 1e-6 * 400).all()
    assert rep.entropy[-1].max() < 0.1  # large beta: one item


def test_small_beta_gives_the_mean(rng: np.random.Generator) -> None:
    # Derived (Ramsauer et al. 2021): beta -> 0 returns the mean of the stored patterns exactly;
    # the nearest-pattern distance is then the numpy distance of the mean to its nearest row.
    x = unit_rows(rng, 100, 8) + np.float32(0.3)
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.sweep_beta(mem, betas=[1e-9], n_queries=20)
    mean = x.astype(np.float64).mean(axis=0)
    assert rep.fraction_global[0] == 1.0
    assert rep.nearest_distance[0] == pytest.approx(np.linalg.norm(x - mean, axis=1).min(), abs=1e-5)
    assert rep.participation[0] == pytest.approx(100, rel=1e-6)


def test_metastable_blends_are_exactly_the_planted_clusters(rng: np.random.Generator) -> None:
    # Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021 (abstract, published):
    # global average, metastable averages of subsets,
    # single-pattern states. Planted: 6 tight clusters of 4 around random unit centres.
    n_c, size, d = 6, 4, 32
    centres = unit_rows(rng, n_c, d)
    x = np.repeat(centres, size, axis=0) + 0.01 * rng.standard_normal((n_c * size, d)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    cluster = np.repeat(np.arange(n_c), size)
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.sweep_beta(mem, x, sources=np.arange(n_c * size), betas=[1e-4, 40.0, 1e6])
    assert rep.fraction_global.tolist()[0] == 1.0
    assert rep.fraction_metastable[1] == 1.0 and rep.fraction_single[2] == 1.0
    for qi in range(n_c * size):
        members = rep.members(1, qi, threshold=0.05)
        assert sorted(members.tolist()) == np.flatnonzero(cluster == cluster[qi]).tolist()
        assert rep.members(2, qi).tolist() == [qi]
    meta = tu.sweep_beta(mem, x, betas=[40.0]).participation[0]
    assert 3.9 < meta <= 4.0


def test_sweep_steps_use_the_last_update_weights(rng: np.random.Generator) -> None:
    # Reference: scipy entropy of softmax at the state one update before the last (the
    # weights that form the returned state).
    x = unit_rows(rng, 50, 8)
    mem = densemem.DenseMemory.from_array(x)
    q = x[:10] + 0.2 * rng.standard_normal((10, 8)).astype(np.float32)
    rep = tu.sweep_beta(mem, q, betas=[3.0], steps=2, tol=0.0)
    prev = mem.retrieve(q, 3.0, steps=1).states.astype(np.float64)
    p = softmax(3.0 * prev @ x.T.astype(np.float64), axis=1)
    np.testing.assert_allclose(rep.entropy[0], scipy_entropy(p, axis=1), atol=1e-5)


def test_corruption_models(rng: np.random.Generator) -> None:
    # Derived: Gaussian noise norm ~ level ||x|| (chi distribution, d = 400); mask zeroes a
    # `level` fraction (exactly round(0.25 * 400) = 100 per row); mix is the stated convex combination with the rival.
    x = unit_rows(rng, 30, 400) * np.float32(3.0)
    before = x.copy()
    rows = np.arange(30)
    g = corrupt(x[rows], "gaussian", 0.2, rng)
    assert np.linalg.norm(g - x, axis=1).mean() == pytest.approx(0.6, rel=0.03)
    mk = corrupt(x[rows], "mask", 0.25, rng)
    assert ((mk == 0).sum(axis=1) == 100).all() and ((mk == 0) | (mk == x)).all()
    rivals = np.roll(rows, 1)
    mx = corrupt(x[rows], "mix", 0.3, rng, rivals=x[rivals])
    np.testing.assert_allclose(mx, 0.7 * x + 0.3 * x[rivals], atol=1e-6)
    # The sweep's "mix" queries use the nearest rival found by the exact separation.
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.sweep_beta(mem, corruption="mix", level=0.45, betas=[1e4], n_queries=30)
    sep = tu.separation(mem)
    assert rep.accuracy[0] == 1.0  # level < 0.5: the source stays the larger part
    assert all(rep.top_ids[0, i, 1] == sep.rival_ids[s] for i, s in enumerate(rep.source_ids))
    assert (x == before).all()  # inputs are never modified


def test_sweep_does_not_modify_inputs(rng: np.random.Generator) -> None:
    x = unit_rows(rng, 40, 8)
    q = x[:5] * 2.0
    q_before = q.copy()
    mem = densemem.DenseMemory.from_array(x, normalize=True)
    rep = tu.sweep_beta(mem, q, sources=range(5), betas=[1.0, 100.0])
    assert (q == q_before).all()
    assert rep.accuracy[-1] == 1.0


# ---------------------------------------------------------- choose beta
def test_auto_sharp_beta_holds_on_held_out_digits(digits_unit: np.ndarray) -> None:
    # scikit-learn's bundled digits (UCI optdigits): beta chosen on one noisy query set (seed 0)
    # reaches
    # the sharpness target on a held-out one (seed 1): top-1 >= 99% and the sharp fraction
    # within 3 binomial standard errors of the 99% target.
    mem = densemem.DenseMemory.from_array(digits_unit)
    choice = tu.choose_beta(mem, level=0.1, n_queries=400, seed=0)
    assert choice.reached and choice.value >= 0.99
    held = tu.sweep_beta(mem, betas=[choice.beta], level=0.1, n_queries=600, seed=1)
    assert held.accuracy[0] >= 0.99
    assert held.sharp_fraction[0] >= 0.99 - 3 * math.sqrt(0.99 * 0.01 / 600)
    lower = tu.sweep_beta(mem, betas=[choice.beta / 2], level=0.1, n_queries=400, seed=0)
    assert lower.sharp_fraction[0] < 0.99  # and it is not far too large


def _queries(rng: np.random.Generator, x: np.ndarray, n: int, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    src = rng.integers(0, len(x), n)
    return (x[src] + sigma * rng.standard_normal((n, x.shape[1]))).astype(np.float32), src


def test_sharp_bisection_equals_dense_grid(rng: np.random.Generator) -> None:
    # In-test reference: the first point of a dense log grid meeting the goal, computed with
    # exact retrieval; bisection must land within one grid step of it.
    x = unit_rows(rng, 120, 16)
    mem = densemem.DenseMemory.from_array(x)
    q, src = _queries(rng, x, 200, 0.05)
    grid = np.geomspace(0.1, 1e4, 301)
    step = grid[1] / grid[0]
    sharp = []
    for b in grid:
        res = one_step(mem, q, b)
        sharp.append(np.mean((res.top_weights[:, 0] >= 0.95) & (res.top_ids[:, 0] == src)))
    first = grid[np.argmax(np.array(sharp) >= 0.9)]
    choice = tu.choose_beta(mem, q, sources=src, fraction=0.9, beta_min=0.1, beta_max=1e4, rtol=0.005)
    assert choice.reached and first / step <= choice.beta <= first * step
    assert choice.bracket[1] / choice.bracket[0] <= 1.005


def test_blend_bisection_equals_dense_grid(rng: np.random.Generator) -> None:
    # Reference: scipy softmax + entropy over a dense grid; mean exp(H) is non-increasing
    # (derived: dH/dbeta = -beta Var_p(s)), so the beta closest to the goal is within one grid step.
    x = unit_rows(rng, 150, 16)
    mem = densemem.DenseMemory.from_array(x)
    q, src = _queries(rng, x, 40, 0.3)
    s = q.astype(np.float64) @ x.T.astype(np.float64)
    grid = np.geomspace(0.1, 1e3, 401)
    size = np.array([np.exp(scipy_entropy(softmax(b * s, axis=1), axis=1)).mean() for b in grid])
    best = grid[np.argmin(np.abs(size - 5.0))]
    choice = tu.choose_beta(mem, q, target="blend", blend_size=5.0, beta_min=0.1, beta_max=1e3, rtol=0.005)
    step = grid[1] / grid[0]
    assert choice.reached and best / step <= choice.beta <= best * step
    assert choice.value == pytest.approx(5.0, rel=0.02)


def test_choose_beta_unreachable_and_already_met(rng: np.random.Generator) -> None:
    # Derived: with one step the top-1 item does not depend on beta, so a query set whose
    # top-1 is wrong for 20% of queries never reaches a 90% sharp fraction.
    x = unit_rows(rng, 20, 8)
    mem = densemem.DenseMemory.from_array(x)
    src = np.arange(20)
    src[:4] = (src[:4] + 1) % 20  # wrong sources for 4 queries
    out = tu.choose_beta(mem, x, sources=src, fraction=0.9)
    assert not out.reached and out.beta is None and "not met" in out.note
    met = tu.choose_beta(mem, x, sources=np.arange(20), fraction=0.5, beta_min=1e4, beta_max=1e5)
    assert met.reached and met.beta == 1e4
    too_small = tu.choose_beta(mem, x, target="blend", blend_size=19.9999, beta_min=1.0, beta_max=10.0)
    assert not too_small.reached and too_small.beta == 1.0


# ----------------------------------------------------- reports / output
def test_reports_are_json_and_tables(rng: np.random.Generator, tmp_path) -> None:
    # Common practice: strict JSON (no NaN / Infinity) round-trips.
    x = np.vstack([unit_rows(rng, 30, 8), unit_rows(rng, 1, 8)])
    x = np.vstack([x, x[-1:]])  # a duplicate: inf betas become null
    mem = densemem.DenseMemory.from_array(x)
    rep = tu.tune_beta(mem, tu.TuneSpec(n_betas=6, n_queries=20, target="blend"))
    text = json.dumps(rep.to_dict(), allow_nan=False)
    back = json.loads(text)
    assert back["prediction"]["beta_separated"][-1] is None
    assert back["sweep"]["accuracy"] == pytest.approx(rep.sweep.accuracy.tolist())
    table = tu.format_report(rep)
    for head in ("separation (exact", "predicted beta", "beta", "chosen beta (blend)"):
        assert head in table
    from densemem.tuning._reports import SWEEP_COLUMNS

    # header, one line per beta, a blank line, "legend" and one legend line per column
    assert len(tu.format_report(rep.sweep).splitlines()) == 1 + 6 + 2 + len(SWEEP_COLUMNS)
    assert table.splitlines()[0].startswith("verdict: for blends of about 5 items use beta = ")
    gen = tu.sweep_beta(mem, betas=[1.0], n_queries=4, seed=np.random.default_rng(3))
    json.dumps(gen.to_dict(), allow_nan=False)  # a Generator seed is recorded as text
    assert repr(rep.sweep).startswith("SweepReport(betas=array(shape=(6,))")
    png = tu.plot_sweep(rep.sweep, tmp_path / "sweep.png", chosen_beta=rep.choice.beta)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_tune_spec_validates() -> None:
    # pydantic validation at the boundary (common practice).
    with pytest.raises(ValidationError, match="level"):
        tu.TuneSpec(level=-1)
    with pytest.raises(ValidationError, match="extra"):
        tu.TuneSpec(beta_grid=[1.0])
    with pytest.raises(ValidationError, match="target"):
        tu.TuneSpec(target="soft")
    assert tu.TuneSpec.model_validate_json('{"n_betas": 3, "method": "exact"}').n_betas == 3


# ----------------------------------------------------------------- errors
@pytest.fixture
def small() -> densemem.DenseMemory:
    return densemem.DenseMemory.from_array(np.eye(4), normalize=True)


@pytest.mark.parametrize(
    ("call", "error", "match"),
    [
        (lambda m: tu.separation(np.eye(3)), InputTypeError, r"separation: `memory` must be a DenseMemory; got ndarray"),
        (lambda m: tu.separation(densemem.DenseMemory(3)), InputValueError, r"separation: the memory is empty"),
        (lambda m: tu.separation(densemem.DenseMemory.from_array(np.eye(1))), InputValueError,
         r"separation: needs at least 2 stored patterns; the memory holds 1"),
        (lambda m: tu.separation(m, index="flat"), InputValueError, r"`index` must be one of .*got 'flat'"),
        (lambda m: tu.separation(m, tol=-1.0), InputValueError, r"separation: `tol` must be a finite number >= 0"),
        (lambda m: tu.predict_beta(densemem.DenseMemory.from_array(np.zeros((3, 2)))), InputValueError,
         r"predict_beta: every stored pattern is zero"),
        (lambda m: tu.predict_beta(m, radius=-0.1), InputValueError, r"predict_beta: `radius` must be"),
        (lambda m: tu.predict_beta(m, error_tol=0.0), InputValueError, r"predict_beta: `error_tol` must be a finite number > 0"),
        (lambda m: tu.predict_beta(m, target_fraction=1.5), InputValueError, r"`target_fraction` must be a number in \(0, 1\]; got 1.5"),
        (lambda m: tu.predict_beta(m, separation_report=tu.separation(densemem.DenseMemory.from_array(np.eye(3)))),
         InputValueError, r"`separation_report` must be the SeparationReport of this memory \(4 patterns\)"),
        (lambda m: tu.sweep_beta(m, betas=[]), InputValueError, r"sweep_beta: `betas` must be a non-empty 1-D"),
        (lambda m: tu.sweep_beta(m, betas="fast"), InputValueError, r"`betas` must be a non-empty 1-D sequence"),
        (lambda m: tu.sweep_beta(m, betas=[1.0, -2.0]), InputValueError, r"every entry of `betas` must be a finite number > 0"),
        (lambda m: tu.sweep_beta(m, betas=[1.0, np.inf]), InputValueError, r"every entry of `betas`"),
        (lambda m: tu.sweep_beta(m, betas=[2.0, 1.0]), InputValueError, r"`betas` must be strictly increasing"),
        (lambda m: tu.sweep_beta(m, n_betas=0), InputValueError, r"`n_betas` must be an integer >= 1; got 0"),
        (lambda m: tu.sweep_beta(m, corruption="blur"), InputValueError, r"`corruption` must be one of gaussian, mask, mix; got 'blur'"),
        (lambda m: tu.sweep_beta(m, corruption="mask", level=1.0), InputValueError, r"`level` \(masked fraction\) must be in \[0, 1\)"),
        (lambda m: tu.sweep_beta(m, corruption="mix", level=1.5), InputValueError, r"`level` \(mixing weight\) must be in \[0, 1\]"),
        (lambda m: tu.sweep_beta(m, level=-0.1), InputValueError, r"`level` must be a finite number >= 0"),
        (lambda m: tu.sweep_beta(m, sources=[0]), InputValueError, r"`sources` is only used with `queries`"),
        (lambda m: tu.sweep_beta(m, np.eye(4), sources=[0, 1, 2, 9]), UnknownIdError, r"sweep_beta: `sources` names an id"),
        (lambda m: tu.sweep_beta(m, np.eye(4), sources=[0, 1]), InputValueError, r"`sources` must give one id per query \(4\); got 2"),
        (lambda m: tu.sweep_beta(m, np.zeros((2, 4))), InputValueError, r"sweep_beta: query row 0 has zero norm"),
        (lambda m: tu.sweep_beta(m, np.ones((2, 3))), InputValueError, r"sweep_beta: `queries` have 3 features"),
        (lambda m: tu.sweep_beta(m, [[np.nan] * 4]), InputValueError, r"sweep_beta: `queries` contains NaN at row 0"),
        (lambda m: tu.sweep_beta(m, method="fast"), InputValueError, r"`method` must be one of exact, certified, index, auto; got 'fast'"),
        (lambda m: tu.sweep_beta(m, steps=0), InputValueError, r"`steps` must be an integer >= 1; got 0"),
        (lambda m: tu.sweep_beta(m, k=9), InputValueError, r"`k` must be at most the number of stored patterns \(4\)"),
        (lambda m: tu.sweep_beta(m, single_pr=0.5), InputValueError, r"`single_pr` must be a number >= 1; got 0.5"),
        (lambda m: tu.sweep_beta(m, sharp_weight=0.0), InputValueError, r"`sharp_weight` must be a number in \(0, 1\]"),
        (lambda m: tu.choose_beta(m, target="soft"), InputValueError, r"choose_beta: `target` must be 'sharp' or 'blend'; got 'soft'"),
        (lambda m: tu.choose_beta(m, fraction=0.0), InputValueError, r"choose_beta: `fraction` must be a number in \(0, 1\]; got 0.0"),
        (lambda m: tu.choose_beta(m, target="blend", blend_size=7.0), InputValueError,
         r"`blend_size` must be in \[1, 4\] .*got 7.0"),
        (lambda m: tu.choose_beta(m, beta_min=10.0, beta_max=1.0), InputValueError, r"`beta_min` must be below `beta_max`"),
        (lambda m: tu.choose_beta(m, beta_min=-1.0), InputValueError, r"choose_beta: `beta_min` must be a finite number > 0"),
        (lambda m: tu.choose_beta(m, rtol=0.0), InputValueError, r"choose_beta: `rtol` must be a finite number > 0"),
        (lambda m: tu.tune_beta(m, {"n_betas": 3}), InputTypeError, r"tune_beta: `spec` must be a TuneSpec; got dict"),
        (lambda m: tu.format_report({"a": 1}), InputTypeError, r"format_report: `report` must be a densemem.tuning report"),
        (lambda m: tu.plot_sweep(tu.separation(m), "x.png"), InputTypeError, r"plot_sweep: `report` must be a SweepReport"),
        (lambda m: tu.plot_sweep(tu.sweep_beta(m, betas=[1.0]), "/no/such/folder/x.png"), InputValueError,
         r"plot_sweep: the folder of `path` does not exist"),
    ],
)
def test_errors(small: densemem.DenseMemory, call, error, match) -> None:
    with pytest.raises(error, match=match):
        call(small)


@pytest.mark.parametrize("bad", ["flat", "HNSW", ["ivf"], 3])
def test_separation_index_choice_error(small: densemem.DenseMemory, bad) -> None:
    # the `index` choice check of _tuning_theory.separation: the full message, any bad value
    want = r"^separation: `index` must be one of None, 'exact', 'hnsw', 'ivf'; got " + re.escape(repr(bad)) + r"\.$"
    with pytest.raises(InputValueError, match=want):
        tu.separation(small, index=bad)
    with pytest.raises(InputValueError, match=r"`index` must be one of None, 'exact', 'hnsw', 'ivf'"):
        tu.predict_beta(small, index=bad)  # forwarded to separation unchanged


def test_plot_without_matplotlib(small: densemem.DenseMemory, monkeypatch, tmp_path) -> None:
    rep = tu.sweep_beta(small, betas=[1.0])
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # import now fails
    with pytest.raises(MissingExtraError, match=r"pip install densemem\[plot\]"):
        tu.plot_sweep(rep, tmp_path / "x.png")
