"""Export bootstrapped labels for dataset building: JSON lines, COCO instance annotations, per-class summary.

Labels are bootstrapped by unsupervised prototype mining, not ground truth (``NOTE``).

Output folder::

    labels.jsonl     one line per (capture, frame, object): capture, frame, object, bbox [u0, v0, u1, v1)
                     pixels (inclusive-exclusive), cluster, name, yaw_deg, scale, center_world [x, y, z] m,
                     score, unknown
    instances.json   COCO instance layout: images (id, file_name relative to the capture's parent, width,
                     height), annotations (id, image_id, category_id, bbox [x, y, w, h], area = mask pixel
                     count, segmentation = uncompressed RLE {"size": [h, w], "counts": [...]}: run lengths of
                     the column-major (Fortran-order) flattened mask, starting with a run of 0s, iscrowd 0,
                     plus object, score, yaw_deg), categories (id, name, supercategory "object"); one
                     category per distinct name, "cluster-N" for unnamed clusters.  Unknown labels are kept
                     out of instances.json (they stay in labels.jsonl, flagged).
    classes.csv      per category: category, clusters, objects, labels (object-frame rows), mean_score, unknown
    summary.json     counts, the --min-score filter and how many labels it dropped, NOTE
    README.txt       the README-ready sentence

Masks per frame: the capture's masks/ (the object's mask id, the store key) when the store used them;
otherwise the object's pixels are re-derived exactly as ingest does without masks
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
from ..provenance import file_fingerprint, provenance, write_sidecar
from ..capture import read_capture
from ..errors import InputError
from ..ingest.pipeline import capture_rng
from ..ingest.proposals import find_objects
from ..ingest.store import ObjectStore
from ..mine.library import Library
from ..mine.openset import library_cut

NOTE = ("Labels are bootstrapped by unsupervised prototype mining (protomine), not ground truth: "
        "review them (e.g. with protomine audit on a few hand labels) before training or evaluating on them.")


def mask_to_rle(mask: np.ndarray) -> dict:
    """Uncompressed COCO RLE of a boolean mask (h, w): column-major run lengths, first run counts 0s."""
    m = np.asarray(mask, dtype=bool)
    flat = m.ravel(order="F").astype(np.int8)
    change = np.flatnonzero(np.diff(flat)) + 1
    bounds = np.concatenate([[0], change, [flat.size]])
    runs = np.diff(bounds).tolist()
    if flat.size and flat[0] == 1:
        runs = [0] + runs
    return {"size": [int(m.shape[0]), int(m.shape[1])], "counts": [int(r) for r in runs]}


def _capture_masks(cap, store: ObjectStore, cap_row: int, objs: np.ndarray, seed: int,
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
    scene = find_objects(cap, scfg, capture_rng(int(store.attrs.get("seed", seed)), cap.name), use_masks=False, progress=progress)
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


def export_labels(library: Library, store: ObjectStore, captures: list[str | Path], out_dir: str | Path, cfg: dict, *,
                  min_score: float = 0.0, seed: int = 0, progress: Callable[[str], None] | None = None) -> dict:
    """Write labels.jsonl, instances.json, classes.csv, summary.json, README.txt into ``out_dir``.

    captures: capture folders that were ingested into ``store`` (by folder name).  Returns the summary dict.
    """
    if not 0.0 <= min_score <= 1.0:
        raise InputError(None, "--min-score", f"expected a score in [0, 1], got {min_score}")
    if not captures:
        raise InputError(None, "--captures", "expected at least one capture folder")
    names = [Path(c).name for c in captures]
    if len(set(names)) != len(names):
        raise InputError(None, "--captures", f"capture folder names must be unique, got {names}")
    cap_rows = {str(n): j for j, n in enumerate(store.captures["name"])}
    for c, n in zip(captures, names):
        if n not in cap_rows:
            raise InputError(c, "captures", f"capture {n!r} is not in the store {store.path} (ingest and mine it first)")
    return _export(library, store, [Path(c) for c in captures], Path(out_dir), cfg, min_score, seed, progress)


def _export(lib: Library, store: ObjectStore, captures: list[Path], out: Path, cfg: dict, min_score: float,
            seed: int, progress) -> dict:
    unknown_score = library_cut(lib)
    mem = {str(o): j for j, o in enumerate(lib.members["object"])}
    cat_names = [lib.display_name(k) for k in range(lib.n_clusters)]
    categories = {n: i + 1 for i, n in enumerate(dict.fromkeys(cat_names))}
    lines, images, annotations = [], [], []
    stats: dict[str, dict] = {}
    dropped = unmatched = no_mask = 0
    for cap_path in captures:
        cap = read_capture(cap_path, check_images=False)
        objs = np.flatnonzero(store.objects["capture"] == cap.name)
        masks = _capture_masks(cap, store, {str(n): j for j, n in enumerate(store.captures["name"])}[cap.name], objs, seed, progress)
        h, w = cap.intrinsics.height, cap.intrinsics.width
        for fr in cap.frames:
            image_id = len(images) + 1
            images.append({"id": image_id, "file_name": f"{cap.name}/rgb/{fr.id}.png", "width": int(w), "height": int(h),
                           "capture": cap.name, "frame": fr.id})
            for i in objs:
                pix = masks.get((int(i), fr.id))
                if pix is None:
                    continue
                oid = str(store.ids[i])
                j = mem.get(oid)
                k = int(lib.members["cluster"][j]) if j is not None else -1
                score = float(lib.members["score"][j]) if j is not None else 0.0
                if score < min_score:
                    dropped += 1
                    continue
                unknown = k < 0 or score < unknown_score
                v, u = np.divmod(pix, w)
                bbox = [int(u.min()), int(v.min()), int(u.max()) + 1, int(v.max()) + 1]
                name = lib.display_name(k) if k >= 0 else "unknown"
                rec = {"capture": cap.name, "frame": fr.id, "object": oid, "bbox": bbox,
                       "cluster": k if k >= 0 else None, "name": (str(lib.prototypes["name"][k]) or None) if k >= 0 else None,
                       "yaw_deg": float(lib.members["yaw_deg"][j]) if j is not None else None,
                       "scale": float(lib.members["scale"][j]) if j is not None else None,
                       "center_world": [float(x) for x in store.objects["center"][i]], "score": score, "unknown": bool(unknown)}
                lines.append(json.dumps(rec))
                st = stats.setdefault(name, {"clusters": set(), "objects": set(), "labels": 0, "scores": [], "unknown": 0})
                st["clusters"].add(k)
                st["objects"].add(oid)
                st["labels"] += 1
                st["scores"].append(score)
                st["unknown"] += int(unknown)
                if unknown:
                    continue
                mask = np.zeros(h * w, bool)
                mask[pix] = True
                annotations.append({"id": len(annotations) + 1, "image_id": image_id, "category_id": categories[name],
                                    "bbox": [bbox[0], bbox[1], bbox[2] - bbox[0], bbox[3] - bbox[1]],
                                    "area": int(len(pix)), "segmentation": mask_to_rle(mask.reshape(h, w)), "iscrowd": 0,
                                    "object": oid, "score": score, "yaw_deg": float(lib.members["yaw_deg"][j])})
        missing = [str(store.ids[i]) for i in objs if not any(key[0] == i for key in masks)]
        no_mask += len(missing)
        if progress:
            progress(f"{cap.name}: {len(cap.frames)} frames, {len(objs)} objects" + (f", {len(missing)} without pixels" if missing else ""))
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
    summary = {"note": NOTE, "captures": [c.name for c in captures], "images": len(images), "labels": len(lines),
               "annotations": len(annotations), "categories": len(categories), "min_score": min_score,
               "dropped_below_min_score": dropped, "unknown_score": unknown_score,
               "unknown_labels": int(sum(s["unknown"] for s in stats.values())),
               "objects_without_pixels": no_mask, "classes": classes}
    write_text(out / "summary.json", json.dumps(summary, indent=1))
    write_text(out / "README.txt", NOTE + "\n")
    prov = provenance(cfg, seed, {"library": file_fingerprint(lib.path) if lib.path else "", "store": store.fingerprint(),
                                  "captures": [c.name for c in captures]}, command="export")
    for name in ("labels.jsonl", "instances.json", "classes.csv", "summary.json", "README.txt"):
        write_sidecar(out / name, prov)
    return summary
