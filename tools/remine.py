"""Mine a demo folder's store again and print the demo's mining figures, with [mine] keys or engine constants
overridden, and (``--common``) the pose tail on the members that every given library counts.

    PYTHONPATH=. python tools/remine.py DEMO_OUT CONFIG|- SEED OUT_DIR [key=value ...] [E.CONSTANT=value ...]
    PYTHONPATH=. python tools/remine.py DEMO_OUT --common LIBRARY.h5 LIBRARY.h5 ...

DEMO_OUT is a `protomine demo` folder (objects.h5, scenes/truth_full.csv); CONFIG the demo's config ("-" for the
default); SEED the mining seed (the demo's scene seed); values are JSON (``seed_veto_k=0``,
``E.FACE_BREAK_EFFECT=0.0`` sets ``protomine.mine.engine.FACE_BREAK_EFFECT``).  Prints K, purity, NMI, yaw error
p90 / median and rotation error p90 (``mine.evaluate.evaluate_mining``, as the demo prints them).  ``--common``: the
yaw and rotation p90 of each library over the objects whose pose error every library counts (a member of its class's
cluster in each), so that libraries which place different objects in the right cluster compare the same objects.
Not a test: one mining run (about 1-3 minutes on the default demo).
"""
from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np

from protomine.config import load_config
from protomine.mine import engine
from protomine.mine.evaluate import evaluate_mining, mined_pose_errors, read_truth_table
from protomine.mine.library import read_library
from protomine.mine.pipeline import mine_store


def common_tails(demo: Path, libraries: list[str]) -> None:
    truth = read_truth_table(demo / "scenes" / "truth_full.csv")
    errs = []
    for p in libraries:
        lib = read_library(p)
        pe = mined_pose_errors(lib, truth)
        objs = np.asarray(lib.members["object"])
        errs.append({str(objs[r]): (y, ro) for r, y, ro in zip(pe["row"], pe["yaw"], pe["rotation"])})
    common = sorted(set(errs[0]).intersection(*errs[1:]))
    for p, e in zip(libraries, errs):
        y = np.array([e[o][0] for o in common], float)
        y = y[np.isfinite(y)]
        ro = np.array([e[o][1] for o in common], float)
        print(f"{p}: {len(common)} common objects, yaw p90 {np.percentile(y, 90):.1f}, rotation p90 "
              f"{np.percentile(ro, 90):.1f} deg (all {len(e)} counted)")


def main(argv: list[str]) -> None:
    demo = Path(argv[0])
    if argv[1] == "--common":
        common_tails(demo, argv[2:])
        return
    cfg_name, seed, out = argv[1], int(argv[2]), Path(argv[3])
    over: dict = {}
    for kv in argv[4:]:
        k, v = kv.split("=", 1)
        if k.startswith("E."):
            setattr(engine, k[2:], json.loads(v))
        else:
            over.setdefault("mine", {})[k] = json.loads(v)
    cfg = load_config(None if cfg_name == "-" else cfg_name, overrides=over or None)
    out.mkdir(parents=True, exist_ok=True)
    t = time.time()
    lib, info = mine_store(demo / "objects.h5", out / "library.h5", cfg, seed=seed)
    for notice in info["notices"]:   # e.g. a store written before what today's keys read (DEVELOPERS.md)
        print(f"{demo}: notice: {notice}")
    ev = evaluate_mining(lib, read_truth_table(demo / "scenes" / "truth_full.csv"))
    print(f"{out}: K {lib.n_clusters} purity {ev['purity']:.3f} NMI {ev['nmi']:.3f} yaw p90 {ev['yaw_error_p90_deg']:.1f} "
          f"median {ev['yaw_error_median_deg']:.1f} rotation p90 {ev['rotation_error_p90_deg']:.1f} deg, symmetry "
          f"{ev['symmetry_correct']}/{ev['symmetry_total']} ({time.time() - t:.0f} s)")


if __name__ == "__main__":
    main(sys.argv[1:])
