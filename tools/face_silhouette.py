"""How well the K scan's stable-face matrix separates a demo store's true classes, apart from any fit: per DEMO_OUT
(objects.h5, scenes/truth_full.csv) the matrix over every object as ``tools/k_rules.py`` computes and caches it
(``seeding.FaceDistance``, the default config's clustering settings; DEMO_OUT/k_matrix.npz), then the share of objects
whose nearest object is of their class (1-NN), the mean share of their 5 nearest that are, and the silhouette of the
true classes on it (``sklearn.metrics.silhouette_score``, precomputed, the matrix made symmetric by its lesser
direction).  Used to compare two ingests of the same scenes (README "Both on, measured together").  Not a test: a few
seconds per store (the matrix), once.

    PYTHONPATH=.:tools python tools/face_silhouette.py DEMO_OUT [DEMO_OUT ...]
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from sklearn.metrics import silhouette_score

from k_rules import face_matrix   # tools/ is sys.path[0] when run as a script


def main(folders: list[str]) -> None:
    for f in folders:
        S, lab = face_matrix(Path(f))
        D = np.asarray(S, np.float64)
        D = np.minimum(D, D.T)
        np.fill_diagonal(D, np.inf)
        ok = np.flatnonzero(lab != "?")
        nn = np.argsort(D, axis=1, kind="stable")
        one = float(np.mean(lab[nn[ok, 0]] == lab[ok]))
        five = float(np.mean(lab[nn[ok, :5]] == lab[ok][:, None]))
        np.fill_diagonal(D, 0.0)
        sil = float(silhouette_score(D[np.ix_(ok, ok)], lab[ok], metric="precomputed"))
        print(f"{f}: {len(ok)} objects, 1-NN {one:.3f}, 5-NN share {five:.3f}, silhouette of the true classes {sil:.3f}")


if __name__ == "__main__":
    if len(sys.argv) < 2:
        sys.exit(__doc__)
    main(sys.argv[1:])
