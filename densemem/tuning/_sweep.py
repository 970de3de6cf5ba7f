"""Measured retrieval over a beta grid, and beta chosen by bisection in log beta.

Public names are re-exported by :mod:`densemem.tuning`.
"""

from __future__ import annotations

import contextvars
import math
from collections.abc import Callable
from typing import Any

import faiss
import numpy as np

from ..core import partial as P
from ..core.exact import exact_reduce
from ..core.candidates import CertifiedOptions
from ..core.rows import TableRows, finish
from ..core.steps import Steps, run_steps
from .._synthetic import corrupt

CORRUPTIONS = ("gaussian", "mask", "mix")  # the kinds of densemem._synthetic a sweep offers
from ._reports import BetaChoice, SweepReport
from ._theory import _check_memory
from .._validation import (
    as_rng,
    check_positive_fraction,
    check_beta,
    check_k,
    check_nonneg_float,
    check_positive_int,
    check_queries,
    unit_rows,
)
from ..dense import DenseMemory
from ..errors import InputValueError, UnknownIdError

__all__ = ["sweep_beta", "choose_beta", "METHODS"]

METHODS = ("exact", "certified", "index", "auto")  # DenseMemory.retrieve's methods
_TARGETS = ("sharp", "blend")


# ----------------------------------------------------------------- inputs
def _check_betas(betas: Any, where: str) -> np.ndarray:
    arr = np.asarray(betas) if not isinstance(betas, (str, bytes)) else np.asarray([betas])
    if arr.ndim != 1 or arr.size == 0 or arr.dtype.kind not in "fiu":
        raise InputValueError(
            f"{where}: `betas` must be a non-empty 1-D sequence of numbers > 0; got {betas!r:.80}."
        )
    b = arr.astype(np.float64)
    if not np.all(np.isfinite(b)) or np.any(b <= 0):
        raise InputValueError(f"{where}: every entry of `betas` must be a finite number > 0; got {b.tolist()!r:.80}.")
    if np.any(np.diff(b) <= 0):
        raise InputValueError(f"{where}: `betas` must be strictly increasing; got {b.tolist()!r:.80}.")
    return b


def default_betas(memory: DenseMemory, n_betas: int = 25) -> np.ndarray:
    """Log-spaced grid ``geomspace(1e-2, 1e4, n_betas) / M^2`` (beta * M^2 is scale-free)."""
    m2 = max(memory.max_norm, 1e-30) ** 2
    return np.geomspace(1e-2, 1e4, n_betas) / m2


def _check_level(corruption: Any, level: Any, where: str) -> float:
    if corruption not in CORRUPTIONS:
        raise InputValueError(f"{where}: `corruption` must be one of {', '.join(CORRUPTIONS)}; got {corruption!r}.")
    v = check_nonneg_float(level, name="level", where=where)
    if corruption == "mask" and v >= 1:
        raise InputValueError(f"{where}: `level` (masked fraction) must be in [0, 1); got {level!r}.")
    if corruption == "mix" and v > 1:
        raise InputValueError(f"{where}: `level` (mixing weight) must be in [0, 1]; got {level!r}.")
    return v


def _source_ids(memory: DenseMemory, sources: Any, n_q: int, where: str) -> np.ndarray:
    try:
        rows = memory.positions(sources)
    except UnknownIdError as exc:
        raise UnknownIdError(f"{where}: `sources` names an id the memory does not hold ({exc}).") from None
    if rows.shape != (n_q,):
        raise InputValueError(f"{where}: `sources` must give one id per query ({n_q}); got {rows.size}.")
    return memory.ids[rows]


