"""Realistic widths, float16 stores and a store read from disk (invented data, seeded).

Three measurements, each against a floor measured in the same run (medians of repeats):

1. In RAM at d = 384 (default N = 1M): exact (beta = 8) and certified (beta = 60) one-step
   retrieval against faiss ``IndexFlatIP.search(k=10)`` on the same rows and queries.
2. float16 against float32 exact retrieval at N = 200k, d = 128 (target <= 1.25).
3. Out of core at d = 768 in float16 (default N = 10M, 15 GB; ``--ooc-n`` to change): a
   memory-mapped store, one exact pass for the queries, against (a) a plain sequential read of
   the same patterns file and (b) the two float32 matrix products of the same shapes (timed
   tile by tile on one in-RAM tile, as the pass does). Target: exact <= 1.3 x max(read, products).
   Anonymous memory growth (RssAnon) during the pass is reported beside it.

    python bench/wide_and_half.py                       # the full run (needs ~16 GB of free disk)
    python bench/wide_and_half.py --n 200000 --ooc-n 1000000
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import faiss
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import RESULTS, machine_facts, median_time, noisy_queries, unit_rows

import densemem


def _median(fn, repeats: int) -> float:
    return median_time(fn, repeats=repeats, warmup=1)


def _rss_anon_mib() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("RssAnon:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def in_ram(n: int, d: int, nq: int, repeats: int, rng: np.random.Generator) -> dict:
    x = unit_rows(rng, n, d)
    q = noisy_queries(rng, x, nq, noise=0.5)
    mem = densemem.DenseMemory.from_array(x, beta=8.0)
    flat = faiss.IndexFlatIP(d)
    flat.add(x)
    t_faiss = _median(lambda: flat.search(q, 10), repeats)
    t_exact = _median(lambda: mem.retrieve(q, 8.0, method="exact", return_energy=False), repeats)
    t_cert = _median(lambda: mem.retrieve(q, 60.0, method="certified", return_energy=False), repeats)
    return {"n": n, "d": d, "faiss_s": t_faiss, "exact_s": t_exact, "certified_s": t_cert,
            "exact_over_faiss": t_exact / t_faiss, "certified_over_faiss": t_cert / t_faiss}


def half_vs_full(n: int, d: int, nq: int, repeats: int, rng: np.random.Generator) -> dict:
    x = unit_rows(rng, n, d)
    q = noisy_queries(rng, x, nq, noise=0.5)
    full = densemem.DenseMemory.from_array(x, beta=8.0)
    half = densemem.DenseMemory.from_array(x, beta=8.0, dtype="float16")
    t_full = _median(lambda: full.retrieve(q, method="exact", return_energy=False), repeats)
    t_half = _median(lambda: half.retrieve(q, method="exact", return_energy=False), repeats)
    a, b = full.retrieve(q, method="exact", k=10), half.retrieve(q, method="exact", k=10)
    return {"n": n, "d": d, "float32_s": t_full, "float16_s": t_half, "half_over_full": t_half / t_full,
            "top1_agreement": float(np.mean(a.top_ids[:, 0] == b.top_ids[:, 0])),
            "rounding": half.rounding.to_dict()}


def out_of_core(n: int, d: int, nq: int, folder: Path, rng: np.random.Generator) -> dict:
    """A float16 patterns file written block by block, mapped read-only, one exact pass over it."""
    from densemem.core.table import PatternTable

    block = 250_000
    path = folder / "patterns.npy"
    t0 = time.perf_counter()
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float16, shape=(n, d))
    for a in range(0, n, block):  # written in blocks: the table is never whole in RAM
        b = min(block, n - a)
        out[a : a + b] = rng.standard_normal((b, d), dtype=np.float32) / np.float32(np.sqrt(d))
    out.flush()
    del out
    t_write = time.perf_counter() - t0
    size = path.stat().st_size
    x = np.load(path, mmap_mode="r")
    mapped = densemem.DenseMemory._from_table(
        PatternTable.trusted(x, np.arange(n, dtype=np.int64), normalize=False), beta=8.0)
    q = (np.asarray(x[:nq], dtype=np.float32) + 0.05).astype(np.float32)
    buf = bytearray(64 << 20)

    def read() -> None:
        with open(path, "rb", buffering=0) as fh:
            while fh.readinto(buf):
                pass

    t_read = _median(read, 1)
    tile = np.asarray(x[: min(n, 65536)], dtype=np.float32)
    w = np.empty((nq, tile.shape[0]), np.float32)
    reps = n / tile.shape[0]

    def products() -> None:
        np.matmul(q, tile.T, out=w)
        w @ tile

    t_gemm = _median(products, 3) * reps
    # the largest row norm (the stop rule's scale) is one pass of its own when the rows were not
    # written by DenseMemory.save (which records it in the manifest): timed apart from the pass
    t0 = time.perf_counter()
    _ = mapped.max_norm
    t_norm = time.perf_counter() - t0
    before = _rss_anon_mib()
    t0 = time.perf_counter()
    mapped.retrieve(q, method="exact", k=10, return_energy=False)
    t_exact = time.perf_counter() - t0
    growth = _rss_anon_mib() - before
    floor = max(t_read, t_gemm)
    return {"n": n, "d": d, "dtype": "float16", "file_gb": size / 1e9, "write_s": t_write, "read_s": t_read,
            "read_gb_per_s": size / 1e9 / t_read, "two_products_s": t_gemm, "exact_s": t_exact,
            "max_norm_pass_s": t_norm,
            "rss_anon_growth_mib": growth, "exact_over_floor": t_exact / floor}


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="rows of the in-RAM d=384 run")
    ap.add_argument("--ooc-n", type=int, default=10_000_000, help="rows of the out-of-core d=768 float16 run")
    ap.add_argument("--queries", type=int, default=1000)
    ap.add_argument("--ooc-queries", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--dir", type=Path, default=None, help="folder for the out-of-core store (default: a temp folder)")
    ap.add_argument("--out", type=Path, default=RESULTS / "wide_and_half.json")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    wide = in_ram(args.n, 384, args.queries, args.repeats, rng)
    print("in RAM d=384:", json.dumps(wide, default=float), flush=True)
    half = half_vs_full(200_000, 128, args.queries, args.repeats, rng)
    print("float16 vs float32:", json.dumps(half, default=float), flush=True)
    with tempfile.TemporaryDirectory(dir=args.dir, prefix="densemem-ooc-") as tmp:
        ooc = out_of_core(args.ooc_n, 768, args.ooc_queries, Path(tmp), rng)
    payload = {"bench": "wide_and_half", "in_ram_384": wide, "half_vs_full": half, "out_of_core_768": ooc,
               "machine": machine_facts()}
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(payload, indent=2, default=float))
    print(f"in RAM, N={wide['n']} d=384: faiss {wide['faiss_s']:.3f} s, exact {wide['exact_s']:.3f} s, "
          f"certified {wide['certified_s']:.3f} s")
    print(f"float16 vs float32 exact, N=200000 d=128: {half['float16_s']:.3f} s vs {half['float32_s']:.3f} s; "
          f"top-1 agreement {half['top1_agreement']:.4f}")
    print(f"out of core, N={ooc['n']} d=768 float16 ({ooc['file_gb']:.1f} GB): read {ooc['read_s']:.2f} s "
          f"({ooc['read_gb_per_s']:.2f} GB/s), two products {ooc['two_products_s']:.2f} s, exact {ooc['exact_s']:.2f} s, "
          f"RssAnon +{ooc['rss_anon_growth_mib']:.0f} MiB; the max-norm pass before it (rows not written by "
          f"save) {ooc['max_norm_pass_s']:.2f} s")
    print(f"ratios: exact/faiss (d=384) {wide['exact_over_faiss']:.2f}; certified/faiss {wide['certified_over_faiss']:.2f}; "
          f"float16/float32 {half['half_over_full']:.2f} (target <= 1.25); "
          f"out-of-core exact / max(read, products) {ooc['exact_over_floor']:.2f} (target <= 1.3)")
    return payload


if __name__ == "__main__":
    main()
