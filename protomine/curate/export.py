"""Export bootstrapped labels for dataset building: JSON lines, COCO instance annotations, per-class summary.

Labels are bootstrapped by unsupervised prototype mining, not ground truth (``NOTE``).

Two sources, one output:
- an object store the library was mined from: every stored object of the given captures in every frame
  that sees it, labelled as mining assigned it (records with ``source`` "mined");
- the label records of ``protomine label`` (:func:`protomine.records.read_records`): single frames that were
  never ingested or mined become COCO images and annotations straight from their records.

Output folder::

    labels.jsonl     the label records (:mod:`protomine.records`: the same fields as ``protomine label`` writes)
    instances.json   COCO instance layout: images (id, file_name relative to the capture's parent, width,
                     height, capture, frame), annotations (id, image_id, category_id, bbox [x, y, w, h], area
                     = mask pixel count, segmentation = uncompressed RLE (records' ``segmentation``), iscrowd
                     0, plus object, score, yaw_deg), categories (id, name, supercategory "object"); one
                     category per distinct name, "cluster-N" for unnamed clusters.  Unknown labels are kept
                     out of instances.json (they stay in labels.jsonl, flagged).
    classes.csv      per category: category, clusters, objects, labels (object-frame rows), mean_score, unknown
    summary.json     counts, the --min-score filter and how many labels it dropped, NOTE
    README.txt       the README-ready sentence
    provenance.json  the folder's provenance manifest

Masks per frame from a store: the capture's masks/ (the object's mask id, the store key) when the store used
them; otherwise the object's pixels are re-derived exactly as ingest does without masks
(``ingest.proposals.find_objects(use_masks=False)`` with the store's recorded config and seed) and matched
to store objects by id (stable for the same capture and config), falling back to the nearest world centre
(within the object's footprint radius) when an id does not match.
"""
from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Callable

import numpy as np

from ..atomic import write_text
from ..progress import bar, detail
from ..provenance import file_fingerprint, provenance, record_outputs
from ..capture import read_capture
from ..errors import InputError
from ..ingest.pipeline import capture_rng, unique_capture_names
from ..ingest.proposals import find_objects
from ..ingest.store import ObjectStore
from ..mine.library import Library
from ..mine.openset import library_cut
from ..records import mask_to_rle, pixels_to_rle, read_records, rle_area  # noqa: F401  (mask_to_rle: public here too)

NOTE = ("Labels are bootstrapped by unsupervised prototype mining (protomine), not ground truth: "
        "review them (e.g. with protomine audit on a few hand labels) before training or evaluating on them.")


def _capture_masks(cap, store: ObjectStore, cap_row: int, objs: np.ndarray,
                   progress: Callable[[str], None] | None) -> dict[tuple[int, str], np.ndarray]:
    """(store object index, frame id) -> flat pixel indices, for every object of the capture and frame."""
    out: dict[tuple[int, str], np.ndarray] = {}
    if bool(store.captures["masks"][cap_row]) and cap.has_masks:
        keys = {str(store.objects["key"][i]): int(i) for i in objs}
        for fr in cap.frames:
            mk = cap.mask(fr.id).reshape(-1)
            for key, i in keys.items():
                if not key.isdigit():
                    continue
                pix = np.flatnonzero(mk == int(key))
                if len(pix):
                    out[(i, fr.id)] = pix
        return out
    scfg = store.config
    scene = find_objects(cap, scfg, capture_rng(int(store.attrs.get("seed", 0)), cap.name), use_masks=False, progress=progress)
    by_id = {str(store.ids[i]): int(i) for i in objs}
    centres = store.objects["center"][objs]
    for p in scene.proposals:
        i = by_id.get(p.object_id)
        if i is None or np.linalg.norm(store.objects["center"][i] - p.center_world) > store.objects["radius_m"][i]:
            d = np.linalg.norm(centres - p.center_world, axis=1)
            j = int(np.argmin(d)) if len(d) else -1
            if j < 0 or d[j] > store.objects["radius_m"][objs[j]]:
                continue
            i = int(objs[j])
        for fid, pix in p.pixels.items():
            out[(i, fid)] = pix
    return out


