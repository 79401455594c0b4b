"""Store volumes aligned into their prototype's frame: per-chunk sums and per-cluster means.

These are the library's picture volumes (the gallery shows them): each member's store volume
(6, R, A, H) is rolled back by its yaw (Fourier shift along the azimuth axis) and averaged with its
observation counts (channel 2) as weights.  The sums are kept in float64 and are additive over chunks,
so a map-reduce (:func:`protomine.mine.distributed.aligned_mean_volumes`) adds per-chunk sums in chunk
order and gets the one-process result up to float rounding.
"""
from __future__ import annotations

import numpy as np

from .posesearch import shift_volume


def aligned_volume_sums(vols: np.ndarray, labels: np.ndarray, yaw_deg: np.ndarray, K: int,
                        acc: np.ndarray | None = None, wsum: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Add store volumes (n, 6, R, A, H) rolled into their prototype's frame into ``acc`` (K, 6, R, A, H) and
    their observation weights into ``wsum`` (K, 1, R, A, H) (float64; new zero arrays when None)."""
    _, Cv, R, A, H = vols.shape
    acc = np.zeros((K, Cv, R, A, H)) if acc is None else acc
    wsum = np.zeros((K, 1, R, A, H)) if wsum is None else wsum
    for j, v in enumerate(vols.astype(np.float64)):
        k = labels[j]
        if k < 0:  # left out (members resting on another face than the canonical one)
            continue
        back = shift_volume(v, -yaw_deg[j] / (360.0 / A), axis=2)
        w = np.clip(back[2:3], 0, None)
        acc[k] += back * w
        wsum[k] += w
    return acc, wsum


def mean_from_volume_sums(acc: np.ndarray, wsum: np.ndarray, labels: np.ndarray, K: int) -> np.ndarray:
    """(K, 6, R, A, H) weighted means from :func:`aligned_volume_sums`; channel 2 = mean observation."""
    out = acc / np.maximum(wsum, 1e-9)
    out[:, 2] = wsum[:, 0] / np.maximum(np.bincount(labels[labels >= 0], minlength=K)[:, None, None, None], 1)
    return out.astype(np.float32)


def aligned_mean_volumes(store, labels: np.ndarray, yaw_deg: np.ndarray, K: int, chunk: int = 512) -> np.ndarray:
    """(K, 6, R, A, H) mean store volume of each cluster's members rolled into the prototype frame, read from
    ``store`` (any object store: ``len`` and ``read_volumes(i0, i1)``) in chunks of ``chunk`` objects."""
    acc = wsum = None
    for i0 in range(0, len(store), chunk):
        i1 = min(len(store), i0 + chunk)
        acc, wsum = aligned_volume_sums(store.read_volumes(i0, i1), labels[i0:i1], yaw_deg[i0:i1], K, acc, wsum)
    return mean_from_volume_sums(acc, wsum, labels, K)
