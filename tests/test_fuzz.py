"""Fuzzed public API: every call returns a finite result or raises a densemem error.

Hypothesis strategies feed valid and invalid inputs to every public entry point. A call
passes when it returns (and every number it returns is finite) or raises a subclass of
``densemem.errors.DenseMemError`` (the clear errors); any other exception fails the test.

The default run is bounded (``FUZZ_EXAMPLES`` examples per target, 25 unless set, derandomized
so it is the same on every machine). ``bench/fuzz_campaign.py`` runs the long campaign
(random seeds, thousands of calls, in child processes so an interpreter crash is counted).
With ``FUZZ_REPORT=<file>`` each call's outcome is appended there as one line
(``target outcome``) for the campaign to count.
"""

from __future__ import annotations

import io
import os
import tempfile
import warnings
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from hypothesis.extra import numpy as hnp  # noqa: E402

import densemem  # noqa: E402
from densemem import BinaryMemory, DenseMemory, plan_duplicates, read_embeddings  # noqa: E402
from densemem.errors import DenseMemError, DenseMemWarning  # noqa: E402
from densemem.results import NearestResult, RetrievalResult  # noqa: E402

EXAMPLES = int(os.environ.get("FUZZ_EXAMPLES", "25"))
REPORT = os.environ.get("FUZZ_REPORT")
FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=None,
    database=None,
    derandomize=os.environ.get("FUZZ_RANDOM") != "1",
    suppress_health_check=list(HealthCheck),
)


# --------------------------------------------------------------------- outcome
def _finite(value: Any) -> bool:
    if isinstance(value, (RetrievalResult, NearestResult)):
        return all(_finite(v) for v in value.to_dict().values())
    if isinstance(value, dict):
        return all(_finite(v) for v in value.values())
    if isinstance(value, (list, tuple)):
        return all(_finite(v) for v in value)
    if isinstance(value, np.ndarray):
        return value.dtype.kind not in "fc" or bool(np.isfinite(value).all())
    if isinstance(value, float):
        return bool(np.isfinite(value))
    return True


def outcome(target: str, call: Callable[[], Any]) -> str:
    """Run ``call``: "ok" (finite result) or "clear" (a densemem error); anything else raises."""
    report = REPORT if target != "self" else None  # the harness's own check is not a call to count
    if report:
        with open(report, "a", encoding="utf-8") as fh:  # written first: a crash leaves the target named
            fh.write(f"{target} started\n")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DenseMemWarning)  # fallbacks and left-out zero rows are announced, not errors
            result = call()
    except DenseMemError:
        kind = "clear"
    else:
        kind = "ok" if _finite(result) else "nonfinite"
    if report:
        with open(report, "a", encoding="utf-8") as fh:
            fh.write(f"{target} {kind}\n")
    assert kind != "nonfinite", f"{target}: a result holds NaN or infinity"
    return kind


# ------------------------------------------------------------------ strategies
SPECIAL = [0.0, -0.0, 1.0, -1.0, 1e-45, 1e-30, 1e-3, 1e3, 1e20, 1e38, 3.4e38, np.nan, np.inf, -np.inf]

floats = st.one_of(st.sampled_from(SPECIAL), st.floats(allow_nan=True, allow_infinity=True, width=64))
ints = st.one_of(st.integers(-3, 12), st.sampled_from([2**31, 2**40, 2**63, 2**64, -(2**63)]))
junk = st.one_of(st.none(), st.booleans(), st.text(max_size=3), st.just([1, 2]), st.just(object()))
scalars = st.one_of(floats, ints, junk)


def valid(good: st.SearchStrategy[Any], bad: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    """Mostly ``good`` (three of four draws), sometimes ``bad``: valid calls get exercised too."""
    return st.one_of(good, good, good, bad)


def rows(dim: int, max_rows: int = 6, big: bool = False) -> st.SearchStrategy[Any]:
    """Well-formed (n, dim) float arrays; with ``big``, entries up to the float32 limit."""
    el = st.floats(-3.4028234663852886e38, 3.4028234663852886e38, width=32) if big else st.floats(-100, 100, width=32)
    return hnp.arrays(st.sampled_from([np.float32, np.float64]), st.tuples(st.integers(1, max_rows), st.just(dim)),
                      elements=el)


def matrices(max_rows: int = 6, max_cols: int = 5) -> st.SearchStrategy[Any]:
    numeric = hnp.arrays(
        dtype=st.sampled_from([np.float32, np.float64, np.int64, np.int8, np.uint64, np.bool_, np.complex64]),
        shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=max(max_rows, max_cols)),
        elements=None,
    )
    tame = hnp.arrays(np.float64, st.tuples(st.integers(1, max_rows), st.integers(1, max_cols)),
                      elements=st.sampled_from(SPECIAL[:11]) | st.floats(-10, 10))
    ragged = st.just([[1.0, 2.0], [3.0]])
    return st.one_of(tame, tame, numeric, ragged, junk, st.lists(st.lists(floats, max_size=3), max_size=3))