def export_labels(library: Library, source: str | Path | ObjectStore, captures: list[str | Path], out_dir: str | Path,
                  cfg: dict, *, min_score: float = 0.0, progress: Callable[[str], None] | None = None) -> dict:
    """Write labels.jsonl, instances.json, classes.csv, summary.json, README.txt into ``out_dir``.

    source: the object store the library was mined from (a path or an open store), or a label records file
    (JSON lines of ``protomine label``).  captures: the capture folders to export (by folder name: ingested
    into the store, or labelled in the records).  Returns the summary dict.
    """
    from ..ingest.sharded import open_store
    if not 0.0 <= min_score <= 1.0:
        raise InputError(None, "--min-score", f"expected a score in [0, 1], got {min_score}")
    if not captures:
        raise InputError(None, "captures", "expected at least one capture folder")
    names = unique_capture_names(captures)
    if isinstance(source, ObjectStore) or _is_hdf5(Path(source)):
        store = source if isinstance(source, ObjectStore) else open_store(source)
        cap_rows = {str(n): j for j, n in enumerate(store.captures["name"])}
        for c, n in zip(captures, names):
            if n not in cap_rows:
                raise InputError(c, "captures", f"capture {n!r} is not in the store {store.path} (ingest and mine it, "
                                 "or export the output of protomine label for it)")
        frames, no_pixels = _store_records(library, store, [Path(c) for c in captures], cfg, progress)
        inputs = {"store": store.fingerprint()}
    else:
        recs = read_records(source)
        have = {r["capture"] for r in recs}
        for c, n in zip(captures, names):
            if n not in have:
                raise InputError(c, "captures", f"capture {n!r} has no record in {source} (label it first)")
        caps = [read_capture(c, check_images=False) for c in captures]
        by_frame: dict[tuple[str, str], list[dict]] = {}
        for r in recs:
            by_frame.setdefault((r["capture"], str(r["frame"])), []).append(r)
        frames = [(cap, fr.id, by_frame.get((cap.name, fr.id), [])) for cap in caps for fr in cap.frames]
        no_pixels = 0
        inputs = {"labels": file_fingerprint(source)}
    inputs.update({"library": file_fingerprint(library.path) if library.path else "", "captures": names})
    prov = provenance(cfg, 0, inputs, command="export")
    summary = _write_export(library, frames, Path(out_dir), cfg, min_score, prov, progress)
    summary["objects_without_pixels"] = no_pixels
    return summary


def _is_hdf5(path: Path) -> bool:
    if not path.is_file():
        raise InputError(path, None, "file not found")
    with open(path, "rb") as fh:
        return fh.read(8) == b"\x89HDF\r\n\x1a\n"


def _store_records(lib: Library, store: ObjectStore, captures: list[Path], cfg: dict,
                   progress) -> tuple[list[tuple[object, str, list[dict]]], int]:
    """(capture, frame id, records) of every frame: mined objects labelled as mining assigned them; and the
    number of stored objects for which no frame gave pixels."""
    from ..label.matcher import symmetry_name
    mem = {str(o): j for j, o in enumerate(lib.members["object"])}
    m, p = lib.members, lib.prototypes
    unknown_score = library_cut(lib)
    second_score = lib.score(np.asarray(m["second_distance"], np.float64), np.maximum(np.asarray(m["second_cluster"]), 0),
                             single_view=False) if len(m["object"]) else np.zeros(0)
    out, no_pixels = [], 0
    cap_index = {str(n): j for j, n in enumerate(store.captures["name"])}
    for cap_path in captures:
        cap = read_capture(cap_path, check_images=False)
        objs = np.flatnonzero(store.objects["capture"] == cap.name)
        masks = _capture_masks(cap, store, cap_index[cap.name], objs, progress)
        h, w = cap.intrinsics.height, cap.intrinsics.width
        missing = [str(store.ids[i]) for i in objs if not any(key[0] == i for key in masks)]
        no_pixels += len(missing)
        detail(progress, f"{cap.name}: {len(cap.frames)} frames, {len(objs)} objects"
               + (f", {len(missing)} without pixels" if missing else ""))
        for fr in cap.frames:
            recs = []
            for i in objs:
                pix = masks.get((int(i), fr.id))
                if pix is None:
                    continue
                oid = str(store.ids[i])
                j = mem.get(oid)
                k = int(m["cluster"][j]) if j is not None else None
                score = float(m["score"][j]) if j is not None else 0.0
                v, u = np.divmod(pix, w)
                rec = {"capture": cap.name, "frame": fr.id, "object": oid, "source": "mined",
                       "bbox": [int(u.min()), int(v.min()), int(u.max()) + 1, int(v.max()) + 1],
                       "segmentation": pixels_to_rle(pix, h, w),
                       "center_world": [float(x) for x in store.objects["center"][i]],
                       "base_world": [float(x) for x in store.objects["origin"][i]],
                       "up": [float(x) for x in store.objects["up"][i]],
                       "size_m": [float(store.objects["radius_m"][i]), float(store.objects["height_m"][i])],
                       "cluster": k, "name": (str(p["name"][k]) or None) if k is not None else None,
                       "symmetry": symmetry_name(p["symmetry"][k]) if k is not None else None,
                       "yaw_deg": float(m["yaw_deg"][j]) if j is not None else None,
                       "rotation": [round(float(x), 6) for x in m["rotation"][j]] if j is not None else None,
                       "face": int(m["face"][j]) if j is not None else None,
                       "scale": float(m["scale"][j]) if j is not None else None,
                       "fit_scale": float(m["fit_scale"][j]) if j is not None else None,
                       "distance": float(m["distance"][j]) if j is not None else None,
                       "score": score, "unknown": bool(k is None or score < unknown_score),
                       "alternatives": [] if j is None or int(m["second_cluster"][j]) < 0
                       or not np.isfinite(m["second_distance"][j]) else [
                           {"cluster": int(m["second_cluster"][j]), "name": str(p["name"][int(m["second_cluster"][j])]) or None,
                            "distance": float(m["second_distance"][j]), "score": float(second_score[j])}]}
                recs.append(rec)
            out.append((cap, fr.id, recs))
    return out, no_pixels


