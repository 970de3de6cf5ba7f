"""The ``densemem`` command: parse -> spec -> library call -> print.

Every subcommand takes ``--json`` (machine-readable output on stdout),
``--quiet`` (no progress bars) and ``--debug`` (tracebacks). Exit codes: 0 ok,
1 failure (bad file, damaged store, ...), 2 usage (bad option or value).

Examples
--------
>>> from densemem.cli import main
>>> main(["info", "--help"])  # doctest: +SKIP
"""

from __future__ import annotations

import argparse
import contextlib
import re
import sys
import traceback
import warnings
from typing import Any, Iterator, Sequence

import numpy as np

from . import _output as out
from ._specs import BuildSpec, DemoSpec, InfoSpec, NearestSpec, RebalanceSpec, RetrieveSpec, SpecError, make_spec
from ..errors import DenseMemError, InputValueError

__all__ = ["main", "build_parser"]

PROG = "densemem"


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line usage error (exit 2) instead of the usage block."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message} (see {self.prog} --help)\n")
        raise SystemExit(2)


def _common() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("output")
    g.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    g.add_argument("-q", "--quiet", action="store_true", help="no progress bars on stderr")
    g.add_argument("--debug", action="store_true", help="show a traceback when something fails")
    return p


def _sub(subs: Any, name: str, help_: str, example: str) -> argparse.ArgumentParser:
    return subs.add_parser(
        name,
        help=help_,
        description=help_,
        epilog=f"example:\n  {example}",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        parents=[_common()],
    )


