"""Benchmark densemem's retrieval against faiss's exact and approximate indexes.

:func:`run_benchmark` runs every method on the same data in one process and
returns a :class:`BenchReport`: one :class:`BenchRecord` per method, setting
and N, holding quality (recall@k against faiss ``IndexFlatIP``, the state
error against exact softmax retrieval), speed (median queries/s after a
warm-up, the batch size, the ratio to the faiss baseline of the same run),
build time and peak memory, plus the machine facts. The report prints as a
table, writes a JSON document (:class:`BenchResults`, schema
``"densemem-bench/1"``) and draws PNG plots.

Methods: faiss Flat (the ground truth), HNSW (per ``ef_search``) and IVF (per
``nprobe``); densemem "exact", "certified", "auto" and index-backed retrieval over the
same HNSW/IVF index (per ``beta``); with ``include_binary``, sign-quantised
data in faiss ``IndexBinaryFlat`` and the binary memories.

Examples
--------
>>> from densemem.benchmark import run_benchmark
>>> rep = run_benchmark(dataset="unit", n=500, dim=16, n_queries=20, betas=[30],
...                     methods=["exact"], repeats=1, warmup=0)
>>> [r.method for r in rep.records]
['faiss-flat', 'exact']
>>> rep.records[1].recall[10], rep.records[1].time_ratio > 0
(1.0, True)
"""

from __future__ import annotations

import datetime as _dt
import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from .._util import progress_bar
from ._data import load_data
from ._measure import load_average, machine_facts
from ._methods import count_rows, run_rows
from ._output import format_table, plot_recall_speed, plot_scaling
from ._spec import BenchRecord, BenchResults, BenchSpec, MachineFacts
from ..errors import InputTypeError, InputValueError



def _pydantic_message(exc: ValidationError) -> str:
    err = exc.errors()[0]
    loc = ".".join(str(p) for p in err["loc"]) or "spec"
    msg = err["msg"].replace("Value error, ", "")
    return f"`{loc}`: {msg[0].lower() + msg[1:]}; got {err.get('input')!r}"


