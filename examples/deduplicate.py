"""Find the planted rescans and crops in the invented Harrowmere Valley archive.

Invented data (generated). Writes a plan (keep/drop lists, groups) into a
folder; nothing is removed from the memory or from any file.

    python examples/deduplicate.py                 # 4000 photos, plan in ./dedup-plan
    python examples/deduplicate.py 200 /tmp/plan   # toy size
"""

import sys

import numpy as np

import densemem
from densemem.cli.demo import make_archive
from densemem.duplicates import plan_duplicates


def main(n_photos: int = 4000, out: str = "dedup-plan") -> None:
    archive = make_archive(n_photos, seed=0)
    memory = densemem.DenseMemory.from_array(archive.vectors, archive.ids, normalize=True)
    plan = plan_duplicates(memory, threshold=0.95)
    planted = int(np.sum(archive.kind != "original"))
    print(f"invented archive: {len(memory)} scans, {planted} planted rescans/crops")
    print(f"{plan.n_groups} groups; {plan.drop_ids.size} scans could be dropped")
    for g in plan.groups[:5]:
        print(f"  keep {g.representative}: group {', '.join(map(str, g.ids))} (lowest cos to kept "
              f"{g.similarities.min():.3f})")
    files = plan.write(out, overwrite=True)
    print("plan files:", ", ".join(sorted(files.values())))


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4000, sys.argv[2] if len(sys.argv) > 2 else "dedup-plan")
