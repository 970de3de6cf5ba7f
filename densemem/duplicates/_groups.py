"""From similarity edges to duplicate groups: components, anti-chaining splits, representatives, statistics.

Groups are kept packed: ``members`` holds row numbers group after group (each
group sorted by row), ``offsets`` (n_groups + 1) marks where each one starts.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import connected_components

__all__ = ["Packed", "adjacency", "pack_labels", "split_groups", "summarise"]

_SMALL = 256  # groups up to this size get their full Gram matrix in one batched product
_BATCH_MIB = 64.0


@dataclass(slots=True)
class Packed:
    """Groups of at least two rows, packed."""

    offsets: np.ndarray  # int64, (n_groups + 1,)
    members: np.ndarray  # int64 rows

    @property
    def sizes(self) -> np.ndarray:
        return np.diff(self.offsets)

    def __len__(self) -> int:
        return int(self.offsets.shape[0] - 1)

    def group(self, g: int) -> np.ndarray:
        return self.members[self.offsets[g] : self.offsets[g + 1]]


def adjacency(n: int, lo: np.ndarray, hi: np.ndarray, sim: np.ndarray) -> csr_matrix:
    """Symmetric sparse similarity graph (CSR, float64 weights)."""
    rows = np.concatenate([lo, hi])
    cols = np.concatenate([hi, lo])
    vals = np.concatenate([sim, sim])
    return coo_matrix((vals, (rows, cols)), shape=(n, n)).tocsr()


def pack_labels(labels: np.ndarray) -> Packed:
    """Groups (size >= 2) from a component label per row, ordered by first member."""
    order = np.argsort(labels, kind="stable")
    counts = np.bincount(labels)
    starts = np.concatenate([[0], np.cumsum(counts)])
    multi = np.flatnonzero(counts >= 2)
    if multi.size == 0:
        return Packed(np.zeros(1, np.int64), np.empty(0, np.int64))
    first = order[starts[multi]]
    multi = multi[np.argsort(first, kind="stable")]
    parts = [order[starts[c] : starts[c + 1]] for c in multi]
    return _pack(parts)


def _pack(parts: list[np.ndarray]) -> Packed:
    if not parts:
        return Packed(np.zeros(1, np.int64), np.empty(0, np.int64))
    sizes = np.fromiter((p.size for p in parts), dtype=np.int64, count=len(parts))
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    return Packed(offsets, np.concatenate(parts).astype(np.int64))


def components(n: int, adj: csr_matrix) -> np.ndarray:
    """Connected-component label per row (scipy.sparse.csgraph.connected_components)."""
    if n == 0:
        return np.empty(0, dtype=np.int64)
    _, labels = connected_components(adj, directed=False)
    return labels


# ------------------------------------------------------------ anti-chaining
def _seed_order_key(rule: str, rows: np.ndarray, score: np.ndarray | None, deg: np.ndarray, wdeg: np.ndarray) -> int:
    """Local index of the next seed among the candidates ``rows`` (local indices)."""
    if rule == "first":
        return int(rows[0])
    if rule == "quality":
        assert score is not None
        return int(rows[np.argmax(score[rows])])  # argmax takes the first of ties
    best = np.lexsort((-wdeg[rows], -deg[rows]))[0]  # most neighbours, then most similarity
    return int(rows[best])


def _split_one(sub: csr_matrix, mode: str, rule: str, score: np.ndarray | None) -> list[tuple[int, np.ndarray]]:
    """Split one component (local graph ``sub``) into (seed, members) pieces."""
    s = sub.shape[0]
    alive = np.ones(s, dtype=bool)
    deg = np.diff(sub.indptr).astype(np.int64)
    wdeg = np.asarray(sub.sum(axis=1)).ravel()
    neigh = [sub.indices[sub.indptr[i] : sub.indptr[i + 1]] for i in range(s)]
    nsim = [sub.data[sub.indptr[i] : sub.indptr[i + 1]] for i in range(s)]
    out = []
    while alive.any():
        seed = _seed_order_key(rule, np.flatnonzero(alive), score, deg, wdeg)
        nb, w = neigh[seed], nsim[seed]
        ok = alive[nb]
        nb, w = nb[ok], w[ok]
        if mode == "star":
            chosen = nb
        else:  # complete: add the most similar first, only if adjacent to every member so far
            chosen_list: list[int] = []
            group_sets = [set(neigh[seed].tolist())]
            for u in nb[np.argsort(-w, kind="stable")].tolist():
                if all(u in gs for gs in group_sets):
                    chosen_list.append(u)
                    group_sets.append(set(neigh[u].tolist()))
            chosen = np.asarray(chosen_list, dtype=np.int64)
        piece = np.concatenate([[seed], chosen]).astype(np.int64)
        alive[piece] = False
        for v in piece.tolist():  # the neighbours of removed rows lose them
            nbv = neigh[v]
            live = alive[nbv]
            deg[nbv[live]] -= 1
            wdeg[nbv[live]] -= nsim[v][live]
        out.append((seed, piece))
    return out


def _subgraph(adj: csr_matrix, rows: np.ndarray) -> csr_matrix:
    """``adj[rows][:, rows]`` for sorted ``rows``, in time proportional to their edges.

    SciPy's column selection builds an index map over all ``n`` columns per call,
    which over the 10^5-10^6 groups of a 10M-row plan made grouping quadratic
    (minutes); here the rows' edges are gathered and their columns mapped to local
    numbers by a binary search in ``rows``.
    """
    s = rows.size
    starts, ends = adj.indptr[rows], adj.indptr[rows + 1]
    lens = (ends - starts).astype(np.int64)
    first = np.cumsum(lens) - lens
    pos = np.arange(int(lens.sum()), dtype=np.int64) - np.repeat(first - starts, lens)
    cols = adj.indices[pos]
    local = np.minimum(np.searchsorted(rows, cols), s - 1)
    keep = rows[local] == cols
    owner = np.repeat(np.arange(s), lens)[keep]
    indptr = np.zeros(s + 1, dtype=np.int64)
    np.cumsum(np.bincount(owner, minlength=s), out=indptr[1:])
    return csr_matrix((adj.data[pos][keep], local[keep], indptr), shape=(s, s))


def split_groups(
    groups: Packed, adj: csr_matrix, mode: str, rule: str, score: np.ndarray | None
) -> tuple[Packed, np.ndarray]:
    """Split components so no member is chained in.

    ``star``: each piece is a seed and its still-unassigned neighbours, so every
    member is within the threshold of the seed, which becomes the representative.
    ``complete``: a piece grows from the seed by the most similar neighbour that
    is within the threshold of every member already in it (greedy complete
    linkage), so every pair in a piece meets the threshold.
    Returns the new groups and their representatives (rows).
    """
    parts: list[np.ndarray] = []
    reps: list[int] = []
    for g in range(len(groups)):
        rows = groups.group(g)
        if rows.size == 2:
            parts.append(rows)
            reps.append(int(rows[0]) if rule != "quality" else int(rows[np.argmax(score[rows])]))  # type: ignore[index]
            continue
        sub = _subgraph(adj, rows)
        local_score = None if score is None else score[rows]
        for seed, piece in _split_one(sub, mode, rule, local_score):
            if piece.size >= 2:
                parts.append(np.sort(rows[piece]))
                reps.append(int(rows[seed]))
    order = np.argsort([p[0] for p in parts], kind="stable") if parts else np.empty(0, np.int64)
    packed = _pack([parts[i] for i in order])
    return packed, np.asarray([reps[i] for i in order], dtype=np.int64)


# ------------------------------------------------------------ representatives + stats
def _rule_reps(groups: Packed, rule: str, score: np.ndarray | None) -> np.ndarray | None:
    if rule == "first":
        return groups.members[groups.offsets[:-1]].copy()
    if rule == "quality":
        assert score is not None
        gid = np.repeat(np.arange(len(groups)), groups.sizes)
        order = np.lexsort((groups.members, -score[groups.members], gid))
        return groups.members[order[groups.offsets[:-1]]]
    return None  # medoid: found from the Gram matrices


def summarise(
    xn: np.ndarray, groups: Packed, rule: str, score: np.ndarray | None, reps: np.ndarray | None = None
) -> dict[str, np.ndarray]:
    """Representatives (unless given), min/mean pairwise cosine, and each member's cosine to its representative.

    The medoid is the member with the largest summed cosine to the others.
    """
    n_g = len(groups)
    if reps is None:
        reps = _rule_reps(groups, rule, score)
    rep_out = np.empty(n_g, np.int64) if reps is None else np.asarray(reps, np.int64)
    min_sim = np.empty(n_g)
    mean_sim = np.empty(n_g)
    to_rep = np.empty(groups.members.shape[0])
    sizes = groups.sizes
    d = xn.shape[1]
    for s in np.unique(sizes).tolist():
        idx = np.flatnonzero(sizes == s)
        if s > _SMALL:
            for g in idx.tolist():
                _big_group(xn, groups, g, reps, rep_out, min_sim, mean_sim, to_rep)
            continue
        per = max(1, int(_BATCH_MIB * 2**20 / (8.0 * s * (s + d))))
        for a in range(0, idx.size, per):
            gi = idx[a : a + per]
            pos = groups.offsets[gi][:, None] + np.arange(s)  # (g, s) positions in members
            x = xn[groups.members[pos]].astype(np.float64)
            gram = np.matmul(x, x.transpose(0, 2, 1))
            total = gram.sum(axis=(1, 2)) - np.trace(gram, axis1=1, axis2=2)
            mean_sim[gi] = total / (s * (s - 1))
            diag = np.arange(s)
            gram[:, diag, diag] = np.inf
            min_sim[gi] = gram.min(axis=(1, 2))
            gram[:, diag, diag] = np.einsum("gij,gij->gi", x, x)
            if reps is None:
                local = np.argmax(gram.sum(axis=2) - gram[:, diag, diag], axis=1)
                rep_out[gi] = groups.members[pos[np.arange(gi.size), local]]
            else:
                local = np.argmax(groups.members[pos] == rep_out[gi][:, None], axis=1)
            to_rep[pos] = gram[np.arange(gi.size), local, :]
    return {"reps": rep_out, "min": min_sim, "mean": mean_sim, "to_rep": to_rep}


def _big_group(
    xn: np.ndarray, groups: Packed, g: int, reps: Any, rep_out: np.ndarray,
    min_sim: np.ndarray, mean_sim: np.ndarray, to_rep: np.ndarray,
) -> None:
    """Statistics of one large group, in row blocks (memory stays bounded)."""
    rows = groups.group(g)
    x = xn[rows].astype(np.float64)
    s = rows.size
    total_vec = x.sum(axis=0)
    self_sq = np.einsum("ij,ij->i", x, x)
    summed = x @ total_vec - self_sq  # each member's summed cosine to the others
    mean_sim[g] = summed.sum() / (s * (s - 1))
    lo = np.inf
    step = max(1, int(_BATCH_MIB * 2**20 / (8.0 * s)))
    for a in range(0, s, step):
        block = x[a : a + step] @ x.T
        block[np.arange(block.shape[0]), np.arange(a, a + block.shape[0])] = np.inf
        lo = min(lo, float(block.min()))
    min_sim[g] = lo
    if reps is None:
        rep_out[g] = rows[int(np.argmax(summed))]
    local = int(np.flatnonzero(rows == rep_out[g])[0])
    to_rep[groups.offsets[g] : groups.offsets[g + 1]] = x @ x[local]
