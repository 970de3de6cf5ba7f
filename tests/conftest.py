"""Shared fixtures: a seeded generator and scikit-learn's bundled digits set."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(12345)


@pytest.fixture(scope="session")
def digits() -> np.ndarray:
    """UCI optdigits test set as bundled with scikit-learn (1797 x 64, 0..16), float32."""
    from sklearn.datasets import load_digits

    return load_digits().data.astype(np.float32)


@pytest.fixture(scope="session")
def digits_unit(digits: np.ndarray) -> np.ndarray:
    """Digits rows L2-normalized (for inner-product / cosine comparisons)."""
    return digits / np.linalg.norm(digits, axis=1, keepdims=True)
