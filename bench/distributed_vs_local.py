"""Sharded exact retrieval on local Dask workers against 1 process; add and remove times (invented data).

Data: random unit vectors (N x d) and noisy copies of stored rows as queries, seeded.
One side: ``DenseMemory.retrieve(method="exact")`` in this process with every core.
Other side: the same memory split into ``--shards`` shards (``shard_memory``), retrieved through
``ShardedMemory.on_cluster(client)`` on a LocalCluster of 2 worker processes x 1 thread.
Both do one update (k=10). Reported: median wall time over repeats, queries per second,
agreement (identical top ids, largest state difference), the time to add ``--add`` rows and to
remove ``--remove`` ids from the sharded store, and last the throughput ratio distributed /
single process (target >= 0.8).

    python bench/distributed_vs_local.py                                   # N=1M, 2 shards
    python bench/distributed_vs_local.py --n 10000000 --shards 8 --add 1000000 --remove 100000
"""

from __future__ import annotations

import argparse
import logging
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import RESULTS, machine_facts, noisy_queries, unit_rows

import densemem
from densemem.sharding import open_sharded, shard_memory


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="stored patterns")
    ap.add_argument("--d", type=int, default=128, help="dimension")
    ap.add_argument("--queries", type=int, default=1000)
    ap.add_argument("--beta", type=float, default=20.0)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--shards", type=int, default=2)
    ap.add_argument("--add", type=int, default=0, help="rows to add to the sharded store afterwards (timed)")
    ap.add_argument("--remove", type=int, default=0, help="ids to remove afterwards (timed)")
    ap.add_argument("--out", type=Path, default=RESULTS / "distributed_vs_local.json")
    args = ap.parse_args(argv)

    from dask.distributed import Client, LocalCluster

    rng = np.random.default_rng(args.seed)
    x = unit_rows(rng, args.n, args.d)
    q = noisy_queries(rng, x, args.queries, noise=0.5)
    mem = densemem.DenseMemory.from_array(x, beta=args.beta)
    opts = dict(k=10, method="exact", return_energy=False)

    folder = Path(tempfile.mkdtemp(prefix="densemem-bench-"))
    try:
        t0 = time.perf_counter()
        sm = shard_memory(mem, folder / "sharded", args.shards, by="contiguous")
        t_shard = time.perf_counter() - t0
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=":0", silence_logs=logging.ERROR) as cluster, Client(cluster) as client:
            on = sm.on_cluster(client)
            t0 = time.perf_counter()
            on.retrieve(q[:2], **opts)  # workers import densemem and load their shards
            t_load = time.perf_counter() - t0
            # the machine may be shared: alternate the two sides so both see the same load
            runs: dict[str, list[float]] = {"local": [], "dist": []}
            out: dict[str, object] = {}
            calls = {"local": lambda: mem.retrieve(q, **opts), "dist": lambda: on.retrieve(q, **opts)}
            for r in range(args.repeats + 1):  # the first round is a warm-up
                for side, fn in calls.items():
                    t0 = time.perf_counter()
                    out[side] = fn()
                    if r:
                        runs[side].append(time.perf_counter() - t0)
        t_add = t_remove = None
        if args.add:
            extra = unit_rows(rng, args.add, args.d)
            t0 = time.perf_counter()
            open_sharded(sm.path).add(extra)
            t_add = time.perf_counter() - t0
        if args.remove:
            gone = rng.choice(args.n, args.remove, replace=False)
            t0 = time.perf_counter()
            open_sharded(sm.path).remove(gone.tolist())
            t_remove = time.perf_counter() - t0
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    t_local, t_dist = float(np.median(runs["local"])), float(np.median(runs["dist"]))
    local, dist = {"r": out["local"]}, {"r": out["dist"]}

    a, b = local["r"], dist["r"]
    same_ids = float(np.mean(a.top_ids == b.top_ids))
    state_diff = float(np.abs(a.states - b.states).max())
    ratio = t_local / t_dist
    payload = {
        "bench": "distributed_vs_local",
        "n": args.n, "d": args.d, "queries": args.queries, "beta": args.beta, "k": 10,
        "repeats": args.repeats, "seed": args.seed,
        "single_process_s": t_local, "distributed_s": t_dist, "runs_s": runs,
        "single_process_qps": args.queries / t_local, "distributed_qps": args.queries / t_dist,
        "shard_write_s": t_shard, "first_call_s": t_load, "shards": args.shards,
        "add_rows": args.add, "add_s": t_add, "remove_ids": args.remove, "remove_s": t_remove,
        "top_ids_identical_fraction": same_ids, "max_state_diff": state_diff,
        "peak_rss_mib_main": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "throughput_ratio": ratio, "target": 0.8,
        "machine": machine_facts(),
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(__import__("json").dumps(payload, indent=2, default=float))

    print(f"N={args.n} d={args.d} queries={args.queries} beta={args.beta:g} k=10 (median of {args.repeats})")
    print(f"{'path':<28}{'time s':>10}{'queries/s':>12}")
    print(f"{'1 process (2 threads)':<28}{t_local:>10.3f}{args.queries / t_local:>12.1f}")
    if t_add is not None or t_remove is not None:
        print(f"add {args.add} rows: {t_add if t_add is not None else float('nan'):.2f} s; "
              f"remove {args.remove} ids: {t_remove if t_remove is not None else float('nan'):.2f} s")
    print(f"{'2 Dask workers x 1 thread':<28}{t_dist:>10.3f}{args.queries / t_dist:>12.1f}")
    print(f"shard write {t_shard:.2f} s, first call (load) {t_load:.2f} s; top ids identical: {same_ids:.4f}, "
          f"max state diff {state_diff:.2e}; JSON: {args.out}")
    print(f"throughput ratio distributed/single: {ratio:.3f} (target >= 0.8)")
    return payload


if __name__ == "__main__":
    main()
