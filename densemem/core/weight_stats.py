"""Tiled statistics of the full softmax weight vector (entropy, participation ratio).

The beta sweep needs, per query, quantities of *all* N weights
``p = softmax(z)`` with ``z = beta * X @ xi``:

    lse = log sum_i exp(z_i)
    H   = -sum_i p_i log p_i = lse - sum_i p_i z_i        (Shannon entropy)
    PR  = 1 / sum_i p_i^2                                 (participation ratio)

Like the retrieval kernel (``densemem.core.partial``), stored rows are walked in
tiles sized from a MiB budget and each tile is folded into running sums kept
relative to a reference ``m`` (the running max of z):

    l = sum exp(z - m),  s = sum exp(z - m) (z - m),  q = sum exp(2 (z - m))

A new reference ``m'`` rescales them exactly with ``a = exp(m - m')``:
``l' = a l``, ``s' = a (s + (m - m') l)``, ``q' = a^2 q``. At the end
``H = log l - s / l`` and ``PR = l^2 / q`` (both free of ``m``).
The GEMM runs in float32 as in the retrieval kernel; the element-wise work and
the sums are float64, so ``H`` is accurate to about 1e-7 * |z| even when the
weights are nearly uniform (``H`` near ``log N``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .tiles import map_query_chunks

__all__ = ["WeightStats", "weight_stats"]


@dataclass(slots=True)
class WeightStats:
    """Per-query statistics of softmax(beta X xi) over every stored row."""

    lse: np.ndarray  # (B,) float64
    entropy: np.ndarray  # (B,) float64, in nats, 0 <= H <= log N
    participation: np.ndarray  # (B,) float64, 1 <= PR <= N


def _fold(qz: np.ndarray, patterns: np.ndarray, tile_rows: int) -> tuple[np.ndarray, ...]:
    """Running (m, l, s, q) of one query chunk over all stored rows."""
    b = qz.shape[0]
    m = np.full(b, -np.inf)
    l = np.zeros(b)
    s = np.zeros(b)
    q = np.zeros(b)
    for start in range(0, patterns.shape[0], tile_rows):
        z = (qz @ patterns[start : start + tile_rows].T).astype(np.float64)
        m_new = np.maximum(m, z.max(axis=1))
        with np.errstate(invalid="ignore"):
            shift = np.where(np.isfinite(m), m - m_new, 0.0)
        a = np.exp(shift)
        s = a * (s + shift * l)
        l = a * l
        q = a * a * q
        z -= m_new[:, None]
        e = np.exp(z)
        l += e.sum(axis=1)
        s += np.einsum("ij,ij->i", e, z)
        q += np.einsum("ij,ij->i", e, e)
        m = m_new
    return m, l, s, q


def weight_stats(
    states: np.ndarray,
    patterns: np.ndarray,
    beta: float,
    *,
    tile_mib: float = 16.0,
    n_threads: int = 1,
    chunk: int = 256,
) -> WeightStats:
    """Entropy and participation ratio of softmax(beta X xi) for each state.

    Parameters
    ----------
    states : ndarray of shape (n_states, dim), float32
    patterns : ndarray of shape (n_patterns, dim), float32, n_patterns >= 1
    beta : float
    tile_mib : float
        Budget (MiB) of one float64 (chunk x tile) block.
    n_threads : int
        Query chunks run on this many threads (as in ``densemem.core.tiles``).
    chunk : int
        Most queries per chunk; memory stays ``O(chunk * tile_rows)``.
    """
    qz = np.ascontiguousarray(np.asarray(states, dtype=np.float32) * np.float32(beta))
    n = patterns.shape[0]

    def run(sl: slice) -> tuple[np.ndarray, ...]:
        part = qz[sl]
        rows = max(1, int(tile_mib * 2**20 / (8 * max(part.shape[0], 1))))
        return _fold(part, patterns, min(rows, n))

    parts = map_query_chunks(run, qz.shape[0], n_threads=n_threads, chunk=chunk)
    m, l, s, q = (np.concatenate([p[i] for p in parts]) for i in range(4))
    entropy = np.maximum(np.log(l) - s / l, 0.0)
    return WeightStats(lse=m + np.log(l), entropy=entropy, participation=l * l / q)
