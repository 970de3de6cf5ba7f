"""The log-sum-exp energy from a pass's ``lse``, exact down to the smallest beta.

The energy of a state ``xi`` over stored rows ``X`` (N rows, largest norm M) is::

    E(xi) = -(lse(beta, X xi) - log N) / beta + xi.xi / 2 + M^2 / 2

With ``lse`` near ``log N`` (small ``beta`` times the score spread) the first
term is a difference of two nearly equal numbers divided by a tiny ``beta``:
in float64 it loses every digit (at beta = 1e-16 it is off by about 0.2, below
1e-20 it is pure noise, at 5e-324 it is NaN). Writing the scores as
``s = mu + c`` with ``mu`` their mean::

    (lse - log N) / beta = mu + log(mean(exp(beta c))) / beta
                         = mu + log1p(mean(expm1(beta c))) / beta           (I)
                         = mu + k1 + beta k2/2 + beta^2 k3/6 + beta^3 k4/24 + ...   (II)

(II) is the cumulant expansion of the log of the mean of exponentials
(k1..k4: cumulants of ``c``; e.g. Kendall & Stuart, *The Advanced Theory of
Statistics* vol. 1, the cumulant generating function; common practice). Rows
whose ``beta * spread`` (``spread = 2 M |xi|`` bounds the score range) is at most
1 use (I), which is exact in float64 there (``expm1``/``log1p`` keep the
relative precision of small arguments); below ``1e-3`` they use (II), whose
first omitted term is below ``(beta * spread)^4 / 120`` of the spread
(< 1e-14 relative) and which needs no ``exp`` at all (so it holds at
``beta = 5e-324``). Both take the scores in float64 from the stored rows.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

import numpy as np

__all__ = ["lse_energy", "EXACT_SPREAD", "SERIES_SPREAD"]

EXACT_SPREAD = 1.0  # beta * spread at or below this: the float64 form (I)
SERIES_SPREAD = 1e-3  # beta * spread at or below this: the series (II)


def lse_energy(
    lse: np.ndarray,
    states: np.ndarray,
    beta: float,
    *,
    n: int,
    max_norm: float,
    row_blocks: Callable[[], Iterable[np.ndarray]],
) -> np.ndarray:
    """Energy of ``states`` (float64, one per state) from the pass's ``lse`` values.

    ``row_blocks()`` yields the stored rows in blocks (any split; called at most
    twice and only when some state has ``beta * spread <= EXACT_SPREAD``).

    Examples
    --------
    >>> import numpy as np
    >>> from densemem.core.lse import lse_energy
    >>> x = np.eye(2, dtype=np.float32)
    >>> e = lse_energy(np.array([np.log(2.0)]), np.array([[0.0, 0.0]]), 1e-300, n=2, max_norm=1.0,
    ...                row_blocks=lambda: [x])
    >>> float(e[0])
    0.5
    """
    s64 = np.asarray(states, dtype=np.float64)
    sq = np.einsum("ij,ij->i", s64, s64)
    m = float(max_norm)
    lse64 = np.asarray(lse, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        gap = (lse64 - np.log(n)) / beta
        spread = 2.0 * m * np.sqrt(sq)
        small = beta * spread <= EXACT_SPREAD
    if small.any():
        gap = gap.copy()
        gap[small] = _small_beta_gap(s64[small], beta, n, row_blocks)
    return -gap + 0.5 * sq + 0.5 * m * m


def _small_beta_gap(s: np.ndarray, beta: float, n: int, row_blocks: Callable[[], Iterable[np.ndarray]]) -> np.ndarray:
    """(lse - log N) / beta for states with beta * spread <= EXACT_SPREAD, by (I) or (II)."""
    col_sum = np.zeros(s.shape[1])
    for block in row_blocks():
        col_sum += np.asarray(block, dtype=np.float64).sum(axis=0)
    mu = s @ (col_sum / n)  # mean score of each state
    spread_ok = np.zeros(s.shape[0])
    m1 = np.zeros(s.shape[0])
    m2 = np.zeros(s.shape[0])
    m3 = np.zeros(s.shape[0])
    m4 = np.zeros(s.shape[0])
    e1 = np.zeros(s.shape[0])
    for block in row_blocks():
        c = np.asarray(block, dtype=np.float64) @ s.T - mu  # (rows, states), centred scores
        spread_ok = np.maximum(spread_ok, np.abs(c).max(axis=0)) if c.size else spread_ok
        c2 = c * c
        m1 += c.sum(axis=0)
        m2 += c2.sum(axis=0)
        m3 += (c2 * c).sum(axis=0)
        m4 += (c2 * c2).sum(axis=0)
        e1 += np.expm1(beta * c).sum(axis=0)
    m1, m2, m3, m4, e1 = m1 / n, m2 / n, m3 / n, m4 / n, e1 / n
    k2 = m2 - m1 * m1
    k3 = m3 - 3 * m1 * m2 + 2 * m1**3
    k4 = m4 - 4 * m1 * m3 - 3 * m2 * m2 + 12 * m1 * m1 * m2 - 6 * m1**4
    series = mu + m1 + beta * k2 / 2 + beta**2 * k3 / 6 + beta**3 * k4 / 24
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = mu + np.log1p(e1) / beta
    use_series = beta * 2 * spread_ok <= SERIES_SPREAD
    return np.where(use_series, series, direct)
