"""The audit: numbers (report.json), pictures (PNG) and one self-contained, offline-readable report.html.

Conventions:

- Inputs are the library's assignments (one row per object), the truth rows (see :mod:`.truth`) and the
  object table the truth rows refer to.  Cluster ids are integers >= 0; a negative cluster id means the
  object was left unassigned (open set) and is listed, not scored.
- "Labelled" objects are those matched by a truth row *and* assigned to a cluster; every score is computed
  on them.  Unlabelled objects, unmatched truth rows and labelled-but-unassigned objects are counted and
  listed in the report.
- Yaw periods: ``symmetry_period_deg[c]`` is 360/n for an n-fold prototype, 360 for none, ``inf`` for
  continuous symmetry (then every yaw error is 0).  In JSON an infinite period is written as null.
- Every interval is two-sided 95%: bootstrap (percentile, labelled objects resampled) for the global
  scores, Wilson score for per-cluster purity.
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

from ..atomic import clean_stale_temporaries, write_bytes, write_text
from ..errors import InputError
from .metrics import clustering_scores, contingency, yaw_error_deg, yaw_offset_deg
from .truth import ObjectTable, TruthRow, match_truth
from .uncertainty import bootstrap_intervals, labels_needed_for_width, propagation_accuracy, wilson_interval

__all__ = ["Assignments", "build_audit", "write_report", "NOTICE", "FORMAT"]

FORMAT = "protomine.audit/1"
CONFIDENCE = 0.95
PROPAGATION_DRAWS = (1, 3, 5)
MAX_SHEET = 60            # members shown per contact sheet (labelled ones first)
MAX_HTML_LIST = 200       # longest list spelled out in the HTML; report.json always has all of it
NOTICE = ("These cluster labels are bootstrapped by unsupervised clustering; they are not ground truth. "
          "The numbers below estimate their quality from a small held-out labelled set. Audit the labels "
          "(and this report's uncertainty) before training anything whose mistakes can hurt someone.")


@dataclass
class Assignments:
    """The library's answer per object.

    object_ids: (N,) str.  cluster: (N,) int, < 0 = unassigned.  yaw_deg: (N,) yaw relative to the cluster
    prototype, degrees in [0, 360).  scale: (N,) object size / prototype size.  distance: (N,) pose-minimised
    distance to the prototype.  score: (N,) match score (higher = more confident).
    """

    object_ids: np.ndarray
    cluster: np.ndarray
    yaw_deg: np.ndarray
    scale: np.ndarray
    distance: np.ndarray
    score: np.ndarray

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
                provenance: dict | None = None) -> dict:
    """Compute every audit number; returns the report.json content (plain JSON types only).

    symmetry_period_deg: cluster -> yaw period (missing clusters: 360).  names: cluster -> user name
    (optional).  cfg: the merged config (uses ``audit.*``).  truth_path names the CSV in error messages.
    """
    a = cfg["audit"]
    missing = sorted(set(assignments.object_ids.tolist()) - set(objects.ids.tolist()))
    if missing:
        raise InputError(None, "objects", f"{len(missing)} assigned object(s) are not in the object store "
                         f"(first: {missing[0]!r}); is this the store the library was mined from?")
    return _build_audit(assignments, truth_rows, objects, symmetry_period_deg, names, a, rng,
                        truth_path, provenance)


def _build_audit(asg, truth_rows, objects, periods, names, a, rng, truth_path, provenance) -> dict:
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
        ci = bootstrap_intervals(lab_cluster, lab_label, rng, n_resamples=int(a["bootstrap"]), confidence=CONFIDENCE)
        intervals = {k: list(v) for k, v in ci.items()}
    propagation = [
        {**p, "interval": list(p["interval"])}
        for p in (propagation_accuracy(lab_cluster, lab_label, rng, draws=d, n_repeats=int(a["bootstrap"]),
                                       confidence=CONFIDENCE) for d in PROPAGATION_DRAWS)
    ] if n_lab else []

    clusters = _per_cluster(asg, cluster_ids, lab_idx, lab_cluster, lab_label, lab_rows, periods, names, a)
    pose = _pose_summary(clusters)
    table, t_clusters, t_labels = contingency(lab_cluster, lab_label) if n_lab else (np.zeros((0, 0), int), [], [])

    return _jsonable({
        "format": FORMAT,
        "notice": NOTICE,
        "provenance": provenance or {},
        "confidence": CONFIDENCE,
        "config": {k: a[k] for k in sorted(a)},
        "counts": {
            "objects": int(objects.ids.shape[0]),
            "assigned": int(assigned.sum()),
            "unassigned": int((~assigned).sum()) + int(objects.ids.shape[0] - asg.object_ids.shape[0]),
            "clusters": int(cluster_ids.size),
            "truth_rows": len(truth_rows),
            "matched_truth_rows": len(match.rows),
            "unmatched_truth_rows": len(match.unmatched),
            "labelled": int(n_lab),
            "labelled_unassigned": len(lab_unassigned),
            "unlabelled_objects": int(objects.ids.shape[0] - len(matched_ids)),
            "labelled_with_yaw": int(sum(tr.yaw_deg is not None for tr in lab_rows)),
        },
        "scores": scores,
        "intervals": intervals,
        "interval_method": "percentile bootstrap over labelled objects (scipy.stats.bootstrap), "
                           f"{int(a['bootstrap'])} resamples; per-cluster purity: Wilson score",
        "clusters": clusters,
        "confusion": {"clusters": list(t_clusters), "labels": list(t_labels), "counts": table.tolist()},
        "pose": pose,
        "propagation": propagation,
        "target_interval_width": float(a["target_interval_width"]),
        "unlabelled_objects": [str(o) for o in objects.ids.tolist() if o not in matched_ids],
        "labelled_unassigned": lab_unassigned,
        "unmatched_truth": [{"row": tr.row, "key": tr.key, "label": tr.label, "reason": why}
                            for tr, why in match.unmatched],
        "labelled_objects": [{"object": str(asg.object_ids[j]), "cluster": int(asg.cluster[j]), "label": tr.label,
                              "row": tr.row} for j, tr in zip(lab_idx.tolist(), lab_rows)],
    })


def _per_cluster(asg, cluster_ids, lab_idx, lab_cluster, lab_label, lab_rows, periods, names, a) -> list[dict]:
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
        needed = labels_needed_for_width(purity, target, CONFIDENCE)
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
            "purity_interval": list(wilson_interval(k, n, CONFIDENCE)),
            "labels_needed": needed,
            "more_labels_needed": max(needed - n, 0),
            "symmetry_period_deg": None if math.isinf(period) else period,
            "mean_scale": float(asg.scale[members].mean()) if members.size else None,
            "mean_score": float(asg.score[members].mean()) if members.size else None,
            "verdict": "unlabelled" if n == 0 else ("clean" if purity >= clean_purity else "mixed"),
            "split_labels": [lab for lab, _ in ranked] if n and purity < clean_purity else [],
            "merge_with": None,
            "members": [{"object": str(asg.object_ids[j]), "label": label_of.get(int(j)),
                         "score": float(asg.score[j])} for j in members.tolist()],
            "pose": _cluster_pose(asg, lab_idx[in_c], [tr for tr, inc in zip(lab_rows, in_c) if inc], period),
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


def _cluster_pose(asg, idx: np.ndarray, rows: list[TruthRow], period: float) -> dict | None:
    has = np.array([tr.yaw_deg is not None for tr in rows], dtype=bool)
    if not has.any():
        return None
    truth = np.array([tr.yaw_deg for tr, h in zip(rows, has) if h], dtype=np.float64)
    pred = asg.yaw_deg[idx[has]]
    offset = yaw_offset_deg(truth, pred, period)
    err = yaw_error_deg(truth, pred, offset, period)
    return {
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
    return {"n": int(errs.size), "median_error_deg": float(np.median(errs)),
            "p90_error_deg": float(np.percentile(errs, 90)), "errors_deg": errs.tolist()}


def _jsonable(x):
    """Plain JSON types: numpy scalars/arrays converted, non-finite floats become null."""
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
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
    fig = Figure(figsize=(w, h), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()


def _confusion_png(audit: dict) -> bytes:
    conf = audit["confusion"]
    counts = np.asarray(conf["counts"], dtype=float).reshape(len(conf["clusters"]), len(conf["labels"]))
    k, m = counts.shape
    fig = _figure(max(4.0, 0.6 * m + 2.5), max(3.0, 0.4 * k + 1.5))
    ax = fig.add_subplot()
    im = ax.imshow(counts, cmap="Blues", aspect="auto")
    ax.set_xticks(range(m), [str(s) for s in conf["labels"]], rotation=45, ha="right")
    ax.set_yticks(range(k), [str(c) for c in conf["clusters"]])
    ax.set_xlabel("truth label")
    ax.set_ylabel("cluster")
    ax.set_title("labelled objects: cluster x truth label")
    for i in range(k):
        for j in range(m):
            if counts[i, j]:
                ax.text(j, i, f"{int(counts[i, j])}", ha="center", va="center",
                        color="white" if counts[i, j] > counts.max() / 2 else "black", fontsize=8)
    fig.colorbar(im, ax=ax, label="objects")
    return _png(fig)


def _purity_png(audit: dict) -> bytes:
    cl = [c for c in audit["clusters"] if c["labelled"]]
    fig = _figure(max(4.0, 0.45 * len(cl) + 2.0), 3.5)
    ax = fig.add_subplot()
    x = np.arange(len(cl))
    p = np.array([c["purity"] for c in cl], dtype=float)
    lo = np.array([c["purity_interval"][0] for c in cl], dtype=float)
    hi = np.array([c["purity_interval"][1] for c in cl], dtype=float)
    colours = {"clean": "tab:green", "mixed": "tab:red", "duplicate": "tab:orange"}
    ax.bar(x, p, color=[colours.get(c["verdict"], "grey") for c in cl])
    ax.errorbar(x, p, yerr=np.vstack([p - lo, hi - p]), fmt="none", ecolor="black", capsize=3)
    ax.set_xticks(x, [f"{c['cluster']}\n(n={c['labelled']})" for c in cl], fontsize=7)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("purity")
    ax.set_title("per-cluster purity, 95% Wilson intervals (green clean, red mixed, orange duplicate)", fontsize=9)
    return _png(fig)


def _yaw_png(audit: dict) -> bytes:
    errs = np.asarray(audit["pose"]["errors_deg"], dtype=float)
    fig = _figure(5.0, 3.2)
    ax = fig.add_subplot()
    ax.hist(errs, bins=np.linspace(0, 180, 37), color="tab:blue")
    ax.axvline(audit["pose"]["median_error_deg"], color="black", ls="--", label="median")
    ax.axvline(audit["pose"]["p90_error_deg"], color="tab:red", ls=":", label="90th percentile")
    ax.set_xlabel("yaw error after per-cluster alignment, modulo symmetry period (degrees)")
    ax.set_ylabel("labelled objects")
    ax.legend()
    return _png(fig)


def _contact_png(entry: dict, crops: Callable[[str], list[np.ndarray]], size: int = 64) -> bytes:
    from PIL import Image, ImageDraw
    members = sorted(entry["members"], key=lambda m: m["label"] is None)[:MAX_SHEET]
    cols = min(10, max(1, len(members)))
    rows = max(1, math.ceil(len(members) / cols))
    pad = 4
    sheet = Image.new("RGB", (cols * (size + pad) + pad, rows * (size + pad) + pad), (255, 255, 255))
    draw = ImageDraw.Draw(sheet)
    for i, m in enumerate(members):
        thumbs = crops(m["object"])
        x0, y0 = pad + (i % cols) * (size + pad), pad + (i // cols) * (size + pad)
        if thumbs:
            img = Image.fromarray(np.asarray(thumbs[0], dtype=np.uint8)).convert("RGB")
            img.thumbnail((size, size))
            sheet.paste(img, (x0 + (size - img.width) // 2, y0 + (size - img.height) // 2))
        else:
            draw.rectangle([x0, y0, x0 + size - 1, y0 + size - 1], fill=(220, 220, 220))
        if m["label"] is not None:
            wrong = m["label"] != entry["majority_label"]
            colour = (220, 30, 30) if wrong else (30, 170, 30)
            draw.rectangle([x0 - 2, y0 - 2, x0 + size + 1, y0 + size + 1], outline=colour, width=3)
            if wrong:                                  # a cross as well, so it reads without colour
                draw.line([x0, y0, x0 + size - 1, y0 + size - 1], fill=colour, width=2)
                draw.line([x0, y0 + size - 1, x0 + size - 1, y0], fill=colour, width=2)
    arr = np.asarray(sheet)
    fig = _figure(max(3.0, arr.shape[1] / 80), max(1.5, arr.shape[0] / 80 + 0.6))
    ax = fig.add_subplot()
    ax.imshow(arr, interpolation="nearest")
    ax.set_axis_off()
    shown = f"showing {len(members)} of {entry['size']}" if entry["size"] > len(members) else f"{entry['size']} members"
    ax.set_title(f"cluster {entry['cluster']} ({entry['name']}), majority {entry['majority_label']!s}; {shown}\n"
                 "green: labelled, agrees with majority; red + cross: labelled, disagrees", fontsize=8)
    return _png(fig)


# --- writing --------------------------------------------------------------------------------

def write_report(out_dir: str | Path, audit: dict, *, gallery_png: Path | None = None,
                 crops: Callable[[str], list[np.ndarray]] | None = None) -> dict[str, Path]:
    """Write report.json, the PNGs and report.html (self-contained, images as base64) into ``out_dir``.

    gallery_png: a prototype gallery PNG made elsewhere (copied and embedded).  crops: object id -> list of
    (H, W, 3) uint8 thumbnails; the first one is shown on the cluster contact sheets.
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
    images: dict[str, tuple[str, bytes]] = {}          # file name -> (caption, png bytes), in report order
    if audit["confusion"]["labels"]:
        images["confusion.png"] = ("Confusion matrix: clusters x truth labels", _confusion_png(audit))
        images["purity.png"] = ("Per-cluster purity with 95% Wilson intervals", _purity_png(audit))
    if audit["pose"]:
        images["yaw_error.png"] = ("Yaw error after per-cluster offset alignment", _yaw_png(audit))
    if gallery_png is not None:
        images["gallery.png"] = ("Prototype gallery", gallery_png.read_bytes())
    if crops is not None:
        for c in audit["clusters"]:
            images[f"cluster_{c['cluster']}.png"] = (f"Cluster {c['cluster']} ({c['name']}): member crops",
                                                     _contact_png(c, crops))
    written: dict[str, Path] = {}
    for name, (_, data) in images.items():
        write_bytes(out_dir / name, data)
        written[name] = out_dir / name
    write_text(out_dir / "report.json", json.dumps(audit, indent=1))
    written["report.json"] = out_dir / "report.json"
    write_text(out_dir / "report.html", _html(audit, images))
    written["report.html"] = out_dir / "report.html"
    return written


