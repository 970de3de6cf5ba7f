"""The demo: an invented regional photo archive, end to end.

Everything here is **invented**: the "Harrowmere Valley Regional Archive"
does not exist, and its scanned-photo embeddings are generated. Photos belong
to subject themes (harbour, market day, school portraits, ...); some were
scanned twice (rescans: nearly identical vectors) or cropped (close, not
identical): those are the planted near-duplicates. Faded prints brought in by
visitors are the queries.

:func:`run_demo` builds a store, compares sharp and blended retrieval (two
betas), checks sharp retrieval against faiss exact nearest-neighbour search,
and, when :mod:`densemem.duplicates` and :mod:`densemem.tuning` are present,
groups the near-duplicates and tunes beta on the de-duplicated archive. It
writes a report folder: ``summary.md``, ``report.html`` (one self-contained
page, plots embedded), PNG plots (with matplotlib), the store folder and the
de-duplication plan.

Examples
--------
>>> from densemem.cli.demo import make_archive
>>> arc = make_archive(60, seed=1)
>>> arc.vectors.shape[1], str(arc.ids[0])
(64, 'HVA-00000')
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .._util import replacing, write_atomic
from .._validation import as_rng, check_positive_int
from ..dense import DenseMemory
from ..errors import InputTypeError, InputValueError

__all__ = ["Archive", "make_archive", "faded_prints", "DemoReport", "run_demo", "THEMES", "LABEL"]

LABEL = "invented data: the Harrowmere Valley Regional Archive is fictional and its scan embeddings are generated"
THEMES = (
    "harbour", "market day", "school portraits", "flood of the lower mill", "harvest", "railway halt",
    "chapel choir", "ferry crossing", "wool fair", "lighthouse keepers", "village band", "quarry",
)
DIM = 64


@dataclass(frozen=True, slots=True, repr=False)
class Archive:
    """The invented archive: one row per scan.

    Attributes
    ----------
    vectors : ndarray of shape (n_scans, 64), float32, unit norm
    ids : ndarray of str, e.g. "HVA-00017", "HVA-00017-rescan", "HVA-00017-crop"
    theme : ndarray of int, index into :data:`THEMES`
    original : ndarray of int, row of the original photo each scan shows
    kind : ndarray of str, "original", "rescan" or "crop"
    centres : ndarray of shape (n_themes, 64), unit theme directions
    """

    vectors: np.ndarray
    ids: np.ndarray
    theme: np.ndarray
    original: np.ndarray
    kind: np.ndarray
    centres: np.ndarray

    def __repr__(self) -> str:
        return f"Archive(n_scans={len(self.ids)}, n_photos={int((self.kind == 'original').sum())}, invented=True)"


def _unit(x: np.ndarray) -> np.ndarray:
    return (x / np.linalg.norm(x, axis=-1, keepdims=True)).astype(np.float32)


def make_archive(n_photos: int = 4000, *, seed: Any = 0, rescan_rate: float = 0.08, crop_rate: float = 0.04) -> Archive:
    """Generate the invented archive: ``n_photos`` originals plus planted rescans and crops.

    A photo is ``0.75 * theme + 0.66 * own direction`` (unit norm), so photos
    of one theme have cosine about 0.56; a rescan adds small noise (cosine
    about 0.995 to its original), a crop a larger one (about 0.97).

    Examples
    --------
    >>> from densemem.cli.demo import make_archive
    >>> arc = make_archive(100, seed=0)
    >>> sorted(set(arc.kind.tolist()))
    ['crop', 'original', 'rescan']
    """
    n = check_positive_int(n_photos, name="n_photos", where="make_archive", minimum=20)
    rng = as_rng(seed, where="make_archive")
    centres = _unit(rng.standard_normal((len(THEMES), DIM)))
    theme = rng.integers(0, len(THEMES), n)
    own = _unit(rng.standard_normal((n, DIM)))
    photos = _unit(0.75 * centres[theme] + 0.66 * own)
    n_re, n_crop = max(1, int(rescan_rate * n)), max(1, int(crop_rate * n))
    re_src = rng.choice(n, n_re, replace=False)
    crop_src = rng.choice(n, n_crop, replace=False)
    rescans = _unit(photos[re_src] + 0.1 / np.sqrt(DIM) * rng.standard_normal((n_re, DIM)))
    crops = _unit(photos[crop_src] + 0.25 / np.sqrt(DIM) * rng.standard_normal((n_crop, DIM)))
    names = np.array([f"HVA-{i:05d}" for i in range(n)])
    ids = np.concatenate([names, np.char.add(names[re_src], "-rescan"), np.char.add(names[crop_src], "-crop")])
    original = np.concatenate([np.arange(n), re_src, crop_src])
    kind = np.array(["original"] * n + ["rescan"] * n_re + ["crop"] * n_crop)
    return Archive(np.concatenate([photos, rescans, crops]), ids.astype(str), theme[original], original, kind, centres)


def faded_prints(archive: Archive, n: int = 200, *, fade: float = 0.9, seed: Any = 1) -> tuple[np.ndarray, np.ndarray]:
    """Queries: faded copies of ``n`` original photos, and the rows they came from.

    ``fade`` is the noise norm relative to the photo (cosine to the original
    about ``1 / sqrt(1 + fade**2)``).

    Examples
    --------
    >>> from densemem.cli.demo import make_archive, faded_prints
    >>> q, src = faded_prints(make_archive(50), 5)
    >>> q.shape, src.shape
    ((5, 64), (5,))
    """
    rng = as_rng(seed, where="faded_prints")
    originals = np.flatnonzero(archive.kind == "original")
    src = rng.choice(originals, min(n, originals.size), replace=False)
    noise = _unit(rng.standard_normal((src.size, DIM))) * fade
    return _unit(archive.vectors[src] + noise), src


@dataclass(frozen=True, slots=True)
class DemoReport:
    """What :func:`run_demo` found and wrote (all figures from invented data)."""

    out: str
    label: str
    n_scans: int
    n_photos: int
    n_queries: int
    sharp_beta: float
    blended_beta: float
    sharp: dict[str, float]
    blended: dict[str, float]
    faiss: dict[str, float]
    dedup: dict[str, Any] | None
    tuning: dict[str, Any] | None
    files: dict[str, str] = field(default_factory=dict)
    seconds: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python copy of every field (JSON-ready)."""
        return {name: getattr(self, name) for name in self.__dataclass_fields__}

    def summary_text(self) -> str:
        """The short plain-text summary the ``densemem demo`` command prints."""
        lines = [
            f"densemem demo ({self.label})",
            f"  archive: {self.n_scans} scans of {self.n_photos} photos; {self.n_queries} faded prints as queries",
            f"  sharp   beta={self.sharp_beta:g}: state is the print's photo (cos >= 0.95) for "
            f"{self.sharp['photo_match']:.1%}; blends {self.sharp['blend_size']:.2f} scans",
            f"  blended beta={self.blended_beta:g}: state is the photo for {self.blended['photo_match']:.1%}, "
            f"cos to its theme {self.blended['theme_cos']:.2f} (sharp: {self.sharp['theme_cos']:.2f}); "
            f"blends {self.blended['blend_size']:.0f} scans",
            f"  faiss exact nearest: right photo first {self.faiss['top1_photo']:.1%}; "
            f"agrees with sharp retrieval on {self.faiss['agreement']:.1%}",
        ]
        if self.dedup:
            lines.append(f"  near-duplicates: {self.dedup['n_groups']} groups, planted found "
                         f"{self.dedup['planted_recall']:.1%}, pure groups {self.dedup['pure_groups']:.1%}")
        if self.tuning:
            lines.append(f"  tuned beta (sharp, on the de-duplicated archive): {self.tuning['chosen_beta']}")
        lines.append(f"  report: {self.files.get('summary', self.out)}  ({self.seconds:.1f} s)")
        return "\n".join(lines)


