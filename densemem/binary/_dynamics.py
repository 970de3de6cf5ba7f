"""Update dynamics shared by the binary memories (private).

States are +-1 float64 arrays of shape (n_probes, n_units). An *engine* knows one energy:

    start(s)                -> aux        per-probe cache (local fields, or pattern overlaps)
    energy(s, aux)          -> (n_probes,) energies
    decide(s, aux)          -> new states of every unit computed from the same state (sync)
    async_sweep(s, aux, order) -> bool (n_probes,): which probes changed; s, aux updated
    select(aux, keep)       -> aux of the kept probes

:func:`run` drives either mode over a batch, retires probes as soon as they reach a fixed
point (or, synchronously, a 2-cycle), and records the energy after every sweep.

Asynchronous sweeps use **one random order per sweep, shared by every probe in the batch**
(``free_units[rng.permutation(n_free)]``, one call per sweep). Each probe still sees the
latest states of all units (sequential in effect), which is what the descent guarantees of Hopfield
(PNAS 1982) and Bruck (Proc. IEEE 1990) need; sharing the order is what lets the work be
vectorised across probes.
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

#: Fields with |h| <= TIE_RTOL * (max_i sum_j |W_ij| + |theta_i|) count as exact ties (the
#: unit keeps its state); this absorbs float64 round-off in incrementally updated fields.
TIE_RTOL = 1e-10

#: Units per block in the pairwise asynchronous sweep (see PairwiseEngine.async_sweep).
BLOCK = 128


class Engine(Protocol):
    def start(self, s: np.ndarray) -> Any: ...
    def energy(self, s: np.ndarray, aux: Any) -> np.ndarray: ...
    def decide(self, s: np.ndarray, aux: Any) -> np.ndarray: ...
    def async_sweep(self, s: np.ndarray, aux: Any, order: np.ndarray) -> np.ndarray: ...
    def select(self, aux: Any, keep: np.ndarray) -> Any: ...


class _Fields:
    """Cache of PairwiseEngine: fields ht and (for asynchronous sweeps) states st, both
    unit-major, shape (n_units, n_probes), so one unit's values over all probes are one
    contiguous row. st is made on the first asynchronous sweep."""

    __slots__ = ("ht", "st")

    def __init__(self, st: np.ndarray | None, ht: np.ndarray) -> None:
        self.st, self.ht = st, ht


class PairwiseEngine:
    """E(s) = -s.W s / 2 + theta.s with symmetric W; fields h = W s - theta."""

    def __init__(self, weights: np.ndarray, theta: np.ndarray, block: int = BLOCK) -> None:
        self.w = weights
        self.theta = theta
        self.block = block
        scale = float(np.max(np.abs(weights).sum(axis=1) + np.abs(theta)))
        self.tol = TIE_RTOL * scale

    def start(self, s: np.ndarray) -> _Fields:
        return _Fields(None, self.w @ s.T - self.theta[:, None])

    def energy(self, s: np.ndarray, aux: _Fields) -> np.ndarray:
        # W s = h + theta, so E = -s.(h + theta)/2 + theta.s = -s.h/2 + theta.s/2
        return -0.5 * np.einsum("ij,ji->i", s, aux.ht) + 0.5 * (s @ self.theta)

    def decide(self, s: np.ndarray, aux: _Fields) -> np.ndarray:
        h = aux.ht.T
        return np.where(h > self.tol, 1.0, np.where(h < -self.tol, -1.0, s))

    def select(self, aux: _Fields, keep: np.ndarray) -> _Fields:
        return _Fields(None if aux.st is None else aux.st[:, keep], aux.ht[:, keep])

    def async_sweep(self, s: np.ndarray, aux: _Fields, order: np.ndarray) -> np.ndarray:
        """One asynchronous sweep over `order`, in place on `s` and the cache.

        Units are taken in blocks of `block` consecutive positions of the order. Inside a
        block, the field of unit t is its field at the start of the block plus the effect of
        the block's earlier flips, w[t, :t] @ delta[:t] (delta holds the +-2 changes), so it
        is exact when the unit is decided. At the end of the block the fields of all units are
        brought up to date by one product over the units that flipped,
        h += W[:, flipped] @ delta[flipped] (numpy's BLAS only: a second BLAS pool, e.g.
        scipy.linalg.blas, would compete with numpy's spinning threads on small machines).
        The result is exactly the sequential single-unit dynamics; a block in which no unit
        flips costs only its loop, so late sweeps are cheap.
        """
        if aux.st is None:
            aux.st = np.ascontiguousarray(s.T)
        st, ht = aux.st, aux.ht
        w, tol, n_probes = self.w, self.tol, s.shape[0]
        buf = np.empty_like(ht)  # scratch for the block products, reused
        field, prod = np.empty(n_probes), np.empty(n_probes)
        flips = np.empty(n_probes, dtype=bool)
        changed = np.zeros(n_probes, dtype=bool)
        for start in range(0, order.size, self.block):
            blk = order[start : start + self.block]
            hb, sb = ht[blk], st[blk]  # (b, n_probes) copies
            wbb = w[np.ix_(blk, blk)]
            delta = np.zeros_like(sb)
            any_flip = False
            for t in range(blk.size):  # few whole-row numpy calls per unit
                if any_flip:
                    np.dot(wbb[t, :t], delta[:t], out=field)
                    field += hb[t]
                    np.multiply(sb[t], field, out=prod)
                else:
                    np.multiply(sb[t], hb[t], out=prod)
                np.less(prod, -tol, out=flips)
                if flips.any():
                    np.multiply(sb[t], flips, out=delta[t])
                    delta[t] *= -2.0
                    any_flip = True
            if not any_flip:
                continue
            cols = np.flatnonzero(delta.any(axis=1))
            sb += delta
            st[blk] = sb
            changed |= delta.any(axis=0)
            # ht += W[:, cols] @ delta[cols]; W[:, cols] = W[cols].T as W is symmetric
            np.matmul(w[blk[cols]].T, delta[cols], out=buf)
            ht += buf
        s[:] = st.T
        return changed


def run(
    engine: Engine,
    s0: np.ndarray,
    *,
    mode: str,
    steps: int,
    rng: np.random.Generator,
    free: np.ndarray,
    keep_trajectory: bool,
) -> dict[str, Any]:
    """Run `mode` dynamics from the +-1 states `s0` (not modified); return plain arrays.

    `free` is a boolean mask of the units that may change (damaged units are held).
    Returned keys: states, energy (n_sweeps + 1, n_probes), steps_per_query, converged,
    two_cycle, trajectory (or None).
    """
    n_probes, n_units = s0.shape
    free_idx = np.flatnonzero(free)
    s = s0.astype(np.float64, copy=True)
    aux = engine.start(s)
    e_now = engine.energy(s, aux)
    final = s.copy()
    energies, traj = [e_now.copy()], ([final.astype(np.int8)] if keep_trajectory else None)
    active = np.arange(n_probes)
    sweeps = np.zeros(n_probes, dtype=np.int64)
    converged = np.zeros(n_probes, dtype=bool)
    cycle = np.zeros(n_probes, dtype=bool)
    prev = None
    for sweep in range(1, steps + 1):
        if active.size == 0:
            break
        if mode == "async":
            order = free_idx[rng.permutation(free_idx.size)]
            fixed = ~engine.async_sweep(s, aux, order)
            two = np.zeros_like(fixed)
        else:
            new = engine.decide(s, aux)
            if free_idx.size < n_units:  # damaged units hold their state
                held = ~free
                new[:, held] = s[:, held]
            fixed = (new == s).all(axis=1)
            two = ~fixed & ((new == prev).all(axis=1) if prev is not None else False)
            prev, s = s, new
            aux = engine.start(s)
        sweeps[active] = sweep
        e_now[active] = engine.energy(s, aux)
        final[active] = s
        energies.append(e_now.copy())
        if traj is not None:
            traj.append(final.astype(np.int8))
        converged[active[fixed]] = True
        cycle[active[two]] = True
        keep = ~(fixed | two)
        if not keep.all():
            active, s, aux = active[keep], s[keep], engine.select(aux, keep)
            prev = prev[keep] if prev is not None else None
    return {
        "states": final.astype(np.int8),
        "energy": np.stack(energies),
        "steps_per_query": sweeps,
        "converged": converged,
        "two_cycle": cycle,
        "trajectory": None if traj is None else np.stack(traj),
    }
