"""The scripts in examples/ run at toy size (invented archive data).

A smoke test of the user-facing scripts: they run end to end and print their report lines.
The numbers they print come from library calls whose results are checked against outside
references elsewhere (faiss exact search in test_dense.py and test_duplicates.py, scipy in
test_tuning.py); the invented demo data is not itself a reference.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path


EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
SCRIPTS = {"retrieve_and_blend.py": "faiss exact nearest", "tune_beta.py": "separation",
           "deduplicate.py": "groups;"}


def test_examples_run_at_toy_size(tmp_path):
    present = {s: m for s, m in SCRIPTS.items() if (EXAMPLES / s).is_file()}
    assert present == SCRIPTS, f"missing example scripts: {sorted(set(SCRIPTS) - set(present))}"
    # the examples import the densemem of this checkout, not whichever one is installed
    env = {**os.environ, "PYTHONWARNINGS": "ignore", "PYTHONPATH": str(EXAMPLES.parent)}
    procs = {s: subprocess.Popen([sys.executable, str(EXAMPLES / s), "150", str(tmp_path / "plan")], cwd=tmp_path,
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
             for s in present}
    for s, p in procs.items():
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0, (s, err)
        assert "invented archive" in out and present[s] in out
    if "deduplicate.py" in present:
        assert (tmp_path / "plan" / "keep.txt").is_file()
