"""The partial-softmax kernel and its exact merge.

Every retrieval path in densemem reduces *some set of stored rows* to a
:class:`Partial` per query batch and merges partials with :func:`merge`:

    m   : running max of z = beta * score                      (B,)   float64
    l   : sum_i exp(z_i - m)                                   (B,)   float64
    acc : sum_i exp(z_i - m) * x_i                             (B, d) float32
    top : the k largest z with their global row numbers        (B, k)

and, only when asked (``moments=True``; plain retrieval pays nothing), two more
sums for statistics of the full weight vector p = softmax(z):

    s   : sum_i exp(z_i - m) * (z_i - m)                       (B,)   float64
    q   : sum_i exp(2 (z_i - m))                               (B,)   float64

from which the Shannon entropy ``H = -sum p ln p = ln l - s / l`` and the
participation ratio ``PR = 1 / sum p^2 = l^2 / q`` follow (both free of m).

Two partials over disjoint row sets merge exactly (the online-softmax identity,
Milakov & Gimelshein, arXiv:1805.02867): ``m = max(m1, m2)``,
``l = l1 e^(m1-m) + l2 e^(m2-m)``, ``acc`` likewise, ``top`` = the k largest of
both. A new reference ``m'`` rescales the moments exactly with
``a = e^(m-m')``: ``s' = a (s + (m - m') l)``, ``q' = a^2 q``. The merge is associative and commutative, so any tree order gives the same
answer up to rounding.

``m`` only has to be a *reference* value: any ``m >= max z - small`` keeps the
exponentials finite, and the merge is exact for any reference.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Partial", "block", "gathered", "merge", "finish"]

_NEG = -np.inf


@dataclass(slots=True)
class Partial:
    """Softmax statistics of one query batch over one set of stored rows."""

    m: np.ndarray  # (B,) float64 reference (max of z seen, or up to ln 2 below it: compiled kernel), -inf when no rows
    l: np.ndarray  # (B,) float64
    acc: np.ndarray | None  # (B, d) float32, None when not asked for
    top_z: np.ndarray  # (B, k) float32 (float64 from the compiled kernel), -inf padded, unsorted
    top_i: np.ndarray  # (B, k) int64 global row numbers, -1 padded
    s: np.ndarray | None = None  # (B,) float64 sum e^(z-m) (z-m), None when not asked for
    q: np.ndarray | None = None  # (B,) float64 sum e^(2(z-m)), None when not asked for

    @property
    def n_queries(self) -> int:
        return int(self.m.shape[0])


def empty(n_queries: int, dim: int, k: int, *, need_acc: bool = True, moments: bool = False) -> Partial:
    """The partial of an empty row set (the identity of :func:`merge`)."""
    return Partial(
        m=np.full(n_queries, _NEG),
        l=np.zeros(n_queries),
        acc=np.zeros((n_queries, dim), dtype=np.float32) if need_acc else None,
        top_z=np.full((n_queries, k), _NEG, dtype=np.float32),
        top_i=np.full((n_queries, k), -1, dtype=np.int64),
        s=np.zeros(n_queries) if moments else None,
        q=np.zeros(n_queries) if moments else None,
    )


def _select_top(vals: np.ndarray, idx: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Keep the k largest entries per row of (vals, idx); pad with -inf / -1."""
    width = vals.shape[1]
    if k == 0:
        return vals[:, :0].copy(), idx[:, :0].copy()
    if width > k:
        sel = np.argpartition(vals, width - k, axis=1)[:, width - k :]
        return np.take_along_axis(vals, sel, 1), np.take_along_axis(idx, sel, 1)
    if width == k:
        return vals.copy(), idx.copy()  # callers overwrite score tiles in place
    if width < k:
        pad = k - width
        vals = np.concatenate([vals, np.full((vals.shape[0], pad), _NEG, vals.dtype)], axis=1)
        idx = np.concatenate([idx, np.full((idx.shape[0], pad), -1, np.int64)], axis=1)
    return vals, idx


_GROUP = 16  # columns per group in the two-level top-k of a tile


