"""The grouping's subgraph extraction against SciPy's own sparse indexing."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from densemem.duplicates._groups import _subgraph, adjacency


@settings(max_examples=60, deadline=None)
@given(n=st.integers(2, 200), m=st.integers(0, 1500), pick=st.floats(0.01, 1.0), seed=st.integers(0, 2**31))
def test_subgraph_equals_scipy_fancy_indexing(n: int, m: int, pick: float, seed: int) -> None:
    # Reference: scipy.sparse CSR row-then-column selection, adj[rows][:, rows].
    rng = np.random.default_rng(seed)
    lo, hi = rng.integers(0, n, m), rng.integers(0, n, m)
    keep = lo < hi
    adj = adjacency(n, lo[keep], hi[keep], rng.random(int(keep.sum())))
    rows = np.sort(rng.choice(n, max(1, int(pick * n)), replace=False))
    want = adj[rows][:, rows].tocsr()
    want.sort_indices()
    got = _subgraph(adj, rows)
    assert got.shape == want.shape
    np.testing.assert_array_equal(got.indptr, want.indptr)
    np.testing.assert_array_equal(got.indices, want.indices)
    np.testing.assert_array_equal(got.data, want.data)


def test_subgraph_of_a_component_keeps_every_edge() -> None:
    # Derived by hand: a path 0-1-2 and a separate edge 3-4; the component {0, 1, 2} keeps its two
    # edges (four entries of the symmetric matrix) with their weights.
    adj = adjacency(5, np.array([0, 1, 3]), np.array([1, 2, 4]), np.array([0.9, 0.8, 0.99]))
    sub = _subgraph(adj, np.array([0, 1, 2]))
    assert sub.nnz == 4
    assert sub[0, 1] == pytest.approx(0.9) and sub[2, 1] == pytest.approx(0.8)
