"""The one faiss index factory (densemem.core.index.make_index) against faiss exact search."""

from __future__ import annotations

import faiss
import numpy as np

from densemem.core.index import make_index, train_ivf


def test_every_kind_finds_faiss_exact_top1(rng: np.random.Generator) -> None:
    # Reference: faiss.knn (brute-force inner product). Queries are stored rows plus small
    # noise, so HNSW and IVF with generous search settings must find the same top-1.
    x = rng.standard_normal((3000, 64)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    q = x[:200] + 0.05 * rng.standard_normal((200, 64)).astype(np.float32)
    _, truth = faiss.knn(q, x, 1, metric=faiss.METRIC_INNER_PRODUCT)
    flat = make_index("flat", 64)
    hnsw = make_index("hnsw", 64, M=16, ef_construction=80, ef_search=128)
    ivf = make_index("ivf", 64, nlist=32, nprobe=32, kmeans={"seed": 3, "niter": 5})
    assert ivf.cp.seed == 3 and ivf.cp.niter == 5 and ivf.nprobe == 32 and hnsw.hnsw.efSearch == 128
    train_ivf(ivf, x, 640, np.random.default_rng(0))
    for index in (flat, hnsw, ivf):
        index.add(x)
        _, got = index.search(q, 1)
        hit = np.mean(got[:, 0] == truth[:, 0])
        assert hit == 1.0 if index is not hnsw else hit >= 0.99
