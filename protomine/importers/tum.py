"""The timestamped RGB-D sequence layout (the TUM RGB-D benchmark's: Sturm, Engelhard, Endres, Burgard &
Cremers, "A benchmark for the evaluation of RGB-D SLAM systems", IROS 2012).  As published, written here
from memory::

    <sequence>/rgb.txt           "timestamp filename" per line, '#' comments (e.g. "1305031102.175304 rgb/1305031102.175304.png")
    <sequence>/depth.txt         the same for the depth images
    <sequence>/groundtruth.txt   "timestamp tx ty tz qx qy qz qw": the colour camera's optical centre and
                                 orientation in the world (camera-to-world, metres, unit quaternion scalar last)
    depth PNGs: 16-bit, 5000 units per metre (0 = no reading), registered to the colour camera

Colour and depth images are associated by nearest timestamp within ``tolerance_s``; a frame's pose is the
ground truth interpolated at the colour image's timestamp (linear in translation, slerp in rotation).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..capture import Intrinsics, read_image
from ..errors import InputError
from .common import ImportedCapture, ImportedFrame, on_colour_grid
from .poses import interpolate_pose

DEPTH_UNITS_PER_M = 5000.0      # the benchmark's depth factor (from memory)
NOMINAL_SIZE = (640, 480)       # the benchmark's image size, for which these intrinsics are published
# Published colour-camera intrinsics (fx, fy, cx, cy) of the benchmark's sensors, from memory; sequences are
# named rgbd_dataset_freiburg<N>_...; others get the nominal values the benchmark suggests for unknown Kinects.
PUBLISHED_INTRINSICS = {
    "freiburg1": (517.3, 516.5, 318.6, 255.3),
    "freiburg2": (520.9, 521.0, 325.1, 249.7),
    "freiburg3": (535.4, 539.2, 320.1, 247.6),
    None: (525.0, 525.0, 319.5, 239.5),
}
MAX_GT_GAP_S = 0.5              # no interpolation across a longer hole in the ground truth
MAX_FRAMES = 400                # frames kept per sequence at most (ingest needs tens, not thousands)


def _list(path: Path, columns: int) -> list[list[str]]:
    if not path.is_file():
        raise InputError(path, None, "missing: not a timestamped RGB-D sequence folder (expected rgb.txt, depth.txt, "
                         "groundtruth.txt)")
    rows = []
    for n, line in enumerate(path.read_text(errors="replace").splitlines(), start=1):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        parts = line.split()
        if len(parts) != columns:
            raise InputError(path, f"line {n}", f"expected {columns} fields, got {len(parts)}: {line[:60]!r}")
        try:
            float(parts[0])
        except ValueError:
            raise InputError(path, f"line {n}, timestamp", f"expected a number, got {parts[0]!r}") from None
        rows.append(parts + [str(n)])
    if not rows:
        raise InputError(path, None, "no entries")
    return rows


def published_intrinsics(name: str) -> tuple[tuple[float, float, float, float], str]:
    """(fx, fy, cx, cy) for a sequence folder name and the camera they belong to."""
    for key in ("freiburg1", "freiburg2", "freiburg3"):
        if key in name:
            return PUBLISHED_INTRINSICS[key], key
    return PUBLISHED_INTRINSICS[None], "default"


def associate(a: np.ndarray, b: np.ndarray, tolerance_s: float) -> np.ndarray:
    """For each stamp of a (N,) the index of the nearest stamp of b (M,) sorted, or -1 beyond the tolerance."""
    j = np.clip(np.searchsorted(b, a), 1, max(len(b) - 1, 1))
    lo = np.clip(j - 1, 0, len(b) - 1)
    hi = np.clip(j, 0, len(b) - 1)
    best = np.where(np.abs(b[lo] - a) <= np.abs(b[hi] - a), lo, hi)
    return np.where(np.abs(b[best] - a) <= tolerance_s, best, -1)


def read_tum_sequence(src: Path, *, intrinsics: tuple[float, float, float, float] | None = None,
                      tolerance_s: float = 0.02, every: int = 1, min_baseline_m: float = 0.0) -> ImportedCapture:
    src = Path(src)
    if not src.is_dir():
        raise InputError(src, None, "sequence folder not found")
    rgb_rows = _list(src / "rgb.txt", 2)
    depth_rows = _list(src / "depth.txt", 2)
    gt_path = src / "groundtruth.txt"
    gt_rows = _list(gt_path, 8)
    gt = np.array([[float(x) for x in r[:8]] for r in gt_rows])
    if not np.all(np.isfinite(gt)):
        raise InputError(gt_path, "values", "expected finite numbers")
    norms = np.linalg.norm(gt[:, 4:8], axis=1)
    bad = np.flatnonzero(np.abs(norms - 1.0) > 1e-2)
    if len(bad):
        r = gt_rows[bad[0]]
        raise InputError(gt_path, f"line {r[-1]}, qx qy qz qw", f"not a rotation: quaternion norm {norms[bad[0]]:.3f}, "
                         "expected 1 (a rigid pose)")
    order = np.argsort(gt[:, 0], kind="stable")
    gt = gt[order]
    t_rgb = np.array([float(r[0]) for r in rgb_rows])
    t_depth = np.array([float(r[0]) for r in depth_rows])
    d_order = np.argsort(t_depth, kind="stable")
    match = associate(t_rgb, t_depth[d_order], tolerance_s)
    if not np.any(match >= 0):
        gap = float(np.min(np.abs(t_rgb[:, None] - t_depth[None, :]))) if len(t_rgb) * len(t_depth) < 4e6 else float("nan")
        raise InputError(src / "depth.txt", "timestamp", f"no colour image has a depth image within {tolerance_s:g} s "
                         f"(nearest pair {gap:.3f} s apart): the timestamps never associate")
    cap = ImportedCapture(src.name, src, None, DEPTH_UNITS_PER_M, [])
    cap.blame = {"direction": (gt_path, "tx ty tz qx qy qz qw"), "axes": (gt_path, "qx qy qz qw"),
                 "unit": (src / "depth.txt", "depth unit (5000 per metre)"), "poses": (gt_path, "tx ty tz qx qy qz qw")}
    published = intrinsics is None          # published values are for NOMINAL_SIZE: scaled to the images' size
    if published:
        intrinsics, cam = published_intrinsics(src.name)
        cap.notes.append(f"intrinsics: published values for the {cam} camera (from memory): {intrinsics}")
    n_unmatched = int((match < 0).sum())
    if n_unmatched:
        cap.skipped.append((f"{n_unmatched} colour images", f"no depth within {tolerance_s:g} s"))
    picked, last, n_nopose = [], None, 0
    for k in np.flatnonzero(match >= 0)[::every]:
        T = interpolate_pose(gt[:, 0], gt[:, 1:4], gt[:, 4:8], t_rgb[k])
        if T is not None:
            j = int(np.searchsorted(gt[:, 0], t_rgb[k]))
            if 0 < j < len(gt) and gt[j, 0] - gt[j - 1, 0] > MAX_GT_GAP_S:
                T = None
        if T is None:
            n_nopose += 1
            continue
        if last is not None and np.linalg.norm(T[:3, 3] - last) < min_baseline_m:
            continue
        picked.append((k, T))
        last = T[:3, 3]
    if n_nopose:
        cap.skipped.append((f"{n_nopose} frames", "no ground truth around their timestamp"))
    if not picked:
        raise InputError(gt_path, "timestamp", "no associated frame lies within the ground truth's time span")
    if len(picked) > MAX_FRAMES:
        keep = np.unique(np.linspace(0, len(picked) - 1, MAX_FRAMES).round().astype(int))
        cap.skipped.append((f"{len(picked) - len(keep)} frames", f"more than {MAX_FRAMES}: evenly thinned"))
        picked = [picked[i] for i in keep]
    fx, fy, cx, cy = intrinsics
    for k, T in picked:
        rgb_path = src / rgb_rows[k][1]
        depth_path = src / depth_rows[d_order[match[k]]][1]
        rgb = read_image(rgb_path, "rgb")
        if cap.intrinsics is None:
            H, W = rgb.shape[:2]
            s = W / NOMINAL_SIZE[0] if published else 1.0
            cap.intrinsics = Intrinsics(W, H, fx * s, fy * s, (cx + 0.5) * s - 0.5, (cy + 0.5) * s - 0.5)
        elif rgb.shape[:2] != (cap.intrinsics.height, cap.intrinsics.width):
            raise InputError(rgb_path, "size", f"expected {cap.intrinsics.width}x{cap.intrinsics.height} like the "
                             f"first colour image, got {rgb.shape[1]}x{rgb.shape[0]}")
        depth = on_colour_grid(read_image(depth_path, "depth").astype(np.float64) / DEPTH_UNITS_PER_M, rgb, depth_path)
        cap.frames.append(ImportedFrame(f"{t_rgb[k]:.6f}".replace(".", "_"), T, rgb, depth))
    return cap