def _query_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("store", help="store folder written by `densemem build`")
    p.add_argument("queries", help="query vectors: .npy, .npz, .parquet, .csv or .tsv")
    p.add_argument("--column", help="array (.npz) or column (.parquet) holding the query vectors")
    p.add_argument("--id-column", help="array or column holding query names (shown in the output)")
    p.add_argument("-k", "--k", type=int, help="stored items to list per query (default 10, or all when fewer)")
    p.add_argument("--mmap", action="store_true", help="memory-map the store instead of reading it")
    p.add_argument("--chunk", type=int, default=4096, help="queries per library call (default 4096)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="sharded store: run on this Dask scheduler, e.g. tcp://host:8786 (needs densemem[dist])")
    p.add_argument("--retries", type=int, default=2, help="with --scheduler: Dask retries per shard task (default 2)")
    p.add_argument("--timeout", type=float, help="with --scheduler: give up after this many seconds")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``densemem`` command (every subcommand)."""
    from .._version import __version__
    parser = _Parser(
        prog=PROG,
        description="Dense associative memory retrieval from the shell.",
        epilog="example:\n  densemem build vectors.npy store/ && densemem retrieve store/ queries.npy --beta 8",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"densemem {__version__}")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    subs.required = True

    p = _sub(subs, "build", "read an embeddings file and write a store folder",
             "densemem build photos.parquet archive-store --id-column photo --normalize --beta 12")
    p.add_argument("input", help="embeddings: .npy, .npz, .parquet, .csv or .tsv")
    p.add_argument("store", help="store folder to write (its parent must exist)")
    p.add_argument("--column", help="array (.npz) or column (.parquet) holding the vectors")
    p.add_argument("--id-column", help="array / column / csv header (or 0-based number) holding ids")
    p.add_argument("--normalize", action="store_true", help="L2-normalize patterns and queries (cosine geometry)")
    p.add_argument("--beta", type=float, default=1.0, help="default inverse temperature (default 1.0)")
    p.add_argument("--index", choices=["hnsw", "ivf"], help="also build and store a candidate index")
    p.add_argument("--overwrite", action="store_true", help="replace an existing store at STORE")
    p.add_argument("--shards", type=int, help="split into this many shard folders (a sharded store)")
    p.add_argument("--shard-by", choices=["round_robin", "contiguous"], default="round_robin",
                   help="how rows go to shards (default round_robin)")
    p.add_argument("--dtype", choices=["float32", "float16"], default="float32",
                   help="keep the rows as float32 (default) or float16 (half the bytes; the rounding is reported)")
    p.set_defaults(run=_run_build)

    p = _sub(subs, "info", "describe a store folder and check its files", "densemem info archive-store --json")
    p.add_argument("store", help="store folder")
    p.add_argument("--no-verify", dest="verify", action="store_false", help="skip the sha256 checks")
    p.set_defaults(run=_run_info)

    p = _sub(subs, "rebalance", "split and merge the shards of a sharded store to a target count or size",
             "densemem rebalance archive-shards --shards 8")
    p.add_argument("store", help="sharded store folder written by `densemem build --shards`")
    size = p.add_mutually_exclusive_group(required=True)
    size.add_argument("--shards", type=int, help="the number of shards to end with")
    size.add_argument("--rows", type=int, help="about this many rows per shard")
    p.set_defaults(run=_run_rebalance)

    p = _sub(subs, "retrieve", "retrieve stored patterns by the softmax update",
             "densemem retrieve archive-store queries.npy --beta 20 --steps 3 -k 5 --json")
    _query_options(p)
    p.add_argument("--beta", type=float, help="inverse temperature (default: the store's)")
    p.add_argument("--steps", type=int, default=1, help="most updates per query (default 1)")
    p.add_argument("--tol", type=float, default=1e-6, help="stop when a state moves by <= tol * max norm")
    p.add_argument("--method", choices=["auto", "exact", "certified", "index"], default="auto",
                   help="retrieval path (default auto)")
    p.add_argument("--states-out", help="write the retrieved states to this new .npy file")
    p.add_argument("--measure", action="store_true",
                   help="with --method index: also report the candidate recall against exact search")
    p.add_argument("--weighting", default="softmax",
                   help="normalising map: softmax (default), sparsemax, entmax15, or a number alpha in (1, 2] "
                        "for alpha-entmax; the sparse maps give exact zero weight outside a short support")
    p.set_defaults(run=_run_retrieve)

    p = _sub(subs, "nearest", "exact nearest stored patterns (faiss brute force, or the stored index)",
             "densemem nearest archive-store queries.npy -k 3 --metric ip")
    _query_options(p)
    p.add_argument("--metric", choices=["ip", "l2"], default="ip", help="inner product or squared L2 (default ip)")
    p.add_argument("--index", action="store_true", help="search the store's candidate index (approximate)")
    p.set_defaults(run=_run_nearest)

    p = _sub(subs, "demo", "run the invented photo-archive scenario and write a report folder",
             "densemem demo --out densemem-demo")
    p.add_argument("--out", default="densemem-demo", help="report folder (default ./densemem-demo)")
    p.add_argument("--photos", type=int, default=4000, help="invented photos in the archive (default 4000)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--no-plots", dest="plots", action="store_false", help="skip the PNG plots")
    p.add_argument("--overwrite", action="store_true", help="write into OUT even when it holds files")
    p.set_defaults(run=_run_demo)

    from ._jobs import register

    register(subs, _sub)
    return parser


# ---------------------------------------------------------------- commands
Result = tuple[Any, str]


def _run_build(a: argparse.Namespace) -> Result:
    from ..dense import DenseMemory
    from ..store._readers import read_embeddings
    from ._hints import collapse_hint

    s = make_spec(BuildSpec, vars(a), positional=("input", "store"))
    emb = read_embeddings(s.input, column=s.column, id_column=s.id_column)
    if s.shards is not None and s.shards > emb.vectors.shape[0]:
        raise SpecError(f"--shards must be at most the number of rows ({emb.vectors.shape[0]} in "
                        f"{str(s.input)!r}) so that no shard is empty; got {s.shards}.")
    mem = DenseMemory.from_array(emb.vectors, emb.ids, normalize=s.normalize, beta=s.beta, dtype=s.dtype)
    hint = collapse_hint(mem, "build again with --normalize --overwrite (cosine geometry)")
    if s.shards is not None:
        from ..sharding._memory import shard_memory

        sm = shard_memory(mem, s.store, s.shards, by=s.shard_by, overwrite=s.overwrite)
        index = sm.build_index(s.index) if s.index else None
        data = {"store": str(s.store), "source": emb.to_dict(), "count": len(mem), "dim": mem.dim,
                "normalize": mem.normalize, "beta": mem.beta, "shards": s.shards, "shard_by": s.shard_by,
                "index": index}
        text = out.table(["store", "patterns", "dim", "normalize", "beta", "shards"],
                         [[str(s.store), len(mem), mem.dim, mem.normalize, mem.beta, s.shards]],
                         title=f"built from {emb.source} ({emb.kind})")
    else:
        index = mem.build_index(s.index) if s.index else None
        mem.save(s.store, overwrite=s.overwrite)
        data = {"store": str(s.store), "source": emb.to_dict(), "count": len(mem), "dim": mem.dim,
                "normalize": mem.normalize, "beta": mem.beta, "index": index}
        text = out.table(["store", "patterns", "dim", "normalize", "beta", "index"],
                         [[str(s.store), len(mem), mem.dim, mem.normalize, mem.beta, s.index]],
                         title=f"built from {emb.source} ({emb.kind})")
    data["dtype"] = mem.dtype
    if mem.rounding is not None:
        r = mem.rounding
        data["rounding"] = r.to_dict()
        text += (f"\n\nfloat16 rounding moved the rows by at most {r.max_distance:.3g} (mean {r.mean_distance:.3g}); "
                 f"largest cosine change {r.max_cosine_change:.3g}.")
    data["warnings"] = [] if hint is None else [hint]
    return data, text if hint is None else f"{text}\n\n{hint}"


def _run_info(a: argparse.Namespace) -> Result:
    from ..store._folder import describe_store

    s = make_spec(InfoSpec, vars(a), positional=("store",))
    if _is_sharded(s.store):
        from ..sharding._memory import open_sharded

        sinfo = open_sharded(s.store, verify=s.verify).describe().to_dict()
        rows = [[k, v] for k, v in sinfo.items() if not isinstance(v, (list, dict))]
        return sinfo, out.table(["field", "value"], rows, title=f"sharded store {s.store}")
    info = describe_store(s.store, verify=s.verify)
    rows = [[name, e.get("bytes"), e.get("sha256", "")[:16]] for name, e in sorted(info.files.items())]
    head = out.table(
        ["store", "patterns", "dim", "normalize", "beta", "ids", "index", "checksums"],
        [[info.path, info.count, info.dim, info.normalize, info.beta, info.id_kind,
          (info.index or {}).get("meta", {}).get("settings", {}).get("kind", "yes") if info.index else None,
          "verified" if info.verified else "not checked"]],
    )
    return info.to_dict(), head + "\n\n" + out.table(["file", "bytes", "sha256 (first 16)"], rows)


def _run_rebalance(a: argparse.Namespace) -> Result:
    from ..sharding import open_sharded

    s = make_spec(RebalanceSpec, vars(a), positional=("store",))
    if not _is_sharded(s.store):
        raise SpecError(f"STORE: {str(s.store)!r} is not a sharded store (build one with --shards).")
    sm = open_sharded(s.store)
    before = sm.counts
    sm.rebalance(n_shards=s.shards, rows_per_shard=s.rows)
    data = {"store": str(s.store), "counts_before": list(before), "counts_after": list(sm.counts)}
    text = out.table(["store", "shards before", "shards after", "rows per shard"],
                     [[str(s.store), len(before), sm.n_shards, f"{min(sm.counts)}-{max(sm.counts)}"]],
                     title="rebalance")
    return data, text


def _is_sharded(store: Any) -> bool:
    from ..sharding import is_sharded_store

    return is_sharded_store(store)


@contextlib.contextmanager
def _opened(s: Any) -> Iterator[tuple[Any, np.ndarray, list[Any]]]:
    """(memory, queries, query names): the store of either kind, on the cluster when asked (one client)."""
    from ..sharding import open_store
    from ..store._readers import read_embeddings

    mem = open_store(s.store, mmap=s.mmap)
    emb = read_embeddings(s.queries, column=s.column, id_column=s.id_column)
    if emb.vectors.shape[0] == 0:
        raise InputValueError(f"QUERIES: {str(s.queries)!r} holds no query vectors (0 rows); "
                              "give a file with at least one row.")
    names = emb.ids.tolist() if emb.ids is not None else list(range(emb.vectors.shape[0]))
    if not s.scheduler:
        yield mem, emb.vectors, names
        return
    if not hasattr(mem, "on_cluster"):
        raise SpecError(f"--scheduler needs a sharded store (built with --shards); {str(s.store)!r} is a single store.")
    with mem.on_cluster(s.scheduler, retries=s.retries, timeout=s.timeout) as cluster:
        yield cluster, emb.vectors, names


def _run_retrieve(a: argparse.Namespace) -> Result:
    s = make_spec(RetrieveSpec, vars(a), positional=("store", "queries"))
    if s.states_out is not None and (s.states_out.exists() or s.states_out.suffix != ".npy"):
        raise SpecError(f"--states-out must name a new .npy file; got {str(s.states_out)!r}.")
    with _opened(s) as (mem, q, names):
        r = mem.retrieve(q, s.beta, steps=s.steps, tol=s.tol, k=s.k, method=s.method, batch_size=s.chunk,
                         measure=bool(s.measure), **_weighting(s.weighting))
    if s.states_out is not None:
        np.save(s.states_out, r.states, allow_pickle=False)
    rows, recs = [], []
    for j, name in enumerate(names):
        energy = None if r.energy is None else float(r.energy[j])
        recs.append({"query": name, "top_ids": r.top_ids[j], "top_weights": r.top_weights[j],
                     "energy": energy, "converged": bool(r.converged[j]), "steps": r.steps})
        if r.support_size is not None:
            recs[-1]["support_size"] = int(r.support_size[j])
        for key in ("mass_bound", "state_bound", "fell_back", "k_used"):  # certified / auto / index facts
            val = getattr(r, key)
            if val is not None:
                recs[-1][key] = val[j].item()
        rows.append([name, _tops(r.top_ids[j], r.top_weights[j]), energy, bool(r.converged[j])])
    data = {"store": str(s.store), "beta": r.beta, "method": r.method, "queries": recs,
            "states_out": None if s.states_out is None else str(s.states_out)}
    if r.method == "index":
        data["weights_over"] = "the index's candidates (renormalized over them; rows it missed carry no weight)"
        data["candidate_recall"] = r.candidate_recall
    text = out.table(["query", "top ids (weight)", "energy", "converged"], rows,
                     title=f"retrieve: beta={r.beta:g}, steps<={s.steps}, method={r.method}")
    return data, text


def _weighting(value: str) -> dict[str, object]:
    """--weighting: a map name, or a number (alpha of alpha-entmax); the library checks both."""
    try:
        return {"weighting": "entmax", "alpha": float(value)}
    except ValueError:
        return {"weighting": value}


def _tops(ids: np.ndarray, weights: np.ndarray, show: int = 3) -> str:
    items = [f"{i} ({w:.3f})" for i, w in zip(ids.tolist()[:show], weights.tolist()[:show])]
    return ", ".join(items) + (" ..." if len(ids) > show else "")


def _run_nearest(a: argparse.Namespace) -> Result:
    s = make_spec(NearestSpec, vars(a), positional=("store", "queries"))
    with _opened(s) as (mem, q, names):
        r = mem.nearest(q, s.k, metric=s.metric, index=s.index, batch_size=s.chunk)
    recs = [{"query": n, "ids": i, "scores": sc} for n, i, sc in zip(names, r.ids, r.scores)]
    rows = [[n, _tops(i, sc)] for n, i, sc in zip(names, r.ids, r.scores)]
    label = "inner product" if s.metric == "ip" else "squared L2"
    text = out.table(["query", f"nearest ids ({label})"], rows, title=f"nearest: k={r.ids.shape[1]}")
    return {"store": str(s.store), "metric": s.metric, "queries": recs}, text


def _run_demo(a: argparse.Namespace) -> Result:
    from .demo import run_demo

    s = make_spec(DemoSpec, vars(a))
    report = run_demo(s.out, n_photos=s.photos, seed=s.seed, plots=s.plots, quiet=a.quiet, overwrite=s.overwrite)
    return report.to_dict(), report.summary_text()


# -------------------------------------------------------------------- main
def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``densemem`` command; return its exit code (0 ok, 1 failure, 2 usage)."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    prog = f"{PROG} {args.command}"
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _show_warning(prog)
            data, text = args.run(args)
    except SpecError as exc:
        sys.stderr.write(f"{prog}: error: {exc}\n")
        if args.debug:
            traceback.print_exc()
        return 2
    except (DenseMemError, OSError, ValueError) as exc:
        if args.debug:
            traceback.print_exc()
        usage = _as_usage(parser, args, argv, exc)
        if usage is not None:  # the library refused a value the user gave as an option
            sys.stderr.write(f"{prog}: error: {usage}\n")
            return 2
        sys.stderr.write(f"{prog}: error: {as_flags(_one_line(exc))}\n")
        return 1
    except KeyboardInterrupt:
        sys.stderr.write(f"{prog}: interrupted\n")
        return 130
    except Exception as exc:  # a bug, not a user error: still one line unless --debug
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"{prog}: internal error: {type(exc).__name__}: {_one_line(exc)} (rerun with --debug)\n")
        return 1
    sys.stdout.write((out.to_json(data) if args.json else text) + "\n")
    return 0


_ARG_ERROR = re.compile(r"^[\w.]+: `(\w+)` (.*)$", re.S)


def _as_usage(parser: argparse.ArgumentParser, args: argparse.Namespace, argv: Sequence[str] | None,
              exc: BaseException) -> str | None:
    """``--flag <reason>`` when ``exc`` is the library refusing an argument the user gave as an option, else None.

    The library names its argument (``DenseMemory.retrieve: `k` must be ...``); when that name is an
    option of this command and the option is on the command line, the error is a usage error. A refusal
    to replace existing files stays a failure (exit 1), the same for every writer.
    """
    from ..errors import InputTypeError, InputValueError

    if not isinstance(exc, (InputValueError, InputTypeError)):
        return None
    m = _ARG_ERROR.match(_one_line(exc))
    if m is None or "overwrite" in m.group(2):  # refusing to replace files is a failure (1), as in build
        return None
    name, reason = m.groups()
    given = list(sys.argv[1:] if argv is None else argv)
    sub = next((a.choices[args.command] for a in parser._actions
                if isinstance(a, argparse._SubParsersAction) and args.command in a.choices), None)
    for action in [] if sub is None else sub._actions:
        if action.dest == name and action.option_strings:
            used = [o for o in action.option_strings if any(g == o or g.startswith(o + "=") for g in given)]
            if used:
                sep = " " if reason.startswith(("must", "applies", "is ", "needs", "cannot")) else ": "
                return f"{max(action.option_strings, key=len)}{sep}{reason}"
    return None


def _show_warning(prog: str) -> Any:
    """``warnings.showwarning`` for the command: one line, no source path or line number."""

    def show(message: Any, category: Any, filename: Any, lineno: Any, file: Any = None, line: Any = None) -> None:
        sys.stderr.write(f"{prog}: warning: {message}\n")

    return show


#: Library wording -> the command's flags, for errors raised below the command line.
_AS_FLAGS = (
    (re.compile(r" and overwrite=False; pass overwrite=True to replace it"), "; pass --overwrite to replace it"),
    (re.compile(r"pass overwrite=True"), "pass --overwrite"),
    (re.compile(r"call build_index\('hnsw'\) or build_index\('ivf'\) first"),
     "rebuild the store with `densemem build ... --index hnsw` (or ivf)"),
)


def as_flags(message: str) -> str:
    """An error message of the library reworded with the command's flags instead of keyword arguments.

    Examples
    --------
    >>> as_flags("x exists; pass overwrite=True to replace it.")
    'x exists; pass --overwrite to replace it.'
    """
    for pattern, flag in _AS_FLAGS:
        message = pattern.sub(flag, message)
    return message


def _one_line(exc: BaseException) -> str:
    msg = str(exc).strip().splitlines()
    return (msg[0] if msg else type(exc).__name__) + ("" if len(msg) <= 1 else " ...")


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
