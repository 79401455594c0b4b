"""A finer pose search for the few prototypes nearest a single view, before the decision.

The label search (``label.matcher``) finds each view's pose against every prototype on a discrete set:
the library's scales (about 7% apart) and, with tilts, the HEALPix up-direction grid (refined only for each
view's ``refine_top`` best (prototype, coarse tilt) pairs overall) besides the prototypes' exact resting
directions.  A prototype that is not among those few pairs keeps a coarse tilt (up to about 30 degrees off),
and every prototype keeps a scale up to half a step off; the distance grows fast with both errors (README,
"Why tumbled classes split by face": 3 / 6 / 10 degrees off the true tilt raise a pair's distance by about 2 /
9 / 22%), while the misnamed views are near misses (the true class second or third, 5-30% farther).  So
the ranking of the nearest few prototypes partly measures how close the grid happened to fall to each one's
best pose.  This step gives each of a view's ``top`` nearest prototypes the same finer search:

- scales: the library's scales with their geometric midpoints inserted (:func:`fine_scales`);
- tilts (pairs matched on another face than the canonical one): a pattern search on the sphere (compass
  search; Kolda, Lewis & Torczon, "Optimization by direct search", SIAM Review 2003, sec. 3): from the pair's
  up direction, the ``ring`` directions at ``step`` degrees around it are tried (copies resampled with
  ``TiltBank.copies_at``, searched over all yaws by the FFT search and over the fine scales within one fine
  step of the pair's scale); the best of them and the current one becomes the centre, and the step halves
  (``steps``: 6, 3, 1.5 degrees; a view's pairs are searched together, one bank of copies per step).
  Only prototypes within ``within`` (1.5) x the view's nearest distance are refined: the misnamed views are
  near misses, and a prototype twice as far does not come back.  Directions within
  ``UPRIGHT_GUARD_DEG`` of +z are left out (the canonical face is the prototype itself, which the search has).
  Pairs matched on the canonical face keep it (refining its scale only): an upright object is matched by the
  prototype itself, exactly, and a slightly tilted resampled copy would be scored by the other faces'
  calibration.

A pair's pose changes only where its distance goes down, so the result is never worse than the grid's.  The
decision (nearest prototype) and the score then use the refined distances and poses.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import rotations as rot
from .posesearch import PoseBank
from .tilts import IDENTITY_DEG, TiltBank

UPRIGHT_GUARD_DEG = 3.0 * IDENTITY_DEG


def fine_scales(scales) -> tuple[float, ...]:
    """The scales (sorted) with the geometric mean of each neighbouring pair inserted."""
    s = np.sort(np.asarray(scales, np.float64))
    mids = np.sqrt(s[1:] * s[:-1])
    return tuple(float(v) for v in np.sort(np.concatenate([s, mids])))


def ring_directions(up: np.ndarray, step_deg: float, n: int) -> np.ndarray:
    """n unit directions (n, 3) at ``step_deg`` from unit ``up`` (3,), evenly spaced around it."""
    u = np.asarray(up, np.float64)
    u = u / np.linalg.norm(u)
    a = np.array([1.0, 0.0, 0.0]) if abs(u[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = np.cross(u, a)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(u, e1)
    t = np.deg2rad(step_deg)
    phi = 2 * np.pi * np.arange(n) / n
    d = np.cos(t) * u[None] + np.sin(t) * (np.cos(phi)[:, None] * e1[None] + np.sin(phi)[:, None] * e2[None])
    return d / np.linalg.norm(d, axis=1, keepdims=True)


@dataclass
class PoseRefiner:
    """The finer search of the module docstring over prototypes P (K, C, R, A, H), V (K, R, A, H) (the
    matcher's) and, with tilts, their TiltBank."""

    P: np.ndarray
    V: np.ndarray
    scales: tuple[float, ...]
    bank: TiltBank | None = None
    top: int = 4
    steps: tuple[float, ...] = (6.0, 3.0, 1.5)
    ring: int = 6
    within: float = 1.5

    def __post_init__(self) -> None:
        self.fine = fine_scales(self.scales)
        self.upright_bank = PoseBank(np.asarray(self.P, np.float32), np.asarray(self.V, np.float32), self.fine)

    def _search(self, x: np.ndarray, w: np.ndarray, Pc: np.ndarray, Vc: np.ndarray, scales: tuple[float, ...]):
        """One view x (1, C, R, A, H), w (1, R, A, H) against copies Pc, Vc: distances, yaws, scales (M,)."""
        m = PoseBank(Pc, Vc, scales).match(x, w)
        return (np.where(np.isfinite(m.D[0]), m.D[0], np.inf).astype(np.float64), m.yaw_deg[0].astype(np.float64),
                m.scale[0].astype(np.float64))

    def near_scales(self, current) -> tuple[float, ...]:
        """The fine scales within one fine step of any of the ``current`` scales (a tilt step moves the best
        scale little; searching all of them would cost three times as much)."""
        f = np.asarray(self.fine)
        idx = {int(np.argmin(np.abs(f - s))) for s in np.atleast_1d(current)}
        keep = sorted({j + d for j in idx for d in (-1, 0, 1) if 0 <= j + d < len(f)})
        return tuple(float(f[j]) for j in keep)

    def improve(self, X: np.ndarray, W: np.ndarray, D: np.ndarray, yaw: np.ndarray, scale: np.ndarray,
                up: np.ndarray, upright: np.ndarray) -> None:
        """In place, for views X (n, C, R, A, H), W (n, R, A, H) and their poses D, yaw, scale (n, K), up
        (n, K, 3), upright (n, K): each view's ``top`` nearest prototypes (those within ``within`` x its nearest
        distance) get the finer search; a pair takes the refined pose where its distance is lower."""
        n, K = D.shape
        if n == 0 or K == 0:
            return
        X, W = np.asarray(X, np.float32), np.asarray(W, np.float32)
        Df = np.where(np.isfinite(D), D, np.inf)
        top = np.argsort(Df, axis=1, kind="stable")[:, :min(self.top, K)]
        near = Df[np.arange(n)[:, None], top] <= self.within * Df[np.arange(n), top[:, 0]][:, None]
        # canonical-face pairs: the prototypes themselves over the fine scales, all views at once
        mu = self.upright_bank.match(X, W)
        for i in range(n):
            tilted = []
            for k in top[i][near[i]]:
                k = int(k)
                if not np.isfinite(Df[i, k]):
                    continue
                if upright[i, k] or self.bank is None:
                    d = float(mu.D[i, k]) if np.isfinite(mu.D[i, k]) else np.inf
                    if d < D[i, k]:
                        D[i, k], yaw[i, k], scale[i, k] = d, float(mu.yaw_deg[i, k]), float(mu.scale[i, k])
                else:
                    tilted.append(k)
            if tilted:
                self._refine_tilts(X[i:i + 1], W[i:i + 1], i, tilted, D, yaw, scale, up)

    def _refine_tilts(self, x, w, i: int, ks: list[int], D, yaw, scale, up) -> None:
        """The pattern search of view i's tilted pairs with prototypes ``ks``, all pairs' copies of a round
        searched together."""
        cos_guard = np.cos(np.deg2rad(UPRIGHT_GUARD_DEG))
        centre = {k: np.asarray(up[i, k], np.float64) for k in ks}
        for r, step in enumerate(self.steps):
            # the first round also takes the current directions (the grid searched them at one scale)
            dirs = {k: ring_directions(centre[k], step, self.ring) for k in ks}
            if r == 0:
                dirs = {k: np.concatenate([centre[k][None], d]) for k, d in dirs.items()}
            dirs = {k: d[d[:, 2] < cos_guard] for k, d in dirs.items()}
            owner = np.concatenate([np.full(len(d), k) for k, d in dirs.items()])
            if not len(owner):
                continue
            cop = [self.bank.copies_at(k, d) for k, d in dirs.items() if len(d)]
            Pc = np.concatenate([c[0] for c in cop])
            Vc = np.concatenate([c[1] for c in cop])
            allu = np.concatenate([d for d in dirs.values() if len(d)])
            d, yw, sc = self._search(x, w, Pc, Vc, self.near_scales([scale[i, k] for k in ks]))
            for k in ks:
                cols = np.flatnonzero(owner == k)
                if not len(cols):
                    continue
                j = cols[int(np.argmin(d[cols]))]
                if d[j] < D[i, k]:
                    D[i, k], yaw[i, k], scale[i, k] = d[j], yw[j], sc[j]
                    up[i, k] = allu[j]
                    centre[k] = allu[j]
