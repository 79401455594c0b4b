"""Where a single view cuts its object off: the image border, or a nearer object in front of it.

A view whose object runs off the image, or hides behind a nearer object, shows only part of the footprint: the
visible footprint's minimum enclosing circle (``proposals.object_frame``) is then too small and lies off the
whole footprint's centre, toward the visible part, and every cell of the scale-normalised grid is measured about
the wrong centre and radius.  The hidden part lies on the side of the cut, so candidate frames move the circle's
centre that way (``proposals.shifted_frames``, as ``centre_candidates`` moves it away from the camera) and the view
search keeps, per prototype, the candidate that fits best (``label.matcher.lift_frame``, ``[mine]
view_cut_offsets``).

The cut's direction (in-plane, unit) is the mean of the directions from the visible footprint's centre to the
object's points on a cut pixel: a pixel within ``BORDER_PX`` of the image border, or next to (within
``NEIGHBOUR_PX``, 8-connected dilation) a pixel of another object (a mask id, or another proposal's pixel) whose
reading is nearer the camera by at least ``NEARER_M``.  A view with no cut pixel, or whose cut pixels surround
its centre evenly (the mean direction shorter than ``MIN_RESULTANT`` of a unit), has no direction: it is not cut
(or cut on every side, where no one direction helps).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..geometry import camera_to_pixel, invert_rigid, plane_basis, transform_points

BORDER_PX = 2          # pixels this close to the image border are on the cut (the renderer's / sensor's edge)
NEIGHBOUR_PX = 2       # ... and pixels this close to a nearer object's pixel
NEARER_M = 0.02        # a neighbour's reading this much nearer the camera than ours hides part of the object
MIN_RESULTANT = 0.3    # cut pixels all round the object (mean unit direction shorter than this): no one direction


def cut_pixels(pixels: np.ndarray, depth: np.ndarray, others: np.ndarray | None) -> np.ndarray:
    """(len(pixels),) bool: which of an object's flat pixel indices ``pixels`` lie on a cut.  ``depth`` (H, W)
    metres (0 = no reading); ``others`` (H, W) bool: pixels another object holds (None: none known)."""
    H, W = depth.shape
    pix = np.asarray(pixels, np.int64)
    r, c = pix // W, pix % W
    cut = (r < BORDER_PX) | (r >= H - BORDER_PX) | (c < BORDER_PX) | (c >= W - BORDER_PX)
    if others is not None and others.any():
        ours = np.zeros(H * W, bool)
        ours[pix] = True
        ours = ours.reshape(H, W)
        d_ours = depth.reshape(-1)[pix]
        ref = float(np.median(d_ours[d_ours > 0])) if np.any(d_ours > 0) else 0.0
        nearer = others & ~ours & (depth > 0) & (depth < ref - NEARER_M)
        if ref > 0 and nearer.any():
            near = ndimage.binary_dilation(nearer, structure=np.ones((3, 3), bool), iterations=NEIGHBOUR_PX)
            cut |= near.reshape(-1)[pix]
    return cut


def cut_direction(points: np.ndarray, cut: np.ndarray, origin: np.ndarray, up: np.ndarray) -> np.ndarray | None:
    """In-plane unit direction (3,) (world) from the visible footprint's centre ``origin`` toward the cut: the mean
    of the unit directions to the object's world points ``points`` (M, 3) on a cut (``cut`` (M,) bool), None when
    none is on a cut or they surround the centre (mean shorter than ``MIN_RESULTANT``)."""
    pts = np.asarray(points, np.float64)[np.asarray(cut, bool)]
    if not len(pts):
        return None
    B = plane_basis(np.asarray(up, np.float64))
    xy = (pts - np.asarray(origin, np.float64)) @ B[:2].T
    n = np.linalg.norm(xy, axis=1)
    xy = xy[n > 1e-9] / n[n > 1e-9, None]
    if not len(xy):
        return None
    m = xy.mean(axis=0)
    if np.linalg.norm(m) < MIN_RESULTANT:
        return None
    m /= np.linalg.norm(m)
    return m @ B[:2]


def centroid_cut_direction(points: np.ndarray, cut: np.ndarray, up: np.ndarray) -> np.ndarray | None:
    """In-plane unit direction (3,) (world) from the centroid of the object's visible world ``points`` (M, 3) to the
    centroid of those on a cut (``cut`` (M,) bool): for a sliver along the image border the visible circle's centre
    lies past the cut line (:func:`cut_direction` from it points away from the hidden part), while the visible points
    lie on the near side of that line.  None when no point is on a cut or the two centroids coincide in the plane."""
    pts = np.asarray(points, np.float64)
    on = np.asarray(cut, bool)
    if not on.any():
        return None
    B = plane_basis(np.asarray(up, np.float64))
    d = (pts[on].mean(axis=0) - pts.mean(axis=0)) @ B[:2].T
    n = float(np.linalg.norm(d))
    if n < 1e-9:
        return None
    return (d / n) @ B[:2]


@dataclass(frozen=True)
class ViewCut:
    """What a single view could not see of the space about its object: the cells that project outside the image, and
    those behind a nearer object (``[mine] view_normalise_cut``, ``mine.viewnorm``).  Points are given in the view's
    object frame, metres (origin the visible footprint's base centre, axes ``plane_basis(up)``); ``K`` (3, 3) the
    intrinsics, ``size`` (width, height) pixels, ``world_to_cam`` (4, 4); ``origin`` (3,), ``basis`` (3, 3) the object
    frame; ``radius``, ``height`` the view's visible footprint radius and height (m); ``others`` the sorted flat pixel
    indices held by other objects of the frame and ``others_depth`` their readings (m)."""
    K: np.ndarray
    size: tuple[int, int]
    world_to_cam: np.ndarray
    origin: np.ndarray
    basis: np.ndarray
    radius: float
    height: float
    others: np.ndarray
    others_depth: np.ndarray

    def hidden(self, points: np.ndarray) -> np.ndarray:
        """(m,) bool: object-frame points (m, 3) (metres) the view's camera cannot see: behind the camera, projecting
        outside the image (perspective, the pixel centres at integer coordinates), or onto another object's pixel
        whose reading is nearer than the point by more than ``NEARER_M`` (the point lies behind that object)."""
        world = self.origin + np.asarray(points, np.float64) @ self.basis
        uv, z = camera_to_pixel(transform_points(self.world_to_cam, world), self.K)
        front = z > 1e-6
        w, h = self.size
        c, r = np.floor(uv[:, 0] + 0.5), np.floor(uv[:, 1] + 0.5)
        inside = front & (c >= 0) & (c < w) & (r >= 0) & (r < h)
        out = ~inside
        if len(self.others) and inside.any():
            flat = (r[inside] * w + c[inside]).astype(np.int64)
            j = np.minimum(np.searchsorted(self.others, flat), len(self.others) - 1)
            behind = (self.others[j] == flat) & (self.others_depth[j] < z[inside] - NEARER_M)
            out[np.flatnonzero(inside)[behind]] = True
        return out


def view_cut(depth: np.ndarray, K: np.ndarray, cam_to_world: np.ndarray, pixels: np.ndarray, others: np.ndarray,
             origin: np.ndarray, up: np.ndarray, radius: float, height: float) -> ViewCut | None:
    """The :class:`ViewCut` of an object (flat pixel indices ``pixels``, visible footprint ``origin``, ``up``,
    ``radius``, ``height``) in a frame (``depth`` (H, W) metres, ``K``, ``cam_to_world``; ``others`` (H * W,) bool
    the pixels other objects hold), None when the view does not cut it (no pixel on a cut, :func:`cut_pixels`)."""
    H, W = depth.shape
    others = np.asarray(others, bool).reshape(-1)
    if not cut_pixels(pixels, depth, others.reshape(H, W)).any():
        return None
    idx = np.flatnonzero(others & (depth.reshape(-1) > 0))
    return ViewCut(np.asarray(K, np.float64), (int(W), int(H)), invert_rigid(np.asarray(cam_to_world, np.float64)),
                   np.asarray(origin, np.float64), plane_basis(np.asarray(up, np.float64)), float(radius), float(height),
                   idx, depth.reshape(-1)[idx].astype(np.float64))
