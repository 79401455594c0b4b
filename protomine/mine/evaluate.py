"""Mining quality against known truth (the demo's truth files, or any object,label[,yaw_deg] table).

- purity and NMI of the clusters (``audit.metrics``; scikit-learn NMI as reference implementation);
- yaw error: per cluster, the circular offset between truth and predicted yaw is removed (the
  prototype's canonical frame is arbitrary), then errors are taken modulo the truth class's symmetry
  period; classes with continuous symmetry have no yaw and are left out;
- detected vs true symmetry per cluster (majority class);
- the pose-unaware baseline: scikit-learn KMeans on the flattened matching features, same K.
"""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from ..audit.metrics import clustering_scores, yaw_error_deg, yaw_offset_deg
from .library import Library


def read_truth_table(path: str | Path) -> dict[str, dict]:
    """object id -> row (label/class, yaw_deg, symmetry when present)."""
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    out = {}
    for r in rows:
        label = r.get("class") or r.get("label")
        out[r["object"]] = {"label": label, "yaw_deg": float(r["yaw_deg"]) if r.get("yaw_deg") else None,
                            "symmetry": r.get("symmetry", "none") or "none", "split": r.get("split", "")}
    return out


def class_period(symmetry: str) -> float:
    """Truth symmetry string -> yaw period in degrees (0 = continuous)."""
    if symmetry == "continuous":
        return 0.0
    if symmetry.startswith("n-fold:"):
        return 360.0 / int(symmetry.split(":")[1])
    return 360.0


def symmetry_code_of(symmetry: str) -> int:
    return 0 if symmetry == "continuous" else int(symmetry.split(":")[1]) if symmetry.startswith("n-fold:") else 1


def majority_map(lib: Library, truth: dict[str, dict]) -> dict[int, str]:
    """cluster -> majority truth label of its members (clusters without truth are left out)."""
    out = {}
    for k in range(lib.n_clusters):
        labs = [truth[o]["label"] for o, c in zip(lib.members["object"], lib.members["cluster"]) if c == k and o in truth]
        if labs:
            vals, cnt = np.unique(labs, return_counts=True)
            out[k] = str(vals[np.argmax(cnt)])
    return out


def cluster_yaw_offsets(lib: Library, truth: dict[str, dict]) -> dict[int, float]:
    """Per-cluster offset truth - predicted (circular mean modulo the majority class's period)."""
    maj = majority_map(lib, truth)
    out = {}
    m = lib.members
    for k, label in maj.items():
        sel = [i for i, (o, c) in enumerate(zip(m["object"], m["cluster"])) if c == k and o in truth and truth[o]["label"] == label]
        if not sel:
            continue
        per = class_period(truth[m["object"][sel[0]]]["symmetry"])
        if per == 0:
            out[k] = 0.0
            continue
        t = np.array([truth[m["object"][i]]["yaw_deg"] for i in sel])
        out[k] = yaw_offset_deg(t, m["yaw_deg"][sel], per)
    return out


def evaluate_mining(lib: Library, truth: dict[str, dict]) -> dict:
    m = lib.members
    have = np.array([o in truth for o in m["object"]])
    objs = np.asarray(m["object"])[have]
    cl = np.asarray(m["cluster"])[have]
    lab = np.array([truth[o]["label"] for o in objs])
    scores = clustering_scores(cl, lab)
    maj = majority_map(lib, truth)
    offsets = cluster_yaw_offsets(lib, truth)
    errs, per_cluster = [], []
    for k in range(lib.n_clusters):
        sel = np.flatnonzero(cl == k)
        row = {"cluster": k, "size": int(len(sel)), "majority": maj.get(k), "detected_symmetry": int(lib.prototypes["symmetry"][k])}
        if k in maj:
            same = [i for i in sel if lab[i] == maj[k]]
            sym = truth[objs[same[0]]]["symmetry"]
            row["true_symmetry"] = symmetry_code_of(sym)
            per = class_period(sym)
            if per > 0 and same:
                t = np.array([truth[objs[i]]["yaw_deg"] for i in same])
                p = np.asarray(m["yaw_deg"])[have][same]
                e = yaw_error_deg(t, p, offsets[k], per)
                errs += list(e)
                row["yaw_error_median"] = float(np.median(e))
        per_cluster.append(row)
    sym_ok = [r["detected_symmetry"] == r.get("true_symmetry") for r in per_cluster if "true_symmetry" in r]
    return {"n_objects": int(len(objs)), "K": lib.n_clusters, "n_classes": int(len(set(lab))),
            "purity": scores["purity"], "nmi": scores["nmi"], "ari": scores["ari"],
            "yaw_error_median_deg": float(np.median(errs)) if errs else float("nan"),
            "yaw_error_p90_deg": float(np.percentile(errs, 90)) if errs else float("nan"),
            "symmetry_correct": int(sum(sym_ok)), "symmetry_total": len(sym_ok), "clusters": per_cluster}


def kmeans_baseline(store, cfg: dict, truth: dict[str, dict], n_clusters: int, seed: int = 0) -> dict:
    """Pose-unaware baseline: scikit-learn KMeans on flattened matching features (unseen cells = 0)."""
    from sklearn.cluster import KMeans
    X, W = store.source(cfg).read(0, len(store))
    flat = (X * W[:, None]).reshape(len(X), -1)
    lab_pred = KMeans(n_clusters=n_clusters, n_init=10, random_state=seed).fit_predict(flat)
    ids = store.ids
    have = np.array([o in truth for o in ids])
    lab = np.array([truth[o]["label"] for o in np.asarray(ids)[have]])
    s = clustering_scores(lab_pred[have], lab)
    return {"purity": s["purity"], "nmi": s["nmi"]}
