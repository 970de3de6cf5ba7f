"""Argument checks of the capacity experiments (private; used by densemem.capacity).

Each check names the public function (``where``) and the argument, says what was expected
and echoes what came.
"""

from __future__ import annotations

import numbers
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import _models as cm
from ._search import CI_METHODS, DECISIONS
from .._validation import SEED_MAX, check_nonneg_float, check_positive_int, check_seed
from .._util import progress_bar as make_bar, stderr_is_tty
from ..errors import InputTypeError, InputValueError


def choice(value: Any, name: str, options: Sequence[str], where: str) -> str:
    if not isinstance(value, str) or value not in options:
        opts = ", ".join(repr(o) for o in options)
        raise InputValueError(f"{where}: `{name}` must be one of {opts}; got {value!r}.")
    return value


def check_corruption(value: Any, where: str, name: str = "corruption") -> tuple[str, float] | None:
    """None, ("flip"|"mask", fraction in [0, 1]), ("gaussian", sigma >= 0), or "kind:level"."""
    if value is None or value == "none":
        return None
    if isinstance(value, str):
        kind, _, level = value.partition(":")
        try:
            value = (kind, float(level))
        except ValueError:
            value = (kind, level)
    if not (isinstance(value, (tuple, list)) and len(value) == 2 and value[0] in cm.CORRUPTIONS):
        raise InputValueError(
            f"{where}: `{name}` must be None, ('flip', fraction), ('mask', fraction) or "
            f"('gaussian', sigma) (or a string like 'flip:0.1'); got {value!r}."
        )
    kind, level = value
    level = check_nonneg_float(level, name=f"{name} level", where=where)
    if kind != "gaussian" and level > 1:
        raise InputValueError(f"{where}: the {kind} fraction must be in [0, 1]; got {level!r}.")
    return kind, level


def one_d(value: Any, name: str, where: str, what: str) -> list[Any]:
    """A non-empty 1-D list, tuple, range or array as a list of Python objects."""
    items: Any = None
    if isinstance(value, np.ndarray) or (not isinstance(value, (str, bytes, Sequence))
                                         and hasattr(value, "__array__")):
        arr = np.asarray(value)
        items = arr.tolist() if arr.ndim == 1 else None
    elif isinstance(value, Sequence) and not isinstance(value, (str, bytes)):
        items = list(value)
    if not items:
        raise InputValueError(f"{where}: `{name}` must be a non-empty 1-D sequence or array of {what}; "
                              f"got {value!r}.")
    return items


def _items(value: Any, name: str, where: str, kind: type, plural: str, one: str) -> list[Any]:
    items = one_d(value, name, where, plural)
    for i, x in enumerate(items):
        if isinstance(x, bool) or not isinstance(x, kind):
            raise InputTypeError(f"{where}: every entry of `{name}` must be {one}; got {x!r} at position {i}.")
    return items


def int_items(value: Any, name: str, where: str) -> list[int]:
    """`value` as a non-empty list of Python ints (any 1-D sequence or integer array)."""
    return [int(x) for x in _items(value, name, where, numbers.Integral, "integers", "an integer")]


def real_items(value: Any, name: str, where: str) -> list[float]:
    """`value` as a non-empty list of Python floats (any 1-D sequence or numeric array)."""
    return [float(x) for x in _items(value, name, where, numbers.Real, "numbers", "a number")]


def check_progress(progress: Any, where: str) -> bool:
    if progress is None:
        progress = stderr_is_tty()
    if not isinstance(progress, bool):
        raise InputTypeError(f"{where}: `progress` must be True, False or None; got {progress!r}.")
    return progress


def progress_bar(progress: Any, total: int | None, desc: str, where: str) -> Any:
    return make_bar(total=total, desc=desc, show=check_progress(progress, where), where=where)


def setup(where: str, model: Any, dim: Any, patterns: Any, corruption: Any, damage: Any,
           success: Any, eps: Any, steps: Any, mode: Any, max_probes: Any, seed: Any,
           ci: Any, confidence: Any, scope: Any = "pattern") -> tuple[cm.Model, cm.Setup]:
    m = cm.parse_model(model, where)
    success = choice(success, "success", cm.SUCCESS, where)
    if m.kind == "custom":
        source = cm.Source("custom", check_positive_int(dim, name="dim", where=where))
    else:
        source = cm.make_source(patterns, dim, m.binary, where)
    if eps is None:
        eps = 0.05 if success == "overlap" else (1e-3 if not m.binary else 0.0)
    eps = check_nonneg_float(eps, name="eps", where=where)
    default_steps = 50 if m.binary else 1
    steps = default_steps if steps is None else check_positive_int(steps, name="steps", where=where)
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (SEED_MAX + 1))
    seed = check_seed(seed, where=where)
    choice(ci, "ci", CI_METHODS, where)
    confidence = check_nonneg_float(confidence, name="confidence", where=where, strict=True)
    if confidence >= 1:
        raise InputValueError(f"{where}: `confidence` must be in (0, 1); got {confidence!r}.")
    out = cm.Setup(
        source=source, corruption=check_corruption(corruption, where), damage=damage,
        success=success, eps=eps, steps=steps, mode=choice(mode, "mode", cm.MODES, where),
        max_probes=check_positive_int(max_probes, name="max_probes", where=where), seed=seed,
        scope=choice(scope, "scope", cm.SCOPES, where), where=where)
    return m, out


