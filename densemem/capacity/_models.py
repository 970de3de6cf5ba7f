"""Models, pattern sources, corruption and one batched trial of the capacity experiments (private).

One *trial* at count K: draw K patterns, store them, probe the first B = min(K, max_probes)
of them (the patterns are i.i.d., so these are a uniform sample) through ONE retrieve call,
and judge each probe. Random streams are keyed by (seed, trial, stream), never by K, and
every draw has the prefix property (the first K rows of a draw do not depend on how many
rows are drawn), so the K-pattern memory of trial t holds the first K patterns of trial t's
pool: common random numbers across counts, which keeps the search's success curve smooth.

Streams: 0 patterns, 1 corruption positions / noise, 2 dynamics (async orders),
3 damage, 4 replacement values of masked binary coordinates.
"""

from __future__ import annotations

import numbers
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._synthetic import corrupt as synthetic_corrupt
from ..binary._memory import BinaryMemory, DenseBinaryMemory
from ..dense import DenseMemory
from ..errors import InputTypeError, InputValueError

PAIRWISE = ("hebbian", "storkey", "pseudo_inverse")
PATTERN_KINDS = ("pm1", "unit", "gaussian")
CORRUPTIONS = ("flip", "gaussian", "mask")  # kinds of densemem._synthetic
SUCCESS = ("fixed_point", "overlap", "top1")
SCOPES = ("pattern", "all")  # judge each probed pattern, or each stored set as a whole
DAMAGES = ("damage_units", "zero_weights", "zero_coords")
MODES = ("async", "sync")

MODEL_HELP = (
    "'hebbian', 'storkey', 'pseudo_inverse', 'exp', ('poly', n) with an integer n >= 2, "
    "('softmax', beta) with a finite beta > 0 (strings 'poly:3', 'softmax:50' also work), or "
    "a callable trial(n_patterns, rng) -> bool array"
)


@dataclass(frozen=True)
class Model:
    """A parsed model: kind in PAIRWISE + ('poly', 'exp', 'softmax', 'custom')."""

    kind: str
    param: float | None = None
    fn: Callable[[int, np.random.Generator], Any] | None = None

    @property
    def binary(self) -> bool:
        return self.kind not in ("softmax", "custom")

    @property
    def label(self) -> str:
        if self.kind == "poly":
            return f"poly{int(self.param)}"  # type: ignore[arg-type]
        if self.kind == "softmax":
            return f"softmax(beta={self.param:g})"
        if self.kind == "custom":
            return getattr(self.fn, "__name__", "custom")
        return self.kind


def _bad_model(model: Any, where: str) -> InputValueError:
    return InputValueError(f"{where}: `model` must be {MODEL_HELP}; got {model!r}.")


def parse_model(model: Any, where: str) -> Model:
    """Turn the user's model description into a :class:`Model`, or raise naming the options."""
    if callable(model):
        return Model("custom", fn=model)
    if isinstance(model, str):
        s = model.strip().lower()
        if s in PAIRWISE or s == "exp":
            return Model(s)
        name, sep, val = s.partition(":")
        if not sep and s.startswith("poly") and s[4:].isdigit():
            name, val = "poly", s[4:]
        try:
            value: Any = float(val) if name == "softmax" else int(val)
        except ValueError:
            raise _bad_model(model, where) from None
        model_t: Any = (name, value)
    elif isinstance(model, (tuple, list)) and len(model) == 2:
        model_t = tuple(model)
    else:
        raise _bad_model(model, where)
    name, value = model_t
    if name == "poly" and isinstance(value, numbers.Integral) and not isinstance(value, bool) \
            and value >= 2:
        return Model("poly", int(value))
    if name == "softmax" and isinstance(value, numbers.Real) and not isinstance(value, bool) \
            and np.isfinite(value) and value > 0:
        return Model("softmax", float(value))
    raise _bad_model(model, where)


@dataclass(frozen=True)
class Source:
    """Where patterns come from: a named distribution or rows of the user's array."""

    kind: str  # one of PATTERN_KINDS, or "array"
    dim: int
    rows: np.ndarray | None = None  # float64 copy of the user's array (never the original)

    @property
    def limit(self) -> int | None:
        return None if self.rows is None else int(self.rows.shape[0])

    def draw(self, rng: np.random.Generator, k: int) -> np.ndarray:
        """K patterns as float64 (K, dim); the first rows do not depend on K."""
        if self.kind == "pm1":
            return np.where(rng.random((k, self.dim)) < 0.5, 1.0, -1.0)
        if self.kind in ("gaussian", "unit"):
            x = rng.standard_normal((k, self.dim))
            if self.kind == "unit":
                x /= np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-300)
            return x
        assert self.rows is not None
        return self.rows[rng.permutation(self.rows.shape[0])[:k]]


