"""Per-cell reliability of single views: cell weights for scoring a single-view match that discount the
cells where single views of a prototype's own members disagree with it.

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
steady cells from taking over).  Cells no single view observed keep lambda = 1.

The pose is found as before (the FFT search with the plain weights: concentrating the weight on a few
cells would let the minimum over poses fit a never-seen object there); at that pose the single view's
distance is re-weighted, ``reliable_distances``:

    D_rel = sum w v lambda mean_c (x_c - mu_c)^2 / sum w v lambda        (lambda = 1: the plain distance)

and both the calibration of the single-view score (the leave-one-out views) and the matcher score this
distance.

Shapes: residual sums (K, R, H); reliability (K, R, H); prototypes P (K, C, R, A, H), weights V (K, R, A, H).
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


def reliable_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, reliability: np.ndarray | None,
                       yaw_deg: np.ndarray, scale: np.ndarray, *, min_overlap: float = 1e-3,
                       tolerant: bool = False, rings: int | tuple[int, float] | None = None,
                       mass: float = 0.0) -> np.ndarray:
    """(n, K) re-weighted distances of single views X (n, C, R, A, H), W (n, R, A, H) to prototypes
    P (K, C, R, A, H), V (K, R, A, H) at their best poses yaw_deg, scale (n, K) (the pose search's, object ~=
    prototype rolled by yaw and scaled); inf where the view and the prototype share too little weight.
    reliability (K, R, H) or None (= 1: the plain distance at that pose).  ``tolerant``: per-cell residuals
    of ``viewdistance.tolerant_residuals`` instead of the squared ones; ``rings``: radial bins left out or down-weighted (None: none;
    ``viewdistance.ring_weights``); ``mass``: the surface-mass weight (``viewdistance.mass_factor``; 0 = off)."""
    from .engine import align_to_prototype
    from .viewdistance import mass_factor, residuals, ring_weights, weighted_mean
    X, W = np.asarray(X, np.float32), np.asarray(W, np.float32)
    n, K = X.shape[0], P.shape[0]
    out = np.full((n, K), np.inf)
    if n == 0:
        return out
    lam = np.ones((K, P.shape[2], P.shape[4])) if reliability is None else np.asarray(reliability, np.float64)
    for k in range(K):
        ok = np.isfinite(yaw_deg[:, k]) & np.isfinite(scale[:, k])
        if not ok.any():
            continue
        xa, wa = align_to_prototype(X[ok], W[ok], yaw_deg[ok, k], scale[ok, k])
        omega = ring_weights(wa.astype(np.float64) * V[k][None] * lam[k][None, :, None, :], rings)
        out[ok, k] = (weighted_mean(residuals(xa, P[k][None], tolerant), omega, min_overlap)
                      * mass_factor(xa, wa, P[k][None], V[k][None], mass))
    return out
