"""Size normalisation across resting faces, measured: which way should tilted copies be sized?

    PYTHONPATH=. python tools/size_normalisation.py DEMO_OUT [--config default] [--store objects.h5]

DEMO_OUT is a `protomine demo` folder (objects.h5 and scenes/truth_full.csv; the default scenario tumbles half
of the instances).  Two options, same features, same tilt x yaw x scale search (`mine.tilts`):

- per-face: every volume is normalised by its own footprint radius and height (as stored), and every tilted
  copy of a prototype is re-normalised by the footprint and height it has in that pose (what the pipeline does);
- invariant: every volume is re-gridded to one rotation-invariant size, the bounding radius S of its surface
  cells about their centroid (rho_max = 1.15 S, z_max = 2.2 S: the object fits in any pose), and tilted copies
  keep that extent (only re-based: lowest point on the plane, footprint circle centred).

Figures per option, from the objects' pairwise pose-minimised distances (each object against all others as
prototypes): nearest-neighbour accuracy (the nearest other object is of the same class), cross-face
nearest-neighbour accuracy (for objects whose class also rests on another face in the scene: the nearest among
the others that do not rest on the same face of the same class is of its own class), and the NMI of average
linkage (scipy) cut at the true number of classes (scikit-learn NMI).  Not a test: it runs minutes.
"""
from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

import numpy as np
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.spatial.distance import squareform
from sklearn.metrics import normalized_mutual_info_score

from protomine.config import load_config
from protomine.ingest.sharded import open_store
from protomine.mine import tilts
from protomine.mine.tilts import TiltGrid, grid_aspect, sample_volumes, tilt_pose_distances

INV_RADIAL, INV_HEIGHT = 1.15, 2.2   # invariant grid: rho_max = 1.15 S, z_max = 2.2 S


