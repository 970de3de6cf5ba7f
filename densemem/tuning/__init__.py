"""Choosing beta: separation of the stored patterns, predicted betas, a measured sweep, bisection.

:func:`tune_beta` runs them all from one :class:`TuneSpec`; each report is a
frozen dataclass with ``to_dict()``.
"""

from ._tune import (
    BetaChoice,
    BetaPrediction,
    SeparationReport,
    SweepReport,
    TuneReport,
    TuneSpec,
    choose_beta,
    format_report,
    plot_sweep,
    predict_beta,
    separation,
    sweep_beta,
    tune_beta,
    tune_text,
)

__all__ = [
    "BetaChoice",
    "BetaPrediction",
    "SeparationReport",
    "SweepReport",
    "TuneReport",
    "TuneSpec",
    "choose_beta",
    "format_report",
    "plot_sweep",
    "predict_beta",
    "separation",
    "sweep_beta",
    "tune_beta",
    "tune_text",
]
