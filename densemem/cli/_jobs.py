"""``densemem tune`` / ``dedup`` / ``capacity``: thin wrappers over the job modules.

Each ``add_*`` registers its subcommand only when its job module imports, so a
missing module leaves no stub command behind. Options map onto the job
module's own pydantic spec (TuneSpec, DedupSpec, CapacitySpec).
"""

from __future__ import annotations

import argparse
import importlib.util
from pathlib import Path
from typing import Any, Callable

from . import _output as out
from ._specs import SpecError, make_spec

__all__ = ["ADDERS"]


def _has(module: str) -> bool:
    """Whether ``densemem.<module>`` exists (found without importing it: startup stays fast)."""
    return importlib.util.find_spec(f"densemem.{module}") is not None


def _load_data(path: str, column: str | None, id_column: str | None) -> tuple[Any, Any]:
    """A store folder (its memory) or an embeddings file (vectors and ids)."""
    p = Path(path)
    if p.is_dir():
        from ..dense import DenseMemory

        return DenseMemory.load(p, mmap=True), None
    from ..store._readers import read_embeddings

    emb = read_embeddings(p, column=column, id_column=id_column)
    return emb.vectors, emb.ids


# ------------------------------------------------------------------- tune
def add_tune(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "tune", "choose beta for a store: separation, predicted beta, a measured sweep",
            "densemem tune archive-store --target sharp --n-betas 15 --plot sweep.png")
    p.add_argument("store", help="store folder")
    p.add_argument("--target", choices=["sharp", "blend", "none"], default="sharp",
                   help="what the automatic choice aims for (default sharp; none: sweep only)")
    p.add_argument("--n-betas", type=int, default=25, help="betas in the sweep (default 25)")
    p.add_argument("--n-queries", type=int, default=256, help="generated noisy queries (default 256)")
    p.add_argument("--corruption", choices=["gaussian", "mask", "mix"], default="gaussian")
    p.add_argument("--level", type=float, default=0.1, help="corruption level (default 0.1)")
    p.add_argument("--steps", type=int, default=1, help="updates per query (default 1)")
    p.add_argument("--blend-size", type=float, default=5.0, help="blend size aimed for with --target blend")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--plot", help="write the sweep as a PNG here (needs matplotlib)")
    p.set_defaults(run=_run_tune)


def _run_tune(a: argparse.Namespace) -> tuple[Any, str]:
    from ..tuning import _tune as tuning
    from ..dense import DenseMemory

    values = dict(vars(a))
    values["target"] = None if a.target == "none" else a.target
    spec = make_spec(tuning.TuneSpec, values)
    if a.plot is not None and Path(a.plot).exists():
        raise SpecError(f"--plot must name a new file; {a.plot!r} exists.")
    rep = tuning.tune_beta(DenseMemory.load(a.store, mmap=True), spec)
    if a.plot is not None and rep.sweep is not None:
        tuning.plot_sweep(rep.sweep, a.plot, predicted_beta=rep.prediction.beta_target_separated,
                          chosen_beta=rep.choice.beta if rep.choice else None)
    return rep.to_dict(), tuning.format_report(rep)


# ------------------------------------------------------------------ dedup
def add_dedup(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "dedup", "group near-duplicates and write a keep/drop plan (nothing is removed)",
            "densemem dedup archive-store plan/ --threshold 0.97 --no-chaining star")
    p.add_argument("input", help="store folder or embeddings file (.npy, .npz, .parquet, .csv, .tsv)")
    p.add_argument("out", help="folder for the plan files (groups.csv/json, keep.txt, drop.txt)")
    p.add_argument("--column", help="array/column holding the vectors (embeddings files)")
    p.add_argument("--id-column", help="array/column holding ids (embeddings files)")
    p.add_argument("--threshold", type=float, default=0.98, help="cosine similarity for a near-duplicate (0.98)")
    p.add_argument("--method", choices=["graph", "attractor"], default="graph")
    p.add_argument("--candidates", choices=["auto", "exact", "ivf", "hnsw"], default="auto")
    p.add_argument("--k", type=int, default=32, help="candidate neighbours per item (default 32)")
    p.add_argument("--no-chaining", choices=["off", "star", "complete"], default="off")
    p.add_argument("--representative", choices=["medoid", "first"], default="medoid")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--overwrite", action="store_true", help="replace plan files already in OUT")
    p.set_defaults(run=_run_dedup)


