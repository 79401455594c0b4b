"""The audit: numbers (report.json), pictures (PNG) and one self-contained, offline-readable report.html.

Conventions:

- Inputs are the library's assignments (one row per object), the truth rows (see :mod:`.truth`) and the
  object table the truth rows refer to.  Cluster ids are integers >= 0; a negative cluster id means the
  object was left unassigned (open set) and is listed, not scored.
- "Labelled" objects are those matched by a truth row *and* assigned to a cluster; every score is computed
  on them.  Unlabelled objects, unmatched truth rows and labelled-but-unassigned objects are counted and
  listed in the report; clusters without labels are counted and shown with unknown purity.
- Yaw periods: ``symmetry_period_deg[c]`` is 360/n for an n-fold prototype, 360 for none, ``inf`` for
  continuous symmetry (then every yaw error is 0).  In JSON an infinite period is written as null.
- Every interval is two-sided 95% (:mod:`.uncertainty`): Clopper-Pearson per cluster, the Fay-Feuer gamma
  interval for the size-weighted overall purity, a percentile bootstrap for NMI, ARI and accuracy only
  where the labels allow one (else the reason is reported).
- The page leads with one sentence on how far the labels can be trusted, then the clusters (each row with
  its member crops), then the cluster x label table ordered by Hungarian matching so that agreement forms
  the diagonal, all drawn in the report's own palette (``PALETTE``).
- All files are written through :mod:`protomine.atomic`; report.html is written last.
"""
from __future__ import annotations

import base64
import html
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from scipy.optimize import linear_sum_assignment

from ..atomic import clean_stale_temporaries, write_bytes, write_text
from ..drawing import cluster_colour as cluster_rgb
from ..errors import InputError
from .metrics import clustering_scores, contingency, rotation_error_deg, rotation_offset, yaw_error_deg, yaw_offset_deg
from ..rotations import geodesic_deg, quat_to_matrix
from .truth import ObjectTable, TruthRow, match_truth
from .uncertainty import (bootstrap_intervals, clopper_pearson_interval, labels_needed_for_width,
                          propagation_accuracy, stratified_purity)

__all__ = ["Assignments", "build_audit", "write_report", "hungarian_order", "jsonable", "NOTICE", "FORMAT", "PALETTE",
           "METRIC_NAMES"]

FORMAT = "protomine.audit/2"
CONFIDENCE = 0.95
PROPAGATION_DRAWS = (1, 3, 5)
MAX_STRIP = 12            # member crops shown beside a cluster's row (labelled ones first)
MAX_SHEET = 60            # members shown per cluster sheet file (labelled ones first)
MAX_HTML_LIST = 200       # longest list spelled out in the HTML; report.json always has all of it
NOTICE = ("These cluster labels are bootstrapped by unsupervised clustering; they are not ground truth. "
          "The numbers below estimate their quality from a small held-out labelled set. Audit the labels "
          "(and this report's uncertainty) before training anything whose mistakes can hurt someone.")
OVERALL_METHOD = ("size-weighted purity over the labelled clusters, Fay-Feuer gamma interval on the disagreeing "
                  "labels; per cluster: exact Clopper-Pearson")

# the report's own palette: warm paper, dark slate ink, teal for agreement, rust for disagreement, ochre
# for duplicates and what is not known yet; each cluster keeps the colour it has everywhere (drawing.py)
PALETTE = {
    "paper": "#fbfaf7", "ink": "#1f2a30", "muted": "#6b7780", "rule": "#d9d6cf", "panel": "#f1efe9",
    "agree": "#2f7f6f", "disagree": "#b5523b", "unknown": "#c99a2e",
}
METRIC_NAMES = {
    "purity": "Purity (labels agreeing with their cluster's majority)",
    "inverse_purity": "Inverse purity (how whole each label class is kept)",
    "hungarian_accuracy": "Accuracy after one-to-one matching of clusters to labels",
    "nmi": "Normalised mutual information (NMI)",
    "ari": "Adjusted Rand index (ARI)",
    "rand_index": "Rand index",
    "homogeneity": "Homogeneity (each cluster holds one label)",
    "completeness": "Completeness (each label sits in one cluster)",
    "v_measure": "V-measure (mean of the two above)",
}


def cluster_colour(c: int) -> str:
    """Cluster ``c``'s colour (as on overlays and member sheets, ``drawing.cluster_colour``) as hex."""
    r, g, b = cluster_rgb(c)
    return f"#{r:02x}{g:02x}{b:02x}"


@dataclass
class Assignments:
    """The library's answer per object.

    object_ids: (N,) str.  cluster: (N,) int, < 0 = unassigned.  yaw_deg: (N,) yaw relative to the cluster
    prototype, degrees in [0, 360).  scale: (N,) object size / prototype size.  distance: (N,) pose-minimised
    distance to the prototype.  score: (N,) match score (higher = more confident).  rotation: optional (N, 4)
    unit quaternions [qx, qy, qz, qw] of x_world = R x_prototype + t (the library's members).
    """

    object_ids: np.ndarray
    cluster: np.ndarray
    yaw_deg: np.ndarray
    scale: np.ndarray
    distance: np.ndarray
    score: np.ndarray
    rotation: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.object_ids = np.asarray(self.object_ids, dtype=str)
        self.cluster = np.asarray(self.cluster, dtype=np.int64)
        for name in ("yaw_deg", "scale", "distance", "score"):
            setattr(self, name, np.asarray(getattr(self, name), dtype=np.float64))
        n = self.object_ids.shape[0]
        for name in ("object_ids", "cluster", "yaw_deg", "scale", "distance", "score"):
            if getattr(self, name).shape != (n,):
                raise ValueError(f"Assignments.{name} must have shape ({n},), got {getattr(self, name).shape}")
        if len(set(self.object_ids.tolist())) != n:
            raise ValueError("Assignments.object_ids must be unique")


