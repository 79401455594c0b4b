"""The members of one cluster aligned to one another: yaw synchronisation of the upright members.

Conventions: see :mod:`protomine.mine.posesearch` (X (n, C, R, A, H), W (n, R, A, H); ``x_i ~= roll(x_j, yaw)``
means object i looks like object j yawed by ``yaw`` degrees).  Degrees in the public API.

Why: the pose-aware k-means aligns each member to the mean of the members as they are aligned, so a cluster whose
first alignment was wrong keeps a prototype smeared about up (a jug's thin handle averaged out), and the members'
yaws against that smear are arbitrary; a prototype rebuilt from its members aligned at their true yaws finds every
upright jug of the demo within 6 degrees (README "Pose errors").  Pairwise searches do not start from any
prototype: each pair of members (i, j) gives the relative yaw theta_ij = y_i - y_j of its best match, and the
absolute yaws y are the angles of the leading eigenvector of the Hermitian matrix H_ij = w_ij exp(i theta_ij)
(angular synchronisation, Singer 2011, "Angular synchronization by eigenvectors and semidefinite programming",
its spectral relaxation), which a minority of wrong pairs does not move.

Weights: a pair whose distance curve over yaw is flat (a view that does not show the part that breaks the symmetry)
says nothing about the yaw: w_ij = 1 - min_s D_ij(s) / median_s D_ij(s) (its best yaw's depth below the typical
yaw), symmetrised over (i, j) and (j, i).

Public API
----------
- ``pairwise_yaws(X, W, scales) -> (theta (n, n), weight (n, n))``
- ``synchronize_yaws(theta, weight) -> (yaw (n,), consistency)``
- ``without_first_harmonic(X) -> X`` (same shape): the features less their first azimuthal Fourier component
- ``member_order(theta, weight, *, max_fold, sharp, consistent) -> int``: the symmetry about up the members show
  (0 continuous, 1 none, n n-fold), or -1 when they show no preferred yaw and none is claimed

The members' own evidence of a symmetry: the significance test of ``symmetry.detect_symmetry`` compares a
prototype's change under a turn with its members' scatter, and a thin part on a body whose members vary in size and
taper changes the prototype less than that scatter (the demo jugs synchronised on their handles: T 2.47 at the worst
turn, under the factor 3.5, so read as continuous and their yaws dropped).  The pairs tell instead: on the five demo
stores the mean pair weight (above) of the upright members, first harmonic removed, is 0.033-0.069 for the round
classes (spool, funnel), 0.147-0.193 for the jugs and 0.47-0.82 for the others, so ``sharp`` = 0.1 says the members
have a preferred yaw.  The order is then the least n whose pairs agree modulo 360 / n (the consistency of n theta
at least ``consistent``): jugs, mallets, L brackets 1 (0.97-1.00), tripod stands 3, tile boxes 4 (1.00; at n = 1
0.64-0.83).

Why the first harmonic goes: an object whose grid is centred a little off its axis (the footprint circle pulled by a
few stray readings, README "Pose errors") shows its surface nearer the axis on one side and farther on the other, a
cos(azimuth) pattern in every slab: the first azimuthal harmonic.  That pattern is as large as a thin handle's
whole signal, and the members of a round class can be turned so that their offsets line up: on the default demo
seed 0 the jug's upright members aligned that way had a lower summed leave-one-out distance (0.139) than aligned
at their true yaws (0.143), so no search of the full features prefers the truth.  Without the first harmonic the
truth is the lower (0.095 each way round: found within 2 degrees for all 9).  A part such as a handle spreads over
every harmonic, and loses 1 of A / 2 of them.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

from .posesearch import pose_distances


def pairwise_yaws(X: np.ndarray, W: np.ndarray, scales: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    """Every member X (n, C, R, A, H), W (n, R, A, H) searched against every other as the prototype (yaw x scale):
    theta (n, n) degrees, x_i ~= roll(x_j, theta_ij) (diagonal 0), and the weight (n, n) in [0, 1] of each pair
    (module docstring; symmetric, diagonal 0, 0 where the pair shares no observed cell)."""
    n = len(X)
    m = pose_distances(X, W, X, W, scales=tuple(scales), return_all=True)
    curve = m.all_D.min(axis=2)                      # (n, n, A): the best scale at each shift
    fin = np.isfinite(curve).all(axis=2)
    lo = np.where(fin, curve.min(axis=2), 0.0)
    mid = np.where(fin, np.median(np.where(np.isfinite(curve), curve, 0.0), axis=2), 1.0)
    w = np.where(fin & (mid > 0), np.clip(1.0 - lo / np.maximum(mid, 1e-12), 0.0, 1.0), 0.0)
    w = 0.5 * (w + w.T)
    np.fill_diagonal(w, 0.0)
    theta = np.where(np.isfinite(m.D), m.yaw_deg, 0.0).astype(np.float64)
    np.fill_diagonal(theta, 0.0)
    return theta, w


def synchronize_yaws(theta: np.ndarray, weight: np.ndarray) -> tuple[np.ndarray, float]:
    """Absolute yaws y (n,) in [0, 360) with y_i - y_j ~= theta_ij (theta, weight (n, n); see the module docstring),
    up to one common turn (y_0 = 0), and their consistency in [0, 1]: |sum w_ij exp(i (theta_ij - y_i + y_j))| /
    sum w_ij over i != j (1 when every weighted pair agrees with y; near 0 for pairs turned at random)."""
    theta = np.asarray(theta, np.float64)
    weight = np.asarray(weight, np.float64)
    n = len(theta)
    if theta.shape != (n, n) or weight.shape != (n, n):
        raise ValueError(f"theta and weight must be (n, n), got {theta.shape} and {weight.shape}")
    H = weight * np.exp(1j * np.deg2rad(theta))
    H = 0.5 * (H + H.conj().T)                     # theta_ji ~= -theta_ij: both searches of a pair count
    np.fill_diagonal(H, 0.0)
    if n == 1 or not np.any(weight > 0):
        return np.zeros(n), 0.0
    _, vec = np.linalg.eigh(H)
    v = vec[:, -1]
    y = np.angle(v * np.conj(v[0]) / max(abs(v[0]), 1e-300)) if abs(v[0]) > 1e-12 else np.angle(v)
    y = np.mod(np.rad2deg(y), 360.0)
    r = np.deg2rad(theta - (y[:, None] - y[None, :]))
    off = ~np.eye(n, dtype=bool)
    tot = weight[off].sum()
    cons = float(abs((weight * np.exp(1j * r))[off].sum()) / tot) if tot > 0 else 0.0
    return y, cons


def without_first_harmonic(X: np.ndarray) -> np.ndarray:
    """X (n, C, R, A, H) less its first azimuthal Fourier component along axis 3 (float32, same shape)."""
    X = np.asarray(X, np.float32)
    A = X.shape[3]
    a = 2.0 * np.pi * np.arange(A) / A
    c, s = np.cos(a), np.sin(a)
    # projection onto cos and sin of the azimuth (orthogonal on the sampled ring, each with norm A / 2)
    pc = np.einsum("ncrah,a->ncrh", X, c) * (2.0 / A)
    ps = np.einsum("ncrah,a->ncrh", X, s) * (2.0 / A)
    out = X - pc[:, :, :, None, :] * c[None, None, None, :, None] - ps[:, :, :, None, :] * s[None, None, None, :, None]
    return out.astype(np.float32)


def member_order(theta: np.ndarray, weight: np.ndarray, *, max_fold: int = 8, sharp: float = 0.1,
                 consistent: float = 0.95, power: float = 4.0) -> int:
    """The symmetry order about up the members' pairs show (module docstring): theta, weight (n, n) as
    :func:`pairwise_yaws` returns them.  1 (none) or n in 2..max_fold when the mean off-diagonal weight reaches
    ``sharp`` (the least n whose n theta synchronise with consistency >= ``consistent``; 1 when none does), else -1
    (no preferred yaw: the members do not contradict a continuous symmetry).  The pairs' weights are raised to
    ``power`` in the synchronisation (the sharp pairs lead), as the engine synchronises the yaws themselves."""
    n = len(theta)
    off = ~np.eye(n, dtype=bool)
    if n < 2 or float(np.mean(weight[off])) < sharp:
        return -1
    w = np.asarray(weight, np.float64) ** power
    for order in range(1, max_fold + 1):
        if synchronize_yaws(np.mod(order * np.asarray(theta, np.float64), 360.0), w)[1] >= consistent:
            return order
    return 1
