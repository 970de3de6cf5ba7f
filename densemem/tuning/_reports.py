"""Frozen reports of :mod:`densemem.tuning`, their JSON form and text tables."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from ..errors import InputTypeError, InputValueError, MissingExtraError


KINDS = ("single", "metastable", "global")  # codes 0, 1, 2 of SweepReport.kind


def _plain(value: Any) -> Any:
    """JSON-ready copy: arrays to lists, NaN and infinities to None."""
    if isinstance(value, _Report):
        return value.to_dict()
    if isinstance(value, np.ndarray):
        if value.dtype.kind == "f":
            return [_plain(v) for v in value.tolist()] if value.ndim else _plain(float(value))
        return value.tolist()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    return value


class _Report:
    __slots__ = ()

    def __repr__(self) -> str:
        def short(v: Any) -> str:
            return f"array(shape={v.shape})" if isinstance(v, np.ndarray) else repr(v)

        body = ", ".join(f"{f.name}={short(getattr(self, f.name))}" for f in fields(self))  # type: ignore[arg-type]
        return f"{type(self).__name__}({body})"

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python, JSON-ready copy (NaN and infinity become ``None``).

        Examples
        --------
        >>> import json, numpy as np, densemem, densemem.tuning as t
        >>> mem = densemem.DenseMemory.from_array([[1.0, 0.0], [0.8, 0.6], [0.0, 1.0]])
        >>> json.loads(json.dumps(t.separation(mem).to_dict()))["rival_ids"]
        [1, 0, 1]
        """
        return {f.name: _plain(getattr(self, f.name)) for f in fields(self)}  # type: ignore[arg-type]


@dataclass(frozen=True, slots=True, repr=False)
class SeparationReport(_Report):
    """Separation of every stored pattern from its nearest rival.

    Attributes
    ----------
    ids : ndarray of shape (n_patterns,)
    delta : ndarray of shape (n_patterns,), float64
        ``Delta_i = x_i.x_i - max_{j != i} x_i.x_j``.
    rival_ids, rival_rows : ndarray of shape (n_patterns,)
        Id and row number of the rival attaining the max.
    inseparable_ids : ndarray
        Ids with ``Delta_i <= tol`` (no beta separates them: near-duplicates).
    tol : float
    index : str
        "exact", "hnsw" or "ivf". With an index the rival can be missed, so
        ``delta`` is then an upper bound of the exact value.
    max_norm : float
        ``M``, the largest stored norm.
    summary : dict
        min, 1%, 5%, 50% quantiles, mean, max of delta, and the inseparable fraction.
    """

    ids: np.ndarray
    delta: np.ndarray
    rival_ids: np.ndarray
    rival_rows: np.ndarray
    inseparable_ids: np.ndarray
    tol: float
    index: str
    max_norm: float
    summary: dict[str, float]


@dataclass(frozen=True, slots=True, repr=False)
class BetaPrediction(_Report):
    """Betas predicted from the separations (no retrieval is run).

    Attributes
    ----------
    ids : ndarray of shape (n_patterns,)
    beta_separated : ndarray of shape (n_patterns,)
        Smallest beta on the large-beta branch of the well-separated condition
        (inf where ``Delta_i <= tol``).
    radius_separated : ndarray of shape (n_patterns,)
        The radius ``1 / (beta N M)`` the condition speaks of, at that beta.
    beta_bound : ndarray of shape (n_patterns,)
        Smallest beta with the one-step bound ``2 M (N-1) exp(-beta (Delta_i -
        2 M r)) <= error_tol`` (inf where ``Delta_i <= 2 M r``).
    radius, error_tol : float
        The query radius ``r`` and the tolerated distance of the bound.
    target_fraction : float
    beta_target_separated, beta_target_bound : float
        The betas at or above which at least ``target_fraction`` of the stored
        patterns satisfy the condition / the bound (inf when unreachable).
    summary : dict
        Quantiles of both per-pattern betas and the fractions reachable at all.
    """

    ids: np.ndarray
    beta_separated: np.ndarray
    radius_separated: np.ndarray
    beta_bound: np.ndarray
    radius: float
    error_tol: float
    target_fraction: float
    beta_target_separated: float
    beta_target_bound: float
    summary: dict[str, float]