# --- numbers --------------------------------------------------------------------------------

def build_audit(assignments: Assignments, truth_rows: list[TruthRow], objects: ObjectTable, *,
                symmetry_period_deg: dict[int, float], names: dict[int, str], cfg: dict,
                rng: np.random.Generator, truth_path: str | Path | None = None,
                provenance: dict | None = None, symmetry_groups: dict[int, np.ndarray] | None = None) -> dict:
    """Compute every audit number; returns the report.json content (plain JSON types only).

    symmetry_period_deg: cluster -> yaw period (missing clusters: 360).  symmetry_groups: cluster -> the
    prototype's rotation group (G, 3, 3) in its own frame (``Library.symmetry_group``; missing: identity), used
    when the truth rows carry rotations and the assignments too.  names: cluster -> user name
    (optional).  cfg: the merged config (uses ``audit.*``).  truth_path names the CSV in error messages.
    ``open_set`` (what the unknown cut does to the labelled objects' views) and ``plan`` (the next objects to
    label) are None here; :mod:`.run` fills them in when it has the library and the store.
    """
    a = cfg["audit"]
    missing = sorted(set(assignments.object_ids.tolist()) - set(objects.ids.tolist()))
    if missing:
        raise InputError(None, "objects", f"{len(missing)} assigned object(s) are not in the object store "
                         f"(first: {missing[0]!r}); is this the store the library was mined from?")
    return _build_audit(assignments, truth_rows, objects, symmetry_period_deg, names, a, rng,
                        truth_path, provenance, symmetry_groups or {})


def _build_audit(asg, truth_rows, objects, periods, names, a, rng, truth_path, provenance, groups=None) -> dict:
    match = match_truth(truth_rows, objects, radius_m=float(a["match_radius_m"]), path=truth_path)
    row_of = {oid: i for i, oid in enumerate(asg.object_ids.tolist())}
    # labelled = matched and assigned; keep parallel lists (assignment index, truth row)
    lab_idx, lab_rows, lab_unassigned = [], [], []
    for oi, tr in zip(match.object_index.tolist(), match.rows):
        oid = str(objects.ids[oi])
        j = row_of.get(oid)
        if j is None or asg.cluster[j] < 0:
            lab_unassigned.append({"object": oid, "label": tr.label, "row": tr.row})
            continue
        lab_idx.append(j)
        lab_rows.append(tr)
    lab_idx = np.array(lab_idx, dtype=np.int64)
    lab_cluster = asg.cluster[lab_idx]
    lab_label = np.array([tr.label for tr in lab_rows], dtype=object)
    n_lab = lab_idx.size

    assigned = asg.cluster >= 0
    cluster_ids = np.unique(asg.cluster[assigned])
    matched_ids = {str(objects.ids[i]) for i in match.object_index.tolist()}

    scores = clustering_scores(lab_cluster, lab_label) if n_lab else None
    intervals = None
    if n_lab:
        intervals = {k: {"interval": None if v["interval"] is None else list(v["interval"]), "reason": v["reason"]}
                     for k, v in bootstrap_intervals(lab_cluster, lab_label, rng, n_resamples=int(a["bootstrap"]),
                                                     confidence=CONFIDENCE).items()}
    propagation = [
        {**p, "interval": list(p["interval"])}
        for p in (propagation_accuracy(lab_cluster, lab_label, rng, draws=d, n_repeats=int(a["bootstrap"]),
                                       confidence=CONFIDENCE) for d in PROPAGATION_DRAWS)
    ] if n_lab else []

    clusters = _per_cluster(asg, cluster_ids, lab_idx, lab_cluster, lab_label, lab_rows, periods, names, a, groups or {})
    purity = _overall_purity(clusters)
    pose = _pose_summary(clusters)
    table, t_clusters, t_labels = contingency(lab_cluster, lab_label) if n_lab else (np.zeros((0, 0), int), [], [])
    rows, cols, n_matched = hungarian_order(table)
    counts = {
        "objects": int(objects.ids.shape[0]),
        "assigned": int(assigned.sum()),
        "unassigned": int((~assigned).sum()) + int(objects.ids.shape[0] - asg.object_ids.shape[0]),
        "clusters": int(cluster_ids.size),
        "clusters_labelled": int(sum(c["labelled"] > 0 for c in clusters)),
        "truth_rows": len(truth_rows),
        "matched_truth_rows": len(match.rows),
        "unmatched_truth_rows": len(match.unmatched),
        "labelled": int(n_lab),
        "labelled_unassigned": len(lab_unassigned),
        "unlabelled_objects": int(objects.ids.shape[0] - len(matched_ids)),
        "labelled_with_yaw": int(sum(tr.yaw_deg is not None for tr in lab_rows)),
    }
    doc = {
        "format": FORMAT,
        "notice": NOTICE,
        "provenance": provenance or {},
        "confidence": CONFIDENCE,
        "config": {k: a[k] for k in sorted(a)},
        "counts": counts,
        "purity": purity,
        "scores": scores,
        "intervals": intervals,
        "interval_method": {"purity": OVERALL_METHOD,
                            "others": f"percentile bootstrap over labelled objects ({int(a['bootstrap'])} resamples), "
                                      "only where the labels can support one"},
        "clusters": clusters,
        "confusion": {"clusters": [t_clusters[i] for i in rows], "labels": [t_labels[j] for j in cols],
                      "counts": table[np.ix_(rows, cols)].tolist() if n_lab else [], "matched": n_matched},
        "pose": pose,
        "propagation": propagation,
        "open_set": None,
        "plan": None,
        "target_interval_width": float(a["target_interval_width"]),
        "unlabelled_objects": [str(o) for o in objects.ids.tolist() if o not in matched_ids],
        "labelled_unassigned": lab_unassigned,
        "unmatched_truth": [{"row": tr.row, "key": tr.key, "label": tr.label, "reason": why}
                            for tr, why in match.unmatched],
        "labelled_objects": [{"object": str(asg.object_ids[j]), "cluster": int(asg.cluster[j]), "label": tr.label,
                              "row": tr.row} for j, tr in zip(lab_idx.tolist(), lab_rows)],
    }
    doc["headline"] = headline(doc)
    return jsonable(doc)


