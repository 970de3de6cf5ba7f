"""Frozen reports of :mod:`densemem.tuning`, their JSON form and text tables."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from .._util import to_plain
from ..errors import InputTypeError, InputValueError, MissingExtraError


KINDS = ("single", "metastable", "global")  # codes 0, 1, 2 of SweepReport.kind


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
        return {f.name: to_plain(getattr(self, f.name)) for f in fields(self)}  # type: ignore[arg-type]


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


#: Sweep table columns: (heading, SweepReport field, legend line).
SWEEP_COLUMNS = (
    ("beta", "betas", "inverse temperature of the softmax update"),
    ("sharp", "sharp_fraction", "share of noisy queries whose heaviest item is their own, with weight >= {sw:g}"),
    ("top weight", "top_weight", "mean weight of the heaviest item (1 = all weight on one item)"),
    ("blend", "blend_size", "mean exp(entropy) of the weights: how many items the state blends (1 = one)"),
    ("particip.", "participation", "mean participation ratio 1 / sum w^2 (1 = one item, n = n equal items)"),
    ("dist item", "nearest_distance", "mean distance of the returned state to its nearest stored item"),
    ("single", "fraction_single", "share of queries in the single regime"),
    ("metastable", "fraction_metastable", "share of queries in the metastable regime"),
    ("global", "fraction_global", "share of queries in the global regime"),
    ("energy", "energy", "mean log-sum-exp energy of the returned states"),
)


def regime_lines(settings: dict[str, Any]) -> list[str]:
    """One line per regime of the sweep's classification (single, metastable, global)."""
    pr, gf = settings.get("single_pr", 1.5), settings.get("global_frac", 0.1)
    return [
        f"single      the state is one stored item (participation ratio below {pr:g}): sharp recall.",
        "metastable  the state blends a small group of similar items: neither one item nor the mean.",
        f"global      the state sits near the mean of all stored items (within {gf:g} of their spread): "
        "beta is too small to tell items apart.",
    ]


def _sweep_table(r: SweepReport) -> str:
    sw = float(r.settings.get("sharp_weight", 0.95))
    cols = [(h, getattr(r, f)) for h, f, _ in SWEEP_COLUMNS]
    width = max(10, *(len(h) for h, _ in cols))
    head = "  ".join(f"{name:>{width}}" for name, _ in cols)
    lines = [head] + ["  ".join(f"{_g(c[i]):>{width}}" for _, c in cols) for i in range(len(r.betas))]
    lines += ["", "legend"] + [f"  {h:<10}  {text.format(sw=sw)}" for h, _, text in SWEEP_COLUMNS]
    return "\n".join(lines)


def _queries_phrase(settings: dict[str, Any]) -> str:
    n = settings.get("n_queries", "?")
    if settings.get("queries") == "generated":
        return (f"{n} noisy copies of stored items ({settings.get('corruption')} corruption, level "
                f"{_g(settings.get('level'))}, {settings.get('steps', 1)} update step(s))")
    return f"{n} given queries"


def verdict(report: TuneReport) -> str:
    """The first line of the tuning report: which beta to use and what it gives."""
    c, sw = report.choice, report.sweep
    settings = sw.settings if sw is not None else {}
    if c is None:
        return "verdict: no automatic choice was asked for (--target none); read the sweep below."
    if c.beta is None or not c.reached:
        return (f"verdict: no beta in the searched range reaches the {c.target} goal ({_g(c.goal)}; best "
                f"{_g(c.value)}): {c.note}.")
    if c.target == "sharp":
        sharp_w = float(settings.get("sharp_weight", 0.95))
        return (f"verdict: for sharp recall use beta = {_g(c.beta)}: {c.value:.1%} of the noisy queries end on "
                f"their own item with weight >= {sharp_w:g} (goal {c.goal:.0%}).")
    return (f"verdict: for blends of about {_g(c.goal)} items use beta = {_g(c.beta)} (measured blend size "
            f"{_g(c.value)}).")


