"""Search problem or feature problem?  Same-class pairs in different poses at the searched vs the TRUE tilt.

    PYTHONPATH=. python tools/true_tilt.py DEMO_OUT [--config default] [--sensitivity]

DEMO_OUT is a `protomine demo` folder (objects.h5, scenes/truth_full.csv).  For every pair of stored objects the
tilt x yaw x scale distance of the pipeline's search (``mine.tilts.tilt_pose_distances``, each object against all
others as prototypes); for same-class pairs resting on different faces also the distance at the true relative
tilt (from the truth rotations and each object's frame, ``geometry.plane_basis``; yaw and scale still searched).
Printed: the figures of ``tools/size_normalisation.py`` (nearest neighbour, cross-face nearest neighbour,
average-linkage NMI at the true K) with the searched distances and with the true tilt where it is lower (an
oracle for same-class pairs only, so an upper bound), and with ``--sensitivity`` how much a pair's distance
grows when the tilt is 3 / 6 / 10 / 15 degrees off the true one.  Not a test: it runs a minute or more.
"""
from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from size_normalisation import figures  # noqa: E402

from protomine import rotations as rot  # noqa: E402
from protomine.config import load_config  # noqa: E402
from protomine.geometry import plane_basis  # noqa: E402
from protomine.ingest.sharded import open_store  # noqa: E402
from protomine.mine.posesearch import pose_distances  # noqa: E402
from protomine.mine.tilts import TiltBank, TiltGrid, grid_aspect, tilt_pose_distances  # noqa: E402


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("demo_out", type=Path)
    ap.add_argument("--config", default="default")
    ap.add_argument("--sensitivity", action="store_true")
    a = ap.parse_args(argv)
    cfg = load_config(a.config)
    st = open_store(a.demo_out / "objects.h5")
    with open(a.demo_out / "scenes" / "truth_full.csv", newline="") as fh:
        truth = {r["object"]: r for r in csv.DictReader(fh)}
    ids = [str(o) for o in st.ids]
    idx = np.flatnonzero([o in truth for o in ids])
    cls = np.array([truth[ids[i]]["class"] for i in idx])
    face = np.array([truth[ids[i]]["face"] if truth[ids[i]].get("tumbled") == "1" else "upright" for i in idx])
    X, W = st.source(cfg).read(0, len(st))
    X, W = X[idx], W[idx]
    v, m = cfg["volume"], cfg["mine"]
    grid = TiltGrid(nsides=tuple(m["tilt_nsides"]), radial_margin=float(v["radial_margin"]),
                    height_margin=float(v["height_margin"]), refine_top=int(m["tilt_refine_top"]))
    scales = tuple(m["scales"])
    asp = grid_aspect(st.objects["radius_m"][idx], st.objects["height_m"][idx], grid.radial_margin, grid.height_margin)
    D = tilt_pose_distances(X, W, X, W, aspect=asp, scales=scales, grid=grid).D
    q = np.array([[float(truth[ids[i]][k]) for k in ("qx", "qy", "qz", "qw")] for i in idx])
    G = np.stack([plane_basis(u) for u in st.objects["up"][idx]]) @ rot.quat_to_matrix(q)  # object frame <- model
    bank = TiltBank(X, W, asp, scales, TiltGrid(nsides=(1,), radial_margin=grid.radial_margin,
                                                height_margin=grid.height_margin))
    N = len(idx)
    Dt = np.full((N, N), np.inf)
    rng = np.random.default_rng(0)
    offsets = (3.0, 6.0, 10.0, 15.0)
    growth = {"cross": [], "same": []}
    for i in range(N):
        for j in range(N):
            if i == j or cls[i] != cls[j]:
                continue
            u = (G[i] @ G[j].T).T @ np.array([0.0, 0.0, 1.0])  # prototype j's direction that points up in i
            ups = [u]
            if a.sensitivity:
                for deg in offsets:
                    w = rng.normal(size=3)
                    w -= (w @ u) * u
                    w /= np.linalg.norm(w)
                    ups.append(np.cos(np.deg2rad(deg)) * u + np.sin(np.deg2rad(deg)) * w)
            pc, vc = bank.copies_at(j, np.array(ups))
            d = pose_distances(X[i:i + 1], W[i:i + 1], pc, vc, scales=scales).D[0]
            if face[i] != face[j]:
                Dt[i, j] = d[0]
            if a.sensitivity and np.isfinite(d[0]) and d[0] > 0:
                growth["cross" if face[i] != face[j] else "same"].append(d[1:] / d[0])
    for name, M in (("searched", D), ("true tilt (oracle)", np.fmin(D, Dt))):
        f = figures(M.copy(), cls, face)
        print(f"{name:18s} nearest neighbour {f['nn']:.3f}, cross-face nearest neighbour {f['cross_face_nn']:.3f} "
              f"({f['n_cross']} objects), average-linkage NMI at true K {f['nmi']:.3f}")
    for kind, g in growth.items():
        if g:
            med = np.median(np.array(g), axis=0)
            print(f"{kind}-face pairs ({len(g)}): distance x " + ", ".join(f"{m_:.2f} at {d_:.0f} deg" for d_, m_ in zip(offsets, med)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
