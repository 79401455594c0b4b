"""Mask-free against masked, object by object: where two stores of the same captures (one ingested without
masks, one with) and their mined libraries differ.  Each store's objects are matched to the truth rows by the
audit (its report.json), and the two stores' objects to each other through the truth row.  Per object whose
cluster is wrong in either run (its cluster's majority class is not its own): both clusters, the shift of the
base centre between the two stores, the radius ratio, and the change of the surface channel (sum of absolute
differences over the masked volume's sum: 0 = the same volume).  Then per class, the median and 90th
percentile in-plane distance from each store's base centre to the truth point (the scenario's object position).

    PYTHONPATH=. python tools/maskfree_diff.py FREE_STORE FREE_ASSIGN FREE_REPORT MASK_STORE MASK_ASSIGN MASK_REPORT TRUTH

*_STORE an objects.h5, *_ASSIGN the library's assignments.csv, *_REPORT the `protomine audit` report.json of that
library against TRUTH (the scenes' truth_points.csv).  Not a test: it reads what the runs wrote.
"""
from __future__ import annotations

import collections
import csv
import json
import sys

import h5py
import numpy as np


def _run(store: str, assign: str, report: str) -> dict:
    f = h5py.File(store, "r")
    o = f["objects"]
    ids = [x.decode() if isinstance(x, bytes) else x for x in o["id"][:]]
    rec = {i: dict(idx=k, origin=o["origin"][k], up=o["up"][k], r=float(o["radius_m"][k])) for k, i in enumerate(ids)}
    cl = {r["object"]: int(r["cluster"]) for r in csv.DictReader(open(assign))}
    lab = {x["object"]: (x["label"], x["row"]) for x in json.load(open(report))["labelled_objects"]}
    votes = collections.defaultdict(list)
    for oid, (label, _) in lab.items():
        votes[cl[oid]].append(label)
    major = {c: collections.Counter(v).most_common(1)[0][0] for c, v in votes.items()}
    return dict(file=f, rec=rec, cl=cl, lab=lab, major=major)


def _in_plane_mm(origin: np.ndarray, up: np.ndarray, row: dict) -> float:
    d = np.array([float(row[k]) for k in "xyz"]) - origin
    return float(np.linalg.norm(d - (d @ up) * up) * 1000)


def main(argv: list[str]) -> None:
    free, mask = _run(*argv[0:3]), _run(*argv[3:6])
    truth = list(csv.DictReader(open(argv[6])))            # report rows count the header as row 1
    by_row = {row: oid for oid, (_, row) in mask["lab"].items()}
    wrong = {"mask-free": 0, "masked": 0}
    dist = collections.defaultdict(lambda: ([], []))
    for oid, (label, row) in sorted(free["lab"].items(), key=lambda t: t[1][1]):
        mid = by_row.get(row)
        if mid is None:
            continue
        a, b = free["rec"][oid], mask["rec"][mid]
        fa, fb = free["major"][free["cl"][oid]] == label, mask["major"][mask["cl"][mid]] == label
        wrong["mask-free"] += not fa
        wrong["masked"] += not fb
        dist[label][0].append(_in_plane_mm(a["origin"], a["up"], truth[row - 2]))
        dist[label][1].append(_in_plane_mm(b["origin"], b["up"], truth[row - 2]))
        if fa and fb:
            continue
        va = free["file"]["volumes"][a["idx"]][0]
        vb = mask["file"]["volumes"][b["idx"]][0]
        print(f"{label:12s} mask-free {oid:14s} in {free['major'][free['cl'][oid]]:12s} | masked {mid:14s} in "
              f"{mask['major'][mask['cl'][mid]]:12s} | base shift {np.linalg.norm(a['origin'] - b['origin']) * 1000:5.1f} mm, "
              f"radius x {a['r'] / b['r']:.3f}, surface change {np.abs(va - vb).sum() / max(vb.sum(), 1e-9):.3f}")
    print(f"objects in a cluster of another class: {wrong}")
    print("base centre to truth point, in-plane mm (median / p90): mask-free | masked")
    for label, (a, b) in sorted(dist.items()):
        print(f"  {label:12s} {np.median(a):5.1f} / {np.percentile(a, 90):5.1f} | {np.median(b):5.1f} / {np.percentile(b, 90):5.1f}")
    alla = [x for a, _ in dist.values() for x in a]
    allb = [x for _, b in dist.values() for x in b]
    print(f"  {'all':12s} {np.median(alla):5.1f} / {np.percentile(alla, 90):5.1f} | {np.median(allb):5.1f} / {np.percentile(allb, 90):5.1f}")


if __name__ == "__main__":
    main(sys.argv[1:])
