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
from ._pages import _CAPACITY_COLUMNS
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
    p.add_argument("--corruption", choices=["gaussian", "mask", "mix"], default="gaussian",
                   help="how the noisy queries are made from stored rows: gaussian noise, masked entries, "
                        "or a mix (default gaussian)")
    p.add_argument("--level", type=float, default=0.1, help="corruption level (default 0.1)")
    p.add_argument("--steps", type=int, default=1, help="updates per query (default 1)")
    p.add_argument("--blend-size", type=float, default=5.0, help="blend size aimed for with --target blend")
    p.add_argument("--seed", type=int, default=0, help="random seed of the noisy queries (default 0)")
    p.add_argument("--plot", help="write the sweep as a new .png file here (needs matplotlib)")
    p.add_argument("--write-beta", action="store_true",
                   help="store the chosen beta as the store's default (retrieve then uses it)")
    p.add_argument("--weighting", choices=["sparsemax", "entmax15", "entmax"],
                   help="also report the beta from which a sparse map returns each stored item exactly")
    p.add_argument("--alpha", type=float, help="alpha of --weighting entmax, in (1, 2]")
    _html_option(p)
    p.set_defaults(run=_run_tune)


def _html_target(a: argparse.Namespace, overwrite: bool = False) -> Any:
    """The --html path checked before the job runs (a new .html file unless --overwrite)."""
    if getattr(a, "html", None) is None:
        return None
    from .._html import check_html_path
    from ..errors import InputValueError

    try:
        return check_html_path(a.html, overwrite=overwrite, where="--html")
    except InputValueError as exc:
        raise SpecError(str(exc).replace("--html: `path` ", "--html ").replace("--html: ", "--html: ")
                        .replace("pass overwrite=True", "pass --overwrite")) from None


def _write_html(path: Any, text: str, overwrite: bool = False) -> str:
    from .._html import write_page

    return str(write_page(path, text, overwrite=overwrite, where="--html"))


def _html_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--html", help="also write the report as one self-contained .html file (a new file)")


def _new_png(flag: str, path: Any) -> None:
    """A plot path must be a new file named .png (the format written)."""
    if path is None:
        return
    if Path(path).suffix.lower() != ".png":
        raise SpecError(f"{flag} must name a .png file (the plot is a PNG); got {str(path)!r}.")
    if Path(path).exists():
        raise SpecError(f"{flag} must name a new file; {str(path)!r} exists.")
    if not Path(path).absolute().parent.is_dir():
        raise SpecError(f"{flag} must be in an existing folder; the folder of {str(path)!r} does not exist.")


def _run_tune(a: argparse.Namespace) -> tuple[Any, str]:
    from .. import tuning
    from ..dense import DenseMemory
    from ..errors import InputValueError
    from ._hints import collapse_hint

    values = dict(vars(a))
    values["target"] = None if a.target == "none" else a.target
    spec = make_spec(tuning.TuneSpec, values)
    _new_png("--plot", a.plot)
    html = _html_target(a)
    if a.write_beta and spec.target is None:
        raise SpecError("--write-beta needs a chosen beta; drop --target none.")
    from ..sharding import is_sharded_store as _is_sharded

    if _is_sharded(a.store):
        raise InputValueError(f"STORE: tune works on a single store; {str(a.store)!r} is a sharded store "
                              "(tune the store before sharding it, then build the shards with --beta).")
    mem = DenseMemory.load(a.store, mmap=True)
    hint = collapse_hint(mem, "build the store again with --normalize --overwrite (cosine geometry), then tune it")
    rep = tuning.tune_beta(mem, spec, progress=None if not a.quiet else False)
    data = rep.to_dict()
    data["verdict"] = tuning.verdict(rep)
    data["warnings"] = [] if hint is None else [hint]
    chosen = rep.choice.beta if rep.choice is not None and rep.choice.reached else None
    if a.plot is not None and rep.sweep is not None:
        tuning.plot_sweep(rep.sweep, a.plot, predicted_beta=rep.prediction.beta_target_separated,
                          chosen_beta=chosen)
    apply_hint = None
    if chosen is not None:
        apply_hint = (f"apply it: densemem tune {a.store} --write-beta  (stores it as the store's default beta), "
                      f"or pass --beta {chosen:.4g} to retrieve")
    data["written_beta"] = None
    if a.write_beta and chosen is not None:  # last: nothing else can fail after the store changed
        from ..store._folder import set_stored_beta

        before = set_stored_beta(a.store, float(chosen))
        data["written_beta"] = float(chosen)
        apply_hint = f"wrote beta = {chosen:.4g} into {a.store} (was {before:g}); `densemem retrieve` now uses it."
    elif a.write_beta:
        apply_hint = "nothing written: no beta met the goal."
    text = tuning.tune_text(rep, apply_hint=apply_hint, extra=[hint] if hint else None)
    if html is not None:
        from ._pages import tune_page

        data["html"] = _write_html(html, tune_page(rep, str(a.store), warnings=data["warnings"],
                                                   apply_hint=apply_hint))
        text += f"\n\nwrote {data['html']}"
    return data, text