def _write_export(lib: Library, frames: list[tuple[object, str, list[dict]]], out: Path, cfg: dict, min_score: float,
                  prov: dict, progress) -> dict:
    """COCO + JSON lines + per-class table from (capture, frame id, records) of every frame."""
    unknown_score = library_cut(lib)
    cat_names = [lib.display_name(k) for k in range(lib.n_clusters)]
    categories = {n: i + 1 for i, n in enumerate(dict.fromkeys(cat_names))}
    lines, images, annotations = [], [], []
    stats: dict[str, dict] = {}
    dropped = 0
    with bar(progress, "export", total=len(frames), unit="frames") as b:
        for cap, fid, recs in frames:
            image_id = len(images) + 1
            images.append({"id": image_id, "file_name": f"{cap.name}/rgb/{fid}.png", "width": int(cap.intrinsics.width),
                           "height": int(cap.intrinsics.height), "capture": cap.name, "frame": fid})
            for rec in recs:
                if rec["score"] < min_score:
                    dropped += 1
                    continue
                k = rec["cluster"]
                if k is not None and not 0 <= int(k) < lib.n_clusters:
                    raise InputError(lib.path, "prototypes", f"label record of {rec['object']} names cluster {k}, the "
                                     f"library has 0..{lib.n_clusters - 1} (labelled with another library?)")
                name = lib.display_name(int(k)) if k is not None else "unknown"
                if k is not None:       # the library's current name (the cluster may have been named since)
                    rec = {**rec, "name": str(lib.prototypes["name"][int(k)]) or None}
                lines.append(json.dumps(rec))
                st = stats.setdefault(name, {"clusters": set(), "objects": set(), "labels": 0, "scores": [], "unknown": 0})
                if k is not None:
                    st["clusters"].add(int(k))
                st["objects"].add(rec["object"])
                st["labels"] += 1
                st["scores"].append(rec["score"])
                st["unknown"] += int(rec["unknown"])
                if rec["unknown"]:
                    continue
                u0, v0, u1, v1 = rec["bbox"]
                annotations.append({"id": len(annotations) + 1, "image_id": image_id, "category_id": categories[name],
                                    "bbox": [u0, v0, u1 - u0, v1 - v0], "area": rle_area(rec["segmentation"]),
                                    "segmentation": rec["segmentation"], "iscrowd": 0, "object": rec["object"],
                                    "score": rec["score"], "yaw_deg": rec.get("yaw_deg")})
            b.advance()
    coco = {"info": {"description": NOTE, "version": "1", "contributor": "protomine"},
            "images": images, "annotations": annotations,
            "categories": [{"id": cid, "name": n, "supercategory": "object"} for n, cid in categories.items()]}
    out.mkdir(parents=True, exist_ok=True)
    write_text(out / "labels.jsonl", "".join(l + "\n" for l in lines))
    write_text(out / "instances.json", json.dumps(coco))
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    wr.writerow(["category", "clusters", "objects", "labels", "mean_score", "unknown"])
    classes = []
    for n in sorted(stats):
        s = stats[n]
        row = {"category": n, "clusters": " ".join(str(k) for k in sorted(s["clusters"])), "objects": len(s["objects"]),
               "labels": s["labels"], "mean_score": float(np.mean(s["scores"])), "unknown": s["unknown"]}
        classes.append(row)
        wr.writerow([row["category"], row["clusters"], row["objects"], row["labels"], f"{row['mean_score']:.4f}", row["unknown"]])
    write_text(out / "classes.csv", buf.getvalue())
    summary = {"note": NOTE, "captures": list(dict.fromkeys(cap.name for cap, _, _ in frames)), "images": len(images),
               "labels": len(lines), "annotations": len(annotations), "categories": len(categories),
               "min_score": min_score, "dropped_below_min_score": dropped, "unknown_score": unknown_score,
               "unknown_labels": int(sum(s["unknown"] for s in stats.values())), "classes": classes}
    write_text(out / "summary.json", json.dumps(summary, indent=1))
    write_text(out / "README.txt", NOTE + "\n")
    record_outputs([out / n for n in ("labels.jsonl", "instances.json", "classes.csv", "summary.json", "README.txt")], prov)
    return summary
