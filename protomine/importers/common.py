"""What every importer produces, and how it lands in ``--out``: all captures or none.

An importer turns one source folder into an :class:`ImportedCapture` (frames in memory, metric depth on the
colour image's pixel grid, cam_to_world poses in our convention).  :func:`write_imported` writes every capture
into a staging folder inside ``--out`` and renames them into place only when all are written, so a failure
leaves nothing half-written (the staging folder is removed; a killed process leaves one hidden folder that
the next import removes).
"""
from __future__ import annotations

import csv
import io
import os
import shutil
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..atomic import _pid_alive, write_text
from ..capture import Intrinsics, resample_depth, write_capture
from ..errors import InputError

STAGING_PREFIX = ".import-"


@dataclass
class ImportedFrame:
    id: str
    cam_to_world: np.ndarray          # (4, 4)
    rgb: np.ndarray                   # (H, W, 3) uint8
    depth_m: np.ndarray               # (H, W) metres, 0 = no reading
    mask: np.ndarray | None = None    # (H, W) instance ids


@dataclass
class ImportedCapture:
    name: str
    source: Path
    intrinsics: Intrinsics
    depth_scale: float                                     # units per metre of the written depth PNGs
    frames: list[ImportedFrame]
    skipped: list[tuple[str, str]] = field(default_factory=list)   # (what, why)
    notes: list[str] = field(default_factory=list)
    labels: dict[int, str] = field(default_factory=dict)  # instance id -> benchmark label
    # where to look when the self-check fails: cause -> (file, field)
    blame: dict[str, tuple[Path, str]] = field(default_factory=dict)


def on_colour_grid(depth_m: np.ndarray, rgb: np.ndarray, path: Path) -> np.ndarray:
    """Depth (h, w) resampled to the colour image's (H, W) grid (same field of view, intrinsics scaled)."""
    H, W = rgb.shape[:2]
    h, w = depth_m.shape
    if abs(w * H - h * W) > max(w, h, W, H):
        raise InputError(path, "size", f"depth {w}x{h} and colour {W}x{H} do not share an aspect ratio "
                         "(a registered depth differs from its colour image only in resolution)")
    return resample_depth(depth_m, (H, W))


def staged_output(out: Path, names: list[str]) -> Path:
    """Check ``out`` can take captures ``names`` and make a fresh staging folder inside it."""
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(None, "SRC", f"two sources share a folder name (captures are named after it): {dup}")
    out.mkdir(parents=True, exist_ok=True)
    for old in out.glob(f"{STAGING_PREFIX}*"):
        pid = old.name[len(STAGING_PREFIX):].split("-")[0]
        if pid.isdigit() and not _pid_alive(int(pid)):
            shutil.rmtree(old, ignore_errors=True)
    taken = [n for n in names if (out / n).exists()]
    if taken:
        raise InputError(out / taken[0], None, "already exists; import into another --out or remove it first")
    stage = out / f"{STAGING_PREFIX}{os.getpid()}-{uuid.uuid4().hex[:8]}"
    stage.mkdir()
    return stage


def write_staged(stage: Path, cap: ImportedCapture) -> Path:
    """Write one capture folder into the staging folder."""
    frames = [{"id": f.id, "cam_to_world": f.cam_to_world, "rgb": f.rgb, "depth_m": f.depth_m,
               **({"mask": f.mask} if f.mask is not None else {})} for f in cap.frames]
    return write_capture(stage / cap.name, intrinsics=cap.intrinsics, depth_scale=cap.depth_scale, frames=frames,
                         extra={"imported_from": str(cap.source)})


def publish(stage: Path, out: Path, names: list[str]) -> None:
    """Rename every staged capture into ``out`` and remove the staging folder."""
    for n in names:
        os.replace(stage / n, out / n)
    shutil.rmtree(stage, ignore_errors=True)


def labels_csv(caps: list[ImportedCapture]) -> str:
    """Truth CSV (object,label) of the benchmark's own labels, in the audit's format."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["object", "label"])
    for c in caps:
        for k in sorted(c.labels):
            w.writerow([f"{c.name}/{k}", c.labels[k]])
    return buf.getvalue()


def write_labels(path: Path, caps: list[ImportedCapture]) -> None:
    write_text(path, labels_csv(caps))
