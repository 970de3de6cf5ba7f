"""Tune beta for the invented Harrowmere Valley archive (generated data).

Measures how separated the stored scans are, what beta theory asks for, and
the smallest beta that retrieves noisy copies sharply.

    python examples/tune_beta.py          # 4000 photos
    python examples/tune_beta.py 200      # toy size
"""

import sys

import densemem
from densemem.cli.demo import make_archive
from densemem.tuning import TuneSpec, format_report, tune_beta


def main(n_photos: int = 4000) -> None:
    archive = make_archive(n_photos, seed=0, rescan_rate=0.0, crop_rate=0.0)  # originals only
    originals = archive.kind == "original"
    memory = densemem.DenseMemory.from_array(archive.vectors[originals], archive.ids[originals], normalize=True)
    report = tune_beta(memory, TuneSpec(n_betas=10, n_queries=64, level=0.3, target="sharp"))
    print(f"invented archive: {len(memory)} photos\n")
    print(format_report(report))
    if report.choice is not None and report.choice.beta is not None:
        memory.beta = report.choice.beta
        print(f"\nmemory.beta set to {memory.beta:.4g}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4000)