def _make_queries(
    memory: DenseMemory, queries: Any, sources: Any, opts: dict[str, Any], where: str
) -> tuple[np.ndarray, np.ndarray | None, dict[str, Any]]:
    """Validated (and, under ``normalize``, unit) queries, their source ids and a description."""
    if queries is None:
        if sources is not None:
            raise InputValueError(f"{where}: `sources` is only used with `queries`; got sources without queries.")
        level = _check_level(opts["corruption"], opts["level"], where)
        n_q = check_positive_int(opts["n_queries"], name="n_queries", where=where)
        rng = as_rng(opts["seed"], where=where)
        n = len(memory)
        rows = rng.choice(n, size=n_q, replace=n_q > n)
        rivals = _rivals(memory.patterns, rows) if opts["corruption"] == "mix" else None
        x = memory.patterns
        q = corrupt(x[rows], opts["corruption"], level, rng,
                    rivals=None if rivals is None else x[rivals]).astype(np.float32)
        src: np.ndarray | None = memory.ids[rows]
        seed = opts["seed"] if opts["seed"] is None or isinstance(opts["seed"], int) else repr(opts["seed"])
        info = {"queries": "generated", "corruption": opts["corruption"], "level": level, "seed": seed}
    else:
        q, _ = check_queries(queries, where=where, dim=memory.dim)
        q = q.copy()
        src = None if sources is None else _source_ids(memory, sources, q.shape[0], where)
        info = {"queries": "given", "corruption": None, "level": None, "seed": None}
    if memory.normalize:
        norms = np.linalg.norm(q, axis=1)
        if np.any(norms == 0):
            raise InputValueError(
                f"{where}: query row {int(np.flatnonzero(norms == 0)[0])} has zero norm and cannot be normalized."
            )
        q = (q / norms[:, None]).astype(np.float32)
    return q, src, {**info, "n_queries": int(q.shape[0])}


