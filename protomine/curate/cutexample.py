"""Find's cut example (``[mine] find_cut``, with ``find_cut_offsets``, ``find_cut_decide``, ``find_cut_search``): a
one-frame example its view cuts off (the image border, a nearer object in front of it: ``ingest.truncation``) searched
the way the label stage searches a cut view.

A cut view shows part of its object, and ingest grids it about the minimum enclosing circle of the visible
footprint: a centre moved toward the visible part and a radius too small, so every cell of its scale-normalised
volume is measured about the wrong place and size.  A find from such an example ranks the store by that misplaced
volume.  Here the example's capture (the store's capture path, the store's recorded config and seed, as ingest found
its objects: ``ingest.pipeline.capture_rng``) is read again and the example's proposal lifted once more:

1. its :class:`ingest.truncation.ViewCut` (what the view could not see), None when the view does not cut it off;
2. its volume about the visible circle (the store's volume; checked bit for bit, else the example is left as it is)
   and about the circle moved toward the cut by each offset x its radius (``proposals.shifted_frames``, the
   label stage's ``[mine] view_cut_offsets``), each with its own frame (the radius grows to hold the footprint).

The route's label decision then matches every candidate with the cut, as the label stage does (per prototype the
candidate at the least distance, the copies seen from the camera losing what the view could not see, the cut views'
unknown cut), and the example takes part in the rest of find as the candidate its decided prototype chose
(:class:`WithExample`: the store with the example's volume and size replaced).  A view that is not cut, an example
seen in several frames, or a capture that cannot be read or does not reproduce the store's volume: find as before.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..ingest.volume import Grid, lift_many
from ..ingest.store import StoreSource


@dataclass
class CutExample:
    """A cut example's candidates: volumes (C, 6, R, A, H) (the store's first, then one per offset), their frames' base
    centres (C, 3) (world) and footprint radius and height (C, 2) metres, the view's ``ViewCut`` and its camera
    direction in the object frame (3,)."""
    volumes: np.ndarray
    origins: np.ndarray
    sizes: np.ndarray
    cut: object
    camera: np.ndarray


def find_cut_offsets(cfg: dict) -> tuple[float, ...]:
    """``[mine] find_cut_offsets``, its non-zero entries: () when off ([0.0])."""
    return tuple(float(o) for o in (cfg["mine"].get("find_cut_offsets") or [0.0]) if float(o) != 0.0)


def find_cut_direction(cfg: dict) -> str:
    """``[mine] find_cut_direction``: "circle" (the move toward the cut taken from the visible circle's centre, as the
    label stage's ``view_cut_offsets``) or "centroid" (from the visible points' centroid)."""
    d = str(cfg["mine"].get("find_cut_direction", "circle"))
    if d not in ("circle", "centroid"):
        from ..errors import InputError
        raise InputError(None, "mine.find_cut_direction", f'expected "circle" or "centroid", got {d!r}')
    return d


def cut_example(store, ex: int, grid: Grid, offsets: tuple[float, ...], direction: str = "circle") -> CutExample | None:
    """The :class:`CutExample` of store object ``ex`` lifted on ``grid`` (the library's), or None (module docstring:
    not cut, not a one-frame object, its capture not found or not reproducing the store's volume).  ``direction``: the
    offsets' move toward the cut from the visible circle's centre or the visible points' centroid
    (:func:`find_cut_direction`)."""
    from ..capture import read_capture
    from ..errors import InputError
    from ..ingest.pipeline import capture_rng, view_camera
    from ..ingest.proposals import find_objects
    from ..label.matcher import _cut_frames
    from ..ingest.truncation import view_cut

    owner, caps, attrs = (getattr(store, k, None) for k in ("single_object", "captures", "attrs"))
    if (owner is None or not caps or not attrs or "config" not in attrs or "capture" not in store.objects
            or int(np.asarray(store.objects.get("n_frames", [1] * len(store)))[ex]) != 1):
        return None
    rows = np.flatnonzero(np.asarray(owner) == ex)
    name = str(store.objects["capture"][ex])
    ci = np.flatnonzero(np.asarray(caps["name"]).astype(str) == name)
    if not len(rows) or not len(ci):
        return None
    path, masked = Path(str(caps["path"][ci[0]])), bool(caps["masks"][ci[0]])
    frame = str(store.single_frame[rows[0]])
    try:
        cap = read_capture(path, check_images=False)
    except (InputError, OSError):
        return None
    cfg = json.loads(attrs["config"])
    seed = int(attrs.get("seed", 0))
    masks = masked and cap.has_masks
    scene = find_objects(cap, cfg, capture_rng(seed, cap.name), frame_ids=[frame], use_masks=masks)
    fd = next((f for f in scene.frames if f.id == frame), None)
    oid = str(store.ids[ex])
    # ingest's ids: the mask's object id, or capture/frame/key for geometry-only proposals (``label.matcher.lift_frame``)
    p = next((q for q in scene.proposals if (q.object_id if masks else f"{cap.name}/{frame}/{q.key}") == oid
              or q.object_id == oid), None)
    if fd is None or p is None or frame not in p.pixels:
        return None
    pix = p.pixels[frame]
    vc = view_cut(fd.depth, cap.intrinsics.K, fd.cam_to_world, pix, scene.others_held(fd, pix),
                  p.frame.origin, p.frame.up, p.frame.radius, p.frame.height)
    if vc is None:
        return None
    sel = np.isin(fd.pixels, pix)
    frames = [p.frame] + (_cut_frames(scene, fd, p, pix, fd.points[sel], fd.pixels[sel], offsets, direction) if offsets else [])
    views = scene.views(p, [frame], others=grid.reads_others)
    vols = np.stack(lift_many([(views, f) for f in frames], grid))
    if not np.array_equal(vols[0], store.read_volume_at(np.array([ex]))[0]):
        return None
    centre = np.asarray(p.frame.origin, np.float64) + 0.5 * float(p.frame.height) * np.asarray(p.frame.up, np.float64)
    sizes = np.array([[f.radius, f.height] for f in frames], np.float64)
    origins = np.array([np.asarray(f.origin, np.float64) for f in frames])
    return CutExample(vols, origins, sizes, vc, np.asarray(view_camera(p.frame.up, centre, fd.cam_to_world), np.float64))


class WithExample:
    """The store with object ``ex``'s volume (6, R, A, H) and footprint radius / height (m) replaced; every other
    attribute is the store's.  Find searches it as the store (its chunked source included)."""

    def __init__(self, store, ex: int, volume: np.ndarray, size: np.ndarray):
        self._store, self._ex = store, int(ex)
        self._volume = np.asarray(volume, np.float32)
        self.objects = dict(store.objects)
        for key, v in (("radius_m", size[0]), ("height_m", size[1])):
            col = np.array(store.objects[key], np.float64)
            col[self._ex] = float(v)
            self.objects[key] = col

    def __getattr__(self, name):
        return getattr(self._store, name)

    def __len__(self) -> int:
        return len(self._store)

    def read_volume_at(self, indices: np.ndarray) -> np.ndarray:
        idx = np.asarray(indices)
        out = self._store.read_volume_at(idx)
        out[idx == self._ex] = self._volume
        return out

    def read_volumes(self, i0: int, i1: int) -> np.ndarray:
        out = self._store.read_volumes(i0, i1)
        if i0 <= self._ex < i1:
            out[self._ex - i0] = self._volume
        return out

    def source(self, cfg: dict) -> StoreSource:
        return StoreSource(self, cfg)
