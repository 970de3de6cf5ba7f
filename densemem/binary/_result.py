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
    """Outcome of retrieving a batch of queries from a binary memory.

    Attributes
    ----------
    states : ndarray of int8, shape (n_queries, n_units)
        Final states, in the memory's form (-1/+1 or 0/1).
    energy : ndarray of float64, shape (steps + 1, n_queries)
        Row 0 is the energy of the queries, row t the energy after step t. A query that has
        stopped keeps its state, so its energy repeats in later rows.
    steps : int
        Steps run on the batch (the slowest query); one step is one sweep over every unit.
    steps_per_query : ndarray of int64, shape (n_queries,)
        Steps each query took, counting the step that confirmed its fixed point or cycle.
    converged : ndarray of bool, shape (n_queries,)
        The query reached a fixed point (a full sweep changed no unit).
    two_cycle : ndarray of bool, shape (n_queries,)
        Synchronous mode only: the query ended alternating between two states.
    mode : str
        ``"async"`` or ``"sync"``.
    trajectory : ndarray of int8, shape (steps + 1, n_queries, n_units), or None
        States after every step, when asked for with ``return_trajectory=True``.

    Examples
    --------
    >>> from densemem.binary import BinaryMemory
    >>> BinaryMemory([[1, -1, 1, -1]]).retrieve([[1, -1, 1, 1]], seed=0)
    BinaryRetrieval(mode='async', n_queries=1, n_units=4, steps=2, converged=1/1)
    """

    states: np.ndarray
    energy: np.ndarray
    steps: int
    steps_per_query: np.ndarray
    converged: np.ndarray
    two_cycle: np.ndarray
    mode: str
    trajectory: np.ndarray | None = None

    def __repr__(self) -> str:
        n_queries, n_units = self.states.shape
        extra = f", two_cycle={int(self.two_cycle.sum())}" if self.mode == "sync" else ""
        return (
            f"BinaryRetrieval(mode={self.mode!r}, n_queries={n_queries}, n_units={n_units}, "
            f"steps={self.steps}, converged={int(self.converged.sum())}/{n_queries}{extra})"
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
            "steps": self.steps,
            "states": self.states.tolist(),
            "energy": self.energy.tolist(),
            "steps_per_query": self.steps_per_query.tolist(),
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
                   queries: Any, mode: Any, steps: Any, seed: Any,
                   return_trajectory: bool, offset: float = 0.0) -> BinaryRetrieval:
    """Validate the retrieve arguments of `owner`, run the dynamics, wrap the result.

    `offset` is added to every energy (the 0/1 form's constant, derived 0/1 <-> +-1 map).
    """
    where = f"{owner}.retrieve"
    mode = chk.check_choice(mode, "mode", chk.MODES, where)
    steps = chk.check_int(steps, "steps", where, minimum=1)
    rng = chk.as_rng(seed, where=where)
    s0 = chk.check_width(chk.check_binary(queries, "queries", states, where), n_units, "queries",
                         where)
    out = run(engine, s0, mode=mode, steps=steps, rng=rng, free=free,
              keep_trajectory=bool(return_trajectory))
    traj = out["trajectory"]
    return BinaryRetrieval(
        states=user_form(out["states"], states),
        energy=out["energy"] + offset,
        steps=int(out["steps_per_query"].max()),
        steps_per_query=out["steps_per_query"],
        converged=out["converged"],
        two_cycle=out["two_cycle"],
        mode=mode,
        trajectory=None if traj is None else user_form(traj, states),
    )
