"""The benchmark rows of one run (one N): faiss baselines, densemem retrieval, binary memories.

Private. Every row is timed the same way (``time_calls``: median after warm-up),
watched once more for memory (``memory_peaks``), scored against faiss
``IndexFlatIP`` exact top-k, and set beside its faiss baseline from this run
(timed alternately with the row, so both see the same machine load).
The densemem index-backed rows search the very faiss HNSW/IVF index of their
baseline row (attached through the memory's index seam), so the ratio compares
the same candidates with and without the softmax on top.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import numpy as np

from ._data import BenchData, packed, sign_codes
from ._measure import median, memory_peaks, paired_times, recall_at_k, time_calls
from ._spec import BenchRecord, BenchSpec
from ..core.index import CandidateIndex, IndexSettings, binary_flat, default_settings, make_index
from ..core.sparse import NAMED_ALPHA
from ..errors import InputValueError

__all__ = ["count_rows", "run_rows"]

_FLOAT64_SAMPLE = 64  # queries checked against a float64 NumPy softmax (the exact rows)
_BINARY_CHUNK_MIB = 64.0


def _build(fn: Callable[[], Any]) -> tuple[Any, float, float]:
    """(object, seconds, RSS peak MiB) of one build call."""
    t0 = time.perf_counter()
    _, rss, obj = memory_peaks(fn, python=False)
    return obj, time.perf_counter() - t0, rss


def float64_states(x: np.ndarray, q: np.ndarray, beta: float, chunk: int = 1 << 16) -> np.ndarray:
    """One softmax update ``X.T softmax(beta X q)`` in float64, NumPy only, two passes over row chunks."""
    q64 = q.astype(np.float64)
    m = np.full(q.shape[0], -np.inf)
    for a in range(0, x.shape[0], chunk):
        m = np.maximum(m, (x[a:a + chunk].astype(np.float64) @ q64.T).max(axis=0))
    z = np.zeros(q.shape[0])
    acc = np.zeros(q64.shape)
    for a in range(0, x.shape[0], chunk):
        xc = x[a:a + chunk].astype(np.float64)
        w = np.exp(beta * (xc @ q64.T - m))  # (rows, queries), <= 1
        z += w.sum(axis=0)
        acc += w.T @ xc
    return acc / z[:, None]


class _Run:
    """State shared by the rows of one run: data, ground truth, baselines, references."""

    def __init__(self, spec: BenchSpec, data: BenchData, tick: Callable[[str], None]) -> None:
        self.spec, self.name, self.x, self.q, self.tick = spec, data.name, data.x, data.q, tick
        self.n, self.dim = data.x.shape
        self.nq = data.q.shape[0]
        self.ks = [k for k in spec.ks if k <= self.n]
        if not self.ks:
            raise InputValueError(f"run_benchmark: every k in `ks` {spec.ks} exceeds the {self.n} stored rows.")
        self.kmax = max(self.ks)
        self.batch = min(spec.batch_size or self.nq, self.nq)
        self.records: list[BenchRecord] = []
        self.baselines: dict[str, tuple[str, Callable[[], Any]]] = {}
        self.refs: dict[float, np.ndarray] = {}
        self.truth: np.ndarray | None = None
        self._mem: tuple[Any, float, float] | None = None

    # ----------------------------------------------------------- helpers
    def batched(self, fn: Callable[[np.ndarray], tuple[np.ndarray, ...]], q: np.ndarray | None = None) -> Callable[[], tuple[np.ndarray, ...]]:
        q = self.q if q is None else q
        if self.batch >= q.shape[0]:
            return lambda: fn(q)

        def call() -> tuple[np.ndarray, ...]:
            parts = [fn(q[a:a + self.batch]) for a in range(0, q.shape[0], self.batch)]
            return tuple(np.concatenate(p) for p in zip(*parts))

        return call

    def timed(self, call: Callable[[], Any]) -> tuple[list[float], float, float, Any]:
        times, _ = time_calls(call, self.spec.repeats, self.spec.warmup)
        py, rss, out = memory_peaks(call)
        return times, py, rss, out

    def add(self, *, library: str, method: str, label: str, params: dict[str, Any], call: Callable[[], Any],
            build: tuple[float, float], quality: Callable[[Any], dict[str, Any]], beta: float | None = None,
            baseline: str | None = None, register: str | None = None, held: float | None = None) -> None:
        self.tick(f"N={self.n} {method} {label}")
        extra: dict[str, Any] = {}
        if baseline is not None and baseline in self.baselines:
            base_label, base_call = self.baselines[baseline]
            times, base_times, _ = paired_times(call, base_call, self.spec.repeats, self.spec.warmup)
            py, rss, out = memory_peaks(call)
            t, base_t = median(times), median(base_times)
            extra = {"baseline": base_label, "baseline_time_s": base_t, "time_ratio": t / base_t}
        else:
            times, py, rss, out = self.timed(call)
            t = median(times)
        rec = BenchRecord(
            dataset=self.name, n=self.n, dim=self.dim, n_queries=self.nq, batch_size=self.batch,
            library=library, method=method, label=label, params=params, beta=beta,
            time_s=t, times_s=times, queries_per_s=self.nq / t, build_s=build[0], build_peak_rss_mib=build[1],
            peak_python_mib=py, peak_rss_mib=rss, held_mib=held, repeats=self.spec.repeats, warmup=self.spec.warmup,
            **quality(out), **extra,
        )
        self.records.append(rec)
        if register is not None:
            self.baselines[register] = (label, call)

    def recalls(self, ids: np.ndarray) -> dict[int, float]:
        assert self.truth is not None
        return {k: recall_at_k(ids, self.truth, k) for k in self.ks}

    def state_quality(self, out: tuple[np.ndarray, ...], beta: float, ref: np.ndarray, ref_name: str,
                      rows: slice = slice(None), keep: bool = False) -> dict[str, Any]:
        if keep:  # exact states: the reference of the certified and index rows at this beta
            self.refs[beta] = out[1].astype(np.float64)
        err = np.linalg.norm(out[1][rows].astype(np.float64) - ref, axis=1)
        q = {"recall": self.recalls(out[0]), "state_error_max": float(err.max()),
             "state_error_mean": float(err.mean()), "state_reference": ref_name}
        if out[2] is not None and out[2].size:
            q["fell_back"] = float(np.mean(out[2]))
        if len(out) > 3 and out[3].size:
            q["support_size_mean"] = float(np.mean(out[3]))
        return q

    def memory(self) -> tuple[Any, float, float]:
        if self._mem is None:
            from ..dense import DenseMemory

            self._mem = _build(lambda: DenseMemory.from_array(self.x, normalize=False))
        return self._mem

    def retrieve_fn(self, beta: float, method: str, weighting: str = "softmax") -> Callable[[np.ndarray], tuple[np.ndarray, ...]]:
        mem = self.memory()[0]
        nc = max(self.spec.n_candidates, self.kmax)
        sparse: dict[str, Any] = {}
        if weighting != "softmax":
            sparse = {"weighting": weighting, "alpha": self.spec.alpha if weighting == "entmax" else None}

        def fn(qb: np.ndarray) -> tuple[np.ndarray, ...]:
            r = mem.retrieve(qb, beta, k=self.kmax, method=method, return_energy=False, n_candidates=nc, **sparse)
            fb = np.zeros(0, dtype=bool) if r.fell_back is None else r.fell_back
            support = np.zeros(0, dtype=np.int64) if r.support_size is None else np.asarray(r.support_size)
            return r.top_ids, r.states, fb, support

        return fn

    def exact_ref(self, beta: float, weighting: str = "softmax") -> np.ndarray:
        key = beta if weighting == "softmax" else (beta, weighting)
        if key not in self.refs:
            self.refs[key] = self.batched(self.retrieve_fn(beta, "exact", weighting))()[1].astype(np.float64)
        return self.refs[key]


# ------------------------------------------------------------------ rows
def _held_mib(index: Any, binary: bool = False) -> float:
    """MiB an index holds: the size of its faiss serialization (measured, not estimated)."""
    import faiss

    raw = faiss.serialize_index_binary(index) if binary else faiss.serialize_index(index)
    return float(raw.nbytes) / 2.0**20


def _flat(run: _Run) -> None:
    flat, b, brss = _build(lambda: _flat_index(run.x))
    run.truth = flat.search(run.q, run.kmax)[1]
    run.add(library="faiss", method="faiss-flat", label="IndexFlatIP", params={"k": run.kmax},
            call=run.batched(lambda qb: (flat.search(qb, run.kmax)[1],)), build=(b, brss),
            quality=lambda out: {"recall": run.recalls(out[0])}, register="faiss-flat", held=_held_mib(flat))


def _flat_index(x: np.ndarray) -> Any:
    idx = make_index("flat", x.shape[1])
    idx.add(x)
    return idx


def _dense(run: _Run, method: str, extra_build: tuple[float, float] = (0.0, 0.0),
           label: str = "", params: dict[str, Any] | None = None, baseline: str = "faiss-flat",
           index_mib: float = 0.0, weighting: str = "softmax") -> None:
    mem, mb, mrss = run.memory()
    held = float(np.asarray(mem.patterns).nbytes) / 2.0**20 + index_mib
    sample = slice(0, min(_FLOAT64_SAMPLE, run.nq))
    alpha = run.spec.alpha if weighting == "entmax" else NAMED_ALPHA.get(weighting)
    for beta in run.spec.betas:
        if method == "exact" and weighting == "softmax":
            ref = float64_states(run.x, run.q[sample], beta)
            ref_name, rows = f"float64 NumPy softmax ({ref.shape[0]} queries)", sample
        elif method == "exact":
            assert alpha is not None
            ref = float64_entmax_states(run.x, run.q[sample], beta, alpha)
            ref_name, rows = f"float64 NumPy {weighting} by bisection ({ref.shape[0]} queries)", sample
        else:
            ref, ref_name, rows = run.exact_ref(beta, weighting), f"densemem exact{_map_tag(weighting)}", slice(None)
        call = run.batched(run.retrieve_fn(beta, "index" if method.startswith("index") else method, weighting))
        extra = {} if weighting == "softmax" else {"weighting": weighting, "alpha": alpha}
        run.add(library="densemem", method=method, label=(label + f"{_map_tag(weighting)} beta={beta:g}").strip(),
                params={**(params or {}), "beta": beta, **({"weighting": weighting} if extra else {})}, beta=beta,
                call=call, build=(mb + extra_build[0], max(mrss, extra_build[1])), baseline=baseline, held=held,
                quality=lambda out, ref=ref, beta=beta, ref_name=ref_name, rows=rows, extra=extra: {
                    **run.state_quality(out, beta, ref, ref_name, rows,
                                        keep=method == "exact" and weighting == "softmax"), **extra})


def _map_tag(weighting: str) -> str:
    return "" if weighting == "softmax" else f" {weighting}"


def float64_entmax_states(x: np.ndarray, q: np.ndarray, beta: float, alpha: float) -> np.ndarray:
    """States ``x^T alpha-entmax(beta x q)`` in float64 for a few queries (the sparse rows' reference).

    alpha-entmax by bisection on its threshold tau (Peters, Niculae & Martins, "Sparse
    Sequence-to-Sequence Models", ACL 2019, Algorithm 1): p_i = [(alpha - 1) z_i - tau]_+ ^
    (1 / (alpha - 1)), with tau in [max (alpha-1) z - 1, max (alpha-1) z - (1/N)^(alpha-1)]
    and sum p = 1. Independent of densemem's own sparse kernel.
    """
    xd = x.astype(np.float64)
    z = (alpha - 1.0) * beta * (q.astype(np.float64) @ xd.T)
    top = z.max(axis=1, keepdims=True)
    lo, hi = top - 1.0, top - (1.0 / z.shape[1]) ** (alpha - 1.0)
    for _ in range(80):
        tau = (lo + hi) / 2
        mass = (np.maximum(z - tau, 0.0) ** (1.0 / (alpha - 1.0))).sum(axis=1, keepdims=True)
        lo, hi = np.where(mass >= 1.0, tau, lo), np.where(mass >= 1.0, hi, tau)
    p = np.maximum(z - (lo + hi) / 2, 0.0) ** (1.0 / (alpha - 1.0))
    p /= p.sum(axis=1, keepdims=True)
    return p @ xd


def _hnsw(run: _Run, planned: list[str]) -> None:
    s = run.spec

    def build() -> Any:
        graph = IndexSettings(kind="hnsw", M=s.hnsw_m, ef_construction=s.ef_construction)
        return CandidateIndex.build(run.x, graph, version=0).faiss_index

    hnsw, b, brss = _build(build)
    for ef in s.ef_search:
        hnsw.hnsw.efSearch = ef
        params = {"M": s.hnsw_m, "ef_construction": s.ef_construction, "ef_search": ef}
        key = f"faiss-hnsw/{ef}"
        if "faiss-hnsw" in planned:
            run.add(library="faiss", method="faiss-hnsw", label=f"HNSW ef={ef}", params={**params, "k": run.kmax},
                    call=run.batched(lambda qb: (hnsw.search(qb, run.kmax)[1],)), build=(b, brss),
                    quality=lambda out: {"recall": run.recalls(out[0])}, register=key, held=_held_mib(hnsw))
        if "index-hnsw" in planned:
            settings = IndexSettings(kind="hnsw", M=s.hnsw_m, ef_construction=s.ef_construction, ef_search=ef)
            run.memory()[0]._restore_index({"settings": settings.to_dict(), "n_rows": run.n}, hnsw)
            _dense(run, "index-hnsw", (b, brss), f"ef={ef}", params, baseline=key, index_mib=_held_mib(hnsw))


def _ivf(run: _Run, planned: list[str]) -> None:
    s = run.spec
    nlist = s.nlist or default_settings("ivf", run.n).nlist
    if nlist > run.n:
        raise InputValueError(f"run_benchmark: `nlist` ({nlist}) must be at most the {run.n} stored rows.")

    def build() -> Any:
        lists = IndexSettings(kind="ivf", nlist=nlist, nprobe=1, seed=s.seed)
        return CandidateIndex.build(run.x, lists, version=0).faiss_index

    ivf, b, brss = _build(build)
    for nprobe in sorted({min(p, nlist) for p in s.nprobe}):
        ivf.nprobe = nprobe
        params = {"nlist": nlist, "nprobe": nprobe}
        key = f"faiss-ivf/{nprobe}"
        if "faiss-ivf" in planned:
            run.add(library="faiss", method="faiss-ivf", label=f"IVF nprobe={nprobe}", params={**params, "k": run.kmax},
                    call=run.batched(lambda qb: (ivf.search(qb, run.kmax)[1],)), build=(b, brss),
                    quality=lambda out: {"recall": run.recalls(out[0])}, register=key, held=_held_mib(ivf))
        if "index-ivf" in planned:
            settings = IndexSettings(kind="ivf", nlist=nlist, nprobe=nprobe, seed=s.seed)
            run.memory()[0]._restore_index({"settings": settings.to_dict(), "n_rows": run.n}, ivf)
            _dense(run, "index-ivf", (b, brss), f"nprobe={nprobe}", params, baseline=key, index_mib=_held_mib(ivf))


def _binary_memory(model: str, codes: np.ndarray) -> Any:
    from ..binary._memory import BinaryMemory, DenseBinaryMemory

    if model in ("polynomial", "exponential"):
        return DenseBinaryMemory(codes, interaction=model, degree=3)
    return BinaryMemory(codes, rule=model)


def _binary(run: _Run) -> None:
    s = run.spec
    centre = run.x.mean(axis=0, dtype=np.float64).astype(np.float32)
    codes, qcodes = sign_codes(run.x, centre), sign_codes(run.q, centre)
    bits = 8 * ((run.dim + 7) // 8)

    def build() -> Any:
        idx = binary_flat(bits)
        idx.add(packed(codes))
        return idx

    bflat, b, brss = _build(build)
    qbits = packed(qcodes)
    run.add(library="faiss", method="faiss-binary-flat", label="IndexBinaryFlat", params={"k": run.kmax},
            call=run.batched(lambda qb: (bflat.search(qb, run.kmax)[1],), qbits), build=(b, brss),
            quality=lambda out: {"recall": run.recalls(out[0])}, register="faiss-binary-flat",
            held=_held_mib(bflat, binary=True))

    def nearest_code(states: np.ndarray) -> np.ndarray:
        return bflat.search(packed(states), 1)[1]  # the stored item a returned state stands for

    for model in s.binary_models:
        mem, mb, mrss = _build(lambda model=model: _binary_memory(model, codes))
        dense = model in ("polynomial", "exponential")
        chunk = max(1, int(_BINARY_CHUNK_MIB * 2**20 / (8 * 6 * run.n))) if dense else qcodes.shape[0]

        def fn(qb: np.ndarray, mem: Any = mem, chunk: int = chunk) -> tuple[np.ndarray, ...]:
            parts = [mem.retrieve(qb[a:a + chunk], mode="sync", steps=s.binary_sweeps).states
                     for a in range(0, qb.shape[0], chunk)]
            return (np.concatenate(parts),)

        params: dict[str, Any] = {"mode": "sync", "steps": s.binary_sweeps}
        if dense:
            params["degree"] = 3 if model == "polynomial" else "-"
        run.add(library="densemem", method=f"binary-{model}", label=f"sign codes {model}", params=params,
                call=run.batched(fn, qcodes), build=(mb, mrss), baseline="faiss-binary-flat",
                quality=lambda out: {"recall": {1: recall_at_k(nearest_code(out[0]), run.truth, 1)}})


def count_rows(spec: BenchSpec, n: int) -> int:
    """How many rows one run of ``n`` stored rows makes (for a progress bar)."""
    planned = spec.planned_methods()
    nlist = spec.nlist or default_settings("ivf", n).nlist
    n_probe = len({min(p, nlist) for p in spec.nprobe})
    nb, ne = len(spec.betas), len(spec.ef_search)
    rows = 1 + nb * len(spec.weightings) * sum(m in planned for m in ("exact", "certified", "auto"))
    rows += ne * (("faiss-hnsw" in planned) + nb * ("index-hnsw" in planned))
    rows += n_probe * (("faiss-ivf" in planned) + nb * ("index-ivf" in planned))
    return rows + ((1 + len(spec.binary_models)) if spec.include_binary else 0)


def run_rows(spec: BenchSpec, data: BenchData, tick: Callable[[str], None]) -> list[BenchRecord]:
    """Every row of one run, faiss baselines first so each densemem row has its ratio."""
    run = _Run(spec, data, tick)
    planned = spec.planned_methods()
    _flat(run)
    for weighting in spec.weightings:
        for method in ("exact", "certified", "auto"):
            if method in planned:
                _dense(run, method, weighting=weighting)
    if "faiss-hnsw" in planned:
        _hnsw(run, planned)
    if "faiss-ivf" in planned:
        _ivf(run, planned)
    if spec.include_binary:
        _binary(run)
    return run.records