def hungarian_order(table: np.ndarray) -> tuple[list[int], list[int], int]:
    """Row and column orders of a (K, L) counts table that put agreement on the diagonal.

    Clusters are matched one-to-one to labels maximising the agreeing count (Hungarian matching,
    ``scipy.optimize.linear_sum_assignment``); matched pairs come first, largest count first, so pair i
    sits at (i, i); unmatched rows and columns follow, largest total first.  Returns (rows, cols, pairs).
    """
    table = np.asarray(table)
    if table.size == 0:
        return list(range(table.shape[0])), list(range(table.shape[1] if table.ndim == 2 else 0)), 0
    r, c = linear_sum_assignment(table, maximize=True)
    pairs = sorted(zip(r.tolist(), c.tolist()), key=lambda rc: (-table[rc], rc))
    rest_r = sorted(set(range(table.shape[0])) - set(r.tolist()), key=lambda i: (-table[i].sum(), i))
    rest_c = sorted(set(range(table.shape[1])) - set(c.tolist()), key=lambda j: (-table[:, j].sum(), j))
    return [p[0] for p in pairs] + rest_r, [p[1] for p in pairs] + rest_c, len(pairs)


def _overall_purity(clusters: list[dict]) -> dict:
    lab = [c for c in clusters if c["labelled"]]
    total = sum(c["size"] for c in clusters)
    out = {"estimate": None, "interval": None, "labels": sum(c["labelled"] for c in lab),
           "clusters_labelled": len(lab), "clusters": len(clusters),
           "objects_in_labelled_clusters": sum(c["size"] for c in lab), "objects": total,
           "all_objects_interval": [0.0, 1.0], "method": OVERALL_METHOD}
    if not lab:
        return out
    k = [[c["label_counts"][c["majority_label"]] for c in lab]]
    n = [[c["labelled"] for c in lab]]
    est, lo, hi = stratified_purity(k, n, [c["size"] for c in lab], CONFIDENCE)
    covered = out["objects_in_labelled_clusters"] / max(total, 1)
    # unlabelled clusters may hold anything: their purity is only known to lie in [0, 1]
    out.update(estimate=float(est[0]), interval=[float(lo[0]), float(hi[0])],
               all_objects_interval=[float(lo[0]) * covered, float(hi[0]) * covered + (1.0 - covered)])
    return out


def headline(doc: dict) -> str:
    """One sentence (or three) on how far the cluster labels can be trusted, numbers first."""
    p = doc["purity"]
    pct = int(round(doc["confidence"] * 100))
    if p["estimate"] is None:
        return ("No hand label matched a clustered object, so the purity of these clusters is unknown. "
                "Label some objects (protomine audit LIBRARY --plan N --out DIR writes a sheet to fill in) and audit again.")
    lo, hi = p["interval"]
    labels = f"{p['labels']} label{'s' * (p['labels'] != 1)} in {p['clusters_labelled']} of {p['clusters']} clusters"
    if lo < 0.05:
        text = (f"These labels cannot bound the purity yet: {labels} allow anything from {lo:.2f} to {hi:.2f} "
                f"({pct}% confidence; estimate {p['estimate']:.3f}). A single label per cluster always agrees with "
                "itself, so it says nothing; two or more per cluster do.")
    else:
        text = (f"Purity at least {lo:.2f} with {pct}% confidence, from {labels} (estimate {p['estimate']:.3f}, "
                f"interval {lo:.3f} to {hi:.3f}).")
    missing = p["clusters"] - p["clusters_labelled"]
    if missing and lo < 0.05:
        text += f" {missing} cluster{'s' * (missing != 1)} {'have' if missing != 1 else 'has'} no label at all."
    elif missing:
        share = 1.0 - p["objects_in_labelled_clusters"] / max(p["objects"], 1)
        text += (f" {missing} cluster{'s' * (missing != 1)} ({share:.0%} of the objects) "
                 f"{'have' if missing != 1 else 'has'} no label yet and unknown purity; counting "
                 f"{'them' if missing != 1 else 'it'} as anything from 0 to 1, all objects are at least "
                 f"{p['all_objects_interval'][0]:.2f} pure.")
    verdicts = [c["verdict"] for c in doc["clusters"]]
    bad = [f"{verdicts.count(v)} {v}" for v in ("mixed", "duplicate") if verdicts.count(v)]
    if bad:
        text += f" To fix first: {' and '.join(bad)} cluster{'s' * (sum(verdicts.count(v) for v in ('mixed', 'duplicate')) != 1)}."
    return text


