"""Where the unknown is lost: every label view of a demo run, its truth group, score and match, and which groups
of views cost the AUROC.

    PYTHONPATH=. python tools/unknown_views.py DEMO_OUT [--config CFG] [--seed S] [--views]

DEMO_OUT is a `protomine demo` folder (library.h5, scenes/).  The single-view captures are labelled again as the
demo's label step does (this process, the library's matcher: the same records), each record matched to its truth
and put in a group: K-ok (known class, named right, not flagged), K-flag (named right, flagged), K-wrong (named
wrong), U-flag / U-miss (never-mined class, flagged or not).  Printed:

- the AUROC as the demo counts it (scikit-learn ``roc_auc_score``, known = positive) and its loss split into the
  discordant (known, never-mined) pairs of each known group against never-mined views matched on the prototype's
  canonical face (the search's +z direction) or on another tilt: the shares add up to 1 - AUROC;
- per decided prototype: its class (majority of its mined members), the single-view calibration (mu, sigma on the
  canonical face, on other faces) and how many views of each group it decided;
- per never-mined class: its views, how many are flagged, and the known classes the others are named as;
- whether the cut or the order loses: the cut that would flag at most ``--known-share`` (default 0.05) of the known
  label views (an oracle: it reads the truth) and the share of never-mined views it flags, against the library's cut;
  and the AUROC of the correctly named known views alone against the never-mined ones;
- with ``--views``, one line per view: group, class, decided prototype, the class it is named as, canonical or not,
  score, the parts the score joins by Fisher's combination at the decided prototype (``label.matcher``'s
  ``score_parts``: the calibrated score of the distance, the best / second-best ratio's p-value, then the unseen
  share's, the stretch's, the members' and the size's p-values where their keys are on), the fitted scale, the best /
  second-best distance ratio, the view's pixels without a depth reading (holes: shadows, dropouts) and flagged as
  flying (``ingest.depthedges.flying_pixels``) as shares of its mask, and its observed cells.
Not a test: it labels the demo's single views once (about a minute).
"""
from __future__ import annotations

import argparse
import json
from collections import Counter
from pathlib import Path

import numpy as np
from sklearn.metrics import roc_auc_score

from protomine.capture import read_capture
from protomine.config import load_config
from protomine.ingest.depthedges import flying_pixels
from protomine.label import matcher as M
from protomine.label.evaluate import match_records
from protomine.mine.evaluate import majority_map, read_truth_table
from protomine.mine.library import read_library
from protomine.progress import Bar


def label_views(out: Path, cfg: dict, seed: int):
    """The demo's label step in this process: records, the matcher's output and the views' weights W (n, R, A, H)."""
    lib = read_library(out / "library.h5")
    scen = json.loads((out / "scenes" / "scenario.json").read_text())
    matcher = M.make_matcher(lib, cfg)
    st = {"objects": 0, "frames": 0, "lift_s": 0.0, "match_s": 0.0}
    lifted = []
    for c in scen["single"]:
        cap = read_capture(out / "scenes" / c, check_images=False)
        lifted += M._lift_capture(matcher, cap, cfg, seed, True, None, st, Bar(None, "label", 0, "frames"))
    m = M.match_lifted(matcher, lifted)   # with each view's camera, size and cut, as the label stage matches
    recs = M.lifted_records(matcher, lifted, m)
    return lib, matcher, recs, m, matcher.features(np.concatenate([fo.volumes for _, fo in lifted]))[1]


def groups(lib, recs, truth) -> tuple[np.ndarray, list]:
    classes = majority_map(lib, truth)
    known = {truth[str(o)]["class"] for o in lib.members["object"]}
    out, cls = [], []
    for r, oid in zip(recs, match_records(recs, truth, 0.05)):
        c = truth[oid]["class"] if oid else None
        cls.append(c)
        if c is None:
            out.append("none")
        elif c not in known:
            out.append("U-flag" if r["unknown"] else "U-miss")
        elif r["cluster"] is None or classes.get(r["cluster"]) != c:
            out.append("K-wrong")
        else:
            out.append("K-flag" if r["unknown"] else "K-ok")
    return np.array(out), cls


