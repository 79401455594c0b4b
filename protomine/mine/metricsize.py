"""Metric size in the label decision: how far a single view's measured size is from its prototype's at the pose found.

Every volume is normalised by its own footprint radius and height (``mine.tilts``), so the pose search compares
shapes only: a view fits any prototype whose shape it resembles, whatever the sizes.  But the sensor measures metres,
and a class's instances share a size up to their spread (the demo's classes 0.8-1.25 x their middle).  For a view
decided among prototypes, the view's metric footprint radius r and height h (``label.matcher.lift_frame``'s
``size_m``) are compared with the prototype resting on the up direction the search found for it: its copy's footprint
radius r_u and height h_u (``tilts.copy_geometries``, units of the prototype's rho_max) times the class's metres per
unit.  That scale comes from the library's members as mined (their fused objects' metric radius and height, each on
its own resting face: the median over members of sqrt(r h / (r_f h_f)), :func:`member_metres`).

The mismatch (:func:`size_mismatch`) is m = ln(r / (s r_u))^2 + ln(h / (s h_u))^2, and with ``[mine] label_size`` = c
the decision distance D becomes D x exp(c m): ln D plus c times the squared log-size residual, a Gaussian log-likelihood
of the view's size given the class and pose (c = 1 / (2 sigma^2) for a spread sigma of the log size).  The view's
visible footprint is a part of the whole one (its enclosing circle no larger), so r below the prototype's is usual
for a view that hides part of its object; the demo's correctly named views lie at ln(r / (s r_u)) -0.32..0.21 and
ln(h / (s h_u)) -0.44..0.27 (5th-95th percentile, all-stereo seed 0).
"""
from __future__ import annotations

import numpy as np

from .tilts import TiltGrid, copy_geometries, solid_points


def resting_extents(P: np.ndarray, V: np.ndarray, aspect: float, grid: TiltGrid, ups: np.ndarray,
                    solid: tuple[np.ndarray, np.ndarray] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Footprint radius and height (T,), (T,) (units of the prototype's rho_max) of one prototype (features P
    (C, R, A, H), weights V (R, A, H), grid ``aspect``) resting with each of ``ups`` (T, 3) (its frame) pointing up,
    as ``ingest.proposals.object_frame`` would measure the whole object lying so (``tilts.copy_geometries``)."""
    ups = np.asarray(ups, np.float64).reshape(-1, 3)
    if not len(ups):
        return np.zeros(0), np.zeros(0)
    solid = solid if solid is not None else solid_points(P[0], V, float(aspect), grid)
    gs = copy_geometries(P.shape[1:], float(aspect), ups, grid, solid)
    return (np.array([g.rho_max / grid.radial_margin for g in gs]), np.array([g.z_max / grid.height_margin for g in gs]))


def member_metres(P: np.ndarray, V: np.ndarray, aspect: np.ndarray, grid: TiltGrid, face_up: np.ndarray,
                  member_cluster: np.ndarray, member_face: np.ndarray, member_size: np.ndarray) -> np.ndarray:
    """(K,) metres per unit of each prototype (P (K, C, R, A, H), V (K, R, A, H), aspects (K,); NaN: no member): the
    median over its members of sqrt(r h / (r_f h_f)), (r, h) = member_size (M, 2) the member's metric footprint radius
    and height, (r_f, h_f) those of the prototype resting on the member's face (face_up (K, F, 3), member_face (M,))."""
    K = len(P)
    out = np.full(K, np.nan)
    mc, mf = np.asarray(member_cluster, np.int64), np.asarray(member_face, np.int64)
    size = np.asarray(member_size, np.float64).reshape(-1, 2)
    for k in range(K):
        idx = np.flatnonzero(mc == k)
        idx = idx[np.all(np.isfinite(size[idx]) & (size[idx] > 0), axis=1)]
        if not len(idx):
            continue
        r, h = resting_extents(P[k], V[k], float(aspect[k]), grid, np.asarray(face_up[k])[mf[idx]])
        out[k] = float(np.exp(np.median(0.5 * np.log(size[idx, 0] * size[idx, 1] / np.maximum(r * h, 1e-12)))))
    return out


def size_mismatch(sizes: np.ndarray, up: np.ndarray, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, grid: TiltGrid,
                  metres: np.ndarray) -> np.ndarray:
    """(n, K) ln(r / (s r_u))^2 + ln(h / (s h_u))^2 of views of metric size ``sizes`` (n, 2) (footprint radius, height)
    against each prototype k (P, V, aspect as in :func:`member_metres`, ``metres`` (K,) its metres per unit) resting on
    the up direction ``up`` (n, K, 3) (its frame) the pose search found; 0 where a size or the scale is unknown."""
    sizes = np.asarray(sizes, np.float64).reshape(-1, 2)
    up = np.asarray(up, np.float64)
    n, K = up.shape[:2]
    out = np.zeros((n, K))
    good = np.all(np.isfinite(sizes) & (sizes > 0), axis=1)
    if not good.any():
        return out
    for k in range(K):
        if not (np.isfinite(metres[k]) and metres[k] > 0):
            continue
        rows = np.flatnonzero(good)
        u, inv = np.unique(np.round(up[rows, k], 9), axis=0, return_inverse=True)   # views share the search's directions
        r, h = resting_extents(P[k], V[k], float(aspect[k]), grid, u)
        inv = np.asarray(inv).reshape(-1)
        lr = np.log(sizes[rows, 0] / (metres[k] * r[inv]))
        lh = np.log(sizes[rows, 1] / (metres[k] * h[inv]))
        out[rows, k] = lr ** 2 + lh ** 2
    return out