def _rivals(x: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Row number of the nearest rival (inner product, not the row itself) of each ``x[rows]``."""
    _, pos = faiss.knn(np.ascontiguousarray(x[rows]), x, 2, metric=faiss.METRIC_INNER_PRODUCT)
    return np.where(pos[:, 0] != rows, pos[:, 0], pos[:, 1])


# ---------------------------------------------------------------- measure
def _one_beta(memory: DenseMemory, q: np.ndarray, beta: float, run: dict[str, Any], k: int) -> Steps:
    """Retrieve ``q`` at ``beta``; each step's info carries the entropy and PR of its weights.

    "exact" and "auto": one exact pass per step gives the states, the top list
    and (from the same partial's moments) the statistics of all N weights; auto
    takes it because the statistics need every row anyway, so no candidate
    path can be cheaper. "certified" and "index": the asked path gives the
    answers and a pass without the weighted sum gives the statistics. The step
    loop keeps, per query, the info of its last update.
    """
    x, ids = memory.patterns, memory.ids
    cert = CertifiedOptions(tile_mib=memory.tile_mib)  # retrieve's defaults
    index = (lambda: memory._fresh_index(where="sweep_beta")) if run["method"] == "index" else None
    rows = TableRows(x, ids, memory.max_norm, run["method"], memory.tile_mib, memory.n_threads, max(k, 32), index)

    def stats(states: np.ndarray, kk: int, acc: bool) -> P.Finished:
        part = exact_reduce(states, x, beta, k=kk, tile_mib=memory.tile_mib, n_threads=memory.n_threads,
                            need_acc=acc, moments=True)
        return P.finish(part)

    def one_pass(states: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        if run["method"] in ("exact", "auto"):
            fin = stats(states, k, True)
            assert fin.states is not None
            new, top_ids, top_w = fin.states, ids[fin.top_i], fin.top_w
        else:
            got, top_ids = finish(rows.reduce(states, beta, k=k, need_acc=True, cert=cert))  # misses: fill ids
            assert got.states is not None
            new, top_w = got.states, got.top_w
            fin = stats(states, 0, False)
        return new, top_ids, top_w, {"entropy": fin.entropy, "participation": fin.participation}

    if memory.normalize:  # as DenseMemory.retrieve does with its queries
        q = unit_rows(q, where="sweep_beta", what="query")
    return run_steps(one_pass, q, steps=run["steps"], tol=run["tol"], max_norm=memory.max_norm, k=k)


def _measure(memory: DenseMemory, q: np.ndarray, src: np.ndarray | None, beta: float, run: dict[str, Any],
             geometry: tuple[np.ndarray, float]) -> dict[str, np.ndarray]:
    """Everything the sweep records for one beta, per query."""
    res = _one_beta(memory, q, beta, run, run["k"])
    states = np.ascontiguousarray(res.states, dtype=np.float32)
    energy = memory.energy(states, beta)
    d2, _ = faiss.knn(states, memory.patterns, 1, metric=faiss.METRIC_L2)
    mean, spread = geometry
    d_mean = np.linalg.norm(states.astype(np.float64) - mean, axis=1)
    pr = res.info["participation"]
    kind = np.where(pr < run["single_pr"], 0, np.where(d_mean <= run["global_frac"] * spread, 2, 1))
    correct = None if src is None else res.ids[:, 0] == src
    return {
        "top_ids": res.ids, "top_weights": res.weights, "entropy": res.info["entropy"], "participation": pr,
        "nearest": np.sqrt(np.maximum(d2[:, 0].astype(np.float64), 0.0)), "kind": kind.astype(np.int8),
        "energy": np.asarray(energy, dtype=np.float64), "correct": correct,
        "sharp": (res.weights[:, 0] >= run["sharp_weight"]) & (True if correct is None else correct),
    }


def _check_run(memory: DenseMemory, opts: dict[str, Any], where: str) -> dict[str, Any]:
    if opts["method"] not in METHODS:
        raise InputValueError(f"{where}: `method` must be one of {', '.join(METHODS)}; got {opts['method']!r}.")
    n = len(memory)
    run = {
        "steps": check_positive_int(opts["steps"], name="steps", where=where),
        "tol": check_nonneg_float(opts["tol"], name="tol", where=where),
        "k": min(10, n) if opts.get("k") is None else check_k(opts["k"], n=n, where=where),
        "method": opts["method"],
        "sharp_weight": check_positive_fraction(opts["sharp_weight"], name="sharp_weight", where=where),
        "single_pr": check_nonneg_float(opts.get("single_pr", 1.5), name="single_pr", where=where),
        "global_frac": check_nonneg_float(opts.get("global_frac", 0.1), name="global_frac", where=where),
    }
    if run["single_pr"] < 1:
        raise InputValueError(f"{where}: `single_pr` must be a number >= 1; got {opts['single_pr']!r}.")
    return run


def _geometry(memory: DenseMemory) -> tuple[np.ndarray, float]:
    """Mean of the stored patterns and their RMS distance from it."""
    x = memory.patterns.astype(np.float64)
    mean = x.mean(axis=0)
    return mean, float(np.sqrt(np.mean(np.sum((x - mean) ** 2, axis=1))))


# ------------------------------------------------------------------ sweep
def sweep_beta(
    memory: DenseMemory,
    queries: Any = None,
    *,
    sources: Any = None,
    betas: Any = None,
    n_betas: int = 25,
    corruption: str = "gaussian",
    level: float = 0.1,
    n_queries: int = 256,
    steps: int = 1,
    tol: float = 1e-6,
    k: int | None = None,
    method: str = "auto",
    sharp_weight: float = 0.95,
    single_pr: float = 1.5,
    global_frac: float = 0.1,
    seed: Any = 0,
    predicted_beta: float | None = None,
) -> SweepReport:
    """Retrieve a query set over a grid of betas and record how recall behaves.

    Parameters
    ----------
    memory : DenseMemory
    queries : array-like of shape (n_queries, dim), optional
        The user's queries. Default: ``n_queries`` corrupted copies of stored
        patterns drawn with ``seed`` (see ``corruption``).
    sources : sequence of ids, optional
        With ``queries``: the id each query should retrieve (enables accuracy).
    betas : sequence of float, optional
        Strictly increasing grid. Default ``geomspace(1e-2, 1e4, n_betas) / M^2``.
    corruption : {"gaussian", "mask", "mix"}, default "gaussian"
        Generated queries: Gaussian noise of norm about ``level * ||x||``;
        a fraction ``level`` of coordinates set to 0; or
        ``(1 - level) x + level x_rival`` with the nearest rival.
    level : float, default 0.1
    steps, tol, k, method
        Passed to :meth:`DenseMemory.retrieve` (``k``: top items kept per
        query; ``method`` default "auto", as there). Entropy and
        participation ratio are always computed exactly over every stored row.
    sharp_weight : float, default 0.95
        Top weight a sharp retrieval needs.
    single_pr, global_frac : float
        Class thresholds (below).
    predicted_beta : float, optional
        Stored in the report to be marked on the plot.

    Returns
    -------
    SweepReport

    Notes
    -----
    Per query and beta, with ``p`` the weights of the last update (the ones
    that form the returned state): top-1 correct (heaviest id == source);
    top weight ``max p``; entropy ``H = -sum p ln p`` (all N weights, exact,
    tiled); blend size ``exp(H)``; participation ratio ``1 / sum p^2``;
    distance of the state to its nearest stored pattern (faiss L2); energy.
    Each query's state is classed as **single** when the participation ratio
    is below ``single_pr`` (default 1.5: two equal items give 2), else
    **global** when it lies within ``global_frac * s`` of the mean of the
    stored patterns (``s``: RMS distance of the patterns from their mean),
    else **metastable** (a blend of a subset). With one step the top-1 item is
    the best-scoring pattern whatever beta is, so accuracy is flat in beta;
    the sharp fraction (top weight >= ``sharp_weight`` and top-1 correct)
    is what rises with beta. The report keeps the per-beta
    means and fractions, and per query the entropy, top list and class.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(4))
    >>> rep = t.sweep_beta(mem, np.eye(4), sources=[0, 1, 2, 3], betas=[0.01, 50.0])
    >>> rep.fraction_global.tolist(), rep.fraction_single.tolist()
    ([1.0, 0.0], [0.0, 1.0])
    """
    where = "sweep_beta"
    memory = _check_memory(memory, where)
    opts = dict(corruption=corruption, level=level, n_queries=n_queries, seed=seed, steps=steps, tol=tol, k=k,
                method=method, sharp_weight=sharp_weight, single_pr=single_pr, global_frac=global_frac)
    run = _check_run(memory, opts, where)
    grid = default_betas(memory, check_positive_int(n_betas, name="n_betas", where=where)) if betas is None \
        else _check_betas(betas, where)
    q, src, info = _make_queries(memory, queries, sources, opts, where)
    geometry = _geometry(memory)
    per = []
    for b in grid:
        per.append(_measure(memory, q, src, float(b), run, geometry))
        _ticked()
    return _sweep_report(grid, per, src, {**info, **run, "n_patterns": len(memory)}, predicted_beta)


def _sweep_report(grid: np.ndarray, per: list[dict[str, Any]], src: np.ndarray | None,
                  settings: dict[str, Any], predicted_beta: float | None) -> SweepReport:
    def mean(key: str, f: Callable[[np.ndarray], np.ndarray] = lambda a: a) -> np.ndarray:
        return np.array([float(np.mean(f(r[key]))) for r in per])

    kind = np.stack([r["kind"] for r in per])
    return SweepReport(
        betas=grid,
        accuracy=np.full(len(grid), np.nan) if src is None else mean("correct"),
        sharp_fraction=mean("sharp"),
        top_weight=mean("top_weights", lambda a: a[:, 0]),
        blend_size=mean("entropy", np.exp),
        participation=mean("participation"),
        nearest_distance=mean("nearest"),
        fraction_single=(kind == 0).mean(axis=1),
        fraction_metastable=(kind == 1).mean(axis=1),
        fraction_global=(kind == 2).mean(axis=1),
        energy=mean("energy"),
        entropy=np.stack([r["entropy"] for r in per]),
        top_weights=np.stack([r["top_weights"] for r in per]),
        top_ids=np.stack([r["top_ids"] for r in per]),
        kind=kind,
        source_ids=src,
        settings=settings,
        predicted_beta=None if predicted_beta is None else float(predicted_beta),
    )


# ------------------------------------------------------------ choose beta
#: A progress tick set by :func:`densemem.tuning.tune_beta` for one call (None: no bar).
TICK: contextvars.ContextVar[Callable[[], None] | None] = contextvars.ContextVar("densemem_tune_tick", default=None)


def _ticked() -> None:
    tick = TICK.get()
    if tick is not None:
        tick()


def _bisect(f: Callable[[float], float], lo: float, hi: float, rtol: float, up: Callable[[float], bool],
            log: list[tuple[float, float]]) -> tuple[float, float]:
    """Shrink [lo, hi] in log beta, keeping ``up(f(hi))`` true and ``up(f(lo))`` false."""
    while hi / lo > 1.0 + rtol:
        mid = math.sqrt(lo * hi)
        v = f(mid)
        log.append((mid, v))
        if up(v):
            hi = mid
        else:
            lo = mid
    return lo, hi


def choose_beta(
    memory: DenseMemory,
    queries: Any = None,
    *,
    sources: Any = None,
    target: str = "sharp",
    fraction: float = 0.99,
    sharp_weight: float = 0.95,
    blend_size: float = 5.0,
    beta_min: float | None = None,
    beta_max: float | None = None,
    rtol: float = 0.01,
    corruption: str = "gaussian",
    level: float = 0.1,
    n_queries: int = 256,
    steps: int = 1,
    tol: float = 1e-6,
    method: str = "auto",
    seed: Any = 0,
) -> BetaChoice:
    """Choose beta by bisection in log beta on a monotone measured quantity.

    Parameters
    ----------
    memory : DenseMemory
    queries, sources, corruption, level, n_queries, seed
        The query set, as for :func:`sweep_beta`.
    target : {"sharp", "blend"}, default "sharp"
        "sharp": the smallest beta at which at least ``fraction`` of the
        queries have top weight ``>= sharp_weight`` and (with sources) the
        right top-1 item. "blend": the beta whose mean effective blend size
        ``exp(H)`` is closest to ``blend_size``.
    fraction : float in (0, 1], default 0.99
    sharp_weight : float in (0, 1], default 0.95
    blend_size : float in [1, n_patterns], default 5.0
    beta_min, beta_max : float, optional
        Search range; default ``1e-2 / M^2`` and ``1e6 / M^2``.
    rtol : float, default 0.01
        Stop when ``hi / lo <= 1 + rtol``: the answer is within a factor
        ``1 + rtol`` of the exact crossing.
    steps, tol, method
        Passed to :meth:`DenseMemory.retrieve`.

    Returns
    -------
    BetaChoice

    Notes
    -----
    With ``steps=1`` both quantities are monotone in beta, so bisection finds
    the crossing: the top weight ``1 / sum_j exp(beta (s_j - s_max))`` never
    falls as beta grows and the top-1 item does not depend on beta; the
    entropy never rises (``dH/dbeta = -beta Var_p(s)``, derived identity),
    so neither does the mean blend size. With ``steps > 1`` the same search
    runs but monotonicity is not guaranteed. Sharp: returns the upper end of
    the final bracket (a beta known to meet the goal). Blend: returns the end
    whose blend size is closer to the goal.

    Examples
    --------
    >>> import numpy as np, densemem, densemem.tuning as t
    >>> mem = densemem.DenseMemory.from_array(np.eye(3))
    >>> ch = t.choose_beta(mem, np.eye(3), sources=[0, 1, 2])
    >>> ch.reached, bool(abs(ch.beta - np.log(2 * 19)) / np.log(2 * 19) < 0.02)
    (True, True)
    """
    where = "choose_beta"
    memory = _check_memory(memory, where)
    if target not in _TARGETS:
        raise InputValueError(f"{where}: `target` must be 'sharp' or 'blend'; got {target!r}.")
    opts = dict(corruption=corruption, level=level, n_queries=n_queries, seed=seed, steps=steps, tol=tol, k=1,
                method=method, sharp_weight=sharp_weight)
    run = _check_run(memory, opts, where)
    m2 = max(memory.max_norm, 1e-30) ** 2
    lo = 1e-2 / m2 if beta_min is None else check_beta(beta_min, name="beta_min", where=where)
    hi = 1e6 / m2 if beta_max is None else check_beta(beta_max, name="beta_max", where=where)
    if lo >= hi:
        raise InputValueError(f"{where}: `beta_min` must be below `beta_max`; got {lo!r} and {hi!r}.")
    rtol = check_nonneg_float(rtol, name="rtol", where=where, strict=True)
    if target == "sharp":
        goal = check_positive_fraction(fraction, name="fraction", where=where)
    else:
        goal = check_nonneg_float(blend_size, name="blend_size", where=where)
        if not 1.0 <= goal <= len(memory):
            raise InputValueError(
                f"{where}: `blend_size` must be in [1, {len(memory)}] (1 to the number of stored patterns); "
                f"got {blend_size!r}."
            )
    q, src, _ = _make_queries(memory, queries, sources, opts, where)
    if target == "sharp":
        return _choose_sharp(memory, q, src, run, lo, hi, rtol, goal)
    return _choose_blend(memory, q, run, lo, hi, rtol, goal)


def _choose_sharp(memory: DenseMemory, q: np.ndarray, src: np.ndarray | None, run: dict[str, Any],
                  lo: float, hi: float, rtol: float, goal: float) -> BetaChoice:
    def frac(b: float) -> float:
        _ticked()
        res = memory.retrieve(q, b, steps=run["steps"], tol=run["tol"], k=1, method=run["method"],
                              return_energy=False)
        ok = res.top_weights[:, 0] >= run["sharp_weight"]
        return float(np.mean(ok if src is None else ok & (res.top_ids[:, 0] == src)))

    log = [(hi, frac(hi))]
    if log[0][1] < goal:
        return BetaChoice("sharp", None, False, log[0][1], goal, (lo, hi), rtol, log,
                          f"the goal is not met even at beta_max = {hi:.4g}")
    log.append((lo, frac(lo)))
    if log[1][1] >= goal:
        return BetaChoice("sharp", lo, True, log[1][1], goal, (lo, lo), rtol, log, "met already at beta_min")
    lo, hi = _bisect(frac, lo, hi, rtol, lambda v: v >= goal, log)
    value = next(v for b, v in reversed(log) if b == hi)
    return BetaChoice("sharp", hi, True, value, goal, (lo, hi), rtol, log, "bisection in log beta")


def _choose_blend(memory: DenseMemory, q: np.ndarray, run: dict[str, Any], lo: float, hi: float,
                  rtol: float, goal: float) -> BetaChoice:
    def size(b: float) -> float:
        _ticked()
        return float(np.mean(np.exp(_one_beta(memory, q, b, run, 1).info["entropy"])))

    log = [(lo, size(lo)), (hi, size(hi))]
    if log[0][1] <= goal or log[1][1] >= goal:
        b, v = log[0] if log[0][1] <= goal else log[1]
        note = "blend already smaller at beta_min" if b == lo else "blend still larger at beta_max"
        return BetaChoice("blend", b, abs(v - goal) <= 1e-9 * goal, v, goal, (lo, hi), rtol, log, note)
    lo, hi = _bisect(size, lo, hi, rtol, lambda v: v <= goal, log)
    val = dict(log)
    b = lo if abs(val[lo] - goal) <= abs(val[hi] - goal) else hi
    return BetaChoice("blend", b, True, val[b], goal, (lo, hi), rtol, log, "bisection in log beta")
