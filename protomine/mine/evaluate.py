"""Mining quality against known truth (the demo's truth files, or any object,label[,yaw_deg] table).

- purity and NMI of the clusters (``audit.metrics``; scikit-learn NMI as reference implementation);
- yaw error (truth tables with rotations and up): the turn about the support normal left between the predicted
  and the true pose once the cluster's one rotation offset is removed (``audit.metrics.yaw_about_up_error_deg``:
  the twist about up of the residual, modulo the class's symmetry), for every member whatever face it rests
  on; classes with continuous symmetry are left out, as before.  Without rotations in the truth, and beside it as
  ``yaw_error_*_cluster_offset_deg``, the older figure: per cluster one circular offset between truth and
  predicted ``yaw_deg`` removed, errors modulo the truth class's period.  ``yaw_deg`` is measured about up from
  the resting face's tilted frame, so members resting on different faces have different offsets: for a tumbled
  demo the older figure counts the faces' offsets as errors (it is right only within one face);
- rotation error (truth tables with qx, qy, qz, qw: the rotation world <- the class's own frame): per
  cluster one offset O (prototype frame <- class frame) is removed, the geodesic medoid of the members'
  R_pred^T R_true, then each member's error is the geodesic angle between R_pred O and R_true, the least
  over the class's symmetry rotations about its own z and, when the truth lists them (column ``turns``: "order:ax,ay,az"
  joined by ";", in the object's own frame), its turns that move up (``truth_group``; ``mined_rotation_errors``);
- detected vs true symmetry per cluster (majority class);
- the pose-unaware baseline: scikit-learn KMeans on the flattened matching features, same K.
"""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from ..audit.metrics import (AboutZ, clustering_scores, rotation_error_deg, rotation_offset, symmetry_to_period_deg,
                             yaw_about_up_error_deg, yaw_error_deg, yaw_offset_deg)
from ..errors import InputError
from .. import rotations as rot
from ..geometry import axis_angle_to_matrix
from .library import Library


