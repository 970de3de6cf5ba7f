"""Start-up cost: ``import densemem`` beyond NumPy, and the first use of the main names.

Target (issue: fast start): ``import densemem`` at most 0.3 s beyond ``import numpy``.
Each figure is the median over fresh interpreters (``python -X importtime`` is not used:
it slows every import it reports). Prints one table, then the ratio line last.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
from pathlib import Path

REPEATS = 7
CASES = {
    "numpy": "import numpy",
    "numpy + densemem": "import numpy, densemem",
    "+ DenseMemory": "import numpy, densemem; densemem.DenseMemory",
    "+ every public name": "import numpy, densemem; [getattr(densemem, n) for n in densemem.__all__]",
}


def _seconds(code: str) -> float:
    timer = f"import time; t = time.perf_counter(); {code}; print(time.perf_counter() - t)"
    out = subprocess.run([sys.executable, "-c", timer], capture_output=True, text=True, check=True)
    return float(out.stdout.strip())


def main() -> dict[str, float]:
    med = {name: statistics.median(_seconds(code) for _ in range(REPEATS)) for name, code in CASES.items()}
    print(f"{'case':<24} {'median s':>9}")
    for name, s in med.items():
        print(f"{name:<24} {s:9.3f}")
    beyond = med["numpy + densemem"] - med["numpy"]
    out = Path(__file__).parent / "results" / "import_time.json"
    out.parent.mkdir(exist_ok=True)
    out.write_text(json.dumps({"median_seconds": med, "beyond_numpy": beyond}, indent=2))
    print(f"import densemem beyond numpy: {beyond:.3f} s (target <= 0.300)")
    return med


if __name__ == "__main__":
    main()