def invariant_regrid(vol: np.ndarray, X: np.ndarray, W: np.ndarray, radius: np.ndarray, height: np.ndarray,
                     rm: float, hm: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Features X (N, C, R, A, H), weights W re-gridded from each object's own grid (rho_max = rm r, z_max = hm h)
    to the invariant one; returns X', W' and S (N,) metres."""
    N, C, R, A, H = X.shape
    Xo, Wo, S = np.zeros_like(X), np.zeros_like(W), np.zeros(N)
    for i in range(N):
        rho_max, z_max = rm * radius[i], hm * height[i]
        rho = (np.arange(R) + 0.5) / R * rho_max
        phi = (np.arange(A) + 0.5) / A * 2 * np.pi
        z = (np.arange(H) + 0.5) / H * z_max
        rr, pp, zz = np.meshgrid(rho, phi, z, indexing="ij")
        pts = np.stack([rr * np.cos(pp), rr * np.sin(pp), zz], -1).reshape(-1, 3)
        w = (vol[i, 0] * (vol[i, 2] > 0)).reshape(-1)
        keep = w > 0.4
        p = pts[keep] if keep.sum() >= 4 else pts
        S[i] = np.max(np.linalg.norm(p - p.mean(axis=0), axis=1))
        # the invariant grid's cell centres, sampled in the object's own grid
        rho2 = (np.arange(R) + 0.5) / R * INV_RADIAL * S[i]
        z2 = (np.arange(H) + 0.5) / H * INV_HEIGHT * S[i]
        rr, pp, zz = np.meshgrid(rho2, phi, z2, indexing="ij")
        q = np.stack([rr * np.cos(pp), rr * np.sin(pp), zz], -1).reshape(-1, 3)
        stack = np.concatenate([W[i][None], W[i][None] * X[i]])[None].astype(np.float32)  # (1, 1 + C, R, A, H)
        out = sample_volumes(stack, q[None], [rho_max], [z_max])[0].numpy()  # (1 + C, R A H): [w, w x]
        v, wx = out[0], out[1:]
        Wo[i] = v.reshape(R, A, H)
        Xo[i] = np.where(v > 1e-6, wx / np.maximum(v, 1e-6), 0.0).reshape(C, R, A, H)
    return Xo, Wo, S


def _fixed_extent(orig):
    """copy_geometries that keep the prototype's own extent (invariant sizing): only re-based."""
    def copy_geometries(shape, aspect, ups, grid, solid):
        return [tilts.CopyGeometry(g.M, g.c0, g.base, 1.0, float(aspect)) for g in orig(shape, aspect, ups, grid, solid)]
    return copy_geometries


def figures(D: np.ndarray, cls: np.ndarray, face: np.ndarray) -> dict:
    N = len(D)
    D = np.where(np.isfinite(D), D, np.inf)
    np.fill_diagonal(D, np.inf)
    nn = np.argmin(D, axis=1)
    acc = float(np.mean(cls[nn] == cls))
    cross = []
    for i in range(N):
        same_cls = cls == cls[i]
        if not np.any(same_cls & (face != face[i])):
            continue
        allowed = ~(same_cls & (face == face[i]))
        allowed[i] = False
        j = int(np.argmin(np.where(allowed, D[i], np.inf)))
        cross.append(cls[j] == cls[i])
    Ds = np.minimum(D, D.T)
    fin = np.isfinite(Ds)
    Ds = np.where(fin, Ds, Ds[fin & ~np.eye(N, dtype=bool)].max() * 2)
    np.fill_diagonal(Ds, 0.0)
    K = len(set(cls))
    lab = fcluster(linkage(squareform(Ds, checks=False), "average"), K, "maxclust")
    return {"nn": acc, "cross_face_nn": float(np.mean(cross)) if cross else float("nan"), "n_cross": len(cross),
            "nmi": float(normalized_mutual_info_score(cls, lab))}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("demo_out", type=Path)
    ap.add_argument("--config", default="default")
    ap.add_argument("--store", default="objects.h5", help="store in DEMO_OUT to measure on (new_scans.h5: the single views)")
    a = ap.parse_args(argv)
    cfg = load_config(a.config)
    st = open_store(a.demo_out / a.store)
    with open(a.demo_out / "scenes" / "truth_full.csv", newline="") as fh:
        truth = {r["object"]: r for r in csv.DictReader(fh)}
    ids = [str(o) for o in st.ids]
    keep = np.array([o in truth for o in ids])
    idx = np.flatnonzero(keep)
    cls = np.array([truth[ids[i]]["class"] for i in idx])
    # the resting face: the truth face index of tumbled instances, "upright" otherwise
    face = np.array([f"{truth[ids[i]]['face']}" if truth[ids[i]].get("tumbled") == "1" else "upright" for i in idx])
    X, W = st.source(cfg).read(0, len(st))
    X, W = X[idx], W[idx]
    vol = st.read_volumes(0, len(st))[idx]
    radius, height = st.objects["radius_m"][idx], st.objects["height_m"][idx]
    v = cfg["volume"]
    rm, hm = float(v["radial_margin"]), float(v["height_margin"])
    grid = TiltGrid(nsides=tuple(cfg["mine"]["tilt_nsides"]), radial_margin=rm, height_margin=hm,
                    refine_top=int(cfg["mine"]["tilt_refine_top"]))
    scales = tuple(cfg["mine"]["scales"])
    out = {}
    asp = grid_aspect(radius, height, rm, hm)
    D = tilt_pose_distances(X, W, X, W, aspect=asp, scales=scales, grid=grid).D
    out["per-face"] = figures(D, cls, face)
    Xi, Wi, _ = invariant_regrid(vol, X, W, radius, height, rm, hm)
    orig = tilts.copy_geometries
    tilts.copy_geometries = _fixed_extent(orig)  # the banks' geometries (kept across banks: cleared around it)
    tilts._GEOMETRY_CACHE.clear()
    try:
        D = tilt_pose_distances(Xi, Wi, Xi, Wi, aspect=np.full(len(Xi), INV_HEIGHT / INV_RADIAL), scales=scales, grid=grid).D
    finally:
        tilts.copy_geometries = orig
        tilts._GEOMETRY_CACHE.clear()
    out["invariant"] = figures(D, cls, face)
    print(f"{len(idx)} objects, {len(set(cls))} classes, {int(np.sum(face != 'upright'))} tumbled; "
          f"tilts {grid.nsides}")
    for k, f in out.items():
        print(f"{k:10s} nearest neighbour {f['nn']:.3f}, cross-face nearest neighbour {f['cross_face_nn']:.3f} "
              f"({f['n_cross']} objects), average-linkage NMI at true K {f['nmi']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
