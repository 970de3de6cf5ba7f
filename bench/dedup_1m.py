"""Near-duplicate search at scale: 1,000,000 (or 10,000,000) x 128 float32 with planted duplicates.

Invented data: clustered embeddings (Gaussian clouds around random unit
centres) with planted near-copies of some rows (cosine to their source spread
over [0.97, 1], a quarter of them exact copies). Reports the wall time of
``plan_duplicates`` (index training, assignment and search included), its pair
recall against exact brute-force pairs of a sample of query rows (faiss
``IndexFlatIP.range_search`` over the rows in blocks + the same float64 rule),
peak memory (the process peak, data generation included, and the peak after
generation alone), and, last, the speed ratio to an exact brute-force search
extrapolated from that sample.

    python bench/dedup_1m.py                # 1M rows (~30 s of planning, ~2 min of exact check)
    python bench/dedup_1m.py --n 10000000   # 10M rows: ~6 GB for the data, ~11 GB peak
    python bench/dedup_1m.py --n 100000     # quick check
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import sys
import time
from pathlib import Path

import faiss
import numpy as np

from densemem.duplicates import plan_duplicates

SLACK = 1e-6  # the library's documented edge rule: cosine >= threshold - 1e-6


def make_data(n: int, d: int, seed: int) -> tuple[np.ndarray, int]:
    """Clustered rows with planted near-copies; returns (data, number of planted copies).

    Rows are written straight to shuffled positions (the shuffle has its own
    random stream), so the data is allocated once.
    """
    rng = np.random.default_rng(seed)
    at = np.random.default_rng([seed, 1]).permutation(n)  # row r of the unshuffled table goes to at[r]
    n_clusters = max(1, n // 500)
    centres = rng.standard_normal((n_clusters, d)).astype(np.float32)
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    spread = rng.uniform(0.5, 1.0, n_clusters).astype(np.float32)  # noise norm / centre norm
    n_copies = int(0.08 * n)
    n_base = n - n_copies
    x = np.empty((n, d), dtype=np.float32)
    step = 1 << 16
    for a in range(0, n_base, step):
        b = min(n_base, a + step)
        c = rng.integers(0, n_clusters, b - a)
        noise = rng.standard_normal((b - a, d)).astype(np.float32) / np.sqrt(d)
        x[at[a:b]] = centres[c] + spread[c, None] * noise
    src = rng.integers(0, n_base, n_copies)
    cos = rng.uniform(0.97, 1.0, n_copies)
    cos[rng.random(n_copies) < 0.25] = 1.0
    eps = np.sqrt(np.maximum(1.0 / cos**2 - 1.0, 0.0))  # |e|/|x| giving cosine `cos` for e orthogonal-ish
    for a in range(0, n_copies, step):
        b = min(n_copies, a + step)
        s = x[at[src[a:b]]]
        e = rng.standard_normal(s.shape).astype(np.float32)
        e -= (np.einsum("ij,ij->i", e, s) / np.einsum("ij,ij->i", s, s))[:, None] * s  # orthogonal to source
        e *= (eps[a:b] * np.linalg.norm(s, axis=1) / np.maximum(np.linalg.norm(e, axis=1), 1e-12))[:, None]
        x[at[n_base + a : n_base + b]] = s + e
    return x, n_copies


def exact_sample_pairs(x: np.ndarray, sample: np.ndarray, threshold: float) -> tuple[set, float]:
    """Every pair (s, j), s in sample, with cosine >= threshold - SLACK, by brute force.

    faiss ``IndexFlatIP.range_search`` of the sample rows over blocks of 1M rows
    (a flat index holds a copy of its rows: one block at a time bounds memory).
    """
    t0 = time.perf_counter()

    def unit(rows: np.ndarray) -> np.ndarray:
        return rows / np.linalg.norm(rows, axis=1, keepdims=True)

    xs = np.ascontiguousarray(unit(x[sample]))
    qs, js = [], []
    block = 1 << 20
    for a in range(0, x.shape[0], block):
        index = faiss.IndexFlatIP(x.shape[1])
        index.add(np.ascontiguousarray(unit(x[a : a + block])))
        lims, _, lab = index.range_search(xs, threshold - SLACK - 1e-4)
        qs.append(np.repeat(np.arange(sample.size), np.diff(lims.astype(np.int64))))
        js.append(lab.astype(np.int64) + a)
        del index
    seconds = time.perf_counter() - t0
    qi, j = np.concatenate(qs), np.concatenate(js)
    q = sample[qi]
    other = q != j
    qi, q, j = qi[other], q[other], j[other]
    sim = np.einsum("ij,ij->i", xs[qi].astype(np.float64), unit(x[j]).astype(np.float64))
    keep = sim >= threshold - SLACK
    return set(zip(q[keep].tolist(), j[keep].tolist())), seconds


def found_sample_pairs(pair_ids: np.ndarray, sample: np.ndarray, n: int) -> set:
    in_s = np.zeros(n, dtype=bool)
    in_s[sample] = True
    lo, hi = pair_ids[:, 0], pair_ids[:, 1]
    a, b = in_s[lo], in_s[hi]
    q = np.concatenate([lo[a], hi[b]])
    j = np.concatenate([hi[a], lo[b]])
    return set(zip(q.tolist(), j.tolist()))


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--d", type=int, default=128)
    ap.add_argument("--threshold", type=float, default=0.98)
    ap.add_argument("--sample", type=int, default=20_000, help="query rows for the recall check")
    ap.add_argument("--repeats", type=int, default=1, help="timed runs (median reported)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--candidates", default="auto", help="plan_duplicates candidates (default auto)")
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "dedup_1m.json"))
    args = ap.parse_args(argv)

    load_before = os.getloadavg()
    t0 = time.perf_counter()
    x, n_copies = make_data(args.n, args.d, args.seed)
    gen_s = time.perf_counter() - t0
    rss_gen = _peak_mib()
    times, plan = [], None
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        plan = plan_duplicates(x, args.threshold, candidates=args.candidates, return_pairs=True, seed=args.seed)
        times.append(time.perf_counter() - t0)
    rss_plan = _peak_mib()
    load_after_plan = os.getloadavg()
    assert plan is not None and plan.pair_ids is not None
    sample = np.sort(np.random.default_rng(args.seed + 1).choice(args.n, min(args.sample, args.n), replace=False))
    exact, exact_s = exact_sample_pairs(x, sample, args.threshold)
    found = found_sample_pairs(plan.pair_ids, sample, args.n)
    recall = len(exact & found) / len(exact) if exact else 1.0
    precision = len(exact & found) / len(found) if found else 1.0
    exact_full_s = exact_s * args.n / sample.size  # brute force over every row, extrapolated
    wall = statistics.median(times)
    result = {
        "n": args.n, "d": args.d, "threshold": args.threshold, "planted_copies": n_copies,
        "wall_seconds": wall, "wall_seconds_runs": times, "generate_seconds": gen_s,
        "candidates": plan.candidates, "candidate_params": plan.summary()["candidate_params"],
        "n_pairs": plan.n_pairs, "n_groups": plan.n_groups, "n_drop": int(plan.drop_ids.size),
        "grouping": plan.grouping, "lowest_kept_similarity": plan.summary()["lowest_kept_similarity"],
        "sample_rows": int(sample.size), "sample_exact_pairs": len(exact),
        "pair_recall": recall, "pair_precision": precision,
        "exact_sample_seconds": exact_s, "exact_full_seconds_extrapolated": exact_full_s,
        "speed_ratio_vs_exact": exact_full_s / wall,
        "peak_rss_mib": rss_plan, "peak_rss_after_generation_mib": rss_gen,
        "peak_rss_note": "process peak after plan_duplicates (data generation included; the data itself is "
                         f"{x.nbytes / 2**20:.0f} MiB); the exact check runs later and is not counted",
        "threads": faiss.omp_get_max_threads(), "cpu_count": os.cpu_count(),
        "load_average": os.getloadavg(), "load_average_before": load_before,
        "load_average_after_plan": load_after_plan, "python": platform.python_version(), "faiss": faiss.__version__,
        "target": {"wall_seconds_max": 600.0 if args.n >= 10_000_000 else 45.0, "pair_recall_min": 0.995,
                   "peak_rss_mib_max": 12 * 1024},
    }
    print(f"{'n':>10} {'d':>4} {'thr':>5} {'wall s':>8} {'pairs':>9} {'groups':>8} "
          f"{'recall':>7} {'prec':>6} {'nprobe':>6} {'peak MiB':>9}")
    print(f"{args.n:>10} {args.d:>4} {args.threshold:>5} {wall:>8.1f} {plan.n_pairs:>9} {plan.n_groups:>8} "
          f"{recall:>7.4f} {precision:>6.3f} {plan.candidate_params.get('nprobe', '-'):>6} "
          f"{result['peak_rss_mib']:>9.0f}")
    print(f"load average before {load_before}, after plan {load_after_plan}, end {os.getloadavg()}; "
          f"peak RSS after generation {rss_gen:.0f} MiB; exact brute force extrapolated {exact_full_s:.0f} s")
    print(f"speed ratio vs exact brute force: {result['speed_ratio_vs_exact']:.1f}x")
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=1) + "\n")
    return result


if __name__ == "__main__":
    main(sys.argv[1:])
