"""Retrieve and blend: faded prints against the invented Harrowmere Valley archive.

Invented data: the archive is fictional and its scan embeddings are generated
(see densemem.cli.demo). Large beta returns the print's photo; small beta returns
a blend of the photo's theme.

    python examples/retrieve_and_blend.py            # 4000 photos
    python examples/retrieve_and_blend.py 200        # toy size
"""

import sys

import numpy as np

import densemem
from densemem.cli.demo import THEMES, faded_prints, make_archive


def main(n_photos: int = 4000) -> None:
    archive = make_archive(n_photos, seed=0)
    memory = densemem.DenseMemory.from_array(archive.vectors, archive.ids, normalize=True)
    prints, source = faded_prints(archive, 5, seed=1)

    print(f"invented archive: {len(memory)} scans; 5 faded prints")
    for beta in (40.0, 10.0):
        result = memory.retrieve(prints, beta, k=3)
        states = result.states / np.linalg.norm(result.states, axis=1, keepdims=True)
        to_photo = np.einsum("ij,ij->i", states, archive.vectors[source])
        to_theme = np.einsum("ij,ij->i", states, archive.centres[archive.theme[source]])
        print(f"\nbeta = {beta:g}")
        for j in range(len(prints)):
            heaviest = ", ".join(f"{i} ({w:.2f})" for i, w in zip(result.top_ids[j], result.top_weights[j]))
            print(f"  print of {archive.ids[source[j]]} ({THEMES[archive.theme[source[j]]]}): "
                  f"cos to photo {to_photo[j]:.2f}, to theme {to_theme[j]:.2f}; heaviest: {heaviest}")

    nearest = memory.nearest(prints, k=1)
    print("\nfaiss exact nearest:", ", ".join(str(i) for i in nearest.ids[:, 0]))


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4000)