def _per_cluster(asg, cluster_ids, lab_idx, lab_cluster, lab_label, lab_rows, periods, names, a, groups) -> list[dict]:
    clean_purity = float(a.get("clean_purity", 0.9))
    target = float(a["target_interval_width"])
    out = []
    for c in cluster_ids.tolist():
        in_c = lab_cluster == c
        members = np.flatnonzero(asg.cluster == c)
        counts: dict[str, int] = {}
        for lab in lab_label[in_c].tolist():
            counts[lab] = counts.get(lab, 0) + 1
        # majority label; ties go to the alphabetically first label so the report is reproducible
        ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
        n = int(in_c.sum())
        majority = ranked[0][0] if ranked else None
        k = ranked[0][1] if ranked else 0
        purity = k / n if n else None
        needed, reachable = labels_needed_for_width(purity, target, CONFIDENCE, size=max(int(members.size), 1))
        period = float(periods.get(c, 360.0))
        label_of = {int(j): tr.label for j, tr, inc in zip(lab_idx.tolist(), lab_rows, in_c) if inc}
        entry = {
            "cluster": int(c),
            "name": names.get(c, f"cluster {c}"),
            "size": int(members.size),
            "labelled": n,
            "label_counts": dict(ranked),
            "majority_label": majority,
            "majority_tied": bool(len(ranked) > 1 and ranked[1][1] == k),
            "purity": purity,
            "purity_interval": list(clopper_pearson_interval(k, n, CONFIDENCE)),
            "labels_needed": needed,
            "labels_needed_reachable": reachable,
            "more_labels_needed": max(needed - n, 0),
            "symmetry_period_deg": None if math.isinf(period) else period,
            "mean_scale": float(asg.scale[members].mean()) if members.size else None,
            "mean_score": float(asg.score[members].mean()) if members.size else None,
            "verdict": "unlabelled" if n == 0 else ("clean" if purity >= clean_purity else "mixed"),
            "split_labels": [lab for lab, _ in ranked] if n and purity < clean_purity else [],
            "merge_with": None,
            "members": [{"object": str(asg.object_ids[j]), "label": label_of.get(int(j)),
                         "score": float(asg.score[j])} for j in members.tolist()],
            "pose": _cluster_pose(asg, lab_idx[in_c], [tr for tr, inc in zip(lab_rows, in_c) if inc], period,
                                  groups.get(c)),
        }
        out.append(entry)
    _mark_duplicates(out)
    return out


def _mark_duplicates(clusters: list[dict]) -> None:
    """Clean clusters sharing a majority label, and unlabelled clusters the user named like one: all but the
    best-supported one become duplicates of it (a merge is suggested)."""
    groups: dict[str, list[dict]] = {}
    for e in clusters:
        if e["verdict"] == "clean":
            groups.setdefault(e["majority_label"], []).append(e)
    for e in clusters:
        if e["verdict"] == "unlabelled" and e.get("name") and e["name"] in groups:
            groups[e["name"]].append(e)
    for group in groups.values():
        if len(group) < 2:
            continue
        keep = max(group, key=lambda e: (e["labelled"], e["size"], -e["cluster"]))
        for e in group:
            if e is not keep:
                e["verdict"] = "duplicate"
                e["merge_with"] = keep["cluster"]


def _cluster_pose(asg, idx: np.ndarray, rows: list[TruthRow], period: float, group: np.ndarray | None = None
                  ) -> dict | None:
    """Pose consistency of one cluster's labelled members: the rotation error when the truth rows carry
    rotations (and the assignments too), else the yaw error; one offset per cluster either way."""
    if asg.rotation is not None:
        has = np.array([tr.rotation is not None for tr in rows], dtype=bool)
        if has.any():
            # R_true ~ R_pred g O with g in the prototype's group: swap the roles so the group acts on the right
            Rt = quat_to_matrix(np.array([tr.rotation for tr, h in zip(rows, has) if h]))
            Rp = quat_to_matrix(asg.rotation[idx[has]])
            G = np.eye(3)[None] if group is None else np.asarray(group, np.float64)
            O = rotation_offset(Rt, Rp, G)
            err = rotation_error_deg(Rt, Rp, O, G)
            return {"kind": "rotation", "n": int(err.size), "offset_deg": float(geodesic_deg(np.eye(3), O)),
                    "median_error_deg": float(np.median(err)), "p90_error_deg": float(np.percentile(err, 90)),
                    "errors_deg": err.tolist(), "objects": asg.object_ids[idx[has]].tolist()}
    has = np.array([tr.yaw_deg is not None for tr in rows], dtype=bool)
    if not has.any():
        return None
    truth = np.array([tr.yaw_deg for tr, h in zip(rows, has) if h], dtype=np.float64)
    pred = asg.yaw_deg[idx[has]]
    offset = yaw_offset_deg(truth, pred, period)
    err = yaw_error_deg(truth, pred, offset, period)
    return {
        "kind": "yaw",
        "n": int(err.size),
        "offset_deg": offset,
        "median_error_deg": float(np.median(err)),
        "p90_error_deg": float(np.percentile(err, 90)),
        "errors_deg": err.tolist(),
        "objects": asg.object_ids[idx[has]].tolist(),
    }


def _pose_summary(clusters: list[dict]) -> dict | None:
    errs = [e for c in clusters if c["pose"] for e in c["pose"]["errors_deg"]]
    if not errs:
        return None
    errs = np.asarray(errs)
    kinds = sorted({c["pose"]["kind"] for c in clusters if c["pose"]})
    return {"kind": "+".join(kinds), "n": int(errs.size), "median_error_deg": float(np.median(errs)),
            "p90_error_deg": float(np.percentile(errs, 90)), "errors_deg": errs.tolist()}


def jsonable(x):
    """Plain JSON types: numpy scalars/arrays converted, non-finite floats become null."""
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return jsonable(x.tolist())
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