# ------------------------------------------------------------------ dedup
def add_dedup(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "dedup", "group near-duplicates and write a keep/drop plan (nothing is removed)",
            "densemem dedup new.npy plan/ --stored archive-store --threshold 0.97")
    p.add_argument("input", help="store folder or embeddings file (.npy, .npz, .parquet, .csv, .tsv)")
    p.add_argument("out", help="folder for the plan files (groups.csv/json, keep.txt, drop.txt)")
    p.add_argument("--stored", metavar="STORE",
                   help="compare INPUT (a new batch) with this store folder and with itself; "
                        "the store is read only (a .npy batch is memory-mapped and read in chunks)")
    p.add_argument("--column", help="array/column holding the vectors (embeddings files)")
    p.add_argument("--id-column", help="array/column holding ids (embeddings files)")
    p.add_argument("--threshold", type=float, default=0.98, help="cosine similarity for a near-duplicate (0.98)")
    p.add_argument("--method", choices=["graph", "attractor"], default="graph",
                   help="graph: groups of pairs above the threshold; attractor: pairs judged by where their "
                        "retrieval ends (default graph)")
    p.add_argument("--grouping", choices=["star", "complete", "chain"], default="star",
                   help="star (default): every dropped item meets the threshold against the item kept "
                        "for it; complete: every pair in a group does; chain: connected components")
    p.add_argument("--candidates", choices=["auto", "exact", "ivf", "join", "hnsw"], default="auto",
                   help="how pairs are found: exact search, an IVF range search, a blocked self-join on an IVF "
                        "partition, or an HNSW index (default auto: by size)")
    p.add_argument("--k", type=int, default=32, help="candidate neighbours per item (default 32)")
    p.add_argument("--representative", choices=["medoid", "first"], default="medoid",
                   help="the item kept per group: the most central (medoid) or the first in input order")
    p.add_argument("--seed", type=int, default=0, help="random seed (index training, sampled checks)")
    p.add_argument("--overwrite", action="store_true", help="replace plan files already in OUT (and --html)")
    _html_option(p)
    p.set_defaults(run=_run_dedup)


def _load_batch(path: str, column: str | None, id_column: str | None) -> tuple[Any, Any]:
    """A new batch: a .npy file memory-mapped (read in chunks later), other files read whole."""
    p = Path(path)
    if p.suffix.lower() == ".npy" and p.is_file() and column is None and id_column is None:
        import numpy as np

        arr = np.load(p, mmap_mode="r", allow_pickle=False)
        return arr, None
    return _load_data(path, column, id_column)


def _run_dedup(a: argparse.Namespace) -> tuple[Any, str]:
    from ..duplicates._find import DedupSpec

    values = {k: v for k, v in vars(a).items() if k not in ("stored", "html")}
    spec = make_spec(DedupSpec, values)
    html = _html_target(a, overwrite=a.overwrite)
    stored = None
    if a.stored is not None:
        from ..dense import DenseMemory

        if not Path(a.stored).is_dir():
            raise SpecError(f"--stored must name a store folder; got {a.stored!r}.")
        stored = DenseMemory.load(a.stored, mmap=True)
        data, ids = _load_batch(a.input, a.column, a.id_column)
    else:
        data, ids = _load_data(a.input, a.column, a.id_column)
    plan = spec.run(data, ids=ids, progress=None if not a.quiet else False, stored=stored)
    files = plan.write(a.out, overwrite=a.overwrite)
    s = plan.summary()
    low = s["lowest_kept_similarity"]
    cols = ["items", "groups", "keep", "drop", "threshold", "grouping", "lowest kept sim", "candidates"]
    row = [s["n_items"], s["n_groups"], s["n_keep"], s["n_drop"], s["threshold"], s["grouping"],
           "-" if low is None else f"{low:.4f}", s["candidates"]]
    if stored is not None:
        cols.insert(4, "of stored")
        row.insert(4, s["n_duplicates_of_stored"])
    text = out.table(cols, [row], title=f"near-duplicates -> {a.out}")
    if html is not None:
        from ._pages import dedup_page

        files["html"] = _write_html(html, dedup_page(plan, str(a.input), str(a.out)), overwrite=a.overwrite)
        text += f"\n\nwrote {files['html']}"
    return {"summary": s, "files": files}, text


