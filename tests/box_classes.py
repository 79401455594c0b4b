"""Invented test data: two box-like classes, each object resting on one of its class's stable faces
(``faces.stable_ups``, the first three) at a random yaw, with a little noise.  Used by test_stable_faces (the K
scan joins each class's faces) and test_seed_check / test_seed_hold (the fit's partition against its seed partition; ``drifting_fit`` makes the fit
drift)."""
from __future__ import annotations

import numpy as np

from protomine.mine.faces import stable_ups
from protomine.mine.posesearch import shift_volume
from protomine.mine.tilts import TiltGrid, _cell_points, _resample_copies, copy_geometries, solid_points


def resting_boxes(rng: np.random.Generator, n_each: int, azimuth_bins: int = 36):
    """X (n, 2, 8, A, 12), W (n, 8, A, 12), aspect (n,), labels (n,) and the coarse tilt grid (N_side 1)."""
    r, a, h, asp = 8, azimuth_bins, 12, 1.0
    x, y, z = _cell_points(r, a, h, 1.0, asp).T
    shapes = [(np.abs(x) < 0.6) & (np.abs(y) < 0.25) & (z > 0.1) & (z < 0.4),
              ((np.abs(x) < 0.3) & (np.abs(y) < 0.3) & (z > 0.05) & (z < 0.9)) | ((np.hypot(x, y) < 0.15) & (z > 0.05))]
    grid = TiltGrid(nsides=(1,), radial_margin=1.15, height_margin=1.10)
    X, W, aspect, labels = [], [], [], []
    for k, s in enumerate(shapes):
        surf = s.reshape(r, a, h).astype(np.float32)
        P, V = np.stack([surf, 0.5 * surf])[None], np.ones((1, r, a, h), np.float32)
        ups = stable_ups(surf, V[0], asp)[:3]
        gs = copy_geometries((r, a, h), asp, ups, grid, solid_points(surf, V[0], asp, grid))
        pc, vc = _resample_copies(np.repeat(P, len(gs), 0), np.repeat(V, len(gs), 0), gs, np.full(len(gs), asp))
        for i in range(n_each):
            f, yaw = i % len(gs), rng.uniform(0, a)
            X.append(shift_volume(pc[f][None], yaw, axis=3)[0] + 0.05 * rng.standard_normal(pc[f].shape).astype(np.float32))
            W.append(shift_volume(vc[f][None], yaw, axis=2)[0])
            aspect.append(gs[f].z_max / gs[f].rho_max)
            labels.append(k)
    return np.clip(np.stack(X), 0, 1).astype(np.float32), np.stack(W).astype(np.float32), np.array(aspect), \
        np.array(labels), grid


def drifting_fit(monkeypatch, swaps: int) -> None:
    """Make ``engine._lloyd`` drift: its passes' partition has ``swaps`` objects of class 0 and of class 1 swapped."""
    from protomine.mine import engine
    lloyd = engine._lloyd

    def drifting(*args, **kwargs):
        res = lloyd(*args, **kwargs)
        a, b = np.flatnonzero(res.labels == 0)[:swaps], np.flatnonzero(res.labels == 1)[:swaps]
        res.labels[np.concatenate([a, b])] = res.labels[np.concatenate([b, a])]
        return res

    monkeypatch.setattr(engine, "_lloyd", drifting)
