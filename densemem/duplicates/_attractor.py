"""Attractor grouping: retrieve from every stored item and group items whose retrieval ends together.

Choice of beta (derived, for unit vectors). Put two stored items at cosine c
around their midpoint, ``x = m +- a e`` with ``a^2 = (1 - c) / 2``. Along ``e``
the update is ``u' = a tanh(beta a u)``; the blended state ``u = 0`` is stable
exactly when its slope ``beta a^2 = beta (1 - c) / 2`` is below 1. Hence

    beta = 2 / (1 - threshold)

makes pairs above the threshold blend into one fixed point and pairs below it
settle at two separate ones. The same beta works for larger groups: the update's
Jacobian is ``beta Cov_p(x)`` and the variance of any projection of points of
squared diameter ``2 (1 - t)`` is at most ``(1 - t) / 2`` (Popoviciu's
inequality), so a group whose pairwise cosines all meet the threshold is
contracted to one state. A rival at cosine c below the threshold keeps
relative weight ``exp(-beta (1 - c))`` = ``exp(-2 (1 - c) / (1 - t))``.

Near the threshold the contraction factor tends to 1 (slow convergence) and a
split pair's two states lie close together, so the method is soft within a
narrow band around the threshold; the graph method is the sharp one.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import faiss
import numpy as np

from ._groups import Packed, adjacency, components, pack_labels

__all__ = ["attractor_groups", "beta_for_threshold", "merge_radius"]

MERGE_FRACTION = 0.1
"""States closer than this fraction of the threshold distance sqrt(2(1 - t)) coincide."""


def beta_for_threshold(threshold: float) -> float:
    """The bifurcation beta ``2 / (1 - threshold)`` (see the module notes)."""
    return 2.0 / (1.0 - threshold)


def merge_radius(threshold: float) -> float:
    """Distance below which two final states count as the same attractor.

    A pair at cosine c splits into states ``2 a r`` apart, with ``r = tanh(b r)``
    and ``b = (1 - c) / (1 - t)``; ``r = 0.1`` needs ``b = atanh(0.1) / 0.1 =
    1.0034``, so pairs more than 0.4% of ``1 - t`` below the threshold stay apart.
    """
    return MERGE_FRACTION * float(np.sqrt(2.0 * (1.0 - threshold)))


def attractor_groups(
    xn: np.ndarray,
    threshold: float,
    *,
    beta: float,
    max_steps: int,
    tol: float,
    retrieval: str,
    chunk: int,
    progress: Callable[[str, int], Any] | None = None,
) -> tuple[Packed, dict[str, Any]]:
    """Retrieve from every row of ``xn`` (unit rows) and group coinciding final states."""
    from ..dense import DenseMemory

    n = xn.shape[0]
    mem = DenseMemory.from_array(xn, normalize=False, beta=beta)
    states = np.empty_like(xn)
    unconverged = 0
    most_steps = 0
    bar = progress("dedup: attractor retrieval", n) if progress is not None else None
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        res = mem.retrieve(
            xn[a:b], beta, steps=max_steps, tol=tol, k=1, method=retrieval, return_energy=False
        )
        states[a:b] = res.states
        unconverged += int((~res.converged).sum())
        most_steps = max(most_steps, int(res.steps))
        if bar is not None:
            bar.update(b - a)
    if bar is not None:
        bar.close()
    radius = merge_radius(threshold)
    lo, hi = _close_states(states, radius, chunk)
    adj = adjacency(n, lo, hi, np.ones(lo.shape[0]))
    groups = pack_labels(components(n, adj))
    info = {
        "retrieval": retrieval,
        "beta": beta,
        "max_steps": max_steps,
        "steps_used": most_steps,
        "tol": tol,
        "n_unconverged": unconverged,
        "merge_radius": radius,
        "state_pairs": int(lo.shape[0]),
    }
    return groups, info


def _close_states(states: np.ndarray, radius: float, chunk: int) -> tuple[np.ndarray, np.ndarray]:
    """Pairs of states within Euclidean ``radius`` (faiss IndexFlatL2.range_search)."""
    n, d = states.shape
    index = faiss.IndexFlatL2(d)
    index.add(states)
    los, his = [], []
    for a in range(0, n, chunk):
        lims, _, lab = index.range_search(states[a : a + chunk], radius * radius)
        q = np.repeat(np.arange(a, a + len(lims) - 1, dtype=np.int64), np.diff(lims.astype(np.int64)))
        keep = lab > q
        los.append(q[keep])
        his.append(lab[keep].astype(np.int64))
    return np.concatenate(los), np.concatenate(his)
