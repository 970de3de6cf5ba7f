"""Row sources: one pass of the update over some set of rows, as a partial that carries its ids.

A *row source* answers one question: for these states, what is the softmax
partial over my rows? (:class:`RowSource`). Three sources exist: one memory's
table (:class:`TableRows`, here), every shard of a sharded store in this
process, and every shard on a Dask cluster (both in :mod:`densemem.sharding`).
All return an :class:`IdPartial`: the kernel's partial with the ids of its top
rows and, for "certified" and "auto", the per-query bound. Two id partials over
disjoint rows merge exactly (:func:`merge`), so the step loop in
:mod:`densemem.core.steps` never knows which source it drives.

Bound of a merge. A certified part over rows ``R`` with normalizer ``l_R``
omits at most ``eps_R l_R`` of mass (in the units of its own reference ``m_R``).
The merge rescales both omitted masses to the merged reference and divides by
the merged normalizer: ``eps = (eps_A l_A e^(m_A-m) + eps_B l_B e^(m_B-m)) / l``,
at most ``max(eps_A, eps_B)`` since ``l`` is at least each rescaled ``l_R``. An
exact part omits nothing. The state bound ``2 M eps`` follows as on one machine.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Iterator, Protocol, Sequence

import faiss
import numpy as np

from . import partial as P
from .candidates import CertifiedOptions, _put, bound_can_hold, certified_reduce, index_reduce
from .exact import exact_reduce
from .ids import common_ids as _common_ids
from .ids import id_fill, ids_of
from .tiles import knn_tiles

if TYPE_CHECKING:  # core/sparse.py builds on the id helpers below, so it is imported where used
    from . import sparse as SP

__all__ = ["IdPartial", "RowSource", "TableRows", "merge", "tree_merge", "finish", "id_fill", "ids_of"]

AUTO_K_START = 16  # auto: first candidate count
AUTO_SMALL_N = 2048  # auto: below this many rows, exact is cheaper than any search
AUTO_GIVE_UP = 1e4  # auto: a first bound above tol_mass * this goes exact without growing
ROW_BLOCK = 8192  # rows per block when a caller streams the rows themselves


@dataclass(slots=True)
class IdPartial:
    """A kernel partial with the ids of its top rows and, where certified, its bound.

    ``bound`` is None for a part computed exactly (nothing omitted). ``k_used``
    and ``fell_back`` are per query; ``n_rows`` is the number of rows reduced.
    """

    part: P.Partial
    ids: np.ndarray
    n_rows: int
    bound: np.ndarray | None = None
    k_used: np.ndarray | None = None
    fell_back: np.ndarray | None = None
    certified: bool = False


class RowSource(Protocol):
    """What the step loop drives: one pass of the update over the source's rows."""

    def reduce(self, states: np.ndarray, beta: float, *, k: int, need_acc: bool, cert: CertifiedOptions) -> IdPartial:
        """The id partial of ``states`` over every row of the source."""
        ...

    def row_blocks(self) -> Iterator[np.ndarray]:
        """The source's rows in blocks (read only where the energy needs them at tiny beta)."""
        ...


def exact_knn(q: np.ndarray, x: np.ndarray, k: int, metric: str, *, tile_mib: float = 16.0) -> tuple[np.ndarray, np.ndarray]:
    """faiss exact top-k (inner product or squared L2) of float32 rows, or of float16 rows tile by tile."""
    fm = faiss.METRIC_INNER_PRODUCT if metric == "ip" else faiss.METRIC_L2
    if x.dtype == np.float32:
        return faiss.knn(q, x, k, metric=fm)
    return knn_tiles(q, x, k, metric=fm, tile_mib=tile_mib)


