"""Frozen report objects of the capacity experiments and their CSV/JSON writers (private).

Re-exported by :mod:`densemem.capacity`.
"""

from __future__ import annotations

import csv
import io
import json
import os
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

from .._util import to_plain, write_atomic
from ..errors import InputTypeError, InputValueError

TABLE_COLUMNS = (
    "model", "dim", "capacity", "success_rate", "ci_low", "ci_high", "first_fail", "success_at_first_fail",
    "capped", "patterns", "corruption", "success", "scope", "delta", "n_trials", "seed",
)


def check_output_path(path: Any, *, overwrite: Any, name: str, where: str) -> Path:
    """`path` as a Path in an existing folder; an existing file only with ``overwrite=True``."""
    if not isinstance(path, (str, os.PathLike)):
        raise InputTypeError(f"{where}: `{name}` must be a str or os.PathLike; got {type(path).__name__}.")
    if not isinstance(overwrite, bool):
        raise InputTypeError(f"{where}: `overwrite` must be True or False; got {overwrite!r}.")
    p = Path(os.fspath(path))
    if not p.parent.is_dir():
        raise InputValueError(f"{where}: the folder of `{name}` does not exist: {str(p.parent)!r}.")
    if p.is_dir():
        raise InputValueError(f"{where}: `{name}` names a folder, not a file: {str(p)!r}.")
    if p.exists() and not overwrite:
        raise InputValueError(f"{where}: {str(p)!r} exists; pass overwrite=True to replace it.")
    return p


