"""``densemem retrieve --weighting`` (in process): the sparse maps from the command line.

Reference: the library call it maps onto (DenseMemory.retrieve with the same map, itself checked
against the sort-based sparsemax of Martins & Astudillo, ICML 2016, Algorithm 1, in
tests/core/test_sparse.py). Open data: scikit-learn's digits.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from densemem import DenseMemory
from densemem.cli import main


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    from sklearn.datasets import load_digits

    x = load_digits().data.astype(np.float32)[:400]
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    d = tmp_path_factory.mktemp("cli-sparse")
    np.save(d / "v.npy", x)
    np.save(d / "q.npy", x[:5] + 0.02)
    assert main(["build", str(d / "v.npy"), str(d / "s")]) == 0
    return d, x


@pytest.mark.parametrize("flag,kw", [("sparsemax", dict(weighting="sparsemax")),
                                     ("1.25", dict(weighting="entmax", alpha=1.25))])
def test_retrieve_weighting_matches_the_library(store, capsys, flag, kw):
    d, x = store
    capsys.readouterr()
    assert main(["retrieve", str(d / "s"), str(d / "q.npy"), "--beta", "30", "-k", "4", "--weighting", flag,
                 "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    ref = DenseMemory.from_array(x).retrieve(np.load(d / "q.npy"), 30.0, k=4, **kw)
    for j, rec in enumerate(got["queries"]):
        assert rec["support_size"] == int(ref.support_size[j])
        np.testing.assert_allclose(rec["top_weights"], ref.top_weights[j], atol=1e-6)
        assert rec["top_ids"] == ref.top_ids[j].tolist()


@pytest.mark.parametrize("flag,match", [("sparse", "unknown `weighting` 'sparse'"),
                                        ("2.5", r"`alpha` must be a number in \(1, 2\]; got 2.5"),
                                        ("nan", r"`alpha` must be a number in \(1, 2\]; got nan")])
def test_retrieve_bad_weighting_is_a_clear_error(store, capsys, flag, match):
    d, _ = store
    capsys.readouterr()
    assert main(["retrieve", str(d / "s"), str(d / "q.npy"), "--weighting", flag]) == 1  # a library error (exit 1)
    import re

    assert re.search(match, capsys.readouterr().err)
