"""Choosing beta: separation of the stored patterns, predicted betas, a measured sweep, bisection,
and the beta of exact single-item recall under a sparse map.

:func:`tune_beta` runs them all from one :class:`TuneSpec`; each report is a
frozen dataclass with ``to_dict()``.
"""

from ._reports import (
    BetaChoice,
    BetaPrediction,
    SeparationReport,
    SweepReport,
    TuneReport,
    format_report,
    plot_sweep,
    tune_text,
    verdict,
)
from ._sparse import ExactRecallReport, exact_recall_beta
from ._sweep import choose_beta, sweep_beta
from ._theory import predict_beta, separation
from ._tune import TuneSpec, tune_beta

__all__ = [
    "BetaChoice",
    "BetaPrediction",
    "ExactRecallReport",
    "SeparationReport",
    "SweepReport",
    "TuneReport",
    "TuneSpec",
    "choose_beta",
    "exact_recall_beta",
    "format_report",
    "plot_sweep",
    "predict_beta",
    "separation",
    "sweep_beta",
    "tune_beta",
    "tune_text",
    "verdict",
]