id_lists = st.one_of(
    st.lists(st.integers(-2, 8), max_size=4),
    st.lists(st.text(max_size=2), max_size=4),
    st.lists(st.one_of(st.integers(0, 4), st.text(max_size=1), st.booleans(), st.floats(0, 3), st.none()), max_size=4),
    st.just([[0], [1]]),
    st.just(np.array([2**63], dtype=np.uint64)),
    scalars,
)


def _memory() -> DenseMemory:
    return DenseMemory.from_array(np.random.default_rng(0).standard_normal((40, 5)).astype(np.float32), beta=4.0)


# --------------------------------------------------------------------- targets
@FUZZ
@given(patterns=valid(rows(5), matrices()), ids=valid(st.none(), id_lists), normalize=st.booleans(),
       beta=valid(st.floats(1e-6, 1e6), scalars))
def test_fuzz_from_array(patterns, ids, normalize, beta) -> None:
    outcome("from_array", lambda: len(DenseMemory.from_array(patterns, ids if isinstance(ids, list) else None,
                                                             normalize=normalize, beta=beta)))


@FUZZ
@given(queries=valid(st.one_of(rows(5), rows(5, big=True)), matrices(6, 5)),
       beta=valid(st.one_of(st.none(), st.floats(1e-300, 1e6)), scalars),
       steps=valid(st.integers(1, 4), st.one_of(st.just(10**12), scalars)),
       k=valid(st.one_of(st.none(), st.integers(1, 40)), st.one_of(ints, junk)),
       method=valid(st.sampled_from(["auto", "exact", "certified"]), st.sampled_from(["index", "bogus"])),
       tol_mass=valid(st.floats(1e-9, 0.5), st.one_of(floats, junk)))
def test_fuzz_retrieve(queries, beta, steps, k, method, tol_mass) -> None:
    mem = _memory()
    outcome("retrieve", lambda: mem.retrieve(queries, beta, steps=steps, k=k, method=method, tol_mass=tol_mass))


@FUZZ
@given(queries=rows(5, 8), beta=st.one_of(st.none(), st.floats(1e-6, 1e4)), steps=st.integers(1, 6),
       k=st.one_of(st.none(), st.integers(1, 40)), method=st.sampled_from(["auto", "exact", "certified", "index"]),
       tol_mass=st.floats(1e-12, 0.5), normalize=st.booleans())
def test_fuzz_retrieve_valid(queries, beta, steps, k, method, tol_mass, normalize) -> None:
    # well-formed calls only: they must succeed with finite numbers (or refuse a zero row under
    # normalize, or a beta beyond the float32 score range, with a clear error)
    mem = DenseMemory.from_array(np.random.default_rng(0).standard_normal((40, 5)), beta=4.0, normalize=normalize)
    if method == "index":
        mem.build_index("hnsw", M=8)
    outcome("retrieve", lambda: mem.retrieve(queries, beta, steps=steps, k=k, method=method, tol_mass=tol_mass))
    outcome("energy", lambda: mem.energy(queries, beta))
    outcome("nearest", lambda: mem.nearest(queries, k, metric="l2" if normalize else "ip", index=method == "index"))


@FUZZ
@given(states=valid(st.one_of(rows(5), rows(5, big=True)), matrices(4, 5)),
       beta=valid(st.one_of(st.none(), st.floats(5e-324, 1e6)), scalars))
def test_fuzz_energy(states, beta) -> None:
    mem = _memory()
    outcome("energy", lambda: mem.energy(states, beta))


@FUZZ
@given(queries=valid(rows(5), matrices(4, 5)), k=valid(st.one_of(st.none(), st.integers(1, 40)), st.one_of(ints, junk)),
       metric=valid(st.sampled_from(["ip", "l2"]), st.just("cos")), index=st.booleans())
def test_fuzz_nearest(queries, k, metric, index) -> None:
    mem = _memory()
    outcome("nearest", lambda: mem.nearest(queries, k, metric=metric, index=index))


@FUZZ
@given(patterns=valid(rows(5, 4), matrices(4, 5)), ids=valid(st.none(), id_lists),
       drop=valid(st.lists(st.integers(0, 45), max_size=4, unique=True), id_lists),
       look=valid(st.lists(st.integers(0, 45), max_size=4), id_lists))
