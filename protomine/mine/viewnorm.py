"""The reference normalised as a single view of it: a prototype's copy re-gridded about the part a camera sees.

A single view is lifted about its *visible* footprint: the smallest circle holding the points the camera sees
(``ingest.proposals.object_frame``), and the height of the highest of them.  A part hidden behind the object (a
tripod's leg behind its column, the far side of a funnel lying down) is left out of that circle, so the view's
grid is shifted toward the camera and shrunk against the grid of the whole object, which every prototype and its
tilted copies are normalised by (``mine.tilts``).  The two then disagree cell by cell even at the true pose:
on the seed-0 demo, single views of upright tripod stands fitted their own prototype at the true pose at
0.045-0.049 and an L bracket's copy at 0.018-0.021; of the 23 misnamed known views, 22 were out-scored at the true
pose (the true class at its true pose was farther than the winner), one was a search miss.

This module gives the reference the same normalisation (analysis by synthesis, with the camera known): for a
prototype resting on a face (up direction u in its frame) and seen from a camera direction c (in the copy's
frame), its solid cells (``tilts.solid_cells``) are rotated onto the face and projected
orthographically along c onto a pixel grid of ``pixel`` cells; a cell is visible when it lies within ``depth_tol``
cells of the nearest cell of its pixel (a z-buffer).  The copy's base centre and footprint radius are the smallest
enclosing circle of the visible cells (``min_enclosing_circle``), its height the highest visible cell above the
copy's lowest cell (the support plane), grown by half a cell as ``tilts.copy_geometries`` does, and the prototype is
resampled into that grid (``tilts._resample_copies``).  The camera direction in the copy's frame depends on the
yaw, so a copy is made for every ``yaw_step`` degrees of yaw and the FFT yaw search of ``posesearch`` (all scales)
is kept within ``yaw_window`` degrees of the yaw it was made for.  Faces searched per prototype: the face the pose
search found for the view, the canonical face and the prototype's recorded resting faces with members (directions
within ``SAME_FACE_DEG`` merged).

Used by the label decision only (``[mine] view_normalise_top``, :meth:`label.matcher.Matcher.match` with the views'
camera directions): each view's ``top`` nearest prototypes (within ``within`` x its nearest distance) take the
lesser of their pose-searched distance and this one, and the nearest then names the class; the pose and the score
stay those of the pose search (the score's calibration judges the plain distance).
"""
from __future__ import annotations

import numpy as np

from .. import rotations as rot
from ..ingest.proposals import min_enclosing_circle
from .posesearch import PoseBank
from .tilts import IDENTITY_DEG, CopyGeometry, TiltGrid, _resample_copies, solid_cells

SAME_FACE_DEG = 10.0     # resting directions this close are searched once


def visible_mask(q: np.ndarray, camera: np.ndarray, pixel: float, depth_tol: float, splat: int = 1) -> np.ndarray:
    """(m,) bool: points q (m, 3) seen from direction ``camera`` (3,) (orthographic z-buffer: per pixel of side
    ``pixel``, the points within ``depth_tol`` of the nearest point to the camera; each point also occludes the
    pixels within ``splat`` of its own, so the gaps between the sparse cell centres of a surface do not show what
    lies behind it)."""
    d = np.asarray(camera, np.float64)
    d = d / max(float(np.linalg.norm(d)), 1e-12)
    a = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = np.cross(d, a)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(d, e1)
    ij = np.floor(np.stack([q @ e1, q @ e2], 1) / pixel).astype(np.int64)
    if not len(ij):
        return np.zeros(0, bool)
    ij -= ij.min(axis=0) - splat
    n0, n1 = (ij.max(axis=0) + splat + 1).tolist()
    depth = q @ d
    near = np.full((n0, n1), -np.inf)
    for di in range(-splat, splat + 1):
        for dj in range(-splat, splat + 1):
            np.maximum.at(near, (ij[:, 0] + di, ij[:, 1] + dj), depth)
    return depth >= near[ij[:, 0], ij[:, 1]] - depth_tol


def visible_geometry(surface: np.ndarray, weight: np.ndarray, aspect: float, up: np.ndarray, camera: np.ndarray,
                     grid: TiltGrid, *, pixel: float = 1.0, depth_tol: float = 1.0,
                     solid: tuple[np.ndarray, np.ndarray] | None = None) -> CopyGeometry:
    """Geometry of the copy of a prototype (surface, weight (R, A, H), ``aspect``) resting with ``up`` (3,) pointing
    up, gridded about the footprint and height of its cells visible from ``camera`` (3,, the copy's frame);
    ``pixel`` and ``depth_tol`` in cells (module docstring); ``solid``: :func:`solid_cells` when known."""
    R, A, H = surface.shape
    c0, p = solid if solid is not None else solid_cells(surface, weight, aspect, grid)
    u = np.asarray(up, np.float64)
    u = u / max(float(np.linalg.norm(u)), 1e-12)
    M = np.eye(3) if u[2] >= np.cos(np.deg2rad(IDENTITY_DEG)) else rot.tilt_matrix(u)
    q = p @ M.T
    lo = float(q[:, 2].min())
    half = 0.5 * max(1.0 / R, aspect / H)
    qv = q[visible_mask(q, camera, pixel * 2 * half, depth_tol * 2 * half)]
    centre, radius = min_enclosing_circle(qv[:, :2])
    height = max(float(qv[:, 2].max()) - lo + half, 1e-3)
    radius = max(radius + 0.5 * half, 1e-3)
    base = np.array([centre[0], centre[1], lo - 0.5 * half])
    return CopyGeometry(M, c0, base, grid.radial_margin * radius, grid.height_margin * height)


