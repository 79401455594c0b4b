"""Dominant support plane by RANSAC (Fischler & Bolles 1981) with a least-squares refit.

A plane is ``n . p = d`` with unit normal n (3,) and offset d (metres); the signed height of a point
above it is ``n . p - d``.  After fitting, n is flipped to point to the cameras' side: that is "up".

Iteration count (Fischler & Bolles 1981; Hartley & Zisserman 2004, sec. 4.7):
    N = log(1 - p) / log(1 - w^s)
with p the wanted probability of drawing at least one all-inlier sample, w the inlier fraction and
s = 3 points per sample.  N is updated adaptively from the best inlier fraction seen so far.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass
class PlaneFit:
    normal: np.ndarray      # (3,) unit, pointing to the cameras' side
    offset: float           # d in n . p = d
    inlier_fraction: float
    residual_m: float       # RMS distance of inliers to the refitted plane
    iterations: int

    def height(self, points: np.ndarray) -> np.ndarray:
        """Signed height (...,) of points (..., 3) above the plane."""
        return points @ self.normal - self.offset

    def project(self, points: np.ndarray) -> np.ndarray:
        """Orthogonal projection of points (..., 3) onto the plane."""
        return points - self.height(points)[..., None] * self.normal


def ransac_iterations(confidence: float, inlier_fraction: float, sample_size: int = 3) -> int:
    """N = log(1-p) / log(1-w^s), rounded up (at least 1)."""
    w_s = inlier_fraction ** sample_size
    if w_s >= 1.0:
        return 1
    if w_s <= 0.0:
        return 10**9
    return max(1, math.ceil(math.log(1.0 - confidence) / math.log(1.0 - w_s)))


def _lstsq_plane(points: np.ndarray) -> tuple[np.ndarray, float]:
    c = points.mean(axis=0)
    # the right singular vector of the smallest singular value is the normal of the best plane
    _, _, vt = np.linalg.svd(points - c, full_matrices=False)
    n = vt[-1]
    return n, float(n @ c)


def fit_plane(points: np.ndarray, *, inlier_dist: float, confidence: float = 0.999,
              rng: np.random.Generator, max_iterations: int = 2000, sample: int = 50000,
              toward: np.ndarray | None = None) -> PlaneFit:
    """Fit the dominant plane of points (N, 3).

    inlier_dist: RANSAC inlier threshold (metres).  toward: a point (e.g. the mean camera centre) the
    normal should face.  Hypotheses are scored on a random subsample of ``sample`` points; the refit
    uses every inlier.
    """
    pts = np.asarray(points, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != 3 or len(pts) < 3:
        raise ValueError(f"points must have shape (N>=3, 3), got {pts.shape}")
    sub = pts if len(pts) <= sample else pts[rng.choice(len(pts), sample, replace=False)]
    best_count, best = -1, None
    needed, it, batch = max_iterations, 0, 64
    while it < min(needed, max_iterations):
        idx = rng.integers(0, len(sub), size=(batch, 3))
        a, b, c = sub[idx[:, 0]], sub[idx[:, 1]], sub[idx[:, 2]]
        n = np.cross(b - a, c - a)                                    # (B, 3)
        norm = np.linalg.norm(n, axis=1)
        ok = norm > 1e-12
        n = n[ok] / norm[ok, None]
        d = np.einsum("bi,bi->b", n, a[ok])
        counts = (np.abs(sub @ n.T - d) < inlier_dist).sum(axis=0)  # (B,)
        it += batch
        if len(counts) and counts.max() > best_count:
            j = int(counts.argmax())
            best_count, best = int(counts[j]), (n[j], d[j])
            needed = ransac_iterations(confidence, best_count / len(sub))
    if best is None:
        raise ValueError("no plane hypothesis could be formed (degenerate points)")
    n, d = best
    # least-squares refit on all inliers, twice (the inlier set moves a little after the first refit)
    for _ in range(2):
        inl = np.abs(pts @ n - d) < inlier_dist
        if inl.sum() < 3:
            break
        n, d = _lstsq_plane(pts[inl])
    inl = np.abs(pts @ n - d) < inlier_dist
    if toward is not None and (np.asarray(toward) @ n - d) < 0:
        n, d = -n, -d
    resid = float(np.sqrt(np.mean((pts[inl] @ n - d) ** 2))) if inl.any() else float("nan")
    return PlaneFit(normal=n, offset=float(d), inlier_fraction=float(inl.mean()), residual_m=resid, iterations=it)


def candidate_planes(points: np.ndarray, *, inlier_dist: float, confidence: float, rng: np.random.Generator,
                     toward: np.ndarray | None = None, max_planes: int = 3, min_fraction: float = 0.05,
                     min_angle_deg: float = 20.0, same_surface_m: float = 0.10) -> list[tuple[PlaneFit, np.ndarray]]:
    """Sequential RANSAC: the dominant plane, then the dominant plane of what is left, ...

    Returns up to ``max_planes`` (plane, inlier mask over ``points``) holding at least ``min_fraction`` of
    all points each, largest first.  A plane within ``min_angle_deg`` of one already found and whose points
    lie within ``same_surface_m`` of it is that surface's noisy fringe (far points of a table fall outside
    the inlier band): its points are removed but it is not a candidate.
    """
    pts = np.asarray(points, dtype=np.float64)
    left = np.ones(len(pts), bool)
    out: list[tuple[PlaneFit, np.ndarray]] = []
    cos_min = np.cos(np.deg2rad(min_angle_deg))
    for _ in range(2 * max_planes):
        if len(out) >= max_planes or left.sum() < max(3, min_fraction * len(pts)):
            break
        try:
            plane = fit_plane(pts[left], inlier_dist=inlier_dist, confidence=confidence, rng=rng, toward=toward)
        except ValueError:
            break
        inl = left & (np.abs(plane.height(pts)) < inlier_dist)
        if inl.sum() < min_fraction * len(pts):
            break
        plane.inlier_fraction = float(inl.mean())   # of all points, not of those left
        left &= ~inl
        centre = pts[inl].mean(axis=0)
        if any(abs(plane.normal @ q.normal) > cos_min and abs(q.height(centre)) < same_surface_m for q, _ in out):
            continue
        out.append((plane, inl))
    return out
