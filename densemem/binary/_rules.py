"""Storage rules, 0/1 <-> +-1 conversion and damage for pairwise binary memories (private).

Everything here works on the +-1 form: patterns are (n_patterns, n_units) arrays of -1/+1,
weights W are symmetric (n_units, n_units) float64, thresholds theta are (n_units,) float64
and the local field of state s is h = W s - theta.
"""

from __future__ import annotations

import numpy as np

RULES = ("hebbian", "storkey", "pseudo_inverse")


def hebbian_counts(patterns: np.ndarray) -> np.ndarray:
    """Integer-valued outer-product sum C = sum_mu xi_mu xi_mu^T with zero diagonal.

    Kept separately from W = C / n_units so incremental adds are bit-identical to storing
    everything at once (float64 holds these integers exactly).
    """
    x = patterns.astype(np.float64)
    counts = x.T @ x
    np.fill_diagonal(counts, 0.0)
    return counts


def storkey_weights(patterns: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Apply Storkey's rule for each pattern in order, starting from `weights` (not modified).

    w_ij += (e_i e_j - e_i h_ji - h_ij e_j) / n with h_ij = sum_{k != i, j} w_ik e_k
    (Storkey 1997). With a zero diagonal h_ij = (W e)_i - w_ij e_j. The two cross terms are
    added before subtracting, so W stays exactly symmetric in floating point; the diagonal
    is kept at zero.
    """
    w = weights.copy()
    n = w.shape[0]
    for e in patterns.astype(np.float64):
        g = w @ e
        h = g[:, None] - w * e[None, :]  # h[i, j] = h_ij
        cross = h * e[None, :]  # h_ij e_j; its transpose is e_i h_ji
        w += (np.outer(e, e) - (cross + cross.T)) / n  # (a + b) == (b + a): exactly symmetric
        np.fill_diagonal(w, 0.0)
    return w


def pseudo_inverse_weights(patterns: np.ndarray) -> np.ndarray:
    """Projection onto the span of the patterns: W = Xi^T (Xi Xi^T)^+ Xi.

    Computed from the SVD of Xi (rank from the usual tolerance), so linearly dependent
    patterns are handled; the result is symmetrised exactly. The diagonal is kept (w_ii >= 0).
    """
    x = patterns.astype(np.float64)
    _, sing, vt = np.linalg.svd(x, full_matrices=False)
    tol = sing.max() * max(x.shape) * np.finfo(np.float64).eps
    v = vt[sing > tol]
    w = v.T @ v
    return (w + w.T) / 2.0


def from_01(t_weights: np.ndarray, u_thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """0/1 network (T, U) -> the +-1 network (W, theta) with the same dynamics.

    Derived 0/1 <-> +-1 map: W = T / 4, theta = U / 2 - T 1 / 4 (with s = 2 v - 1).
    """
    return t_weights / 4.0, u_thresholds / 2.0 - t_weights.sum(axis=1) / 4.0


def to_01(weights: np.ndarray, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """+-1 network (W, theta) -> 0/1 network T = 4 W, U = 2 theta + 2 W 1 (derived)."""
    return 4.0 * weights, 2.0 * theta + 2.0 * weights.sum(axis=1)


def energy_offset_01(weights: np.ndarray, theta: np.ndarray) -> float:
    """Constant c with E_01(v) = E_pm1(2 v - 1) + c, for symmetric W.

    Derived by substituting s = 2 v - 1 into E = -s.W s / 2 + theta.s: c = 1.W 1 / 2 + theta.1.
    """
    return float(weights.sum() / 2.0 + theta.sum())


def damage(
    weights: np.ndarray,
    theta: np.ndarray,
    *,
    unit_fraction: float,
    unit_mode: str,
    weight_fraction: float,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return damaged copies (weights, theta) and the boolean mask of damaged units.

    A fraction of the off-diagonal pairs (i < j) is zeroed in both W_ij and W_ji, so W stays
    symmetric. Then round(unit_fraction * n) units are chosen: "clamp" holds them at the
    probe's value (they still drive the others); "delete" also zeroes their rows, columns and
    thresholds, so they have no influence at all.
    """
    w, th = weights.copy(), theta.copy()
    n = w.shape[0]
    iu, ju = np.triu_indices(n, k=1)
    n_cut = round(weight_fraction * iu.size)
    if n_cut:
        pick = rng.choice(iu.size, size=n_cut, replace=False)
        w[iu[pick], ju[pick]] = 0.0
        w[ju[pick], iu[pick]] = 0.0
    hit = np.zeros(n, dtype=bool)
    n_units = round(unit_fraction * n)
    if n_units:
        hit[rng.choice(n, size=n_units, replace=False)] = True
    if unit_mode == "delete":
        w[hit, :] = 0.0
        w[:, hit] = 0.0
        th[hit] = 0.0
    return w, th, hit
