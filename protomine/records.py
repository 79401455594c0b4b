"""Label records: the one schema of every JSON lines file protomine writes (label and export), documented once.

One record per object per frame (JSON object per line; ``null`` where a field does not apply):

    capture        capture folder name
    frame          frame id within the capture
    object         object id: "<capture>/<mask id>" (masks), "<capture>/p<k>" (geometry, ingested),
                   "<capture>/<frame>/p<k>" (geometry, labelled frame by frame)
    source         "single-view": matched from this frame alone (``protomine label``);
                   "mined": the object's fused multi-view volume, as mining assigned it (``export`` of a store)
    bbox           [u0, v0, u1, v1) pixels, inclusive-exclusive (u right, v down)
    segmentation   the object's pixels in this frame as uncompressed COCO RLE {"size": [h, w], "counts": [...]}:
                   run lengths of the column-major flattened mask, starting with a run of 0s
    center_world   [x, y, z] metres, centre of the object's points in the capture's world frame
    base_world     [x, y, z] metres, the object frame's origin (base centre on the support plane)
    up             [x, y, z] unit support-plane normal
    size_m         [footprint radius, height] metres
    cluster        prototype index (int), null when nothing matched
    name           the cluster's name, null when unnamed (tools then show "cluster-<k>")
    symmetry       the prototype's symmetry: "continuous" | "none" | "n-fold:N"
    yaw_deg        right-handed about up from the reference direction, [0, 360), modulo the symmetry period
    scale          metric size sqrt(r h) of the object over the cluster's typical (median) size
    fit_scale      the pose search's residual scale factor (volumes are scale-normalised; ~1)
    distance       pose-searched distance to the cluster's prototype (smaller = closer); the decision
    score          calibrated tail probability of that distance for that cluster, in [0, 1] (README "Score"):
                   a typical member scores about 0.5
    unknown        true when score < the library's unknown cut (``mine.openset``), or nothing matched
    alternatives   the next clusters in decision order (by distance): [{cluster, name, distance, score}]

Pose fields added by full-pose matching (``rotation``, ``face``, ``qx``, ``qy``, ``qz``, ``qw``) keep their
own meaning (docs/spec capture-format.md) and are carried through unchanged.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .atomic import write_text
from .errors import InputError

SOURCES = ("single-view", "mined")
FIELDS = ("capture", "frame", "object", "source", "bbox", "segmentation", "center_world", "base_world", "up",
          "size_m", "cluster", "name", "symmetry", "yaw_deg", "rotation", "face", "scale", "fit_scale", "distance", "score", "unknown",
          "alternatives")
# fields a reader needs (export builds COCO from these); the others are optional
REQUIRED = ("capture", "frame", "object", "bbox", "segmentation", "cluster", "name", "score", "unknown")


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


def pixels_to_rle(pixels: np.ndarray, height: int, width: int) -> dict:
    """RLE of flat row-major pixel indices (v * width + u) of an (height, width) image: ``mask_to_rle`` of
    their mask, from the sorted column-major indices of the pixels alone (no image-sized mask)."""
    v, u = np.divmod(np.asarray(pixels, dtype=np.int64), width)
    idx = np.sort(u * height + v)                      # column-major order
    idx = idx[np.concatenate([[True], idx[1:] != idx[:-1]])] if len(idx) else idx   # each pixel once (np.unique
    # gives the same; numpy 2.4's unique costs 5x the sort on a few thousand integers)
    n = height * width
    if len(idx) == 0:
        return {"size": [int(height), int(width)], "counts": [n] if n else []}
    brk = np.flatnonzero(np.diff(idx) != 1) + 1        # where a run of consecutive pixels starts anew
    starts = idx[np.concatenate([[0], brk])]
    ends = idx[np.concatenate([brk - 1, [len(idx) - 1]])] + 1
    runs = np.empty(2 * len(starts) + 1, np.int64)     # zeros before, ones, zeros between, ..., zeros after
    runs[0] = starts[0]
    runs[1:-1:2] = ends - starts
    runs[2:-1:2] = starts[1:] - ends[:-1]
    runs[-1] = n - ends[-1]
    counts = runs.tolist() if runs[-1] else runs[:-1].tolist()
    return {"size": [int(height), int(width)], "counts": counts}


def rle_area(rle: dict) -> int:
    """Number of object pixels of an RLE (the sum of its odd runs)."""
    return int(sum(rle["counts"][1::2]))


def write_records(path: str | Path, records: list[dict], prov: dict) -> Path:
    """Write records as JSON lines (atomic) and list the file in its folder's provenance manifest."""
    from .provenance import record_outputs
    path = Path(path)
    write_text(path, "".join(json.dumps(r) + "\n" for r in records))
    record_outputs([path], prov)
    return path


def read_records(path: str | Path) -> list[dict]:
    """Records of a JSON lines file written by ``label`` or ``export``; InputError names the line and field."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, None, "label records file not found")
    out = []
    with open(path, encoding="utf-8", errors="replace") as fh:
        for i, line in enumerate(fh, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError as e:
                raise InputError(path, f"line {i}", f"not valid JSON ({e.msg})") from None
            if not isinstance(rec, dict):
                raise InputError(path, f"line {i}", f"expected a JSON object, got {type(rec).__name__}")
            missing = [k for k in REQUIRED if k not in rec]
            if missing:
                raise InputError(path, f"line {i}.{missing[0]}", "missing (expected a label record of protomine "
                                 "label or export; fields in protomine/records.py)")
            bbox = rec["bbox"]
            if not (isinstance(bbox, list) and len(bbox) == 4 and all(isinstance(x, int) for x in bbox)):
                raise InputError(path, f"line {i}.bbox", f"expected [u0, v0, u1, v1] integers, got {bbox!r}")
            seg = rec["segmentation"]
            if not (isinstance(seg, dict) and isinstance(seg.get("size"), list) and len(seg["size"]) == 2
                    and isinstance(seg.get("counts"), list)
                    and all(isinstance(x, int) and x >= 0 for x in seg["size"] + seg["counts"])):
                raise InputError(path, f"line {i}.segmentation", "expected {\"size\": [h, w], \"counts\": [...]} "
                                 "of non-negative integers")
            h, w = seg["size"]
            if sum(seg["counts"]) != h * w:
                raise InputError(path, f"line {i}.segmentation", f"run lengths sum to {sum(seg['counts'])}, "
                                 f"expected h x w = {h * w}")
            if not isinstance(rec["score"], (int, float)) or not 0.0 <= rec["score"] <= 1.0:
                raise InputError(path, f"line {i}.score", f"expected a number in [0, 1], got {rec['score']!r}")
            out.append(rec)
    return out
