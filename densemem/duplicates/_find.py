"""Near-duplicate groups: find them, explain them, and plan their removal.

:func:`plan_duplicates` judges every pair of items at cosine similarity at or
above a threshold (faiss candidates, re-scored in float64), by the similarity
alone (graph method) or by the dense-memory dynamics (attractor method), and
groups the pairs it keeps. The default grouping is a star around the kept item:
every item planned for dropping meets the threshold against the item kept for
it. It returns a :class:`DuplicatePlan`: groups with a representative each,
within-group similarity, a keep-list and a drop-list (with the id kept for each
dropped item). Against a stored memory it plans a new batch only. Nothing is
ever removed; inputs are read only.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from . import _candidates as C
from . import _groups as G
from ._judge import judge_and_group, warn_far_chains
from ._checks import (
    WHERE,
    Options,
    check_options,
    check_score,
    check_stored,
    input_matrix,
    normalized_copy,
)
from ._plan import DuplicateGroup, DuplicatePlan
from .._util import bar_factory
from .._validation import as_rng, check_search_sizes
from ..errors import InputValueError

__all__ = ["DedupSpec", "DuplicateGroup", "DuplicatePlan", "plan_duplicates"]


def plan_duplicates(
    data: Any,
    threshold: float = 0.98,
    *,
    method: Literal["graph", "attractor"] = "graph",
    grouping: Literal["star", "complete", "chain"] = "star",
    stored: Any = None,
    candidates: Literal["auto", "exact", "ivf", "join", "hnsw"] = "auto",
    k: int = 32,
    representative: Any = "medoid",
    ids: Any = None,
    nlist: int | None = None,
    nprobe: int = 4,
    check_sample: int = 1000,
    target_recall: float = 0.995,
    beta: float | None = None,
    steps: int = 300,
    retrieve_method: Literal["exact", "auto", "certified"] = "auto",
    tile_mib: float = 64.0,
    return_pairs: bool = False,
    progress: bool | None = None,
    seed: Any = 0,
) -> DuplicatePlan:
    """Group near-duplicate rows by cosine similarity and plan which to keep.

    Parameters
    ----------
    data : array-like of shape (n_items, n_features) or DenseMemory
        Embeddings (any norm; a normalized copy is used) or a memory, whose
        patterns and ids are used. Never modified. With ``stored`` this is the
        new batch; a memory-mapped array (``np.load(path, mmap_mode="r")``) is
        then read chunk by chunk.
    threshold : float in (-1, 1], default 0.98
        Items at cosine similarity >= ``threshold`` are near-duplicates (with
        a tolerance of 1e-6, so ``1.0`` finds exact copies).
    method : {"graph", "attractor"}, default "graph"
        Which pairs at or above the threshold are joined. "graph": all of
        them. "attractor": those whose two items end in the same state when
        the dense memory of their connected component is retrieved from each
        item at beta ``2 / (1 - threshold)`` (see Notes).
    grouping : {"star", "complete", "chain"}, default "star"
        How joined pairs become groups. "star": greedy stars around a seed
        (the representative): every member meets the threshold against the
        item kept for it. "complete": every pair in a group meets the
        threshold (greedy complete linkage; more, smaller groups). "chain":
        connected components (single linkage): A~B~C groups A with C even
        below the threshold; each group's smallest pairwise similarity is
        reported and a DenseMemWarning is raised when a group holds a pair
        below ``2 * threshold - 1`` (twice the threshold's cosine distance).
    stored : DenseMemory, optional
        Compare the new batch ``data`` with this stored memory (e.g.
        ``DenseMemory.load(folder, mmap=True)``) and with itself, without
        changing or rebuilding the store. A new item with a stored item at or
        above the threshold is planned for dropping as a duplicate of its most
        similar stored item; the other new items are grouped among themselves
        as without ``stored``. Stored items are never planned for dropping.
        Graph method, candidates "auto", "exact" or "ivf".
    candidates : {"auto", "exact", "ivf", "join", "hnsw"}, default "auto"
        Where candidate pairs come from. "exact" is a faiss flat range search
        (every pair); "ivf" a range search in a faiss inverted file (``nlist``
        lists, ``nprobe`` probed, doubled until the pair recall on
        ``check_sample`` rows reaches ``target_recall``; a pair counts when
        found from either end); "join" a blocked self-join on the same kind
        of partition (default ``nlist`` about 1.6 * sqrt(n)): each list's
        members and the rows probing it are scored against its members by
        float32 matrix products, and ``nprobe`` is the smallest count from 2
        whose pair recall on ``check_sample`` rows reaches ``target_recall``
        (``nprobe`` itself is used when no rows are checked); "hnsw" the
        ``k`` approximate nearest neighbours of each item. "auto" picks exact
        while ``n * n * d <= 2**38``, the join above; the plan reports the
        choice.
    k : int, default 32
        Neighbours per item for "hnsw".
    representative : "medoid", "first" or array of shape (n_items,)
        Which member is kept: the one with the largest summed similarity to
        the others, the first in input order, or the highest quality score
        (ties: the first). With "star" and "complete" the rule picks the
        seeds (medoid: the item with most neighbours).
    ids : sequence of int or str, optional
        One unique id per row (default 0..n-1; with ``stored``, the stored
        memory's largest integer id + 1, + 2, ...). Not with a DenseMemory.
    nlist, nprobe, check_sample, target_recall
        IVF settings (default nlist about 4 * sqrt(n), a power of two) and
        the sampled recall check (0 rows: no check, no tuning).
    beta, steps, retrieve_method
        Attractor settings: beta (default ``2 / (1 - threshold)``), most
        updates, and the DenseMemory.retrieve method.
    tile_mib : float, default 64
        Memory budget of one query chunk.
    return_pairs : bool, default False
        Also return every pair judged (``pair_ids``, ``pair_similarities``).
    progress : bool, optional
        Progress bars on stderr (needs tqdm). Default: when stderr is a terminal.
    seed : int or Generator, default 0
        Seeds the IVF training sample and the recall-check sample.

    Returns
    -------
    DuplicatePlan

    Raises
    ------
    InputValueError
        Threshold NaN or outside (-1, 1], NaN/inf rows (the row is named),
        empty input, scores or ids of the wrong length, a batch whose width
        differs from the stored memory's, batch ids already stored, unknown
        option values.
    InputTypeError
        Non-numeric data, threshold or scores; ``stored`` not a DenseMemory.
    MissingExtraError
        ``progress=True`` without tqdm.

    Warns
    -----
    DenseMemWarning
        Zero vectors were left out (listed in ``excluded_zero_ids``, kept);
        ``grouping="chain"`` joined a pair far below the threshold.

    Notes
    -----
    Why star groups by default: a plan is applied by dropping items, and what
    a drop loses is bounded by the similarity of the dropped item to the item
    kept for it; stars guarantee exactly that bound (``>= threshold``) with
    the fewest splits of a family. Complete groups guarantee more (every pair)
    but split families whose copies are close to the original and less close
    to each other; chains guarantee nothing (on scikit-learn's digits at
    threshold 0.9 one chain holds 1790 of the 1797 rows, all ten classes).

    The attractor beta is the bifurcation point of a pair at the threshold:
    for unit vectors at cosine ``c`` the blended state is stable iff
    ``beta (1 - c) / 2 < 1`` [1]_ (see :mod:`densemem.duplicates._attractor`).
    The dynamics only judge candidate pairs (they can split a pair, never
    join one below the threshold), then ``grouping`` applies, so the
    attractor method keeps the same guarantee. Cost: per step, the sum over
    components of ``size**2 * d``.

    Cost of the candidate search: exact search is ``n * n * d``; IVF is one
    coarse assignment (``n * nlist * d``, shared by adding and searching) plus
    ``n * nprobe * n / nlist * d`` for the range search; the join has the
    same two terms, the second as matrix products (about 3x faster than the
    range search here); candidate pairs are re-scored in float64. Group statistics cost ``size**2 * d`` per group.
    Against a stored memory: a faiss index holds a normalized float32 copy of
    the stored patterns; the batch is read in chunks and only the new items
    that match no stored item are kept in memory for the within-batch search.

    References
    ----------
    .. [1] The retrieval update and its metastable states: Ramsauer et al. (ICLR 2021),
       as cited by :class:`densemem.DenseMemory`.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem.duplicates import plan_duplicates
    >>> x = np.array([[1.0, 0.0], [0.99, 0.05], [0.0, 1.0]])
    >>> plan = plan_duplicates(x, threshold=0.99)
    >>> plan.group(0).ids.tolist(), plan.drop_ids.tolist(), plan.duplicate_of_ids.tolist()
    ([0, 1], [1], [0])
    """
    t0 = time.perf_counter()
    opt = check_options(
        threshold=threshold, method=method, candidates=candidates, k=k, grouping=grouping,
        nlist=nlist, nprobe=nprobe, check_sample=check_sample, target_recall=target_recall,
        beta=beta, steps=steps, retrieve_method=retrieve_method, tile_mib=tile_mib, progress=progress,
    )
    bar = _progress_factory(opt.show_progress)
    rng = as_rng(seed, where=WHERE)
    if stored is not None:
        from ._against import plan_against

        check_stored(stored)
        if opt.method != "graph" or opt.candidates in ("hnsw", "join"):
            raise InputValueError(
                f"{WHERE}: `stored` works with method='graph' and candidates 'auto', 'exact' or 'ivf'; "
                f"got method={opt.method!r}, candidates={opt.candidates!r}."
            )
        plan = plan_against(data, stored, ids, representative, opt, rng, bar, t0)
        return plan if return_pairs else _without_pairs(plan)
    x, all_ids = input_matrix(data, ids)
    check_search_sizes(x.shape[0], where=WHERE, nlist=nlist, nprobe=nprobe, k=k)  # before faiss
    rule, score = check_score(representative, x.shape[0])
    chunk = C.chunk_rows_for(x.shape[1], opt.tile_mib)
    xn, valid, zero = normalized_copy(x, all_ids, chunk)
    vscore = None if score is None else score[valid]
    groups, reps, source, params, pairs = judge_and_group(xn, opt, rule, vscore, rng, chunk, bar)
    stats = G.summarise(xn, groups, rule, vscore, reps)
    warn_far_chains(opt, stats["min"], groups)
    plan = _plan(x.shape[0], all_ids, valid, zero, groups, stats, opt, rule, source, params, pairs, t0)
    return plan if return_pairs else _without_pairs(plan)


def _plan(n: int, all_ids: np.ndarray, valid: np.ndarray, zero: np.ndarray, groups: G.Packed,
          stats: dict[str, np.ndarray], opt: Options, rule: str, source: str, params: dict[str, Any],
          pairs: C.PairSet, t0: float) -> DuplicatePlan:
    member_rows = valid[groups.members]
    rep_rows = valid[stats["reps"]]
    drop = np.zeros(n, dtype=bool)
    drop[member_rows] = True
    drop[rep_rows] = False
    kept_for = np.full(n, -1, dtype=np.int64)  # row kept for each dropped row
    sim_for = np.full(n, np.nan)
    kept_for[member_rows] = np.repeat(rep_rows, groups.sizes)
    sim_for[member_rows] = stats["to_rep"]
    drop_rows = np.flatnonzero(drop)
    n_g = len(groups)
    return DuplicatePlan(
        threshold=opt.threshold, method=opt.method, candidates=source, candidate_params=params,
        grouping=opt.grouping, representative_rule=rule, n_items=n,
        n_pairs=int(pairs.lo.shape[0]),
        group_offsets=groups.offsets, member_ids=all_ids[member_rows], member_rows=member_rows,
        member_stored=np.zeros(member_rows.shape[0], bool),
        similarities=stats["to_rep"], representative_ids=all_ids[rep_rows],
        representative_rows=rep_rows, representative_stored=np.zeros(n_g, bool),
        min_similarity=stats["min"], mean_similarity=stats["mean"],
        keep_ids=all_ids[~drop], drop_ids=all_ids[drop_rows],
        duplicate_of_ids=all_ids[kept_for[drop_rows]], duplicate_similarities=sim_for[drop_rows],
        excluded_zero_ids=all_ids[zero], seconds=time.perf_counter() - t0,
        pair_ids=np.stack([all_ids[valid[pairs.lo]], all_ids[valid[pairs.hi]]], axis=1),
        pair_similarities=pairs.sim,
    )


def _without_pairs(plan: DuplicatePlan) -> DuplicatePlan:
    return dataclasses.replace(plan, pair_ids=None, pair_similarities=None)


def _progress_factory(show: bool | None) -> Any:
    """A ``(desc, total) -> bar`` callable for tqdm bars on stderr, or None."""
    return bar_factory(show, unit="row", where=WHERE)


class DedupSpec(BaseModel):
    """Options of :func:`plan_duplicates` as a validated spec (for the CLI and JSON files).

    ``representative="quality"`` takes the scores from the ``quality`` argument
    of :meth:`run` (the CLI reads them from ``quality_column``).

    Examples
    --------
    >>> import numpy as np
    >>> spec = DedupSpec(threshold=0.99, grouping="complete")
    >>> spec.run(np.array([[1.0, 0.0], [1.0, 0.001]])).n_groups
    1
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    threshold: float = Field(0.98, gt=-1.0, le=1.0, allow_inf_nan=False)
    method: Literal["graph", "attractor"] = "graph"
    grouping: Literal["star", "complete", "chain"] = "star"
    candidates: Literal["auto", "exact", "ivf", "join", "hnsw"] = "auto"
    k: int = Field(32, ge=1)
    representative: Literal["medoid", "first", "quality"] = "medoid"
    quality_column: str | None = None
    nlist: int | None = Field(None, ge=1)
    nprobe: int = Field(4, ge=1)
    check_sample: int = Field(1000, ge=0)
    target_recall: float = Field(0.995, gt=0.0, le=1.0)
    beta: float | None = Field(None, gt=0.0, allow_inf_nan=False)
    steps: int = Field(300, ge=1)
    retrieve_method: Literal["exact", "auto", "certified"] = "auto"
    tile_mib: float = Field(64.0, gt=0.0, allow_inf_nan=False)
    seed: int = 0

    def kwargs(self, quality: Any = None) -> dict[str, Any]:
        """Keyword arguments for :func:`plan_duplicates`."""
        out = self.model_dump(exclude={"threshold", "representative", "quality_column"})
        out["threshold"] = self.threshold
        if self.representative == "quality":
            if quality is None:
                raise InputValueError(
                    "DedupSpec.run: representative='quality' needs `quality` scores (one per row); got None."
                )
            out["representative"] = quality
        else:
            out["representative"] = self.representative
        return out

    def run(self, data: Any, *, ids: Any = None, quality: Any = None, progress: bool | None = None,
            stored: Any = None) -> DuplicatePlan:
        """Call :func:`plan_duplicates` on ``data`` (against ``stored`` when given) with these options."""
        return plan_duplicates(data, ids=ids, progress=progress, stored=stored, **self.kwargs(quality))