@dataclass(frozen=True, slots=True, repr=False)
class SweepReport(_Report):
    """Measured retrieval behaviour over a grid of betas.

    Per-beta arrays have shape (n_betas,); per-query ones (n_betas, n_queries).
    See :func:`densemem.tuning.sweep_beta` for the definitions.
    """

    betas: np.ndarray
    accuracy: np.ndarray  # top-1 == source (NaN without sources)
    sharp_fraction: np.ndarray  # top weight >= sharp_weight and top-1 correct
    top_weight: np.ndarray
    blend_size: np.ndarray  # mean exp(entropy)
    participation: np.ndarray  # mean 1 / sum p^2
    nearest_distance: np.ndarray  # mean distance of the state to its nearest stored pattern
    fraction_single: np.ndarray
    fraction_metastable: np.ndarray
    fraction_global: np.ndarray
    energy: np.ndarray  # mean energy of the returned states
    entropy: np.ndarray  # per query, nats
    top_weights: np.ndarray  # (n_betas, n_queries, k)
    top_ids: np.ndarray  # (n_betas, n_queries, k)
    kind: np.ndarray  # per query, codes into KINDS
    source_ids: np.ndarray | None
    settings: dict[str, Any]
    predicted_beta: float | None = None

    def members(self, beta_index: int, query: int, threshold: float = 0.05) -> np.ndarray:
        """Ids whose weight is at least ``threshold`` for one query at one beta.

        Only the ``k`` heaviest items are kept per query, so this lists at
        most ``k`` ids.

        Examples
        --------
        >>> import numpy as np, densemem.tuning as t, densemem
        >>> mem = densemem.DenseMemory.from_array(np.eye(3))
        >>> rep = t.sweep_beta(mem, np.eye(3), sources=[0, 1, 2], betas=[100.0])
        >>> rep.members(0, 1).tolist()
        [1]
        """
        w = self.top_weights[beta_index, query]
        return self.top_ids[beta_index, query][w >= threshold]


@dataclass(frozen=True, slots=True, repr=False)
class BetaChoice(_Report):
    """A beta chosen by bisection in log beta on a monotone measured quantity.

    Attributes
    ----------
    target : str
        "sharp" or "blend".
    beta : float or None
        The chosen beta (None when the goal cannot be met in the search range).
    reached : bool
    value, goal : float
        The measured quantity at ``beta`` and the value aimed for.
    bracket : tuple of float
        The final (lo, hi) bracket; ``hi / lo <= 1 + rtol`` when bisection ran.
    rtol : float
    evaluations : list of (beta, value)
    note : str
    """

    target: str
    beta: float | None
    reached: bool
    value: float
    goal: float
    bracket: tuple[float, float]
    rtol: float
    evaluations: list[tuple[float, float]]
    note: str


@dataclass(frozen=True, slots=True, repr=False)
class TuneReport(_Report):
    """Everything :func:`densemem.tuning.tune_beta` computed."""

    separation: SeparationReport
    prediction: BetaPrediction
    sweep: SweepReport | None
    choice: BetaChoice | None
    exact_recall: Any = None  # ExactRecallReport (densemem.tuning._sparse) when a sparse map was asked for


# ------------------------------------------------------------------ tables
def _g(x: Any) -> str:
    if x is None:
        return "-"
    x = float(x)
    return "nan" if math.isnan(x) else ("inf" if math.isinf(x) else f"{x:.4g}")


def _kv(title: str, rows: dict[str, Any]) -> str:
    width = max(len(k) for k in rows)
    return "\n".join([title] + [f"  {k:<{width}}  {_g(v) if not isinstance(v, str) else v}" for k, v in rows.items()])


def _sweep_table(r: SweepReport) -> str:
    cols = [
        ("beta", r.betas), ("top1", r.accuracy), ("sharp", r.sharp_fraction), ("top_w", r.top_weight),
        ("blend", r.blend_size), ("pr", r.participation), ("d_near", r.nearest_distance),
        ("single", r.fraction_single), ("meta", r.fraction_metastable), ("global", r.fraction_global),
        ("energy", r.energy),
    ]
    head = "  ".join(f"{name:>9}" for name, _ in cols)
    lines = [head] + ["  ".join(f"{_g(c[i]):>9}" for _, c in cols) for i in range(len(r.betas))]
    if r.predicted_beta is not None:
        lines.append(f"predicted beta: {_g(r.predicted_beta)}")
    return "\n".join(lines)


