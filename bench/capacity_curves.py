"""Capacity against dimension for every model, beside the published asymptotic curves.

Invented scenario: random -1/+1 patterns (seeded), no real data. Curves measured:
  binary   hebbian, storkey, poly3 at N = 25, 50, 100, 200: exact fixed points, one
           synchronous step from the stored pattern (no corruption); pseudo_inverse likewise,
           the search capped at N (Personnaz et al. 1985; Kanter & Sompolinsky 1987: every
           pattern is a fixed point up to N).
  dense    exp (binary, F = exp) at N = 8..24: one-step retrieval from a probe with Gaussian
           noise sigma 0.5 (about 2% of bits flipped); softmax(beta=50) at d = 8..24: top-1
           correct from a probe with a quarter of its coordinates zeroed.
  robust   success against flip level at fixed load (hebbian N=100 K=10; softmax d=16 K=64).
Printed: one table (measured, asymptotic formula value, ratio) and the log-capacity slopes
of the exponential models against Hebbian's; the ratio printed last is
(softmax slope) / (Hebbian slope). Writes capacity_curves.{csv,json,png} and a summary JSON to
bench/results/ (or --out). Time per curve is the median of --repeats runs (default 1: these
are experiments, not kernels).

Run: python bench/capacity_curves.py [--quick] [--repeats 1] [--out bench/results]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import time
from pathlib import Path
from statistics import median

from scipy import stats

from densemem.capacity import (
    CapacityCurve,
    capacity_curve,
    plot_capacity,
    robustness_curve,
)

HERE = Path(__file__).resolve().parent

ASYMPTOTIC = {  # McEliece et al. 1987; Storkey 1997 and Krotov & Hopfield 2016 (from memory);
    # Kanter & Sompolinsky 1987 for the pseudo-inverse
    "hebbian": lambda n: n / (2 * math.log(n)),
    "storkey": lambda n: n / math.sqrt(2 * math.log(n)),
    "pseudo_inverse": lambda n: float(n),
    "poly3": lambda n: n**2 / (2 * 3 * math.log(n)),
    "exp": lambda n: math.exp(n * math.log(2) / 2),  # Demircigil 2017 (from memory)
}


def _timed(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return out, median(times)


def _slope(curve, model):
    reps = [r for r in curve.reports if r.model == model and r.capacity > 0]
    r = stats.linregress([x.dim for x in reps], [math.log(x.capacity) for x in reps])
    return r.slope, r.rvalue**2


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes (a smoke run)")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--out", type=Path, default=HERE / "results")
    a = ap.parse_args(argv)
    a.out.mkdir(parents=True, exist_ok=True)
    big = [25, 50] if a.quick else [25, 50, 100, 200]
    small = [8, 12, 16] if a.quick else [8, 12, 16, 20, 24]
    trials = 2 if a.quick else 5
    common = dict(n_trials=trials, seed=0, rel_tol=0.05)
    timings = {}

    binary, timings["binary"] = _timed(lambda: capacity_curve(
        ["hebbian", "storkey", "poly:3"], big, mode="sync", steps=1, **common), a.repeats)
    pinv, timings["pseudo_inverse"] = _timed(lambda: CapacityCurve.combine(*[
        capacity_curve(["pseudo_inverse"], [n], mode="sync", steps=1, max_patterns=n, **common)
        for n in big]), a.repeats)
    expo, timings["exp"] = _timed(lambda: capacity_curve(
        ["exp"], small, corruption=("gaussian", 0.5), mode="sync", steps=1, **common), a.repeats)
    soft, timings["softmax"] = _timed(lambda: capacity_curve(
        [("softmax", 50.0)], small, corruption=("mask", 0.25), success="top1",
        max_patterns=65536, **common), a.repeats)
    hsmall = capacity_curve(["hebbian"], small, mode="sync", steps=1, **common)
    curve = CapacityCurve.combine(binary, pinv, expo, soft)
    curve.write_csv(a.out / "capacity_curves.csv", overwrite=True)  # a re-run replaces its results
    curve.write_json(a.out / "capacity_curves.json", overwrite=True)
    png = plot_capacity(CapacityCurve.combine(curve, hsmall), a.out / "capacity_curves.png")

    robust, timings["robustness"] = _timed(lambda: [
        robustness_curve("hebbian", 100, 10, levels=(0, 0.05, 0.1, 0.2, 0.3, 0.4),
                         n_trials=trials),
        robustness_curve(("softmax", 50.0), 16, 64, levels=(0, 0.125, 0.25, 0.375),
                         success="top1", n_trials=trials)], a.repeats)

    print(f"{'model':<18}{'N/d':>5}{'capacity':>10}{'capped':>8}{'asymptotic':>12}{'ratio':>8}")
    rows = []
    for r in CapacityCurve.combine(curve, hsmall).reports:
        ref = ASYMPTOTIC.get(r.model)
        val = ref(r.dim) if ref else None
        ratio = r.capacity / val if val else None
        rows.append({**r.row(), "asymptotic": val, "ratio": ratio})
        print(f"{r.model:<18}{r.dim:>5}{r.capacity:>10}{r.capped!s:>8}"
              f"{(f'{val:.1f}' if val else '-'):>12}{(f'{ratio:.2f}' if ratio else '-'):>8}")
    for rep in robust:
        print(rep)
    s_soft, r2_soft = _slope(soft, "softmax(beta=50)")
    s_exp, r2_exp = _slope(expo, "exp")
    s_heb, r2_heb = _slope(hsmall, "hebbian")
    print(f"log-capacity slope per dimension: softmax {s_soft:.3f} (R^2 {r2_soft:.3f}), "
          f"exp {s_exp:.3f} (R^2 {r2_exp:.3f}), hebbian {s_heb:.3f} (R^2 {r2_heb:.3f})")
    print("seconds: " + ", ".join(f"{k} {v:.1f}" for k, v in timings.items()))
    ratio = s_soft / s_heb
    summary = {
        "rows": rows, "robustness": [r.to_dict() for r in robust],
        "slopes": {"softmax": s_soft, "exp": s_exp, "hebbian": s_heb},
        "r2": {"softmax": r2_soft, "exp": r2_exp, "hebbian": r2_heb},
        "seconds": timings, "slope_ratio_softmax_over_hebbian": ratio, "png": str(png),
        "quick": a.quick, "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
    }
    (a.out / "capacity_curves_summary.json").write_text(json.dumps(summary, indent=2))
    print(f"slope ratio softmax/hebbian: {ratio:.2f}")
    return summary


if __name__ == "__main__":
    main()
