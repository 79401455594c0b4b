"""Where a demo's pose errors are: the mined members' and the labelled single views' rotation errors (one offset per
cluster, modulo the truth class's symmetry about its own z, as ``mine.evaluate`` / ``label.evaluate``) broken down by
true class, resting face and whether the instance was tumbled; for every error above 20 degrees the residual rotation
D = R_true g (R_pred O)^T and what it is:

- "about up": D turns about the support normal (its axis within 30 degrees of up): a yaw error, e.g. a prototype read
  as continuous whose members' yaws are arbitrary;
- "shape symmetry": D is (within 15 degrees) a rotation symmetry of the class's own shape that the truth's symmetry
  (about z only) does not list, e.g. a spool lying on its side turned over, a mallet turned about its handle: the pose
  is physically right up to that much.  Tested on the demo's signed distance functions: E = (R_true g)^T R_pred O
  (class frame) with its angle rounded to the nearest multiple of 360/n (n = 2, 3, 4, 6; the nearest, if within 15
  degrees), turned about E's axis or one tipped from it by up to 7.5 degrees (a 5 x 5 grid) through the centroid of six random instances of the class (``demo_scenes.items``);
  a symmetry when the 95th percentile of |sdf| of the turned surface points exceeds the unturned points' by less than
  1% of the instance's size (median over the six);
- "other".

Also the clusters whose detected symmetry about up differs from the truth's, and the figures with the shape
symmetries counted as no error ("modulo the shape's own symmetry").

    PYTHONPATH=. python tools/pose_tail.py DEMO_OUT [LIBRARY] [LABELS]

DEMO_OUT is a `protomine demo` folder (library.h5, labels.jsonl, scenes/truth_full.csv).  Not a test: about a minute.
"""
from __future__ import annotations

import collections
import csv
import sys
from pathlib import Path

import numpy as np
import torch
from scipy.spatial.transform import Rotation

from demo_scenes.items import load_item_classes, make_instance
from protomine.audit.metrics import AboutZ, rotation_error_deg, yaw_about_up_error_deg
from protomine.mine.evaluate import (class_period, cluster_rotation_offsets, majority_map, read_truth_table,
                                     symmetry_code_of, truth_group)
from protomine.mine.library import read_library
from protomine.records import read_records
from protomine.rotations import geodesic_deg, quat_to_matrix

BIG_DEG = 20.0
UP_AXIS_DEG = 30.0
SHAPE_TOL = 0.01        # x the instance's size
N_INSTANCES = 6
GRID_M = 0.002
ROUND_DEG = 15.0


