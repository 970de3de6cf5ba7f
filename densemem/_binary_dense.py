"""Energy engine of the dense binary memories (private).

E(s) = -sum_mu F(xi_mu . s) over stored +-1 patterns xi_mu (Krotov & Hopfield 2016;
F = exp: Demircigil et al. 2017). The cache per probe is the overlap vector x = Xi s
(n_probes, n_patterns). Unit i is set to the sign of lower energy: with b = x - xi_i s_i,

    polynomial:  g_i = sum_mu F(b_mu + xi_mu,i) - F(b_mu - xi_mu,i)
    exponential: g_i = lse(b + xi_i) - lse(b - xi_i)     (log space; never exponentiates raw
                                                          overlaps, so N = 1000 is safe)

s_i = +1 if g_i > 0, -1 if g_i < 0, unchanged on a tie. For F = exp the energy is reported
on the log scale, -log(-E) = -logsumexp_mu(xi_mu . s): a monotone map of E that does not
overflow, so "never rises" and fixed points are the same statements.
"""

from __future__ import annotations

import numpy as np

INTERACTIONS = ("polynomial", "rectified_polynomial", "exponential")

#: Relative tolerance (64 ulp) below which the two energies of a unit count as tied. Small
#: enough that integer polynomial energies stay exact while they fit in float64's 53 bits.
TIE_RTOL = 64 * np.finfo(np.float64).eps


def _lse(x: np.ndarray) -> np.ndarray:
    m = x.max(axis=1)
    return m + np.log(np.exp(x - m[:, None]).sum(axis=1))


class DenseEngine:
    """Engine (see _binary_dynamics) for -sum_mu F(xi_mu . s)."""

    def __init__(self, patterns: np.ndarray, interaction: str, degree: int) -> None:
        self.p = patterns.astype(np.float64)  # (K, N)
        self.pt = np.ascontiguousarray(self.p.T)  # (N, K): row i = xi_mu,i over mu
        self.interaction = interaction
        self.degree = degree

    def _f_sum(self, x: np.ndarray) -> np.ndarray:
        if self.interaction == "rectified_polynomial":
            x = np.maximum(x, 0.0)
        return (x**self.degree).sum(axis=1)

    def start(self, s: np.ndarray) -> np.ndarray:
        return s @ self.pt

    def energy(self, s: np.ndarray, x: np.ndarray) -> np.ndarray:
        if self.interaction == "exponential":
            return -_lse(x)
        return -self._f_sum(x)

    def _gain(self, s: np.ndarray, x: np.ndarray, i: int) -> np.ndarray:
        """g_i per probe, already set to 0 where the two energies tie within tolerance."""
        col = self.pt[i]
        base = x - s[:, i, None] * col[None, :]
        if self.interaction == "exponential":
            up, down = _lse(base + col), _lse(base - col)
            scale = np.maximum(np.maximum(np.abs(up), np.abs(down)), 1.0)
        else:
            up, down = self._f_sum(base + col), self._f_sum(base - col)
            scale = np.abs(up) + np.abs(down)
        g = up - down
        g[np.abs(g) <= TIE_RTOL * scale] = 0.0
        return g

    def decide(self, s: np.ndarray, x: np.ndarray) -> np.ndarray:
        new = s.copy()
        for i in range(s.shape[1]):
            g = self._gain(s, x, i)
            new[:, i] = np.where(g > 0, 1.0, np.where(g < 0, -1.0, s[:, i]))
        return new

    def async_sweep(self, s: np.ndarray, x: np.ndarray, order: np.ndarray) -> np.ndarray:
        changed = np.zeros(s.shape[0], dtype=bool)
        for i in order:
            g = self._gain(s, x, i)
            idx = np.flatnonzero(g * s[:, i] < 0)
            if idx.size == 0:
                continue
            d = -2.0 * s[idx, i]
            s[idx, i] += d
            x[idx] += d[:, None] * self.pt[i][None, :]
            changed[idx] = True
        return changed

    def select(self, x: np.ndarray, keep: np.ndarray) -> np.ndarray:
        return x[keep]
