"""Plain folders: colour and depth images paired by file name, a poses file, intrinsics given by the user::

    <folder>/rgb/<name>.png|.jpg     colour
    <folder>/depth/<name>.png        16-bit depth, ``depth_scale`` units per metre
    <folder>/poses.txt               one pose per line: 16 numbers, a row-major 4x4, in sorted name order
      or <folder>/poses.json         a list of 4x4 (sorted name order) or {"<name>": 4x4}

``convention`` names the camera axes (opencv: x right, y down, z forward; opengl: x right, y up, z backward)
and the pose direction (c2w: camera-to-world; w2c: world-to-camera), e.g. "opencv-c2w".
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..capture import Intrinsics, read_image
from ..errors import InputError
from ..geometry import is_rigid
from .common import ImportedCapture, ImportedFrame, on_colour_grid
from .poses import to_cam_to_world

IMAGE_EXT = (".png", ".jpg", ".jpeg")


def _poses(src: Path, names: list[str]) -> tuple[Path, dict[str, tuple[str, np.ndarray]]]:
    """name -> (where in the file, raw 4x4)."""
    txt, js = src / "poses.txt", src / "poses.json"
    if txt.is_file():
        rows = []
        for n, line in enumerate(txt.read_text(errors="replace").splitlines(), start=1):
            if line.strip() and not line.lstrip().startswith("#"):
                try:
                    vals = [float(x) for x in line.replace(",", " ").split()]
                except ValueError:
                    raise InputError(txt, f"line {n}", "expected 16 numbers") from None
                if len(vals) != 16:
                    raise InputError(txt, f"line {n}", f"expected 16 numbers (a row-major 4x4), got {len(vals)}")
                rows.append((f"line {n}", np.array(vals).reshape(4, 4)))
        if len(rows) != len(names):
            raise InputError(txt, "lines", f"expected one pose per image ({len(names)}), got {len(rows)}")
        return txt, dict(zip(names, rows))
    if js.is_file():
        try:
            doc = json.loads(js.read_text())
        except (json.JSONDecodeError, UnicodeDecodeError) as e:
            raise InputError(js, None, f"not valid JSON ({e})") from None
        items = list(zip(names, doc)) if isinstance(doc, list) else list(doc.items()) if isinstance(doc, dict) else None
        if items is None or (isinstance(doc, list) and len(doc) != len(names)):
            raise InputError(js, "<root>", f"expected a list of {len(names)} 4x4 poses or an object keyed by image name")
        out = {}
        for name, T in items:
            try:
                out[name] = (f"{name}", np.asarray(T, dtype=np.float64).reshape(4, 4))
            except (TypeError, ValueError):
                raise InputError(js, f"{name}", f"expected a 4x4 matrix, got {str(T)[:60]}") from None
        return js, out
    raise InputError(src / "poses.txt", None, "missing: a plain folder needs poses.txt or poses.json beside rgb/ and depth/")


def read_plain_folder(src: Path, *, intrinsics: tuple[float, float, float, float], depth_scale: float = 1000.0,
                      convention: str = "opencv-c2w") -> ImportedCapture:
    src = Path(src)
    if not (src / "rgb").is_dir() or not (src / "depth").is_dir():
        raise InputError(src, None, "not a plain capture folder: expected rgb/ and depth/ subfolders")
    rgbs = {p.stem: p for p in sorted((src / "rgb").iterdir()) if p.suffix.lower() in IMAGE_EXT}
    depths = {p.stem: p for p in sorted((src / "depth").iterdir()) if p.suffix.lower() == ".png"}
    names = sorted(set(rgbs) & set(depths))
    if not names:
        raise InputError(src / "depth", None, "no colour and depth images share a file name")
    pose_file, poses = _poses(src, names)
    cap = ImportedCapture(src.name, src, None, depth_scale, [])
    cap.blame = {"direction": (pose_file, "--pose-convention (direction)"), "axes": (pose_file, "--pose-convention (axes)"),
                 "unit": (src / "depth", "--depth-scale"), "poses": (pose_file, "--pose-convention")}
    lonely = sorted(set(rgbs) ^ set(depths))
    if lonely:
        cap.skipped.append((f"{len(lonely)} images", f"no partner of the same name (e.g. {lonely[0]})"))
    fx, fy, cx, cy = intrinsics
    for name in names:
        if name not in poses:
            cap.skipped.append((name, "no pose"))
            continue
        where, T = poses[name]
        reason = is_rigid(T, tol=1e-3)
        if reason:
            raise InputError(pose_file, where, f"not a rigid transform: {reason}")
        rgb = read_image(rgbs[name], "rgb")
        if cap.intrinsics is None:
            cap.intrinsics = Intrinsics(rgb.shape[1], rgb.shape[0], fx, fy, cx, cy)
        elif rgb.shape[:2] != (cap.intrinsics.height, cap.intrinsics.width):
            raise InputError(rgbs[name], "size", f"expected {cap.intrinsics.width}x{cap.intrinsics.height} like the "
                             f"first colour image, got {rgb.shape[1]}x{rgb.shape[0]}")
        depth = on_colour_grid(read_image(depths[name], "depth").astype(np.float64) / depth_scale, rgb, depths[name])
        cap.frames.append(ImportedFrame(name, to_cam_to_world(T, convention), rgb, depth))
    if not cap.frames:
        raise InputError(pose_file, None, "no image has a pose")
    return cap
