"""Cost of beta tuning against faiss, measured in the same process.

    python bench/tune_speed.py               # N=50,000, d=64, 256 queries, 5 betas
    python bench/tune_speed.py --n 10000     # quick check

Rows (median of --repeats after one warm-up, both cores):
  separation   tuning.separation (faiss top-2 + float64 Delta)  vs  faiss.knn(X, X, 2)
  weights      entropy / participation ratio from the partial's moments, one beta  vs  IndexFlatIP.search(k=10)
  sweep/beta   tuning.sweep_beta per beta (one pass with moments + energy + nearest)  vs  IndexFlatIP.search(k=10)
Quality beside each time: the entropy's largest error against float64 numpy on 64
queries (scipy-grade reference), and the separation's agreement with faiss.
Peak extra memory is the tracemalloc peak during the call. Ratios are printed last.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import faiss
import numpy as np
from scipy.special import softmax
from scipy.stats import entropy

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _common as C  # noqa: E402

import densemem  # noqa: E402
import densemem.tuning as tu  # noqa: E402
from densemem.core import partial as P  # noqa: E402
from densemem.core.exact import exact_reduce  # noqa: E402


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=50_000)
    ap.add_argument("--dim", type=int, default=64)
    ap.add_argument("--queries", type=int, default=256)
    ap.add_argument("--betas", type=int, default=5)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default=None, help="JSON path (default bench/results/tune_speed.json)")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    x = C.unit_rows(rng, args.n, args.dim)
    q = C.noisy_queries(rng, x, args.queries, 0.3)
    mem = densemem.DenseMemory.from_array(x)
    flat = faiss.IndexFlatIP(args.dim)
    flat.add(x)
    betas = np.geomspace(1.0, 1e3, args.betas)
    beta = 30.0

    rows = []
    t_sep = C.median_time(lambda: tu.separation(mem), args.repeats)
    t_knn2 = C.median_time(lambda: faiss.knn(x, x, 2, metric=faiss.METRIC_INNER_PRODUCT), args.repeats)
    sep = tu.separation(mem)
    _, pos = faiss.knn(x, x, 2, metric=faiss.METRIC_INNER_PRODUCT)
    agree = float(np.mean(sep.rival_rows == pos[:, 1]))
    rows.append({"row": "separation", "seconds": t_sep, "faiss_seconds": t_knn2, "ratio": t_sep / t_knn2,
                 "rival_agreement_with_faiss": agree,
                 "peak_mib": C.peak_python_mib(lambda: tu.separation(mem))})

    def weights() -> object:
        part = exact_reduce(q, mem.patterns, beta, k=0, tile_mib=mem.tile_mib, n_threads=mem.n_threads,
                            need_acc=False, moments=True)
        return P.finish(part)

    t_w = C.median_time(weights, args.repeats)
    t_f = C.median_time(lambda: flat.search(q, 10), args.repeats)
    ref = entropy(softmax(beta * (q[:64].astype(np.float64) @ x.T.astype(np.float64)), axis=1), axis=1)
    err = float(np.abs(weights().entropy[:64] - ref).max())
    rows.append({"row": "weights", "seconds": t_w, "faiss_seconds": t_f, "ratio": t_w / t_f,
                 "entropy_max_abs_error": err, "peak_mib": C.peak_python_mib(weights)})

    def sweep() -> object:
        return tu.sweep_beta(mem, q, betas=betas, method="exact")

    t_s = C.median_time(sweep, args.repeats) / len(betas)
    rows.append({"row": "sweep/beta", "seconds": t_s, "faiss_seconds": t_f, "ratio": t_s / t_f,
                 "peak_mib": C.peak_python_mib(sweep)})

    print(f"n={args.n} dim={args.dim} queries={args.queries} betas={args.betas}")
    print(f"{'row':<12}{'seconds':>10}{'faiss s':>10}{'ratio':>8}  quality")
    for r in rows:
        qual = {k: v for k, v in r.items() if k not in ("row", "seconds", "faiss_seconds", "ratio", "peak_mib")}
        print(f"{r['row']:<12}{r['seconds']:>10.4f}{r['faiss_seconds']:>10.4f}{r['ratio']:>8.2f}  "
              f"{qual} peak {r['peak_mib']:.1f} MiB")
    payload = {"args": vars(args), "machine": C.machine_facts(), "rows": rows}
    path = Path(args.out) if args.out else C.RESULTS / "tune_speed.json"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(payload, indent=2, default=float))
    print("ratios (densemem / faiss): " + ", ".join(f"{r['row']} {r['ratio']:.2f}" for r in rows))
    return payload


if __name__ == "__main__":
    main()