# ------------------------------------------------------------------ one table
@dataclass(frozen=True, slots=True)
class TableRows:
    """The rows of one memory (or one shard): exact, certified, index-backed or auto.

    ``index`` is a callable giving the fresh candidate index (only called for
    ``method="index"``).
    """

    x: np.ndarray
    ids: np.ndarray
    max_norm: float
    method: str
    tile_mib: float
    n_threads: int
    n_candidates: int = 32
    index: Callable[[], Any] | None = None

    def _exact(self, beta: float) -> Callable[[np.ndarray, int, bool], P.Partial]:
        def exact(q: np.ndarray, kk: int, acc: bool) -> P.Partial:
            return exact_reduce(q, self.x, beta, k=kk, tile_mib=self.tile_mib, n_threads=self.n_threads, need_acc=acc)

        return exact

    def reduce(self, states: np.ndarray, beta: float, *, k: int, need_acc: bool, cert: CertifiedOptions) -> IdPartial:
        """One pass over this table's rows by its method."""
        n_q, n = states.shape[0], self.x.shape[0]
        if n == 0:  # an empty shard: the identity of the merge
            part = P.empty(n_q, self.x.shape[1], k, need_acc=need_acc)
            return IdPartial(part, ids_of(self.ids, part.top_i), 0)
        exact = self._exact(beta)
        method = self.method
        if method == "auto" and n < AUTO_SMALL_N:
            method = "exact"  # a search's fixed cost exceeds two small products
        if method == "exact":
            return self._labelled(exact(states, k, need_acc), None)
        if method == "index":
            part, info = index_reduce(
                self.x, states, beta, k=k, n_candidates=self.n_candidates, need_acc=need_acc,
                search=self.index().search, tile_mib=self.tile_mib,  # type: ignore[misc]
            )
            labelled = self._labelled(part, None)
            labelled.k_used = info.get("k_used")
            return labelled
        if method == "auto":
            cert = dataclasses.replace(cert, give_up=AUTO_GIVE_UP, k_start=max(k, cert.k_start, AUTO_K_START))
            can = bound_can_hold(beta, np.linalg.norm(states, axis=1), self.max_norm, n, k, cert.tol_mass)
            if not can.any():
                return self._labelled(exact(states, k, need_acc), None)
            if not can.all():
                part, info = auto_split(self, states, beta, k, need_acc, cert, can, exact)
                return self._labelled(part, info)
        part, info = certified_reduce(self.x, states, beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
        return self._labelled(part, info)

    # ------------------------------------------------- sparse maps (core/sparse.py)
    def sparse_support(self, states: np.ndarray, beta: float, smap: SP.SparseMap, *, k_start: int, cap: int,
                       need_rows: bool) -> SP.Support:
        """The certified support of ``states`` over this table (faiss candidates, grown)."""
        from . import sparse as SP

        return SP.table_support(self.x, self.ids, states, beta, smap, k_start=k_start, cap=cap, need_rows=need_rows)

    def sparse_sums(self, states: np.ndarray, beta: float, alpha: float, tau: np.ndarray, *, k: int, final: bool,
                    need_acc: bool) -> SP.Sums:
        """One tiled pass over this table at the given tau (the sparse maps' exact fallback)."""
        from . import sparse as SP

        if self.x.shape[0] == 0:
            return SP.empty_sums(states.shape[0], self.x.shape[1], k, self.ids.dtype, final=final, need_acc=need_acc)
        return SP.table_sums(self.x, self.ids, states, beta, alpha, tau, k=k, final=final, need_acc=need_acc,
                             tile_mib=self.tile_mib, n_threads=self.n_threads)

    def _labelled(self, part: P.Partial, info: dict[str, Any] | None) -> IdPartial:
        ids = ids_of(self.ids, part.top_i)
        if info is None:
            return IdPartial(part, ids, self.x.shape[0])
        fell = np.asarray(info["fell_back"], bool)
        return IdPartial(
            part, ids, self.x.shape[0],
            bound=np.asarray(info["mass_bound"], np.float64),
            k_used=np.asarray(info["k_used"], np.int64),
            fell_back=fell,
            certified=bool((~fell).any()),
        )

    def __len__(self) -> int:
        return int(self.x.shape[0])

    def row_blocks(self) -> Iterator[np.ndarray]:
        """This table's rows in blocks of 8192, in file order."""
        return (self.x[a:a + ROW_BLOCK] for a in range(0, self.x.shape[0], ROW_BLOCK))

    def candidate_recall(self, q: np.ndarray, k: int, n_sample: int) -> float:
        """Mean fraction of faiss exact top-kc found by the index, on a query sample."""
        kc = min(len(self), max(self.n_candidates, k))
        rng = np.random.default_rng(0)
        sel = np.sort(rng.choice(q.shape[0], min(n_sample, q.shape[0]), replace=False))
        _, exact_pos = exact_knn(q[sel], self.x, kc, "ip", tile_mib=self.tile_mib)
        _, got = self.index().search(q[sel], kc)  # type: ignore[misc]
        hits = [np.intersect1d(a, b[b >= 0]).size for a, b in zip(exact_pos, got)]
        return float(np.mean(hits) / kc)


def auto_split(rows: TableRows, states, beta, k, need_acc, cert, can, exact):  # type: ignore[no-untyped-def]
    """auto: certified for queries whose bound can hold, exact for the rest."""

    part = P.empty(states.shape[0], rows.x.shape[1], k, need_acc=need_acc)
    sub, info_c = certified_reduce(rows.x, states[can], beta, k=k, need_acc=need_acc, opts=cert, exact=exact)
    _put(part, np.flatnonzero(can), sub, np.arange(int(can.sum())))
    rest = np.flatnonzero(~can)
    _put(part, rest, exact(states[rest], k, need_acc), np.arange(rest.size))
    n_q = states.shape[0]
    info = {
        "mass_bound": np.zeros(n_q),
        "k_used": np.full(n_q, len(rows), dtype=np.int64),
        "fell_back": ~can,
    }
    for key in info:
        info[key][can] = info_c[key]
    return part, info


# ----------------------------------------------------------------------- merge
def _as_columns(p: P.Partial, start: int) -> P.Partial:
    """``p`` with top_i replaced by column numbers start.. (-1 kept for padding)."""
    cols = np.arange(start, start + p.top_i.shape[1], dtype=np.int64)[None, :]
    return P.Partial(m=p.m, l=p.l, acc=p.acc, top_z=p.top_z, top_i=np.where(p.top_i >= 0, cols, -1))


def merge(a: IdPartial, b: IdPartial) -> IdPartial:
    """Merge the id partials of two disjoint row sets exactly (ids and bounds included).

    Where one side is certified and the other exact (auto judged them apart),
    the exact side omits nothing, used all its rows and fell back everywhere.
    """
    ka = a.part.top_i.shape[1]
    ids_a, ids_b = _common_ids(a.ids, b.ids)
    part = P.merge(_as_columns(a.part, 0), _as_columns(b.part, ka))
    table = np.concatenate([ids_a, ids_b], axis=1)
    slots = np.concatenate([a.part.top_i, b.part.top_i], axis=1)
    col = np.maximum(part.top_i, 0)
    ids = np.take_along_axis(table, col, 1)
    ids = np.where(part.top_i >= 0, ids, np.asarray(id_fill(table.dtype), dtype=table.dtype))
    part.top_i = np.where(part.top_i >= 0, np.take_along_axis(slots, col, 1), -1)
    n_rows = a.n_rows + b.n_rows
    if a.bound is None and b.bound is None:
        return IdPartial(part, ids, n_rows)
    n_q = part.m.shape[0]
    omitted = np.zeros(n_q)
    k_used = np.zeros(n_q, np.int64)
    fell = np.zeros(n_q, bool)
    for side in (a, b):
        if side.bound is None:
            k_used += side.n_rows
            fell |= side.n_rows > 0
            continue
        omitted += side.bound * side.part.l * P._rescale(side.part.m, part.m)
        k_used += side.k_used if side.k_used is not None else 0
        fell |= side.fell_back if side.fell_back is not None else False
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = np.where(part.l > 0, omitted / part.l, 0.0)
    return IdPartial(part, ids, n_rows, bound, k_used, fell, a.certified or b.certified)


def tree_merge(items: Sequence[Any], fn: Callable[[Any, Any], Any]) -> Any:
    """Pairwise (balanced tree) merge of a non-empty list with ``fn``."""
    level = list(items)
    while len(level) > 1:
        nxt = [fn(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


def finish(sp: IdPartial) -> tuple[P.Finished, np.ndarray]:
    """finish() of an id partial, with its ids in the same (heaviest first) order."""
    fin = P.finish(_as_columns(sp.part, 0))
    col = np.maximum(fin.top_i, 0)
    ids = np.where(fin.top_i >= 0, np.take_along_axis(sp.ids, col, 1),
                   np.asarray(id_fill(sp.ids.dtype), dtype=sp.ids.dtype))
    fin.top_i = np.where(fin.top_i >= 0, np.take_along_axis(sp.part.top_i, col, 1), -1)
    return fin, ids