def _run_dedup(a: argparse.Namespace) -> tuple[Any, str]:
    from ..duplicates._find import DedupSpec

    spec = make_spec(DedupSpec, vars(a))
    data, ids = _load_data(a.input, a.column, a.id_column)
    plan = spec.run(data, ids=ids, progress=None if not a.quiet else False)
    files = plan.write(a.out, overwrite=a.overwrite)
    s = plan.summary()
    text = out.table(["items", "groups", "keep", "drop", "threshold", "candidates"],
                     [[s["n_items"], s["n_groups"], s["n_keep"], s["n_drop"], s["threshold"], s["candidates"]]],
                     title=f"near-duplicates -> {a.out}")
    return {"summary": s, "files": files}, text


# --------------------------------------------------------------- capacity
def add_capacity(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "capacity", "measure how many patterns each memory model stores, by dimension",
            "densemem capacity --models hebbian storkey --dims 25 50 --n-trials 3 --csv capacity.csv")
    p.add_argument("--models", nargs="+", default=["hebbian", "storkey", "pseudo_inverse"],
                   help="models, e.g. hebbian storkey pseudo_inverse softmax:50")
    p.add_argument("--dims", nargs="+", type=int, default=[25, 50, 100, 200])
    p.add_argument("--patterns", choices=["pm1", "unit", "gaussian"], default="pm1")
    p.add_argument("--corruption", help="query corruption, e.g. flip:0.1, mask:0.25, gaussian:0.5")
    p.add_argument("--n-trials", type=int, default=5)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--csv", dest="csv_path", help="also write the table as CSV (new file)")
    p.add_argument("--json-out", dest="json_path", help="also write the table as JSON (new file)")
    p.add_argument("--plot", dest="plot_path", help="also draw the curve as PNG (new file)")
    p.set_defaults(run=_run_capacity)


def _run_capacity(a: argparse.Namespace) -> tuple[Any, str]:
    from ..capacity import _measure as capacity
    spec = make_spec(capacity.CapacitySpec, vars(a))
    for flag, path in (("--csv", spec.csv_path), ("--json-out", spec.json_path), ("--plot", spec.plot_path)):
        if path is not None and Path(path).exists():
            raise SpecError(f"{flag} must name a new file; {path!r} exists.")
    curve = capacity.capacity_curve(spec.models, spec.dims, csv_path=spec.csv_path, json_path=spec.json_path,
                                    progress=None if not a.quiet else False, **spec.curve_options())
    if spec.plot_path is not None:
        capacity.plot_capacity(curve, spec.plot_path)
    rows = curve.rows()
    keys = list(rows[0]) if rows else []
    shown = [k for k in keys if not isinstance(rows[0][k], (list, dict))][:8]
    return {"rows": rows}, out.table(shown, [[r[k] for k in shown] for r in rows], title="capacity")


# ------------------------------------------------------------------ bench
_BENCH_QUICK = {"n": 2000, "n_queries": 100, "dim": 64, "repeats": 1, "warmup": 0,
                "ef_search": [16, 64], "nprobe": [4, 16]}
_BENCH_FLAGS = {"--n-queries": "--queries", "--ks": "--k", "--queries": "--query-file",
                "--include-binary": "--binary", "--column": "--column"}


