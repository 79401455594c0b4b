"""Where a demo's single-view errors are: every known view labelled again with the demo's library, broken down by
true class (confusion matrix), wrong class vs flagged, the view's resting face (upright / tumbled, and how many mined
members of its class rest on that face), the rotation error of the search's pose on its true class's prototype, and
whether the view cuts the object off (its mask touches the image border, or lies beside a nearer object's mask), and
for each misnamed view whether its true class's prototype was on the view-normalised shortlist (``[mine]
view_normalise_top`` / ``view_normalise_within``: the prototypes also compared as seen from the view's camera) and the
decision distances of its true class and of the class it was given; and, apart from the decision, how the true
class fits the view at the view's true resting pose (its prototype re-gridded as seen from the view's camera,
``mine.viewnorm``, resting on the up direction the truth's rotation and the cluster's rotation offset give), against
the plain distance (without ``[mine] label_size``) that decided the named class: "out-scored" when even the true pose
fits worse (the search is not what lost it), with the view's metric-size factor exp(c m) of both classes.
[mine] keys the library's recorded config lacks (a library mined before them) are filled from CONFIG (default: the
default config), so the label-time keys take today's values as a library mined now would record them.

    PYTHONPATH=. python tools/label_errors.py DEMO_OUT [CONFIG]

DEMO_OUT is a `protomine demo` folder (library.h5, scenes/ with masks and truth_full.csv); CONFIG the demo's config
(the label stage reads the library's own).  Not a test: it labels the single views once (about a minute).
"""
from __future__ import annotations

import collections
import csv
import json
import sys
from pathlib import Path

import numpy as np
from PIL import Image
from scipy import ndimage

from protomine.audit.metrics import rotation_error_deg
from protomine.cliutil import config_from
from protomine.geometry import plane_basis
from protomine.label import matcher as M
from protomine.mine.evaluate import cluster_rotation_offsets, majority_map, read_truth_table, truth_group
from protomine.mine.library import read_library
from protomine.rotations import quat_to_matrix

sys.path.insert(0, str(Path(__file__).resolve().parent))
from relabel import fill_missing_keys  # noqa: E402


def cut_flags(scenes: Path, oid: str) -> tuple[bool, bool]:
    """(mask within 2 px of the image border, mask beside a nearer object's mask: 2 px, 20 mm nearer)."""
    cap, mid = oid.split("/")
    m = np.array(Image.open(scenes / cap / "masks" / "000000.png"))
    d = np.array(Image.open(scenes / cap / "depth" / "000000.png")).astype(float)
    me = m == int(mid)
    border = bool(me[:2].any() or me[-2:].any() or me[:, :2].any() or me[:, -2:].any())
    ring = ndimage.binary_dilation(me, iterations=2) & ~me & (m > 0)
    ref = np.median(d[me & (d > 0)]) if (me & (d > 0)).any() else 0
    return border, bool(ref > 0 and np.any((d[ring] > 0) & (d[ring] < ref - 20)))


