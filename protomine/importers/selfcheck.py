"""Each importer checks itself: the support plane seen from two far-apart frames must be one plane in world
coordinates.  Units, camera axes and pose directions are the usual trap; each one bends the two planes apart.

The plane of a frame is fitted in its camera frame (RANSAC, ``ingest.plane.fit_plane``) as n . p = d, then
moved to the world with the frame's cam_to_world (R, t): n_w = R n, d_w = d + n_w . t.  The two frames agree
when their normals are within ``MAX_ANGLE_DEG`` and each plane's inliers lie within ``MAX_OFFSET_M`` of the
other's plane.  When they do not, the same two camera-frame planes are moved again under the usual mistakes
(poses inverted, OpenGL camera axes, depth in another unit) and the mistake that makes them agree is named.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..geometry import depth_to_points, invert_rigid
from ..ingest.plane import fit_plane
from .common import ImportedCapture
from .poses import GL_TO_CV

MAX_ANGLE_DEG = 1.5
MAX_OFFSET_M = 0.008
INLIER_M = 0.008           # RANSAC inlier distance of a single frame's plane
MIN_PLANE_SHARE = 0.2      # a frame sees the table when its plane holds this share of its depth points
CANDIDATES = 8             # frames tried, spread over the capture
UNIT_FACTORS = (0.1, 10.0, 0.2, 5.0, 0.001, 1000.0, 0.5, 2.0)


@dataclass
class PlaneCheck:
    frames: tuple[str, str] | None     # the two frames compared (None: fewer than two frames see a plane)
    angle_deg: float = 0.0
    offset_m: float = 0.0


def _frame_plane(depth: np.ndarray, K: np.ndarray, rng: np.random.Generator):
    """(normal (3,), d, inlier points (M, 3)) of the dominant plane in the camera frame, or None."""
    pts, _ = depth_to_points(depth, K)
    if len(pts) < 100:
        return None
    pl = fit_plane(pts, inlier_dist=INLIER_M, rng=rng, toward=np.zeros(3), max_iterations=500, sample=20000)
    if pl.inlier_fraction < MIN_PLANE_SHARE:
        return None
    inl = pts[np.abs(pl.height(pts)) < INLIER_M]
    return pl.normal, pl.offset, inl[:: max(1, len(inl) // 2000)]


def _to_world(plane, T: np.ndarray, scale: float = 1.0, flip: bool = False):
    n, d, inl = plane
    if flip:                                   # points were in OpenGL axes: p_cv = F p_gl
        F = GL_TO_CV[:3, :3]
        n, inl = F @ n, inl @ F.T
    d, inl = d * scale, inl * scale            # the depth unit scales every camera point
    R, t = T[:3, :3], T[:3, 3]
    nw = R @ n
    return nw, d + nw @ t, inl @ R.T + t


def _disagreement(a, b) -> tuple[float, float]:
    (na, da, pa), (nb, db, pb) = a, b
    angle = float(np.degrees(np.arccos(np.clip(abs(na @ nb), -1.0, 1.0))))
    off = max(float(np.median(np.abs(pb @ na - da))), float(np.median(np.abs(pa @ nb - db))))
    return angle, off


def _agree(angle: float, off: float) -> bool:
    return angle <= MAX_ANGLE_DEG and off <= MAX_OFFSET_M


def check_support_plane(cap: ImportedCapture, rng: np.random.Generator) -> PlaneCheck:
    """Compare the support plane in the two farthest-apart frames that see one; raise InputError naming the
    likely cause (and the file and field to look at, from ``cap.blame``) when they disagree."""
    K = cap.intrinsics.K
    idx = np.unique(np.linspace(0, len(cap.frames) - 1, min(CANDIDATES, len(cap.frames))).round().astype(int))
    seen = []
    for i in idx:
        pl = _frame_plane(cap.frames[i].depth_m, K, rng)
        if pl is not None:
            seen.append((i, pl))
    if len(seen) < 2:
        return PlaneCheck(None)
    centres = np.array([cap.frames[i].cam_to_world[:3, 3] for i, _ in seen])
    dist = np.linalg.norm(centres[:, None] - centres[None], axis=2)
    a, b = np.unravel_index(int(dist.argmax()), dist.shape)
    (ia, pa), (ib, pb) = seen[a], seen[b]
    Ta, Tb = cap.frames[ia].cam_to_world, cap.frames[ib].cam_to_world
    angle, off = _disagreement(_to_world(pa, Ta), _to_world(pb, Tb))
    check = PlaneCheck((cap.frames[ia].id, cap.frames[ib].id), angle, off)
    if _agree(angle, off):
        return check
    cause = _likely_cause(pa, pb, Ta, Tb)
    path, fld = cap.blame.get(cause[0], (cap.source, "poses"))
    raise InputError(path, fld, f"self-check failed: the support plane seen from frames {check.frames[0]} and "
                     f"{check.frames[1]} differs by {angle:.1f} deg and {off * 1000:.0f} mm in world coordinates "
                     f"(expected <= {MAX_ANGLE_DEG} deg, {MAX_OFFSET_M * 1000:.0f} mm); likely cause: {cause[1]}")


def _likely_cause(pa, pb, Ta, Tb) -> tuple[str, str]:
    tries = [("direction", "wrong pose direction (the poses look world-to-camera, not camera-to-world)",
              dict(Ta=invert_rigid(Ta), Tb=invert_rigid(Tb))),
             ("axes", "wrong camera axes (the poses look OpenGL-style: y up, z backward)", dict(flip=True)),
             ("axes", "wrong camera axes and pose direction (OpenGL-style, world-to-camera)",
              dict(Ta=invert_rigid(Ta), Tb=invert_rigid(Tb), flip=True))]
    tries += [("unit", f"wrong depth unit (depth x {f:g} makes the frames agree)", dict(scale=f)) for f in UNIT_FACTORS]
    for cause, text, kw in tries:
        A, B = kw.get("Ta", Ta), kw.get("Tb", Tb)
        s, fl = kw.get("scale", 1.0), kw.get("flip", False)
        if _agree(*_disagreement(_to_world(pa, A, s, fl), _to_world(pb, B, s, fl))):
            return cause, text
    return "poses", "the poses and the depth disagree (wrong pose direction, camera axes or depth unit, or poses of another camera)"
