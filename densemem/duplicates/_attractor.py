"""Attractor judging: the dense-memory dynamics decide which candidate pairs belong together.

Candidate pairs (every pair at or above the threshold) come from the same faiss
search as the graph method; the dynamics then keep a pair when both items end
in the same state, and the grouping rule (star by default) applies to the kept
pairs, so a dropped item always meets the threshold against the item kept for
it. Retrieving over the whole table instead lets many rivals just below the
threshold pull distant items into one blended state (on scikit-learn's digits
at threshold 0.98: one state shared by 152 rows whose smallest pairwise cosine
is 0.73), and costs ``n**2 * d`` per step.

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

from ._groups import adjacency, components, pack_labels

__all__ = ["attractor_edges", "beta_for_threshold", "merge_radius"]

BATCH_SIZE_MAX = 64
"""Components up to this size are iterated together in one batched update."""

_BATCH_MIB = 64.0

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


def attractor_edges(
    xn: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    threshold: float,
    *,
    beta: float,
    steps: int,
    tol: float,
    retrieve_method: str,
    progress: Callable[[str, int], Any] | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Judge each candidate pair (every pair above the threshold) by the dense-memory dynamics.

    The candidate graph's connected components are retrieved separately: the
    memory of a component holds its rows only. Rows of other components are
    below the threshold to every member (relative weight below
    ``exp(-beta (1 - t)) = e**-2`` each) and are left out by design: the
    dynamics judge pairs above the threshold, they do not pull in rivals
    below it. This also keeps the cost at ``sum(size**2) * d`` per step
    instead of ``n**2 * d``. Every member is
    retrieved from its own row; members whose final states coincide (within
    :func:`merge_radius`) share an attractor. A candidate pair is joined when
    both ends share one. Returns the boolean mask of joined pairs and the run's
    figures.
    """
    from ..dense import DenseMemory

    n = xn.shape[0]
    comps = pack_labels(components(n, adjacency(n, lo, hi, np.ones(lo.shape[0]))))
    radius = merge_radius(threshold)
    run = {"unconverged": 0, "steps": 0}
    close_lo: list[np.ndarray] = []
    close_hi: list[np.ndarray] = []
    bar = progress("dedup: attractor retrieval", int(comps.members.shape[0])) if progress is not None else None
    sizes = comps.sizes
    for s in np.unique(sizes).tolist():
        idx = np.flatnonzero(sizes == s)
        if s <= BATCH_SIZE_MAX:  # many small components: one batched update for all of them
            per = max(1, int(_BATCH_MIB * 2**20 / (8.0 * s * (s + xn.shape[1]) * 4)))
            for a in range(0, idx.size, per):
                pos = comps.offsets[idx[a : a + per]][:, None] + np.arange(s)
                rows = comps.members[pos]  # (g, s)
                states = _batched_fixed_points(xn[rows].astype(np.float64), beta, steps, tol, run)
                d2 = np.einsum("gid,gjd->gij", states, states)
                sq = np.einsum("gid,gid->gi", states, states)
                dist2 = sq[:, :, None] + sq[:, None, :] - 2.0 * d2
                g_i, i, j = np.nonzero(np.triu(dist2 <= radius * radius, k=1))
                close_lo.append(rows[g_i, i])
                close_hi.append(rows[g_i, j])
                if bar is not None:
                    bar.update(rows.size)
            continue
        for g in idx.tolist():  # a large component: DenseMemory.retrieve on its rows
            rows = comps.group(g)
            local = xn[rows]
            mem = DenseMemory.from_array(local, normalize=False, beta=beta)
            res = mem.retrieve(local, beta, steps=steps, tol=tol, k=1, method=retrieve_method, return_energy=False)
            run["unconverged"] += int((~res.converged).sum())
            run["steps"] = max(run["steps"], int(res.steps))
            a_, b_ = _close_states(np.ascontiguousarray(res.states, dtype=np.float32), radius, 4096)
            close_lo.append(rows[a_])
            close_hi.append(rows[b_])
            if bar is not None:
                bar.update(rows.size)
    if bar is not None:
        bar.close()
    c_lo = np.concatenate(close_lo) if close_lo else np.empty(0, np.int64)
    c_hi = np.concatenate(close_hi) if close_hi else np.empty(0, np.int64)
    label = components(n, adjacency(n, c_lo, c_hi, np.ones(c_lo.shape[0])))
    n_attr = int(np.unique(label[comps.members]).size)
    unconverged, most_steps = run["unconverged"], run["steps"]
    joined = label[lo] == label[hi]
    info = {
        "retrieve_method": retrieve_method,
        "beta": beta,
        "steps": steps,
        "steps_used": most_steps,
        "tol": tol,
        "n_unconverged": unconverged,
        "merge_radius": radius,
        "components_retrieved": len(comps),
        "rows_retrieved": int(comps.members.shape[0]),
        "attractors": n_attr,
        "pairs_judged": int(lo.shape[0]),
        "pairs_joined": int(joined.sum()),
    }
    return joined, info


def _batched_fixed_points(x: np.ndarray, beta: float, steps: int, tol: float,
                          run: dict[str, int]) -> np.ndarray:
    """Iterate ``xi <- X^T softmax(beta X xi)`` for a batch of small memories, from every stored row.

    ``x`` is (g, s, d): g memories of s unit rows each, every memory queried
    from each of its rows. It is the update and the stopping rule of
    :meth:`DenseMemory.retrieve` (method "exact"; a query stops once its state
    moves by at most ``tol`` times the largest stored norm, 1 here), batched
    over components so that thousands of pairs cost one array operation per
    step instead of one retrieval each.
    """
    states = x.copy()
    active = np.ones(x.shape[:2], dtype=bool)
    for step in range(steps):
        logits = beta * np.matmul(states, x.transpose(0, 2, 1))  # (g, s, s)
        logits -= logits.max(axis=2, keepdims=True)
        w = np.exp(logits)
        w /= w.sum(axis=2, keepdims=True)
        new = np.matmul(w, x)
        moved = np.linalg.norm(new - states, axis=2)
        states = np.where(active[:, :, None], new, states)
        active &= moved > tol
        run["steps"] = max(run["steps"], step + 1)
        if not active.any():
            break
    run["unconverged"] += int(active.sum())
    return states


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
