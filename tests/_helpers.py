"""Plain helper functions shared by several test files (invented test data only).

Import with ``from _helpers import unit_rows_f32, noisy_unit_copies``: pytest puts this folder
on ``sys.path`` for the test files (rootdir-relative "prepend" import mode, no __init__.py).
"""

from __future__ import annotations

import numpy as np


def unit_rows_f32(a: np.ndarray) -> np.ndarray:
    """Rows of ``a`` scaled to unit L2 norm, as float32.

    >>> unit_rows_f32(np.array([[3.0, 4.0]])).tolist()
    [[0.6000000238418579, 0.800000011920929]]
    """
    return (a / np.linalg.norm(a, axis=1, keepdims=True)).astype(np.float32)


def noisy_unit_copies(rng: np.random.Generator, x: np.ndarray, rows: np.ndarray, cos: np.ndarray) -> np.ndarray:
    """Unit queries at cosine ``cos`` to the unit stored rows ``x[rows]`` (invented test data).

    >>> x = np.eye(3, dtype=np.float32)
    >>> q = noisy_unit_copies(np.random.default_rng(0), x, np.array([1]), np.array([0.9]))
    >>> round(float(q[0] @ x[1]), 5), round(float(np.linalg.norm(q[0])), 5)
    (0.9, 1.0)
    """
    target = x[rows].astype(np.float64)
    g = rng.standard_normal(target.shape)
    g -= np.sum(g * target, axis=1, keepdims=True) * target
    g /= np.linalg.norm(g, axis=1, keepdims=True)
    c = np.asarray(cos, np.float64).reshape(-1, 1)
    return (c * target + np.sqrt(1.0 - c * c) * g).astype(np.float32)