def face_candidates(found: np.ndarray, face_up: np.ndarray, face_count: np.ndarray, face_symmetry: np.ndarray
                    ) -> list[np.ndarray]:
    """Up directions searched for one (view, prototype): the one the pose search found, +z, and the prototype's
    recorded faces with members, those within ``SAME_FACE_DEG`` of an earlier one left out."""
    fu = np.asarray(face_up, np.float64).reshape(-1, 3)
    have = (np.asarray(face_symmetry) >= 0) & (np.asarray(face_count) > 0)
    cos_same = np.cos(np.deg2rad(SAME_FACE_DEG))
    keep: list[np.ndarray] = []
    for u in [np.asarray(found, np.float64), np.array([0.0, 0.0, 1.0]), *fu[have]]:
        n = float(np.linalg.norm(u))
        if n < 1e-9:
            continue
        u = u / n
        if all(float(u @ v) < cos_same for v in keep):
            keep.append(u)
    return keep


class ViewNormaliser:
    """The distances of single views to prototypes P (K, C, R, A, H), V (K, R, A, H) (grid aspects (K,)) normalised as
    views from their cameras (module docstring); ``faces`` = (face_up (K, F, 3), face_count (K, F), face_symmetry
    (K, F)) of the library."""

    def __init__(self, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid,
                 faces: tuple[np.ndarray, np.ndarray, np.ndarray], *, top: int = 4, within: float = 1.5,
                 yaw_step: float = 30.0, yaw_window: float = 15.0, pixel: float = 1.0, depth_tol: float = 1.0):
        self.P, self.V = np.asarray(P, np.float32), np.asarray(V, np.float32)
        self.aspect = np.asarray(aspect, np.float64)
        self.scales, self.grid, self.faces = tuple(scales), grid, faces
        self.top, self.within = int(top), float(within)
        self.yaw_step, self.yaw_window, self.pixel, self.depth_tol = yaw_step, yaw_window, pixel, depth_tol
        self._solid: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def distance(self, x: np.ndarray, w: np.ndarray, k: int, ups: list[np.ndarray], camera: np.ndarray) -> float:
        """Least distance of one view x (1, C, R, A, H), w (1, R, A, H) (camera direction ``camera`` (3,) in its
        object frame) to prototype k's copies resting on ``ups``, each gridded as seen from the camera at every
        ``yaw_step`` degrees of yaw, the FFT yaw kept within ``yaw_window`` of it."""
        k = int(k)
        if k not in self._solid:
            self._solid[k] = solid_cells(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid)
        y0 = np.arange(0.0, 360.0, self.yaw_step)
        cams = rot.yaw_matrix(-y0) @ np.asarray(camera, np.float64)   # (Y, 3): the camera in the copy's frame
        gs = [visible_geometry(self.P[k, 0], self.V[k], float(self.aspect[k]), u, c, self.grid, pixel=self.pixel,
                               depth_tol=self.depth_tol, solid=self._solid[k]) for u in ups for c in cams]
        n = len(gs)
        pc, vc = _resample_copies(self.P[k][None], self.V[k][None], gs, np.full(n, float(self.aspect[k])),
                                  index=np.zeros(n, np.int64))
        allD = PoseBank(pc, vc, self.scales).match(x, w, return_all=True).all_D[0]   # (n, S, A)
        A = allD.shape[-1]
        yaws = np.arange(A) * 360.0 / A
        made = np.tile(y0, len(ups))
        ok = np.abs((yaws[None, :] - made[:, None] + 180.0) % 360.0 - 180.0) <= self.yaw_window + 1e-9
        d = np.where(ok[:, None, :] & np.isfinite(allD), allD, np.inf)
        return float(d.min()) if d.size else np.inf

    def improve(self, X: np.ndarray, W: np.ndarray, D: np.ndarray, up: np.ndarray, cameras: np.ndarray) -> np.ndarray:
        """Decision distances (n, K): D (n, K) of views X (n, C, R, A, H), W (n, R, A, H), with each view's ``top``
        nearest prototypes (within ``within`` x its nearest) taking the lesser of D and the view-normalised
        distance; ``up`` (n, K, 3) the faces the pose search found, ``cameras`` (n, 3) the camera directions in the
        views' object frames (a row of zeros or NaN: none, D kept)."""
        out = np.array(D, np.float64, copy=True)
        face_up, face_count, face_symmetry = self.faces
        for i in range(len(D)):
            cam = np.asarray(cameras[i], np.float64)
            if not np.all(np.isfinite(cam)) or np.linalg.norm(cam) < 1e-9:
                continue
            Df = np.where(np.isfinite(D[i]), D[i], np.inf)
            order = np.argsort(Df, kind="stable")[:self.top]
            if not np.isfinite(Df[order[0]]):
                continue
            for k in order[Df[order] <= self.within * Df[order[0]]]:
                ups = face_candidates(up[i, k], face_up[k], face_count[k], face_symmetry[k])
                out[i, k] = min(out[i, k], self.distance(X[i:i + 1], W[i:i + 1], int(k), ups, cam))
        return out