# --------------------------------------------------------------- capacity
def add_capacity(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    p = sub(subs, "capacity", "measure how many patterns each memory model stores, by dimension",
            "densemem capacity --models hebbian storkey --dims 25 50 --n-trials 3 --csv capacity.csv")
    p.add_argument("--models", nargs="+", default=["hebbian", "storkey", "pseudo_inverse"],
                   help="models, e.g. hebbian storkey pseudo_inverse softmax:50")
    p.add_argument("--dims", nargs="+", type=int, default=[25, 50, 100, 200],
                   help="pattern dimensions (units N) to measure, each >= 2 (default 25 50 100 200)")
    p.add_argument("--patterns", choices=["pm1", "unit", "gaussian"], default="pm1",
                   help="random patterns: pm1 (+-1 entries), unit (unit vectors) or gaussian (default pm1)")
    p.add_argument("--corruption", help="query corruption, e.g. flip:0.1, mask:0.25, gaussian:0.5")
    p.add_argument("--n-trials", type=int, default=5,
                   help="independent pattern sets per count, pooled (default 5)")
    p.add_argument("--max-patterns", type=int, default=4096,
                   help="search cap: the largest pattern count tried (default 4096)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--csv", dest="csv_path", help="also write the table as CSV (new file)")
    p.add_argument("--json-out", dest="json_path", help="also write the table as JSON (new file)")
    p.add_argument("--plot", dest="plot_path", help="also draw the curve as PNG (new .png file)")
    _html_option(p)
    p.set_defaults(run=_run_capacity)


def _run_capacity(a: argparse.Namespace) -> tuple[Any, str]:
    from .. import capacity
    spec = make_spec(capacity.CapacitySpec, vars(a))
    for flag, path in (("--csv", spec.csv_path), ("--json-out", spec.json_path)):
        if path is not None and Path(path).exists():
            raise SpecError(f"{flag} must name a new file; {path!r} exists.")
    _new_png("--plot", spec.plot_path)
    html = _html_target(a)
    curve = capacity.capacity_curve(spec.models, spec.dims, csv_path=spec.csv_path, json_path=spec.json_path,
                                    progress=None if not a.quiet else False, **spec.curve_options())
    if spec.plot_path is not None:
        capacity.plot_capacity(curve, spec.plot_path)
    rows = curve.rows()
    data: dict[str, Any] = {"rows": rows}
    text = capacity_table(rows)
    if html is not None:
        from ._pages import capacity_page

        data["html"] = _write_html(html, capacity_page(curve))
        text += f"\n\nwrote {data['html']}"
    return data, text


#: Capacity table columns: (row key, heading).


def capacity_table(rows: list[dict[str, Any]]) -> str:
    """The capacity table as text: a capped search shows ">= N (cap)", never a bare N."""
    cells = []
    for r in rows:
        line = [r[k] for k, _ in _CAPACITY_COLUMNS]
        if r["capped"]:
            line[2] = f">= {r['capacity']} (cap)"
        cells.append(line)
    text = out.table([h for _, h in _CAPACITY_COLUMNS], cells, title="capacity")
    notes = ["success = share of probes that passed the success test; ci = its confidence interval."]
    if any(r["capped"] for r in rows):
        notes.append(">= N (cap): every count up to the search cap passed, so the capacity is at least N "
                     "(raise the cap to measure it).")
    return text + "\n\n" + "\n".join(notes)


# ------------------------------------------------------------------ bench
_BENCH_QUICK = {"n": 2000, "n_queries": 100, "dim": 64, "repeats": 1, "warmup": 0,
                "ef_search": [16, 64], "nprobe": [4, 16]}
_BENCH_FLAGS = {"--n-queries": "--queries", "--ks": "--k", "--queries": "--query-file",
                "--include-binary": "--binary", "--column": "--column", "--weightings": "--weighting"}


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
    p.add_argument("--weighting", nargs="+", choices=["softmax", "sparsemax", "entmax15", "entmax"],
                   help="normalising maps of the densemem rows (default softmax); sparse rows report their support")
    p.add_argument("--alpha", type=float, help="alpha of --weighting entmax, in (1, 2]")
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
    p.add_argument("--quick", action="store_true",
                   help="a tiny run: 100 queries, 1 repeat; N 1000 and 2000 of generated data, all rows of a file")
    p.add_argument("--out", help="folder for bench.json and the PNG plots")
    p.add_argument("--no-plots", dest="plots", action="store_false", help="skip the PNG plots")
    p.add_argument("--overwrite", action="store_true", help="replace bench files already in --out (and --html)")
    _html_option(p)
    p.set_defaults(run=_run_bench)


def _run_bench(a: argparse.Namespace) -> tuple[Any, str]:
    from .. import benchmark
    names = {"queries": "n_queries", "query_file": "queries", "k": "ks", "binary": "include_binary",
             "weighting": "weightings"}
    html = _html_target(a, overwrite=a.overwrite)
    values = {names.get(k, k): v for k, v in vars(a).items() if v is not None and k != "html"}
    if a.quick:
        generated = a.dataset in ("unit", "clustered")
        quick = _BENCH_QUICK if generated else {k: v for k, v in _BENCH_QUICK.items() if k not in ("n", "dim")}
        values = {**quick, **values}  # a file or bundled set keeps its own rows and width
        if generated and a.n is None and a.sizes is None and not a.scaling:
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
    data = rep.to_dict()
    if html is not None:
        from ._pages import bench_page

        data["html"] = _write_html(html, bench_page(rep, plots=a.plots), overwrite=a.overwrite)
        text += f"\nwrote {data['html']}"
    return data, text


ADDERS: list[tuple[str, Callable[..., None]]] = [
    ("tuning", add_tune), ("duplicates", add_dedup), ("capacity", add_capacity),
    ("benchmark", add_bench),
]


def register(subs: Any, sub: Callable[..., argparse.ArgumentParser]) -> None:
    """Add every job subcommand whose module is present."""
    for module, add in ADDERS:
        if _has(module):
            add(subs, sub)
