"""What a single view sees as surface that its matched prototype has not seen: the charge of ``[mine] unseen_charge``.

The pose search's distance (``posesearch``) is a mean over the cells both sides observed, weighted by both weights,
so a cell the view sees as surface where the posed prototype (or its tilted copy, ``mine.tilts``) has weight 0 plays no
part, and one where it has weight 1/2 half a part.  A prototype whose members all rested on a few faces has seen
little of what a view resting on another face shows (the part of it flush with the support plane in every mined
pose, the corners a scaled-down copy leaves outside its grid), so on such a view every prototype that happens to
have seen little of it is judged on a few cells only; on the demo of seed 1, 7 of the 13 misnamed known views went to
a prototype whose posed copy had observed less of the view than their own class's (weighted overlap 0.44-0.89
against 0.83-0.99).

For view i (features X (C, R, A, H), weights W (R, A, H)) and prototype k at the pose the search found (up direction,
yaw, scale), with v the posed copy's weight (``posesearch.scale_prototypes``, the azimuth rolled by the yaw
``posesearch.shift_volume``, both as the search poses it)::

    share_ik = sum_{cells the view sees as surface} (1 - min(v, 1))  /  #(cells the view sees as surface)

(surface: surface evidence >= ``tilts.SURFACE_MIN`` where W > 0; 0 when the view sees none).  With ``[mine]
unseen_charge`` c > 0 the label decision's distance of every prototype is D_ik + c share_ik (``label.matcher``): a
prototype is charged c x the share of the view's surface it cannot vouch for (known views' decision distances on the
demo are mostly 0.01-0.05).  The score's distance (its calibration) is not charged; the best/second-best ratio of
``[mine] view_normalise_ratio`` is that of the charged decision distances (mining's calibration matches its held-out
views through the same matcher, so it sees them too).  Measured (c = 0.01, stores re-mined), accuracy / AUROC: seed 0
0.859 / 0.953 -> 0.875 / 0.948, seed 1 0.891 / 0.920 -> 0.899 / 0.932, upright 0.954 / 0.981 -> 0.962 / 0.966: off by
default (README "Score").

With ``[mine] view_normalise_unseen`` the share at each prototype also enters the label score, as its conformal p-value
among the held-out views' shares at their nearest prototype (``pipeline.view_ratio_calibration``; off by default).
"""
from __future__ import annotations

import numpy as np

from .posesearch import scale_prototypes, shift_volume
from .tilts import SURFACE_MIN, TiltBank

UP_DECIMALS = 9    # up directions equal to this many decimals share one copy


def posed_weights(V: np.ndarray, scale: np.ndarray, yaw_deg: np.ndarray) -> np.ndarray:
    """Weights V (m, R, A, H) scaled by ``scale`` (m,) (``scale_prototypes``: outside the grid 0) and rolled by
    ``yaw_deg`` (m,) along the azimuth (``shift_volume``), as the pose search poses a prototype."""
    V = np.asarray(V, np.float32)
    out = np.empty_like(V)
    scale = np.asarray(scale, np.float64)
    for s in np.unique(scale):
        rows = np.flatnonzero(scale == s)
        out[rows] = scale_prototypes(V[rows][:, None], V[rows], (float(s),))[1][:, 0]
    return shift_volume(out, np.asarray(yaw_deg, np.float64) / (360.0 / V.shape[2]), axis=2)


def unseen_shares(V: np.ndarray, bank, X: np.ndarray, W: np.ndarray, up: np.ndarray, yaw_deg: np.ndarray,
                  scale: np.ndarray, upright: np.ndarray) -> np.ndarray:
    """share (n, K) (module docstring) of views X (n, C, R, A, H), W (n, R, A, H) against prototypes of weights
    V (K, R, A, H) at the poses the search found: up (n, K, 3), raw yaw_deg and scale (n, K), upright (n, K) (the
    prototype itself; else its copy resting on ``up``, ``bank.copies_at`` of a ``tilts.TiltBank``)."""
    X, W = np.asarray(X), np.asarray(W)
    n, K = np.shape(yaw_deg)
    out = np.zeros((n, K))
    solid = (X[:, 0] >= SURFACE_MIN) & (W > 0)
    count = solid.reshape(n, -1).sum(axis=1)
    views = np.flatnonzero(count > 0)
    if not len(views):
        return out
    for k in range(K):
        vk = np.broadcast_to(np.asarray(V[k], np.float32), (len(views),) + V.shape[1:]).copy()
        tilted = views[~np.asarray(upright[views, k], bool)]
        if len(tilted) and isinstance(bank, TiltBank):
            ups = np.round(np.asarray(up[tilted, k], np.float64), UP_DECIMALS)
            uniq, inv = np.unique(ups, axis=0, return_inverse=True)
            _, vc = bank.copies_at(k, uniq)
            vk[np.searchsorted(views, tilted)] = vc[inv.reshape(-1)]
        v = posed_weights(vk, scale[views, k], yaw_deg[views, k])
        miss = (solid[views] * (1.0 - np.minimum(v, 1.0))).reshape(len(views), -1).sum(axis=1)
        out[views, k] = miss / count[views]
    return out
