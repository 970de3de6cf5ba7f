"""Long fuzz campaign over the public API: calls, clear errors, uncaught exceptions, crashes.

    python bench/fuzz_campaign.py                  # 20,000 calls, 2 child processes
    python bench/fuzz_campaign.py --calls 2000     # quick check

Runs the hypothesis targets of tests/test_fuzz.py with random seeds (FUZZ_RANDOM=1) in
child processes (``python -m pytest``), so a call that kills the interpreter (a segfault in
faiss, say) is counted as a crash instead of ending the campaign. Each call appends its
outcome to a report file (``target started`` before, ``target ok|clear`` after); a
"started" without an end names the target that crashed. Targets: from_array, retrieve,
energy, nearest, add/remove/positions, build_index, load of damaged stores, binary
memories, plan_duplicates, read_embeddings.

Target (from the project's safety issue): 0 uncaught exceptions, 0 NaN results,
0 interpreter crashes in 20,000 calls.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
N_TARGETS = 11  # hypothesis tests in tests/test_fuzz.py that make calls (some make 3 per example)


def run_worker(examples: int, report: Path, seed: int) -> tuple[int, str]:
    env = {**os.environ, "FUZZ_RANDOM": "1", "FUZZ_EXAMPLES": str(examples), "FUZZ_REPORT": str(report),
           "PYTHONHASHSEED": str(seed)}
    cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "tests/test_fuzz.py",
           f"--hypothesis-seed={seed}", "--tb=line"]
    out = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
    return out.returncode, (out.stdout + out.stderr)[-3000:]


def count(report: Path) -> dict[str, collections.Counter]:
    per: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)
    open_calls: collections.Counter = collections.Counter()
    for line in report.read_text(encoding="utf-8").splitlines():
        target, _, what = line.rpartition(" ")
        if what == "started":
            open_calls[target] += 1
        else:
            open_calls[target] -= 1
            per[target][what] += 1
    for target, n in open_calls.items():
        if n > 0:  # started, never finished: crashed or raised something uncaught
            per[target]["unfinished"] += n
    return per


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--calls", type=int, default=20_000, help="about this many calls in all")
    ap.add_argument("--workers", type=int, default=2, help="child processes, one after another per round")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", type=Path, help="also write the summary here")
    a = ap.parse_args(argv)
    rounds = max(1, a.workers)
    per_round = max(1, a.calls // (rounds * (N_TARGETS + 2)))  # examples per target per child
    t0 = time.perf_counter()
    totals: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)
    crashes, uncaught, failures = 0, 0, []
    with tempfile.TemporaryDirectory() as d:
        for r in range(rounds):
            report = Path(d) / f"report-{r}.txt"
            report.touch()
            code, tail = run_worker(per_round, report, a.seed + r)
            if code < 0:
                crashes += 1
                failures.append(f"child {r}: killed by signal {-code}\n{tail}")
            elif code != 0:
                uncaught += 1
                failures.append(f"child {r}: exit {code}\n{tail}")
            for target, c in count(report).items():
                totals[target].update(c)
    calls = sum(sum(v for k, v in c.items()) for c in totals.values())
    summary = {
        "calls": calls,
        "ok": sum(c["ok"] for c in totals.values()),
        "clear_errors": sum(c["clear"] for c in totals.values()),
        "nonfinite_results": sum(c["nonfinite"] for c in totals.values()),
        "unfinished_calls": sum(c["unfinished"] for c in totals.values()),
        "children_with_uncaught_exceptions": uncaught,
        "children_crashed": crashes,
        "seconds": round(time.perf_counter() - t0, 1),
        "per_target": {t: dict(c) for t, c in sorted(totals.items())},
    }
    print(f"calls {summary['calls']:,}  ok {summary['ok']:,}  clear errors {summary['clear_errors']:,}  "
          f"NaN/inf results {summary['nonfinite_results']}  unfinished {summary['unfinished_calls']}  "
          f"children with uncaught exceptions {uncaught}  crashes {crashes}  ({summary['seconds']} s)")
    for t, c in summary["per_target"].items():
        print(f"  {t:16s} " + "  ".join(f"{k} {v}" for k, v in sorted(c.items())))
    for f in failures:
        print("\n" + f)
    if a.json:
        a.json.write_text(json.dumps(summary, indent=2) + "\n")
    return summary


if __name__ == "__main__":
    main()
