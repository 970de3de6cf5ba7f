"""PNG plot of measured capacities beside the published asymptotic curves (private).

matplotlib is optional: imported inside :func:`plot_curve`; missing -> MissingExtraError.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from ._models import parse_model
from ._report import CapacityCurve
from ._theory import curves_for
from ..errors import InputTypeError, MissingExtraError


def _flip_level(corruption: str) -> float | None:
    kind, _, level = corruption.partition(":")
    return float(level) if kind == "flip" and level else None


def plot_curve(curve: Any, path: Any, *, title: str | None = None) -> Path:
    """Draw `curve` (a CapacityCurve) to the PNG `path`; returns the path."""
    where = "plot_capacity"
    if not isinstance(curve, CapacityCurve):
        raise InputTypeError(
            f"{where}: `table` must be the CapacityCurve that capacity_curve returns; got "
            f"{type(curve).__name__}."
        )
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise MissingExtraError(
            f"{where}: drawing needs matplotlib; install it with: pip install densemem[plot]"
        ) from None
    fig, ax = plt.subplots(figsize=(12, 6))
    groups: dict[tuple[str, str], list[Any]] = {}
    for r in curve.reports:
        groups.setdefault((r.model, r.corruption, r.scope), []).append(r)
    for j, ((label, corruption, scope), reps) in enumerate(groups.items()):
        color = f"C{j % 10}"
        reps = sorted(reps, key=lambda r: r.dim)
        dims = np.array([r.dim for r in reps], float)
        caps = np.array([max(r.capacity, 0.5) for r in reps], float)
        per = "every pattern of a set" if scope == "all" else "per probed pattern"
        capped = np.array([r.capped for r in reps])
        tag = f"{label} measured ({reps[0].success}, {per}, corruption {corruption})"
        if (~capped).any():  # only searches that found a failing count are measured capacities
            ax.plot(dims[~capped], caps[~capped], "o-", color=color, label=tag)
        if capped.any():  # the search cap passed: a lower bound, drawn apart and never joined to the line
            ax.plot(dims[capped], caps[capped], "^", color=color, ms=9, mfc="none", linestyle="none",
                    label=f"{label}: search cap reached (capacity is at least this)")
        _draw_theory(ax, label, corruption, dims, color)
    ax.set_yscale("log")
    ax.set_xlabel("dimension / units N")
    ax.set_ylabel("capacity (patterns)")
    ax.set_title(title or "Capacity: measured (dots), search cap reached (open triangles), "
                          "published asymptotic (dashed)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=6.5, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    path = Path(path)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _draw_theory(ax: Any, label: str, corruption: str, dims: np.ndarray, color: str) -> None:
    try:
        model = parse_model(label if not label.startswith("poly") else f"poly:{label[4:]}", "")
    except ValueError:
        return
    if dims.size == 0:
        return
    grid = np.linspace(max(dims.min(), 3.0), dims.max(), 100)
    styles = ("--", ":", "-.")
    for k, c in enumerate(curves_for(model.kind, model.param, _flip_level(corruption))):
        ax.plot(grid, np.exp(c.log_capacity(grid)), styles[k % 3], color=color, alpha=0.7,
                lw=1.2, label=c.label.replace(" (from memory)", ""))
