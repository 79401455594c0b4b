"""Whether a demo's mined pose errors are the search's or the distance's: for every mined member whose rotation error
is above 20 degrees (``mine.evaluate``: one offset O per cluster, modulo the truth's symmetry group), the member
searched (yaw x scale, ``posesearch.pose_distances``) against its prototype's tilted copy (``tilts.TiltBank.copy_at``)
at two up directions in the prototype's frame: the one its mined pose gives, R_pred^T up, and the one its true pose
gives, (R_true g O^T)^T up (g: the truth group's element nearest the mined pose).

- the true up's distance lower ("search"): the search missed a better pose (the tilt grid, the refinement);
- higher ("distance"): the distance itself prefers the wrong pose against this prototype; with ``--refit`` the
  prototypes are fitted again from the library's (``engine.PoseKMeans`` with ``init``, one restart) with every member
  and without those members, and the two ups compared against each: a ratio that falls to about 1 without them says
  the wrong members had shaped the prototype towards their own pose (a prototype's frame is matched back to the library's by the yaw search of one
  prototype against the other).

    PYTHONPATH=. python tools/flip_check.py DEMO_OUT [CONFIG] [--refit]

Every copy is resampled (``copy_at``), the +z one too; the tilt search itself compares a member at the identity tilt
with the prototype as it is (``TiltBank._build``), so for a member with either up at +z the two can disagree (README
"Where the mined pose tail is now").

DEMO_OUT is a `protomine demo` folder (library.h5, objects.h5, scenes/truth_full.csv); CONFIG the demo's --config.
Not a test: about a minute (three more with --refit).
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from protomine.audit.metrics import AboutZ, rotation_error_deg
from protomine.config import load_config
from protomine.ingest.store import ObjectStore
from protomine.mine.engine import ArraySource, PoseKMeans
from protomine.mine.evaluate import cluster_rotation_offsets, majority_map, read_truth_table, truth_group
from protomine.mine.library import read_library
from protomine.mine.pipeline import clustering_config, reweight_free, store_aspect, tilt_grid
from protomine.mine.posesearch import pose_distances
from protomine.mine.tilts import TiltBank
from protomine.rotations import geodesic_deg, quat_to_matrix, yaw_matrix

BIG_DEG = 20.0


def tail_members(lib, truth, offsets, maj) -> list[tuple[int, float, np.ndarray, np.ndarray]]:
    """(member row, rotation error, up in the prototype frame from the mined pose, from the true pose) of every mined
    member of its cluster's majority class with an error above BIG_DEG."""
    m, out = lib.members, []
    for i, (oid, k, q) in enumerate(zip(m["object"], m["cluster"], m["rotation"])):
        t = truth.get(oid)
        if t is None or k not in offsets or t["rotation"] is None or t["up"] is None or t["label"] != maj.get(k):
            continue
        O, group = offsets[k][0], truth_group(t)
        Rp, Rt = quat_to_matrix(np.asarray(q)[None])[0], quat_to_matrix(t["rotation"][None])[0]
        err = float(rotation_error_deg(Rp[None], Rt[None], O, group)[0])
        if err <= BIG_DEG:
            continue
        if group is None or isinstance(group, AboutZ):   # continuous about z: every 5 degrees of turn about z
            Z = yaw_matrix(np.arange(0.0, 360.0, 5.0))
            reps = np.eye(3)[None] if group is None else np.asarray(group.reps).reshape(-1, 3, 3)
            G = (Z[:, None] @ reps[None]).reshape(-1, 3, 3)
        else:
            G = group
        cands = Rt[None] @ G @ O.T                            # world <- prototype frame, as the truth poses it
        Rs = cands[int(np.argmin(geodesic_deg(Rp[None], cands)))]
        up = t["up"] / np.linalg.norm(t["up"])
        out.append((i, err, Rp.T @ up, Rs.T @ up))
    return out


