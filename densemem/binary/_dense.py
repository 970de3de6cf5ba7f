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


def _tie_to_zero(g: np.ndarray, scale: np.ndarray) -> np.ndarray:
    g[np.abs(g) <= TIE_RTOL * scale] = 0.0
    return g


class DenseEngine:
    """Engine (see _binary_dynamics) for -sum_mu F(xi_mu . s).

    Synchronous decisions for all units come from one product with the patterns. For unit i
    with e_mu = xi_mu,i s_i = +-1 the overlap without unit i is b = x - xi_mu,i s_i and
    F(b + c) - F(b - c) = c (F(b + 1) - F(b - 1)) for c = +-1, which gives
        polynomial:  g = M @ Xi + s * R,  M = (F(x+2) - F(x-2)) / 2,
                     R = sum_mu (2 F(x) - F(x+2) - F(x-2)) / 2
    (integer-valued, so exact in float64), and for F = exp, with L0 = lse(x),
        s_i = +1: g_i = L0 - lse_mu(x_mu - 2 xi_mu,i),
        s_i = -1: g_i = lse_mu(x_mu + 2 xi_mu,i) - L0,
    where lse_mu(x_mu -+ 2 xi_mu,i) = m + log(exp(x - m) @ exp(-+2 Xi)) never overflows.
    """

    def __init__(self, patterns: np.ndarray, interaction: str, degree: int) -> None:
        self.p = patterns.astype(np.float64)  # (K, N)
        self.pt = np.ascontiguousarray(self.p.T)  # (N, K): row i = xi_mu,i over mu
        self.interaction = interaction
        self.degree = degree
        if interaction == "exponential":
            self.e_minus, self.e_plus = np.exp(-2.0 * self.p), np.exp(2.0 * self.p)

    def _f(self, x: np.ndarray) -> np.ndarray:
        """F(x) elementwise for the polynomial interactions (multiplications, no pow)."""
        if self.interaction == "rectified_polynomial":
            x = np.maximum(x, 0.0)
        out = x.copy()
        for _ in range(self.degree - 1):
            out *= x
        return out

    def start(self, s: np.ndarray) -> np.ndarray:
        return s @ self.pt

    def energy(self, s: np.ndarray, x: np.ndarray) -> np.ndarray:
        if self.interaction == "exponential":
            return -_lse(x)
        return 0.0 - self._f(x).sum(axis=1)  # 0.0 - : no negative zeros

    def _gain(self, s: np.ndarray, x: np.ndarray, i: int) -> np.ndarray:
        """g_i per probe (> 0: +1 has the lower energy), set to 0 on a tie."""
        col = self.pt[i]
        base = x - s[:, i, None] * col[None, :]
        if self.interaction == "exponential":
            up, down = _lse(base + col), _lse(base - col)
            scale = np.maximum(np.maximum(np.abs(up), np.abs(down)), 1.0)
        else:
            f_up, f_down = self._f(base + col), self._f(base - col)
            up, down = f_up.sum(axis=1), f_down.sum(axis=1)
            scale = np.abs(f_up).sum(axis=1) + np.abs(f_down).sum(axis=1)
        return _tie_to_zero(up - down, scale)

    def decide(self, s: np.ndarray, x: np.ndarray) -> np.ndarray:
        if self.interaction == "exponential":
            m = x.max(axis=1, keepdims=True)
            w = np.exp(x - m)
            l0 = m + np.log(w.sum(axis=1, keepdims=True))
            l_minus = m + np.log(w @ self.e_minus)
            l_plus = m + np.log(w @ self.e_plus)
            g = np.where(s > 0, l0 - l_minus, l_plus - l0)
            scale = np.maximum(np.abs(l0), 1.0)
        else:
            f0, fp, fm = self._f(x), self._f(x + 2.0), self._f(x - 2.0)
            mm = (fp - fm) / 2.0
            r = (2.0 * f0 - fp - fm).sum(axis=1, keepdims=True) / 2.0
            g = mm @ self.p + s * r
            scale = np.abs(mm).sum(axis=1, keepdims=True) + np.abs(r)
        g = _tie_to_zero(g, np.broadcast_to(scale, g.shape))
        return np.where(g > 0, 1.0, np.where(g < 0, -1.0, s))

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