def make_source(patterns: Any, dim: Any, binary: bool, where: str) -> Source:
    """Validate `patterns` (a kind name or an array) against `dim` and the model family."""
    from .._validation import as_float_matrix, check_positive_int

    if isinstance(patterns, str):
        if patterns not in PATTERN_KINDS:
            raise InputValueError(
                f"{where}: `patterns` must be one of 'pm1', 'unit', 'gaussian' or an array of "
                f"patterns to subsample; got {patterns!r}."
            )
        if binary and patterns != "pm1":
            raise InputValueError(
                f"{where}: binary models store -1/+1 patterns; `patterns` must be 'pm1' or a "
                f"-1/+1 (or 0/1) array for them; got {patterns!r}."
            )
        return Source(patterns, check_positive_int(dim, name="dim", where=where, minimum=2))
    rows, _ = as_float_matrix(patterns, name="patterns", where=where)
    rows = rows.astype(np.float64)  # a copy: the caller's array is never touched
    if dim is not None and check_positive_int(dim, name="dim", where=where) != rows.shape[1]:
        raise InputValueError(
            f"{where}: `dim` is {dim} but the `patterns` array has {rows.shape[1]} columns; "
            "pass dim=None or the array's width."
        )
    if binary:
        vals = np.unique(rows)
        if set(vals.tolist()) <= {0.0, 1.0}:
            rows = 2.0 * rows - 1.0
        elif not set(vals.tolist()) <= {-1.0, 1.0}:
            raise InputValueError(
                f"{where}: binary models need a -1/+1 (or 0/1) `patterns` array; found the "
                f"value {vals[~np.isin(vals, [-1.0, 0.0, 1.0])][0]!r}."
            )
    return Source("array", int(rows.shape[1]), rows)


@dataclass(frozen=True)
class Setup:
    """Everything a trial needs besides the model and the count (validated already)."""

    source: Source
    corruption: tuple[str, float] | None
    damage: tuple[str, float] | None
    success: str
    eps: float
    steps: int
    mode: str
    max_probes: int
    seed: int
    scope: str = "pattern"  # "all": a trial is one judged unit, every stored pattern probed
    where: str = "estimate_capacity"  # the public function, for errors raised during trials


def _stream(setup: Setup, trial: int, stream: int) -> np.random.Generator:
    return np.random.default_rng([setup.seed, trial, stream])


def corrupt(targets: np.ndarray, corruption: tuple[str, float] | None, binary: bool,
            rng_pos: np.random.Generator, rng_val: np.random.Generator) -> np.ndarray:
    """Corrupted copies of `targets` (B, d); `targets` is not modified.

    The kinds "flip", "mask" and "gaussian" of :mod:`densemem._synthetic` (one meaning
    across densemem): `rng_pos` chooses the coordinates (or draws the noise), `rng_val` the
    new values of masked binary coordinates.
    """
    if corruption is None:
        return targets.copy()
    kind, level = corruption
    return synthetic_corrupt(targets, kind, level, rng_pos, binary=binary, value_rng=rng_val).astype(
        targets.dtype, copy=False)


def _binary_memory(model: Model, stored: np.ndarray, setup: Setup, trial: int) -> Any:
    pm1 = stored.astype(np.int8)
    if model.kind in PAIRWISE:
        mem: Any = BinaryMemory(pm1, rule=model.kind)
        if setup.damage is not None:
            kind, level = setup.damage
            key = "units" if kind == "damage_units" else "weights"
            mem = mem.damaged(**{key: level}, seed=_stream(setup, trial, 3))
        return mem
    if model.kind == "poly":
        return DenseBinaryMemory(pm1, interaction="polynomial", degree=int(model.param))  # type: ignore[arg-type]
    return DenseBinaryMemory(pm1, interaction="exponential")


