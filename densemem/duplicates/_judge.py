"""Judging candidate pairs and grouping them: shared by a plan alone and a plan against a store."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from . import _candidates as C
from . import _groups as G
from ._attractor import attractor_edges, beta_for_threshold
from ._checks import WHERE, Options
from ..errors import DenseMemWarning


FAR_FACTOR = 2.0
"""A chain is "far below" the threshold when a pair in it is more than twice the
threshold's cosine distance apart: ``1 - c > 2 (1 - t)``, i.e. ``c < 2 t - 1``."""


def warn_far_chains(opt: Options, min_sim: np.ndarray, groups: G.Packed) -> None:
    """DenseMemWarning when a chain group holds a pair far below the threshold."""
    if opt.grouping != "chain" or min_sim.size == 0:
        return
    limit = 1.0 - FAR_FACTOR * (1.0 - opt.threshold)
    far = np.flatnonzero(min_sim < limit)
    if far.size == 0:
        return
    worst = int(far[np.argmin(min_sim[far])])
    warnings.warn(
        f"{WHERE}: grouping='chain' joined items far below the threshold {opt.threshold:g}: "
        f"{far.size} group(s) hold a pair at cosine < {limit:.4g} (lowest {min_sim[worst]:.4g}, in a group of "
        f"{int(groups.sizes[worst])}); items planned for dropping there may be far from the item kept. "
        "Use grouping='star' (the default) or 'complete'.",
        DenseMemWarning,
        stacklevel=3,
    )


def find_pairs(xn: np.ndarray, opt: Options, rng: np.random.Generator, chunk: int, bar: Any) -> tuple:
    """Every candidate pair at or above the threshold (re-scored), its source and settings."""
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
    elif source == "join":
        pairs = C.join_pairs(
            xn, opt.threshold, nlist=opt.nlist, nprobe=opt.nprobe, chunk=chunk, tile_mib=opt.tile_mib, rng=rng,
            sample=sample, target_recall=opt.target_recall, progress=bar,
        )
    else:
        pairs = C.hnsw_pairs(xn, opt.threshold, k=opt.k, m=32, ef_search=None, chunk=chunk, sample=sample,
                             progress=bar)
    return pairs, source, {"chosen_because": reason, **pairs.params}


def judge_and_group(xn: np.ndarray, opt: Options, rule: str, score: np.ndarray | None,
                    rng: np.random.Generator, chunk: int, bar: Any) -> tuple:
    """Candidate pairs, the method's judgement of them, and the grouping rule: (groups, reps, ...)."""
    n = xn.shape[0]
    pairs, source, params = find_pairs(xn, opt, rng, chunk, bar)
    lo, hi, sim = pairs.lo, pairs.hi, pairs.sim
    if opt.method == "attractor" and lo.size:
        b = beta_for_threshold(opt.threshold) if opt.beta is None else opt.beta
        joined, info = attractor_edges(
            xn, lo, hi, opt.threshold, beta=b, steps=opt.steps, tol=1e-5, retrieve_method=opt.retrieve_method,
            progress=bar,
        )
        info["beta_rule"] = "2 / (1 - threshold)" if opt.beta is None else "given"
        params["attractor"] = info
        lo, hi, sim = lo[joined], hi[joined], sim[joined]
    elif opt.method == "attractor":
        params["attractor"] = {"beta": beta_for_threshold(opt.threshold) if opt.beta is None else opt.beta,
                               "pairs_judged": 0, "pairs_joined": 0}
    adj = G.adjacency(n, lo, hi, sim)
    groups = G.pack_labels(G.components(n, adj))
    reps = None
    if opt.grouping != "chain":
        groups, reps = G.split_groups(groups, adj, opt.grouping, rule, score)
    return groups, reps, source, params, pairs