def add_bench(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "bench", "time and score densemem retrieval beside faiss Flat/HNSW/IVF on the same data",
            "densemem bench --dataset clustered --n 100000 --betas 8 64 --out bench-results")
    p.add_argument("--dataset", default="clustered",
                   help="unit, clustered, digits, or an embeddings file (.npy .npz .parquet .csv .tsv)")
    p.add_argument("--column", help="array/column of the vectors (embeddings files)")
    p.add_argument("--query-file", help="queries from this file instead of corrupted stored rows")
    p.add_argument("--query-column", help="array/column of the query vectors")
    p.add_argument("--n", type=int, help="stored rows (default 10000 for generated data, all for files)")
    p.add_argument("--dim", type=int, help="dimension of generated data (default 128)")
    p.add_argument("--queries", type=int, help="number of generated queries (default 1000)")
    p.add_argument("--corruption", choices=["gaussian", "mask"], help="query corruption (default gaussian)")
    p.add_argument("--level", type=float, help="noise norm / stored norm, or masked fraction (default 0.5)")
    p.add_argument("--k", nargs="+", type=int, help="recall@k for these k (default 1 10)")
    p.add_argument("--betas", nargs="+", type=float, help="inverse temperatures (default 8 64)")
    p.add_argument("--ef-search", nargs="+", type=int, help="HNSW efSearch values (default 16 64 256)")
    p.add_argument("--nprobe", nargs="+", type=int, help="IVF nprobe values (default 4 16 64)")
    p.add_argument("--methods", nargs="+", help="subset of faiss-flat faiss-hnsw faiss-ivf exact certified "
                   "auto index-hnsw index-ivf (default all)")
    p.add_argument("--binary", action="store_true", help="add sign-quantised data and the binary memories")
    p.add_argument("--binary-models", nargs="+", help="binary memories (default hebbian exponential)")
    p.add_argument("--repeats", type=int, help="timed calls per row, median kept (default 5)")
    p.add_argument("--warmup", type=int, help="untimed calls before timing (default 1)")
    p.add_argument("--batch-size", type=int, help="queries per call (default: all in one call)")
    p.add_argument("--seed", type=int, help="random seed (default 0)")
    p.add_argument("--sizes", nargs="+", type=int, help="scaling run over these N")
    p.add_argument("--scaling", action="store_true", help="scaling run over N = 10k, 100k (1M with --large)")
    p.add_argument("--large", action="store_true", help="allow N above 200k (adds 1M to --scaling)")
    p.add_argument("--no-normalize", dest="normalize", action="store_false", help="keep raw norms")
    p.add_argument("--quick", action="store_true", help="a tiny run (N 1000 and 2000, 100 queries, 1 repeat)")
    p.add_argument("--out", help="folder for bench.json and the PNG plots")
    p.add_argument("--no-plots", dest="plots", action="store_false", help="skip the PNG plots")
    p.add_argument("--overwrite", action="store_true", help="replace bench files already in --out")
    p.set_defaults(run=_run_bench)


def _run_bench(a: argparse.Namespace) -> tuple[Any, str]:
    from ..benchmark import _run as benchmark
    names = {"queries": "n_queries", "query_file": "queries", "k": "ks", "binary": "include_binary"}
    values = {names.get(k, k): v for k, v in vars(a).items() if v is not None}
    if a.quick:
        values = {**_BENCH_QUICK, **values}
        if a.dataset in ("unit", "clustered") and a.n is None and a.sizes is None and not a.scaling:
            values["sizes"] = [1000, 2000]
    try:
        spec = make_spec(benchmark.BenchSpec, values)
    except SpecError as exc:
        flag, _, rest = str(exc).partition(" ")
        raise SpecError(f"{_BENCH_FLAGS.get(flag, flag)} {rest}") from None
    rep = benchmark.run_benchmark(spec, progress=None if not a.quiet else False)
    text = rep.table()
    if a.out is not None:
        files = rep.write(a.out, plots=a.plots, overwrite=a.overwrite)
        text += "\n\n" + "\n".join(f"wrote {p}" for p in files.values())
    return rep.to_dict(), text


ADDERS: list[tuple[str, Callable[..., None]]] = [
    ("tuning", add_tune), ("duplicates", add_dedup), ("capacity", add_capacity),
    ("benchmark", add_bench),
]


def register(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    """Add every job subcommand whose module is present."""
    for module, add in ADDERS:
        if _has(module):
            add(subs, sub)
