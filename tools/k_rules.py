"""The K scan's group-count rules side by side on demo folders' stores (README "Choosing K on other classes"): for each
DEMO_OUT (objects.h5, scenes/truth_full.csv) the stable-face pose distance matrix over every object, as the K scan
computes it (``seeding.FaceDistance``, the default config's clustering settings; cached in DEMO_OUT/k_matrix.npz),
then the K each rule counts against the true class count: groups of at least 4 / at least 5 of the mutual
4-nearest-neighbour graph on the objects the outlier fence keeps (``choosek.group_count``), groups of at least 5
counted over every object (``choosek.face_group_count`` with ``count_outlying``), and scikit-learn's HDBSCAN
(min_cluster_size 4, precomputed distances).  Prints one line per store and each rule's count of stores with K within
one of the truth and exactly right.  Not a test: a few seconds per store (the matrix), once.

    PYTHONPATH=. python tools/k_rules.py DEMO_OUT [DEMO_OUT ...]
"""
from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np
from sklearn.cluster import HDBSCAN

from protomine.config import load_config
from protomine.ingest.sharded import open_store
from protomine.mine.choosek import face_group_count, group_count
from protomine.mine.engine import _gather
from protomine.mine.evaluate import read_truth_table
from protomine.mine.pipeline import clustering_config, store_aspect, tilt_grid
from protomine.mine.seeding import FaceDistance, outlying, pairwise_pose_distances


def face_matrix(demo: Path) -> tuple[np.ndarray, np.ndarray]:
    cache = demo / "k_matrix.npz"
    if cache.exists():
        z = np.load(cache)
        return z["S"], z["lab"]
    cfg = clustering_config(load_config(None))
    store = open_store(demo / "objects.h5")
    scales = tuple(cfg["mine"]["scales"])
    x, w = _gather(store.source(cfg), np.arange(len(store)), 2048)
    S = pairwise_pose_distances(x, w, FaceDistance(store_aspect(store, cfg), scales, tilt_grid(cfg)), scales=scales)
    truth = read_truth_table(demo / "scenes" / "truth_full.csv")
    lab = np.array([truth[o]["label"] if o in truth else "?" for o in store.ids])
    np.savez(cache, S=S, lab=lab)
    return S, lab


def main(folders: list[str]) -> None:
    warnings.filterwarnings("ignore", category=FutureWarning)
    rules = ("groups>=4", "groups>=5", "groups>=5 all", "HDBSCAN 4")
    errs = {r: [] for r in rules}
    for f in folders:
        S, lab = face_matrix(Path(f))
        true_k = len(set(lab[lab != "?"]))
        keep = ~outlying(S)
        ks = (group_count(S[np.ix_(keep, keep)], 4), group_count(S[np.ix_(keep, keep)], 5),
              face_group_count(S, keep, 5, True),
              len(set(HDBSCAN(min_cluster_size=4, metric="precomputed").fit(S.astype(np.float64)[np.ix_(keep, keep)]).labels_) - {-1}))
        for r, k in zip(rules, ks):
            errs[r].append(abs(k - true_k))
        print(f"{f}: {len(S)} objects, {int((~keep).sum())} outlying, {true_k} classes; "
              + ", ".join(f"{r} {k}" for r, k in zip(rules, ks)), flush=True)
    for r in rules:
        e = np.array(errs[r])
        print(f"{r:14s} K within 1: {int((e <= 1).sum())} / {len(e)}, exact: {int((e == 0).sum())}")


if __name__ == "__main__":
    main(sys.argv[1:])
