"""The 6-D pose benchmark scene layout (the open layout of the BOP benchmark: Hodan et al., "BOP: Benchmark
for 6D object pose estimation", ECCV 2018, and the BOP Challenge 2020 report).  Field names and units as the
benchmark publishes them, written here from memory::

    <scene>/scene_camera.json   {"<im_id>": {"cam_K": [9, row-major], "depth_scale": s,
                                             "cam_R_w2c": [9], "cam_t_w2c": [3] (mm; optional)}}
    <scene>/scene_gt.json       {"<im_id>": [{"obj_id": k, "cam_R_m2c": [9], "cam_t_m2c": [3] (mm)}, ...]}
    <scene>/rgb/<im_id:06d>.png (or .jpg)
    <scene>/depth/<im_id:06d>.png     16-bit, millimetres = value x depth_scale
    <scene>/mask_visib/<im_id:06d>_<k:06d>.png   binary mask of annotation k of the image (visible part)

Cameras are OpenCV-style (x right, y down, z forward).  One instance = one obj_id at one place in the scene:
annotations are matched across images by the world position of their model origin (within
``SAME_PLACE_M``), not by list order.  Without cam_R_w2c the scene must be static: the camera poses are then
the inverses of one annotated object's model-to-camera poses (its model frame becomes the world).
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..capture import Intrinsics, read_image
from ..errors import InputError
from ..geometry import invert_rigid, is_rigid
from .common import ImportedCapture, ImportedFrame, on_colour_grid

SAME_PLACE_M = 0.03       # annotations of one obj_id closer than this in the world are one instance


def _json(path: Path) -> dict:
    if not path.is_file():
        raise InputError(path, None, "missing: not a 6-D pose benchmark scene folder (expected scene_camera.json, "
                         "scene_gt.json, rgb/, depth/)")
    try:
        doc = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise InputError(path, None, f"not valid JSON ({e})") from None
    if not isinstance(doc, dict) or not doc:
        raise InputError(path, "<root>", "expected an object keyed by image id")
    return doc


def _numbers(path: Path, where: str, v, n: int) -> np.ndarray:
    try:
        a = np.asarray(v, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        a = np.zeros(0)
    if a.shape != (n,) or not np.all(np.isfinite(a)):
        raise InputError(path, where, f"expected {n} finite numbers, got {str(v)[:60]}")
    return a


def _rigid(path: Path, where: str, R, t) -> np.ndarray:
    """(4, 4) from a row-major 3x3 R and a translation in millimetres (metres out)."""
    T = np.eye(4)
    T[:3, :3] = _numbers(path, where, R, 9).reshape(3, 3)
    T[:3, 3] = _numbers(path, where, t, 3) / 1000.0
    reason = is_rigid(T, tol=1e-3)
    if reason:
        raise InputError(path, where, f"not a rigid transform: {reason}")
    # re-orthonormalise (the files keep ~6 digits)
    u, _, vt = np.linalg.svd(T[:3, :3])
    T[:3, :3] = u @ vt
    return T


def _image(folder: Path, stem: str) -> Path:
    for ext in (".png", ".jpg", ".jpeg"):
        if (p := folder / f"{stem}{ext}").is_file():
            return p
    raise InputError(folder / f"{stem}.png", "file", "missing (expected .png or .jpg)")


def read_bop_scene(src: Path) -> ImportedCapture:
    src = Path(src)
    if not src.is_dir():
        raise InputError(src, None, "scene folder not found")
    cam_path, gt_path = src / "scene_camera.json", src / "scene_gt.json"
    cams, gts = _json(cam_path), _json(gt_path)
    try:
        ids = sorted(cams, key=int)
    except ValueError:
        raise InputError(cam_path, "<keys>", f"expected image ids (integers) as keys, got {sorted(cams)[:3]}") from None
    cap = ImportedCapture(src.name, src, None, 1000.0, [])
    cap.blame = {"direction": (cam_path, "cam_R_w2c/cam_t_w2c"), "axes": (cam_path, "cam_R_w2c/cam_t_w2c"),
                 "unit": (cam_path, "depth_scale"), "poses": (cam_path, "cam_R_w2c/cam_t_w2c")}
    # camera poses: cam_to_world per image
    has_w2c = all("cam_R_w2c" in cams[i] and "cam_t_w2c" in cams[i] for i in ids)
    poses: dict[str, np.ndarray] = {}
    anns: dict[str, list[tuple[int, int, np.ndarray]]] = {}   # im -> [(k, obj_id, model_to_camera)]
    for i in ids:
        entries = gts.get(i, [])
        if not isinstance(entries, list):
            raise InputError(gt_path, f"{i}", f"expected a list of annotations, got {str(entries)[:40]}")
        anns[i] = []
        for k, a in enumerate(entries):
            if not isinstance(a, dict) or "obj_id" not in a or "cam_R_m2c" not in a or "cam_t_m2c" not in a:
                raise InputError(gt_path, f"{i}[{k}]", "expected obj_id, cam_R_m2c, cam_t_m2c")
            anns[i].append((k, int(a["obj_id"]), _rigid(gt_path, f"{i}[{k}].cam_R_m2c/cam_t_m2c", a["cam_R_m2c"], a["cam_t_m2c"])))
    if has_w2c:
        for i in ids:
            poses[i] = invert_rigid(_rigid(cam_path, f"{i}.cam_R_w2c/cam_t_w2c", cams[i]["cam_R_w2c"], cams[i]["cam_t_w2c"]))
    else:
        found = _anchor_object(anns)
        if found is None:
            raise InputError(cam_path, "cam_R_w2c", "missing, and no image has an object annotated once to derive "
                             "the camera poses from")
        anchor, first = found
        poses = _static_poses(anns, anchor, first)
        for i in ids:
            if i not in poses:
                cap.skipped.append((f"image {i}", f"object {anchor} (the world frame) not found in it"))
        cap.notes.append(f"no cam_R_w2c: camera poses derived from object {anchor}'s model-to-camera poses "
                         f"(its model frame is the world; the scene is taken as static)")
        cap.blame.update({k: (gt_path, "cam_R_m2c/cam_t_m2c") for k in ("direction", "axes", "poses")})
    instances = _instances(anns, poses)
    K0, scale0 = None, None
    for i in ids:
        if i not in poses:
            continue
        c = cams[i]
        if not isinstance(c, dict) or "cam_K" not in c or "depth_scale" not in c:
            raise InputError(cam_path, f"{i}", "expected cam_K and depth_scale")
        Km = _numbers(cam_path, f"{i}.cam_K", c["cam_K"], 9).reshape(3, 3)
        ds = float(_numbers(cam_path, f"{i}.depth_scale", c["depth_scale"], 1)[0])
        if ds <= 0:
            raise InputError(cam_path, f"{i}.depth_scale", f"expected a value > 0, got {ds}")
        stem = f"{int(i):06d}"
        rgb = read_image(_image(src / "rgb", stem), "rgb")
        dpath = src / "depth" / f"{stem}.png"
        raw = read_image(dpath, "depth").astype(np.float64)
        depth = on_colour_grid(raw * ds / 1000.0, rgb, dpath)
        if K0 is None:
            K0, scale0 = Km, ds
            cap.intrinsics = Intrinsics(rgb.shape[1], rgb.shape[0], Km[0, 0], Km[1, 1], Km[0, 2], Km[1, 2])
            cap.depth_scale = 1000.0 / ds            # the benchmark's own quantisation, kept
        elif not np.allclose(Km, K0, rtol=1e-6) or (rgb.shape[1], rgb.shape[0]) != (cap.intrinsics.width, cap.intrinsics.height):
            cap.skipped.append((f"image {i}", "camera intrinsics or image size differ from the scene's first image"))
            continue
        mask = _instance_mask(src, stem, anns[i], instances[i], rgb.shape[:2])
        cap.frames.append(ImportedFrame(stem, poses[i], rgb, depth, mask))
    if not cap.frames:
        raise InputError(cam_path, "images", "no image could be imported")
    if K0 is not None and any(abs(float(cams[i]["depth_scale"]) - scale0) > 1e-9 for i in ids if i in poses):
        cap.depth_scale = 1000.0
    labels: dict[int, str] = {}
    for i in instances:
        for (k, obj, _), inst in zip(anns[i], instances[i]):
            labels[inst] = f"obj_{obj:06d}"
    cap.labels = labels
    has_masks = (src / "mask_visib").is_dir()
    if not has_masks:
        for f in cap.frames:
            f.mask = None
        cap.notes.append("no mask_visib/: imported without masks")
    return cap


def _anchor_object(anns: dict) -> tuple[int, str] | None:
    """(obj_id, image) of the first image with an object annotated exactly once: of those objects, the one
    seen in the most images (ties: the smallest id)."""
    for i, entries in anns.items():
        objs = [o for _, o, _ in entries]
        once = [o for o in objs if objs.count(o) == 1]
        if once:
            seen = {o: sum(any(a[1] == o for a in e) for e in anns.values()) for o in once}
            return min(once, key=lambda o: (-seen[o], o)), i
    return None


def _static_poses(anns: dict, anchor: int, first: str) -> dict[str, np.ndarray]:
    """cam_to_world per image with the anchor object's model frame as the world (a static scene).

    In image ``first`` the anchor is annotated once.  In another image it may be annotated several times
    (more instances of that object): the annotation whose camera pose puts most of the image's other objects
    where earlier images saw them is the anchor instance.
    """
    known: list[tuple[int, np.ndarray]] = []
    poses: dict[str, np.ndarray] = {}
    for i in [first] + [i for i in anns if i != first]:
        entries = anns[i]
        best, best_score = None, -1
        for _, obj, m2c in entries:
            if obj != anchor:
                continue
            c2w = invert_rigid(m2c)
            pos = [(o, (c2w @ T)[:3, 3]) for _, o, T in entries]
            score = sum(any(o == ko and np.linalg.norm(p - kp) < SAME_PLACE_M for ko, kp in known) for o, p in pos)
            if score > best_score:
                best, best_score = c2w, score
        if best is None or (known and best_score < 2 and sum(o == anchor for _, o, _ in entries) > 1):
            continue                       # anchor absent, or several candidates and none confirmed
        poses[i] = best
        for _, o, T in entries:
            p = (best @ T)[:3, 3]
            if not any(o == ko and np.linalg.norm(p - kp) < SAME_PLACE_M for ko, kp in known):
                known.append((o, p))
    return poses


def _instances(anns: dict, poses: dict) -> dict[str, list[int]]:
    """Instance id (1..) per annotation, matched across images by obj_id and world position."""
    known: list[tuple[int, np.ndarray]] = []         # (obj_id, world position of the model origin)
    out: dict[str, list[int]] = {}
    for i, entries in anns.items():
        out[i] = []
        for _, obj, m2c in entries:
            if i not in poses:
                out[i].append(0)
                continue
            p = (poses[i] @ m2c)[:3, 3]
            hit = [j for j, (o, q) in enumerate(known) if o == obj and np.linalg.norm(q - p) < SAME_PLACE_M]
            if hit:
                j = min(hit, key=lambda j: np.linalg.norm(known[j][1] - p))
            else:
                known.append((obj, p))
                j = len(known) - 1
            out[i].append(j + 1)
    return out


def _instance_mask(src: Path, stem: str, entries: list, inst: list[int], shape: tuple[int, int]) -> np.ndarray | None:
    folder = src / "mask_visib"
    if not folder.is_dir():
        return None
    mask = np.zeros(shape, np.uint16)
    for (k, _, _), iid in zip(entries, inst):
        p = folder / f"{stem}_{k:06d}.png"
        m = read_image(p, "mask")
        if m.shape != shape:
            m = on_colour_grid(m, np.zeros(shape + (3,), np.uint8), p)
        mask[(m > 0) & (mask == 0)] = iid
    return mask
