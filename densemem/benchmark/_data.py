"""Benchmark data: generated, bundled or read vectors, and corrupted queries (private).

Generated sets (invented data, seeded):

* ``"unit"``: i.i.d. Gaussian rows scaled to unit norm (no structure at all).
* ``"clustered"``: a Gaussian mixture shaped like real embeddings: cluster sizes
  that fall off like a power law, centres sharing one common direction (the
  anisotropy of learned embeddings), and within-cluster noise with a decaying
  spectrum in a random basis.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._spec import GENERATED, BenchSpec
from .._synthetic import corrupt
from ..errors import InputValueError, MissingExtraError

__all__ = ["BenchData", "load_data", "sign_codes"]

_WHERE = "run_benchmark"
_CHUNK = 1 << 16


@dataclass(frozen=True, slots=True)
class BenchData:
    """Stored rows and queries of one run (float32, C-contiguous)."""

    name: str
    x: np.ndarray
    q: np.ndarray


def _unit(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = np.empty((n, d), dtype=np.float32)
    for a in range(0, n, _CHUNK):
        b = min(n, a + _CHUNK)
        g = rng.standard_normal((b - a, d), dtype=np.float32)
        x[a:b] = g / np.linalg.norm(g, axis=1, keepdims=True)
    return x


def _clustered(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    n_clusters = max(4, round(float(np.sqrt(n)) / 2))
    weights = rng.permutation(1.0 / np.arange(1, n_clusters + 1) ** 0.8)
    weights /= weights.sum()
    common = rng.standard_normal(d)
    common /= np.linalg.norm(common)
    centres = rng.standard_normal((n_clusters, d))
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    centres = (0.8 * centres + 0.6 * common).astype(np.float32)
    spread = rng.uniform(0.5, 1.0, n_clusters).astype(np.float32)
    spectrum = (1.0 + np.arange(d)) ** -0.5
    spectrum *= np.sqrt(d / np.sum(spectrum**2))  # noise norm about 1 whatever the spectrum
    basis = np.linalg.qr(rng.standard_normal((d, d)))[0]
    mix = (spectrum[:, None] * basis.T / np.sqrt(d)).astype(np.float32)
    labels = rng.choice(n_clusters, size=n, p=weights)
    x = np.empty((n, d), dtype=np.float32)
    for a in range(0, n, _CHUNK):
        b = min(n, a + _CHUNK)
        noise = rng.standard_normal((b - a, d), dtype=np.float32) @ mix
        x[a:b] = centres[labels[a:b]] + spread[labels[a:b], None] * noise
    return x


def _digits() -> np.ndarray:
    try:
        from sklearn.datasets import load_digits
    except ImportError:
        raise MissingExtraError(
            f"{_WHERE}: dataset 'digits' needs scikit-learn; install it with: pip install scikit-learn"
        ) from None
    return load_digits().data.astype(np.float32)


def _read(path: str, column: str | None, what: str) -> np.ndarray:
    from ..store._readers import read_embeddings

    if not Path(path).is_file():
        raise InputValueError(
            f"{_WHERE}: `{what}` must be 'unit', 'clustered', 'digits' or an embeddings file; "
            f"no file at {path!r}." if what == "dataset" else f"{_WHERE}: no `{what}` file at {path!r}."
        )
    return read_embeddings(path, column=column).vectors


def _rows(spec: BenchSpec, n: int | None, rng: np.random.Generator) -> tuple[str, np.ndarray]:
    if spec.dataset in GENERATED:
        n = 10_000 if n is None else n
        make = _unit if spec.dataset == "unit" else _clustered
        return f"{spec.dataset}-{spec.dim}d", make(rng, n, spec.dim)
    if spec.dataset == "digits":
        name, x = "digits", _digits()
    else:
        name, x = Path(spec.dataset).name, _read(spec.dataset, spec.column, "dataset")
    if n is not None and n != x.shape[0]:
        if n > x.shape[0]:
            raise InputValueError(
                f"{_WHERE}: size {n} asked of dataset {name!r}, which holds {x.shape[0]} rows."
            )
        x = x[np.sort(rng.choice(x.shape[0], n, replace=False))]
    return name, x


def _normalize(x: np.ndarray, what: str) -> np.ndarray:
    norms = np.linalg.norm(x, axis=1)
    zero = np.flatnonzero(norms == 0)
    if zero.size:
        raise InputValueError(
            f"{_WHERE}: {what} row {int(zero[0])} has zero norm and cannot be normalized; "
            "drop it or set normalize=False."
        )
    return x / norms[:, None].astype(x.dtype)


def _corrupt(spec: BenchSpec, x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Corrupted copies of random stored rows (kinds as in :mod:`densemem._synthetic`)."""
    rows = rng.choice(x.shape[0], spec.n_queries, replace=spec.n_queries > x.shape[0])
    return corrupt(x[rows], spec.corruption, spec.level, rng).astype(np.float32)


def load_data(spec: BenchSpec, n: int | None, seed: int) -> BenchData:
    """Rows (``n`` of them; None: the dataset's default) and queries for one run."""
    rng = np.random.default_rng(seed)
    name, x = _rows(spec, n, rng)
    if spec.queries is not None:
        q = _read(spec.queries, spec.query_column, "queries")
        if q.shape[1] != x.shape[1]:
            raise InputValueError(
                f"{_WHERE}: queries have {q.shape[1]} features but the dataset has {x.shape[1]}."
            )
    else:
        q = _corrupt(spec, x, rng)
    if spec.normalize:
        x, q = _normalize(x, "dataset"), _normalize(q, "query")
    return BenchData(name, np.ascontiguousarray(x, np.float32), np.ascontiguousarray(q, np.float32))


def sign_codes(x: np.ndarray, centre: np.ndarray) -> np.ndarray:
    """Sign quantisation of ``x - centre`` to -1/+1 int8 (0 maps to +1).

    Centring on the stored rows' mean keeps codes informative for data with a
    common direction or non-negative entries (digits would be all +1 otherwise).
    """
    return np.where(x < centre, -1, 1).astype(np.int8)


def packed(codes: np.ndarray) -> np.ndarray:
    """-1/+1 codes as packed bits for faiss ``IndexBinaryFlat`` (padded to whole bytes with +1).

    Padding both sides with the same bits leaves every Hamming distance unchanged.
    """
    bits = codes > 0
    pad = (-bits.shape[1]) % 8
    if pad:
        bits = np.concatenate([bits, np.ones((bits.shape[0], pad), dtype=bool)], axis=1)
    return np.ascontiguousarray(np.packbits(bits, axis=1))