class _Plain:
    __slots__ = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python (JSON-ready) copy of every field."""
        return {f.name: to_plain(getattr(self, f.name)) for f in fields(self)}  # type: ignore[arg-type]


@dataclass(frozen=True, slots=True)
class CapacityReport(_Plain):
    """What :func:`densemem.capacity.estimate_capacity` returns.

    Attributes
    ----------
    model, dim, patterns, corruption, success, eps, delta : the experiment's settings
        (``corruption`` as "flip:0.1" or "none"; ``patterns`` "pm1", "unit", "gaussian" or
        "array").
    scope : {"pattern", "all"}
        What one judged unit is: a probed pattern, or a whole stored set (every pattern of a
        trial must succeed); ``probes`` then counts sets.
    capacity : int
        Largest count found whose success rate passed (>= 1 - delta); 0 if even one pattern
        failed.
    first_fail : int or None
        Smallest failing count above ``capacity`` (None when ``capped``).
    capped : bool
        Every count up to ``max_patterns`` passed: ``capacity`` is only a lower bound.
    counts, successes, probes, trials : tuple of int
        Every count evaluated, in search order, with its pooled successes, probes and trials.
    rates, ci_low, ci_high : tuple of float
        Success rate and its confidence interval at each evaluated count.
    confidence, ci, decide, n_trials, seed : the statistics settings.
    """

    model: str
    dim: int
    capacity: int
    first_fail: int | None
    capped: bool
    counts: tuple[int, ...]
    successes: tuple[int, ...]
    probes: tuple[int, ...]
    trials: tuple[int, ...]
    rates: tuple[float, ...]
    ci_low: tuple[float, ...]
    ci_high: tuple[float, ...]
    patterns: str
    corruption: str
    success: str
    eps: float
    delta: float
    confidence: float
    ci: str
    decide: str
    n_trials: int
    seed: int
    scope: str = "pattern"

    def _at(self, n: int | None) -> tuple[float, float, float] | None:
        if n is None or n not in self.counts:
            return None
        j = self.counts.index(n)
        return self.rates[j], self.ci_low[j], self.ci_high[j]

    def row(self) -> dict[str, Any]:
        """One table row: the capacity, its success rate and interval, the first failing count.

        ``success_rate`` is the success rate measured at ``capacity`` patterns;
        ``success_at_first_fail`` the (failing) success rate at ``first_fail``.
        When ``capped`` the search stopped at its cap: ``capacity`` is a lower bound.
        """
        at, fail = self._at(self.capacity), self._at(self.first_fail)
        return {
            "model": self.model, "dim": self.dim, "capacity": self.capacity,
            "success_rate": at[0] if at else None, "ci_low": at[1] if at else None,
            "ci_high": at[2] if at else None, "first_fail": self.first_fail,
            "success_at_first_fail": fail[0] if fail else None, "capped": self.capped,
            "patterns": self.patterns, "corruption": self.corruption, "success": self.success,
            "scope": self.scope, "delta": self.delta, "n_trials": self.n_trials, "seed": self.seed,
        }

    def __repr__(self) -> str:
        cap = f">={self.capacity} (capped)" if self.capped else str(self.capacity)
        return (f"CapacityReport(model={self.model!r}, dim={self.dim}, capacity={cap}, "
                f"success={self.success!r}, scope={self.scope!r}, corruption={self.corruption!r}, "
                f"evaluations={len(self.counts)})")


@dataclass(frozen=True, slots=True)
class CapacityCurve(_Plain):
    """What :func:`densemem.capacity.capacity_curve` returns: one report per (model, dim).

    ``rows()`` gives the table (columns ``TABLE_COLUMNS``); ``write_csv`` / ``write_json``
    save it; ``combine`` joins curves measured with different settings.
    """

    reports: tuple[CapacityReport, ...]

    def rows(self) -> list[dict[str, Any]]:
        """The table: one dict per (model, dim), in measurement order."""
        return [r.row() for r in self.reports]

    def write_csv(self, path: Any, *, overwrite: bool = False) -> Path:
        """Write the table as CSV (header = ``TABLE_COLUMNS``); returns the path.

        The file is written atomically (a temp file in the same folder, fsync, rename), so
        a reader never sees half a table. An existing file is refused unless `overwrite`.

        Examples
        --------
        >>> import os, tempfile
        >>> from densemem.capacity import capacity_curve
        >>> curve = capacity_curve(["hebbian"], [16], n_trials=1, min_probes=8)
        >>> out = curve.write_csv(os.path.join(tempfile.mkdtemp(), "c.csv"))
        >>> out.read_text().splitlines()[0].split(",")[:3]
        ['model', 'dim', 'capacity']
        """
        where = "CapacityCurve.write_csv"
        p = check_output_path(path, overwrite=overwrite, name="path", where=where)
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=list(TABLE_COLUMNS))
        w.writeheader()
        w.writerows(self.rows())
        return write_atomic(p, buf.getvalue(), overwrite=overwrite, where=where)

    def write_json(self, path: Any, *, overwrite: bool = False) -> Path:
        """Write the table and every report in full as JSON; returns the path.

        Atomic and refusing to replace an existing file unless `overwrite`, as
        :meth:`write_csv`.

        Examples
        --------
        >>> import json, os, tempfile
        >>> from densemem.capacity import capacity_curve
        >>> curve = capacity_curve(["hebbian"], [16], n_trials=1, min_probes=8)
        >>> out = curve.write_json(os.path.join(tempfile.mkdtemp(), "c.json"))
        >>> sorted(json.loads(out.read_text()))
        ['reports', 'rows']
        """
        where = "CapacityCurve.write_json"
        p = check_output_path(path, overwrite=overwrite, name="path", where=where)
        body = {"rows": self.rows(), "reports": [r.to_dict() for r in self.reports]}
        return write_atomic(p, json.dumps(body, indent=2), overwrite=overwrite, where=where)

    @classmethod
    def combine(cls, *curves: CapacityCurve) -> CapacityCurve:
        """One curve holding the reports of all `curves`, in order."""
        return cls(tuple(r for c in curves for r in c.reports))

    def __repr__(self) -> str:
        models = sorted({r.model for r in self.reports})
        return f"CapacityCurve(rows={len(self.reports)}, models={models})"


@dataclass(frozen=True, slots=True)
class RobustnessReport(_Plain):
    """What :func:`densemem.capacity.robustness_curve` returns.

    Attributes
    ----------
    model, dim, n_patterns, kind : the experiment (``kind``: what the level measures).
    levels : tuple of float
    rates, ci_low, ci_high : tuple of float
        Success rate at each level and its confidence interval.
    successes, probes : tuple of int
    success, corruption, confidence, ci, n_trials, seed : the settings (``corruption`` is the
        probe corruption applied at every level of a damage sweep, "none" if none).
    """

    model: str
    dim: int
    n_patterns: int
    kind: str
    levels: tuple[float, ...]
    rates: tuple[float, ...]
    ci_low: tuple[float, ...]
    ci_high: tuple[float, ...]
    successes: tuple[int, ...]
    probes: tuple[int, ...]
    success: str
    corruption: str
    confidence: float
    ci: str
    n_trials: int
    seed: int

    def rows(self) -> list[dict[str, Any]]:
        """One dict per level: level, rate, ci_low, ci_high, successes, probes."""
        return [
            {"level": lv, "rate": r, "ci_low": lo, "ci_high": hi, "successes": s, "probes": p}
            for lv, r, lo, hi, s, p in zip(self.levels, self.rates, self.ci_low, self.ci_high,
                                           self.successes, self.probes)
        ]

    def __repr__(self) -> str:
        body = ", ".join(f"{lv:g}:{r:.3f}" for lv, r in zip(self.levels, self.rates))
        return (f"RobustnessReport(model={self.model!r}, dim={self.dim}, "
                f"n_patterns={self.n_patterns}, kind={self.kind!r}, rates={{{body}}})")
