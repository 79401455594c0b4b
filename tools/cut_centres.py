"""Where a cut single view's grid centre lies: for every new scan of a demo folder (out/new_scans.h5 and scenes/, the
store's recorded config and seed) whose view cuts its object off (``ingest.truncation.cut_pixels``: the image border,
or a nearer object), the in-plane distance (in units of the visible footprint's radius r) from the truth's base centre
(scenes/truth_full.csv x, y, z) to

- the visible footprint's circle centre (ingest's object frame, the grid's centre);
- that centre moved by OFFSET x r toward the cut (``proposals.shifted_frames``), the direction as
  ``truncation.cut_direction`` takes it (from the circle's centre to the points on a cut pixel: the label stage's
  ``[mine] view_cut_offsets`` and find's ``find_cut_offsets``), and as ``truncation.centroid_cut_direction`` takes it
  (from the visible points' centroid to the cut points' centroid: find's ``find_cut_direction = "centroid"``);

with the share of views each moved centre brings nearer the truth and the share whose move points toward it (cosine
above 0).  The views the border cuts and those a nearer object cuts are counted apart, and the views not cut are given
for scale.  Not a test.

    PYTHONPATH=. python tools/cut_centres.py DEMO_OUT [OFFSET]
"""
import csv, sys
from pathlib import Path
import numpy as np
from protomine.capture import read_capture
from protomine.geometry import plane_basis
from protomine.ingest.pipeline import capture_rng
from protomine.ingest.proposals import find_objects, shifted_frames
from protomine.ingest.sharded import open_store
from protomine.ingest.truncation import BORDER_PX, centroid_cut_direction, cut_direction, cut_pixels

folder = Path(sys.argv[1]); offset = float(sys.argv[2]) if len(sys.argv) > 2 else 0.25
st = open_store(folder / "new_scans.h5"); cfg = st.config; seed = int(st.attrs["seed"])
truth = {r["object"]: r for r in csv.DictReader(open(folder / "scenes" / "truth_full.csv"))}
rows = {"border": [], "nearer": [], "not cut": []}
for ci, name in enumerate(st.captures["name"]):
    cap = read_capture(st.captures["path"][ci], check_images=False)
    fr = cap.frames[0].id
    sc = find_objects(cap, cfg, capture_rng(seed, cap.name), frame_ids=[fr], use_masks=bool(st.captures["masks"][ci]))
    fd = sc.frames[0]
    H, W = fd.depth.shape
    for p in sc.proposals:
        if p.object_id not in truth or fr not in p.pixels:
            continue
        pix = p.pixels[fr]
        cp = cut_pixels(pix, fd.depth, sc.others_held(fd, pix).reshape(H, W))
        t = truth[p.object_id]
        true = np.array([float(t["x"]), float(t["y"]), float(t["z"])])
        B = plane_basis(np.asarray(p.frame.up, np.float64))
        o = np.asarray(p.frame.origin, np.float64)
        rel = (true - o) @ B[:2].T
        r = float(p.frame.radius)
        if not cp.any():
            rows["not cut"].append([np.linalg.norm(rel) / r] + [np.nan] * 4)
            continue
        rr, cc = pix // W, pix % W
        border = bool(((rr < BORDER_PX) | (rr >= H - BORDER_PX) | (cc < BORDER_PX) | (cc >= W - BORDER_PX)).any())
        sel = np.isin(fd.pixels, pix)
        pts = fd.points[sel]
        on = np.zeros(H * W, bool)
        on[pix[cp]] = True
        onp = on[fd.pixels[sel]]
        row = [np.linalg.norm(rel) / r]
        for d in (cut_direction(pts, onp, o, p.frame.up), centroid_cut_direction(pts, onp, p.frame.up)):
            if d is None:
                row += [np.nan, np.nan]
                continue
            f = shifted_frames(pts, p.frame, d, (offset,))[0]
            row += [np.linalg.norm((true - np.asarray(f.origin)) @ B[:2].T) / r,
                    float(rel @ (d @ B[:2].T)) / max(float(np.linalg.norm(rel)), 1e-12)]
        rows["border" if border else "nearer"].append(row)
for kind, v in rows.items():
    a = np.array(v, float).reshape(-1, 5)
    if not len(a):
        continue
    line = f"{folder.name} {kind:8s} n {len(a):3d}: truth from the circle's centre, median {np.median(a[:, 0]):.3f} r"
    if kind != "not cut":
        for j, what in ((1, "moved from the centre"), (3, "moved from the centroid")):
            ok = np.isfinite(a[:, j])
            line += (f"; {what} by {offset:g} r: median {np.median(a[ok, j]):.3f} r, nearer {np.mean(a[ok, j] < a[ok, 0]):.2f}, "
                     f"toward {np.mean(a[ok, j + 1] > 0):.2f} (no direction {int((~ok).sum())})")
    print(line)