def _block_top(z: np.ndarray, k: int, offset: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Top-k of a score tile and each row's max, without a full partition.

    The tile's columns are folded into ``G = width // 16`` strided groups
    (group j holds columns j, j+G, j+2G, ...). One element-wise max over the 16
    slices gives every group's max; the k groups with the largest maxima
    contain every top-k entry (if an entry's group were outside them, k other
    groups would each hold a larger entry). Only those k * 16 entries are then
    partitioned. Columns past ``16 * G`` are candidates directly.

    Returns (top_z, top_i, row_max).
    """
    n_rows, width = z.shape
    n_groups = width // _GROUP
    if n_groups <= k:
        idx = np.broadcast_to(np.arange(width, dtype=np.int64), z.shape)
        vals, top_i = _select_top(z, idx, k)  # padded with -1 where k > width: stays -1
        return vals, np.where(top_i >= 0, top_i + offset, -1), z.max(axis=1).astype(np.float64)
    main = n_groups * _GROUP
    gmax = z[:, :n_groups].copy()  # (B, G): element-wise max of 16 column slices
    for c in range(1, _GROUP):
        np.maximum(gmax, z[:, c * n_groups : (c + 1) * n_groups], out=gmax)
    row_max = gmax.max(axis=1)
    best = np.argpartition(gmax, n_groups - k, axis=1)[:, n_groups - k :]  # (B, k)
    cols = (best[:, :, None] + (np.arange(_GROUP, dtype=np.int64) * n_groups)[None, None, :]).reshape(n_rows, -1)
    if main < width:
        rest = np.broadcast_to(np.arange(main, width, dtype=np.int64), (n_rows, width - main))
        cols = np.concatenate([cols, rest], axis=1)
        row_max = np.maximum(row_max, z[:, main:].max(axis=1))
    vals = np.take_along_axis(z, cols, 1)
    vals, top_i = _select_top(vals, cols, k)
    return vals, top_i + offset, row_max.astype(np.float64)


def _energy_sum(z: np.ndarray) -> np.ndarray:
    """sum exp(z) per row of a max-shifted tile (z <= 0), accurate for the energy.

    When a row's z all lie within 1 of its max (small beta * M^2) every exp term
    rounds near 1 in float32 and ln(l) - ln(n), all the energy depends on, is
    lost; there l = n + sum expm1(z) keeps it (each term >= -0.63, so nothing
    cancels). Rows with a wider spread use exp and a positive sum.
    """
    n = z.shape[1]
    narrow = z.min(axis=1) >= -1.0
    l = np.empty(z.shape[0], dtype=np.float64)
    if narrow.all():
        np.expm1(z, out=z)
        return n + z.sum(axis=1).astype(np.float64)
    if not narrow.any():
        np.exp(z, out=z)
        return z.sum(axis=1).astype(np.float64)
    l[narrow] = n + np.expm1(z[narrow]).sum(axis=1).astype(np.float64)
    l[~narrow] = np.exp(z[~narrow]).sum(axis=1).astype(np.float64)
    return l


def block(
    z: np.ndarray,
    rows: np.ndarray,
    *,
    k: int,
    offset: int = 0,
    need_acc: bool = True,
    moments: bool = False,
) -> Partial:
    """Partial of a tile of stored rows shared by every query.

    Parameters
    ----------
    z : ndarray of shape (n_queries, n_rows), float32
        ``beta * queries @ rows.T``. Overwritten in place.
    rows : ndarray of shape (n_rows, dim), float32
        The stored rows of this tile.
    k : int
        Size of the top list kept (0 keeps none).
    offset : int
        Global row number of ``rows[0]``.
    need_acc : bool
        Whether to form the weighted sum of rows (the second matrix product).
    moments : bool
        Whether to also sum ``e (z - m)`` and ``e^2`` (entropy and
        participation ratio; see the module docstring).
    """
    if k > 0:
        top_z, top_i, m = _block_top(z, k, offset)
    else:
        top_z = np.empty((z.shape[0], 0), np.float32)
        top_i = np.empty((z.shape[0], 0), np.int64)
        m = z.max(axis=1).astype(np.float64)
    s = q = l64 = None
    if moments:  # entropy and participation ratio in float64 from the float32 scores (tuning only)
        l64, s, q = _moment_sums(z, m)
    z -= m[:, None].astype(np.float32)
    if need_acc:
        np.exp(z, out=z)
        l = z.sum(axis=1).astype(np.float64)  # float32 pairwise sum: ~1e-7 relative
        acc = z @ rows
    else:
        l = l64 if l64 is not None else _energy_sum(z)  # with moments the float64 sum is already there
        acc = None
    if l64 is not None:
        l = l64  # the normaliser the moments were summed with, so H = ln l - s / l is float64-exact
    return Partial(m=m, l=l, acc=acc, top_z=top_z, top_i=top_i, s=s, q=q)


def _moment_sums(z: np.ndarray, m: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """sum e, sum e (z - m) and sum e^2 per row in float64, with e = exp(z - m) from the float32 scores ``z``.

    Everything after the float32 product is float64, so the entropy ``ln l - s / l``
    keeps float64 accuracy (its difference of near-equal terms at small beta
    would lose the float32 digits otherwise).
    """
    zs = z.astype(np.float64)
    zs -= m[:, None]
    e = np.exp(zs)
    return e.sum(axis=1), np.einsum("ij,ij->i", e, zs), np.einsum("ij,ij->i", e, e)


def gathered(
    z: np.ndarray,
    rows: np.ndarray | None,
    ids: np.ndarray,
    *,
    k: int,
    moments: bool = False,
) -> Partial:
    """Partial over a per-query candidate set (certified and index-backed paths).

    Parameters
    ----------
    z : ndarray of shape (n_queries, n_cand)
        ``beta * score`` of each query's candidates; ``-inf`` marks a missing one.
    rows : ndarray of shape (n_queries, n_cand, dim) or None
        The candidate vectors (None: no weighted sum).
    ids : ndarray of shape (n_queries, n_cand), int64
        Global row numbers of the candidates (-1 for a missing one).
    k : int
        Size of the top list kept.
    moments : bool
        Whether to also sum ``e (z - m)`` and ``e^2`` over the candidates.
    """
    # Round scores to float32 first (as the tiled path does) so the reported
    # top scores and the reference max agree exactly: weights exp(top_z - m) <= 1.
    z = np.asarray(z, dtype=np.float32).astype(np.float64)
    m = z.max(axis=1)
    safe_m = np.where(np.isfinite(m), m, 0.0)
    w = np.exp(z - safe_m[:, None])
    l = w.sum(axis=1)
    acc = None
    if rows is not None:
        acc = np.einsum("bc,bcd->bd", w.astype(np.float32), rows, optimize=True).astype(np.float32)
    top_z, top_i = _select_top(z.astype(np.float32), ids.astype(np.int64), k)
    s = q = None
    if moments:
        with np.errstate(invalid="ignore"):
            zs = np.where(w > 0, z - safe_m[:, None], 0.0)
        s = np.einsum("bc,bc->b", w, zs)
        q = np.einsum("bc,bc->b", w, w)
    return Partial(m=m, l=l, acc=acc, top_z=top_z, top_i=top_i, s=s, q=q)


def _rescale(m_old: np.ndarray, m_new: np.ndarray) -> np.ndarray:
    """exp(m_old - m_new), with an empty side (-inf) giving 0 instead of NaN."""
    with np.errstate(invalid="ignore"):
        d = m_old - m_new
    return np.where(np.isfinite(m_old), np.exp(np.where(np.isfinite(d), d, _NEG)), 0.0)


def merge(a: Partial, b: Partial) -> Partial:
    """Merge two partials over disjoint row sets, exactly."""
    m = np.maximum(a.m, b.m)
    ea, eb = _rescale(a.m, m), _rescale(b.m, m)
    l = a.l * ea + b.l * eb
    acc = None
    if a.acc is not None and b.acc is not None:
        acc = a.acc * ea.astype(np.float32)[:, None] + b.acc * eb.astype(np.float32)[:, None]
    k = max(a.top_z.shape[1], b.top_z.shape[1])
    top_z, top_i = _select_top(
        np.concatenate([a.top_z, b.top_z], axis=1), np.concatenate([a.top_i, b.top_i], axis=1), k
    )
    s = q = None
    if a.s is not None and b.s is not None and a.q is not None and b.q is not None:
        s = _shift_s(a, m, ea) + _shift_s(b, m, eb)
        q = a.q * ea * ea + b.q * eb * eb
    return Partial(m=m, l=l, acc=acc, top_z=top_z, top_i=top_i, s=s, q=q)


def _shift_s(p: Partial, m: np.ndarray, e: np.ndarray) -> np.ndarray:
    """``s`` of ``p`` moved to the reference ``m``: e (s + (m_p - m) l); 0 for an empty side."""
    assert p.s is not None
    with np.errstate(invalid="ignore"):
        d = np.where(np.isfinite(p.m), p.m - m, 0.0)
    return e * (p.s + d * p.l)


@dataclass(slots=True)
class Finished:
    """A partial turned into answers."""

    states: np.ndarray | None  # (B, d) float32, the softmax-weighted mean
    lse: np.ndarray  # (B,) float64, log sum_i exp(z_i)
    top_i: np.ndarray  # (B, k) row numbers, heaviest first
    top_w: np.ndarray  # (B, k) softmax weights, heaviest first
    top_z: np.ndarray  # (B, k) beta * score, heaviest first
    entropy: np.ndarray | None = None  # (B,) nats, -sum p ln p over the partial's rows
    participation: np.ndarray | None = None  # (B,) 1 / sum p^2 over the partial's rows


def finish(p: Partial) -> Finished:
    """Normalize a partial: states = acc / l, lse = m + log l, sorted top list."""
    states = None
    if p.acc is not None:
        states = (p.acc / p.l[:, None]).astype(np.float32)
    with np.errstate(divide="ignore"):
        lse = p.m + np.log(p.l)
    order = np.argsort(-p.top_z, axis=1, kind="stable")
    top_z = np.take_along_axis(p.top_z, order, 1)
    top_i = np.take_along_axis(p.top_i, order, 1)
    with np.errstate(invalid="ignore"):
        top_w = np.exp(top_z.astype(np.float64) - p.m[:, None]) / p.l[:, None]
    top_w = np.where(top_i >= 0, top_w, 0.0)
    entropy = participation = None
    if p.s is not None and p.q is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            entropy = np.maximum(np.log(p.l) - p.s / p.l, 0.0)
            participation = p.l * p.l / p.q
    return Finished(states=states, lse=lse, top_i=top_i, top_w=top_w, top_z=top_z,
                    entropy=entropy, participation=participation)