def _retrieval_stats(mem: DenseMemory, arc: Archive, q: np.ndarray, src: np.ndarray, beta: float) -> dict[str, float]:
    """How close the retrieved state is to the photo and to its theme, and how many scans it blends.

    ``blend_size`` is ``1 / sum w^2`` over the heaviest (up to 4096) softmax
    weights: 1 for one scan, n for an even blend of n scans.
    """
    res = mem.retrieve(q, beta, k=max(1, min(4096, len(mem) - 1)), method="exact", return_energy=False)
    states = _unit(res.states)
    w = res.top_weights
    photo_cos = np.einsum("ij,ij->i", states, arc.vectors[src])
    theme_cos = np.einsum("ij,ij->i", states, arc.centres[arc.theme[src]])
    return {
        "photo_match": float(np.mean(photo_cos >= 0.95)),
        "photo_cos": float(np.mean(photo_cos)),
        "theme_cos": float(np.mean(theme_cos)),
        "theme_match": float(np.mean(np.argmax(states @ arc.centres.T, axis=1) == arc.theme[src])),
        "blend_size": float(np.mean(1.0 / np.sum(w * w, axis=1))),
        "top_weight": float(np.mean(w[:, 0])),
    }


def _dedup(arc: Archive, mem: DenseMemory, out: Path) -> tuple[dict[str, Any] | None, Any, dict[str, str]]:
    try:
        from ..duplicates._find import plan_duplicates
    except ImportError:
        return None, None, {}
    plan = plan_duplicates(mem, threshold=0.95, progress=False)
    label = np.full(len(arc.ids), -1)
    for g, (a, b) in enumerate(zip(plan.group_offsets[:-1], plan.group_offsets[1:])):
        label[plan.member_rows[a:b]] = g
    dup = np.flatnonzero(arc.kind != "original")
    found = (label[dup] >= 0) & (label[dup] == label[arc.original[dup]])
    pure = [np.unique(arc.original[plan.member_rows[a:b]]).size == 1
            for a, b in zip(plan.group_offsets[:-1], plan.group_offsets[1:])]
    files = plan.write(out / "dedup-plan", overwrite=True)
    stats = {"threshold": 0.95, "n_groups": plan.n_groups, "n_drop": int(plan.drop_ids.size),
             "planted": int(dup.size), "planted_recall": float(found.mean()) if dup.size else 1.0,
             "pure_groups": float(np.mean(pure)) if pure else 1.0}
    return stats, plan, {f"dedup_{k}": v for k, v in files.items()}


