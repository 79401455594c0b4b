"""Test-only converters in the other direction: a demo capture folder -> the layouts ``protomine import`` reads.

They follow the layouts' published field names and units (6-D pose benchmark scene: Hodan et al. 2018/2020;
timestamped RGB-D sequence: Sturm et al., IROS 2012), written from memory; no benchmark data is used.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
from PIL import Image
from scipy.spatial.transform import Rotation

from protomine.capture import read_capture
from protomine.geometry import invert_rigid, reference_direction, yaw_to_matrix


def object_poses(truth_full_rows: list[dict]) -> dict[int, np.ndarray]:
    """mask id -> (4, 4) world-from-object pose (z = up, x = the truth yaw direction, origin = base centre)."""
    out = {}
    for r in truth_full_rows:
        up = np.array([float(r["up_x"]), float(r["up_y"]), float(r["up_z"])])
        x = yaw_to_matrix(float(r["yaw_deg"]), up) @ reference_direction(up)
        T = np.eye(4)
        T[:3, :3] = np.stack([x, np.cross(up, x), up], axis=1)
        T[:3, 3] = [float(r["x"]), float(r["y"]), float(r["z"])]
        out[int(r["mask_id"])] = T
    return out


def to_bop(capture: Path, rows: list[dict], out: Path, *, world_poses: bool = True, jpeg: bool = False,
           classes: list[str] | None = None, rng: np.random.Generator | None = None) -> Path:
    """Write a 6-D pose benchmark scene folder: depth in mm (depth_scale 1.0), translations in mm, 8-bit
    masks per annotation, annotations in a shuffled order per image (matching must not rely on it)."""
    cap = read_capture(capture)
    rng = rng or np.random.default_rng(0)
    for sub in ("rgb", "depth", "mask_visib"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    poses = object_poses(rows)
    classes = classes or sorted({r["class"] for r in rows})
    obj_of = {int(r["mask_id"]): classes.index(r["class"]) + 1 for r in rows}
    K = cap.intrinsics.K
    cams, gts = {}, {}
    for i, fr in enumerate(cap.frames):
        w2c = invert_rigid(fr.cam_to_world)
        cams[str(i)] = {"cam_K": K.reshape(-1).tolist(), "depth_scale": 1.0}
        if world_poses:
            cams[str(i)].update({"cam_R_w2c": w2c[:3, :3].reshape(-1).tolist(), "cam_t_w2c": (w2c[:3, 3] * 1000).tolist()})
        mask = cap.mask(fr.id)
        visible = [m for m in sorted(poses) if (mask == m).sum() > 0]
        visible = [visible[j] for j in rng.permutation(len(visible))]
        ann = []
        for k, m in enumerate(visible):
            m2c = w2c @ poses[m]
            ann.append({"cam_R_m2c": m2c[:3, :3].reshape(-1).tolist(), "cam_t_m2c": (m2c[:3, 3] * 1000).tolist(),
                        "obj_id": obj_of[m]})
            Image.fromarray(((mask == m) * 255).astype(np.uint8)).save(out / "mask_visib" / f"{i:06d}_{k:06d}.png")
        gts[str(i)] = ann
        rgb = Image.fromarray(cap.rgb(fr.id))
        rgb.save(out / "rgb" / f"{i:06d}.jpg", quality=95) if jpeg else rgb.save(out / "rgb" / f"{i:06d}.png")
        mm = np.rint(cap.depth(fr.id) * 1000).astype(np.uint16)
        Image.fromarray(mm).save(out / "depth" / f"{i:06d}.png")
    (out / "scene_camera.json").write_text(json.dumps(cams))
    (out / "scene_gt.json").write_text(json.dumps(gts))
    return out


def to_tum(capture: Path, out: Path, *, half_depth: bool = False, t0: float = 1305031102.0, dt: float = 0.1) -> Path:
    """Write a timestamped RGB-D sequence: depth at 5000 units per metre, stamped 7 ms after its colour image;
    the ground truth has two stamps 10 ms before and after each colour image, rotated by -/+ 2 degrees about a
    fixed axis and moved -/+ 5 mm, so only slerp + linear interpolation recover the pose at the colour stamp.
    ``half_depth``: depth at half the colour resolution (a registered depth at its own size)."""
    cap = read_capture(capture)
    for sub in ("rgb", "depth"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    rgb_l, depth_l, gt_l = ["# color images"], ["# depth maps"], ["# timestamp tx ty tz qx qy qz qw"]
    axis = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
    for i, fr in enumerate(cap.frames):
        t = t0 + dt * i
        name = f"{t:.6f}.png"
        Image.fromarray(cap.rgb(fr.id)).save(out / "rgb" / name)
        d = cap.depth(fr.id)
        if half_depth:
            d = d[::2, ::2]
        Image.fromarray(np.rint(d * 5000).astype(np.uint16)).save(out / "depth" / f"{t + 0.007:.6f}.png")
        rgb_l.append(f"{t:.6f} rgb/{name}")
        depth_l.append(f"{t + 0.007:.6f} depth/{t + 0.007:.6f}.png")
        R = Rotation.from_matrix(fr.cam_to_world[:3, :3])
        for s in (-1, 1):
            q = (R * Rotation.from_rotvec(s * np.deg2rad(2.0) * axis)).as_quat()   # [x, y, z, w]
            p = fr.cam_to_world[:3, 3] + s * 0.005 * axis
            gt_l.append(f"{t + s * 0.01:.6f} " + " ".join(f"{v:.9f}" for v in (*p, *q)))
    (out / "rgb.txt").write_text("\n".join(rgb_l) + "\n")
    (out / "depth.txt").write_text("\n".join(depth_l) + "\n")
    (out / "groundtruth.txt").write_text("\n".join(gt_l) + "\n")
    return out


def to_plain(capture: Path, out: Path, *, convention: str = "opencv-c2w", depth_scale: float = 1000.0) -> Path:
    """Write rgb/, depth/ and poses.txt (one row-major 4x4 per line) in the given pose convention."""
    cap = read_capture(capture)
    for sub in ("rgb", "depth"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    flip = np.diag([1.0, -1.0, -1.0, 1.0])
    lines = []
    for fr in cap.frames:
        shutil.copy(capture / "rgb" / f"{fr.id}.png", out / "rgb" / f"{fr.id}.png")
        Image.fromarray(np.rint(cap.depth(fr.id) * depth_scale).astype(np.uint16)).save(out / "depth" / f"{fr.id}.png")
        axes, direction = convention.split("-")
        T = fr.cam_to_world @ flip if axes == "opengl" else fr.cam_to_world     # camera axes of that convention
        T = invert_rigid(T) if direction == "w2c" else T
        lines.append(" ".join(f"{v:.12g}" for v in T.reshape(-1)))
    (out / "poses.txt").write_text("\n".join(lines) + "\n")
    return out
