"""How good single-view labels are, against the demo scenario's truth (the label stage's target figures).

Conventions:

- ``records`` are the dicts of :mod:`protomine.label.matcher`.  Truth files are the scenario's CSVs
  (``truth_full.csv``: capture, object, class, yaw_deg, x, y, z, ...; or ``truth.csv``: object, label,
  yaw_deg).  A record is matched to its truth row by object id (masks) or, when ids do not match (no
  masks), by its base point to the nearest truth base point of the same capture within ``radius_m``
  (one-to-one, Hungarian matching by ``scipy.optimize.linear_sum_assignment``).
- Cluster -> class: each prototype is named after the majority truth class of its *mined members*
  (the library's members and the mining truth), so nothing of the labelled views leaks into the mapping.
  A truth class is "known" when some mined member has it, else "unknown" (never mined: held out).
- Yaw (truth with rotations and up): the turn about the support normal left between the record's pose and the
  true one once the prototype's rotation offset (below) is removed (``audit.metrics.yaw_about_up_error_deg``),
  modulo the true class's symmetry; classes with continuous symmetry are left out.  The older figure
  (``*_cluster_offset``; the only one without rotations in the truth): predicted yaw is relative to the prototype's
  canonical frame, truth yaw to the capture's reference direction, so they differ by one offset per prototype;
  that offset is the circular mean of (truth - predicted) over the prototype's mined members of its majority
  class (``audit.metrics``), and carries over to single views.  Errors are modulo the prototype's period; a
  continuous prototype has error 0 (``median_yaw_error_deg_oriented`` leaves those out).  It compares yaws taken
  about up from different resting faces' frames as if they were one quantity, so it is right only for views on
  the face the offset's members mostly rest on.
- Rotation (truth with qx, qy, qz, qw): the same idea in 3-D, one offset per prototype from its mined
  members (``mine.evaluate.cluster_rotation_offsets``), error = geodesic angle modulo the class's
  symmetry (``median_rotation_error_deg``, correctly classified known records).
- AUROC (``sklearn.metrics.roc_auc_score``) of the score for known (positive) vs unknown objects.

Figures returned (``evaluate_labels``): n_records, n_matched, n_known, n_unknown, accuracy (known
records whose best guess maps to their class, flagged or not), accuracy_by_score (the same if the cluster
were chosen by the highest score instead of the least distance; needs ``scores`` (n_records, K), NaN
without), accepted_accuracy (among known records
not flagged), median_yaw_error_deg and p90_yaw_error_deg (correctly classified known records),
median_yaw_error_deg_cluster_offset, p90_yaw_error_deg_cluster_offset, median_yaw_error_deg_oriented (the older
figure's), median_rotation_error_deg and p90_rotation_error_deg, auroc, unknown_flagged, known_flagged, cluster_to_class, per_class (n, accuracy, flagged).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.optimize import linear_sum_assignment
from sklearn.metrics import roc_auc_score

from ..audit.metrics import rotation_error_deg, symmetry_to_period_deg, yaw_about_up_error_deg, yaw_error_deg
from ..errors import InputError
from ..mine.evaluate import (truth_group, cluster_rotation_offsets, cluster_yaw_offsets, class_period, majority_map, percentile_or_nan,
                             read_truth_table)
from ..rotations import quat_to_matrix
from ..mine.library import Library

DEFAULT_RADIUS_M = 0.05


def evaluate_labels(records: list[dict], truth_full_csv: str | Path, library: Library,
                    mining_truth: str | Path, *, radius_m: float = DEFAULT_RADIUS_M,
                    scores: np.ndarray | None = None) -> dict:
    """The label targets for ``records`` (see the module docstring for every figure)."""
    truth = read_truth_table(truth_full_csv)
    mined = read_truth_table(mining_truth)
    members = [str(o) for o in library.members["object"]]
    missing = [o for o in members if o not in mined]
    if missing:
        raise InputError(mining_truth, "object", f"expected truth for every mined member, {len(missing)} missing "
                         f"(e.g. {missing[0]!r})")
    return _evaluate(records, truth, library, mined, radius_m, scores)


def record_groups(records: list[dict], depth_model: dict[str, str] | None = None) -> list[tuple[str, list[dict]]]:
    """The subsets of ``records`` the demo reports apart, as (name, records) in a fixed order: per depth model of
    their capture (``depth_model``: capture -> model, "gaussian" when absent; only when the records span more
    than one), then per kind of match: "canonical face" (``face`` 0: the matched pose rests the prototype on its
    canonical face, its +z) and "other face" (on a copy resting on another face, tilted; a record no prototype
    matched, ``face`` None, counts here).  The score separates never-mined objects far better on the first kind
    than on the second (README "Score"), so the two are measured apart.  Empty subsets are left out."""
    depth_model = depth_model or {}
    out: list[tuple[str, list[dict]]] = []
    models = sorted({depth_model.get(r["capture"], "gaussian") for r in records})
    for model in models if len(models) > 1 else []:
        out.append((f"{model} depth", [r for r in records if depth_model.get(r["capture"], "gaussian") == model]))
    canonical = [r for r in records if r.get("face") == 0]
    other = [r for r in records if r.get("face") != 0]
    out += [("canonical face", canonical), ("other face", other)]
    return [(name, sub) for name, sub in out if sub]


def match_records(records: list[dict], truth: dict[str, dict], radius_m: float) -> list[str | None]:
    """Truth object id of every record (None when unmatched): by id, else by base point within radius_m."""
    out: list[str | None] = [r["object"] if r["object"] in truth else None for r in records]
    by_cap: dict[str, list[int]] = {}
    for i, r in enumerate(records):
        if out[i] is None:
            by_cap.setdefault((r["capture"], r["frame"]), []).append(i)
    for (cap, _), idx in by_cap.items():
        cand = [oid for oid, t in truth.items() if t["capture"] == cap and t["point"] is not None]
        if not cand:
            continue
        A = np.array([records[i]["base_world"] for i in idx])
        B = np.array([truth[o]["point"] for o in cand])
        d = np.linalg.norm(A[:, None] - B[None], axis=2)
        rows, cols = linear_sum_assignment(np.where(d <= radius_m, d, 1e6))
        for r_, c_ in zip(rows, cols):
            if d[r_, c_] <= radius_m:
                out[idx[r_]] = cand[c_]
    return out


def _evaluate(records, truth, library, mined, radius_m, scores=None) -> dict:
    classes = majority_map(library, mined)
    offsets = cluster_yaw_offsets(library, mined, prototype_period=True)
    rot_off = cluster_rotation_offsets(library, mined)
    known_classes = {mined[str(o)]["class"] for o in library.members["object"]}
    ids = match_records(records, truth, radius_m)
    rows = []
    for i, (r, oid) in enumerate(zip(records, ids)):
        if oid is None:
            continue
        t = truth[oid]
        k = r["cluster"]
        by_score = int(np.argmax(scores[i])) if scores is not None else None
        rows.append({"class": t["class"], "known": t["class"] in known_classes, "score": float(r["score"]),
                     "correct_by_score": by_score is not None and classes.get(by_score) == t["class"],
                     "flag": bool(r["unknown"]), "correct": k is not None and classes.get(k) == t["class"],
                     "yaw_err_cluster_offset": _yaw_error(library, k, offsets, t["yaw_deg"], r["yaw_deg"]),
                     "yaw_about_up": _yaw_about_up_error(rot_off, k, t, r.get("rotation")),
                     "rot_err": _rotation_error(rot_off, k, t, r.get("rotation")),
                     "period": _period(library, k)})
    known = [x for x in rows if x["known"]]
    unknown = [x for x in rows if not x["known"]]
    mean = lambda xs: float(np.mean(xs)) if len(xs) else float("nan")  # noqa: E731
    yaw_co = [x["yaw_err_cluster_offset"] for x in known if x["correct"] and x["yaw_err_cluster_offset"] is not None]
    yaw_or = [x["yaw_err_cluster_offset"] for x in known
              if x["correct"] and x["yaw_err_cluster_offset"] is not None and np.isfinite(x["period"])]
    yaw_up = [x["yaw_about_up"] for x in known if x["correct"] and x["yaw_about_up"] is not None]
    yaw_all = yaw_up if yaw_up else yaw_co
    rerr = [x["rot_err"] for x in known if x["correct"] and x["rot_err"] is not None]
    auroc = (float(roc_auc_score([x["known"] for x in rows], [x["score"] for x in rows]))
             if known and unknown else float("nan"))
    per_class = {}
    for c in sorted({x["class"] for x in rows}):
        xs = [x for x in rows if x["class"] == c]
        per_class[c] = {"n": len(xs), "known": xs[0]["known"], "accuracy": mean([x["correct"] for x in xs]) if xs[0]["known"] else None,
                        "flagged": mean([x["flag"] for x in xs])}
    return {
        "n_records": len(records), "n_matched": len(rows), "n_known": len(known), "n_unknown": len(unknown),
        "accuracy": mean([x["correct"] for x in known]),
        "accuracy_by_score": mean([x["correct_by_score"] for x in known]) if scores is not None else float("nan"),
        "accepted_accuracy": mean([x["correct"] for x in known if not x["flag"]]),
        "median_yaw_error_deg": percentile_or_nan(yaw_all, 50), "p90_yaw_error_deg": percentile_or_nan(yaw_all, 90),
        "median_yaw_error_deg_cluster_offset": percentile_or_nan(yaw_co, 50),
        "p90_yaw_error_deg_cluster_offset": percentile_or_nan(yaw_co, 90),
        "median_yaw_error_deg_oriented": percentile_or_nan(yaw_or, 50),
        "auroc": auroc,
        "median_rotation_error_deg": percentile_or_nan(rerr, 50), "p90_rotation_error_deg": percentile_or_nan(rerr, 90),
        "unknown_flagged": mean([x["flag"] for x in unknown]),
        "known_flagged": mean([x["flag"] for x in known]),
        "cluster_to_class": {int(k): v for k, v in classes.items()},
        "per_class": per_class,
    }


def _rotation_error(offsets: dict, k: int | None, t: dict, pred_q) -> float | None:
    if k is None or t.get("rotation") is None or pred_q is None or k not in offsets:
        return None
    O = offsets[k][0]   # the view's own object's symmetry group (its truth turns, if any)
    Rp, Rt = quat_to_matrix(np.asarray(pred_q)[None]), quat_to_matrix(np.asarray(t["rotation"])[None])
    return float(rotation_error_deg(Rp, Rt, O, truth_group(t))[0])


def _yaw_about_up_error(offsets: dict, k: int | None, t: dict, pred_q) -> float | None:
    if (k is None or t.get("rotation") is None or t.get("up") is None or pred_q is None or k not in offsets
            or class_period(t["symmetry"]) == 0):
        return None
    O = offsets[k][0]
    Rp, Rt = quat_to_matrix(np.asarray(pred_q)[None]), quat_to_matrix(np.asarray(t["rotation"])[None])
    return float(yaw_about_up_error_deg(Rp, Rt, O, truth_group(t), np.asarray(t["up"])[None])[0])


def _period(library: Library, k: int | None) -> float:
    return symmetry_to_period_deg(int(library.prototypes["symmetry"][k])) if k is not None else float("nan")


def _yaw_error(library: Library, k: int | None, offsets: dict[int, float], truth_yaw: float | None,
               pred_yaw: float) -> float | None:
    if k is None or truth_yaw is None:
        return None
    return float(yaw_error_deg([truth_yaw], [pred_yaw], offsets[k], _period(library, k))[0])