def read_truth_table(path: str | Path) -> dict[str, dict]:
    """Truth CSV (object, class or label, [yaw_deg, symmetry, capture, x, y, z, split, qx, qy, qz, qw, up_x, up_y,
    up_z, face, turns]) -> {object id: {"label", "class" (the same), "yaw_deg" (or None), "symmetry", "capture", "point"
    (3,) or None, "split", "rotation" (4,) or None, "up" (3,) or None, "face" (str, "" when absent), "turns"
    [(order, unit axis (3,))]}}."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, None, "truth CSV not found")
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        cols = reader.fieldnames or []
        if "object" not in cols or not ({"class", "label"} & set(cols)):
            raise InputError(path, "header", f"expected columns object and class (or label), got {cols}")
        out = {}
        for line, row in enumerate(reader, start=2):
            try:
                yaw = float(row["yaw_deg"]) if row.get("yaw_deg") not in (None, "") else None
                point = np.array([float(row[c]) for c in "xyz"]) if all(row.get(c) for c in "xyz") else None
            except ValueError:
                raise InputError(path, f"row {line}", "expected numbers in yaw_deg, x, y, z") from None
            oid = row["object"]
            label = row.get("class") or row.get("label")
            try:
                q = np.array([float(row[c]) for c in ("qx", "qy", "qz", "qw")]) if row.get("qw") not in (None, "") else None
                up = np.array([float(row[c]) for c in ("up_x", "up_y", "up_z")]) if row.get("up_z") not in (None, "") else None
            except ValueError:
                raise InputError(path, f"row {line}", "expected numbers in qx, qy, qz, qw, up_x, up_y, up_z") from None
            out[oid] = {"label": label, "class": label, "yaw_deg": yaw, "point": point, "rotation": q, "up": up,
                        "turns": _parse_turns(path, line, row.get("turns") or ""),
                        "face": row.get("face") or "",
                        "symmetry": row.get("symmetry") or "none", "capture": row.get("capture") or oid.split("/")[0],
                        "split": row.get("split", "")}
    return out


def _parse_turns(path: Path, line: int, text: str) -> list[tuple[int, np.ndarray]]:
    out = []
    for part in filter(None, text.split(";")):
        try:
            order, axis = part.split(":")
            a = np.array([float(v) for v in axis.split(",")])
            n = int(order)
        except ValueError:
            raise InputError(path, f"row {line}", f"expected turns as 'order:ax,ay,az' joined by ';', got {text!r}") from None
        if a.shape != (3,) or n < 2 or not np.linalg.norm(a) > 0:
            raise InputError(path, f"row {line}", f"expected turns as 'order:ax,ay,az' (order >= 2, a non-zero axis), got {text!r}")
        out.append((n, a / np.linalg.norm(a)))
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


def cluster_yaw_offsets(lib: Library, truth: dict[str, dict], *, prototype_period: bool = False) -> dict[int, float]:
    """Per-cluster offset truth - predicted (circular mean over the members of the majority class).

    The period is the majority class's true symmetry, or with ``prototype_period`` the prototype's
    detected one (what a user of the library sees); a continuous period gives offset 0.
    """
    maj = majority_map(lib, truth)
    out = {}
    m = lib.members
    for k, label in maj.items():
        sel = [i for i, (o, c) in enumerate(zip(m["object"], m["cluster"]))
               if c == k and o in truth and truth[o]["label"] == label and truth[o]["yaw_deg"] is not None]
        per = (symmetry_to_period_deg(int(lib.prototypes["symmetry"][k])) if prototype_period
               else class_period(truth[m["object"][sel[0]]]["symmetry"]) if sel else 0.0)
        if not sel or per == 0 or not np.isfinite(per):
            out[k] = 0.0
            continue
        t = np.array([truth[m["object"][i]]["yaw_deg"] for i in sel])
        out[k] = yaw_offset_deg(t, m["yaw_deg"][sel], per)
    return out


def symmetry_rotations(symmetry: str) -> np.ndarray | None:
    """(G, 3, 3) rotations about z that leave a class with this truth symmetry unchanged; None for a continuous
    symmetry (``audit.metrics`` then takes the least angle over every rotation about z exactly: sampled every
    10 degrees it read up to 5 degrees of error into a perfectly posed cylinder)."""
    per = class_period(symmetry)
    if per == 0:
        return None
    n = int(round(360.0 / per))
    return rot.yaw_matrix(np.arange(n) * 360.0 / n)


def truth_group(t: dict):
    """The symmetry group of one truth row (``audit.metrics`` conventions): its rotations about z
    (:func:`symmetry_rotations`; None = continuous) and, with its ``turns``, each turn's powers after them
    (:class:`audit.metrics.AboutZ` for a continuous symmetry with turns)."""
    about_z = symmetry_rotations(t["symmetry"])
    turns = t.get("turns") or []
    if not turns:
        return about_z
    extra = [np.eye(3)] + [axis_angle_to_matrix(a, 2.0 * np.pi * j / n) for n, a in turns for j in range(1, n)]
    if about_z is None:
        return AboutZ(np.stack(extra))
    return np.stack([z @ e for e in extra for z in about_z])


def _members_group(rows: list[dict]):
    """One group for rows of one class: the class's when no row has turns, else each row's own stacked
    ((n, G, 3, 3), or :class:`AboutZ` of such reps; rows with fewer elements, e.g. instances without turns, padded
    with their identity)."""
    if not any(r.get("turns") for r in rows):
        return symmetry_rotations(rows[0]["symmetry"])
    groups = [truth_group(r) for r in rows]
    continuous = [g is None or isinstance(g, AboutZ) for g in groups]
    if any(continuous) and not all(continuous):
        raise ValueError("rows of one class disagree on a continuous symmetry about z")
    if continuous[0]:
        reps = [np.eye(3)[None] if g is None else g.reps for g in groups]
    else:
        reps = list(groups)
    # rows without turns (or with fewer) have smaller groups: padded with their identity, a repeated element,
    # which leaves every minimum over the group as it is
    size = max(len(g) for g in reps)
    reps = np.stack([np.concatenate([g, np.repeat(g[:1], size - len(g), axis=0)]) for g in reps])
    return AboutZ(reps) if continuous[0] else reps


def cluster_rotation_offsets(lib: Library, truth: dict[str, dict]) -> dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Per cluster (offset O, symmetry group, member rows used) from its mined members of the majority class
    that have a truth rotation (at least 2).  The group is the class's (:func:`symmetry_rotations`), or with truth
    turns each member's own (:func:`_members_group`; a single pose's error takes :func:`truth_group` of its row)."""
    m = lib.members
    out = {}
    for k, label in majority_map(lib, truth).items():
        sel = [i for i, (o, c) in enumerate(zip(m["object"], m["cluster"]))
               if c == k and o in truth and truth[o]["label"] == label and truth[o].get("rotation") is not None]
        if len(sel) < 2:
            continue
        Rp = rot.quat_to_matrix(np.asarray(m["rotation"])[sel])
        Rt = rot.quat_to_matrix(np.array([truth[m["object"][i]]["rotation"] for i in sel]))
        group = _members_group([truth[m["object"][i]] for i in sel])
        out[k] = (rotation_offset(Rp, Rt, group), group, np.array(sel))
    return out