def _fmt(x, digits: int = 3) -> str:
    if x is None:
        return "&ndash;"
    if isinstance(x, float):
        return f"{x:.{digits}f}"
    return html.escape(str(x))


def _interval(iv) -> str:
    return "&ndash;" if iv is None else f"[{_fmt(iv[0])}, {_fmt(iv[1])}]"


def _listing(items: list[str]) -> str:
    shown = "".join(f"<li>{html.escape(s)}</li>" for s in items[:MAX_HTML_LIST])
    more = (f"<p>Showing {MAX_HTML_LIST} of {len(items)}; report.json lists all.</p>"
            if len(items) > MAX_HTML_LIST else "")
    return f"<ul>{shown}</ul>{more}" if items else "<p>None.</p>"


def _html(audit: dict, images: dict[str, tuple[str, bytes]]) -> str:
    e = html.escape
    n = audit["counts"]
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>protomine audit</title><style>",
        "body{font-family:sans-serif;max-width:1100px;margin:auto;padding:1em}"
        "table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #bbb;padding:2px 6px;text-align:right}"
        "th{background:#eee}.notice{border:2px solid #c00;background:#fee;padding:.6em;font-weight:bold}"
        ".mixed{color:#b00}.duplicate{color:#b60}.clean{color:#070}img{max-width:100%}",
        "</style></head><body><h1>protomine audit</h1>",
        f"<p class='notice'>{e(audit['notice'])}</p>",
        "<h2>What was compared</h2><table>",
    ]
    for k, v in n.items():
        parts.append(f"<tr><th>{e(k.replace('_', ' '))}</th><td>{_fmt(v)}</td></tr>")
    parts.append("</table>")
    parts.append("<h2>Scores on the labelled objects</h2>")
    if audit["scores"]:
        parts.append(f"<p>Intervals: {e(audit['interval_method'])}, {int(audit['confidence'] * 100)}% two-sided.</p>")
        parts.append("<table><tr><th>score</th><th>value</th><th>95% interval</th></tr>")
        for k, v in audit["scores"].items():
            if k == "n":
                continue
            parts.append(f"<tr><th>{e(k)}</th><td>{_fmt(v)}</td><td>{_interval((audit['intervals'] or {}).get(k))}</td></tr>")
        parts.append("</table>")
    else:
        parts.append("<p class='mixed'>No labelled object was assigned to a cluster: nothing can be scored.</p>")
    parts.append("<h2>Clusters</h2><p>Labels needed: labelled members for a Wilson interval at most "
                 f"{_fmt(audit['target_interval_width'], 2)} wide, assuming the observed purity holds.</p>")
    parts.append("<table><tr><th>cluster</th><th>name</th><th>size</th><th>labelled</th><th>majority</th>"
                 "<th>purity</th><th>95% Wilson</th><th>verdict</th><th>suggestion</th><th>labels needed (more)</th>"
                 "<th>yaw offset</th><th>median / p90 yaw error</th></tr>")
    for c in audit["clusters"]:
        if c["verdict"] == "mixed":
            sug = "split into " + ", ".join(f"{e(lab)} ({c['label_counts'][lab]})" for lab in c["split_labels"])
        elif c["verdict"] == "duplicate":
            sug = f"merge into cluster {c['merge_with']} (same majority label)"
        elif c["verdict"] == "unlabelled":
            sug = "label some members"
        else:
            sug = ""
        pose = c["pose"]
        parts.append(
            f"<tr><td>{c['cluster']}</td><td>{e(c['name'])}</td><td>{c['size']}</td><td>{c['labelled']}</td>"
            f"<td>{_fmt(c['majority_label'])}{' (tie)' if c['majority_tied'] else ''}</td><td>{_fmt(c['purity'])}</td>"
            f"<td>{_interval(c['purity_interval'])}</td><td class='{c['verdict']}'>{c['verdict']}</td><td>{sug}</td>"
            f"<td>{c['labels_needed']} ({c['more_labels_needed']})</td>"
            f"<td>{_fmt(pose['offset_deg'], 1) if pose else '&ndash;'}</td>"
            f"<td>{(_fmt(pose['median_error_deg'], 1) + ' / ' + _fmt(pose['p90_error_deg'], 1)) if pose else '&ndash;'}</td></tr>")
    parts.append("</table>")
    if audit["pose"]:
        p = audit["pose"]
        parts.append(f"<h2>Pose consistency</h2><p>{p['n']} labelled objects with truth yaw: median error "
                     f"{_fmt(p['median_error_deg'], 1)}&deg;, 90th percentile {_fmt(p['p90_error_deg'], 1)}&deg; "
                     "(after one circular-mean offset per cluster, modulo the prototype's symmetry period).</p>")
    if audit["propagation"]:
        parts.append("<h2>Naming clusters from a few labels</h2><p>Each cluster is named by the majority of k randomly "
                     "drawn labelled members; accuracy over all labelled objects, repeated draws "
                     "(interval: 2.5-97.5 percentiles over draws). Ceiling: naming by the true majority.</p>"
                     "<table><tr><th>k</th><th>mean accuracy</th><th>interval</th><th>ceiling</th>"
                     "<th>clusters with fewer than k labels</th></tr>")
        for p in audit["propagation"]:
            parts.append(f"<tr><td>{p['draws']}</td><td>{_fmt(p['mean'])}</td><td>{_interval(p['interval'])}</td>"
                         f"<td>{_fmt(p['ceiling'])}</td><td>{len(p['short_clusters'])}</td></tr>")
        parts.append("</table>")
    parts.append("<h2>Pictures</h2>")
    for name, (caption, data) in images.items():
        b64 = base64.b64encode(data).decode("ascii")
        parts.append(f"<figure><img alt='{e(caption)}' src=\"data:image/png;base64,{b64}\">"
                     f"<figcaption>{e(caption)} ({e(name)})</figcaption></figure>")
    parts.append(f"<h2>Truth rows that matched nothing ({n['unmatched_truth_rows']})</h2>")
    parts.append(_listing([f"row {u['row']}: {u['key']} ({u['label']}): {u['reason']}" for u in audit["unmatched_truth"]]))
    parts.append(f"<h2>Labelled objects left unassigned ({n['labelled_unassigned']})</h2>")
    parts.append(_listing([f"{u['object']} ({u['label']}, row {u['row']})" for u in audit["labelled_unassigned"]]))
    parts.append(f"<h2>Objects without a truth label ({n['unlabelled_objects']})</h2>")
    parts.append(_listing(audit["unlabelled_objects"]))
    prov = audit.get("provenance") or {}
    if prov:
        parts.append("<h2>Provenance</h2><table>")
        parts.extend(f"<tr><th>{e(str(k))}</th><td style='text-align:left'>{e(str(v))}</td></tr>" for k, v in prov.items())
        parts.append("</table>")
    parts.append("</body></html>\n")
    return "".join(parts)
