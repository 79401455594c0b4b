"""Independent reference twin of the pose search (tests only; shares no code with protomine.mine.posesearch).

It follows the documented conventions of ``protomine.mine.posesearch.pose_distances`` and computes every
number from its definition, the slow and obvious way:

- Grid (DEVELOPERS.md, "Volumes are cylindrical grids"): cell (i, j, k) of an (R, A, H) grid has its centre
  at rho = (i + 0.5) / R, phi = (j + 0.5) 2 pi / A, z = (k + 0.5) / H in units of the grid's rho_max and
  z_max.  A value at a continuous position is read by linear interpolation between cell centres
  (``scipy.ndimage.map_coordinates``, order 1): azimuth wraps around; below the first radial or height
  centre the first cell's value holds; a position outside the grid (rho > 1 or z > 1) is unknown (feature 0,
  weight 0).  Axes of length 1 are not scaled.
- Posed prototype: the prototype turned by a rotation ``Rot`` (3, 3) and scaled by sigma about the base
  centre, i.e. mu(p) = P(Rot^T p / sigma) at every cell centre p of the object grid, written in Cartesian
  coordinates (x = rho cos phi, y = rho sin phi, z) and rotated explicitly.  A yaw of y degrees is the
  rotation about z by +y (counter-clockwise seen from above), so "object ~= prototype rolled by yaw".
- Distance (posesearch module docstring):
      D = sum_{c, cells} w v (x_c - mu_c)^2 / (C sum_{cells} w v + eps),   D = inf when sum w v <= min_overlap.
- Best pose: the smallest D over (scale, integer shift); the yaw is refined by the vertex of the parabola
  through D at the best shift and its two circular neighbours (``numpy.polyfit``), clipped to +-0.5 bin.

Everything is float64 and loops over poses; use tiny grids.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy.ndimage import map_coordinates

EPS = 1e-6  # the "+ eps" of the documented distance


def yaw_rotation(yaw_deg: float) -> np.ndarray:
    """(3, 3) rotation about +z by ``yaw_deg`` degrees, counter-clockwise seen from above."""
    t = np.deg2rad(yaw_deg)
    return np.array([[np.cos(t), -np.sin(t), 0.0], [np.sin(t), np.cos(t), 0.0], [0.0, 0.0, 1.0]])


def cell_centres(R: int, A: int, H: int) -> np.ndarray:
    """Cartesian centres (R, A, H, 3) of the grid's cells in units of (rho_max, rho_max, z_max)."""
    rho = (np.arange(R) + 0.5) / R
    phi = (np.arange(A) + 0.5) * 2.0 * np.pi / A
    z = (np.arange(H) + 0.5) / H
    rr, pp, zz = np.meshgrid(rho, phi, z, indexing="ij")
    return np.stack([rr * np.cos(pp), rr * np.sin(pp), zz], axis=-1)


def sample_cylindrical(vol: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Read ``vol`` (..., R, A, H) at Cartesian ``points`` (M, 3): values (..., M) and inside (M,) bool."""
    R, A, H = vol.shape[-3:]
    rho = np.hypot(points[:, 0], points[:, 1])
    phi = np.mod(np.arctan2(points[:, 1], points[:, 0]), 2.0 * np.pi)
    z = points[:, 2]
    inside = (rho <= 1.0 + 1e-12) & (z <= 1.0 + 1e-12)
    fi = rho * R - 0.5
    fj = np.mod(phi * A / (2.0 * np.pi) - 0.5, A) + 1.0   # +1: one wrapped cell padded on each side below
    fk = z * H - 0.5
    padded = np.concatenate([vol[..., -1:, :], vol, vol[..., :1, :]], axis=-2)
    flat = padded.reshape((-1,) + padded.shape[-3:])
    out = np.stack([map_coordinates(f, [fi, fj, fk], order=1, mode="nearest") for f in flat])
    return out.reshape(vol.shape[:-3] + (len(points),)), inside


def posed_prototype(P: np.ndarray, V: np.ndarray, rotation: np.ndarray, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """P (C, R, A, H), V (R, A, H) turned by ``rotation`` (3, 3) and scaled by ``sigma``: (mu, v) same shapes."""
    C, R, A, H = P.shape
    p = cell_centres(R, A, H).reshape(-1, 3)
    q = p @ rotation  # row vectors: p @ Rot = (Rot^T p^T)^T, the inverse rotation
    scale = np.array([sigma if R > 1 else 1.0, sigma if R > 1 else 1.0, sigma if H > 1 else 1.0])
    q = q / scale
    mu, inside = sample_cylindrical(np.asarray(P, np.float64), q)
    v, _ = sample_cylindrical(np.asarray(V, np.float64)[None], q)
    mu = np.where(inside, mu, 0.0).reshape(C, R, A, H)
    v = np.where(inside, v[0], 0.0).reshape(R, A, H)
    return mu, v


def weighted_distance(x: np.ndarray, w: np.ndarray, mu: np.ndarray, v: np.ndarray, min_overlap: float = 1e-3) -> float:
    """The documented distance between one object x (C, R, A, H), w (R, A, H) and one posed prototype."""
    C = x.shape[0]
    wv = np.asarray(w, np.float64) * v
    overlap = wv.sum()
    if overlap <= min_overlap:
        return np.inf
    return float((wv[None] * (np.asarray(x, np.float64) - mu) ** 2).sum() / (C * overlap + EPS))


def all_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, scales: Sequence[float],
                  min_overlap: float = 1e-3) -> np.ndarray:
    """(N, K, S, A) distance of every object to every prototype turned by every integer shift and scale."""
    N, K, A = X.shape[0], P.shape[0], P.shape[3]
    out = np.empty((N, K, len(scales), A))
    for k in range(K):
        for si, sigma in enumerate(scales):
            for s in range(A):
                mu, v = posed_prototype(P[k], V[k], yaw_rotation(s * 360.0 / A), sigma)
                for n in range(N):
                    out[n, k, si, s] = weighted_distance(X[n], W[n], mu, v, min_overlap)
    return out


def best_pose(allD: np.ndarray, scales: Sequence[float]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """allD (N, K, S, A) -> D, yaw_deg, scale, each (N, K)."""
    N, K, S, A = allD.shape
    D = np.empty((N, K))
    yaw = np.zeros((N, K))
    sc = np.empty((N, K))
    for n in range(N):
        for k in range(K):
            si, s = np.unravel_index(np.argmin(allD[n, k]), (S, A))
            D[n, k], sc[n, k] = allD[n, k, si, s], scales[si]
            row = allD[n, k, si]
            ys = np.array([row[(s - 1) % A], row[s], row[(s + 1) % A]])
            off = 0.0
            if np.all(np.isfinite(ys)):
                a, b, _ = np.polyfit([-1.0, 0.0, 1.0], ys, 2)
                if a > 0:
                    off = float(np.clip(-b / (2 * a), -0.5, 0.5))
            yaw[n, k] = np.mod((s + off) * 360.0 / A, 360.0) if np.isfinite(D[n, k]) else np.mod(s * 360.0 / A, 360.0)
    return D, yaw, sc
