"""Capacity by seeded Monte Carlo over the public memories, beside the published asymptotic curves."""

from ._measure import (
    CapacityCurve,
    CapacityReport,
    CapacitySpec,
    RobustnessReport,
    capacity_curve,
    estimate_capacity,
    plot_capacity,
    robustness_curve,
)

__all__ = [
    "CapacityCurve",
    "CapacityReport",
    "CapacitySpec",
    "RobustnessReport",
    "capacity_curve",
    "estimate_capacity",
    "plot_capacity",
    "robustness_curve",
]