def _tune(mem: DenseMemory, plan: Any, out: Path, plots: bool) -> tuple[dict[str, Any] | None, dict[str, str]]:
    try:
        from .. import tuning
    except ImportError:
        return None, {}
    kept = mem
    if plan is not None and plan.drop_ids.size:
        rows = mem.positions(plan.keep_ids)
        kept = DenseMemory.from_array(mem.patterns[rows], plan.keep_ids, normalize=True, beta=mem.beta)
    spec = tuning.TuneSpec(n_betas=10, n_queries=128, level=0.3, target="sharp")
    rep = tuning.tune_beta(kept, spec)
    files: dict[str, str] = {}
    _write_text(out / "tuning.txt", tuning.format_report(rep) + "\n")
    files["tuning"] = str(out / "tuning.txt")
    if plots and rep.sweep is not None and _have_matplotlib():
        with replacing(out / "beta-sweep.png") as tmp:
            tuning.plot_sweep(rep.sweep, tmp, predicted_beta=rep.prediction.beta_target_separated,
                              chosen_beta=rep.choice.beta if rep.choice else None)
        files["beta_sweep_png"] = str(out / "beta-sweep.png")
    chosen = rep.choice.beta if rep.choice is not None else None
    return {"n_patterns": len(kept), "chosen_beta": None if chosen is None else round(float(chosen), 3),
            "predicted_beta": float(rep.prediction.beta_target_separated)}, files


def _write_text(path: Path, text: str) -> None:
    """Write a report text file atomically (temp file in the same folder + os.replace)."""
    write_atomic(path, text)


def _save_figure(fig: Any, path: Path) -> None:
    with replacing(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)


def _have_matplotlib() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def _plot_weights(mem: DenseMemory, q: np.ndarray, betas: tuple[float, float], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9, 3.2), sharey=True)
    for ax, beta, name in zip(axes, betas, ("sharp", "blended")):
        r = mem.retrieve(q, beta, k=20, method="exact")
        ax.bar(np.arange(20), r.top_weights[0], color="#3a6ea5" if name == "sharp" else "#c9783a")
        ax.set_title(f"{name}: beta = {beta:g}")
        ax.set_xlabel("rank of the stored scan (heaviest first)")
        ax.xaxis.get_major_locator().set_params(integer=True)  # ranks are whole numbers
    axes[0].set_ylabel("softmax weight")
    fig.suptitle("One faded print (invented data)", fontsize=10)
    fig.tight_layout()
    _save_figure(fig, path)
    plt.close(fig)


