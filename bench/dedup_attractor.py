"""The attractor method of near-duplicate planning at scale: 100,000 x 128 (and 20,000 x 300).

Invented data: the clustered rows with planted near-copies of ``bench/dedup_1m.py``.
Reports the wall time of ``plan_duplicates(..., method="attractor")`` (candidate search,
dynamics and grouping included), the pairs it judged and joined, the pair recall of the
judged pairs against exact brute-force pairs of a sample of rows (faiss
``IndexFlatIP.range_search`` + the same float64 rule), whether every dropped item meets the
threshold against its kept item, and, last, the speed ratio to an exact brute-force pair
search extrapolated from that sample (the floor any method must beat: it only finds the pairs).

    python bench/dedup_attractor.py                     # 100,000 x 128 (target <= 60 s)
    python bench/dedup_attractor.py --n 20000 --d 300   # the width of common word vectors
"""

from __future__ import annotations

import argparse
import json
import resource
import statistics
import sys
import time
from pathlib import Path

import numpy as np

from dedup_1m import exact_sample_pairs, found_sample_pairs, make_data
from densemem.duplicates import plan_duplicates


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--d", type=int, default=128)
    ap.add_argument("--threshold", type=float, default=0.98)
    ap.add_argument("--sample", type=int, default=5_000, help="rows for the recall check")
    ap.add_argument("--repeats", type=int, default=1, help="timed runs (median reported)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "dedup_attractor.json"))
    args = ap.parse_args(argv)

    x, n_copies = make_data(args.n, args.d, args.seed)
    times, plan = [], None
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        plan = plan_duplicates(x, args.threshold, method="attractor", return_pairs=True, seed=args.seed)
        times.append(time.perf_counter() - t0)
    wall = statistics.median(times)
    assert plan is not None and plan.pair_ids is not None
    sample = np.sort(np.random.default_rng(args.seed + 1).choice(args.n, min(args.sample, args.n), replace=False))
    exact, exact_s = exact_sample_pairs(x, sample, args.threshold)
    found = found_sample_pairs(plan.pair_ids, sample, args.n)
    recall = len(exact & found) / len(exact) if exact else 1.0
    u = x / np.linalg.norm(x, axis=1, keepdims=True)
    kept_sim = np.einsum("ij,ij->i", u[plan.drop_ids].astype(np.float64), u[plan.duplicate_of_ids].astype(np.float64))
    info = plan.candidate_params["attractor"]
    exact_full_s = exact_s * args.n / sample.size
    result = {
        "n": args.n, "d": args.d, "threshold": args.threshold, "planted_copies": n_copies, "wall_seconds": wall, "wall_seconds_runs": times,
        "candidates": plan.candidates, "pairs_judged": info["pairs_judged"], "pairs_joined": info["pairs_joined"],
        "n_unconverged": info["n_unconverged"], "n_groups": plan.n_groups, "n_drop": int(plan.drop_ids.size),
        "sample_rows": int(sample.size), "pair_recall": recall,
        "lowest_kept_similarity": float(kept_sim.min()) if kept_sim.size else None,
        "exact_full_seconds_extrapolated": exact_full_s, "speed_ratio_vs_exact": exact_full_s / wall,
        "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
        "target": {"wall_seconds_max": 60.0 if (args.n, args.d) == (100_000, 128) else None},
    }
    print(f"{'n':>8} {'d':>4} {'wall s':>7} {'judged':>7} {'joined':>7} {'groups':>7} {'recall':>7} "
          f"{'low kept':>8} {'peak MiB':>9}")
    print(f"{args.n:>8} {args.d:>4} {wall:>7.1f} {info['pairs_judged']:>7} {info['pairs_joined']:>7} "
          f"{plan.n_groups:>7} {recall:>7.4f} {result['lowest_kept_similarity'] or float('nan'):>8.4f} "
          f"{result['peak_rss_mib']:>9.0f}")
    print(f"speed ratio vs exact brute force pair search (extrapolated {exact_full_s:.0f} s): "
          f"{result['speed_ratio_vs_exact']:.1f}x")
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=1) + "\n")
    return result


if __name__ == "__main__":
    main(sys.argv[1:])
