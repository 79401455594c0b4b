"""Rotational symmetry of prototypes about the azimuth (up) axis, and the canonical yaw rule.

Conventions: prototypes P (K, C, R, A, H), weights V (K, R, A, H), azimuth axis 3 of P (2 of V);
``roll`` as in :mod:`protomine.mine.posesearch`; degrees in the public API.

Detection (azimuthal power spectrum)
------------------------------------
Each azimuthal ring (c, r, h) of a prototype is first completed where it was rarely observed:
``f = V P + (1 - V) m`` with m the V-weighted mean of that ring (so unknown cells carry no azimuthal
structure), and the ring is weighted by its mean observation ``sqrt(mean_a V)``.  With ``F_k`` the rfft
along azimuth, the harmonic energies are ``p_k = c_k sum_rings |F_k|^2`` (c_k = 2 for 0 < k < A/2,
1 otherwise, so that sum_k p_k is Parseval's total).

- ``continuous`` (code 0) when the azimuthal energy sum_{k >= 1} p_k is below ``tol`` x the total
  variance energy of the prototype around its per-channel mean (structure along R and H counts,
  structure along azimuth does not exist);
- otherwise ``n-fold`` (code n in 2..max_fold) for the largest n whose *incompatible* harmonics
  (k >= 1 not divisible by n) carry less than ``tol`` of the azimuthal energy.  Rolling by 360/n
  degrees multiplies F_k by exp(-2 pi i k / n), which is 1 exactly for k divisible by n, so this also
  works when n does not divide A (the roll is then sub-bin);
- otherwise ``none`` (code 1).

Canonical yaw rule
------------------
Period = 360 / n degrees (360 for none; continuous has no period and yaw is reported as 0).  For
n-fold (including n = 1) take the lowest harmonic k compatible with the symmetry (k a multiple of n)
whose energy is at least 5 % of the strongest compatible harmonic, take the ring with the largest
|F_k| at that harmonic, and roll the prototype by -t bins with t = (-phase(F_k) A / (2 pi k)) mod (A / k),
which makes that phase zero.  Since object ~= roll(P, y) = roll(roll(P, -t), y + t), members' yaws
are then reported as ``(yaw + t * 360 / A) mod period``.

Public API
----------
- ``detect_symmetry(P, V, *, tol=0.12, max_fold=8) -> np.ndarray`` (K,) int codes (0 continuous, 1 none, n)
- ``canonical_shift_bins(P, V, symmetry) -> np.ndarray`` (K,) float roll t (bins) per prototype
- ``period_deg(symmetry) -> np.ndarray`` (K,) float (0 for continuous)
- ``wrap_yaw(yaw_deg, symmetry) -> np.ndarray`` yaw (N, K) or (N,) reduced modulo each prototype's period
"""
from __future__ import annotations

import numpy as np

CONTINUOUS = 0
NONE = 1


def _ring_spectra(P: np.ndarray, V: np.ndarray) -> np.ndarray:
    """Completed, weighted ring spectra (K, C, R, F, H) complex for P (K, C, R, A, H), V (K, R, A, H)."""
    Vb = V[:, None].astype(np.float64)
    P = P.astype(np.float64)
    ring_w = Vb.sum(axis=3, keepdims=True)
    m = (Vb * P).sum(axis=3, keepdims=True) / np.maximum(ring_w, 1e-9)
    f = Vb * P + (1.0 - Vb) * m
    f = f * np.sqrt(Vb.mean(axis=3, keepdims=True))
    return np.fft.rfft(f, axis=3)


def _harmonic_energy(F: np.ndarray, A: int) -> np.ndarray:
    """(K, C, R, Fk, H) spectra -> (K, Fk) energies with Parseval weights."""
    c = np.full(F.shape[3], 2.0)
    c[0] = 1.0
    if A % 2 == 0:
        c[-1] = 1.0
    return (np.abs(F) ** 2).sum(axis=(1, 2, 4)) * c[None, :] / A