class ShapeSymmetry:
    """Whether a rotation E (3, 3) (class frame) is a symmetry of the class's shape (module docstring)."""

    def __init__(self) -> None:
        self.items = {it.name: it for it in load_item_classes()}
        self.cache: dict[str, list] = {}

    def _instances(self, name: str) -> list:
        if name not in self.cache:
            rng = np.random.default_rng(0)
            out = []
            for _ in range(N_INSTANCES):
                inst = make_instance(self.items[name], rng)
                sh = inst.shape
                axes = [np.arange(lo, hi, GRID_M) for lo, hi in zip(sh.lo, sh.hi)]
                g = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 3)
                v = sh(torch.tensor(g, dtype=torch.float32)).numpy()
                surf = g[np.abs(v) < 0.75 * GRID_M]
                surf = surf[:: max(1, len(surf) // 3000)]
                c = g[v < 0].mean(axis=0)
                base = np.percentile(np.abs(sh(torch.tensor(surf, dtype=torch.float32)).numpy()), 95)
                out.append((sh, c, surf, inst.size, base))
            self.cache[name] = out
        return self.cache[name]

    def is_symmetry(self, name: str, E: np.ndarray, about_z: bool = False) -> bool:
        """E (3, 3) with its angle rounded to the nearest 360/n turn (n = 2, 3, 4, 6; within ROUND_DEG) is a symmetry.
        ``about_z`` (a class continuous about its z): E is one of the coset E Rz(t), so a half turn is also tried about
        E's axis laid into the xy plane (the flip of a class symmetric about z and end for end, e.g. a spool)."""
        if about_z:
            rv = Rotation.from_matrix(E).as_rotvec()
            flat = np.array([rv[0], rv[1], 0.0])
            if np.linalg.norm(flat) > 1e-6 and self.is_symmetry(name, Rotation.from_rotvec(np.pi * flat / np.linalg.norm(flat)).as_matrix()):
                return True
        rv = Rotation.from_matrix(E).as_rotvec()
        ang = np.rad2deg(np.linalg.norm(rv))
        axis = rv / max(np.linalg.norm(rv), 1e-12)
        turns = [360.0 / n * k for n in (2, 3, 4, 6) for k in range(1, n)]
        ideal = min(turns, key=lambda a: abs(a - ang))
        if abs(ideal - ang) > ROUND_DEG:
            return False
        # the axis as measured carries the pose's own error: the least excess over axes tipped up to ROUND_DEG / 2
        u = np.cross(axis, [1.0, 0.0, 0.0] if abs(axis[0]) < 0.9 else [0.0, 1.0, 0.0])
        u /= np.linalg.norm(u)
        v = np.cross(axis, u)
        tips = np.deg2rad(np.linspace(-ROUND_DEG / 2, ROUND_DEG / 2, 5))
        best = np.inf
        for a in tips:
            for b in tips:
                ax = axis + np.tan(a) * u + np.tan(b) * v
                ax /= np.linalg.norm(ax)
                best = min(best, self.excess(name, Rotation.from_rotvec(np.deg2rad(ideal) * ax).as_matrix()))
                if best < SHAPE_TOL:
                    return True
        return False

    def excess(self, name: str, E: np.ndarray) -> float:
        vals = []
        for sh, c, surf, size, base in self._instances(name):
            q = (surf - c) @ E + c            # rows of E^T (p - c) + c
            d = np.abs(sh(torch.tensor(q, dtype=torch.float32)).numpy())
            vals.append((np.percentile(d, 95) - base) / size)
        return float(np.median(vals))


def pose_rows(items, lib, truth, offsets, maj, shapes: ShapeSymmetry) -> list[dict]:
    """items: (object, cluster, quaternion) of poses whose cluster's majority class is the object's true class."""
    rows = []
    for oid, k, q in items:
        t = truth.get(oid)
        if t is None or k not in offsets or t["rotation"] is None or t["label"] != maj.get(k):
            continue
        O, group = offsets[k][0], truth_group(t)
        Rp, Rt = quat_to_matrix(np.asarray(q)[None]), quat_to_matrix(t["rotation"][None])
        err = float(rotation_error_deg(Rp, Rt, O, group)[0])
        yaw = (float(yaw_about_up_error_deg(Rp, Rt, O, group, t["up"][None])[0])
               if class_period(t["symmetry"]) > 0 and t["up"] is not None else np.nan)
        kind = ""
        if err > BIG_DEG:
            A = Rp[0] @ O
            continuous = group is None or isinstance(group, AboutZ)
            if continuous:   # the nearest turn about z, as audit.metrics.yaw_about_up_error_deg (the identity rep)
                M = Rt[0].T @ A
                a = np.arctan2(M[0, 1] - M[1, 0], M[0, 0] + M[1, 1])
                g = Rotation.from_euler("z", a).as_matrix()
            else:
                g = group[int(np.argmin(geodesic_deg(A[None], Rt[0][None] @ group)))]
            B = Rt[0] @ g
            rv = Rotation.from_matrix(B @ A.T).as_rotvec()
            axis = rv / max(np.linalg.norm(rv), 1e-12)
            up = t["up"] / np.linalg.norm(t["up"])
            if shapes.is_symmetry(t["label"], B.T @ A, about_z=continuous):
                kind = "shape symmetry"
            elif abs(axis @ up) > np.cos(np.deg2rad(UP_AXIS_DEG)):
                kind = "about up"
            else:
                kind = "other"
        rows.append({"object": oid, "class": t["label"], "face": t["face"], "tumbled": t.get("tumbled", ""),
                     "rotation": err, "yaw": yaw, "kind": kind})
    return rows


def report(title: str, rows: list[dict]) -> None:
    if not rows:
        print(f"{title}: no poses with truth")
        return
    e = np.array([r["rotation"] for r in rows])
    y = np.array([r["yaw"] for r in rows])
    y = y[np.isfinite(y)]
    e_sym = np.where([r["kind"] == "shape symmetry" for r in rows], 0.0, e)
    kinds = collections.Counter(r["kind"] for r in rows if r["kind"])
    print(f"{title}: n {len(rows)}, rotation error p50 {np.median(e):.1f}, p90 {np.percentile(e, 90):.1f} deg; yaw about up "
          f"p50 {np.median(y):.1f}, p90 {np.percentile(y, 90):.1f} deg; above {BIG_DEG:.0f} deg: {int(np.sum(e > BIG_DEG))} "
          f"({', '.join(f'{k} {v}' for k, v in sorted(kinds.items()))}), above 150 deg: {int(np.sum(e > 150))}; "
          f"modulo the shape's own symmetry: p50 {np.median(e_sym):.1f}, p90 {np.percentile(e_sym, 90):.1f} deg")
    groups = collections.defaultdict(list)
    for r in rows:
        groups[(r["class"], r["face"], r["tumbled"])].append(r)
    for (cls, face, tumbled), rs in sorted(groups.items()):
        big = [r for r in rs if r["kind"]]
        if not big:
            continue
        ek = np.array([r["rotation"] for r in rs])
        c = collections.Counter(r["kind"] for r in big)
        print(f"  {cls:14s} face {face or '-':>2s} {'tumbled' if tumbled == '1' else 'upright':8s} n {len(rs):2d}: "
              f"p50 {np.median(ek):5.1f}, above {BIG_DEG:.0f}: {len(big)} ({', '.join(f'{k} {v}' for k, v in sorted(c.items()))}): "
              + " ".join(f"{r['rotation']:.0f}" for r in big))


def main(out: Path, library: Path, labels: Path) -> None:
    truth = read_truth_table(out / "scenes" / "truth_full.csv")
    with open(out / "scenes" / "truth_full.csv", newline="") as fh:
        for r in csv.DictReader(fh):
            if r["object"] in truth:
                truth[r["object"]]["tumbled"] = r.get("tumbled", "")
    lib = read_library(library)
    offsets = cluster_rotation_offsets(lib, truth)
    maj = majority_map(lib, truth)
    m = lib.members
    for k in range(lib.n_clusters):
        lab = maj.get(k)
        if lab is None:
            continue
        code = symmetry_code_of(next(t["symmetry"] for t in truth.values() if t["label"] == lab))
        if int(lib.prototypes["symmetry"][k]) != code:
            print(f"cluster {k} ({lab}): symmetry about up detected {int(lib.prototypes['symmetry'][k])}, true {code} "
                  f"(0 continuous, 1 none, n n-fold)")
    shapes = ShapeSymmetry()
    report("mined", pose_rows(zip(m["object"], m["cluster"], m["rotation"]), lib, truth, offsets, maj, shapes))
    if labels.is_file():
        recs = [r for r in read_records(labels) if r.get("cluster") is not None and r.get("rotation") is not None]
        report("single views (named right)", pose_rows(((r["object"], int(r["cluster"]), r["rotation"]) for r in recs),
                                                       lib, truth, offsets, maj, shapes))


if __name__ == "__main__":
    if len(sys.argv) < 2:
        sys.exit(__doc__)
    d = Path(sys.argv[1])
    main(d, Path(sys.argv[2]) if len(sys.argv) > 2 else d / "library.h5",
         Path(sys.argv[3]) if len(sys.argv) > 3 else d / "labels.jsonl")