def test_fuzz_changes(patterns, ids, drop, look) -> None:
    mem = _memory()
    before = (mem.patterns.copy(), mem.ids.copy())
    if outcome("add", lambda: mem.add(patterns, None if ids is None or not isinstance(ids, list) else ids)) == "clear":
        assert np.array_equal(mem.patterns, before[0]) and np.array_equal(mem.ids, before[1])  # nothing half-done
    n = len(mem)
    if outcome("remove", lambda: mem.remove(drop)) == "clear":
        assert len(mem) == n
    outcome("positions", lambda: mem.positions(look))


@FUZZ
@given(kind=st.sampled_from(["hnsw", "ivf", "flat"]),
       params=st.dictionaries(st.sampled_from(["M", "ef_construction", "ef_search", "nlist", "nprobe", "seed", "x"]),
                              valid(st.integers(1, 64), st.one_of(ints, junk)), max_size=3))
def test_fuzz_build_index(kind, params) -> None:
    # faiss parameters that once crashed the interpreter (M = 1) are refused before faiss
    mem = _memory()
    outcome("build_index", lambda: mem.build_index(kind, **params))


@FUZZ
@given(offset=st.integers(0, 4000), value=st.integers(0, 255), name=st.sampled_from(["manifest.json", "patterns.npy", "ids.npy"]),
       verify=st.booleans(), mmap=st.booleans())
def test_fuzz_damaged_store(offset, value, name, verify, mmap) -> None:
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "s"
        _memory().save(path)
        f = path / name
        raw = bytearray(f.read_bytes())
        raw[offset % len(raw)] = value
        f.write_bytes(bytes(raw))
        outcome("load", lambda: len(DenseMemory.load(path, verify=verify, mmap=mmap)))


@FUZZ
@given(patterns=valid(rows(4, 5), matrices(5, 4)), probes=valid(rows(4, 3), matrices(3, 4)),
       seed=valid(st.one_of(st.none(), st.integers(0, 2**31 - 1)), st.one_of(ints, junk)))
def test_fuzz_binary(patterns, probes, seed) -> None:
    def pm1(a: Any) -> Any:  # well-formed float rows become +-1 patterns; anything else goes in as it is
        if isinstance(a, np.ndarray) and a.dtype.kind == "f" and a.ndim == 2 and np.isfinite(a).all():
            return np.where(a >= 0, 1, -1)
        return a

    def call() -> Any:
        return BinaryMemory(pm1(patterns)).retrieve(pm1(probes), seed=seed).states

    outcome("binary", call)


@FUZZ
@given(data=valid(rows(4, 30), matrices(30, 4)), threshold=valid(st.floats(-0.99, 1.0), st.one_of(floats, junk)),
       candidates=valid(st.sampled_from(["auto", "exact", "ivf", "hnsw"]), st.just("nope")),
       seed=valid(st.integers(0, 2**31 - 1), st.one_of(ints, junk)), k=valid(st.integers(1, 16), ints))
def test_fuzz_plan_duplicates(data, threshold, candidates, seed, k) -> None:
    outcome("plan_duplicates", lambda: plan_duplicates(data, threshold, candidates=candidates, seed=seed, k=k).n_groups)


def _file_bytes(kind: str) -> bytes:
    x = np.random.default_rng(1).standard_normal((6, 3)).astype(np.float32)
    buf = io.BytesIO()
    if kind == ".npy":
        np.save(buf, x)
    elif kind == ".npz":
        np.savez(buf, vectors=x, ids=np.arange(6))
    elif kind == ".csv":
        buf.write("\n".join(",".join(f"{v:.3f}" for v in r) for r in x).encode())
    else:
        import pyarrow as pa
        import pyarrow.parquet as pq

        pq.write_table(pa.table({"vec": list(x)}), buf)
    return buf.getvalue()


@FUZZ
@given(kind=st.sampled_from([".npy", ".npz", ".csv", ".parquet"]), flips=st.lists(st.tuples(st.integers(0, 10**4), st.integers(0, 255)), max_size=3),
       cut=st.one_of(st.none(), st.integers(0, 10**4)))
def test_fuzz_read_embeddings(kind, flips, cut) -> None:
    if kind == ".parquet":
        pytest.importorskip("pyarrow")
    raw = bytearray(_file_bytes(kind))
    for pos, val in flips:
        raw[pos % len(raw)] = val
    if cut is not None:
        raw = raw[: cut % (len(raw) + 1)]
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / f"e{kind}"
        p.write_bytes(bytes(raw))
        outcome("read_embeddings", lambda: read_embeddings(p).vectors)


def test_outcome_counts_clear_errors_and_refuses_nan() -> None:
    # the harness itself: a densemem error is "clear", a finite result "ok", NaN a failure
    assert outcome("self", lambda: densemem.DenseMemory(0)) == "clear"
    assert outcome("self", lambda: np.ones(2)) == "ok"
    with pytest.raises(AssertionError, match="self: a result holds NaN or infinity"):
        outcome("self", lambda: np.array([np.nan]))