def detect_symmetry(P: np.ndarray, V: np.ndarray, *, tol: float = 0.12, max_fold: int = 8) -> np.ndarray:
    """Symmetry code per prototype: 0 continuous, 1 none, n >= 2 n-fold.  P (K, C, R, A, H), V (K, R, A, H)."""
    P = np.asarray(P)
    V = np.asarray(V)
    if P.ndim != 5 or V.shape != P.shape[:1] + P.shape[2:]:
        raise ValueError(f"P must be (K, C, R, A, H) and V (K, R, A, H), got {P.shape} and {V.shape}")
    if not 0.0 <= tol <= 1.0:
        raise ValueError(f"tol must be in [0, 1], got {tol}")
    A = P.shape[3]
    F = _ring_spectra(P, V)
    p = _harmonic_energy(F, A)  # (K, Fk)
    # total variance energy around the per-channel mean (the DC of every ring minus the channel mean)
    dc = F[:, :, :, 0, :].real / A  # ring means (K, C, R, H)
    chan_mean = dc.mean(axis=(2, 3), keepdims=True)
    radial_energy = A * ((dc - chan_mean) ** 2).sum(axis=(1, 2, 3))
    az = p[:, 1:].sum(axis=1)
    out = np.full(P.shape[0], NONE, dtype=np.int64)
    k = np.arange(p.shape[1])
    for i in range(P.shape[0]):
        total = az[i] + radial_energy[i]
        if total <= 0 or az[i] <= tol * total:
            out[i] = CONTINUOUS
            continue
        for n in range(max_fold, 1, -1):
            bad = p[i, (k >= 1) & (k % n != 0)].sum()
            if bad < tol * az[i]:
                out[i] = n
                break
    return out


def period_deg(symmetry: np.ndarray) -> np.ndarray:
    """Symmetry period in degrees per prototype (0 for continuous, 360 for none)."""
    s = np.asarray(symmetry)
    return np.where(s == CONTINUOUS, 0.0, 360.0 / np.maximum(s, 1))


def canonical_shift_bins(P: np.ndarray, V: np.ndarray, symmetry: np.ndarray) -> np.ndarray:
    """Roll t (bins) per prototype that makes its lowest strong compatible harmonic's phase zero.

    Rolling prototype k by -t[k] gives its canonical frame (see the module docstring); 0 for continuous.
    """
    P = np.asarray(P)
    A = P.shape[3]
    F = _ring_spectra(P, np.asarray(V))
    p = _harmonic_energy(F, A)
    t = np.zeros(P.shape[0])
    k_all = np.arange(p.shape[1])
    for i, n in enumerate(np.asarray(symmetry)):
        if n == CONTINUOUS:
            continue
        compatible = (k_all >= 1) & (k_all % n == 0)
        if not compatible.any() or p[i, compatible].max() <= 0:
            continue
        strong = compatible & (p[i] >= 0.05 * p[i, compatible].max())
        k = int(k_all[strong][0])
        ring = np.abs(F[i, :, :, k, :])
        c, r, h = np.unravel_index(np.argmax(ring), ring.shape)
        # roll(P, -t) multiplies F_k by exp(+2 pi i k t / A): phase zero at t = -phase A / (2 pi k)
        phase = np.angle(F[i, c, r, k, h])
        t[i] = np.mod(-phase * A / (2 * np.pi * k), A / k)
    return t


def wrap_yaw(yaw_deg: np.ndarray, symmetry: np.ndarray) -> np.ndarray:
    """Reduce yaws modulo each prototype's period: yaw (N, K) with symmetry (K,), or (N,) with (N,)."""
    per = period_deg(symmetry)
    yaw = np.asarray(yaw_deg, dtype=np.float64)
    safe = np.where(per > 0, per, 360.0)
    return np.where(per > 0, np.mod(yaw, safe), 0.0).astype(np.float32)
