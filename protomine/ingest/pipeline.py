"""Ingest captures into an object store: plane -> proposals -> volumes -> crops -> store."""
from __future__ import annotations

import zlib
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image

from ..atomic import pause_point
from ..capture import read_capture
from ..errors import InputError, InputErrors
from ..progress import Recorder, bar, detail, replay
from ..provenance import folder_fingerprint, provenance
from .proposals import SceneObjects, find_objects, object_frame
from .store import CaptureRecord, ObjectRecord, ObjectStore, write_store
from .truncation import cut_pixels
from .volume import Grid, lift, up_basis


def capture_rng(seed: int, name: str) -> np.random.Generator:
    """Per-capture generator: results do not depend on the order captures are given in."""
    return np.random.default_rng([int(seed), zlib.crc32(name.encode())])


def pixel_bbox(pixels: np.ndarray, width: int) -> tuple[int, int, int, int]:
    """[u0, v0, u1, v1) box of flat pixel indices."""
    v, u = np.divmod(pixels, width)
    return int(u.min()), int(v.min()), int(u.max()) + 1, int(v.max()) + 1


def make_crop(rgb: np.ndarray, depth: np.ndarray, pixels: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Square RGB (S, S, 3), depth mm (S, S) and mask (S, S) patches around the object's pixels."""
    h, w = depth.shape
    u0, v0, u1, v1 = pixel_bbox(pixels, w)
    side = int(max(u1 - u0, v1 - v0) * 1.15) + 2
    cu, cv = (u0 + u1) // 2, (v0 + v1) // 2
    a0, b0 = cu - side // 2, cv - side // 2
    mask = np.zeros(h * w, bool)
    mask[pixels] = True
    mask = mask.reshape(h, w)
    pad = lambda img: np.pad(img, ((side, side), (side, side)) + ((0, 0),) * (img.ndim - 2))
    sl = (slice(b0 + side, b0 + 2 * side), slice(a0 + side, a0 + 2 * side))
    rc = Image.fromarray(pad(rgb)[sl]).resize((size, size), Image.BILINEAR)
    dc = Image.fromarray(np.clip(pad(depth)[sl] * 1000, 0, 65535).astype(np.uint16)).resize((size, size), Image.NEAREST)
    mc = Image.fromarray(pad(mask)[sl]).resize((size, size), Image.NEAREST)
    return np.asarray(rc), np.asarray(dc).astype(np.uint16), np.asarray(mc).astype(bool)


def spread(items: list, n: int) -> list:
    """n items evenly spread over the list (all when n >= len)."""
    if n >= len(items):
        return list(items)
    return [items[int(round(i))] for i in np.linspace(0, len(items) - 1, n)] if n > 0 else []


def view_camera(up: np.ndarray, centre: np.ndarray, cam_to_world: np.ndarray) -> np.ndarray:
    """(3,) unit direction from an object's centre (world) to the camera of ``cam_to_world`` (4, 4), in the object
    frame of ``up`` (``volume.up_basis``): the camera of a single view as the label stage's ``lift_frame`` gives it."""
    v = up_basis(np.asarray(up, np.float64)) @ (np.asarray(cam_to_world, np.float64)[:3, 3] - np.asarray(centre, np.float64))
    return v / max(float(np.linalg.norm(v)), 1e-12)


def object_records(scene: SceneObjects, cfg: dict, grid: Grid, frame_ids: list[str] | None = None) -> list[ObjectRecord]:
    """Lift every proposal of a scene into an ObjectRecord (volume, views, crops)."""
    c = cfg["ingest"]
    width = scene.capture.intrinsics.width
    out = []
    by_id = {fd.id: fd for fd in scene.frames}
    for p in scene.proposals:
        views = scene.views(p, frame_ids, others=grid.reads_others)
        if not views:
            continue
        vol = lift(views, p.frame, grid)
        seen = [fid for fid in by_id if fid in p.pixels and (frame_ids is None or fid in frame_ids)]
        view_rows = [(fid, pixel_bbox(p.pixels[fid], width), int(len(p.pixels[fid]))) for fid in seen]
        # thumbnails: the frames with the most pixels of the object, at most max_crops_per_object
        best = sorted(seen, key=lambda fid: -len(p.pixels[fid]))[: c["max_crops_per_object"]]
        crops = [(fid,) + make_crop(by_id[fid].rgb, by_id[fid].depth, p.pixels[fid], c["crop_size"]) for fid in best]
        singles, cams, sizes, cuts = [], [], [], []
        for fid in spread(seen, c["single_views_per_object"]):
            fd = by_id[fid]
            sel = np.isin(fd.pixels, p.pixels[fid])
            if sel.sum() < 10:
                continue
            sframe, centre = object_frame(fd.points[sel], scene.plane)  # one frame: no outlier test (proposals.outlier_sigma)
            singles.append((fid, lift(scene.views(p, [fid], others=grid.reads_others), sframe, grid)))
            cams.append(view_camera(sframe.up, centre, fd.cam_to_world))
            sizes.append(np.array([sframe.radius, sframe.height], np.float64))   # the label stage's size_m of this view
            # does the view cut its object off (the image border, a nearer object), as the label stage's lift_frame
            # finds it (ingest.truncation.cut_pixels)
            others = scene.others_held(fd, p.pixels[fid]).reshape(fd.depth.shape)
            cuts.append(bool(cut_pixels(p.pixels[fid], fd.depth, others).any()))
        out.append(ObjectRecord(
            id=p.object_id, capture=scene.capture.name, key=p.key, origin=p.frame.origin, up=p.frame.up,
            center=p.center_world, radius_m=p.frame.radius, height_m=p.frame.height, n_points=p.n_points,
            n_frames=len(seen), volume=vol, views=view_rows, crops=crops, single_views=singles,
            single_cameras=cams, single_sizes=sizes, single_cuts=cuts))
    return out


def unique_capture_names(captures: list[str | Path]) -> list[str]:
    """The captures' folder names; InputError when two are the same (they prefix object ids)."""
    names = [Path(c).name for c in captures]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise InputError(None, "captures", f"capture folder names must be unique (they prefix object ids), got duplicates {dup}")
    return names


def _reason(e: InputError) -> str:
    return f"{e.field + ': ' if e.field else ''}{e.message}"


def lift_capture(path: str | Path, cfg: dict, seed: int, use_masks: bool, grid: Grid,
                 progress: Callable[[str], None] | None = None) -> tuple[list[ObjectRecord], CaptureRecord, dict, int]:
    """One capture: its objects lifted into records, its capture record, its summary and its frame count.
    Raises :class:`InputError` when the capture cannot be read or holds no object."""
    cap = read_capture(path, check_images=False)
    detail(progress, f"{cap.name}: {len(cap.frames)} frames")
    scene = find_objects(cap, cfg, capture_rng(seed, cap.name), use_masks=use_masks, progress=progress)
    if not scene.proposals:
        raise InputError(cap.path, "objects", "no objects found above the support plane "
                         f"(ingest.above_plane_m={cfg['ingest']['above_plane_m']}, masks "
                         f"{'used' if cap.has_masks and use_masks else 'not used'})")
    recs = object_records(scene, cfg, grid)
    rec = CaptureRecord(
        name=cap.name, path=str(Path(path).resolve()), fingerprint=folder_fingerprint(cap.path),
        plane_normal=scene.plane.normal, plane_offset=scene.plane.offset, plane_residual_m=scene.plane.residual_m,
        plane_inlier_fraction=scene.plane.inlier_fraction, n_frames=len(scene.frames), n_objects=len(recs),
        masks=bool(cap.has_masks and use_masks))
    summary = {"capture": cap.name, "objects": len(recs), "plane_residual_m": scene.plane.residual_m,
               "plane_inlier_fraction": scene.plane.inlier_fraction, "plane_iterations": scene.plane.iterations}
    return recs, rec, summary, len(scene.frames)


def _lift_item(shared: tuple, path: str) -> tuple[tuple | str, list]:
    """Executor item: one capture lifted in a worker process (with keep_going, a bad one gives its reason),
    and its progress lines for the caller to replay."""
    cfg, seed, use_masks, grid, keep_going = shared
    rec = Recorder()
    try:
        return lift_capture(path, cfg, seed, use_masks, grid, rec), rec.lines
    except InputError as e:
        if not keep_going:
            raise
        return _reason(e), rec.lines


def check_captures(captures: list[str | Path], *, keep_going: bool = False) -> tuple[list[Path], list[tuple[str, str]]]:
    """Check every capture before any work: capture.json, every frame file's PNG header, unique names.

    Returns (good captures, [(capture, reason)] of bad ones).  Without ``keep_going`` any bad capture raises
    :class:`InputErrors` naming all of them (one line each); with it they are returned to be skipped.
    """
    unique_capture_names(captures)
    good, errors = [], []
    for c in captures:
        try:
            read_capture(c, check_images=False).check_headers()
            good.append(Path(c))
        except InputError as e:
            errors.append(e)
    if errors and not keep_going:
        raise InputErrors(errors)
    return good, [(str(e.path), _reason(e)) for e in errors]


def ingest_captures(captures: list[str | Path], store: str | Path, cfg: dict, *, seed: int = 0,
                    use_masks: bool = True, progress: Callable[[str], None] | None = None,
                    keep_going: bool = False, executor=None) -> dict:
    """Ingest capture folders into the store at ``store`` (created or updated atomically).

    ``executor`` (``protomine.scale.executor``; None = this process) lifts the captures in its worker
    processes, one capture per item; the store is written once, here.  Captures are independent (each has
    its own generator, ``capture_rng``), so the store is the same whatever the number of workers.

    keep_going: a capture that fails while it is read (a bad image) or holds no object is skipped and
    listed in the summary's ``skipped`` [(capture, reason)]; the store is written for the others (not at
    all when none is left).  Without it the first such capture raises :class:`InputError`.
    Returns a summary: per-capture plane residual, object counts, frames per second, store counts, skipped.
    """
    import time
    grid = Grid.from_config(cfg)
    unique_capture_names(captures)
    if Path(store).exists():
        # fail before minutes of work when the existing store is unreadable or of another grid;
        # write_store checks again under the writer lock (another process may replace it meanwhile)
        old = ObjectStore(store)
        if old.grid_shape != grid.shape:
            raise InputError(store, "grid", f"store was built with grid {old.grid_shape}, this run uses {grid.shape}; "
                             "use the same [volume] config or a new store")
    objects, caps, per_capture, skipped = [], [], [], []
    t0, n_frames = time.monotonic(), 0
    total = sum(_frame_count(c) for c in captures)
    with bar(progress, "ingest", total=total, unit="frames") as b:

        def add(path: str | Path, res: tuple | str) -> None:
            nonlocal n_frames
            if isinstance(res, str):  # skipped (keep_going): the reason
                skipped.append((str(path), res))
                b.set_total(b.total - _frame_count(path))
                return
            recs, rec, summary, frames = res
            b.advance(frames)
            objects.extend(recs)
            caps.append(rec)
            per_capture.append(summary)
            n_frames += frames
            detail(progress, f"{rec.name}: {len(recs)} objects, plane residual {rec.plane_residual_m * 1000:.2f} mm")

        if executor is None or executor.n_workers == 1 or len(captures) < 2:
            for path in captures:
                try:
                    res = lift_capture(path, cfg, seed, use_masks, grid, progress)
                except InputError as e:
                    if not keep_going:
                        raise
                    res = _reason(e)
                add(path, res)
        else:
            detail(progress, f"{len(captures)} captures on {executor.describe()}")
            order = iter(captures)
            def add_replayed(res: tuple[tuple | str, list]) -> None:
                replay(progress, res[1])
                add(next(order), res[0])

            executor.map(_lift_item, [str(c) for c in captures], shared=(cfg, seed, use_masks, grid, keep_going),
                         fold=lambda _, res: add_replayed(res))
    elapsed = time.monotonic() - t0
    pause_point("inputs_read")
    counts = {"kept": 0, "replaced": 0, "added": 0}
    if caps:
        prov = provenance(cfg, seed, {c.name: c.fingerprint for c in caps}, command="ingest")
        counts = write_store(store, objects, caps, grid=grid, provenance=prov, crop_size=cfg["ingest"]["crop_size"])
    return {"captures": per_capture, "objects": len(objects), "frames": n_frames, "seconds": elapsed,
            "frames_per_second": n_frames / max(elapsed, 1e-9), "store": counts, "skipped": skipped}


def _frame_count(path: str | Path) -> int:
    """Frames of a capture for the progress total (0 when its capture.json cannot be read)."""
    try:
        return len(read_capture(path, check_images=False).frames)
    except InputError:
        return 0