def _predicted_vs_measured(report: TuneReport) -> str:
    p, c = report.prediction, report.choice
    pred = p.beta_target_separated
    lines = [f"predicted beta {_g(pred)}: the smallest beta at which {p.target_fraction:.0%} of the stored items "
             "meet the well-separated condition (Ramsauer et al. 2021) computed from their separation Delta "
             "from the nearest rival item."]
    if c is not None and c.beta is not None and c.target == "sharp" and math.isfinite(pred) and c.beta > 0:
        ratio = pred / c.beta
        if ratio >= 1:
            lines.append(f"It is {ratio:.2g} x the measured beta {_g(c.beta)}: the condition is sufficient, not "
                         "necessary (it guards against the worst query direction and holds the state inside a "
                         "tiny ball), so real queries turn sharp well before it. Use the measured beta; the "
                         "predicted one is a safe upper value.")
        else:
            lines.append(f"It is below the measured beta {_g(c.beta)} ({ratio:.2g} x): the noisy queries lie "
                         "farther from their items than the condition's radius, so they need a larger beta.")
    elif not math.isfinite(pred):
        lines.append("It is infinite: too many stored items have a rival as close as themselves (see the "
                     "inseparable share below); no beta separates them.")
    return "\n".join(lines)


def tune_text(report: TuneReport, *, apply_hint: str | None = None, extra: list[str] | None = None) -> str:
    """The tuning report in words: verdict, sweep table with legend, regimes, predicted against measured.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(8))
    >>> rep = t.tune_beta(mem, t.TuneSpec(n_betas=5, n_queries=16))
    >>> t.tune_text(rep).startswith("verdict: for sharp recall use beta = ")
    True
    """
    parts = [verdict(report)]
    if apply_hint and report.choice is not None and report.choice.beta is not None:
        parts[0] += "\n" + apply_hint
    parts += list(extra or [])
    if report.sweep is not None:
        parts.append(f"measured sweep: {_queries_phrase(report.sweep.settings)}\n{_sweep_table(report.sweep)}")
        parts.append("regimes\n" + "\n".join("  " + line for line in regime_lines(report.sweep.settings)))
    parts.append("predicted against measured\n" + _predicted_vs_measured(report))
    sep = report.separation.summary
    parts.append(f"separation Delta (exact over {len(report.separation.ids)} items; median {_g(sep.get('delta_median'))}, "
                 f"smallest {_g(sep.get('delta_min'))}); inseparable items (a rival as close as the item itself): "
                 f"{float(sep.get('fraction_inseparable', 0.0)):.1%}")
    return "\n\n".join(parts)


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
        parts = [report.separation, report.prediction, report.choice, report.exact_recall]
        return tune_text(report) + "\n\ndetails\n\n" + "\n\n".join(format_report(p) for p in parts if p is not None)
    raise InputTypeError(
        f"format_report: `report` must be a densemem.tuning report; got {type(report).__name__}."
    )


# -------------------------------------------------------------------- plot
def plot_sweep(
    report: SweepReport, path: Any, *, predicted_beta: float | None = None, chosen_beta: float | None = None
) -> Any:
    """Draw a sweep as a PNG: metrics against beta on a log axis.

    Top panel: sharp fraction, mean top weight and the fractions of single /
    metastable / global states (top-1 accuracy is left out: after one step
    from a noisy copy it is flat in beta by construction). Bottom panel: mean
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
    fig = Figure(figsize=(9.5, 6.5), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    b = report.betas
    for label, y in [("sharp fraction", report.sharp_fraction),
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
            ax.axvline(chosen_beta, color="r", linestyle=":", linewidth=1.2, label=f"chosen beta {chosen_beta:.4g}")
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)  # beside, not over
    fig.savefig(out, format="png", dpi=110)
    return out


def plot_sweep_figure(report: SweepReport, *, predicted_beta: float | None = None,
                      chosen_beta: float | None = None) -> bytes:
    """The PNG bytes of :func:`plot_sweep` (for reports that embed the figure)."""
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as d:
        path = plot_sweep(report, Path(d) / "sweep.png", predicted_beta=predicted_beta, chosen_beta=chosen_beta)
        return path.read_bytes()
