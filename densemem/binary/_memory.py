"""Classic and dense binary associative memories.

:class:`BinaryMemory` stores -1/+1 (or 0/1) patterns in a symmetric pairwise weight matrix
(Hebbian, Storkey or pseudo-inverse rule) and retrieves by asynchronous or synchronous
threshold updates. :class:`DenseBinaryMemory` replaces the quadratic energy by
-sum_mu F(xi_mu . s) with a polynomial or exponential F. Both return a
:class:`BinaryRetrieval`.

Examples
--------
>>> from densemem.binary import BinaryMemory
>>> mem = BinaryMemory([[1, -1, 1, -1, 1, -1]])
>>> mem.retrieve([[1, 1, 1, -1, 1, -1]], seed=0).states.tolist()
[[1, -1, 1, -1, 1, -1]]
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from . import _checks as chk
from . import _rules as rules
from ._dense import INTERACTIONS, DenseEngine
from ._dynamics import PairwiseEngine
from ._result import BinaryRetrieval, retrieve_batch, user_form
from ..errors import DenseMemWarning, InputValueError

__all__ = ["BinaryMemory", "BinaryRetrieval", "DenseBinaryMemory"]


class BinaryMemory:
    """Binary associative memory with symmetric pairwise weights.

    Parameters
    ----------
    patterns : array_like of shape (n_patterns, n_units)
        Patterns to store, all -1/+1 (``states="pm1"``) or all 0/1 (``states="01"``).
        Copied; never modified.
    rule : {"hebbian", "storkey", "pseudo_inverse"}, default "hebbian"
        Storage rule, applied to the -1/+1 form s = 2 v - 1 of the patterns.
    states : {"pm1", "01"}, default "pm1"
        Form of patterns, probes and returned states.
    thresholds : float or array_like of shape (n_units,), optional
        Unit thresholds in the memory's form. ``None`` means zero thresholds in the -1/+1
        form; for ``states="01"`` that is U = T 1 / 2, the 0/1 network exactly equivalent to
        the -1/+1 one (derived 0/1 <-> +-1 map). An explicit ``0`` gives the classic unbiased 0/1
        network, which is a different network.

    Notes
    -----
    Weights: Hebbian W = (1/n) sum_mu xi_mu xi_mu^T with zero diagonal; Storkey's
    incremental rule (zero diagonal, symmetric); pseudo-inverse W = Xi^T (Xi Xi^T)^+ Xi (the
    projection on the patterns' span, diagonal kept). Energy E(s) = -s.W s / 2 + theta.s,
    local field h = W s - theta, update s_i = sign(h_i), a unit keeps its state on a tie.
    The 0/1 form runs as the -1/+1 network W = T/4, theta = U/2 - T 1/4 and reports its own
    energy E_01(v) = -v.T v/2 + U.v.

    References
    ----------
    Hopfield, PNAS 79(8):2554 (1982). Storkey, ICANN (1997). Personnaz, Guyon & Dreyfus
    (1985); Kanter & Sompolinsky, Phys. Rev. A 35 (1987). Bruck, Proc. IEEE 78(10) (1990).

    Examples
    --------
    >>> mem = BinaryMemory([[1, 0, 1, 0, 1, 0]], states="01", rule="storkey")
    >>> mem.retrieve([[1, 0, 1, 1, 1, 0]], mode="sync").states.tolist()
    [[1, 0, 1, 0, 1, 0]]
    """

    def __init__(self, patterns: Any, *, rule: str = "hebbian", states: str = "pm1",
                 thresholds: Any = None) -> None:
        where = "BinaryMemory"
        self._states = chk.check_choice(states, "states", chk.STATES, where)
        self._rule = chk.check_choice(rule, "rule", rules.RULES, where)
        self._patterns = chk.check_binary(patterns, "patterns", states, where)
        n = self._patterns.shape[1]
        self._user_thr = None if thresholds is None else chk.check_vector(
            thresholds, n, "thresholds", where)
        self._counts = None
        self._frozen = np.zeros(n, dtype=bool)
        self._damaged = False
        if rule == "hebbian":
            self._counts = rules.hebbian_counts(self._patterns)
            self._set_weights(self._counts / n)
        elif rule == "storkey":
            self._set_weights(rules.storkey_weights(self._patterns, np.zeros((n, n))))
        else:
            self._set_weights(rules.pseudo_inverse_weights(self._patterns))

    @classmethod
    def from_weights(cls, weights: Any, thresholds: Any = None, *,
                     states: str = "pm1") -> BinaryMemory:
        """Build a memory from a given symmetric weight matrix (no storage rule).

        Parameters
        ----------
        weights : array_like of shape (n_units, n_units)
            Symmetric weights in the memory's form (W for "pm1", T for "01").
        thresholds : float or array_like of shape (n_units,), optional
            Thresholds in the memory's form (theta, or U for "01"); default 0.
        states : {"pm1", "01"}, default "pm1"

        Examples
        --------
        >>> mem = BinaryMemory.from_weights([[0, -1], [-1, 0]], [0.5, 0.5])
        >>> mem.retrieve([[1, 1]], mode="sync").two_cycle.tolist()
        [True]
        """
        where = "BinaryMemory.from_weights"
        states = chk.check_choice(states, "states", chk.STATES, where)
        w = chk.check_weights(weights, where)
        thr = chk.check_vector(0.0 if thresholds is None else thresholds, w.shape[0],
                               "thresholds", where)
        self = cls.__new__(cls)
        self._states, self._rule = states, "given"
        self._patterns = np.zeros((0, w.shape[0]), dtype=np.int8)
        self._counts, self._user_thr = None, None
        self._frozen = np.zeros(w.shape[0], dtype=bool)
        self._damaged = False
        if states == "01":
            w, thr = rules.from_01(w, thr)
        self._w, self._theta = w, thr
        self._engine = PairwiseEngine(w, thr)
        return self

    def _set_weights(self, w: np.ndarray) -> None:
        self._w = w
        if self._user_thr is None:
            self._theta = np.zeros(w.shape[0])
        elif self._states == "01":  # theta = U/2 - T 1/4 with T = 4 W (derived 0/1 <-> +-1 map)
            self._theta = self._user_thr / 2.0 - w.sum(axis=1)
        else:
            self._theta = self._user_thr.copy()
        self._engine = PairwiseEngine(self._w, self._theta)

    # ----------------------------------------------------------------- properties
    @property
    def n_units(self) -> int:
        """Number of units."""
        return int(self._w.shape[0])

    @property
    def n_patterns(self) -> int:
        """Number of stored patterns (0 for a memory built from weights)."""
        return int(self._patterns.shape[0])

    @property
    def rule(self) -> str:
        """Storage rule, or ``"given"`` for :meth:`from_weights`."""
        return self._rule

    @property
    def states(self) -> str:
        """Form of states: ``"pm1"`` or ``"01"``."""
        return self._states

    @property
    def incremental(self) -> bool:
        """Whether :meth:`add` updates the weights in place (Hebbian, Storkey)."""
        return self._rule in ("hebbian", "storkey")

    @property
    def patterns(self) -> np.ndarray:
        """Copy of the stored patterns in the memory's form."""
        return user_form(self._patterns, self._states)

    @property
    def weights(self) -> np.ndarray:
        """Copy of the weights in the memory's form (W, or T = 4 W for "01")."""
        return 4.0 * self._w if self._states == "01" else self._w.copy()

    @property
    def thresholds(self) -> np.ndarray:
        """Copy of the thresholds in the memory's form (theta, or U = 2 theta + 2 W 1)."""
        if self._states == "01":
            return rules.to_01(self._w, self._theta)[1]
        return self._theta.copy()

    @property
    def damaged_units(self) -> np.ndarray:
        """Indices of units held fixed by :meth:`damaged` (empty when undamaged)."""
        return np.flatnonzero(self._frozen)

    # ------------------------------------------------------------------- methods
    def add(self, patterns: Any) -> None:
        """Store more patterns.

        Hebbian and Storkey weights are updated incrementally (the result equals storing all
        patterns at once). The pseudo-inverse rule cannot be updated incrementally: the
        weights are recomputed from all stored patterns and a :class:`DenseMemWarning` says
        so.

        Parameters
        ----------
        patterns : array_like of shape (n_new, n_units)

        Examples
        --------
        >>> mem = BinaryMemory([[1, -1, 1, -1]])
        >>> mem.add([[1, 1, -1, -1]]); mem.n_patterns
        2
        """
        where = "BinaryMemory.add"
        if self._rule == "given":
            raise InputValueError(
                f"{where}: this memory was built from weights and has no storage rule; build "
                "it from patterns to add patterns."
            )
        if self._damaged:
            raise InputValueError(
                f"{where}: cannot add patterns to a damaged copy; add them to the original "
                "memory and call damaged() again."
            )
        new = chk.check_width(chk.check_binary(patterns, "patterns", self._states, where),
                              self.n_units, "patterns", where)
        self._patterns = np.concatenate([self._patterns, new])
        n = self.n_units
        if self._rule == "hebbian":
            self._counts = self._counts + rules.hebbian_counts(new)
            self._set_weights(self._counts / n)
        elif self._rule == "storkey":
            self._set_weights(rules.storkey_weights(new, self._w))
        else:
            warnings.warn(
                f"{where}: the pseudo-inverse rule cannot add patterns incrementally; the "
                f"weights were recomputed from all {self.n_patterns} patterns.",
                DenseMemWarning, stacklevel=2)
            self._set_weights(rules.pseudo_inverse_weights(self._patterns))

    def energy(self, states: Any) -> np.ndarray:
        """Energy of each state: -s.W s / 2 + theta.s (or -v.T v / 2 + U.v for "01").

        Parameters
        ----------
        states : array_like of shape (n_states, n_units) or (n_units,)

        Returns
        -------
        ndarray of float64, shape (n_states,)

        Examples
        --------
        >>> BinaryMemory.from_weights([[0, 1], [1, 0]]).energy([[1, 1], [1, -1]]).tolist()
        [-1.0, 1.0]
        """
        where = "BinaryMemory.energy"
        s = chk.check_width(chk.check_binary(states, "states", self._states, where),
                            self.n_units, "states", where).astype(np.float64)
        return self._engine.energy(s, self._engine.start(s)) + self._offset()

    def _offset(self) -> float:
        return rules.energy_offset_01(self._w, self._theta) if self._states == "01" else 0.0

    def retrieve(self, queries: Any, *, mode: str = "async", steps: int = 100,
                 seed: Any = None, return_trajectory: bool = False) -> BinaryRetrieval:
        """Run the update dynamics from each query until a fixed point or `steps` sweeps.

        Parameters
        ----------
        queries : array_like of shape (n_queries, n_units) or (n_units,)
            Starting states in the memory's form. Not modified.
        mode : {"async", "sync"}, default "async"
            ``"async"``: one unit at a time in a random order drawn per sweep from `seed`,
            the same order for every query of the batch; every unit sees the latest states.
            ``"sync"``: all units at once from the previous state; stops at a fixed point or a
            2-cycle.
        steps : int >= 1, default 100
            Most steps; one step is one sweep over every unit.
        seed : int, numpy Generator or None
        return_trajectory : bool, default False
            Also return the states after every sweep.

        Returns
        -------
        BinaryRetrieval

        Raises
        ------
        InputValueError
            Bad mode, steps, query values or query width.

        Examples
        --------
        >>> mem = BinaryMemory([[1, 1, 1, -1, -1, -1]])
        >>> r = mem.retrieve([[1, 1, -1, -1, -1, -1]], seed=1)
        >>> r.states.tolist(), r.converged.tolist()
        ([[1, 1, 1, -1, -1, -1]], [True])
        """
        return retrieve_batch("BinaryMemory", self._engine, ~self._frozen, self._states,
                         self.n_units, queries, mode, steps, seed, return_trajectory,
                         self._offset())

    def damaged(self, *, units: float = 0.0, unit_mode: str = "delete", weights: float = 0.0,
                seed: Any = None) -> BinaryMemory:
        """Return a damaged copy, for robustness experiments (this memory is unchanged).

        Parameters
        ----------
        units : float in [0, 1], default 0
            Fraction of units damaged (rounded to a whole number).
        unit_mode : {"delete", "clamp"}, default "delete"
            ``"clamp"``: damaged units hold the probe's value during retrieval and still drive
            the others. ``"delete"``: their weights and thresholds are also zeroed, so they
            have no influence; they too keep the probe's value in the returned states.
        weights : float in [0, 1], default 0
            Fraction of the off-diagonal pairs (i, j) whose weight is zeroed (both W_ij and
            W_ji, so the weights stay symmetric).
        seed : int, numpy Generator or None

        Examples
        --------
        >>> mem = BinaryMemory([[1, -1] * 5]).damaged(units=0.2, seed=0)
        >>> mem.damaged_units.size
        2
        """
        where = "BinaryMemory.damaged"
        units = chk.check_unit_interval(units, name="units", where=where)
        weights = chk.check_unit_interval(weights, name="weights", where=where)
        unit_mode = chk.check_choice(unit_mode, "unit_mode", ("delete", "clamp"), where)
        rng = chk.as_rng(seed, where=where)
        w, th, hit = rules.damage(self._w, self._theta, unit_fraction=units,
                                  unit_mode=unit_mode, weight_fraction=weights, rng=rng)
        out = BinaryMemory.__new__(BinaryMemory)
        out._states, out._rule, out._patterns = self._states, self._rule, self._patterns.copy()
        out._counts, out._user_thr = None, None
        out._frozen, out._damaged = self._frozen | hit, True
        out._w, out._theta, out._engine = w, th, PairwiseEngine(w, th)
        return out

    def __repr__(self) -> str:
        dmg = f", damaged_units={self.damaged_units.size}" if self._damaged else ""
        return (f"BinaryMemory(rule={self._rule!r}, states={self._states!r}, "
                f"n_units={self.n_units}, n_patterns={self.n_patterns}{dmg})")


class DenseBinaryMemory:
    """Dense binary memory with energy -sum_mu F(xi_mu . s).

    Parameters
    ----------
    patterns : array_like of shape (n_patterns, n_units)
        -1/+1 (``states="pm1"``) or 0/1 (``states="01"``) patterns; copied.
    interaction : {"polynomial", "rectified_polynomial", "exponential"}, default "polynomial"
        F(x) = x**degree, max(x, 0)**degree, or exp(x).
    degree : int >= 2, default 3
        Degree n of the polynomial interactions (ignored for "exponential").
    states : {"pm1", "01"}, default "pm1"
        Form of patterns, probes and states; overlaps are always taken in the -1/+1 form.

    Notes
    -----
    A unit update sets s_i to whichever sign gives the lower energy, other units fixed (a tie
    keeps the state), so asynchronous energy never rises. For "exponential" the energy is
    reported as -log(-E) = -logsumexp_mu(xi_mu . s), computed in log space: it never
    overflows (at n_units = 1000 exp(1000) would) and orders states like E does.

    References
    ----------
    Krotov & Hopfield, NeurIPS (2016). Demircigil, Heusel, Lowe, Upgang & Vermet,
    J. Stat. Phys. 168 (2017).

    Examples
    --------
    >>> mem = DenseBinaryMemory([[1, -1, 1, -1, 1, -1], [1, 1, 1, -1, -1, -1]])
    >>> mem.retrieve([[1, -1, 1, -1, 1, 1]], seed=0).states.tolist()
    [[1, -1, 1, -1, 1, -1]]
    """

    def __init__(self, patterns: Any, *, interaction: str = "polynomial", degree: int = 3,
                 states: str = "pm1") -> None:
        where = "DenseBinaryMemory"
        self._states = chk.check_choice(states, "states", chk.STATES, where)
        self._interaction = chk.check_choice(interaction, "interaction", INTERACTIONS, where)
        self._degree = chk.check_int(degree, "degree", where, minimum=2)
        self._patterns = chk.check_binary(patterns, "patterns", states, where)
        self._check_range(where)
        self._engine = DenseEngine(self._patterns, self._interaction, self._degree)

    def _check_range(self, where: str) -> None:
        n_pat, n = self._patterns.shape
        # the synchronous decision evaluates F(x + 2) with |x| <= n_units
        if self._interaction != "exponential" and (
                self._degree * np.log(n + 2) + np.log(n_pat) > 700):
            raise InputValueError(
                f"{where}: `degree` {self._degree} with {n} units and {n_pat} patterns would "
                "overflow float64 (n_patterns * (n_units + 2)**degree > 1e304); lower the "
                "degree or use interaction='exponential', which is computed in log space."
            )

    @property
    def n_units(self) -> int:
        """Number of units."""
        return int(self._patterns.shape[1])

    @property
    def n_patterns(self) -> int:
        """Number of stored patterns."""
        return int(self._patterns.shape[0])

    @property
    def interaction(self) -> str:
        """The interaction function F."""
        return self._interaction

    @property
    def degree(self) -> int:
        """Polynomial degree n (unused for "exponential")."""
        return self._degree

    @property
    def states(self) -> str:
        """Form of states: ``"pm1"`` or ``"01"``."""
        return self._states

    @property
    def patterns(self) -> np.ndarray:
        """Copy of the stored patterns in the memory's form."""
        return user_form(self._patterns, self._states)

    def add(self, patterns: Any) -> None:
        """Store more patterns (always incremental: the patterns are the memory).

        Examples
        --------
        >>> mem = DenseBinaryMemory([[1, -1, 1]]); mem.add([[1, 1, 1]]); mem.n_patterns
        2
        """
        where = "DenseBinaryMemory.add"
        new = chk.check_width(chk.check_binary(patterns, "patterns", self._states, where),
                              self.n_units, "patterns", where)
        old = self._patterns
        self._patterns = np.concatenate([old, new])
        try:
            self._check_range(where)
        except InputValueError:
            self._patterns = old
            raise
        self._engine = DenseEngine(self._patterns, self._interaction, self._degree)

    def energy(self, states: Any) -> np.ndarray:
        """Energy -sum_mu F(xi_mu . s) of each state (log scale for "exponential").

        Examples
        --------
        >>> DenseBinaryMemory([[1, 1]], degree=2).energy([[1, 1], [1, -1]]).tolist()
        [-4.0, 0.0]
        """
        where = "DenseBinaryMemory.energy"
        s = chk.check_width(chk.check_binary(states, "states", self._states, where),
                            self.n_units, "states", where).astype(np.float64)
        return self._engine.energy(s, self._engine.start(s))

    def retrieve(self, queries: Any, *, mode: str = "async", steps: int = 100,
                 seed: Any = None, return_trajectory: bool = False) -> BinaryRetrieval:
        """Run single-unit lower-energy updates from each probe; see BinaryMemory.retrieve.

        ``mode="sync"`` with ``steps=1`` evaluates every unit once from the probe (the
        one-step update used in capacity estimates).

        Examples
        --------
        >>> mem = DenseBinaryMemory([[1, 1, 1, 1, -1, -1]], interaction="exponential")
        >>> mem.retrieve([[-1, 1, 1, 1, -1, -1]], mode="sync").states.tolist()
        [[1, 1, 1, 1, -1, -1]]
        """
        free = np.ones(self.n_units, dtype=bool)
        return retrieve_batch("DenseBinaryMemory", self._engine, free, self._states, self.n_units,
                         queries, mode, steps, seed, return_trajectory)

    def __repr__(self) -> str:
        deg = "" if self._interaction == "exponential" else f", degree={self._degree}"
        return (f"DenseBinaryMemory(interaction={self._interaction!r}{deg}, "
                f"states={self._states!r}, n_units={self.n_units}, "
                f"n_patterns={self.n_patterns})")