def _judge_binary(states: np.ndarray, targets: np.ndarray, stored: np.ndarray, setup: Setup) -> np.ndarray:
    if setup.success == "fixed_point":
        return (states == targets).all(axis=1)
    if setup.success == "overlap":
        return (states * targets).mean(axis=1) >= 1.0 - setup.eps
    ov = states @ stored.T  # top1: own overlap strictly above every other stored pattern's
    b = states.shape[0]
    own = ov[np.arange(b), np.arange(b)].copy()
    ov[np.arange(b), np.arange(b)] = -np.inf
    return own > ov.max(axis=1) if ov.shape[1] > 1 else np.ones(b, dtype=bool)


def _continuous(model: Model, stored: np.ndarray, probes: np.ndarray, targets: np.ndarray,
                setup: Setup) -> np.ndarray:
    k_all = stored.shape[0]
    mem = DenseMemory.from_array(stored, beta=float(model.param))  # type: ignore[arg-type]
    # k <= n_patterns - 1 (see the report: with k == rows in a tile the kernel's top list
    # aliases the exponentiated scores, so top_weights come out wrong)
    res = mem.retrieve(probes, steps=setup.steps, k=max(1, min(2, k_all - 1)),
                       return_energy=False, method="exact")
    b = probes.shape[0]
    if setup.success == "top1":  # a tie for the top weight counts as a failure
        if k_all == 1:
            return np.ones(b, dtype=bool)
        ok = res.top_ids[:, 0] == np.arange(b)
        second = res.top_weights[:, 1] if k_all > 2 else 1.0 - res.top_weights[:, 0]
        return ok & (res.top_weights[:, 0] > second)
    st = res.states.astype(np.float64)
    tnorm = np.linalg.norm(targets, axis=1)
    if setup.success == "fixed_point":  # relative distance to the stored pattern
        return np.linalg.norm(st - targets, axis=1) <= setup.eps * tnorm
    snorm = np.maximum(np.linalg.norm(st, axis=1), 1e-300)
    return np.einsum("ij,ij->i", st, targets) / (snorm * tnorm) >= 1.0 - setup.eps


def run_trial(model: Model, setup: Setup, k: int, trial: int) -> np.ndarray:
    """Success (bool) of every probe of trial `trial` with `k` stored patterns."""
    if model.kind == "custom":
        ok = np.asarray(model.fn(k, _stream(setup, trial, 0)))  # type: ignore[misc]
        if ok.ndim != 1 or ok.dtype != bool:
            raise InputTypeError(
                f"{setup.where}: a callable `model` must return a 1-D bool array (one "
                f"success per probe); got {ok.dtype} of shape {ok.shape}."
            )
        return ok
    x = setup.source.draw(_stream(setup, trial, 0), k)
    targets = x if setup.scope == "all" else x[: min(k, setup.max_probes)]
    probes = corrupt(targets, setup.corruption, model.binary, _stream(setup, trial, 1),
                     _stream(setup, trial, 4))
    stored = x
    if setup.damage is not None and setup.damage[0] == "zero_coords":
        d = x.shape[1]
        cut = _stream(setup, trial, 3).permutation(d)[: int(round(setup.damage[1] * d))]
        stored = x.copy()
        stored[:, cut] = 0.0
    if not model.binary:
        ok = _continuous(model, stored, probes, targets, setup)
    else:
        mem = _binary_memory(model, stored, setup, trial)
        res = mem.retrieve(probes.astype(np.int8), mode=setup.mode, steps=setup.steps,
                           seed=_stream(setup, trial, 2))
        ok = _judge_binary(res.states.astype(np.float64), targets, stored, setup)
    return np.array([ok.all()]) if setup.scope == "all" else ok


def trials_at(k: int, n_trials: int, min_probes: int, max_probes: int, scope: str = "pattern") -> int:
    """Trials run at count k: `n_trials`, raised so at least `min_probes` probes are judged.

    A trial probes min(k, max_probes) patterns, so small counts get more (cheap) trials
    instead of re-probing the same memory, which keeps the probes close to independent.
    With ``scope="all"`` a trial is one judged unit (a whole set), so `n_trials` trials run
    and `min_probes` does not apply.
    """
    if scope == "all":
        return n_trials
    return max(n_trials, -(-min_probes // min(k, max_probes)))


def pooled(model: Model, setup: Setup, k: int, n_trials: int) -> tuple[int, int]:
    """Successes and probes pooled over `n_trials` trials at count `k`."""
    ok = [run_trial(model, setup, k, t) for t in range(n_trials)]
    return int(sum(int(o.sum()) for o in ok)), int(sum(o.size for o in ok))
