"""float16 memories and stores larger than the working memory.

References: a float64 NumPy softmax update over the *rounded* (stored float16) patterns
(scipy.special.softmax), faiss exact search (faiss.knn) on the same rounded rows, scikit-learn's
digits projected to 384 dimensions (real vectors at a realistic width), and the kernel's own
accounting of anonymous memory (RssAnon in /proc/self/status, Linux: common practice).
"""

from __future__ import annotations

import json
import os
import sys

import numpy as np
import pytest
from scipy.special import softmax

from densemem import DenseMemory, InputValueError
from densemem.sharding import shard_memory


def _digits_384(digits: np.ndarray) -> np.ndarray:
    # a fixed random projection of the 64-pixel digits to 384 dims (Johnson-Lindenstrauss style: common practice)
    proj = np.random.default_rng(0).standard_normal((64, 384)) / np.sqrt(64)
    return (digits.astype(np.float64) @ proj).astype(np.float32)


@pytest.mark.parametrize("method", ["exact", "certified", "auto"])
def test_half_retrieval_is_exact_for_the_stored_values(digits, method):
    x = _digits_384(digits)
    mem = DenseMemory.from_array(x, normalize=True, dtype="float16")
    assert mem.dtype == "float16" and mem.patterns.dtype == np.float16
    q = (x[::13] + 0.3 * np.random.default_rng(1).standard_normal((len(x[::13]), 384))).astype(np.float64)  # float64 in
    res = mem.retrieve(q, 25.0, method=method, k=5, steps=2)
    xs = mem.patterns.astype(np.float64)  # the stored half values are the truth
    s = q / np.linalg.norm(q, axis=1, keepdims=True)
    for _ in range(2):
        p = softmax(25.0 * s @ xs.T, axis=1)
        s = p @ xs
    assert np.abs(res.states - s).max() <= 1e-4
    np.testing.assert_allclose(res.top_weights[:, 0], p.max(axis=1), atol=1e-5)  # the last update's heaviest
    assert np.mean(res.top_ids[:, 0] == p.argmax(axis=1)) >= 0.99
    if method == "certified":
        assert res.mass_bound is not None and np.all(res.mass_bound <= 1e-6)


def test_half_rounding_is_reported_and_overflow_refused_with_the_row(rng):
    x = rng.standard_normal((300, 768)).astype(np.float32)
    mem = DenseMemory.from_array(x, dtype="float16")
    r = mem.rounding
    # float16 keeps 11 significant bits: each entry moves by at most 2^-11 of its size (IEEE 754: common practice)
    assert 0 < r.mean_distance <= r.max_distance <= 2.0**-11 * np.abs(x).max() * np.sqrt(768)
    assert 0 <= r.max_cosine_change < 1e-6
    assert DenseMemory.from_array(x).rounding is None  # float32 rounds nothing
    bad = x.copy()
    bad[41, 3] = 7e4
    with pytest.raises(InputValueError, match=r"from_array: `patterns` holds 70000 at row 41, beyond the float16 range"):
        DenseMemory.from_array(bad, dtype="float16")
    with pytest.raises(InputValueError, match=r"DenseMemory.add: `patterns` holds .* at row 0, beyond the float16 range"):
        mem.add(bad[41:42])
    with pytest.raises(InputValueError, match=r"`dtype` must be 'float32' or 'float16'; got 'int8'"):
        DenseMemory(4, dtype="int8")
    with pytest.raises(InputValueError, match=r"`queries` have 767 features but the memory stores 768"):
        mem.retrieve(np.ones(767))


def test_half_store_round_trip_keeps_the_dtype_and_half_the_bytes(tmp_path, rng):
    x = rng.standard_normal((1000, 384)).astype(np.float32)
    half, full = DenseMemory.from_array(x, dtype="float16"), DenseMemory.from_array(x)
    half.save(tmp_path / "h")
    full.save(tmp_path / "f")  # a float32 store, as every store before float16 existed
    man = json.loads((tmp_path / "h" / "manifest.json").read_text())
    assert man["dtype"] == "float16"
    size_h = os.path.getsize(tmp_path / "h" / "patterns.npy")
    size_f = os.path.getsize(tmp_path / "f" / "patterns.npy")
    assert size_h < 0.51 * size_f
    back = DenseMemory.load(tmp_path / "h", mmap=True, verify=True)
    assert back.dtype == "float16"
    np.testing.assert_array_equal(back.patterns, half.patterns)
    assert DenseMemory.load(tmp_path / "f").dtype == "float32"
    q = rng.standard_normal((5, 384))
    np.testing.assert_array_equal(back.nearest(q, k=4).ids, half.nearest(q, k=4).ids)
    sm = shard_memory(back, tmp_path / "s", 3)  # shards keep the rows as they are
    a, b = sm.retrieve(q, 3.0, k=4, method="exact"), back.retrieve(q, 3.0, k=4, method="exact")
    np.testing.assert_array_equal(a.top_ids, b.top_ids)
    np.testing.assert_allclose(a.states, b.states, atol=1e-5)


def _rss_anon_mib() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("RssAnon:"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("no RssAnon")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="RssAnon is a Linux /proc field")
def test_mapped_store_is_streamed_not_copied(tmp_path):
    # A 244 MiB store, memory-mapped: exact and certified passes over it add far less anonymous memory
    # than the store holds (the rows stay file-backed page cache, read tile by tile).
    n, d = 500_000, 128
    rng = np.random.default_rng(3)
    mem = DenseMemory(d, normalize=False, beta=8.0)
    for a in range(0, n, 100_000):
        mem.add(rng.standard_normal((100_000, d)).astype(np.float32) / np.float32(np.sqrt(d)))
    mem.save(tmp_path / "big")
    del mem
    mapped = DenseMemory.load(tmp_path / "big", mmap=True, verify=False)
    q = (np.asarray(mapped.patterns[:1000]) + 0.05).astype(np.float32)
    before = _rss_anon_mib()
    mapped.retrieve(q, method="exact", k=10, return_energy=False)
    exact_growth = _rss_anon_mib() - before
    mapped.retrieve(q, 60.0, method="certified", k=10, return_energy=False)
    growth = _rss_anon_mib() - before
    assert exact_growth < 120 and growth < 160, (exact_growth, growth)  # the store is 244 MiB
