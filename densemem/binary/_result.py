"""The result object of the binary memories and the shared retrieval driver (private).

:class:`BinaryRetrieval` is re-exported by :mod:`densemem.binary`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from . import _checks as chk
from ._dynamics import Engine, run


@dataclass(frozen=True, slots=True)
class BinaryRetrieval:
    """Outcome of retrieving a batch of probes from a binary memory.

    Attributes
    ----------
    states : ndarray of int8, shape (n_probes, n_units)
        Final states, in the memory's form (-1/+1 or 0/1).
    energy : ndarray of float64, shape (sweeps + 1, n_probes)
        Row 0 is the energy of the probes, row t the energy after sweep t. A probe that has
        stopped keeps its state, so its energy repeats in later rows.
    sweeps : int
        Sweeps run on the batch (the slowest probe).
    sweeps_per_probe : ndarray of int64, shape (n_probes,)
        Sweeps each probe took, counting the sweep that confirmed its fixed point or cycle.
    converged : ndarray of bool, shape (n_probes,)
        The probe reached a fixed point (a full sweep changed no unit).
    two_cycle : ndarray of bool, shape (n_probes,)
        Synchronous mode only: the probe ended alternating between two states.
    mode : str
        ``"async"`` or ``"sync"``.
    trajectory : ndarray of int8, shape (sweeps + 1, n_probes, n_units), or None
        States after every sweep, when asked for with ``return_trajectory=True``.

    Examples
    --------
    >>> from densemem.binary import BinaryMemory
    >>> BinaryMemory([[1, -1, 1, -1]]).retrieve([[1, -1, 1, 1]], seed=0)
    BinaryRetrieval(mode='async', n_probes=1, n_units=4, sweeps=2, converged=1/1)
    """

    states: np.ndarray
    energy: np.ndarray
    sweeps: int
    sweeps_per_probe: np.ndarray
    converged: np.ndarray
    two_cycle: np.ndarray
    mode: str
    trajectory: np.ndarray | None = None

    def __repr__(self) -> str:
        n_probes, n_units = self.states.shape
        extra = f", two_cycle={int(self.two_cycle.sum())}" if self.mode == "sync" else ""
        return (
            f"BinaryRetrieval(mode={self.mode!r}, n_probes={n_probes}, n_units={n_units}, "
            f"sweeps={self.sweeps}, converged={int(self.converged.sum())}/{n_probes}{extra})"
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain Python values (lists, ints), ready for ``json.dumps``.

        Examples
        --------
        >>> from densemem.binary import BinaryMemory
        >>> r = BinaryMemory([[1, -1, 1]]).retrieve([[1, 1, 1]], mode="sync")
        >>> r.to_dict()["states"], r.to_dict()["converged"]
        ([[1, -1, 1]], [True])
        """
        out: dict[str, Any] = {
            "mode": self.mode,
            "sweeps": self.sweeps,
            "states": self.states.tolist(),
            "energy": self.energy.tolist(),
            "sweeps_per_probe": self.sweeps_per_probe.tolist(),
            "converged": self.converged.tolist(),
            "two_cycle": self.two_cycle.tolist(),
        }
        if self.trajectory is not None:
            out["trajectory"] = self.trajectory.tolist()
        return out


def user_form(s: np.ndarray, states: str) -> np.ndarray:
    """+-1 states -> int8 states in the memory's form (v = (s + 1) / 2 for "01")."""
    return ((s + 1) // 2).astype(np.int8) if states == "01" else s.astype(np.int8)


def retrieve_batch(owner: str, engine: Engine, free: np.ndarray, states: str, n_units: int,
                   probes: Any, mode: Any, max_sweeps: Any, seed: Any,
                   return_trajectory: bool, offset: float = 0.0) -> BinaryRetrieval:
    """Validate the retrieve arguments of `owner`, run the dynamics, wrap the result.

    `offset` is added to every energy (the 0/1 form's constant, CHECKS.md entry 16).
    """
    where = f"{owner}.retrieve"
    mode = chk.check_choice(mode, "mode", chk.MODES, where)
    max_sweeps = chk.check_int(max_sweeps, "max_sweeps", where, minimum=1)
    rng = chk.as_rng(seed, where=where)
    s0 = chk.check_width(chk.check_binary(probes, "probes", states, where), n_units, "probes",
                         where)
    out = run(engine, s0, mode=mode, max_sweeps=max_sweeps, rng=rng, free=free,
              keep_trajectory=bool(return_trajectory))
    traj = out["trajectory"]
    return BinaryRetrieval(
        states=user_form(out["states"], states),
        energy=out["energy"] + offset,
        sweeps=int(out["sweeps_per_probe"].max()),
        sweeps_per_probe=out["sweeps_per_probe"],
        converged=out["converged"],
        two_cycle=out["two_cycle"],
        mode=mode,
        trajectory=None if traj is None else user_form(traj, states),
    )