def mined_pose_errors(lib: Library, truth: dict[str, dict]) -> dict[str, np.ndarray]:
    """Pose errors of the mined members of each cluster's majority class that have a truth rotation (see the module
    docstring), as (n,) arrays: "row" (member index), "cluster", "rotation" (degrees), "yaw" (degrees about up;
    NaN where the class's symmetry is continuous or the truth has no up).  Empty when the truth has no rotation."""
    m = lib.members
    rows, ks, rerr, yerr = [], [], [], []
    for k, (O, group, sel) in cluster_rotation_offsets(lib, truth).items():
        Rp = rot.quat_to_matrix(np.asarray(m["rotation"])[sel])
        t = [truth[m["object"][i]] for i in sel]
        Rt = rot.quat_to_matrix(np.array([x["rotation"] for x in t]))
        rows += list(sel)
        ks += [k] * len(sel)
        rerr += list(rotation_error_deg(Rp, Rt, O, group))
        if class_period(t[0]["symmetry"]) > 0 and all(x["up"] is not None for x in t):
            yerr += list(yaw_about_up_error_deg(Rp, Rt, O, group, np.array([x["up"] for x in t])))
        else:
            yerr += [np.nan] * len(sel)
    return {"row": np.asarray(rows, np.int64), "cluster": np.asarray(ks, np.int64), "rotation": np.asarray(rerr, np.float64),
            "yaw": np.asarray(yerr, np.float64)}


def mined_rotation_errors(lib: Library, truth: dict[str, dict]) -> np.ndarray:
    """Rotation errors (degrees) of the mined members of each cluster's majority class that have a truth
    rotation (see the module docstring); empty when the truth has none."""
    return mined_pose_errors(lib, truth)["rotation"]


def percentile_or_nan(x, q: float) -> float:
    """The q-th percentile of x, NaN when x is empty."""
    return float(np.percentile(x, q)) if len(x) else float("nan")


def evaluate_mining(lib: Library, truth: dict[str, dict]) -> dict:
    m = lib.members
    have = np.array([o in truth for o in m["object"]])
    objs = np.asarray(m["object"])[have]
    cl = np.asarray(m["cluster"])[have]
    lab = np.array([truth[o]["label"] for o in objs])
    scores = clustering_scores(cl, lab)
    maj = majority_map(lib, truth)
    offsets = cluster_yaw_offsets(lib, truth)
    pose = mined_pose_errors(lib, truth)
    about_up = pose["yaw"][np.isfinite(pose["yaw"])]
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
                row["yaw_error_median_cluster_offset"] = float(np.median(e))
                ek = pose["yaw"][(pose["cluster"] == k) & np.isfinite(pose["yaw"])]
                row["yaw_error_median"] = float(np.median(ek)) if len(ek) else float(np.median(e))
        per_cluster.append(row)
    sym_ok = [r["detected_symmetry"] == r.get("true_symmetry") for r in per_cluster if "true_symmetry" in r]
    rerr = pose["rotation"]
    yaw = about_up if len(about_up) else np.asarray(errs)
    return {"n_objects": int(len(objs)), "K": lib.n_clusters, "n_classes": int(len(set(lab))),
            "purity": scores["purity"], "nmi": scores["nmi"], "ari": scores["ari"],
            "yaw_error_median_deg": percentile_or_nan(yaw, 50), "yaw_error_p90_deg": percentile_or_nan(yaw, 90),
            "yaw_error_kind": "about up" if len(about_up) else "cluster offset",
            "yaw_error_median_cluster_offset_deg": percentile_or_nan(errs, 50),
            "yaw_error_p90_cluster_offset_deg": percentile_or_nan(errs, 90),
            "symmetry_correct": int(sum(sym_ok)), "symmetry_total": len(sym_ok), "clusters": per_cluster,
            "rotation_error_median_deg": percentile_or_nan(rerr, 50), "rotation_error_p90_deg": percentile_or_nan(rerr, 90)}


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
