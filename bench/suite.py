"""The whole benchmark suite at a medium size: densemem.benchmark.run_benchmark, one call.

    python bench/suite.py                       # clustered, N=100,000, d=128, 1,000 queries
    python bench/suite.py --n 20000 --repeats 3 # quick check
    python bench/suite.py --scaling             # N = 10k and 100k (add --large for 1M)

Invented data (a seeded Gaussian mixture shaped like embeddings; --dataset for the
others). Rows: faiss Flat (ground truth), HNSW per efSearch, IVF per nprobe; densemem
exact, certified, auto and index-backed retrieval (on the same HNSW/IVF index) per beta; with
--binary, sign codes in faiss IndexBinaryFlat and the binary memories. Each row: recall@1
and recall@10 against faiss Flat, the state error against exact retrieval, the median
time after one warm-up, queries/s, the ratio to its faiss baseline from this run, build
time and peak memory (tracemalloc + RSS). Writes bench/results/suite.json and
suite_recall_vs_speed.png (+ suite_time_vs_n.png for scaling runs), or to --out.
The ratios (densemem time / faiss time) are printed last.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

from densemem.benchmark import BenchReport, run_benchmark

RESULTS = Path(__file__).resolve().parent / "results"


def _ratios(rep: BenchReport) -> str:
    n_max = max(r.n for r in rep.records)
    keep = [r for r in rep.records if r.n == n_max and r.time_ratio is not None
            and (r.method in ("exact", "certified", "auto") or "ef=64" in r.label or "nprobe=16" in r.label
                 or r.method.startswith("binary-"))]
    return "; ".join(f"{r.method} {r.label} / {r.baseline}: {r.time_ratio:.2f}" for r in keep)


def main(argv: list[str] | None = None) -> BenchReport:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--dataset", default="clustered")
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--dim", type=int, default=128)
    ap.add_argument("--queries", type=int, default=1000)
    ap.add_argument("--betas", nargs="+", type=float, default=[8.0, 64.0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--scaling", action="store_true")
    ap.add_argument("--large", action="store_true")
    ap.add_argument("--binary", action="store_true")
    ap.add_argument("--out", type=Path, default=RESULTS)
    args = ap.parse_args(argv)

    rep = run_benchmark(dataset=args.dataset, n=None if args.dataset == "digits" else args.n, dim=args.dim,
                        n_queries=args.queries, betas=args.betas, repeats=args.repeats, seed=args.seed,
                        scaling=args.scaling, large=args.large, include_binary=args.binary)
    print(rep.table())
    files = rep.write(args.out, stem="suite", overwrite=True)
    for path in files.values():
        print(f"wrote {path}")
    print(f"load average at the end {os.getloadavg()}")
    print("ratios (densemem time / faiss time, same run): " + _ratios(rep))
    return rep


if __name__ == "__main__":
    main()
