"""Separation of stored patterns and the betas theory predicts from it.

Public names are re-exported by :mod:`densemem.tuning`.
"""

from __future__ import annotations

import math
from typing import Any

import faiss
import numpy as np
from scipy.special import lambertw

from ..core.index import make_index, train_ivf
from ._reports import BetaPrediction, SeparationReport
from .._validation import check_nonneg_float, check_positive_fraction
from ..dense import DenseMemory
from ..errors import InputTypeError, InputValueError

__all__ = ["separation", "predict_beta"]

_INDEXES = (None, "exact", "hnsw", "ivf")


# ------------------------------------------------------------- validation
def _check_memory(memory: Any, where: str, *, minimum: int = 1) -> DenseMemory:
    if not isinstance(memory, DenseMemory):
        raise InputTypeError(f"{where}: `memory` must be a DenseMemory; got {type(memory).__name__}.")
    if len(memory) < minimum:
        if len(memory) == 0:
            raise InputValueError(f"{where}: the memory is empty; add patterns first.")
        raise InputValueError(
            f"{where}: needs at least {minimum} stored patterns; the memory holds {len(memory)}."
        )
    return memory


# ------------------------------------------------------------- separation
def _ann_top(x: np.ndarray, kind: str, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Top-k inner-product neighbours of every stored row from a temporary faiss index."""
    n, d = x.shape
    if kind == "hnsw":
        index = make_index("hnsw", d, M=32, ef_construction=80, ef_search=64)  # common practice for HNSW
    else:
        nlist = max(1, min(round(4 * math.sqrt(n)), n // 39))  # faiss wants >= 39 points per list
        index = make_index("ivf", d, nlist=nlist, nprobe=max(8, nlist // 32))
        train_ivf(index, x, n, None)
    index.add(x)
    return index.search(x, k)


def separation(memory: DenseMemory, *, index: str | None = None, tol: float | None = None) -> SeparationReport:
    """Separation of each stored pattern from its nearest rival.

    Parameters
    ----------
    memory : DenseMemory
        At least 2 stored patterns.
    index : {None, "exact", "hnsw", "ivf"}, default None
        None / "exact": faiss brute-force top-2 (``faiss.knn``, inner
        product). "hnsw" / "ivf": a temporary approximate faiss index (top-3),
        for large stores; a missed rival makes ``Delta_i`` too large, never too
        small.
    tol : float, optional
        Patterns with ``Delta_i <= tol`` are reported inseparable. Default
        ``1e-6 * M^2`` (the rounding of float32 inner products).

    Returns
    -------
    SeparationReport

    Notes
    -----
    ``Delta_i = x_i.x_i - max_{j != i} x_i.x_j`` [1]_. The rival is searched by
    faiss; ``Delta_i`` is then recomputed in float64. The search's top hit may
    be another pattern (a longer one, or a duplicate): the rival is the best
    hit that is not row ``i`` itself, so ``Delta_i <= 0`` is reported as such.

    References
    ----------
    .. [1] H. Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array([[1.0, 0.0], [0.8, 0.6], [0.0, 1.0]])
    >>> rep = t.separation(mem)
    >>> np.round(rep.delta, 2).tolist(), rep.rival_ids.tolist()
    ([0.2, 0.2, 0.4], [1, 0, 1])
    """
    where = "separation"
    memory = _check_memory(memory, where, minimum=2)
    if index not in _INDEXES:
        raise InputValueError(f"{where}: `index` must be one of None, 'exact', 'hnsw', 'ivf'; got {index!r}.")
    x = memory.patterns
    n, big_m = len(memory), memory.max_norm
    tol = 1e-6 * big_m * big_m if tol is None else check_nonneg_float(tol, name="tol", where=where)
    exact = index in (None, "exact")
    _, pos = faiss.knn(x, x, 2, metric=faiss.METRIC_INNER_PRODUCT) if exact else _ann_top(x, index, min(3, n))
    rows = np.arange(n)
    usable = (pos >= 0) & (pos != rows[:, None])
    first = np.argmax(usable, axis=1)
    rival = pos[rows, first]
    lost = ~usable.any(axis=1)  # an approximate index found nothing but the row itself
    if lost.any():
        _, fix = faiss.knn(x[lost], x, 2, metric=faiss.METRIC_INNER_PRODUCT)
        rival[lost] = np.where(fix[:, 0] != rows[lost], fix[:, 0], fix[:, 1])
    x64 = x.astype(np.float64)
    delta = np.einsum("ij,ij->i", x64, x64) - np.einsum("ij,ij->i", x64, x64[rival])
    ids = memory.ids.copy()
    summary = {
        "delta_min": float(delta.min()), "delta_q01": float(np.quantile(delta, 0.01)),
        "delta_q05": float(np.quantile(delta, 0.05)), "delta_median": float(np.median(delta)),
        "delta_mean": float(delta.mean()), "delta_max": float(delta.max()),
        "fraction_inseparable": float(np.mean(delta <= tol)),
    }
    return SeparationReport(
        ids=ids, delta=delta, rival_ids=ids[rival], rival_rows=rival.astype(np.int64),
        inseparable_ids=ids[delta <= tol], tol=float(tol), index="exact" if exact else str(index),
        max_norm=big_m, summary=summary,
    )


# --------------------------------------------------------- predicted beta
def _beta_separated(delta: np.ndarray, n: int, big_m: float, tol: float) -> np.ndarray:
    """Larger root of g(beta) = beta*Delta - 2/N - ln(2 (N-1) N beta M^2), by Lambert W."""
    out = np.full(delta.shape, np.inf)
    ok = delta > max(tol, 0.0)
    d = delta[ok]
    # g(beta) = 0  <=>  (-beta d) exp(-beta d) = -d exp(-c), c = 2/N + ln(2 (N-1) N M^2)
    arg = -(d / (big_m * big_m)) * math.exp(-2.0 / n) / (2.0 * (n - 1) * n)
    w = lambertw(arg, k=-1).real  # branch -1: the root with beta > 1/Delta
    out[ok] = -w / d
    return out


def _target_beta(betas: np.ndarray, fraction: float) -> float:
    """Smallest beta at or above which ``fraction`` of the per-pattern betas lie."""
    srt = np.sort(betas)
    return float(srt[max(0, math.ceil(fraction * len(srt) - 1e-9) - 1)])


def _quantiles(v: np.ndarray, name: str) -> dict[str, float]:
    """Fraction finite and quantiles (no interpolation, so infinities stay inf)."""
    out = {f"fraction_{name}_finite": float(np.mean(np.isfinite(v)))}
    for label, q in (("median", 0.5), ("q90", 0.9), ("q99", 0.99), ("max", 1.0)):
        out[f"{name}_{label}"] = float(np.quantile(v, q, method="higher"))
    return out


def predict_beta(
    memory: DenseMemory,
    *,
    radius: float = 0.0,
    error_tol: float | None = None,
    target_fraction: float = 0.99,
    separation_report: SeparationReport | None = None,
    index: str | None = None,
    tol: float | None = None,
) -> BetaPrediction:
    """Betas predicted by the separation theory of the softmax update.

    Parameters
    ----------
    memory : DenseMemory
        At least 2 stored patterns.
    radius : float, default 0.0
        Query noise radius ``r``: queries lie within distance ``r`` of their
        stored pattern (same units as the patterns).
    error_tol : float, optional
        Largest tolerated distance ``||f(xi) - x_i||`` after one update.
        Default ``1e-2 * M``.
    target_fraction : float, default 0.99
        Fraction of stored patterns that should be retrievable.
    separation_report : SeparationReport, optional
        Reuse a :func:`separation` result (else it is computed with ``index``
        and ``tol``).

    Returns
    -------
    BetaPrediction

    Notes
    -----
    *Well-separated condition* (Ramsauer et al., "Hopfield Networks is All You Need",
    ICLR 2021; from memory):
    ``Delta_i >= 2/(beta N) + ln(2 (N-1) N beta M^2) / beta``; then the update
    maps the ball of radius ``1/(beta N M)`` around ``x_i`` into itself.
    Multiplying by beta, it reads ``g(beta) >= 0`` with
    ``g(beta) = beta Delta_i - ln(beta) - c``, ``c = 2/N + ln(2 (N-1) N M^2)``.
    ``g`` is convex (``g'' = 1/beta^2``; also convex in ``t = ln beta``) with
    its minimum ``1 + ln(Delta_i) - c < 0`` at ``beta = 1/Delta_i`` (negative
    for every N >= 2 because ``Delta_i <= 2 M^2``), so the condition holds on
    ``(0, beta_lo]`` and on ``[beta_hi, inf)``. The small-beta branch is
    vacuous (there ``beta M^2 < 1/(2 (N-1) N)``: one global fixed point, and a
    ball wider than the data); the report gives ``beta_hi``, the beta from
    which the condition holds for good. It is the branch -1 Lambert W root
    ``beta_hi = -W_{-1}(-Delta_i e^{-c}) / Delta_i`` (closed form, vectorised;
    the tests check it against ``scipy.optimize.brentq`` on the inequality).

    *One-step bound* (derived from the same paper's argument): for ``||xi - x_i|| <= r``,
    ``||f(xi) - x_i|| <= 2 M (N-1) exp(-beta (Delta_i - 2 M r))``, which is at
    most ``error_tol`` from ``beta = ln(2 M (N-1) / error_tol) / (Delta_i - 2 M r)``
    (inf when ``Delta_i <= 2 M r``; 0 when the bound holds at every beta).

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(3))
    >>> pred = t.predict_beta(mem)
    >>> bool(pred.beta_target_separated > 1.0), pred.beta_separated.shape
    (True, (3,))
    """
    where = "predict_beta"
    memory = _check_memory(memory, where, minimum=2)
    radius = check_nonneg_float(radius, name="radius", where=where)
    big_m, n = memory.max_norm, len(memory)
    if big_m == 0:
        raise InputValueError(f"{where}: every stored pattern is zero; no beta separates them.")
    error_tol = 1e-2 * big_m if error_tol is None else check_nonneg_float(
        error_tol, name="error_tol", where=where, strict=True)
    target_fraction = check_positive_fraction(target_fraction, name="target_fraction", where=where)
    sep = separation(memory, index=index, tol=tol) if separation_report is None else separation_report
    if not isinstance(sep, SeparationReport) or len(sep.delta) != n:
        raise InputValueError(
            f"{where}: `separation_report` must be the SeparationReport of this memory ({n} patterns)."
        )
    b_sep = _beta_separated(sep.delta, n, big_m, sep.tol)
    with np.errstate(divide="ignore"):
        r_sep = 1.0 / (b_sep * n * big_m)
    margin = sep.delta - 2.0 * big_m * radius
    log_term = math.log(2.0 * big_m * (n - 1) / error_tol)
    with np.errstate(divide="ignore"):
        b_bound = np.where(margin > 0, max(log_term, 0.0) / np.where(margin > 0, margin, 1.0), np.inf)
    return BetaPrediction(
        ids=sep.ids, beta_separated=b_sep, radius_separated=r_sep, beta_bound=b_bound,
        radius=radius, error_tol=error_tol, target_fraction=target_fraction,
        beta_target_separated=_target_beta(b_sep, target_fraction),
        beta_target_bound=_target_beta(b_bound, target_fraction),
        summary={**_quantiles(b_sep, "separated"), **_quantiles(b_bound, "bound")},
    )


# ------------------------------------------------------ storage theorem
def storage_bound(beta: float, k: float, dim: int, p: float) -> tuple[float, float, bool]:
    """Patterns the storage theorem guarantees, for patterns uniform on a sphere (private).

    Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021, storage theorem (the
    formula from memory): N patterns uniform on the sphere of radius ``M = k sqrt(dim - 1)``,
    failure probability ``p``; with ``a = (2 / (dim - 1)) (1 + ln(2 beta k^2 p (dim - 1)))``,
    ``b = 2 k^2 beta / 5`` and ``c = b / W0(exp(a + ln b))`` (W0 the principal Lambert W
    branch), if ``c >= (2 / sqrt(p))^(4 / (dim - 1))`` then with probability ``1 - p`` at
    least ``sqrt(p) c^((dim - 1) / 4)`` patterns are stored (well separated).

    Returns ``(c, n_stored, side_condition_holds)``.
    """
    a = (2.0 / (dim - 1)) * (1.0 + math.log(2.0 * beta * k * k * p * (dim - 1)))
    b = 2.0 * k * k * beta / 5.0
    c = b / float(lambertw(math.exp(a + math.log(b)), k=0).real)
    n_stored = math.sqrt(p) * c ** ((dim - 1) / 4.0)
    return c, n_stored, bool(c >= (2.0 / math.sqrt(p)) ** (4.0 / (dim - 1)))
