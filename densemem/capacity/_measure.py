"""Capacity and robustness experiments: how many patterns a memory holds, and how much
corruption it takes, measured by seeded Monte Carlo trials.

**Success probability.** At a count K one *trial* draws K patterns, stores them, and probes
the first min(K, max_probes) of them (the patterns are i.i.d., so that is a uniform
sample), each from its own corrupted copy, all through one retrieve call. A probe succeeds
when the criterion holds for the pattern it came from. The success probability at K is the
probability that a probe of a randomly drawn stored pattern, in a randomly drawn memory of K
patterns, succeeds; it is estimated by pooling every probe of every trial at K (at least
`n_trials` trials, more at small K so that at least `min_probes` probes are judged). The
capacity is the largest K whose estimate is >= 1 - delta (``decide="estimate"``), or whose
lower confidence bound is (``decide="lower"``), found by doubling K = 1, 2, 4, ... up to the
first failure or `max_patterns`, then bisecting. The interval (Wilson or Clopper-Pearson)
treats probes as independent; probes in one trial share a memory, so it is a little narrow.

Trials are keyed by (seed, trial), not by K: the K-pattern memory of a trial holds the first K
patterns of that trial's pool, and the probes' corruptions are the same at every K (common
random numbers), which keeps the measured curve nearly monotone in K.

Examples
--------
>>> from densemem.capacity import estimate_capacity
>>> rep = estimate_capacity("hebbian", 32, n_trials=2, min_probes=16, max_patterns=64)
>>> 1 <= rep.capacity < 32
True
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from . import _checks as ck
from . import _models as cm
from ._plot import plot_curve
from ._report import (
    CapacityCurve,
    CapacityReport,
    RobustnessReport,
    check_output_path,
)
from ._search import interval, search_capacity
from .._validation import SEED_MAX
from ..errors import InputTypeError, InputValueError


ROBUSTNESS_KINDS = cm.CORRUPTIONS + cm.DAMAGES
DEFAULT_LEVELS = (0.0, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4)


# ------------------------------------------------------------------ public API
def estimate_capacity(
    model: Any,
    dim: int | None,
    *,
    patterns: Any = "pm1",
    corruption: Any = None,
    success: str = "fixed_point",
    eps: float | None = None,
    delta: float = 0.05,
    n_trials: int = 5,
    min_probes: int = 256,
    max_probes: int = 256,
    seed: int | None = 0,
    max_patterns: int = 4096,
    steps: int | None = None,
    mode: str = "async",
    ci: str = "wilson",
    confidence: float = 0.95,
    decide: str = "estimate",
    rel_tol: float = 0.0,
    progress: bool | None = None,
    scope: str = "pattern",
) -> CapacityReport:
    """Largest number of stored patterns retrieved with probability >= 1 - delta.

    Parameters
    ----------
    model : str, tuple or callable
        "hebbian", "storkey", "pseudo_inverse" (BinaryMemory rules), ("poly", n) or "exp"
        (DenseBinaryMemory), ("softmax", beta) (DenseMemory.retrieve at that beta), or a
        callable ``trial(n_patterns, rng) -> bool array`` (one success per probe).
    dim : int or None
        Units / dimensions (None: the width of a `patterns` array).
    patterns : {"pm1", "unit", "gaussian"} or array_like of shape (n_rows, dim)
        Random -1/+1, random unit vectors, N(0, 1) entries, or rows of your own array drawn
        without replacement (binary models: "pm1" or a -1/+1 or 0/1 array). Never modified.
    corruption : None, ("flip", fraction), ("mask", fraction) or ("gaussian", sigma)
        Probe corruption; see :func:`densemem.capacity._models.corrupt`. Strings such as
        "flip:0.1" are accepted.
    success : {"fixed_point", "overlap", "top1"}, default "fixed_point"
        fixed_point: the retrieved state equals the pattern (binary: exactly; continuous:
        within `eps` relative distance, default 1e-3). overlap: overlap (binary
        s.xi / n; continuous cosine) >= 1 - eps (default eps 0.05). top1: the pattern is the
        unique best match (binary: of the final state; continuous: the heaviest softmax
        weight, ties failing).
    delta : float in (0, 1), default 0.05
    n_trials, min_probes, max_probes : int
        At least `n_trials` trials per count, raised so >= `min_probes` probes are judged;
        each trial probes at most `max_probes` stored patterns.
    seed : int >= 0 or None
    max_patterns : int, default 4096
        Search ceiling (also capped by the rows of a `patterns` array).
    steps : int, optional
        Binary: most sweeps (default 50); continuous: softmax updates (default 1).
    mode : {"async", "sync"}, default "async"
        Binary update mode; ``mode="sync", steps=1`` is the one-step update.
    ci : {"wilson", "clopper_pearson"}; confidence : float in (0, 1)
    decide : {"estimate", "lower"}
        Pass on the rate itself, or on the lower end of its interval (conservative).
    rel_tol : float >= 0, default 0
        Bisection stops when the bracket is within max(1, rel_tol * capacity).
    progress : bool or None
        tqdm bar on stderr (None: only when stderr is a terminal).
    scope : {"pattern", "all"}, default "pattern"
        "pattern": the rate is over probed patterns (a statement about a typical pattern,
        as in "most memories are recoverable"). "all": every stored pattern of a trial is
        probed and the trial succeeds only when all of them do; the rate is over trials (a
        statement about whole sets, as in "every memory is recoverable" or "exp(alpha N)
        patterns are all stable"). `min_probes` and `max_probes` do not apply; `n_trials`
        sets are judged at each count.

    Returns
    -------
    CapacityReport

    Raises
    ------
    InputValueError, InputTypeError
        Bad model, dim, patterns, corruption, criterion or statistics settings.

    References
    ----------
    McEliece et al., IEEE Trans. Inf. Theory 33(4) (1987); Krotov & Hopfield, NeurIPS
    (2016); Demircigil et al., J. Stat. Phys. 168 (2017); Ramsauer et al., ICLR (2021).

    Examples
    --------
    >>> rep = estimate_capacity(("softmax", 40.0), 10, corruption=("mask", 0.2),
    ...                         success="top1", n_trials=2, min_probes=32)
    >>> rep.capacity > 1, rep.counts[:3]
    (True, (1, 2, 4))
    """
    plan = ck.capacity_plan(
        "estimate_capacity", model, dim, patterns=patterns, corruption=corruption, success=success,
        eps=eps, delta=delta, n_trials=n_trials, min_probes=min_probes, max_probes=max_probes,
        seed=seed, max_patterns=max_patterns, steps=steps, mode=mode, ci=ci, confidence=confidence,
        decide=decide, rel_tol=rel_tol, progress=progress, scope=scope)
    return _search(plan)


def _search(plan: ck.CapacityPlan) -> CapacityReport:
    """Run one checked capacity search (doubling, then bisection) and build its report."""
    m, setup, conf = plan.model, plan.setup, plan.confidence
    bar = ck.progress_bar(plan.progress, None, f"capacity {m.label} d={setup.source.dim}",
                          setup.where)
    trials: list[int] = []

    def evaluate(k: int) -> tuple[int, int]:
        t = cm.trials_at(k, plan.n_trials, plan.min_probes, setup.max_probes, setup.scope)
        trials.append(t)
        return cm.pooled(m, setup, k, t)

    def step(k: int, ok: bool) -> None:
        if bar is not None:
            bar.update(1)
            bar.set_postfix(n=k, passed=ok)

    try:
        tr = search_capacity(evaluate, target=1.0 - plan.delta, max_n=plan.max_n, confidence=conf,
                             ci=plan.ci, decide=plan.decide, rel_tol=plan.rel_tol, on_step=step)
    finally:
        if bar is not None:
            bar.close()
    cis = [interval(k, n, conf, plan.ci) for k, n in zip(tr.successes, tr.totals)]
    return CapacityReport(
        model=m.label, dim=setup.source.dim, capacity=tr.capacity, first_fail=tr.first_fail,
        capped=tr.first_fail is None, counts=tuple(tr.counts), successes=tuple(tr.successes),
        probes=tuple(tr.totals), trials=tuple(trials),
        rates=tuple(k / n if n else 0.0 for k, n in zip(tr.successes, tr.totals)),
        ci_low=tuple(c[0] for c in cis), ci_high=tuple(c[1] for c in cis),
        patterns=setup.source.kind, corruption=ck.corruption_tag(setup.corruption),
        success=setup.success, eps=setup.eps, delta=plan.delta, confidence=conf, ci=plan.ci,
        decide=plan.decide, n_trials=plan.n_trials, seed=setup.seed, scope=setup.scope)


def capacity_curve(
    models: Sequence[Any],
    dims: Sequence[int],
    *,
    csv_path: Any = None,
    json_path: Any = None,
    overwrite: bool = False,
    progress: bool | None = None,
    **options: Any,
) -> CapacityCurve:
    """Capacity of each model at each dimension (a table), optionally written to CSV/JSON.

    Parameters
    ----------
    models : 1-D sequence or array of model descriptions (as for :func:`estimate_capacity`)
    dims : 1-D sequence or integer array, e.g. ``[16, 32]`` or ``np.arange(16, 65, 16)``
    csv_path, json_path : path, optional
        Where to write the table (JSON also holds every report in full); each is written
        atomically (temp file in the same folder, then renamed).
    overwrite : bool, default False
        Replace existing `csv_path` / `json_path` files; otherwise they must not exist (this
        is checked before any trial runs).
    progress : bool or None
        One tqdm bar over the (model, dim) pairs.
    **options
        Passed to :func:`estimate_capacity` (patterns, corruption, success, delta, ...).

    Returns
    -------
    CapacityCurve

    Raises
    ------
    InputValueError, InputTypeError
        Empty or non-1-D `models`/`dims`, an unknown option, an existing output file, or any
        argument :func:`estimate_capacity` refuses (reported as ``capacity_curve: ...``).

    Examples
    --------
    >>> import numpy as np
    >>> curve = capacity_curve(["hebbian"], np.array([16, 32]), n_trials=2, min_probes=16)
    >>> [row["dim"] for row in curve.rows()]
    [16, 32]
    """
    where = "capacity_curve"
    plans = _curve_plans(where, models, dims, options)
    paths = [(p, w) for p, w in ((csv_path, "csv_path"), (json_path, "json_path")) if p is not None]
    for path, name in paths:
        check_output_path(path, overwrite=overwrite, name=name, where=where)
    bar = ck.progress_bar(progress, len(plans), "capacity curve", where)
    reports = []
    try:
        for plan in plans:
            reports.append(_search(plan))
            if bar is not None:
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    curve = CapacityCurve(tuple(reports))
    if csv_path is not None:
        curve.write_csv(csv_path, overwrite=overwrite)
    if json_path is not None:
        curve.write_json(json_path, overwrite=overwrite)
    return curve


def _curve_plans(where: str, models: Any, dims: Any, options: dict[str, Any]) -> list[ck.CapacityPlan]:
    """Check every (model, dim) pair up front, so a bad one fails before any trial runs."""
    model_list = ck.one_d(models, "models", where, "models")
    dim_list = ck.int_items(dims, "dims", where)
    if "dim" in options or "model" in options:
        raise InputValueError(f"{where}: pass `model`/`dim` through `models`/`dims`.")
    unknown = sorted(set(options) - ck.CAPACITY_OPTIONS)
    if unknown:
        raise InputTypeError(
            f"{where}: unknown option(s) {', '.join(unknown)}; estimate_capacity takes "
            f"{', '.join(sorted(ck.CAPACITY_OPTIONS - {'progress'}))}.")
    return [ck.capacity_plan(where, m, d, **{**options, "progress": False})
            for m in model_list for d in dim_list]


def plot_capacity(table: CapacityCurve, path: Any, *, title: str | None = None) -> Path:
    """PNG of capacity against dimension (log y) with the published asymptotic curves.

    Each measured model is drawn with markers (open triangles: capped at max_patterns); in
    the same colour, dashed, the published asymptotic curves for that model, each
    labelled with its source and "asymptotic": Amit-Gutfreund-Sompolinsky 0.138 N and
    McEliece N/(2 ln N), N/(4 ln N) (Hebbian); Storkey N/sqrt(2 ln N); pseudo-inverse N;
    Krotov-Hopfield N^(n-1)/(2 (2n-3)!! ln N); Demircigil exp(N ln2/2) (and exp(N I(1-2rho)/2)
    for flip corruption rho). The softmax model has no curve in those entries.

    Raises
    ------
    MissingExtraError
        matplotlib is not installed (``pip install densemem[plot]``).

    Examples
    --------
    >>> import tempfile, os
    >>> curve = capacity_curve(["hebbian"], [16, 24], n_trials=1, min_probes=8)
    >>> out = plot_capacity(curve, os.path.join(tempfile.mkdtemp(), "c.png"))
    >>> out.suffix
    '.png'
    """
    return plot_curve(table, path, title=title)


def robustness_curve(
    model: Any,
    dim: int | None,
    n_patterns: int,
    *,
    levels: Sequence[float] = DEFAULT_LEVELS,
    kind: str = "flip",
    corruption: Any = None,
    patterns: Any = "pm1",
    success: str = "fixed_point",
    eps: float | None = None,
    n_trials: int = 5,
    min_probes: int = 256,
    max_probes: int = 256,
    seed: int | None = 0,
    steps: int | None = None,
    mode: str = "async",
    ci: str = "wilson",
    confidence: float = 0.95,
    progress: bool | None = None,
) -> RobustnessReport:
    """Success rate against corruption or damage level at a fixed load of `n_patterns`.

    The same trials (seed, trial) are used at every level, so the curve is smooth.

    Parameters
    ----------
    model : str, tuple or callable
        As for :func:`estimate_capacity`.
    dim : int or None
        Units / dimensions (None: the width of a `patterns` array).
    n_patterns : int >= 1
        Patterns stored in every trial (at most the rows of a `patterns` array).
    levels : 1-D sequence or array of numbers, default (0, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4)
        The corruption or damage levels, e.g. ``np.linspace(0, 0.4, 9)``. Fractions in
        [0, 1], except the sigma of ``kind="gaussian"`` (>= 0).
    kind : {"flip", "gaussian", "mask", "damage_units", "zero_weights", "zero_coords"}
        flip / gaussian / mask: probe corruption at each level (as in estimate_capacity).
        damage_units: that fraction of units is deleted (their weights zeroed; they keep the
        probe's value), zero_weights: that fraction of weight pairs is zeroed (both
        BinaryMemory rules only, via BinaryMemory.damaged). zero_coords: that fraction of
        coordinates of every stored pattern is zeroed (softmax model only); success is judged
        against the undamaged pattern.
    corruption : None, ("flip", fraction), ("mask", fraction) or ("gaussian", sigma)
        Probe corruption applied at every level of a damage sweep (must be None for kind in
        flip / gaussian / mask, where the level is the corruption).
    patterns : {"pm1", "unit", "gaussian"} or array_like of shape (n_rows, dim)
        As for :func:`estimate_capacity`; never modified.
    success : {"fixed_point", "overlap", "top1"}, default "fixed_point"
        The retrieval criterion, as for :func:`estimate_capacity`.
    eps : float >= 0, optional
        Tolerance of the criterion (defaults as for :func:`estimate_capacity`).
    n_trials, min_probes, max_probes : int >= 1
        At least `n_trials` trials, raised so >= `min_probes` probes are judged; each trial
        probes at most `max_probes` stored patterns.
    seed : int >= 0 or None
        Seeds every trial (None: fresh entropy).
    steps : int >= 1, optional
        Binary: most sweeps (default 50); continuous: softmax updates (default 1).
    mode : {"async", "sync"}, default "async"
        Binary update mode.
    ci : {"wilson", "clopper_pearson"}, default "wilson"
        Confidence interval of each rate.
    confidence : float in (0, 1), default 0.95
    progress : bool or None
        tqdm bar over the levels on stderr (None: only when stderr is a terminal).

    Returns
    -------
    RobustnessReport

    Raises
    ------
    InputValueError, InputTypeError
        Unknown kind, a kind the model cannot take, bad levels, or any setting
        :func:`estimate_capacity` would refuse.

    Examples
    --------
    >>> rep = robustness_curve("hebbian", 64, 4, levels=(0.0, 0.45), n_trials=2, min_probes=16)
    >>> rep.rates[0] >= rep.rates[1]
    True
    """
    plan = ck.robustness_plan(
        "robustness_curve", model, dim, n_patterns, levels=levels, kind=kind,
        corruption=corruption, patterns=patterns, success=success, eps=eps, n_trials=n_trials,
        min_probes=min_probes, max_probes=max_probes, seed=seed, steps=steps, mode=mode, ci=ci,
        confidence=confidence, progress=progress)
    m, base = plan.model, plan.base
    bar = ck.progress_bar(plan.progress, len(plan.levels), f"robustness {m.label} {plan.kind}",
                          base.where)
    succ, tot = [], []
    try:
        for x in plan.levels:
            k, n = cm.pooled(m, _with_level(base, plan.kind, x), plan.n_patterns, plan.trials)
            succ.append(k)
            tot.append(n)
            if bar is not None:
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    cis = [interval(k, n, plan.confidence, plan.ci) for k, n in zip(succ, tot)]
    return RobustnessReport(
        model=m.label, dim=base.source.dim, n_patterns=plan.n_patterns, kind=plan.kind,
        levels=plan.levels, rates=tuple(k / n for k, n in zip(succ, tot)),
        ci_low=tuple(c[0] for c in cis), ci_high=tuple(c[1] for c in cis), successes=tuple(succ),
        probes=tuple(tot), success=base.success, corruption=ck.corruption_tag(base.corruption),
        confidence=plan.confidence, ci=plan.ci, n_trials=plan.trials, seed=base.seed)


def _with_level(base: cm.Setup, kind: str, level: float) -> cm.Setup:
    from dataclasses import replace

    if kind in cm.CORRUPTIONS:
        return replace(base, corruption=(kind, level))
    return replace(base, damage=(kind, level) if level > 0 else None)


# ------------------------------------------------------------------ CLI spec
class CapacitySpec(BaseModel):
    """Options of a capacity-curve run as they cross a boundary (CLI flags, JSON file).

    ``spec.curve_options()`` gives the keyword arguments of :func:`capacity_curve` besides
    `models` and `dims`; the output paths are for the caller to honour.

    Examples
    --------
    >>> spec = CapacitySpec(models=["hebbian", "softmax:50"], dims=[16, 32], corruption="mask:0.25")
    >>> spec.curve_options()["corruption"]
    ('mask', 0.25)
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    models: list[str] = Field(default_factory=lambda: ["hebbian", "storkey", "pseudo_inverse"],
                              min_length=1)
    dims: list[Annotated[int, Field(ge=2)]] = Field(default_factory=lambda: [25, 50, 100, 200], min_length=1)
    patterns: Literal["pm1", "unit", "gaussian"] = "pm1"
    patterns_file: str | None = None  # an array file the caller loads and passes as patterns
    corruption: str | None = None  # "flip:0.1", "mask:0.25", "gaussian:0.5"
    success: Literal["fixed_point", "overlap", "top1"] = "fixed_point"
    eps: float | None = Field(default=None, ge=0)
    delta: float = Field(default=0.05, gt=0, lt=1)
    n_trials: int = Field(default=5, ge=1)
    min_probes: int = Field(default=256, ge=1)
    max_probes: int = Field(default=256, ge=1)
    seed: int = Field(default=0, ge=0, le=SEED_MAX)
    max_patterns: int = Field(default=4096, ge=1)
    steps: int | None = Field(default=None, ge=1)
    mode: Literal["async", "sync"] = "async"
    ci: Literal["wilson", "clopper_pearson"] = "wilson"
    confidence: float = Field(default=0.95, gt=0, lt=1)
    decide: Literal["estimate", "lower"] = "estimate"
    rel_tol: float = Field(default=0.0, ge=0)
    csv_path: str | None = None
    json_path: str | None = None
    plot_path: str | None = None

    @field_validator("models")
    @classmethod
    def _models_known(cls, v: list[str]) -> list[str]:
        for m in v:
            cm.parse_model(m, "CapacitySpec")
        return v

    @field_validator("corruption")
    @classmethod
    def _corruption_ok(cls, v: str | None) -> str | None:
        ck.check_corruption(v, "CapacitySpec")
        return v

    def curve_options(self) -> dict[str, Any]:
        """Keyword arguments for :func:`capacity_curve` (without models, dims, paths)."""
        skip = {"models", "dims", "patterns_file", "csv_path", "json_path", "plot_path"}
        out = {k: v for k, v in self.model_dump().items() if k not in skip}
        out["corruption"] = ck.check_corruption(self.corruption, "CapacitySpec")
        return out