# --- pictures -------------------------------------------------------------------------------

def _figure(w: float, h: float):
    # a bare Figure on the Agg canvas: no pyplot global state, safe in threads and without a display
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(w, h), dpi=100, facecolor=PALETTE["paper"])
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight", facecolor=fig.get_facecolor())
    return buf.getvalue()


def _style_axes(ax) -> None:
    ax.set_facecolor(PALETTE["paper"])
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(PALETTE["muted"])
    ax.tick_params(colors=PALETTE["ink"], labelsize=8)
    ax.xaxis.label.set_color(PALETTE["ink"])
    ax.yaxis.label.set_color(PALETTE["ink"])


def _yaw_png(audit: dict) -> bytes:
    errs = np.asarray(audit["pose"]["errors_deg"], dtype=float)
    fig = _figure(5.0, 2.6)
    ax = fig.add_subplot()
    _style_axes(ax)
    ax.hist(errs, bins=np.linspace(0, 180, 37), color=PALETTE["agree"], edgecolor=PALETTE["paper"])
    ax.axvline(audit["pose"]["median_error_deg"], color=PALETTE["ink"], ls="--", lw=1, label="median")
    ax.axvline(audit["pose"]["p90_error_deg"], color=PALETTE["disagree"], ls=":", lw=1.5, label="90th percentile")
    what = "rotation error (geodesic angle)" if audit["pose"].get("kind") == "rotation" else "yaw error"
    ax.set_xlabel(f"{what} after per-cluster alignment, modulo the symmetry (degrees)")
    ax.set_ylabel("labelled objects")
    ax.legend(frameon=False, fontsize=8)
    return _png(fig)


def _hex_rgb(colour: str) -> tuple[int, int, int]:
    return tuple(int(colour[i:i + 2], 16) for i in (1, 3, 5))


