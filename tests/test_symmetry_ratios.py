"""The azimuthal symmetry test's ratios (mine/symmetry.py module docstring) against a twin from the definition.

The twin rolls each prototype by every shift on its own: ``np.roll`` for whole bins, and for fractional shifts the
Fourier shift theorem through ``scipy.ndimage.fourier_shift`` on the full complex FFT (scipy as the reference), its
real part; then T (the largest per-slab ratio of the weighted squared change to the noise) and E (the weighted
squared change over the prototype's variance, the lowest slab left out) as the module docstring defines them.  The
module's fast path makes each rolled copy once for both ratios, with one azimuth transform for all shifts.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from protomine.mine import symmetry as sym


def _rolled(a: np.ndarray, s: float, axis: int) -> np.ndarray:
    if float(s).is_integer():
        return np.roll(a, int(s), axis=axis)
    shift = [0.0] * a.ndim  # fourier_shift takes one shift per axis (a scalar would shift along every axis)
    shift[axis] = s
    return np.fft.ifft(ndimage.fourier_shift(np.fft.fft(a, axis=axis), shift), axis=axis).real


def _twin(P, V, u, shifts):
    K, H = P.shape[0], P.shape[4]
    h0 = 1 if H > 2 else 0
    T = np.empty((K, len(shifts)))
    E = np.empty((K, len(shifts)))
    for j, s in enumerate(shifts):
        ps, us = _rolled(P, s, 3), _rolled(u, s, 3)
        vs = _rolled(V, s, 2)
        if not float(s).is_integer():
            vs = np.clip(vs, 0.0, 1.0)
        for i in range(K):
            om = V[i] * vs[i]  # (R, A, H)
            num = np.array([(om[..., h] * (P[i, ..., h] - ps[i, ..., h]) ** 2).sum() for h in range(H)])
            den = np.array([(om[..., h] * (u[i, ..., h] + np.maximum(us[i, ..., h], 0.0))).sum() for h in range(H)])
            T[i, j] = (num / np.maximum(den, 1e-30)).max()
            Vh, Ph = V[i, ..., h0:], P[i, ..., h0:]
            # each channel's weighted mean per height slab (over radius and azimuth)
            mean = (Vh * Ph).sum(axis=(1, 2)) / np.maximum(Vh.sum(axis=(0, 1)), 1e-12)  # (C, H - h0)
            var = 2.0 * (Vh * (Ph - mean[:, None, None, :]) ** 2).sum()
            E[i, j] = (om[..., h0:] * (Ph - ps[i, ..., h0:]) ** 2).sum() / max(var, 1e-30)
    return T, E


@pytest.mark.parametrize("K, noise", [(1, "scalar"), (3, "per prototype"), (2, "per cell")])
def test_ratios_equal_the_twin_and_both_ratio_functions(K, noise):
    rng = np.random.default_rng(K)
    A = 12
    P = rng.random((K, 2, 3, A, 4))
    V = rng.uniform(0.2, 1.0, (K, 3, A, 4))
    u = {"scalar": 0.01, "per prototype": rng.random((K, 1, 1, 1, 1)) * 1e-2,
         "per cell": rng.random(P.shape) * 1e-2}[noise]
    shifts = [1.0, 2.5, 3.0, 4.8, 6.0, 7.2, 11.0]
    T, E = sym._ratios(P, V, u, shifts)
    Tt, Et = _twin(P, V, np.broadcast_to(np.asarray(u, np.float64), P.shape), shifts)
    np.testing.assert_allclose(T, Tt, rtol=1e-9)
    np.testing.assert_allclose(E, Et, rtol=1e-9)
    # the public ratio functions read the same loop
    np.testing.assert_array_equal(sym.asymmetry_ratio(P, V, u, shifts), T)
    np.testing.assert_array_equal(sym.effect_ratio(P, V, shifts), E)
