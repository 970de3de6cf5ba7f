"""Checks the commands run on a store to warn before retrieval misleads (private).

:func:`collapse_hint` finds the failure a raw (not normalized) store shows when
a few rows have much larger norms than the rest: by inner product those rows
are the nearest stored pattern of almost every query, the stored rows
themselves included, so softmax retrieval returns the same id at any beta.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["collapse_check", "collapse_hint"]

SAMPLE = 512  # stored rows used as queries (a sample keeps `build` fast on large stores)
OWN_FLOOR = 0.5  # below this share of rows finding themselves first, retrieval is misleading


def collapse_check(memory: Any, *, sample: int = SAMPLE, seed: int = 0) -> dict[str, Any]:
    """Stored rows used as queries: how many find themselves first by inner product.

    Returns a dict: ``rows`` (sampled), ``own_first`` (share whose nearest
    stored row by inner product is itself), ``top_id`` and ``top_share`` (the
    id most often nearest and the share of rows it wins), ``norm_ratio``
    (largest stored norm over the median norm) and ``collapsed`` (True when
    ``own_first < 0.5``; exact duplicates aside, each stored row is its own
    nearest pattern by cosine, so a low share comes from the norms).
    """
    n = len(memory)
    x = memory.patterns
    rng = np.random.default_rng(seed)
    rows = np.sort(rng.choice(n, min(sample, n), replace=False)) if n > sample else np.arange(n)
    q = np.asarray(x[rows], dtype=np.float32)
    res = memory.nearest(q, k=1, metric="ip")
    first = res.ids[:, 0]
    own = memory.positions(first) == rows
    ids, counts = np.unique(first, return_counts=True)
    norms = np.linalg.norm(np.asarray(x, dtype=np.float64), axis=1)
    med = float(np.median(norms))
    return {
        "rows": int(rows.size),
        "own_first": float(own.mean()),
        "top_id": ids[int(np.argmax(counts))].item(),
        "top_share": float(counts.max() / rows.size),
        "norm_ratio": float(norms.max() / med) if med > 0 else float("inf"),
        "collapsed": bool(own.mean() < OWN_FLOOR),
    }


def collapse_hint(memory: Any, rebuild: str = "build the store again with --normalize (cosine geometry)") -> str | None:
    """One warning line when stored rows do not retrieve themselves on ``memory``, else None.

    Examples
    --------
    >>> import numpy as np, densemem
    >>> x = np.eye(4); x[0] *= 10; x[1:, 0] = 1.0  # one long row wins every inner product
    >>> collapse_hint(densemem.DenseMemory.from_array(x)).startswith("warning: only 25.0% of 4 stored rows")
    True
    """
    if memory.normalize or len(memory) < 2:
        return None
    c = collapse_check(memory)
    if not c["collapsed"]:
        return None
    if c["top_share"] >= 0.5:
        what = (f"id {c['top_id']} is first for {c['top_share']:.1%} of them, so retrieval returns it for "
                "almost every query at any beta")
    else:
        what = "rows of larger norm win the inner products, so retrieval favours them at any beta"
    return (f"warning: only {c['own_first']:.1%} of {c['rows']} stored rows used as queries find themselves "
            f"first by inner product: {what} (largest norm {c['norm_ratio']:.3g} x the median). "
            f"Hint: {rebuild}.")
