"""The exact-recall beta of sparse maps (densemem.tuning.exact_recall_beta).

Reference: the Fenchel-Young margin of the alpha-Tsallis loss, 1/(alpha-1) (Blondel, Martins &
Niculae, "Learning with Fenchel-Young Losses", JMLR 2020, Prop. 7), which gives exact one-step
retrieval of x_i once beta * Delta_i reaches it (Santos, Niculae, McNamee & Martins, ICML 2024,
Prop. 3); Delta_i from faiss exact top-2 search (IndexFlatIP). Open data: scikit-learn's digits.
"""

from __future__ import annotations

import json

import faiss
import numpy as np
import pytest

import densemem.tuning as t
from densemem import DenseMemory, InputTypeError, InputValueError


@pytest.fixture(scope="module")
def digits_mem():
    from sklearn.datasets import load_digits

    return DenseMemory.from_array(load_digits().data.astype(np.float32), normalize=True)


@pytest.mark.parametrize("weighting,alpha", [("sparsemax", 2.0), ("entmax15", 1.5)])
def test_reported_beta_is_the_margin_and_recalls_exactly_on_digits(digits_mem, weighting, alpha):
    x = digits_mem.patterns
    flat = faiss.IndexFlatIP(x.shape[1])
    flat.add(x)
    s, _ = flat.search(x, 2)
    delta = s[:, 0].astype(np.float64) - s[:, 1]  # unit rows: the own score is the top one
    rep = t.exact_recall_beta(digits_mem, weighting=weighting, fraction=0.95)
    ok = delta > 1e-5
    np.testing.assert_allclose(rep.beta_exact[ok], 1.0 / ((alpha - 1.0) * delta[ok]), rtol=1e-4)
    assert rep.fraction_exact is not None and rep.fraction_exact >= 0.95
    # just below each pattern's own margin beta a rival keeps weight (the margin is sharp)
    i = np.flatnonzero(ok)[::200]
    for j in i:
        below = digits_mem.retrieve(x[j], rep.beta_exact[j] * (1 - 1e-3), weighting=weighting)
        above = digits_mem.retrieve(x[j], rep.beta_exact[j] * (1 + 1e-4), weighting=weighting)
        assert below.support_size >= 2 and above.support_size == 1
        np.testing.assert_array_equal(above.states, x[j])
    # the dial: support size falls as beta rises, to one item at the reported beta
    assert np.all(np.diff(rep.dial_support) <= 0) and rep.dial_support[0] > 1.5
    json.dumps(rep.to_dict())


def test_every_pattern_exact_at_fraction_one(rng):
    x = rng.standard_normal((500, 64)).astype(np.float32)
    mem = DenseMemory.from_array(x, normalize=True)
    rep = t.exact_recall_beta(mem, weighting="entmax", alpha=1.25, fraction=1.0)
    assert rep.fraction_exact == 1.0 and rep.n_checked == 500
    assert rep.beta == pytest.approx(rep.beta_exact.max() * (1 + 1e-4))


def test_tune_beta_reports_exact_recall_when_asked(digits_mem):
    spec = t.TuneSpec(n_betas=3, n_queries=16, target=None, weighting="sparsemax", target_fraction=0.9)
    rep = t.tune_beta(digits_mem, spec)
    assert rep.exact_recall is not None and rep.exact_recall.fraction == 0.9
    assert "exact single-item recall" in t.format_report(rep)
    assert t.tune_beta(digits_mem, t.TuneSpec(n_betas=3, n_queries=16, target=None)).exact_recall is None


@pytest.mark.parametrize("kw,exc,match", [
    (dict(weighting="softmax"), InputValueError, r"exact_recall_beta: `weighting` must be a sparse map"),
    (dict(weighting="entmax", alpha=3.0), InputValueError, r"exact_recall_beta: `alpha` must be a number in \(1, 2\]"),
    (dict(weighting="sparse"), InputValueError, r"exact_recall_beta: unknown `weighting` 'sparse'"),
    (dict(fraction=0.0), InputValueError, r"exact_recall_beta: `fraction` must be a number in \(0, 1\]"),
    (dict(weighting=None), InputTypeError, r"exact_recall_beta: `weighting` must be one of"),
])
def test_exact_recall_beta_bad_input(rng, kw, exc, match):
    mem = DenseMemory.from_array(rng.standard_normal((10, 4)).astype(np.float32))
    with pytest.raises(exc, match=match):
        t.exact_recall_beta(mem, **kw)
