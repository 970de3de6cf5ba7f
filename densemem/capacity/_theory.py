"""Published asymptotic capacities and exact finite-size predictions (private).

Every curve carries its source; "from memory" marks the formulas CHECKS.md lists as recalled
rather than re-read. Values are numbers of patterns at n units / dimensions; the exponential
ones are computed in log space (``log_capacity``) so they never overflow.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import stats


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
    """The asymptotic curves CHECKS.md entries 19-24 give for a model kind."""
    ln = np.log
    if model_kind == "hebbian":
        return [
            # CHECKS.md 19: Amit, Gutfreund & Sompolinsky (1987), alpha_c = 0.138 (derived value)
            Curve("ags", "0.138 N: Amit-Gutfreund-Sompolinsky 1987, asymptotic (overlap retrieval)",
                  lambda n: ln(0.137906 * n)),
            # CHECKS.md 20: McEliece, Posner, Rodemich & Venkatesh (1987), published abstract
            Curve("mceliece_most", "N/(2 ln N): McEliece et al. 1987, most patterns fixed, asymptotic",
                  lambda n: ln(n / (2 * ln(n)))),
            Curve("mceliece_all", "N/(4 ln N): McEliece et al. 1987, every pattern fixed, asymptotic",
                  lambda n: ln(n / (4 * ln(n)))),
        ]
    if model_kind == "storkey":
        # CHECKS.md 21: Storkey (1997), capacity n/sqrt(2 ln n) -- from memory
        return [Curve("storkey", "N/sqrt(2 ln N): Storkey 1997, asymptotic (from memory)",
                      lambda n: ln(n / np.sqrt(2 * ln(n))))]
    if model_kind == "pseudo_inverse":
        # CHECKS.md 22: Kanter & Sompolinsky (1987), published abstract: alpha = 1
        return [Curve("pseudo_inverse", "N: Kanter-Sompolinsky 1987 (pseudo-inverse), asymptotic",
                      lambda n: ln(np.asarray(n, dtype=float)))]
    if model_kind == "poly":
        deg = int(param)  # type: ignore[arg-type]
        c = 2.0 * _double_factorial(2 * deg - 3)
        # CHECKS.md 23: Krotov & Hopfield (2016), N^(n-1) / (2 (2n-3)!! ln N) -- from memory
        return [Curve("krotov_hopfield", f"N^{deg - 1}/(2 ({2 * deg - 3})!! ln N): Krotov-Hopfield "
                      "2016, asymptotic (from memory)",
                      lambda n: (deg - 1) * ln(n) - ln(c * ln(n)))]
    if model_kind == "exp":
        # CHECKS.md 24: Demircigil et al. (2017): exp(alpha N), alpha < ln(2)/2 for stability,
        # alpha < I(1 - 2 rho)/2 for one-step retrieval from rho N flips -- both from memory
        out = [Curve("demircigil", "exp(N ln2/2): Demircigil et al. 2017, stable patterns, "
                     "asymptotic (from memory)", lambda n: np.asarray(n, float) * np.log(2) / 2)]
        if flip:
            a = info_rate(1 - 2 * flip) / 2
            out.append(Curve("demircigil_flip", f"exp(N I(1-2rho)/2), rho={flip:g}: Demircigil et "
                             "al. 2017, asymptotic (from memory)",
                             lambda n: np.asarray(n, float) * a))
        return out
    return []


def hebbian_fixed_point_capacity(n: int, delta: float) -> int:
    """Largest p with P(a stored pattern is a fixed point) >= 1 - delta, Hebbian, n units.

    Derived from CHECKS.md 18: one bit flips with probability
    P = P(Binomial(K, 1/2) < (K - n + 1)/2), K = (p-1)(n-1); the pattern is taken as fixed
    when none of its n bits flips, with the bits treated as independent: (1 - P)^n.
    """
    p = 1
    while (1.0 - hebbian_flip_probability(n, p + 1)) ** n >= 1.0 - delta:
        p += 1
    return p


def hebbian_flip_probability(n: int, p: int) -> float:
    """Exact one-step flip probability of one bit of a stored pattern (CHECKS.md 18, derived).

    Hebbian W = (1/n) sum xi xi^T, zero diagonal, p patterns, start at a stored pattern:
    P = P(Binomial(K, 1/2) < (K - n + 1)/2) with K = (p - 1)(n - 1); a tie keeps the state.
    """
    k = (p - 1) * (n - 1)
    return float(stats.binom.cdf(np.ceil((k - n + 1) / 2.0) - 1, k, 0.5))


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
