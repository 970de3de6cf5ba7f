"""Sparse retrieval (sparsemax, alpha-entmax) speed against faiss, measured in the same process.

    python bench/sparse_vs_faiss.py            # N=200,000, d=128, 1,000 noisy queries, beta=8
    python bench/sparse_vs_faiss.py --n 20000  # quick check

Rows (median of --repeats after one warm-up; each repeat times the densemem call and its
faiss baseline back to back, so both see the same load):
  sparsemax / entmax15   retrieve(weighting=..., method="auto", steps=1, k=10), beta=8,
                         vs IndexFlatIP.search(k=10)
Timed without the energy pass (return_energy=False) and, separately, with it. Beside each:
the support sizes (median, largest), the share of queries answered from certified faiss
candidates (the rest by the tiled pass), recall@1 against faiss exact top-1, the largest
state error against the tiled exact path (method="exact") and the tracemalloc peak of the
call (NumPy buffers; the stored array is not counted). The ratios are printed last.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import faiss
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(1, str(Path(__file__).resolve().parents[1]))  # the densemem of this checkout
import _common as C  # noqa: E402

import densemem  # noqa: E402

TARGET = 1.15


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    for flag, kind, default in (("--n", int, 200_000), ("--dim", int, 128), ("--queries", int, 1000),
                                ("--beta", float, 8.0), ("--repeats", int, 5), ("--seed", int, 0)):
        ap.add_argument(flag, type=kind, default=default)
    args = ap.parse_args(argv)

    rng = np.random.default_rng(args.seed)
    x = C.unit_rows(rng, args.n, args.dim)
    q, k = C.noisy_queries(rng, x, args.queries, noise=0.5), 10
    mem, flat = densemem.DenseMemory.from_array(x, normalize=False), faiss.IndexFlatIP(args.dim)
    flat.add(x)
    truth = flat.search(q, 1)[1]
    base_fn = lambda: flat.search(q, k)  # noqa: E731

    rows = []
    for weighting in ("sparsemax", "entmax15"):
        call = lambda e, w=weighting: mem.retrieve(q, args.beta, k=k, weighting=w, return_energy=e)  # noqa: E731
        t, base = C.paired_times(lambda: call(False), base_fn, args.repeats)
        t_e = C.median_time(lambda: call(True), max(1, args.repeats // 2))
        peak = C.peak_python_mib(lambda: call(False))
        res = call(False)
        ref = mem.retrieve(q, args.beta, k=k, weighting=weighting, method="exact", return_energy=False)
        rows.append({
            "weighting": weighting, "beta": args.beta, "time_s": t, "time_with_energy_s": t_e,
            "baseline": "IndexFlatIP.search(k=10)", "baseline_time_s": base, "ratio": t / base,
            "ratio_with_energy": t_e / base, "peak_extra_mib": peak,
            "support_median": float(np.median(res.support_size)), "support_max": int(res.support_size.max()),
            "certified_share": float(np.mean(~res.fell_back)),
            "recall_at_1": float(np.mean(res.top_ids[:, 0] == truth[:, 0])),
            "max_state_error": float(np.abs(res.states - ref.states).max()),
            "same_support_as_exact": bool(np.array_equal(res.support_size, ref.support_size)),
        })

    facts = C.machine_facts()
    payload = {"n": args.n, "dim": args.dim, "queries": args.queries, "machine": facts, "rows": rows}
    path = C.write_json("sparse_vs_faiss.json", payload)
    print(f"N={args.n} d={args.dim} queries={args.queries} k={k} beta={args.beta:g} | BLAS {facts['blas']}")
    print(f"{'weighting':<10} {'time s':>8} {'+energy s':>9} {'faiss s':>8} {'peak MiB':>8} {'support':>9} "
          f"{'certified':>9} {'recall@1':>8} {'state err':>9}")
    for r in rows:
        print(f"{r['weighting']:<10} {r['time_s']:>8.3f} {r['time_with_energy_s']:>9.3f} {r['baseline_time_s']:>8.3f} "
              f"{r['peak_extra_mib']:>8.1f} {r['support_median']:>4g}/{r['support_max']:<4d} "
              f"{r['certified_share']:>9.3f} {r['recall_at_1']:>8.4f} {r['max_state_error']:>9.2e}")
    print(f"wrote {path}")
    for r in rows:
        print(f"ratio {r['weighting']}/{r['baseline']}: {r['ratio']:.2f} (target <= {TARGET}), "
              f"with energy {r['ratio_with_energy']:.2f}")
    return payload


if __name__ == "__main__":
    main()