def pixel_shares(out: Path, r: dict) -> tuple[int, float, float]:
    """(mask pixels, share without a reading, share flagged flying) of a record's object in its frame."""
    cap = read_capture(out / "scenes" / r["capture"], check_images=False)
    depth, mask = cap.depth(r["frame"]), cap.mask(r["frame"])
    key = r["object"].split("/")[-1]
    if mask is None or not key.isdigit():
        return 0, float("nan"), float("nan")
    mk = mask == int(key)
    n = max(int(mk.sum()), 1)
    return int(mk.sum()), float((mk & (depth == 0)).sum() / n), float((mk & flying_pixels(depth)).sum() / n)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("demo_out", type=Path)
    ap.add_argument("--config", default=None, help="the demo's --config (its [scenes] and [ingest] settings)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--views", action="store_true", help="one line per view")
    ap.add_argument("--known-share", type=float, default=0.05, help="the known label views' share the oracle cut flags")
    a = ap.parse_args()
    out = a.demo_out
    lib, matcher, recs, m, W = label_views(out, load_config(a.config), a.seed)
    truth = read_truth_table(out / "scenes" / "truth_full.csv")
    grp, cls = groups(lib, recs, truth)
    best = m["best"]
    canon = np.array([bool(m["upright"][i, b]) if b >= 0 else False for i, b in enumerate(best)])
    score = np.array([r["score"] for r in recs])
    ok = grp != "none"
    kn, un = np.char.startswith(grp, "K") & ok, np.char.startswith(grp, "U") & ok
    print(f"{ok.sum()} views ({kn.sum()} known, {un.sum()} never-mined), cut {matcher.unknown_cut:.4f}: "
          f"AUROC {roc_auc_score(kn[ok], score[ok]):.3f}")
    pairs = kn.sum() * un.sum()

    def lost(ks, us):   # discordant pairs (ties half) as a share of all (known, never-mined) pairs
        return sum(float((s < score[us]).sum() + 0.5 * (s == score[us]).sum()) for s in score[ks]) / max(pairs, 1)

    print("AUROC loss by known group x never-mined match (shares of all pairs; they add up to 1 - AUROC):")
    for g in ("K-ok", "K-flag", "K-wrong"):
        for face, sel in (("canonical", canon), ("other tilt", ~canon)):
            ks = (grp == g) & sel
            print(f"  {g:7s} on {face:10s} ({ks.sum():3d} views): vs never-mined on the canonical face "
                  f"({(un & canon).sum()}) {lost(ks, un & canon):.3f}, on another tilt ({(un & ~canon).sum()}) "
                  f"{lost(ks, un & ~canon):.3f}")
    pr, classes = lib.prototypes, majority_map(lib, truth)
    # the calibration the label score reads: the view-normalised one when the library has it (label.matcher)
    cal = "single_view_" if matcher.view_calibrated else "single_"
    print(f"per decided prototype: class, calibration ({cal}*) canonical (mu, sigma) / other faces, views decided per group")
    for k in range(lib.n_clusters):
        c = Counter(str(g) for g in grp[best == k])
        print(f"  {k} {classes.get(k)!s:15s} {pr[cal + 'mu'][k]:6.2f} {pr[cal + 'sigma'][k]:5.2f} / "
              f"{pr[cal + 'tilt_mu'][k]:6.2f} {pr[cal + 'tilt_sigma'][k]:5.2f}  {dict(sorted(c.items()))}")
    print("never-mined classes: views, flagged, the known classes the others are named as")
    named = np.array([classes.get(int(b)) if b >= 0 else None for b in best], dtype=object)
    for c in sorted({cls[i] for i in np.flatnonzero(un)}):
        sel = un & (np.array(cls, dtype=object) == c)
        print(f"  {c:15s} {sel.sum():3d} views, {(grp[sel] == 'U-flag').sum():3d} flagged; passing as "
              f"{dict(Counter(str(x) for x in named[sel & (grp == 'U-miss')]).most_common())}")
    cut, flag_u, flag_k = oracle_cut(score[kn], score[un], a.known_share)
    print(f"the cut or the order: the library's cut {matcher.unknown_cut:.4f} flags {np.mean(score[un] < matcher.unknown_cut):.0%}"
          f" of never-mined / {np.mean(score[kn] < matcher.unknown_cut):.1%} of known views; the cut {cut:.4f} flagging at "
          f"most {a.known_share:.0%} of the known label views (an oracle) {flag_u:.0%} / {flag_k:.1%}; AUROC of the "
          f"correctly named known views alone {roc_auc_score(kn[ok & (grp != 'K-wrong')], score[ok & (grp != 'K-wrong')]):.3f}")
    if not a.views:
        return
    parts = m["score_parts"]
    print(f"{'group':7s} {'class':15s} {'k':>2s} {'named':15s} {'canon':>5s} {'score':>6s} {'parts':>{6 * parts.shape[2]}s} "
          f"{'scale':>5s} {'ratio':>5s} {'pixels':>6s} {'holes':>5s} {'flying':>6s} {'cells':>5s}")
    D = np.where(np.isfinite(m["distance"]), m["distance"], np.inf)
    for i in np.lexsort((score, grp)):
        if not ok[i]:
            continue
        d2 = np.sort(D[i])[:2]
        npx, hole, fly = pixel_shares(out, recs[i])
        b = max(int(best[i]), 0)
        pv = "".join(f"{v:6.3f}" for v in parts[i, b])
        print(f"{grp[i]:7s} {cls[i][:15]:15s} {best[i]:2d} {str(named[i])[:15]:15s} {int(canon[i]):5d} {score[i]:6.3f} {pv} "
              f"{m['fit_scale'][i, b]:5.2f} {d2[0] / d2[1] if np.isfinite(d2[1]) else 0:5.2f} {npx:6d} {hole:5.2f} {fly:6.2f} "
              f"{int((W[i] > 0).sum()):5d}")


def oracle_cut(known: np.ndarray, unknown: np.ndarray, share: float) -> tuple[float, float, float]:
    """(cut, share of ``unknown`` scores below it, share of ``known`` below it): the highest cut among the known
    scores that flags (score < cut) at most ``share`` of them, the operating point the order allows at that share."""
    ks = np.sort(np.asarray(known, np.float64))
    cut = float(ks[min(int(np.floor(share * len(ks))), len(ks) - 1)]) if len(ks) else 0.0
    return cut, float(np.mean(np.asarray(unknown) < cut)) if len(unknown) else float("nan"), float(np.mean(ks < cut)) if len(ks) else float("nan")


if __name__ == "__main__":
    main()
