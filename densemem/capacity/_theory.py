"""Published asymptotic capacities and exact finite-size predictions (private).

Every curve carries its source; "from memory" marks the formulas recalled rather than
re-read in the source (the project's docs/references.md lists them all). Values are numbers of patterns at n units / dimensions; the exponential
ones are computed in log space (``log_capacity``) so they never overflow.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import optimize, special, stats


@dataclass(frozen=True)
class Curve:
    """One published capacity curve: log(number of patterns) as a function of n."""

    key: str
    label: str
    log_capacity: Callable[[np.ndarray], np.ndarray]


def _double_factorial(k: int) -> int:
    out = 1
    for j in range(k, 0, -2):
        out *= j
    return out


def info_rate(x: float) -> float:
    """I(x) = ((1+x) ln(1+x) + (1-x) ln(1-x)) / 2 (Demircigil et al. 2017; from memory)."""
    t = 0.0 if x >= 1 else (1 - x) * np.log1p(-x)
    return float(((1 + x) * np.log1p(x) + t) / 2.0)


def curves_for(model_kind: str, param: float | None, flip: float | None) -> list[Curve]:
    """The published asymptotic curves for a model kind (sources in the comments)."""
    ln = np.log
    if model_kind == "hebbian":
        return [
            # Amit, Gutfreund & Sompolinsky, Ann. Phys. 173 (1987): alpha_c from their replica-
            # symmetric equations (solved by ags_alpha_c below)
            Curve("ags", "0.138 N: Amit-Gutfreund-Sompolinsky 1987, asymptotic (overlap retrieval)",
                  lambda n: ln(ags_alpha_c()[0] * n)),
            # McEliece, Posner, Rodemich & Venkatesh, IEEE Trans. Inf. Theory 33(4) (1987), abstract
            Curve("mceliece_most", "N/(2 ln N): McEliece et al. 1987, most patterns fixed, asymptotic",
                  lambda n: ln(n / (2 * ln(n)))),
            Curve("mceliece_all", "N/(4 ln N): McEliece et al. 1987, every pattern fixed, asymptotic",
                  lambda n: ln(n / (4 * ln(n)))),
        ]
    if model_kind == "storkey":
        # Storkey, ICANN 1997: capacity n/sqrt(2 ln n) -- from memory
        return [Curve("storkey", "N/sqrt(2 ln N): Storkey 1997, asymptotic (from memory)",
                      lambda n: ln(n / np.sqrt(2 * ln(n))))]
    if model_kind == "pseudo_inverse":
        # Kanter & Sompolinsky, Phys. Rev. A 35 (1987), abstract: alpha = 1
        return [Curve("pseudo_inverse", "N: Kanter-Sompolinsky 1987 (pseudo-inverse), asymptotic",
                      lambda n: ln(np.asarray(n, dtype=float)))]
    if model_kind == "poly":
        deg = int(param)  # type: ignore[arg-type]
        c = 2.0 * _double_factorial(2 * deg - 3)
        # Krotov & Hopfield, NeurIPS 2016: N^(n-1) / (2 (2n-3)!! ln N) -- from memory
        return [Curve("krotov_hopfield", f"N^{deg - 1}/(2 ({2 * deg - 3})!! ln N): Krotov-Hopfield "
                      "2016, asymptotic (from memory)",
                      lambda n: (deg - 1) * ln(n) - ln(c * ln(n)))]
    if model_kind == "exp":
        # Demircigil et al., J. Stat. Phys. 168 (2017): exp(alpha N), alpha < ln(2)/2 for stability,
        # alpha < I(1 - 2 rho)/2 for one-step retrieval from rho N flips -- both from memory
        out = [Curve("demircigil", "exp(N ln2/2): Demircigil et al. 2017, all patterns stable, "
                     "asymptotic (from memory)", lambda n: np.asarray(n, float) * np.log(2) / 2)]
        if flip:
            a = info_rate(1 - 2 * flip) / 2
            out.append(Curve("demircigil_flip", f"exp(N I(1-2rho)/2), rho={flip:g}: Demircigil et "
                             "al. 2017, all patterns retrieved, asymptotic (from memory)",
                             lambda n: np.asarray(n, float) * a))
        return out
    return []


def hebbian_fixed_point_capacity(n: int, delta: float) -> int:
    """Largest p with P(a stored pattern is a fixed point) >= 1 - delta, Hebbian, n units.

    Derived from the exact one-step flip probability (hebbian_flip_probability): one bit flips with probability
    P = P(Binomial(K, 1/2) < (K - n + 1)/2), K = (p-1)(n-1); the pattern is taken as fixed
    when none of its n bits flips, with the bits treated as independent: (1 - P)^n.
    """
    p = 1
    while (1.0 - hebbian_flip_probability(n, p + 1)) ** n >= 1.0 - delta:
        p += 1
    return p


def hebbian_all_fixed_capacity(n: int, delta: float) -> int:
    """Largest p with P(every stored pattern is a fixed point) >= 1 - delta, Hebbian, n units.

    The set-wide counterpart of :func:`hebbian_fixed_point_capacity` (the criterion of
    McEliece et al.'s "every memory" limit n/(4 ln n)): all n p bits must stay, each flipping
    with the exact one-step probability, treated as independent: (1 - P)^(n p).
    """
    p = 1
    while (1.0 - hebbian_flip_probability(n, p + 1)) ** (n * (p + 1)) >= 1.0 - delta:
        p += 1
    return p


def hebbian_flip_probability(n: int, p: int) -> float:
    """Exact one-step flip probability of one bit of a stored pattern (derived, finite n).

    Hebbian W = (1/n) sum xi xi^T, zero diagonal, p patterns, start at a stored pattern:
    P = P(Binomial(K, 1/2) < (K - n + 1)/2) with K = (p - 1)(n - 1); a tie keeps the state.
    """
    k = (p - 1) * (n - 1)
    return float(stats.binom.cdf(np.ceil((k - n + 1) / 2.0) - 1, k, 0.5))


def hebbian_one_step_error_large_n(alpha: float) -> float:
    """Large-n one-step error of the Hebbian memory at load alpha = p/n (Gaussian crosstalk).

    ``P_error = erfc(sqrt(1 / (2 alpha))) / 2``: Hertz, Krogh & Palmer, *Introduction to
    the Theory of Neural Computation* (1991), ch. 2, the formula behind their one-step error
    table (from memory). At finite n the exact value is :func:`hebbian_flip_probability`.
    """
    return float(special.erfc(np.sqrt(1.0 / (2.0 * alpha))) / 2.0)


def hebbian_load_for_error(p_error: float) -> float:
    """Load alpha = p/n at which the large-n one-step error equals `p_error` (inverse of
    :func:`hebbian_one_step_error_large_n`): ``alpha = 1 / (2 erfcinv(2 P_error)^2)``."""
    return float(1.0 / (2.0 * special.erfcinv(2.0 * p_error) ** 2))


# ------------------------------------------ replica-symmetric retrieval (Hebbian, T = 0)
def _ags_alpha_of_y(y: float) -> float:
    """alpha at which y = m / sqrt(2 alpha r) solves the zero-temperature equations."""
    return float((special.erf(y) / y - 2.0 / np.sqrt(np.pi) * np.exp(-y * y)) ** 2 / 2.0)


@lru_cache(maxsize=1)
def ags_alpha_c() -> tuple[float, float]:
    """Critical load and overlap of the Hebbian retrieval state, (alpha_c, m_c).

    Amit, Gutfreund & Sompolinsky, "Statistical mechanics of neural networks near
    saturation", Ann. Phys. 173 (1987): at zero temperature the replica-symmetric equations
    are ``m = erf(m / sqrt(2 alpha r))``, ``r = 1 / (1 - C)^2``,
    ``C = sqrt(2 / (pi alpha r)) exp(-m^2 / (2 alpha r))``. With ``y = m / sqrt(2 alpha r)``
    they reduce to ``sqrt(2 alpha) y = erf(y) - (2 / sqrt(pi)) y exp(-y^2)``, so the
    retrieval solution exists while ``alpha <= max_y alpha(y)``,
    ``alpha(y) = (erf(y) / y - (2 / sqrt(pi)) exp(-y^2))^2 / 2``. The maximum is found
    numerically (bounded scalar minimisation to 1e-12 in y, once; the result is cached):
    alpha_c ~ 0.1379, m_c = erf(y_c).
    """
    res = optimize.minimize_scalar(lambda y: -_ags_alpha_of_y(y), bounds=(0.5, 4.0),
                                   method="bounded", options={"xatol": 1e-12})
    return -float(res.fun), float(special.erf(res.x))


def ags_retrieval_error(alpha: float) -> float:
    """Wrong-bit fraction (1 - m) / 2 of the Hebbian retrieval state at load `alpha`.

    The retrieval branch of the replica-symmetric equations of :func:`ags_alpha_c` (the
    larger root y of ``alpha(y) = alpha``, found by ``scipy.optimize.brentq``); then
    ``m = erf(y)`` and ``(1 - m) / 2 = erfc(y) / 2``. This is the fixed point reached by
    asynchronous dynamics started at a stored pattern, for large n; it is not the one-step
    error. Raises ValueError above alpha_c, where the branch does not exist.
    """
    a_c, m_c = ags_alpha_c()
    if not 0 < alpha <= a_c:
        raise ValueError(f"ags_retrieval_error: alpha must be in (0, {a_c:.6f}]; got {alpha!r}.")
    y_c = float(special.erfinv(m_c))
    if alpha == a_c:
        return float(special.erfc(y_c) / 2.0)
    hi = y_c
    while _ags_alpha_of_y(hi) > alpha:  # alpha(y) -> 0 as y grows: bracket the root
        hi *= 2.0
    y = optimize.brentq(lambda v: _ags_alpha_of_y(v) - alpha, y_c, hi, xtol=1e-14, rtol=1e-14)
    return float(special.erfc(y) / 2.0)


def top1_capacity_pm1(dim: int, kind: str, level: float, delta: float) -> int:
    """Largest K with P(top-1 correct) >= 1 - delta for random +-1 patterns (derived).

    With m = round(level * dim) coordinates flipped (or zeroed, ``kind="mask"``) the probe's
    inner product with its own pattern is dim - 2m (or dim - m); another random pattern
    ties or beats it with probability q = P(Binomial(dim, 1/2) >= dim - m) (mask:
    2^-(dim - m)), independently for each of the K - 1 others, so success = (1 - q)^(K - 1).
    """
    m = int(round(level * dim))
    q = float(stats.binom.sf(dim - m - 1, dim, 0.5)) if kind == "flip" else 2.0 ** -(dim - m)
    if q <= 0:
        return np.iinfo(np.int64).max
    return 1 + int(np.floor(np.log1p(-delta) / np.log1p(-q)))
