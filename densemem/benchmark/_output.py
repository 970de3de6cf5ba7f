"""Text table and PNG plots of benchmark records (private).

The table puts each time right after its quality figures and each densemem
time beside the faiss baseline of the same run, as ``time / baseline time``.
Plots: recall@k against queries/s (largest N of the run), and time against N
on log-log axes (scaling runs only). matplotlib is optional.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ._spec import BenchRecord
from ..errors import MissingExtraError

__all__ = ["LEGEND", "format_table", "plot_recall_speed", "plot_scaling", "table_rows"]


def _f(v: Any, spec: str) -> str:
    return "-" if v is None else format(v, spec)


#: The legend of the table columns (printed under the table and in the HTML report).
LEGEND = (
    ("time ms", "median wall time of one call over all queries"),
    ("x base", "time ms / base ms: base ms is the baseline's median, timed alternately with this row"),
    ("held MiB", "memory the searched structure holds (faiss: its serialised index; densemem: float32 "
                 "patterns plus any index)"),
    ("py MiB, RSS MiB", "what one search call adds (Python heap / resident set); faiss allocates in C++ and "
                        "reuses pages, so its rows are near 0"),
    ("support", "sparse maps only: mean number of stored rows with non-zero weight per query; a sparse row "
                "returns only its support, so recall@k for k above it counts the missing ids as misses"),
)


def table_rows(records: Sequence[BenchRecord], ks: Sequence[int]) -> tuple[list[str], list[list[str]]]:
    """Column names and formatted cells of the benchmark table (text and HTML share them)."""
    heads = ["method", "setting"] + [f"recall@{k}" for k in ks] + [
        "state err", "fell back", "time ms", "queries/s", "baseline", "base ms", "x base", "build s",
        "held MiB", "py MiB", "RSS MiB"]
    rows = []
    for r in records:
        base_ms = None if r.baseline_time_s is None else r.baseline_time_s * 1e3
        rows.append([r.method, r.label] + [_f(r.recall.get(k), ".4f") for k in ks] + [
            _f(r.state_error_max, ".2e"), _f(r.fell_back, ".2f"), f"{r.time_s * 1e3:.3g}", f"{r.queries_per_s:,.0f}",
            r.baseline or "-", _f(base_ms, ".3g"), _f(r.time_ratio, ".2f"), f"{r.build_s:.2f}",
            _f(r.held_mib, ".2f"), f"{r.peak_python_mib:.1f}", f"{r.peak_rss_mib:.1f}"])
    if any(r.support_size_mean is not None for r in records):  # sparse maps were run
        heads.append("support")
        for r, row in zip(records, rows):
            row.append(_f(r.support_size_mean, ".1f"))
    return heads, rows


def format_table(records: Sequence[BenchRecord], ks: Sequence[int], title: str = "") -> str:
    """Fixed-width text table of ``records``, one block per N."""
    heads, rows = table_rows(records, ks)
    widths = [max(len(h), *(len(row[j]) for row in rows)) if rows else len(h) for j, h in enumerate(heads)]
    left = {0, 1, heads.index("baseline")}

    def line(cells: Sequence[str]) -> str:
        return "  ".join(c.ljust(w) if j in left else c.rjust(w) for j, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = [title] if title else []
    last_n = None
    for r, row in zip(records, rows):
        if r.n != last_n:
            if last_n is not None:
                out.append("")
            out += [f"N={r.n:,}  d={r.dim}  queries={r.n_queries} (batch {r.batch_size})  dataset={r.dataset}",
                    line(heads), line(["-" * w for w in widths])]
            last_n = r.n
        out.append(line(row))
    out += [""] + [f"{name}: {text}" for name, text in LEGEND]
    return "\n".join(out)


def _pyplot() -> Any:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise MissingExtraError(
            "plot_benchmark: drawing needs matplotlib; install it with: pip install densemem[plot]"
        ) from None
    return plt


def _series(records: Sequence[BenchRecord]) -> dict[str, list[BenchRecord]]:
    """Rows grouped into curves: one per method and beta (settings along the curve)."""
    groups: dict[str, list[BenchRecord]] = {}
    for r in records:
        key = r.method + ("" if r.beta is None else f" beta={r.beta:g}")
        groups.setdefault(key, []).append(r)
    return groups


def plot_recall_speed(records: Sequence[BenchRecord], path: Path, k: int) -> Path:
    """recall@k (y) against queries/s (x, log) for the largest N in ``records``."""
    plt = _pyplot()
    n_max = max(r.n for r in records)
    rows = [r for r in records if r.n == n_max and k in r.recall]
    fig, ax = plt.subplots(figsize=(9, 5.5))
    for j, (name, group) in enumerate(_series(rows).items()):
        style = "s--" if group[0].library == "faiss" else "o-"
        ax.plot([r.queries_per_s for r in group], [r.recall[k] for r in group], style, color=plt.cm.tab20(j % 20),
                label=name, ms=5)
    ax.set_xscale("log")
    ax.set_xlabel("queries per second (log scale; median of repeats)")
    ax.set_ylabel(f"recall@{k} (against faiss IndexFlatIP)")
    ax.set_title(f"recall@{k} against speed, N={n_max:,}, d={rows[0].dim}, {rows[0].dataset}")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_scaling(records: Sequence[BenchRecord], path: Path) -> Path:
    """Time of one batch call (y, log) against N (x, log), one line per method and setting."""
    plt = _pyplot()
    curves: dict[str, list[BenchRecord]] = {}
    for r in records:
        curves.setdefault(f"{r.method} {r.label}", []).append(r)
    fig, ax = plt.subplots(figsize=(10, 6))
    # one colour per method, and per setting of that method its own marker and dash pattern,
    # so that many curves stay distinguishable (colour alone would repeat look-alike shades)
    methods = list(dict.fromkeys(g[0].method for g in curves.values()))
    markers, dashes = "osD^vP*X", ["-", "--", "-.", ":"]
    seen: dict[str, int] = {}
    for name, group in curves.items():
        group = sorted(group, key=lambda r: r.n)
        method = group[0].method
        j = seen[method] = seen.get(method, -1) + 1
        ax.plot([r.n for r in group], [r.time_s for r in group], linestyle=dashes[j % len(dashes)],
                marker=markers[j % len(markers)], ms=5, color=plt.cm.tab10(methods.index(method) % 10),
                label=name)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("stored rows N (log scale)")
    ax.set_ylabel(f"seconds for {records[0].n_queries} queries (log scale)")
    ax.set_title("retrieval time against N")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, ncol=1)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