def format_report(report: Any) -> str:
    """A plain-text table of any report from :mod:`densemem.tuning`.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(3))
    >>> print(t.format_report(t.separation(mem)).splitlines()[0])
    separation (exact, 3 patterns, M = 1)
    """
    if isinstance(report, SeparationReport):
        return _kv(f"separation ({report.index}, {len(report.ids)} patterns, M = {_g(report.max_norm)})",
                   report.summary)
    if isinstance(report, BetaPrediction):
        head = {"target_fraction": report.target_fraction, "beta_target_separated": report.beta_target_separated,
                "radius": report.radius, "error_tol": report.error_tol, "beta_target_bound": report.beta_target_bound}
        return _kv("predicted beta", {**head, **report.summary})
    if isinstance(report, SweepReport):
        return _sweep_table(report)
    if isinstance(report, BetaChoice):
        return _kv(f"chosen beta ({report.target})", {"beta": report.beta, "reached": str(report.reached),
                   "value": report.value, "goal": report.goal, "lo": report.bracket[0], "hi": report.bracket[1],
                   "evaluations": len(report.evaluations), "note": report.note})
    if type(report).__name__ == "ExactRecallReport":
        rows = {"weighting": report.weighting, "alpha": report.alpha, "fraction": report.fraction,
                "beta": report.beta, "fraction_exact": report.fraction_exact, "checked": report.n_checked}
        rows.update({f"support at beta={_g(b)}": s for b, s in zip(report.dial_betas, report.dial_support)})
        return _kv("exact single-item recall (Fenchel-Young margin)", rows)
    if isinstance(report, TuneReport):
        parts = [report.separation, report.prediction, report.sweep, report.choice, report.exact_recall]
        return "\n\n".join(format_report(p) for p in parts if p is not None)
    raise InputTypeError(
        f"format_report: `report` must be a densemem.tuning report; got {type(report).__name__}."
    )


# -------------------------------------------------------------------- plot
def plot_sweep(
    report: SweepReport, path: Any, *, predicted_beta: float | None = None, chosen_beta: float | None = None
) -> Any:
    """Draw a sweep as a PNG: metrics against beta on a log axis.

    Top panel: top-1 accuracy, sharp fraction, mean top weight and the
    fractions of single / metastable / global states. Bottom panel: mean
    effective blend size exp(H) and participation ratio (log scale). Vertical
    lines mark the predicted beta (default: ``report.predicted_beta``) and a
    chosen beta when given. Needs matplotlib (``pip install densemem[plot]``).

    Returns the path written (a :class:`pathlib.Path`).

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t, tempfile, os
    >>> mem = densemem.DenseMemory.from_array(np.eye(4))
    >>> rep = t.sweep_beta(mem, np.eye(4), sources=[0, 1, 2, 3], betas=[0.1, 1.0, 10.0])
    >>> out = t.plot_sweep(rep, os.path.join(tempfile.mkdtemp(), "sweep.png"))
    >>> out.suffix
    '.png'
    """
    from pathlib import Path

    if not isinstance(report, SweepReport):
        raise InputTypeError(f"plot_sweep: `report` must be a SweepReport; got {type(report).__name__}.")
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise MissingExtraError(
            "plot_sweep: matplotlib is needed to draw plots; install it with `pip install densemem[plot]`."
        ) from None
    out = Path(path)
    if not out.parent.is_dir():
        raise InputValueError(f"plot_sweep: the folder of `path` does not exist; got {str(out)!r}.")
    fig = Figure(figsize=(7.5, 6.5), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    b = report.betas
    for label, y in [("top-1 accuracy", report.accuracy), ("sharp fraction", report.sharp_fraction),
                     ("mean top weight", report.top_weight), ("single", report.fraction_single),
                     ("metastable", report.fraction_metastable), ("global", report.fraction_global)]:
        top.plot(b, y, marker=".", label=label)
    top.set_ylabel("fraction / weight")
    top.set_ylim(-0.03, 1.03)
    bottom.plot(b, report.blend_size, marker=".", label="exp(entropy)")
    bottom.plot(b, report.participation, marker=".", label="participation ratio")
    bottom.set_yscale("log")
    bottom.set_ylabel("items in the blend")
    bottom.set_xlabel("beta")
    pred = report.predicted_beta if predicted_beta is None else predicted_beta
    for ax in (top, bottom):
        ax.set_xscale("log")
        ax.grid(True, which="both", alpha=0.3)
        if pred is not None and math.isfinite(pred):
            ax.axvline(pred, color="k", linestyle="--", linewidth=1, label="predicted beta")
        if chosen_beta is not None:
            ax.axvline(chosen_beta, color="r", linestyle=":", linewidth=1.2, label="chosen beta")
        ax.legend(fontsize=7, loc="best")
    fig.savefig(out, format="png", dpi=110)
    return out