def distances(P, V, aspect, scales, grid, x, w, k, ups, turn_deg=0.0) -> list[float]:
    """The member x (C, R, A, H), w (R, A, H) searched against prototype k tilted to each up (the frame turned by
    -turn_deg about z first)."""
    bank = TiltBank(P, V, aspect, scales, grid)
    Rz = yaw_matrix(-turn_deg)
    out = []
    for u in ups:
        Pc, Vc = bank.copy_at(k, Rz @ u)
        out.append(float(pose_distances(x[None], w[None], Pc[None], Vc[None], scales=scales).D[0, 0]))
    return out


def main(out: Path, config: str | None, refit: bool) -> None:
    cfg = load_config(config)
    lib, store = read_library(out / "library.h5"), ObjectStore(out / "objects.h5")
    truth = read_truth_table(out / "scenes" / "truth_full.csv")
    offsets, maj = cluster_rotation_offsets(lib, truth), majority_map(lib, truth)
    scales, grid = tuple(cfg["mine"]["scales"]), tilt_grid(cfg)
    m = lib.members
    rows = np.array([store.index_of(o) for o in m["object"]])
    X, W = store.source(cfg).read(0, len(store))
    tail = tail_members(lib, truth, offsets, maj)
    P, V, A = lib.prototypes["features"], lib.prototypes["weights"], lib.prototypes["aspect"]
    fits = [("library", P, V, A, np.zeros(lib.n_clusters))]
    if refit and tail:
        mm, ccfg = cfg["mine"], clustering_config(cfg)
        Xc, Wc = store.source(ccfg).read(0, len(store))
        aspect = store_aspect(store, cfg)
        without = np.ones(len(rows), bool)
        without[[i for i, *_ in tail]] = False
        for name, keep in (("refit with them", np.ones(len(rows), bool)), ("refit without them", without)):
            model = PoseKMeans(n_clusters=lib.n_clusters, scales=scales, n_init=1, max_iter=mm["max_iter"], tol=mm["tol"],
                               random_state=0, tilts=grid, pose_sync=bool(mm.get("pose_sync", False)),
                               symmetry_factor=mm["symmetry_factor"], symmetry_tol=mm["symmetry_tol"], init=(P, V, A))
            model.fit(ArraySource(Xc[rows[keep]], Wc[rows[keep]], aspect[rows[keep]]))
            reweight_free(model, cfg)
            same = float(np.mean(model.labels_ == np.asarray(m["cluster"])[keep]))
            frame = pose_distances(P, V, model.prototypes_, model.prototype_weights_, scales=(1.0,))
            turn = np.array([frame.yaw_deg[k, k] for k in range(lib.n_clusters)])
            fits.append((f"{name} (labels as mined: {same:.2f})", model.prototypes_, model.prototype_weights_,
                         model.aspect_, turn))
    print(f"{out}: {len(tail)} mined members above {BIG_DEG:.0f} deg")
    for name, Pf, Vf, Af, turn in fits:
        print(f"  {name}: distance at the true up / at the mined up")
        ratios = []
        for i, err, u_pred, u_true in tail:
            k, oid = int(m["cluster"][i]), m["object"][i]
            d_pred, d_true = distances(Pf, Vf, Af, scales, grid, X[rows[i]], W[rows[i]], k, (u_pred, u_true), turn[k])
            ratios.append(d_true / d_pred)
            ang = np.rad2deg(np.arccos(np.clip(u_pred @ u_true, -1.0, 1.0)))
            print(f"    {oid:14s} {truth[oid]['label']:13s} face {truth[oid]['face']:>2s} error {err:5.1f}, ups {ang:5.1f} apart: "
                  f"{d_true:.4f} / {d_pred:.4f} = {d_true / d_pred:.3f} ({'search' if d_true < d_pred else 'distance'})")
        if ratios:
            r = np.array(ratios)
            print(f"    search {int(np.sum(r < 1))}, distance {int(np.sum(r >= 1))}; ratio median {np.median(r):.3f}, "
                  f"within 10% of a tie {int(np.sum(np.abs(r - 1) <= 0.1))}")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    if not args:
        sys.exit(__doc__)
    main(Path(args[0]), args[1] if len(args) > 1 else None, "--refit" in sys.argv)
