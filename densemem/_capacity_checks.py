"""Argument checks of the capacity experiments (private; used by densemem.capacity).

Each check names the public function (``where``) and the argument, says what was expected
and echoes what came.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from typing import Any

import numpy as np

from densemem import _capacity_models as cm
from densemem._capacity_search import CI_METHODS
from densemem._validation import check_nonneg_float, check_positive_int
from densemem.errors import InputTypeError, InputValueError, MissingExtraError


def choice(value: Any, name: str, options: Sequence[str], where: str) -> str:
    if not isinstance(value, str) or value not in options:
        opts = ", ".join(repr(o) for o in options)
        raise InputValueError(f"{where}: `{name}` must be one of {opts}; got {value!r}.")
    return value


def check_corruption(value: Any, where: str, name: str = "corruption") -> tuple[str, float] | None:
    """None, ("flip"|"mask", fraction in [0, 1]), ("gauss", sigma >= 0), or "kind:level"."""
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
            f"('gauss', sigma) (or a string like 'flip:0.1'); got {value!r}."
        )
    kind, level = value
    level = check_nonneg_float(level, name=f"{name} level", where=where)
    if kind != "gauss" and level > 1:
        raise InputValueError(f"{where}: the {kind} fraction must be in [0, 1]; got {level!r}.")
    return kind, level


def progress_bar(progress: Any, total: int | None, desc: str, where: str) -> Any:
    if progress is None:
        progress = sys.stderr.isatty()
    if not isinstance(progress, bool):
        raise InputTypeError(f"{where}: `progress` must be True, False or None; got {progress!r}.")
    if not progress:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError:
        raise MissingExtraError(
            f"{where}: progress bars need tqdm; install it with: pip install densemem[progress]"
        ) from None
    return tqdm(total=total, desc=desc, file=sys.stderr, leave=False)


def setup(where: str, model: Any, dim: Any, patterns: Any, corruption: Any, damage: Any,
           success: Any, eps: Any, steps: Any, mode: Any, max_probes: Any, seed: Any,
           ci: Any, confidence: Any) -> tuple[cm.Model, cm.Setup]:
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
        seed = int(np.random.SeedSequence().entropy % (2**63))
    seed = check_positive_int(seed, name="seed", where=where, minimum=0)
    choice(ci, "ci", CI_METHODS, where)
    confidence = check_nonneg_float(confidence, name="confidence", where=where, strict=True)
    if confidence >= 1:
        raise InputValueError(f"{where}: `confidence` must be in (0, 1); got {confidence!r}.")
    out = cm.Setup(
        source=source, corruption=check_corruption(corruption, where), damage=damage,
        success=success, eps=eps, steps=steps, mode=choice(mode, "mode", cm.MODES, where),
        max_probes=check_positive_int(max_probes, name="max_probes", where=where), seed=seed)
    return m, out


def corruption_tag(c: tuple[str, float] | None) -> str:
    return "none" if c is None else f"{c[0]}:{c[1]:g}"
