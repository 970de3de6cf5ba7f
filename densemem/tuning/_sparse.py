"""The beta of exact single-item recall under a sparse map (sparsemax, alpha-entmax).

With ``p = alpha-entmax(beta X xi)``, a stored pattern ``x_i`` used as the query is
returned exactly (weight 1 on row i, the state equal to ``x_i``) in one step when

    beta * Delta_i >= 1 / (alpha - 1),   Delta_i = x_i.x_i - max_{j != i} x_i.x_j

(the Fenchel-Young margin of the alpha-Tsallis loss: Blondel, Martins & Niculae,
"Learning with Fenchel-Young Losses", JMLR 2020, Prop. 7; used for sparse Hopfield
retrieval by Santos, Niculae, McNamee & Martins, ICML 2024, Prop. 3). So
``beta_i = 1 / ((alpha - 1) Delta_i)`` per pattern, and the beta that makes a fraction
of the patterns exactly retrievable is that quantile of the ``beta_i``.
:func:`exact_recall_beta` reports it, checks it by retrieving the patterns, and gives
the support size over a few betas around it: the dial between one item (support 1)
and a blend.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ._reports import SeparationReport, _Report
from ._theory import _check_memory, _target_beta, separation
from .._validation import check_positive_fraction
from ..dense import DenseMemory
from ..errors import InputValueError
from ..options import check_weighting

__all__ = ["ExactRecallReport", "exact_recall_beta"]

SAFETY = 1e-4  # the reported beta sits this far (relative) above the margin, for float32 scores
DIAL = (0.125, 0.25, 0.5, 1.0, 2.0)  # multiples of the reported beta for the support-size dial
CHECK_MAX = 4096  # stored patterns retrieved to check the reported beta


@dataclass(frozen=True, slots=True, repr=False)
class ExactRecallReport(_Report):
    """What :func:`exact_recall_beta` found.

    Attributes
    ----------
    ids : ndarray of shape (n_patterns,)
    weighting : str
    alpha : float
    beta_exact : ndarray of shape (n_patterns,)
        ``1 / ((alpha - 1) Delta_i)``: from this beta on, pattern i is returned
        exactly (inf where ``Delta_i <= tol``: a duplicate or a longer rival).
    fraction : float
        The fraction of patterns asked to be exactly retrievable.
    beta : float
        The ``fraction`` quantile of ``beta_exact``, times ``1 + 1e-4`` (inf
        when unreachable).
    fraction_exact : float or None
        Measured at ``beta``: share of the checked stored patterns returned
        exactly (support 1 and the state equal to the stored row). None when
        ``beta`` is inf.
    n_checked : int
        Stored patterns retrieved for that check (all, or an even sample).
    dial_betas : ndarray
        Betas around ``beta`` (1/8, 1/4, 1/2, 1 and 2 times it).
    dial_support : ndarray
        Mean support size of the queries (the given ones, else the checked
        patterns) at each dial beta: 1 is one item, more is a blend.
    """

    ids: np.ndarray
    weighting: str
    alpha: float
    beta_exact: np.ndarray
    fraction: float
    beta: float
    fraction_exact: float | None
    n_checked: int
    dial_betas: np.ndarray
    dial_support: np.ndarray


def exact_recall_beta(
    memory: DenseMemory,
    *,
    weighting: str = "sparsemax",
    alpha: float | None = None,
    fraction: float = 1.0,
    queries: Any = None,
    separation_report: SeparationReport | None = None,
) -> ExactRecallReport:
    """The beta from which (a fraction of) the stored patterns are retrieved exactly by a sparse map.

    Parameters
    ----------
    memory : DenseMemory
        At least 2 stored patterns.
    weighting : {"sparsemax", "entmax15", "entmax"}, default "sparsemax"
    alpha : float, optional
        With ``weighting="entmax"``: alpha in (1, 2].
    fraction : float, default 1.0
        Fraction of stored patterns that must be exactly retrievable, in (0, 1].
    queries : array-like, optional
        Queries for the support-size dial (default: the checked stored patterns).
    separation_report : SeparationReport, optional
        Reuse a :func:`densemem.tuning.separation` result.

    Returns
    -------
    ExactRecallReport

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array([[1.0, 0.0], [0.8, 0.6], [0.0, 1.0]])
    >>> rep = t.exact_recall_beta(mem)
    >>> round(rep.beta, 2), rep.fraction_exact
    (5.0, 1.0)
    """
    where = "exact_recall_beta"
    memory = _check_memory(memory, where, minimum=2)
    name, a = check_weighting(weighting, alpha, where=where)
    if name == "softmax" or a is None:
        raise InputValueError(f"{where}: `weighting` must be a sparse map ('sparsemax', 'entmax15' or 'entmax'); "
                              "softmax never returns a stored pattern exactly.")
    fraction = check_positive_fraction(fraction, name="fraction", where=where)
    sep = separation(memory) if separation_report is None else separation_report
    n = len(memory)
    if not isinstance(sep, SeparationReport) or len(sep.delta) != n:
        raise InputValueError(f"{where}: `separation_report` must be the SeparationReport of this memory "
                              f"({n} patterns).")
    with np.errstate(divide="ignore"):
        b_i = np.where(sep.delta > sep.tol, 1.0 / ((a - 1.0) * np.where(sep.delta > sep.tol, sep.delta, 1.0)), np.inf)
    beta = _target_beta(b_i, fraction) * (1.0 + SAFETY)
    rows = np.linspace(0, n - 1, min(n, CHECK_MAX)).round().astype(np.int64)
    x = memory.patterns[rows]
    kw: dict[str, Any] = {"weighting": name, "alpha": a if name == "entmax" else None}
    frac_exact = None
    if np.isfinite(beta):
        res = memory.retrieve(x, beta, k=1, return_energy=False, **kw)
        hit = (res.support_size == 1) & np.all(res.states == x, axis=1)
        frac_exact = float(np.mean(hit))
    q = x if queries is None else queries
    base = beta if np.isfinite(beta) else 1.0 / ((a - 1.0) * max(float(np.median(sep.delta)), 1e-12))
    dial = np.array([base * f for f in DIAL])
    support = np.array([float(np.mean(memory.retrieve(q, b, k=1, return_energy=False, **kw).support_size))
                        for b in dial])
    return ExactRecallReport(
        ids=sep.ids, weighting=name, alpha=a, beta_exact=b_i, fraction=fraction, beta=float(beta),
        fraction_exact=frac_exact, n_checked=int(rows.size), dial_betas=dial, dial_support=support,
    )
