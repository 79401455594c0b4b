"""Per-cell reliability of single views: prototype weights for single-view matching that discount the cells
where single views of a prototype's own members disagree with it.

A single view is partial, and what a sensor does (projector shadows and dropped readings beside depth
edges, flying pixels, disparity steps, occlusion by neighbours) corrupts some parts of the grid far more
than others: the rim and the free space beside the silhouette more than the top.  Those residuals are
the same for known and never-seen objects, so in a plain observation-weighted mean they bury the shape
difference that tells an unknown object from a known one.  A heteroscedastic per-cell model fixes the
weights: with s2_k(r, h) the squared residual (mean over channels) of prototype k's own single views,
aligned by their best pose against the prototype rebuilt without their object (the leave-one-out views
of the calibration, ``pipeline.single_view_distances``), averaged over those views and over azimuth
(a view's yaw is arbitrary, so azimuth carries no sensor pattern), each cell's weight is scaled by

    lambda_k(r, h) = 1 / (s2_k(r, h) + floor * median s2_k),   normalised to mean 1 over observed cells

(inverse-variance weighting; the floor, a quarter of the prototype's median spread, keeps a few very
steady cells from taking over).  Single-view matching then uses V_k lambda_k in place of V_k: still one
weight per cell, so the FFT pose search is unchanged, and the calibration of the single-view score uses
the same weights.  Cells no single view observed keep lambda = 1.

Shapes: residual sums (K, R, H); reliability (K, R, H); prototype weights V (K, R, A, H).
"""
from __future__ import annotations

import numpy as np

FLOOR = 0.25           # x the prototype's median per-cell spread, added to every cell's spread


def residual_sums(x: np.ndarray, w: np.ndarray, p: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted squared residuals of aligned single views: x (n, C, R, A, H), w (n, R, A, H) in the
    prototype's frame, p (C, R, A, H), v (R, A, H).  Returns (num, den) (R, H): sum over views and azimuth of
    w v mean_c (x_c - p_c)^2, and of w v."""
    omega = np.asarray(w, np.float64) * np.asarray(v, np.float64)[None]
    e = ((np.asarray(x, np.float64) - np.asarray(p, np.float64)[None]) ** 2).mean(axis=1)
    return (omega * e).sum(axis=(0, 2)), omega.sum(axis=(0, 2))


def cell_reliability(num: np.ndarray, den: np.ndarray, *, floor: float = FLOOR, min_weight: float = 1e-3) -> np.ndarray:
    """(K, R, H) reliability lambda from residual sums num, den (K, R, H) (see the module docstring)."""
    num, den = np.asarray(num, np.float64), np.asarray(den, np.float64)
    if num.shape != den.shape or num.ndim != 3:
        raise ValueError(f"expected num and den of one shape (K, R, H), got {num.shape} and {den.shape}")
    lam = np.ones(num.shape)
    for k in range(num.shape[0]):
        ok = den[k] > min_weight
        if not ok.any():
            continue
        s2 = num[k][ok] / den[k][ok]
        lk = 1.0 / (s2 + floor * np.median(s2) + 1e-12)
        lam[k][ok] = lk / lk.mean()
    return lam


def single_view_weights(V: np.ndarray, reliability: np.ndarray | None) -> np.ndarray:
    """Prototype weights V (K, R, A, H) scaled by the reliability (K, R, H) along every azimuth (V when None)."""
    V = np.asarray(V, np.float32)
    if reliability is None:
        return V
    lam = np.asarray(reliability, np.float32)
    if lam.shape != (V.shape[0], V.shape[1], V.shape[3]):
        raise ValueError(f"expected a reliability of shape {(V.shape[0], V.shape[1], V.shape[3])}, got {lam.shape}")
    return V * lam[:, :, None, :]