def _plot_curve(mem: DenseMemory, arc: Archive, q: np.ndarray, src: np.ndarray, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    betas = np.geomspace(1.0, 100.0, 9)
    stats = [_retrieval_stats(mem, arc, q, src, float(b)) for b in betas]
    fig, ax = plt.subplots(figsize=(5.5, 3.4))
    ax.semilogx(betas, [s["photo_cos"] for s in stats], "o-", label="cos(state, photo)")
    ax.semilogx(betas, [s["theme_cos"] for s in stats], "s-", label="cos(state, theme)")
    ax2 = ax.twinx()
    ax2.loglog(betas, [s["blend_size"] for s in stats], "k:", label="blend size")
    ax2.set_ylabel("effective blend size (dotted)")
    ax.set_xlabel("beta")
    ax.set_ylim(0, 1.02)
    ax.set_ylabel("mean cosine")
    ax.legend(loc="center left", fontsize=8)
    ax.set_title("Sharp versus blended retrieval (invented data)", fontsize=10)
    fig.tight_layout()
    _save_figure(fig, path)
    plt.close(fig)


def run_demo(
    out: Any = "densemem-demo",
    *,
    n_photos: int = 4000,
    n_queries: int = 200,
    seed: Any = 0,
    plots: bool = True,
    quiet: bool = True,
    overwrite: bool = False,
) -> DemoReport:
    """Run the invented archive scenario and write the report folder ``out``.

    Parameters
    ----------
    out : str or os.PathLike
        Report folder (created if missing; each file is written atomically: a temp
        file in the folder, then os.replace).
    n_photos : int, default 4000
        Original photos (rescans and crops are added on top).
    n_queries : int, default 200
        Faded prints used as queries.
    seed : int, default 0
    plots : bool, default True
        Draw PNG plots (skipped silently when matplotlib is missing).
    quiet : bool, default True
        No progress bar on stderr.
    overwrite : bool, default False
        Write into ``out`` even when it holds files (the demo's own files are
        replaced; others are kept). Without it a non-empty ``out`` is refused.

    Returns
    -------
    DemoReport

    Examples
    --------
    >>> import tempfile
    >>> from densemem.cli.demo import run_demo
    >>> rep = run_demo(tempfile.mkdtemp(), n_photos=120, n_queries=20, plots=False)
    >>> rep.sharp["photo_cos"] > rep.blended["photo_cos"]
    True
    """
    t0 = time.perf_counter()
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputValueError(f"run_demo: `out` must be a folder; {str(out)!r} is a file.")
    if not isinstance(overwrite, bool):
        raise InputTypeError(f"run_demo: `overwrite` must be True or False; got {overwrite!r}.")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise InputValueError(
            f"run_demo: `out` {str(out)!r} is a folder that already holds files; pass overwrite=True to write "
            "into it or choose a new folder."
        )
    out.mkdir(parents=True, exist_ok=True)
    from ._output import progress

    steps = progress(range(5), total=5, desc="demo", quiet=quiet)
    next(steps, None)
    arc = make_archive(n_photos, seed=seed)
    q, src = faded_prints(arc, n_queries, seed=as_rng(seed, where="run_demo").integers(1 << 31))
    sharp_beta, blended_beta = 40.0, 10.0
    mem = DenseMemory.from_array(arc.vectors, arc.ids, normalize=True, beta=sharp_beta)
    mem.save(out / "store", overwrite=overwrite)
    files = {"store": str(out / "store")}
    next(steps, None)
    sharp = _retrieval_stats(mem, arc, q, src, sharp_beta)
    blended = _retrieval_stats(mem, arc, q, src, blended_beta)
    near = mem.nearest(q, k=1)
    sharp_top = mem.retrieve(q, sharp_beta, k=1, method="exact").top_ids[:, 0]
    faiss_stats = {"top1_photo": float(np.mean(arc.original[mem.positions(near.ids[:, 0])] == src)),
                   "agreement": float(np.mean(near.ids[:, 0] == sharp_top))}
    next(steps, None)
    dedup, plan, dfiles = _dedup(arc, mem, out)
    files.update(dfiles)
    next(steps, None)
    tuned, tfiles = _tune(mem, plan, out, plots)
    files.update(tfiles)
    next(steps, None)
    if plots and _have_matplotlib():
        _plot_weights(mem, q[:1], (sharp_beta, blended_beta), out / "weights-sharp-vs-blended.png")
        _plot_curve(mem, arc, q, src, out / "retrieval-vs-beta.png")
        files["weights_png"] = str(out / "weights-sharp-vs-blended.png")
        files["curve_png"] = str(out / "retrieval-vs-beta.png")
    files["summary"] = str(out / "summary.md")
    files["html"] = str(out / "report.html")
    report = DemoReport(
        out=str(out), label=LABEL, n_scans=len(arc.ids), n_photos=int(n_photos), n_queries=int(q.shape[0]),
        sharp_beta=sharp_beta, blended_beta=blended_beta, sharp=sharp, blended=blended, faiss=faiss_stats,
        dedup=dedup, tuning=tuned, files=files, seconds=time.perf_counter() - t0,
    )
    _write_text(out / "summary.md", _markdown(report))
    from ._pages import demo_page

    _write_text(out / "report.html", demo_page(report, out))
    for _ in steps:
        pass
    return report


def _markdown(r: DemoReport) -> str:
    pct = "{:.1%}".format
    lines = [
        "# densemem demo: the Harrowmere Valley Regional Archive",
        "",
        "> **Invented data.** The Harrowmere Valley Regional Archive is fictional and its scan embeddings "
        "are generated; no real archive, photo or person is described.",
        "",
        f"The archive holds {r.n_scans} scans of {r.n_photos} photos in {len(THEMES)} subject themes. "
        "Some photos were scanned twice (rescans) or cropped: these are planted near-duplicates. "
        f"{r.n_queries} faded prints (heavily noised copies of archive photos) are the queries.",
        "",
        "## Sharp versus blended retrieval",
        "",
        "| | beta | state is the photo (cos >= 0.95) | mean cos to the photo | mean cos to its theme "
        "| right theme | scans blended (1 / sum w^2) |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, beta, st in (("sharp", r.sharp_beta, r.sharp), ("blended", r.blended_beta, r.blended)):
        lines.append(f"| {name} | {beta:g} | {pct(st['photo_match'])} | {st['photo_cos']:.3f} | "
                     f"{st['theme_cos']:.3f} | {pct(st['theme_match'])} | {st['blend_size']:.1f} |")
    lines += [
        "",
        "Large beta returns one stored photo (its rescans and crops share the weight, hence a blend size a "
        "little above 1); small beta returns a blend of many scans of the same theme: a theme prototype, "
        "closer to the theme direction than any single photo.",
        "",
        "## Against faiss exact nearest-neighbour search",
        "",
        f"faiss (`IndexFlatIP` brute force) puts the right photo first for {pct(r.faiss['top1_photo'])} of the "
        f"prints; its first answer equals sharp retrieval's heaviest scan for {pct(r.faiss['agreement'])}.",
    ]
    if r.dedup:
        d = r.dedup
        lines += ["", "## Near-duplicates", "",
                  f"At cosine >= {d['threshold']}: {d['n_groups']} groups, {d['n_drop']} scans could be dropped "
                  f"(plan files in `dedup-plan/`; nothing was removed). Planted rescans and crops found with their "
                  f"original: {pct(d['planted_recall'])} of {d['planted']}; groups holding one photo only: "
                  f"{pct(d['pure_groups'])}."]
    if r.tuning:
        t = r.tuning
        lines += ["", "## Choosing beta", "",
                  f"On the de-duplicated archive ({t['n_patterns']} scans) the smallest sharp beta found is "
                  f"{t['chosen_beta']}; the separation-based prediction is {t['predicted_beta']:.4g}. "
                  "Details in `tuning.txt`."]
    pngs = [v for k, v in r.files.items() if k.endswith("png")]
    if pngs:
        lines += ["", "## Plots", ""] + [f"![{Path(p).stem}]({Path(p).name})" for p in pngs]
    lines += ["", f"_Written by `densemem demo` in {r.seconds:.1f} s._", ""]
    return "\n".join(lines)
