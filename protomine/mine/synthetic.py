"""Synthetic volumes for the benchmark and the tests (invented data, no capture behind them).

K random smooth prototypes on a (C, R, A, H) grid (default (5, 8, 36, 12), the default config's), each
object a prototype rolled by a random yaw (azimuth axis, as in :mod:`protomine.mine.posesearch`), scaled
by a random factor in [1 - scale_jitter, 1 + scale_jitter], with Gaussian noise and a random
partial-observation mask (a view sees a random half of the azimuth and a random fraction of the height).

Speed: the random numbers are drawn on the calling thread in a fixed order (labels, yaws, scales, noise,
view arcs, view heights), then the objects are posed block by block on a pool of threads (one per usable
core; numpy releases the GIL in its gathers and arithmetic).  Posing is the roll of
:func:`posesearch.shift_volume` followed by the radial and height resampling of ``posesearch._resample_axis``,
every object's own indices and weights gathered at once along rows of a flat view instead of one object at
a time: the same operations on the same values, so the same volumes to the bit (``tests/test_bench_data.py``
checks it against the two functions).  Measured (2 cores at load 5.5, median of 5 calls of 1,000 objects): 0.51 ->
0.29 CPU seconds; the ``large`` bench row's 20,000 objects written in 59 s wall / ~25 s CPU before, 16 s / 10 s now
(loads 6-10), and the mining row's 1,000-object subprocess peaked at 1,595 MB in the old posing's index arrays
(1,056 MB now, its fit's).
"""
from __future__ import annotations

import functools
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import ndimage

GRID = (5, 8, 36, 12)  # C, R, A, H
SCALES = (0.87, 0.93, 1.0, 1.07, 1.15)  # configs/default.toml mine.scales
POSE_BLOCK = 128  # objects posed at once by one thread


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
    P = np.asarray(P, np.float32)
    K, C, R, A, H = P.shape
    labels = rng.integers(0, K, n)
    yaw = rng.uniform(0, 360, n)
    scale = rng.uniform(1 - scale_jitter, 1 + scale_jitter, n) if scale_jitter > 0 else np.ones(n)
    X = noise * rng.standard_normal(size=(n, C, R, A, H), dtype=np.float32)  # float32 keeps generation memory small
    W = np.ones((n, R, A, H), np.float32)
    if partial:
        start = rng.integers(0, A, n)
        arc = (np.arange(A)[None, :] - start[:, None]) % A < A // 2  # a view sees half the azimuth
        top = rng.integers(H // 2, H + 1, n)
        tall = np.arange(H)[None, :] < top[:, None]
        W = (arc[:, None, :, None] & tall[:, None, None, :]).astype(np.float32) * W
    Pa = np.ascontiguousarray(P.transpose(0, 3, 1, 2, 4)).reshape(K * A, C * R * H)  # rows: (prototype, azimuth)

    def pose(i0: int, i1: int) -> None:
        # the noise already sits in X: X = posed + noise, as posed += noise adds the same two numbers
        X[i0:i1] = _posed(Pa, (K, C, R, A, H), labels[i0:i1], yaw[i0:i1], scale[i0:i1]) + X[i0:i1]

    blocks = [(i0, min(n, i0 + POSE_BLOCK)) for i0 in range(0, n, POSE_BLOCK)]
    if len(blocks) > 1:
        list(_pool().map(lambda b: pose(*b), blocks))
    else:
        for b in blocks:
            pose(*b)
    return X, W, labels, yaw, scale


def _posed(Pa: np.ndarray, shape: tuple[int, int, int, int, int], labels: np.ndarray, yaw: np.ndarray,
           scale: np.ndarray) -> np.ndarray:
    """(n, C, R, A, H) prototypes ``Pa`` ((K A, C R H) rows) rolled by ``yaw`` degrees along azimuth, then each
    resampled by its ``scale`` along the radius and then the height: the arithmetic of
    ``posesearch.shift_volume`` and ``posesearch._resample_axis``, with every object's rows gathered at once."""
    K, C, R, A, H = shape
    n = len(labels)
    # roll: out[j] = (1 - t) a[j - f] + t a[j - f - 1], f = floor(shift), t = shift - f (shift_volume)
    shift = yaw / (360.0 / A)
    f = np.floor(shift)
    t = (shift - f).astype(np.float32)[:, None]
    src0 = (np.arange(A)[None, :] - f.astype(np.int64)[:, None]) % A
    src1 = (src0 - 1) % A
    base = labels[:, None] * A
    x = (Pa[(base + src0).ravel()].reshape(n, -1) * (1 - t) + Pa[(base + src1).ravel()].reshape(n, -1) * t)
    # radius, then height: out(i) = (1 - t) a(lo) + t a(hi) at pos = (i + 0.5) / scale - 0.5 (_resample_axis)
    x = x.reshape(n, A, C, R, H).transpose(0, 3, 1, 2, 4)  # (n, R, A, C, H)
    x = _resample_rows(x, scale)
    x = x.reshape(n, R, A, C, H).transpose(0, 4, 1, 2, 3)  # (n, H, R, A, C)
    x = _resample_rows(x, scale)
    return x.reshape(n, H, R, A, C).transpose(0, 4, 2, 3, 1)  # (n, C, R, A, H)


def _resample_rows(x: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """x (n, m, ...) resampled along axis 1 by each object's scale (n,) as ``posesearch._resample_axis``; returns
    (n m, prod(...)) rows.  Objects of scale 1 are left as they are (as synthetic posing always did)."""
    n, m = x.shape[:2]
    rows = np.ascontiguousarray(x).reshape(n * m, -1)
    pos = (np.arange(m)[None, :] + 0.5) / scale[:, None] - 0.5
    pos = np.clip(pos, 0.0, m - 1)
    lo = np.floor(pos).astype(np.int64)
    hi = np.minimum(lo + 1, m - 1)
    t = (pos - lo).astype(np.float32).reshape(n * m, 1)
    first = (np.arange(n) * m)[:, None]
    out = rows[(first + lo).ravel()] * (1 - t) + rows[(first + hi).ravel()] * t
    same = np.repeat(scale == 1.0, m)
    if same.any():
        out[same] = rows[same]
    return out


@functools.lru_cache(maxsize=1)
def _pool() -> ThreadPoolExecutor:
    """The threads that pose objects (one per usable core).  They allocate from the main malloc arena
    (``cores.one_malloc_arena``, as the search's pools), so what they free serves the fit that follows instead of
    staying resident in arenas of their own (after 10,000 objects: 976 -> 950 MB resident, 791 MB of them the
    volumes)."""
    from ..cores import one_malloc_arena, usable_cores
    one_malloc_arena()
    return ThreadPoolExecutor(usable_cores(), thread_name_prefix="synthetic")


os.register_at_fork(after_in_child=_pool.cache_clear)
