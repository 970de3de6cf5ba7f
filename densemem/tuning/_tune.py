"""Choosing the inverse temperature beta from the data: predicted and measured.

Small beta blends everything (the state is the mean of the stored patterns),
intermediate beta blends small groups of close patterns (metastable states),
large beta returns one stored pattern. This module answers "which beta?":

* :func:`separation` -- how far each stored pattern stands from its nearest
  rival, ``Delta_i = x_i.x_i - max_{j != i} x_i.x_j`` (faiss top-2 search);
* :func:`predict_beta` -- the betas theory asks for, from the separations;
* :func:`sweep_beta` -- what retrieval actually does over a grid of betas;
* :func:`choose_beta` -- the smallest sharp beta, or the beta giving a target
  blend size, by bisection in log beta;
* :func:`tune_beta` -- all of them from one :class:`TuneSpec` (the CLI's entry);
* :func:`format_report` and :func:`plot_sweep` -- a text table and a PNG.

Every report is a frozen dataclass with ``to_dict()`` (JSON-ready).
"""

from __future__ import annotations

import math
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, PositiveFloat

from ._reports import (
    TuneReport,
)
from ._sparse import exact_recall_beta
from ._sweep import TICK, choose_beta, sweep_beta
from ._theory import _check_memory, predict_beta, separation
from ..dense import DenseMemory
from ..errors import InputTypeError


class TuneSpec(BaseModel):
    """Options of :func:`tune_beta`, validated once (CLI flags and JSON map onto these).

    Examples
    --------
    >>> from densemem.tuning import TuneSpec
    >>> TuneSpec(corruption="mask", level=0.3).n_queries
    256
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    # separation and predicted beta
    index: Literal["exact", "hnsw", "ivf"] = "exact"
    tol: float | None = Field(None, ge=0, description="Delta_i <= tol is inseparable (default 1e-6 M^2)")
    radius: float = Field(0.0, ge=0, description="query noise radius r of the one-step bound")
    error_tol: PositiveFloat | None = Field(None, description="one-step bound tolerance (default 1e-2 M)")
    target_fraction: float = Field(0.99, gt=0, le=1, description="fraction of patterns to make retrievable")
    # sweep
    betas: list[PositiveFloat] | None = Field(None, min_length=1, description="strictly increasing grid")
    n_betas: int = Field(25, ge=1)
    corruption: Literal["gaussian", "mask", "mix"] = "gaussian"
    level: float = Field(0.1, ge=0)
    n_queries: int = Field(256, ge=1)
    steps: int = Field(1, ge=1)
    method: Literal["exact", "certified", "index", "auto"] = "auto"
    seed: int = 0
    sharp_weight: float = Field(0.95, gt=0, le=1)
    single_pr: float = Field(1.5, ge=1)
    global_frac: float = Field(0.1, ge=0)
    sweep: bool = True
    # automatic choice
    target: Literal["sharp", "blend"] | None = "sharp"
    fraction: float = Field(0.99, gt=0, le=1)
    blend_size: float = Field(5.0, ge=1)
    beta_min: PositiveFloat | None = None
    beta_max: PositiveFloat | None = None
    rtol: PositiveFloat = 0.01
    # sparse map: the beta of exact single-item recall (the Fenchel-Young margin)
    weighting: Literal["sparsemax", "entmax15", "entmax"] | None = None
    alpha: float | None = Field(None, gt=1, le=2, description="alpha of weighting='entmax'")


def _bar(total: int, progress: bool | None) -> Any:
    """A tqdm bar on stderr (None: only when stderr is a terminal; needs tqdm), or None."""
    import sys

    if not (sys.stderr.isatty() if progress is None else progress):
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(total=total, desc="tune", unit="run", file=sys.stderr, leave=False)


def _planned_runs(spec: TuneSpec) -> int:
    """Retrieval runs tune_beta makes: the sweep grid plus the bisection's evaluations (for a bar)."""
    runs = (len(spec.betas) if spec.betas else spec.n_betas) if spec.sweep else 0
    if spec.target is not None:
        span = math.log((spec.beta_max or 1e6) / (spec.beta_min or 1e-2))
        runs += 2 + max(0, math.ceil(math.log2(max(span / math.log1p(spec.rtol), 1.0))))
    return 1 + runs


def tune_beta(
    memory: DenseMemory, spec: TuneSpec | None = None, *, queries: Any = None, sources: Any = None,
    progress: bool | None = False,
) -> TuneReport:
    """Separation, predicted beta, a measured sweep and an automatic choice in one call.

    Parameters
    ----------
    memory : DenseMemory
        At least 2 stored patterns.
    spec : TuneSpec, optional
        All options (default ``TuneSpec()``).
    queries, sources : optional
        The user's query set (else queries are generated from ``spec``).
    progress : bool or None, default False
        A tqdm bar on stderr (None: only when stderr is a terminal).

    Returns
    -------
    TuneReport
        The sweep marks ``prediction.beta_target_separated`` as its predicted beta.
        With ``spec.weighting`` set, ``exact_recall`` holds
        :func:`densemem.tuning.exact_recall_beta` for ``spec.target_fraction``.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(8))
    >>> rep = t.tune_beta(mem, t.TuneSpec(n_betas=5, n_queries=16))
    >>> rep.choice.reached, len(rep.sweep.betas)
    (True, 5)
    """
    where = "tune_beta"
    memory = _check_memory(memory, where, minimum=2)
    spec = TuneSpec() if spec is None else spec
    if not isinstance(spec, TuneSpec):
        raise InputTypeError(f"{where}: `spec` must be a TuneSpec; got {type(spec).__name__}.")
    bar = _bar(_planned_runs(spec), progress)
    token = TICK.set(None if bar is None else (lambda: bar.update(1)))
    try:
        return _tune(memory, spec, queries, sources, bar)
    finally:
        TICK.reset(token)
        if bar is not None:
            bar.total = bar.n  # the bisection can stop early (goal met at an end of the range)
            bar.refresh()  # show the finished count before the bar is cleared
            bar.close()


def _tune(memory: DenseMemory, spec: TuneSpec, queries: Any, sources: Any, bar: Any) -> TuneReport:
    sep = separation(memory, index=spec.index, tol=spec.tol)
    if bar is not None:
        bar.update(1)
    pred = predict_beta(memory, radius=spec.radius, error_tol=spec.error_tol,
                        target_fraction=spec.target_fraction, separation_report=sep)
    common = dict(sources=sources, corruption=spec.corruption, level=spec.level, n_queries=spec.n_queries,
                  steps=spec.steps, method=spec.method, seed=spec.seed, sharp_weight=spec.sharp_weight)
    sweep = None
    if spec.sweep:
        sweep = sweep_beta(memory, queries, betas=spec.betas, n_betas=spec.n_betas, single_pr=spec.single_pr,
                           global_frac=spec.global_frac, predicted_beta=pred.beta_target_separated, **common)
    choice = None
    if spec.target is not None:
        choice = choose_beta(memory, queries, target=spec.target, fraction=spec.fraction,
                             blend_size=spec.blend_size, beta_min=spec.beta_min, beta_max=spec.beta_max,
                             rtol=spec.rtol, **common)
    exact = None
    if spec.weighting is not None:
        exact = exact_recall_beta(memory, weighting=spec.weighting, alpha=spec.alpha,
                                  fraction=spec.target_fraction, queries=queries, separation_report=sep)
    return TuneReport(separation=sep, prediction=pred, sweep=sweep, choice=choice, exact_recall=exact)
