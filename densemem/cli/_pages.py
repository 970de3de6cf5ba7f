"""The HTML report page of each job command (tune, dedup, capacity, bench, demo).

Each ``*_page`` function takes what the command computed and returns the page
text: the same tables the command prints, with the plots embedded as PNG
(left out, with a note, when matplotlib is missing).

Examples
--------
>>> import numpy as np, densemem, densemem.tuning as t
>>> from densemem.cli._pages import tune_page
>>> rep = t.tune_beta(densemem.DenseMemory.from_array(np.eye(6)), t.TuneSpec(n_betas=4, n_queries=8))
>>> "verdict: for sharp recall use beta" in tune_page(rep, "store", plots=False)
True
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from .._html import Section, figure_png, have_matplotlib, page, png_bytes

__all__ = ["tune_page", "dedup_page", "capacity_page", "bench_page", "demo_page"]

_NO_PLOTS = "Plots left out: matplotlib is not installed (pip install densemem[plot])."

_CAPACITY_COLUMNS = (
    ("model", "model"), ("dim", "dim"), ("capacity", "capacity"), ("success_rate", "success at capacity"),
    ("ci_low", "ci low"), ("ci_high", "ci high"), ("first_fail", "first failing count"),
    ("success_at_first_fail", "success there"),
)



def _num(x: Any) -> Any:
    if x is None:
        return None
    if isinstance(x, (np.floating, float)):
        x = float(x)
        return "nan" if math.isnan(x) else ("inf" if math.isinf(x) else x)
    if isinstance(x, np.integer):
        return int(x)
    return x


# ------------------------------------------------------------------- tune
def tune_page(report: Any, store: str, *, plots: bool = True, warnings: list[str] | None = None,
              apply_hint: str | None = None) -> str:
    """The tuning report as a page: verdict, sweep table and legend, regimes, predicted against measured."""
    from ..tuning._reports import SWEEP_COLUMNS, _predicted_vs_measured, _queries_phrase, regime_lines, verdict
    from ..tuning._reports import plot_sweep

    top = Section("", paragraphs=[verdict(report)] + ([apply_hint] if apply_hint else []), css_class="verdict")
    sections = [top]
    if warnings:
        sections.append(Section("warning", paragraphs=list(warnings), css_class="warning"))
    sw = report.sweep
    if sw is not None:
        sharp_w = float(sw.settings.get("sharp_weight", 0.95))
        rows = [[_num(getattr(sw, f)[i]) for _, f, _ in SWEEP_COLUMNS] for i in range(len(sw.betas))]
        sec = Section("measured sweep", paragraphs=[f"Queries: {_queries_phrase(sw.settings)}."],
                      tables=[([h for h, _, _ in SWEEP_COLUMNS], rows, "")],
                      legend=[(h, text.format(sw=sharp_w)) for h, _, text in SWEEP_COLUMNS])
        if plots and have_matplotlib():
            chosen = report.choice.beta if report.choice is not None and report.choice.reached else None
            png = png_bytes(lambda p: plot_sweep(sw, p, predicted_beta=report.prediction.beta_target_separated,
                                                 chosen_beta=chosen))
            sec.figures.append((png, "the sweep against beta; dashed: predicted beta, dotted: chosen beta"))
        elif plots:
            sec.paragraphs.append(_NO_PLOTS)
        sections.append(sec)
        sections.append(Section("regimes", paragraphs=regime_lines(sw.settings)))
    sections.append(Section("predicted against measured", paragraphs=_predicted_vs_measured(report).split("\n")))
    sep = report.separation.summary
    sections.append(Section("separation of the stored items", tables=[
        (["statistic", "value"], [[k, _num(v)] for k, v in sep.items()],
         "Delta = x.x - max over rivals of x.x_rival, exact search")]))
    return page(f"densemem tune: {store}", sections)


# ------------------------------------------------------------------ dedup
def dedup_page(plan: Any, source: str, out: str, *, plots: bool = True, largest: int = 25) -> str:
    """The near-duplicate plan as a page: summary, the largest groups, the distribution of group sizes."""
    s = plan.summary()
    sizes = np.diff(np.asarray(plan.group_offsets))
    head = Section("summary", paragraphs=[
        f"{s['n_items']} items, {s['n_groups']} groups of near-duplicates at cosine >= {s['threshold']:g}: keep "
        f"{s['n_keep']}, drop {s['n_drop']} (plan files in {out}; nothing was removed)."],
        tables=[(["items", "groups", "keep", "drop", "threshold", "candidates", "grouping", "seconds"],
                 [[s["n_items"], s["n_groups"], s["n_keep"], s["n_drop"], float(s["threshold"]), s["candidates"],
                   s.get("grouping", s.get("no_chaining")), float(s["seconds"])]], "")])
    order = np.argsort(-sizes, kind="stable")[:largest]
    rows = []
    for g in order:
        a, b = int(plan.group_offsets[g]), int(plan.group_offsets[g + 1])
        members = [str(m) for m in plan.member_ids[a:b].tolist()]
        shown = ", ".join(members[:8]) + (" ..." if len(members) > 8 else "")
        rows.append([int(g), str(plan.representative_ids[g].item()), int(b - a), float(plan.min_similarity[g]),
                     float(plan.mean_similarity[g]), shown])
    groups = Section(f"the {min(largest, len(sizes))} largest groups", tables=[
        (["group", "kept item", "size", "min cosine", "mean cosine", "members"], rows, "")])
    sections = [head, groups]
    if plots and have_matplotlib() and sizes.size:
        from matplotlib.figure import Figure

        fig = Figure(figsize=(7, 3.6), layout="constrained")
        ax = fig.subplots()
        values, counts = np.unique(sizes, return_counts=True)
        ax.bar(values, counts, color="#3a6ea5")
        ax.set_xlabel("group size (items)")
        ax.set_ylabel("groups")
        ax.set_yscale("log")
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.set_title(f"near-duplicate groups at cosine >= {s['threshold']:g}")
        groups.figures.append((figure_png(fig), "how many groups have each size"))
    elif plots and sizes.size:
        groups.paragraphs.append(_NO_PLOTS)
    return page(f"densemem dedup: {source}", sections)


# --------------------------------------------------------------- capacity
def capacity_page(curve: Any, *, plots: bool = True) -> str:
    """The capacity table as a page, capped searches marked, with the capacity plot."""

    rows = []
    for r in curve.rows():
        cells = [_num(r[k]) for k, _ in _CAPACITY_COLUMNS]
        if r["capped"]:
            cells[2] = f">= {r['capacity']} (cap)"
        rows.append(cells)
    sec = Section("capacity by model and dimension", tables=[([h for _, h in _CAPACITY_COLUMNS], rows, "")],
                  legend=[("capacity", "largest pattern count whose success rate passed"),
                          (">= N (cap)", "every count up to the search cap passed: N is a lower bound"),
                          ("success at capacity", "share of probes passing the success test at that count"),
                          ("ci low / ci high", "its confidence interval"),
                          ("first failing count", "smallest count above the capacity that failed"),
                          ("success there", "the (failing) success rate at that count")])
    if plots and have_matplotlib() and curve.reports:
        from ..capacity._plot import plot_curve

        sec.figures.append((png_bytes(lambda p: plot_curve(curve, p)),
                            "measured capacities (dots; open triangles: search cap reached) and published "
                            "asymptotic curves (dashed)"))
    elif plots:
        sec.paragraphs.append(_NO_PLOTS)
    return page("densemem capacity", [sec])


# ------------------------------------------------------------------ bench
def bench_page(report: Any, *, plots: bool = True) -> str:
    """The benchmark tables (one per N) with their legend and the recall/speed and scaling plots."""
    from ..benchmark._output import LEGEND, plot_recall_speed, plot_scaling, table_rows

    m = report.machine
    threads = ", ".join(f"{b.get('internal_api')} {b.get('num_threads')}" for b in m.blas) or "-"
    head = Section("machine", paragraphs=[
        f"{m.cpu_count} CPUs ({m.usable_cpus} usable), BLAS threads: {threads}, faiss threads "
        f"{m.faiss_omp_threads}; median of {report.spec.repeats} timed calls after {report.spec.warmup} warm-up."])
    sections = [head]
    ks = sorted({k for r in report.records for k in r.recall})
    for n in sorted({r.n for r in report.records}):
        recs = [r for r in report.records if r.n == n]
        heads, rows = table_rows(recs, ks)
        r0 = recs[0]
        sections.append(Section(f"N = {n:,}", tables=[(heads, rows, f"d={r0.dim}, {r0.n_queries} queries "
                                                       f"(batch {r0.batch_size}), dataset {r0.dataset}")]))
    sections[-1].legend = [(k, v) for k, v in LEGEND]
    figs = Section("plots")
    if plots and have_matplotlib():
        k = max(ks)
        figs.figures.append((png_bytes(lambda p: plot_recall_speed(report.records, p, k)),
                             f"recall@{k} against queries per second, largest N"))
        if len({r.n for r in report.records}) > 1:
            figs.figures.append((png_bytes(lambda p: plot_scaling(report.records, p)), "time against N"))
    elif plots:
        figs.paragraphs.append(_NO_PLOTS)
    if figs.figures or figs.paragraphs:
        sections.append(figs)
    return page(f"densemem bench: {report.spec.dataset}", sections)


# ------------------------------------------------------------------- demo
def demo_page(report: Any, folder: Path) -> str:
    """The demo's summary as a page, with the PNGs it drew embedded."""
    pct = "{:.1%}".format
    intro = Section("", paragraphs=[
        "Invented data. The Harrowmere Valley Regional Archive is fictional and its scan embeddings are "
        "generated; no real archive, photo or person is described.",
        f"The archive holds {report.n_scans} scans of {report.n_photos} photos; {report.n_queries} faded prints "
        "(heavily noised copies of archive photos) are the queries."], css_class="warning")
    rows = [[name, beta, pct(st["photo_match"]), st["photo_cos"], st["theme_cos"], pct(st["theme_match"]),
             st["blend_size"]]
            for name, beta, st in (("sharp", report.sharp_beta, report.sharp),
                                   ("blended", report.blended_beta, report.blended))]
    retr = Section("sharp versus blended retrieval", tables=[(
        ["", "beta", "state is the photo (cos >= 0.95)", "mean cos to the photo", "mean cos to its theme",
         "right theme", "scans blended (1 / sum w^2)"], rows, "")])
    faiss = Section("against faiss exact nearest-neighbour search", paragraphs=[
        f"faiss (IndexFlatIP brute force) puts the right photo first for {pct(report.faiss['top1_photo'])} of the "
        f"prints; its first answer equals sharp retrieval's heaviest scan for {pct(report.faiss['agreement'])}."])
    sections = [intro, retr, faiss]
    if report.dedup:
        d = report.dedup
        sections.append(Section("near-duplicates", tables=[(
            ["threshold", "groups", "droppable", "planted", "planted found", "pure groups"],
            [[d["threshold"], d["n_groups"], d["n_drop"], d["planted"], pct(d["planted_recall"]),
              pct(d["pure_groups"])]], "")]))
    if report.tuning:
        t = report.tuning
        sections.append(Section("choosing beta", paragraphs=[
            f"On the de-duplicated archive ({t['n_patterns']} scans) the smallest sharp beta found is "
            f"{t['chosen_beta']}; the separation-based prediction is {t['predicted_beta']:.4g} (a sufficient "
            "condition, so larger)."]))
    figs = Section("plots")
    for key, caption in (("weights_png", "softmax weights of one faded print at the two betas"),
                         ("curve_png", "cosine to the photo and to its theme, and blend size, against beta"),
                         ("beta_sweep_png", "the tuning sweep")):
        if key in report.files:
            figs.figures.append((Path(report.files[key]).read_bytes(), caption))
    if figs.figures:
        sections.append(figs)
    return page("densemem demo: the Harrowmere Valley Regional Archive (invented data)", sections)
