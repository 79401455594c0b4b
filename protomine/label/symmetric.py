"""The symmetric class decision of single-view labelling (``[mine] label_symmetric``).

The label search is one-way: the view is the object and each prototype the side that is resampled (tilted,
scaled copies), while the view is gridded about its own visible footprint, so the distance the other way round
differs (by 10-50 % on tipped views).  For each view's ``top`` nearest prototypes (by the decision distance,
those within ``ratio`` x its nearest) this module also searches the other way: the view's features as the
prototype (tilts x yaw x scale, the view's grid aspect), the prototype's as the object; one search per view,
whose objects are its shortlisted prototypes, so every (view, prototype) pair gets the full tilt refinement
(``mine.tilts``: the refinement starts from each object's own best coarse tilts).  The class is the shortlisted
prototype with the least mean of the two directions (as find's ``[mine] find_symmetric`` ranks its shortlist:
``curate.oneshot.ranking_key``); pose and score stay the one-way search's.
"""
from __future__ import annotations

import numpy as np

from ..mine.tilts import TiltGrid, tilt_pose_distances

RATIO = 1.5   # the shortlist: prototypes within this multiple of the view's nearest distance (<= 0: no limit)


def shortlist(D: np.ndarray, top: int, ratio: float) -> np.ndarray:
    """Boolean (n, K): each row's ``top`` nearest finite distances (ties by prototype index) within ``ratio`` x
    the row's nearest (ratio <= 0: no such limit)."""
    D = np.asarray(D, np.float64)
    n, K = D.shape
    fin = np.isfinite(D)
    Dm = np.where(fin, D, np.inf)
    order = np.argsort(Dm, axis=1, kind="stable")[:, :max(0, int(top))]
    sel = np.zeros((n, K), bool)
    np.put_along_axis(sel, order, True, axis=1)
    sel &= fin
    if ratio > 0 and n:
        near = Dm.min(axis=1, keepdims=True)
        sel &= Dm <= ratio * near
    return sel


def reverse_distances(X: np.ndarray, W: np.ndarray, view_aspect: np.ndarray, P: np.ndarray, V: np.ndarray,
                      sel: np.ndarray, scales: tuple[float, ...], grid: TiltGrid | None) -> np.ndarray:
    """(n, K) distances of the prototypes P (K, C, R, A, H), V (K, R, A, H) as objects to each view X (n, C, R, A, H),
    W (n, R, A, H) (grid aspects ``view_aspect`` (n,)) as the prototype, over tilts x yaw x scale, for the pairs of
    ``sel`` (n, K); NaN elsewhere."""
    n, K = sel.shape
    out = np.full((n, K), np.nan)
    asp = np.asarray(view_aspect, np.float64)
    for i in np.flatnonzero(sel.any(axis=1)):
        ks = np.flatnonzero(sel[i])
        out[i, ks] = tilt_pose_distances(P[ks], V[ks], X[i:i + 1], W[i:i + 1], aspect=asp[i:i + 1], scales=scales,
                                         grid=grid).D[:, 0]
    return out


def symmetric_best(D: np.ndarray, rev: np.ndarray) -> np.ndarray:
    """(n,) class of each view: among the prototypes with a reverse distance the one with the least mean of the two
    directions (ties by index); a view with none keeps its nearest by D; -1 when no distance is finite."""
    D = np.asarray(D, np.float64)
    rev = np.asarray(rev, np.float64)
    has = np.isfinite(rev) & np.isfinite(D)
    key = np.where(has, 0.5 * (D + np.where(has, rev, 0.0)), np.inf)
    best = np.where(has.any(axis=1), np.argmin(key, axis=1), np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1))
    return np.where(np.isfinite(D).any(axis=1), best, -1)
