"""Binomial confidence intervals and the doubling-then-bisection count search (private).

The search only needs an oracle ``evaluate(n) -> (n_success, n_total)``; everything about
memories lives in :mod:`densemem.capacity._models`. It assumes the success rate falls as
the count grows (true in expectation for every model here); the Monte Carlo estimate may
wiggle, and every evaluated count is kept so a caller can see it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

CI_METHODS = ("wilson", "clopper_pearson")
DECISIONS = ("estimate", "lower")


def wilson_interval(k: int, n: int, confidence: float) -> tuple[float, float]:
    """Wilson score interval for k successes out of n (Wilson, JASA 22 (1927)).

    Common practice: centre (p + z^2/2n) / (1 + z^2/n), half-width
    z sqrt(p(1-p)/n + z^2/4n^2) / (1 + z^2/n), z the two-sided normal quantile.
    """
    if n == 0:
        return 0.0, 1.0
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    p = k / n
    den = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    lo = 0.0 if k == 0 else max(0.0, centre - half)  # exact ends at k = 0 and k = n
    hi = 1.0 if k == n else min(1.0, centre + half)
    return lo, hi


def clopper_pearson_interval(k: int, n: int, confidence: float) -> tuple[float, float]:
    """Exact (Clopper-Pearson, Biometrika 26 (1934)) interval from beta quantiles."""
    if n == 0:
        return 0.0, 1.0
    a = 1.0 - confidence
    lo = 0.0 if k == 0 else float(stats.beta.ppf(a / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(stats.beta.ppf(1 - a / 2, k + 1, n - k))
    return lo, hi


def interval(k: int, n: int, confidence: float, method: str) -> tuple[float, float]:
    """Dispatch to the named interval (``"wilson"`` or ``"clopper_pearson"``)."""
    if method == "wilson":
        return wilson_interval(k, n, confidence)
    return clopper_pearson_interval(k, n, confidence)


@dataclass
class SearchTrace:
    """Every count evaluated, in evaluation order, and the bracket found."""

    counts: list[int] = field(default_factory=list)
    successes: list[int] = field(default_factory=list)
    totals: list[int] = field(default_factory=list)
    passed: list[bool] = field(default_factory=list)
    capacity: int = 0  # largest count that passed (0: none did)
    first_fail: int | None = None  # smallest failing count above `capacity` (None: capped)


def search_capacity(
    evaluate: Callable[[int], tuple[int, int]],
    *,
    target: float,
    max_n: int,
    confidence: float,
    ci: str,
    decide: str,
    rel_tol: float,
    on_step: Callable[[int, bool], None] | None = None,
) -> SearchTrace:
    """Largest n in 1..max_n with a passing success rate, by doubling then bisection.

    A count passes when its rate (``decide="estimate"``) or the lower end of its confidence
    interval (``decide="lower"``) is >= `target`. Doubling 1, 2, 4, ... stops at the first
    failure or at `max_n`; bisection then narrows [last pass, first fail] until the gap is
    at most max(1, rel_tol * last pass). With ``rel_tol=0`` the answer is exact on the
    integer grid for a monotone success curve.
    """
    trace = SearchTrace()

    def passes(n: int) -> bool:
        k, total = evaluate(n)
        if decide == "estimate":
            ok = total > 0 and k / total >= target
        else:
            ok = interval(k, total, confidence, ci)[0] >= target
        trace.counts.append(n)
        trace.successes.append(int(k))
        trace.totals.append(int(total))
        trace.passed.append(bool(ok))
        if on_step is not None:
            on_step(n, ok)
        return ok

    lo, hi, n = 0, None, 1
    while True:
        if not passes(n):
            hi = n
            break
        lo = n
        if n >= max_n:
            break
        n = min(2 * n, max_n)
    while hi is not None and hi - lo > max(1, int(rel_tol * lo)):
        mid = (lo + hi) // 2
        if passes(mid):
            lo = mid
        else:
            hi = mid
    trace.capacity, trace.first_fail = lo, hi
    return trace