@dataclass(frozen=True, slots=True)
class CapacityPlan:
    """The checked arguments of one capacity search."""

    model: cm.Model
    setup: cm.Setup
    delta: float
    n_trials: int
    min_probes: int
    max_n: int
    ci: str
    confidence: float
    decide: str
    rel_tol: float
    progress: bool


def capacity_plan(where: str, model: Any, dim: Any, *, patterns: Any = "pm1", corruption: Any = None,
                  success: Any = "fixed_point", eps: Any = None, delta: Any = 0.05, n_trials: Any = 5,
                  min_probes: Any = 256, max_probes: Any = 256, seed: Any = 0, max_patterns: Any = 4096,
                  steps: Any = None, mode: Any = "async", ci: Any = "wilson", confidence: Any = 0.95,
                  decide: Any = "estimate", rel_tol: Any = 0.0, progress: Any = None,
                  scope: Any = "pattern") -> CapacityPlan:
    """Check every argument of :func:`densemem.capacity.estimate_capacity` (defaults match)."""
    m, st = setup(where, model, dim, patterns, corruption, None, success, eps, steps, mode,
                  max_probes, seed, ci, confidence, scope)
    delta = check_nonneg_float(delta, name="delta", where=where, strict=True)
    if delta >= 1:
        raise InputValueError(f"{where}: `delta` must be in (0, 1); got {delta!r}.")
    max_n = check_positive_int(max_patterns, name="max_patterns", where=where)
    if st.source.limit is not None:
        max_n = min(max_n, st.source.limit)
    return CapacityPlan(
        model=m, setup=st, delta=delta, n_trials=check_positive_int(n_trials, name="n_trials", where=where),
        min_probes=check_positive_int(min_probes, name="min_probes", where=where), max_n=max_n, ci=ci,
        confidence=float(confidence), decide=choice(decide, "decide", DECISIONS, where),
        rel_tol=check_nonneg_float(rel_tol, name="rel_tol", where=where),
        progress=check_progress(progress, where))


CAPACITY_OPTIONS = frozenset(capacity_plan.__kwdefaults__ or ())  # type: ignore[attr-defined]


@dataclass(frozen=True, slots=True)
class RobustnessPlan:
    """The checked arguments of one robustness sweep."""

    model: cm.Model
    base: cm.Setup
    kind: str
    levels: tuple[float, ...]
    n_patterns: int
    trials: int
    ci: str
    confidence: float
    progress: bool


def robustness_plan(where: str, model: Any, dim: Any, n_patterns: Any, *, levels: Any, kind: Any,
                    corruption: Any, patterns: Any, success: Any, eps: Any, n_trials: Any,
                    min_probes: Any, max_probes: Any, seed: Any, steps: Any, mode: Any, ci: Any,
                    confidence: Any, progress: Any) -> RobustnessPlan:
    """Check every argument of :func:`densemem.capacity.robustness_curve`."""
    kind = choice(kind, "kind", cm.CORRUPTIONS + cm.DAMAGES, where)
    if kind in cm.CORRUPTIONS and corruption is not None:
        raise InputValueError(
            f"{where}: with kind={kind!r} the levels are the corruption; pass corruption=None "
            f"(got {corruption!r}).")
    _check_kind_fits(where, kind, cm.parse_model(model, where))
    lv = _levels(where, kind, levels)
    n_patterns = check_positive_int(n_patterns, name="n_patterns", where=where)
    n_trials = check_positive_int(n_trials, name="n_trials", where=where)
    min_probes = check_positive_int(min_probes, name="min_probes", where=where)
    m, base = setup(where, model, dim, patterns, corruption, None, success, eps, steps, mode,
                    max_probes, seed, ci, confidence)
    if base.source.limit is not None and n_patterns > base.source.limit:
        raise InputValueError(
            f"{where}: `n_patterns` is {n_patterns} but the `patterns` array has only "
            f"{base.source.limit} rows.")
    return RobustnessPlan(
        model=m, base=base, kind=kind, levels=tuple(lv), n_patterns=n_patterns,
        trials=cm.trials_at(n_patterns, n_trials, min_probes, base.max_probes), ci=ci,
        confidence=float(confidence), progress=check_progress(progress, where))


def _check_kind_fits(where: str, kind: str, parsed: cm.Model) -> None:
    if kind in ("damage_units", "zero_weights") and parsed.kind not in cm.PAIRWISE:
        raise InputValueError(
            f"{where}: kind={kind!r} needs a pairwise binary model ('hebbian', 'storkey', "
            f"'pseudo_inverse'); got model {parsed.label!r}.")
    if kind == "zero_coords" and parsed.kind != "softmax":
        raise InputValueError(
            f"{where}: kind='zero_coords' needs the continuous ('softmax', beta) model; got "
            f"{parsed.label!r} (use kind='damage_units' for binary memories).")


def _levels(where: str, kind: str, levels: Any) -> list[float]:
    values = real_items(levels, "levels", where)
    if kind in cm.CORRUPTIONS:
        return [check_corruption((kind, x), where, name="levels")[1] for x in values]  # type: ignore[index]
    lv = [check_nonneg_float(x, name="levels", where=where) for x in values]
    if max(lv) > 1:
        raise InputValueError(f"{where}: damage `levels` must be fractions in [0, 1]; got {max(lv)!r}.")
    return lv


def corruption_tag(c: tuple[str, float] | None) -> str:
    return "none" if c is None else f"{c[0]}:{c[1]:g}"