@dataclass(frozen=True, slots=True, repr=False)
class BenchReport:
    """What :func:`run_benchmark` returns: the spec, the machine and the records.

    Attributes
    ----------
    spec : BenchSpec
        The options the run used.
    machine : MachineFacts
        CPU count, library versions, BLAS threads, load average.
    records : tuple of BenchRecord
        One per method, setting and N, in run order (faiss baselines first).
    created : str
        UTC time the run started (ISO 8601).
    """

    spec: BenchSpec
    machine: MachineFacts
    records: tuple[BenchRecord, ...]
    created: str

    def __repr__(self) -> str:
        sizes = sorted({r.n for r in self.records})
        return f"BenchReport(records={len(self.records)}, sizes={sizes}, dataset={self.spec.dataset!r})"

    def results(self) -> BenchResults:
        """The validated JSON document (spec, machine facts, records).

        Examples
        --------
        >>> from densemem.benchmark import run_benchmark
        >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
        >>> rep.results().schema_
        'densemem-bench/1'
        """
        return BenchResults(created=self.created, spec=self.spec, machine=self.machine, records=list(self.records))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict of :meth:`results` (what :meth:`write` saves).

        Examples
        --------
        >>> from densemem.benchmark import run_benchmark
        >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
        >>> sorted(rep.to_dict())
        ['created', 'machine', 'records', 'schema', 'spec']
        """
        return self.results().model_dump(mode="json", by_alias=True)

    def table(self) -> str:
        """The records as a text table, one block per N, with the machine facts on top.

        Examples
        --------
        >>> from densemem.benchmark import run_benchmark
        >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
        >>> "recall@10" in rep.table()
        True
        """
        m = self.machine
        threads = ", ".join(f"{b.get('internal_api')} {b.get('num_threads')}" for b in m.blas) or "-"
        load = " ".join(f"{v:.2f}" for v in m.load_average_start)
        title = (f"densemem bench: {m.cpu_count} CPUs ({m.usable_cpus} usable), BLAS threads: {threads}, "
                 f"faiss threads {m.faiss_omp_threads}, load {load}; median of {self.spec.repeats} after "
                 f"{self.spec.warmup} warm-up")
        ks = sorted({k for r in self.records for k in r.recall})
        return format_table(self.records, ks, title)

    def write(self, folder: Any, *, stem: str = "bench", plots: bool = True, overwrite: bool = False) -> dict[str, Path]:
        """Write ``<stem>.json`` (and the PNG plots) into ``folder`` (created if missing).

        Parameters
        ----------
        folder : str or os.PathLike
        stem : str, default "bench"
            File name stem: ``<stem>.json``, ``<stem>_recall_vs_speed.png`` and,
            for scaling runs, ``<stem>_time_vs_n.png``.
        plots : bool, default True
            Also draw the PNGs (needs matplotlib).
        overwrite : bool, default False
            Replace files of the same names; otherwise an existing one is an error.

        Returns
        -------
        dict of str to Path
            ``"json"`` and the plot names to the files written.

        Examples
        --------
        >>> import tempfile
        >>> from densemem.benchmark import run_benchmark
        >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
        >>> sorted(rep.write(tempfile.mkdtemp(), plots=False))
        ['json']
        """
        folder = Path(folder)
        names = {"json": f"{stem}.json"}
        if plots:
            names["recall_vs_speed"] = f"{stem}_recall_vs_speed.png"
            if len({r.n for r in self.records}) > 1:
                names["time_vs_n"] = f"{stem}_time_vs_n.png"
        taken = [n for n in names.values() if (folder / n).exists()]
        if taken and not overwrite:
            raise InputValueError(
                f"BenchReport.write: {taken[0]!r} already exists in {str(folder)!r}; pass overwrite=True "
                "or choose another folder."
            )
        folder.mkdir(parents=True, exist_ok=True)
        paths = {"json": folder / names["json"]}
        paths["json"].write_text(json.dumps(self.to_dict(), indent=1) + "\n")
        if plots:
            paths.update(plot_benchmark(self, folder, stem=stem))
        return paths


def plot_benchmark(report: BenchReport, folder: Any, *, stem: str = "bench") -> dict[str, Path]:
    """Draw recall@k against queries/s, and time against N for a scaling run, as PNGs.

    The recall is that of the largest k in the spec; the speed plot shows the
    largest N. Needs matplotlib (``pip install densemem[plot]``).

    Examples
    --------
    >>> import tempfile
    >>> from densemem.benchmark import run_benchmark, plot_benchmark
    >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
    >>> sorted(plot_benchmark(rep, tempfile.mkdtemp()))
    ['recall_vs_speed']
    """
    if not isinstance(report, BenchReport):
        raise InputTypeError(f"plot_benchmark: `report` must be a BenchReport; got {type(report).__name__}.")
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    k = max(k for r in report.records for k in r.recall)
    out = {"recall_vs_speed": plot_recall_speed(report.records, folder / f"{stem}_recall_vs_speed.png", k)}
    if len({r.n for r in report.records}) > 1:
        out["time_vs_n"] = plot_scaling(report.records, folder / f"{stem}_time_vs_n.png")
    return out


def load_results(source: Any) -> BenchResults:
    """Read and validate a benchmark JSON document (a path, JSON text or a dict).

    Raises
    ------
    InputValueError
        The document does not follow the ``densemem-bench/1`` schema (the first
        problem is named, e.g. a recall above 1 or a ratio that does not match
        its times).

    Examples
    --------
    >>> from densemem.benchmark import run_benchmark, load_results
    >>> rep = run_benchmark(dataset="unit", n=300, dim=8, n_queries=5, methods=["faiss-flat"], repeats=1)
    >>> len(load_results(rep.to_dict()).records)
    1
    """
    where = "load_results"
    if isinstance(source, dict):
        data = source
    elif isinstance(source, str) and source.lstrip().startswith("{"):
        data = json.loads(source)
    elif isinstance(source, (str, Path)):
        path = Path(source)
        if not path.is_file():
            raise InputValueError(f"{where}: no benchmark file at {str(path)!r}.")
        data = json.loads(path.read_text())
    else:
        raise InputTypeError(f"{where}: `source` must be a path, JSON text or a dict; got {type(source).__name__}.")
    try:
        return BenchResults.model_validate(data)
    except ValidationError as exc:
        raise InputValueError(f"{where}: not a valid densemem-bench/1 document: {_pydantic_message(exc)}.") from None


def _make_spec(spec: Any, options: dict[str, Any]) -> BenchSpec:
    if spec is None:
        base: dict[str, Any] = {}
    elif isinstance(spec, BenchSpec):
        base = spec.model_dump(exclude_unset=True)
    elif isinstance(spec, dict):
        base = dict(spec)
    else:
        raise InputTypeError(f"run_benchmark: `spec` must be a BenchSpec, a dict or None; got {type(spec).__name__}.")
    try:
        return BenchSpec(**{**base, **options})
    except ValidationError as exc:
        raise InputValueError(f"run_benchmark: bad option {_pydantic_message(exc)}.") from None


def _ticker(total: int, progress: bool | None) -> tuple[Callable[[str], None], Callable[[], None]]:
    bar = progress_bar(total=total, desc="bench", show=None if progress is None else bool(progress),
                       where="run_benchmark")

    def tick(what: str) -> None:
        bar.set_postfix_str(what[:40])
        bar.update(1)

    return tick, bar.close


def run_benchmark(spec: BenchSpec | dict[str, Any] | None = None, *, progress: bool | None = None,
                  **options: Any) -> BenchReport:
    """Run every chosen method on the same data and measure quality, speed and memory.

    Parameters
    ----------
    spec : BenchSpec or dict, optional
        The options (see :class:`BenchSpec`); default: all defaults (clustered
        data, N=10,000, d=128, 1,000 queries).
    progress : bool, optional
        A tqdm bar on stderr (default: only when stderr is a terminal).
    **options
        Fields of :class:`BenchSpec`, overriding ``spec``.

    Returns
    -------
    BenchReport

    Raises
    ------
    InputValueError
        A bad option (named), a missing data file, a size the dataset cannot
        give, every k larger than N.

    Notes
    -----
    recall@k = mean over queries of ``|returned top-k & true top-k| / k``
    with the truth from faiss ``IndexFlatIP`` (common practice); the state
    error is ``||state - exact state||_2`` at the same beta (the exact rows
    are checked against a float64 NumPy softmax on up to 64 queries).
    Densemem rows are timed with ``return_energy=False``.

    Examples
    --------
    >>> from densemem.benchmark import run_benchmark
    >>> rep = run_benchmark(dataset="unit", n=400, dim=16, n_queries=10, betas=[50],
    ...                     methods=["certified"], repeats=1, warmup=0)
    >>> rep.records[1].method, rep.records[1].recall[10] == 1.0
    ('certified', True)
    """
    spec = _make_spec(spec, options)
    facts = machine_facts()
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    sizes = spec.run_sizes()
    total = sum(count_rows(spec, n or 10_000) for n in sizes)
    tick, close = _ticker(total, progress)
    records: list[BenchRecord] = []
    try:
        for n in sizes:
            records += run_rows(spec, load_data(spec, n, spec.seed), tick)
    finally:
        close()
    facts["load_average_end"] = list(load_average())
    return BenchReport(spec=spec, machine=MachineFacts(**facts), records=tuple(records), created=created)
