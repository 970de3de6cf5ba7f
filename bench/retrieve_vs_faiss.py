"""Retrieval speed and memory against faiss, measured in the same process.

    python bench/retrieve_vs_faiss.py            # N=200,000, d=128, 1,000 queries
    python bench/retrieve_vs_faiss.py --n 20000  # quick check

Rows (median of --repeats after one warm-up, both cores; each repeat times the
densemem call and its faiss baseline back to back, so both see the same load):
  exact      retrieve(method="exact", steps=1), beta=8   vs  IndexFlatIP.search(k=10)
  certified  retrieve(method="certified"), beta=60       vs  IndexFlatIP.search(k=10)
  index      retrieve(method="index") on HNSW            vs  IndexHNSWFlat.search, same M, efSearch, k
Each densemem row is timed without the energy pass (return_energy=False) and,
separately, with it. Quality sits beside each time: recall@1 against faiss exact
top-1 and the state error against exact retrieval. Peak extra memory is the
tracemalloc peak during the call (NumPy buffers; the stored array is not counted).
The ratios are printed last.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import faiss
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _common as C  # noqa: E402

import densemem  # noqa: E402


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=200_000)
    ap.add_argument("--dim", type=int, default=128)
    ap.add_argument("--queries", type=int, default=1000)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)

    rng = np.random.default_rng(args.seed)
    x = C.unit_rows(rng, args.n, args.dim)
    q = C.noisy_queries(rng, x, args.queries, noise=0.5)
    k = 10
    mem = densemem.DenseMemory.from_array(x, normalize=False)
    flat = faiss.IndexFlatIP(args.dim)
    flat.add(x)
    _, truth = flat.search(q, 1)

    rows = []

    def row(name: str, beta: float, base_fn, base_name: str, **kw) -> None:
        call = lambda e: mem.retrieve(q, beta, k=k, return_energy=e, **kw)  # noqa: E731
        t, base = C.paired_times(lambda: call(False), base_fn, args.repeats)
        t_e = C.median_time(lambda: call(True).energy, max(1, args.repeats // 2))  # read: the energy is lazy
        peak = C.peak_python_mib(lambda: call(False))
        res = call(False)
        ref = mem.retrieve(q, beta, k=k, method="exact", return_energy=False)
        rows.append(
            {
                "method": name,
                "beta": beta,
                "time_s": t,
                "time_with_energy_s": t_e,
                "baseline": base_name,
                "baseline_time_s": base,
                "ratio": t / base,
                "ratio_with_energy": t_e / base,
                "peak_extra_mib": peak,
                "recall_at_1": float(np.mean(res.top_ids[:, 0] == truth[:, 0])),
                "max_state_error": float(np.abs(res.states - ref.states).max()),
                "fell_back": None if res.fell_back is None else float(np.mean(res.fell_back)),
            }
        )

    flat_search = lambda: flat.search(q, k)  # noqa: E731
    row("exact", 8.0, flat_search, "IndexFlatIP.search", method="exact")
    row("certified", 60.0, flat_search, "IndexFlatIP.search", method="certified")

    hnsw_m, ef = 32, 64
    mem.build_index("hnsw", M=hnsw_m, ef_search=ef)
    hnsw = faiss.IndexHNSWFlat(args.dim, hnsw_m, faiss.METRIC_INNER_PRODUCT)
    hnsw.hnsw.efConstruction = 80
    hnsw.add(x)
    hnsw.hnsw.efSearch = ef
    row("index", 60.0, lambda: hnsw.search(q, 32), "IndexHNSWFlat.search(k=32)", method="index", n_candidates=32)

    facts = C.machine_facts()
    payload = {"n": args.n, "dim": args.dim, "queries": args.queries, "machine": facts, "rows": rows}
    path = C.write_json("retrieve_vs_faiss.json", payload)

    print(f"N={args.n} d={args.dim} queries={args.queries} k={k} | BLAS {facts['blas']}")
    head = f"{'method':<10} {'beta':>5} {'time s':>8} {'+energy s':>9} {'baseline':<28} {'base s':>7} {'peak MiB':>8} {'recall@1':>8} {'state err':>9}"
    print(head)
    for r in rows:
        print(
            f"{r['method']:<10} {r['beta']:>5g} {r['time_s']:>8.3f} {r['time_with_energy_s']:>9.3f} "
            f"{r['baseline']:<28} {r['baseline_time_s']:>7.3f} {r['peak_extra_mib']:>8.1f} "
            f"{r['recall_at_1']:>8.4f} {r['max_state_error']:>9.2e}"
        )
    print(f"wrote {path}")
    targets = {"exact": 1.5, "certified": 1.10, "index": 1.15}
    for r in rows:
        print(
            f"ratio {r['method']}/{r['baseline']}: {r['ratio']:.2f} (target <= {targets[r['method']]}), "
            f"with energy {r['ratio_with_energy']:.2f}"
        )
    return payload


if __name__ == "__main__":
    main()
