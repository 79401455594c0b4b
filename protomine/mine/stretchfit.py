"""The stretch between the scales: a continuous scale for the stretch p-value of ``[mine] view_normalise_stretch``.

The pose search tries the few scales of ``[mine] scales`` (0.87 ... 1.15 by default) and keeps the best, so the
stretch |ln sigma| the label score judges (``openset.scale_stretch``) takes one of three values, and the held-out
views that set its p-values sit on the same few: a view of another shape that would take sigma 1.3 and a known view
that would take 1.16 both read 1.15 (|ln 1.15| = 0.14), tied.  With ``[mine] stretch_refine`` the matcher (and so
mining's held-out calibration, which matches through it) also reads the distance at the found pose one scale step
below and above the found scale, h = ln(largest / smallest scale) / (number of scales - 1), and takes the vertex of
the parabola through the three points in ln sigma (three-point quadratic peak interpolation, as for sub-pixel peaks:
delta = h (d_- - d_+) / (2 (d_- - 2 d_0 + d_+)), kept within one step, |delta| <= h; a curve without a minimum
(d_- - 2 d_0 + d_+ <= 0) moves a whole step toward the lower side).  The three distances are the plain weighted
pose search's own distance (``posesearch.pose_distances``: the prototype, or its copy resting on the matched face,
scaled; the least over yaw) at the three scales.  Only each view's nearest prototypes are refined (within ``WITHIN`` x its least
decision distance, at most ``TOP``); the others keep the search's scale.  The pose, the decision and the scale
reported in the record do not change.
"""
from __future__ import annotations

import numpy as np

from .posesearch import pose_distances

__all__ = ["scale_step", "vertex_offset", "refined_scales", "WITHIN", "TOP"]

WITHIN = 2.0   # prototypes within this x a view's least decision distance are refined ...
TOP = 4        # ... at most this many per view


def scale_step(scales) -> float:
    """h = ln(max / min) / (len - 1) of the search's scales (0 for one scale: nothing to refine)."""
    s = np.asarray(scales, np.float64)
    return float(np.log(s.max() / s.min()) / (len(s) - 1)) if len(s) > 1 else 0.0


def vertex_offset(dm, d0, dp, h: float) -> np.ndarray:
    """Offset (in ln scale) of the minimum of the parabola through (-h, dm), (0, d0), (h, dp), within [-h, h]; a
    curve without a minimum moves a whole step toward the lower of dm, dp (0 where they are equal)."""
    dm, d0, dp = (np.asarray(a, np.float64) for a in (dm, d0, dp))
    curv = dm - 2.0 * d0 + dp
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = np.where(curv > 0, h * (dm - dp) / (2.0 * np.where(curv > 0, curv, 1.0)), h * np.sign(dm - dp))
    return np.clip(delta, -h, h)


def _scale_curves(X, W, P1, V1, s0: np.ndarray, h: float) -> np.ndarray:
    """(n, 3) the search's distance (least over the yaw shifts) of views X, W against one prototype (copy) P1 (1, C,
    R, A, H), V1 (1, R, A, H) at s0 e^-h, s0, s0 e^h (n,)."""
    want = s0[:, None] * np.exp(np.array([-h, 0.0, h]))[None, :]
    ext = np.unique(np.round(want, 9))
    pm = pose_distances(X, W, P1, V1, scales=tuple(float(x) for x in ext), return_all=True)
    curve = np.asarray(pm.all_D, np.float64)[:, 0].min(axis=2)         # (n, S): the least over yaw at each scale
    return curve[np.arange(len(s0))[:, None], np.searchsorted(ext, np.round(want, 9))]


def refined_scales(P: np.ndarray, V: np.ndarray, bank, X: np.ndarray, W: np.ndarray, D: np.ndarray, up: np.ndarray,
                   fit_scale: np.ndarray, upright: np.ndarray, scales) -> np.ndarray:
    """(n, K) scales: the search's ``fit_scale`` (n, K), refined (module docstring) for each view's nearest
    prototypes by the decision distances D (n, K).  P (K, C, R, A, H), V (K, R, A, H) the prototypes, ``bank`` the
    search's tilt bank (its ``copies_at`` gives the copies resting on other faces; None or a bank without it: every
    match is on the canonical face), X (n, C, R, A, H), W (n, R, A, H) the views, up (n, K, 3) and upright (n, K) the
    search's poses.  The three distances are the pose search's own (``posesearch.pose_distances``, the least over yaw)
    at the three scales, against the prototype or its copy resting on the matched face."""
    out = np.array(fit_scale, np.float64, copy=True)
    h = scale_step(scales)
    n, K = D.shape
    if h == 0.0 or n == 0:
        return out
    Df = np.where(np.isfinite(D), D, np.inf)
    least = Df.min(axis=1, keepdims=True)
    rank = np.argsort(np.argsort(Df, axis=1, kind="stable"), axis=1, kind="stable")
    pick = np.isfinite(Df) & (Df <= WITHIN * least) & (rank < TOP) & np.isfinite(out) & (out > 0)
    tilted_bank = hasattr(bank, "copies_at")
    for k in np.flatnonzero(pick.any(axis=0)):
        rows = np.flatnonzero(pick[:, k])
        other = ~np.asarray(upright[rows, k], bool) if tilted_bank else np.zeros(len(rows), bool)
        d = np.full((len(rows), 3), np.nan)
        if (~other).any():
            r = rows[~other]
            d[~other] = _scale_curves(X[r], W[r], P[k:k + 1], V[k:k + 1], out[r, k], h)
        if other.any():   # matches on another face: against the copy resting on it, one copy per direction
            ro = rows[other]
            dirs, inv = np.unique(np.round(np.asarray(up[ro, k], np.float64), 9), axis=0, return_inverse=True)
            Pc, Vc = bank.copies_at(int(k), dirs)
            inv = np.asarray(inv).reshape(-1)
            idx = np.flatnonzero(other)
            for m in range(len(dirs)):
                sel = inv == m
                r = ro[sel]
                d[idx[sel]] = _scale_curves(X[r], W[r], Pc[m:m + 1], Vc[m:m + 1], out[r, k], h)
        ok = np.isfinite(d).all(axis=1)
        delta = np.where(ok, vertex_offset(*(np.where(ok, d[:, c], 0.0) for c in range(3)), h), 0.0)
        out[rows, k] = out[rows, k] * np.exp(delta)
    return out
