"""Synthetic volumes for the benchmark and the tests (invented data, no capture behind them).

K random smooth prototypes on a (C, R, A, H) grid (default (5, 8, 36, 12), the default config's), each
object a prototype rolled by a random yaw (azimuth axis, as in :mod:`protomine.mine.posesearch`), scaled
by a random factor in [1 - scale_jitter, 1 + scale_jitter], with Gaussian noise and a random
partial-observation mask (a view sees a random half of the azimuth and a random fraction of the height).
"""
from __future__ import annotations

import numpy as np
from scipy import ndimage

from .posesearch import _resample_axis, shift_volume

GRID = (5, 8, 36, 12)  # C, R, A, H
SCALES = (0.87, 0.93, 1.0, 1.07, 1.15)  # configs/default.toml mine.scales


def synthetic_prototypes(rng: np.random.Generator, k: int, grid: tuple[int, int, int, int] = GRID) -> np.ndarray:
    """(k, C, R, A, H) random smooth prototypes (Gaussian-filtered noise, wrapped along azimuth)."""
    C, R, A, H = grid
    P = rng.normal(size=(k, C, R, A, H))
    P = ndimage.gaussian_filter(P, sigma=(0, 0, 1.0, 2.5, 1.5), mode=("nearest", "nearest", "nearest", "wrap", "nearest"))
    P /= P.std(axis=(1, 2, 3, 4), keepdims=True) + 1e-9
    return P.astype(np.float32)


def synthetic_objects(rng: np.random.Generator, P: np.ndarray, n: int, *, noise: float = 0.3,
                      scale_jitter: float = 0.1, partial: bool = True
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """n objects from prototypes P (K, C, R, A, H): X (n, C, R, A, H), W (n, R, A, H), labels (n,),
    yaw_deg (n,) (object = prototype rolled by yaw), scale (n,)."""
    K, C, R, A, H = P.shape
    labels = rng.integers(0, K, n)
    yaw = rng.uniform(0, 360, n)
    scale = rng.uniform(1 - scale_jitter, 1 + scale_jitter, n) if scale_jitter > 0 else np.ones(n)
    X = shift_volume(P[labels], yaw / (360.0 / A), axis=3)
    for i in range(n):
        if scale[i] != 1.0:
            m = np.ones((1, R, 1, H), bool)
            x = X[i:i + 1]
            x, _ = _resample_axis(x, m, scale[i], 2)
            x, _ = _resample_axis(x, m, scale[i], 4)
            X[i:i + 1] = x
    X = X.astype(np.float32, copy=False)
    X += noise * rng.standard_normal(size=X.shape, dtype=np.float32)  # float32 keeps generation memory small
    W = np.ones((n, R, A, H), np.float32)
    if partial:
        start = rng.integers(0, A, n)
        arc = (np.arange(A)[None, :] - start[:, None]) % A < A // 2  # a view sees half the azimuth
        top = rng.integers(H // 2, H + 1, n)
        tall = np.arange(H)[None, :] < top[:, None]
        W = (arc[:, None, :, None] & tall[:, None, None, :]).astype(np.float32) * W
    return X, W, labels, yaw, scale
