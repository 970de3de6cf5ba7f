"""The one faiss index factory, and the candidate indexes (HNSW, IVF) kept beside a memory.

:func:`make_index` builds every inner-product faiss index densemem uses
(retrieval's candidate indexes, tuning's separation, duplicate search, the
benchmark's baselines); :func:`train_ivf` trains an IVF on a row sample.

An index answers "which stored rows score highest for this query" cheaply and
approximately; the retrieval kernel then reduces only those rows. Rows are
numbered by their position in the memory, so :meth:`CandidateIndex.add`
appends in step with ``DenseMemory.add``; ``remove`` shifts positions, so it
marks the index stale and the next use rebuilds it with the same settings.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Literal

import faiss
import numpy as np

from .._validation import check_positive_int
from ..errors import InputValueError

__all__ = ["IndexSettings", "CandidateIndex", "default_settings", "make_index", "train_ivf", "binary_flat"]

Kind = Literal["hnsw", "ivf"]


def make_index(
    kind: Literal["flat", "hnsw", "ivf"],
    dim: int,
    *,
    M: int = 32,
    ef_construction: int = 80,
    ef_search: int = 64,
    nlist: int = 1,
    nprobe: int = 1,
    kmeans: dict[str, Any] | None = None,
) -> Any:
    """An empty faiss index by inner product.

    "flat": ``IndexFlatIP`` (exact). "hnsw": ``IndexHNSWFlat`` with ``M``
    links, ``efConstruction`` and ``efSearch`` set. "ivf": ``IndexIVFFlat``
    with ``nlist`` lists and ``nprobe`` probed, owning its ``IndexFlatIP``
    quantizer, untrained (see :func:`train_ivf`); ``kmeans`` sets fields of its
    k-means parameters (faiss ``ClusteringParameters``: seed, niter,
    spherical, min_points_per_centroid, ...).
    """
    if kind == "flat":
        return faiss.IndexFlatIP(dim)
    if kind == "hnsw":
        index = faiss.IndexHNSWFlat(dim, M, faiss.METRIC_INNER_PRODUCT)
        index.hnsw.efConstruction = ef_construction
        index.hnsw.efSearch = ef_search
        return index
    quantizer = faiss.IndexFlatIP(dim)
    index = faiss.IndexIVFFlat(quantizer, dim, nlist, faiss.METRIC_INNER_PRODUCT)
    index.own_fields = True  # the index frees its quantizer
    quantizer.this.disown()
    for name, val in (kmeans or {}).items():
        setattr(index.cp, name, val)
    index.nprobe = nprobe
    return index


def train_ivf(index: Any, x: np.ndarray, n_train: int, rng: np.random.Generator | None) -> None:
    """Train an IVF on ``n_train`` distinct rows of ``x`` drawn by ``rng`` (in row order); all rows if fewer."""
    n = x.shape[0]
    if n_train >= n or rng is None:
        index.train(np.ascontiguousarray(x))
        return
    index.train(np.ascontiguousarray(x[np.sort(rng.choice(n, n_train, replace=False))]))


def binary_flat(bits: int) -> Any:
    """An empty faiss ``IndexBinaryFlat`` (exact Hamming search) over ``bits``-bit codes."""
    return faiss.IndexBinaryFlat(bits)


@dataclass(frozen=True, slots=True)
class IndexSettings:
    """Parameters of a candidate index (faiss names: M, efConstruction, efSearch, nlist, nprobe)."""

    kind: str
    M: int = 32
    ef_construction: int = 80
    ef_search: int = 64
    nlist: int = 0
    nprobe: int = 0
    seed: int = 0

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def default_settings(kind: str, n: int, **given: Any) -> IndexSettings:
    """Sensible defaults per size, overridden by ``given``.

    HNSW: M=32, efConstruction=80, efSearch=64 (common practice for ~0.95+
    recall@10 on 1e5-1e6 vectors). IVF: nlist about 4 sqrt(n) (common
    practice), nprobe = nlist / 32 but at least 8.
    """
    where = "DenseMemory.build_index"
    if kind not in ("hnsw", "ivf"):
        raise InputValueError(f"{where}: `kind` must be 'hnsw' or 'ivf'; got {kind!r}.")
    known = {"M", "ef_construction", "ef_search", "nlist", "nprobe", "seed"}
    unknown = set(given) - known
    if unknown:
        raise InputValueError(
            f"{where}: unknown index option(s) {sorted(unknown)}; use {sorted(known)}."
        )
    for name, val in given.items():
        check_positive_int(val, name=name, where=where, minimum=0 if name == "seed" else 1)
    if kind == "ivf":
        if given.get("nlist", 0) > n:
            raise InputValueError(
                f"{where}: `nlist` must be at most the number of stored patterns ({n}) for k-means "
                f"training; got {given['nlist']}."
            )
        nlist = given.get("nlist") or max(1, min(int(4 * math.sqrt(max(n, 1))), max(n // 39, 1)))
        nprobe = given.get("nprobe") or min(nlist, max(8, nlist // 32))
        if nprobe > nlist:
            raise InputValueError(f"{where}: `nprobe` ({nprobe}) must be at most `nlist` ({nlist}).")
        return IndexSettings(kind="ivf", nlist=int(nlist), nprobe=int(nprobe), seed=int(given.get("seed", 0)))
    return IndexSettings(
        kind="hnsw",
        M=int(given.get("M", 32)),
        ef_construction=int(given.get("ef_construction", 80)),
        ef_search=int(given.get("ef_search", 64)),
        seed=int(given.get("seed", 0)),
    )


class CandidateIndex:
    """A faiss HNSW or IVF index over a memory's rows, by inner product."""

    def __init__(self, settings: IndexSettings, index: Any, n_rows: int, version: int) -> None:
        self.settings = settings
        self.faiss_index = index
        self.n_rows = n_rows
        self.version = version  # the memory table version it matches
        self.stale = False
        self._apply_search_params()

    @classmethod
    def build(cls, x: np.ndarray, settings: IndexSettings, version: int) -> "CandidateIndex":
        d = x.shape[1]
        if settings.kind == "hnsw":
            index = make_index("hnsw", d, M=settings.M, ef_construction=settings.ef_construction,
                               ef_search=settings.ef_search)
        else:
            index = make_index("ivf", d, nlist=settings.nlist, nprobe=settings.nprobe,
                               kmeans={"seed": settings.seed})
            train_ivf(index, x, 64 * settings.nlist, np.random.default_rng(settings.seed))
        for a in range(0, x.shape[0], 65536):  # float16 rows go in as float32 blocks (the index keeps its own copy)
            index.add(np.ascontiguousarray(x[a : a + 65536], dtype=np.float32))
        return cls(settings, index, int(x.shape[0]), version)

    def _apply_search_params(self) -> None:
        if self.settings.kind == "hnsw":
            self.faiss_index.hnsw.efSearch = self.settings.ef_search
        else:
            self.faiss_index.nprobe = self.settings.nprobe

    def add(self, x: np.ndarray, version: int) -> None:
        """Append rows (their positions follow the existing ones)."""
        if not self.stale:
            self.faiss_index.add(np.ascontiguousarray(x, dtype=np.float32))
            self.n_rows += int(x.shape[0])
            self.version = version

    def search(self, q: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Approximate top-k by inner product: (scores, positions); -1 marks a miss."""
        return self.faiss_index.search(np.ascontiguousarray(q), k)

    def meta(self) -> dict[str, Any]:
        return {"settings": self.settings.to_dict(), "n_rows": self.n_rows}
