"""Near-duplicate groups: find them, explain them, and plan their removal.

:func:`find_duplicates` links items whose cosine similarity reaches a threshold
(graph method, faiss candidates + connected components) or groups items whose
dense-memory retrieval ends in the same state (attractor method). It returns a
:class:`DuplicatePlan`: groups with a representative each, within-group
similarity, a keep-list and a drop-list. Nothing is ever removed; the input is
read only.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from . import _candidates as C
from . import _groups as G
from ._attractor import attractor_groups, beta_for_threshold
from ._checks import (
    Options,
    check_options,
    check_score,
    input_matrix,
    normalised_copy,
)
from ._plan import DuplicateGroup, DuplicatePlan
from .._util import bar_factory
from .._validation import as_rng, check_search_sizes
from ..errors import InputValueError

__all__ = ["DedupSpec", "DuplicateGroup", "DuplicatePlan", "find_duplicates"]


def find_duplicates(
    data: Any,
    threshold: float = 0.98,
    *,
    method: Literal["graph", "attractor"] = "graph",
    candidates: Literal["auto", "exact", "ivf", "hnsw"] = "auto",
    k: int = 32,
    no_chaining: bool | Literal["off", "star", "complete"] = False,
    representative: Any = "medoid",
    ids: Any = None,
    nlist: int | None = None,
    nprobe: int = 4,
    check_sample: int = 1000,
    target_recall: float = 0.995,
    beta: float | None = None,
    max_steps: int = 300,
    retrieval: Literal["exact", "auto", "certified"] = "auto",
    work_mib: float = 64.0,
    return_pairs: bool = False,
    progress: bool | None = None,
    seed: Any = 0,
) -> DuplicatePlan:
    """Group near-duplicate rows by cosine similarity and plan which to keep.

    Parameters
    ----------
    data : array-like of shape (n_items, n_features) or DenseMemory
        Embeddings (any norm; a normalised copy is used) or a memory, whose
        patterns and ids are used. Never modified.
    threshold : float in (-1, 1], default 0.98
        Items at cosine similarity >= ``threshold`` are near-duplicates (with
        a tolerance of 1e-6, so ``1.0`` finds exact copies).
    method : {"graph", "attractor"}, default "graph"
        "graph": an edge per pair above the threshold, groups are connected
        components. "attractor": retrieve from every item at beta
        ``2 / (1 - threshold)`` until convergence; items whose final states
        coincide form a group (see Notes).
    candidates : {"auto", "exact", "ivf", "hnsw"}, default "auto"
        Graph method: where candidate pairs come from. "exact" is a faiss flat
        range search (every pair); "ivf" a range search in a faiss inverted
        file (``nlist`` lists, ``nprobe`` probed, doubled until the pair recall
        on ``check_sample`` rows reaches ``target_recall``; a pair counts when
        found from either end); "hnsw" the ``k``
        approximate nearest neighbours of each item. "auto" picks exact while
        ``n * n * d <= 2**38``, IVF above; the plan reports the choice.
    k : int, default 32
        Neighbours per item for "hnsw".
    no_chaining : bool or {"off", "star", "complete"}, default False
        Single linkage lets A~B~C group A with C below the threshold.
        "complete" (or True) splits components greedily so every pair in a
        group meets the threshold; "star" only so every member is within the
        threshold of its representative (a hub may still join two families
        that are each close to it).
    representative : "medoid", "first" or array of shape (n_items,)
        Which member is kept: the one with the largest summed similarity to
        the others, the first in input order, or the highest quality score
        (ties: the first). With ``no_chaining`` the rule picks the seeds
        (medoid: the item with most neighbours).
    ids : sequence of int or str, optional
        One unique id per row (default 0..n-1). Not with a DenseMemory.
    nlist, nprobe, check_sample, target_recall
        IVF settings (default nlist about 4 * sqrt(n), a power of two) and
        the sampled recall check (0 rows: no check, no tuning).
    beta, max_steps, retrieval
        Attractor settings: beta (default ``2 / (1 - threshold)``), most
        updates, and the DenseMemory.retrieve method.
    work_mib : float, default 64
        Memory budget of one query chunk.
    return_pairs : bool, default False
        Also return every similarity edge (``pair_ids``, ``pair_similarity``)
        to explain the groups.
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
        Threshold outside (-1, 1], NaN/inf rows (the row is named), empty
        input, scores or ids of the wrong length, unknown option values.
    InputTypeError
        Non-numeric data, threshold or scores.
    MissingExtraError
        ``progress=True`` without tqdm.

    Warns
    -----
    DenseMemWarning
        Zero vectors were left out (listed in ``excluded_zero_ids``, kept).

    Notes
    -----
    The attractor beta is the bifurcation point of a pair at the threshold:
    for unit vectors at cosine ``c`` the blended state is stable iff
    ``beta (1 - c) / 2 < 1`` [1]_ (see :mod:`densemem.duplicates._attractor`). The
    attractor method is soft near the threshold, and many rivals just below
    it (dense clusters) can pull items into one blended state; it agrees with
    the graph method on well-separated groups. It costs ``steps`` exact
    retrievals over all rows (``retrieval="auto"``: certified where its bound
    can hold, exact otherwise), so it suits tens of thousands of rows, not millions.

    Cost of the graph method: exact search is ``n * n * d``; IVF is one
    coarse assignment (``n * nlist * d``, shared by adding and searching) plus
    ``n * nprobe * n / nlist * d`` for the range search; candidate pairs are
    re-scored in float64. Group statistics cost ``size**2 * d`` per group, so
    a loose threshold that chains most rows into one component is slow:
    raise the threshold or use ``no_chaining``.

    References
    ----------
    .. [1] H. Ramsauer et al., "Hopfield Networks is All You Need", ICLR 2021,
       arXiv:2008.02217.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem.duplicates import find_duplicates
    >>> x = np.array([[1.0, 0.0], [0.99, 0.05], [0.0, 1.0]])
    >>> plan = find_duplicates(x, threshold=0.99)
    >>> plan.group(0).ids.tolist(), plan.drop_ids.tolist()
    ([0, 1], [1])
    """
    t0 = time.perf_counter()
    opt = check_options(
        threshold=threshold, method=method, candidates=candidates, k=k, no_chaining=no_chaining,
        nlist=nlist, nprobe=nprobe, check_sample=check_sample, target_recall=target_recall,
        beta=beta, max_steps=max_steps, retrieval=retrieval, work_mib=work_mib, progress=progress,
    )
    x, all_ids = input_matrix(data, ids)
    check_search_sizes(x.shape[0], where="find_duplicates", nlist=nlist, nprobe=nprobe, k=k)  # before faiss
    rule, score = check_score(representative, x.shape[0])
    bar = _progress_factory(opt.show_progress)
    rng = as_rng(seed, where="find_duplicates")
    chunk = C.chunk_rows_for(x.shape[1], opt.work_mib)
    xn, valid, zero = normalised_copy(x, all_ids, chunk)
    vscore = None if score is None else score[valid]
    if opt.method == "graph":
        groups, reps, source, params, pairs = _graph(xn, opt, rule, vscore, rng, chunk, bar)
    else:
        groups, reps, source, params, pairs = _attractor(xn, opt, chunk, bar)
    stats = G.summarise(xn, groups, rule, vscore, reps)
    plan = _plan(x.shape[0], all_ids, valid, zero, groups, stats, opt, rule, source, params, pairs, t0)
    return plan if return_pairs or pairs is None else _without_pairs(plan)


def _graph(xn: np.ndarray, opt: Options, rule: str, score: np.ndarray | None, rng: np.random.Generator,
           chunk: int, bar: Any) -> tuple:
    n, d = xn.shape
    source, reason = C.choose_source(n, d, opt.candidates)
    sample = None
    if source != "exact" and opt.check_sample > 0 and n > 1:
        sample = np.sort(rng.choice(n, size=min(opt.check_sample, n), replace=False))
    if n < 2:
        pairs = C.PairSet(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0), "exact", {})
        source = "exact"
    elif source == "exact":
        pairs = C.exact_pairs(xn, opt.threshold, chunk=chunk, progress=bar)
    elif source == "ivf":
        pairs = C.ivf_pairs(
            xn, opt.threshold, nlist=opt.nlist, nprobe=opt.nprobe, chunk=chunk, rng=rng, sample=sample,
            target_recall=opt.target_recall, progress=bar,
        )
    else:
        pairs = C.hnsw_pairs(xn, opt.threshold, k=opt.k, m=32, ef_search=None, chunk=chunk, sample=sample,
                             progress=bar)
    params = {"chosen_because": reason, **pairs.params}
    adj = G.adjacency(n, pairs.lo, pairs.hi, pairs.sim)
    groups = G.pack_labels(G.components(n, adj))
    reps = None
    if opt.no_chaining != "off":
        groups, reps = G.split_groups(groups, adj, opt.no_chaining, rule, score)
    return groups, reps, source, params, pairs


def _attractor(xn: np.ndarray, opt: Options, chunk: int, bar: Any) -> tuple:
    beta = beta_for_threshold(opt.threshold) if opt.beta is None else opt.beta
    if xn.shape[0] < 2:
        return G.pack_labels(np.arange(xn.shape[0])), None, "attractor", {"beta": beta}, None
    groups, info = attractor_groups(
        xn, opt.threshold, beta=beta, max_steps=opt.max_steps, tol=1e-5, retrieval=opt.retrieval,
        chunk=min(chunk, 4096), progress=bar,
    )
    info["beta_rule"] = "2 / (1 - threshold)" if opt.beta is None else "given"
    return groups, None, "attractor", info, None


def _plan(n: int, all_ids: np.ndarray, valid: np.ndarray, zero: np.ndarray, groups: G.Packed,
          stats: dict[str, np.ndarray], opt: Options, rule: str, source: str, params: dict[str, Any],
          pairs: C.PairSet | None, t0: float) -> DuplicatePlan:
    member_rows = valid[groups.members]
    rep_rows = valid[stats["reps"]]
    drop = np.zeros(n, dtype=bool)
    drop[member_rows] = True
    drop[rep_rows] = False
    return DuplicatePlan(
        threshold=opt.threshold, method=opt.method, candidates=source, candidate_params=params,
        no_chaining=opt.no_chaining, representative_rule=rule, n_items=n,
        n_pairs=-1 if pairs is None else int(pairs.lo.shape[0]),
        group_offsets=groups.offsets, member_ids=all_ids[member_rows], member_rows=member_rows,
        similarity_to_representative=stats["to_rep"], representative_ids=all_ids[rep_rows],
        representative_rows=rep_rows, min_similarity=stats["min"], mean_similarity=stats["mean"],
        keep_ids=all_ids[~drop], drop_ids=all_ids[drop], excluded_zero_ids=all_ids[zero],
        seconds=time.perf_counter() - t0,
        pair_ids=None if pairs is None else np.stack([all_ids[valid[pairs.lo]], all_ids[valid[pairs.hi]]], axis=1),
        pair_similarity=None if pairs is None else pairs.sim,
    )


def _without_pairs(plan: DuplicatePlan) -> DuplicatePlan:
    return dataclasses.replace(plan, pair_ids=None, pair_similarity=None)


def _progress_factory(show: bool | None) -> Any:
    """A ``(desc, total) -> bar`` callable for tqdm bars on stderr, or None."""
    return bar_factory(show, unit="row", where="find_duplicates")


class DedupSpec(BaseModel):
    """Options of :func:`find_duplicates` as a validated spec (for the CLI and JSON files).

    ``representative="quality"`` takes the scores from the ``quality`` argument
    of :meth:`run` (the CLI reads them from ``quality_column``).

    Examples
    --------
    >>> import numpy as np
    >>> spec = DedupSpec(threshold=0.99, no_chaining="star")
    >>> spec.run(np.array([[1.0, 0.0], [1.0, 0.001]])).n_groups
    1
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    threshold: float = Field(0.98, gt=-1.0, le=1.0)
    method: Literal["graph", "attractor"] = "graph"
    candidates: Literal["auto", "exact", "ivf", "hnsw"] = "auto"
    k: int = Field(32, ge=1)
    no_chaining: Literal["off", "star", "complete"] = "off"
    representative: Literal["medoid", "first", "quality"] = "medoid"
    quality_column: str | None = None
    nlist: int | None = Field(None, ge=1)
    nprobe: int = Field(4, ge=1)
    check_sample: int = Field(1000, ge=0)
    target_recall: float = Field(0.995, gt=0.0, le=1.0)
    beta: float | None = Field(None, gt=0.0, allow_inf_nan=False)
    max_steps: int = Field(300, ge=1)
    retrieval: Literal["exact", "auto", "certified"] = "auto"
    work_mib: float = Field(64.0, gt=0.0, allow_inf_nan=False)
    seed: int = 0

    def kwargs(self, quality: Any = None) -> dict[str, Any]:
        """Keyword arguments for :func:`find_duplicates`."""
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

    def run(self, data: Any, *, ids: Any = None, quality: Any = None, progress: bool | None = None) -> DuplicatePlan:
        """Call :func:`find_duplicates` on ``data`` with these options."""
        return find_duplicates(data, ids=ids, progress=progress, **self.kwargs(quality))