def _members_png(entry: dict, crops: Callable[[str], list[np.ndarray]], limit: int, size: int, cols: int) -> bytes:
    """Member crops of one cluster, labelled ones first: teal frame = agrees with the majority, rust frame
    and a cross = disagrees (so it reads without colour), no frame = not labelled."""
    from PIL import Image, ImageDraw
    members = sorted(entry["members"], key=lambda m: m["label"] is None)[:limit]
    cols = min(cols, max(1, len(members)))
    rows = max(1, math.ceil(len(members) / cols))
    pad = 4
    sheet = Image.new("RGB", (cols * (size + pad) + pad, rows * (size + pad) + pad), _hex_rgb(PALETTE["paper"]))
    draw = ImageDraw.Draw(sheet)
    agree, disagree = _hex_rgb(PALETTE["agree"]), _hex_rgb(PALETTE["disagree"])
    for i, m in enumerate(members):
        thumbs = crops(m["object"])
        x0, y0 = pad + (i % cols) * (size + pad), pad + (i // cols) * (size + pad)
        if thumbs:
            img = Image.fromarray(np.asarray(thumbs[0], dtype=np.uint8)).convert("RGB")
            img.thumbnail((size, size))
            sheet.paste(img, (x0 + (size - img.width) // 2, y0 + (size - img.height) // 2))
        else:
            draw.rectangle([x0, y0, x0 + size - 1, y0 + size - 1], fill=_hex_rgb(PALETTE["rule"]))
        if m["label"] is not None:
            wrong = m["label"] != entry["majority_label"]
            colour = disagree if wrong else agree
            draw.rectangle([x0 - 2, y0 - 2, x0 + size + 1, y0 + size + 1], outline=colour, width=3)
            if wrong:
                draw.line([x0, y0, x0 + size - 1, y0 + size - 1], fill=colour, width=2)
                draw.line([x0, y0 + size - 1, x0 + size - 1, y0], fill=colour, width=2)
    buf = io.BytesIO()
    sheet.save(buf, format="PNG")
    return buf.getvalue()


# --- writing --------------------------------------------------------------------------------

def write_report(out_dir: str | Path, audit: dict, *, gallery_png: Path | None = None,
                 crops: Callable[[str], list[np.ndarray]] | None = None) -> dict[str, Path]:
    """Write report.json, the PNGs and report.html (self-contained, images as base64) into ``out_dir``.

    gallery_png: a prototype gallery PNG made elsewhere (copied and embedded).  crops: object id -> list of
    (H, W, 3) uint8 thumbnails; the first one is shown beside the cluster's row and on its member sheet.
    Returns {name: path} of everything written.
    """
    out_dir = Path(out_dir)
    if gallery_png is not None:
        gallery_png = Path(gallery_png)
        if not gallery_png.is_file() or gallery_png.read_bytes()[:8] != b"\x89PNG\r\n\x1a\n":
            raise InputError(gallery_png, None, "prototype gallery must be an existing PNG file")
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(out_dir, None, "output path exists and is not a folder")
    return _write_report(out_dir, audit, gallery_png, crops)


def _write_report(out_dir, audit, gallery_png, crops) -> dict[str, Path]:
    out_dir.mkdir(parents=True, exist_ok=True)
    clean_stale_temporaries(out_dir)
    files: dict[str, bytes] = {}                       # written beside the page
    strips: dict[int, bytes] = {}                      # shown in the cluster rows
    if audit["pose"]:
        files["yaw_error.png"] = _yaw_png(audit)
    if gallery_png is not None:
        files["gallery.png"] = gallery_png.read_bytes()
    if crops is not None:
        for c in audit["clusters"]:
            files[f"cluster_{c['cluster']}.png"] = _members_png(c, crops, MAX_SHEET, 64, 10)
            strips[c["cluster"]] = _members_png(c, crops, MAX_STRIP, 44, 6)
    written: dict[str, Path] = {}
    for name, data in files.items():
        write_bytes(out_dir / name, data)
        written[name] = out_dir / name
    write_text(out_dir / "report.json", json.dumps(audit, indent=1))
    written["report.json"] = out_dir / "report.json"
    write_text(out_dir / "report.html", _html(audit, strips, files))
    written["report.html"] = out_dir / "report.html"
    return written


def _fmt(x, digits: int = 3) -> str:
    if x is None:
        return "&ndash;"
    if isinstance(x, float):
        return f"{x:.{digits}f}"
    return html.escape(str(x))


def _interval(iv) -> str:
    return "&ndash;" if iv is None else f"{_fmt(iv[0])} &ndash; {_fmt(iv[1])}"


def _listing(items: list[str]) -> str:
    shown = "".join(f"<li>{html.escape(s)}</li>" for s in items[:MAX_HTML_LIST])
    more = (f"<p class='note'>Showing {MAX_HTML_LIST} of {len(items)}; report.json lists all.</p>"
            if len(items) > MAX_HTML_LIST else "")
    return f"<ul>{shown}</ul>{more}" if items else "<p class='note'>None.</p>"


def _img(data: bytes, alt: str, cls: str = "") -> str:
    b64 = base64.b64encode(data).decode("ascii")
    return f"<img{f' class={cls!r}' if cls else ''} alt='{html.escape(alt)}' src=\"data:image/png;base64,{b64}\">"


def _range_bar(point: float | None, iv) -> str:
    """An interval drawn as a bar on [0, 1] with the point estimate as a tick (pure HTML/CSS)."""
    if iv is None:
        return "<div class='bar'></div>"
    lo, hi = (max(0.0, min(1.0, float(v))) for v in iv)
    tick = "" if point is None else f"<i style='left:{100 * point:.1f}%'></i>"
    return (f"<div class='bar'><b style='left:{100 * lo:.1f}%;width:{max(100 * (hi - lo), 0.6):.1f}%'></b>{tick}"
            "</div>")


CSS = """
body{font-family:Georgia,'DejaVu Serif',serif;background:%(paper)s;color:%(ink)s;max-width:1180px;margin:auto;
padding:1.2em 1.6em;line-height:1.45}
h1{font-weight:normal;font-size:1.5em;margin:.2em 0 .4em;letter-spacing:.02em}
h2{font-weight:normal;font-size:1.15em;border-bottom:1px solid %(rule)s;margin-top:1.8em;padding-bottom:.15em}
.lead{font-size:1.2em;margin:.4em 0 .8em}
.figures{display:flex;flex-wrap:wrap;gap:.8em;margin:.6em 0 1em}
.figure{background:%(panel)s;padding:.5em .9em;border-left:4px solid %(agree)s;min-width:9em}
.figure .v{font-size:1.45em;display:block}.figure .k{font-size:.8em;color:%(muted)s}
.figure.warn{border-left-color:%(unknown)s}.figure.bad{border-left-color:%(disagree)s}
.notice{border-left:4px solid %(disagree)s;background:%(panel)s;padding:.5em .8em;font-size:.9em}
.note{color:%(muted)s;font-size:.88em}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}
td,th{padding:3px 8px;text-align:right;border-bottom:1px solid %(rule)s;vertical-align:middle}
th{font-weight:normal;color:%(muted)s;text-align:left}
td.l,th.l{text-align:left}
.swatch{display:inline-block;width:.8em;height:.8em;border-radius:2px;margin-right:.35em;vertical-align:-1px}
.clean{color:%(agree)s}.mixed{color:%(disagree)s}.duplicate{color:%(unknown)s}.unlabelled{color:%(muted)s}
.bar{position:relative;width:9em;height:.7em;background:%(panel)s;border:1px solid %(rule)s}
.bar b{position:absolute;top:0;bottom:0;background:%(agree)s;opacity:.55}
.bar i{position:absolute;top:-2px;bottom:-2px;width:2px;background:%(ink)s}
table.cross td{min-width:2.6em;text-align:center}
table.cross td.z{color:%(rule)s}
img{max-width:100%%}.strip{display:block;max-width:300px}
""" % PALETTE


def _cross_table(audit: dict) -> list[str]:
    conf = audit["confusion"]
    labels, clusters = conf["labels"], conf["clusters"]
    counts = np.asarray(conf["counts"], dtype=float).reshape(len(clusters), len(labels))
    e = html.escape
    name_of = {c["cluster"]: c["name"] for c in audit["clusters"]}
    parts = ["<table class='cross'><tr><th class='l'>cluster \\ label</th>"
             + "".join(f"<th>{e(str(lab))}</th>" for lab in labels) + "<th>labelled</th></tr>"]
    agree, disagree, twin = _hex_rgb(PALETTE["agree"]), _hex_rgb(PALETTE["disagree"]), _hex_rgb(PALETTE["unknown"])
    for i, c in enumerate(clusters):
        row_total = counts[i].sum()
        # a cluster left out of the one-to-one matching whose majority label another cluster already holds
        majority = int(np.argmax(counts[i])) if i >= conf["matched"] and row_total else -1
        cells = []
        for j in range(len(labels)):
            v = counts[i, j]
            if not v:
                cells.append("<td class='z'>&middot;</td>")
                continue
            on_diagonal = i == j and i < conf["matched"]
            r, g, b = agree if on_diagonal else twin if j == majority else disagree
            share = v / max(row_total, 1)
            ink = PALETTE["paper"] if share > 0.55 else PALETTE["ink"]
            cells.append(f"<td style='background:rgba({r},{g},{b},{0.15 + 0.85 * share:.2f});color:{ink}'>{int(v)}</td>")
        parts.append(f"<tr><th class='l'><span class='swatch' style='background:{cluster_colour(c)}'></span>"
                     f"{c} {e(str(name_of.get(c, '')))}</th>{''.join(cells)}<td>{int(row_total)}</td></tr>")
    parts.append("</table>")
    return parts


def _html(audit: dict, strips: dict[int, bytes], files: dict[str, bytes]) -> str:
    e = html.escape
    n = audit["counts"]
    p = audit["purity"]
    pct = int(round(audit["confidence"] * 100))
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>protomine audit</title>",
        f"<style>{CSS}</style></head><body><h1>How far these cluster labels can be trusted</h1>",
        f"<p class='lead'>{e(audit['headline'])}</p>",
        "<div class='figures'>",
    ]

    def figure(value: str, key: str, cls: str = "") -> None:
        parts.append(f"<div class='figure {cls}'><span class='v'>{value}</span><span class='k'>{e(key)}</span></div>")

    if p["interval"] is not None:
        figure(f"&ge; {p['interval'][0]:.2f}", f"purity, {pct}% lower bound", "" if p["interval"][0] >= 0.9 else "warn")
        figure(f"{p['estimate']:.3f}", "purity estimate (size-weighted)")
    figure(f"{p['clusters_labelled']} / {p['clusters']}", "clusters with labels",
           "" if p["clusters_labelled"] == p["clusters"] else "warn")
    figure(f"{n['labelled']}", "labelled objects")
    bad = sum(c["verdict"] in ("mixed", "duplicate") for c in audit["clusters"])
    figure(f"{bad}", "mixed or duplicate clusters", "bad" if bad else "")
    os_ = audit.get("open_set")
    if os_ and os_.get("views"):
        figure(f"{os_['rate_own']:.1%}", f"false unknowns on labelled views (alpha {os_['alpha']:g})",
               "" if os_["rate_own"] <= 2 * os_["alpha"] else "warn")
    parts.append("</div>")
    parts.append(f"<p class='notice'>{e(audit['notice'])}</p>")

    parts.append("<h2>Clusters</h2>")
    parts.append(f"<p class='note'>Purity per cluster with its exact {pct}% interval (Clopper-Pearson; the bar spans "
                 "the interval on 0 to 1, the tick is the estimate). Labels needed: labelled members for an interval "
                 f"at most {audit['target_interval_width']:.2f} wide if the observed purity holds, never more than the "
                 "cluster holds. Crops: teal frame = label agrees with the majority, rust frame and cross = disagrees, "
                 "no frame = not labelled.</p>")
    parts.append("<table><tr><th class='l'>cluster</th><th>size</th><th>labelled</th><th class='l'>majority label</th>"
                 "<th>purity</th><th class='l'>interval</th><th class='l'>verdict</th><th class='l'>what to do</th>"
                 "<th>labels needed</th><th>pose error (median)</th><th class='l'>members</th></tr>")
    for c in audit["clusters"]:
        if c["verdict"] == "mixed":
            sug = "split: " + ", ".join(f"{e(lab)} ({c['label_counts'][lab]})" for lab in c["split_labels"])
        elif c["verdict"] == "duplicate":
            sug = f"merge into cluster {c['merge_with']}"
        elif c["verdict"] == "unlabelled":
            sug = "label some members"
        else:
            sug = ""
        needed = (f"{c['labels_needed']} ({c['more_labels_needed']} more)" if c["labels_needed_reachable"]
                  else f"all {c['size']}")
        pose = c["pose"]
        strip = _img(strips[c["cluster"]], f"cluster {c['cluster']} members", "strip") if c["cluster"] in strips else ""
        parts.append(
            f"<tr><td class='l'><span class='swatch' style='background:{cluster_colour(c['cluster'])}'></span>"
            f"{c['cluster']} {e(c['name'])}</td><td>{c['size']}</td><td>{c['labelled']}</td>"
            f"<td class='l'>{_fmt(c['majority_label'])}{' (tie)' if c['majority_tied'] else ''}</td>"
            f"<td>{_fmt(c['purity'], 2)}</td><td class='l'>{_range_bar(c['purity'], c['purity_interval'])}"
            f"<span class='note'>{_interval(c['purity_interval'])}</span></td>"
            f"<td class='l {c['verdict']}'>{c['verdict']}</td><td class='l'>{sug}</td><td>{needed}</td>"
            f"<td>{(_fmt(pose['median_error_deg'], 1) + '&deg;') if pose else '&ndash;'}</td>"
            f"<td class='l'>{strip}</td></tr>")
    parts.append("</table>")

    if audit["confusion"]["labels"]:
        parts.append("<h2>Clusters against hand labels</h2>")
        parts.append("<p class='note'>Rows and columns are matched one to one (Hungarian matching), so agreement runs "
                     "down the diagonal (teal); rows below it are clusters whose label another cluster already holds "
                     "(ochre: merge candidates); other counts (rust) are labels a cluster should not hold. Shade = "
                     "share of the row.</p>")
        parts.extend(_cross_table(audit))

    parts.append("<h2>Scores on the labelled objects</h2>")
    if audit["scores"]:
        parts.append(f"<p class='note'>Purity: {e(audit['interval_method']['purity'])}. Other scores count each labelled "
                     f"object once; intervals: {e(audit['interval_method']['others'])}.</p>")
        parts.append(f"<table><tr><th class='l'>score</th><th>value</th><th class='l'>{pct}% interval</th></tr>")
        parts.append(f"<tr><td class='l'>{e(METRIC_NAMES['purity'])}, size-weighted</td><td>{_fmt(p['estimate'])}</td>"
                     f"<td class='l'>{_interval(p['interval'])}</td></tr>")
        for k, v in audit["scores"].items():
            if k == "n":
                continue
            iv = (audit["intervals"] or {}).get(k)
            if iv is None:
                cell = "<span class='note'>&ndash;</span>"
            elif iv["interval"] is None:
                cell = f"<span class='note'>not estimable: {e(iv['reason'])}</span>"
            else:
                cell = _interval(iv["interval"])
            name = METRIC_NAMES.get(k, k) + (", each labelled object once" if k == "purity" else "")
            parts.append(f"<tr><td class='l'>{e(name)}</td><td>{_fmt(v)}</td><td class='l'>{cell}</td></tr>")
        parts.append("</table>")
    else:
        parts.append("<p class='mixed'>No labelled object was assigned to a cluster: nothing can be scored.</p>")

    if os_:
        parts.append("<h2>Unknown objects</h2>")
        if os_.get("views"):
            parts.append(f"<p>The library calls a single view unknown when its score is below {os_['cut']:.4f}: the "
                         f"split-conformal cut at alpha {os_['alpha']:g} from {os_['calibration_views']} held-out views "
                         f"of mined objects, so at most {os_['alpha']:.0%} of known-class views should be flagged. On the "
                         f"{os_['views']} stored single views of the {os_['objects']} labelled objects it flags "
                         f"{os_['flagged']} ({os_['rate']:.1%}): {os_['flagged_own']} of the {os_['nearest_own']} views "
                         f"nearest to their own cluster (false unknowns, {os_['rate_own']:.1%}) and "
                         f"{os_['flagged_other']} of the {os_['nearest_other']} views nearest to another cluster (these "
                         f"would have been labelled wrong). Of the views whose hand label disagrees with their "
                         f"cluster's majority it flags {os_['flagged_disagreeing']} of {os_['disagreeing']}.</p>"
                         f"<p class='note'>{e(os_['note'])}</p>")
        else:
            parts.append(f"<p class='note'>{e(os_.get('note', 'no single views stored for the labelled objects'))}</p>")

    if audit["pose"]:
        q = audit["pose"]
        what = ("rotation: geodesic angle" if q.get("kind") == "rotation" else
                "yaw" if q.get("kind") == "yaw" else "rotation where given, else yaw")
        parts.append(f"<h2>Pose consistency</h2><p>{q['n']} labelled objects with a truth pose ({what}): median error "
                     f"{_fmt(q['median_error_deg'], 1)}&deg;, 90th percentile {_fmt(q['p90_error_deg'], 1)}&deg; "
                     "(after one offset per cluster, modulo the prototype's symmetry).</p>")
        parts.append(_img(files["yaw_error.png"], "pose error histogram"))
    if audit["propagation"]:
        parts.append("<h2>Naming clusters from a few labels</h2><p class='note'>Each cluster named by the majority of k "
                     "randomly drawn labelled members; accuracy over all labelled objects, over repeated draws "
                     "(interval: 2.5 to 97.5 percentiles of the draws). Ceiling: naming by the true majority.</p>"
                     "<table><tr><th>k</th><th>mean accuracy</th><th class='l'>interval</th><th>ceiling</th>"
                     "<th>clusters with fewer than k labels</th></tr>")
        for q in audit["propagation"]:
            parts.append(f"<tr><td>{q['draws']}</td><td>{_fmt(q['mean'])}</td><td class='l'>{_interval(q['interval'])}</td>"
                         f"<td>{_fmt(q['ceiling'])}</td><td>{len(q['short_clusters'])}</td></tr>")
        parts.append("</table>")
    if "gallery.png" in files:
        parts.append("<h2>Prototypes</h2>" + _img(files["gallery.png"], "prototype gallery"))
    plan = audit.get("plan")
    if plan:
        parts.append(f"<h2>What to label next</h2><p>{plan['objects']} objects chosen for the next round "
                     f"({e(plan['how'])}): fill in the <code>label</code> column of {e(plan['sheet'])} and pass it back "
                     "as the truth file (<code>protomine audit LIBRARY labelling_sheet.csv -o DIR</code>).</p>")
    parts.append("<h2>What was compared</h2><table>")
    for k, v in n.items():
        parts.append(f"<tr><td class='l'>{e(k.replace('_', ' '))}</td><td>{_fmt(v)}</td></tr>")
    parts.append("</table>")
    parts.append(f"<h2>Truth rows that matched nothing ({n['unmatched_truth_rows']})</h2>")
    parts.append(_listing([f"row {u['row']}: {u['key']} ({u['label']}): {u['reason']}" for u in audit["unmatched_truth"]]))
    parts.append(f"<h2>Labelled objects left unassigned ({n['labelled_unassigned']})</h2>")
    parts.append(_listing([f"{u['object']} ({u['label']}, row {u['row']})" for u in audit["labelled_unassigned"]]))
    parts.append(f"<h2>Objects without a hand label ({n['unlabelled_objects']})</h2>")
    parts.append(_listing(audit["unlabelled_objects"]))
    prov = audit.get("provenance") or {}
    if prov:
        parts.append("<h2>Provenance</h2><table>")
        parts.extend(f"<tr><td class='l'>{e(str(k))}</td><td class='l'>{e(str(v))}</td></tr>" for k, v in prov.items())
        parts.append("</table>")
    parts.append("</body></html>\n")
    return "".join(parts)