def main(folder: Path, config: str | None) -> None:
    scenes = folder / "scenes"
    cfg = config_from(config)
    scen = json.loads((scenes / "scenario.json").read_text())
    lib = read_library(folder / "library.h5")
    fill_missing_keys(lib, cfg)   # a library mined before a label-time key: filled from the config (module docstring)
    truth = read_truth_table(scenes / "truth_full.csv")
    full = {r["object"]: r for r in csv.DictReader(open(scenes / "truth_full.csv"))}
    cls, K = majority_map(lib, truth), lib.n_clusters
    offs = cluster_rotation_offsets(lib, truth)
    known = {truth[o]["class"] for o in lib.members["object"]}
    on_face = collections.Counter((full[o]["class"], full[o]["face"]) for o in lib.members["object"])
    kept = []
    orig = M.Matcher.match

    sized = []
    orig_size = M.size_mismatch

    def keep(self, volumes, cameras=None, sizes=None, cuts=None, own_members=None):
        n0 = len(sized)
        out = orig(self, volumes, cameras, sizes, cuts, own_members)
        n = len(volumes)
        kept.append(dict(out, volumes=volumes, cameras=np.full((n, 3), np.nan) if cameras is None else cameras,
                         cuts=list(cuts) if cuts is not None else [None] * n,
                         size=sized[-1] if len(sized) > n0 else np.zeros((n, self.K))))
        return out

    def size_kept(*a, **k):   # the view's metric-size mismatch m (n, K) of each match, kept
        m_ = orig_size(*a, **k)
        sized.append(m_)
        return m_
    M.size_mismatch = size_kept

    M.Matcher.match = keep
    recs = M.label_captures(lib, [scenes / c for c in scen["single"]], cfg, seed=scen["demo_params"]["seed"])
    M.Matcher.match = orig
    M.size_mismatch = orig_size
    m = {k: np.concatenate([x[k] for x in kept]) for k in ("distance", "rotation", "view_distance", "volumes", "cameras",
                                                           "size")}
    m["cuts"] = [c for x in kept for c in x["cuts"]]
    matcher = M.make_matcher(lib, cfg)
    c_size = matcher.size_weight
    rows = []
    for i, r in enumerate(recs):
        t = full.get(r["object"])
        if t is None or t["class"] not in known:
            continue
        c = t["class"]
        kt = min((j for j in range(K) if cls.get(j) == c), key=lambda j: m["distance"][i, j])
        Rw = plane_basis(np.asarray(r["up"])).T @ m["rotation"][i, kt]
        O, g = offs[kt][0], truth_group(truth[r["object"]])
        Rt = quat_to_matrix(np.array([[float(t[q]) for q in ("qx", "qy", "qz", "qw")]]))
        pred = cls.get(r["cluster"]) if r["cluster"] is not None else None
        border, occluded = cut_flags(scenes, r["object"])
        at_true = float("nan")
        if r["cluster"] is not None and r["cluster"] != kt and matcher.normaliser is not None \
                and np.all(np.isfinite(m["cameras"][i])):
            up_w = np.array([float(t[q]) for q in ("up_x", "up_y", "up_z")])
            u = O @ Rt[0].T @ up_w    # the world's up in the true class's prototype frame (R_pred O ~ R_true)
            X, W = matcher.features(m["volumes"][i:i + 1])
            at_true = float(matcher.normaliser.face_distances(X, W, kt, [u / np.linalg.norm(u)], m["cameras"][i],
                                                              cut=m["cuts"][i])[0])
        b = r["cluster"]
        # the decision distance without the size: D = D_plain x exp(c m) (``label.matcher``)
        plain = (lambda k: float(m["distance"][i, k] / np.exp(c_size * m["size"][i, k]))) if b is not None else None
        rows.append(dict(obj=r["object"], cls=c, pred=pred, ok=pred == c, flag=r["unknown"], tumbled=t["tumbled"] == "1",
                         face=t["face"], on_face=on_face[(c, t["face"])], border=border, occluded=occluded,
                         rot=float(rotation_error_deg(Rw[None], Rt, O, g)[0]),
                         listed=bool(np.isfinite(m["view_distance"][i, kt])), d_true=float(m["distance"][i, kt]),
                         d_named=float(m["distance"][i, r["cluster"]]) if r["cluster"] is not None else float("nan"),
                         at_true=at_true, p_true=plain(kt) if plain else float("nan"),
                         p_named=plain(b) if plain else float("nan"),
                         f_true=float(np.exp(c_size * m["size"][i, kt])),
                         f_named=float(np.exp(c_size * m["size"][i, b])) if b is not None else float("nan")))
    acc = lambda xs: f"n {len(xs):3d} accuracy {np.mean([x['ok'] for x in xs]):.3f}" if xs else "n   0"  # noqa: E731
    print(f"{folder}: known views {acc(rows)}, flagged {np.mean([x['flag'] for x in rows]):.3f}")
    names = sorted(known)
    conf = collections.Counter((x["cls"], x["pred"]) for x in rows)
    print("confusion (rows true, columns named):\n" + " " * 15 + " ".join(f"{n[:6]:>6s}" for n in names))
    for a in names:
        print(f"{a:>14s} " + " ".join(f"{conf[(a, b)]:6d}" for b in names))
    for name, sel in (("upright", lambda x: not x["tumbled"]), ("tumbled", lambda x: x["tumbled"]),
                      ("mask at the image border", lambda x: x["border"]), ("beside a nearer object", lambda x: x["occluded"]),
                      ("neither (whole in view)", lambda x: not x["border"] and not x["occluded"]),
                      ("whole in view, upright", lambda x: not x["border"] and not x["occluded"] and not x["tumbled"]),
                      ("whole in view, tumbled", lambda x: not x["border"] and not x["occluded"] and x["tumbled"]),
                      ("face no mined member rests on", lambda x: x["on_face"] == 0)):
        print(f"  {name:32s} {acc([x for x in rows if sel(x)])}")
    bad = [x for x in rows if not x["ok"]]
    print(f"wrong {len(bad)}: {sum(not x['flag'] for x in bad)} named another class, {sum(x['flag'] for x in bad)} also "
          f"flagged; true-class pose within 30 deg for {sum(x['rot'] <= 30 for x in bad)}, true class on the "
          f"view-normalised shortlist for {sum(x['listed'] for x in bad)}; out-scored at the true resting pose (the true "
          f"class's copy there fits worse than the named class's plain distance) {sum(x['at_true'] > x['p_named'] for x in bad)}")
    for x in sorted(bad, key=lambda x: (x["cls"], x["obj"])):
        print(f"  {x['obj']:14s} {x['cls']:13s} -> {str(x['pred']):13s} flagged {x['flag']:d} tumbled {x['tumbled']:d} "
              f"face {x['face']:>2s} (mined on it {x['on_face']:2d}) border {x['border']:d} beside nearer {x['occluded']:d} "
              f"true-class rotation error {x['rot']:5.1f} on the shortlist {x['listed']:d} "
              f"distance true {x['d_true']:.4f} named {x['d_named']:.4f}; plain true {x['p_true']:.4f} named "
              f"{x['p_named']:.4f}, size factor true {x['f_true']:.2f} named {x['f_named']:.2f}, true class at the true "
              f"resting pose {x['at_true']:.4f}")


if __name__ == "__main__":
    main(Path(sys.argv[1]), sys.argv[2] if len(sys.argv) > 2 else None)
