"""Single-view labelling with the symmetric distance ([mine] label_symmetric, ``protomine.label.symmetric``).

Checks against definitions, not against our own figures: the reverse distance of a (view, prototype) pair is the
pose search with the roles swapped (the prototype as the object, the view as the prototype, one pair per search),
computed here directly with ``tilt_pose_distances``; with a yaw-only search at scale 1 the distance is symmetric in
its two arguments (the posesearch docstring's formula: swapping object and prototype turns a roll by s into a roll
by -s of the same sum); the shortlist is each row's M nearest within the ratio of its nearest, and the decision is
the argmin of the mean of the two directions over it (brute force here, from the definition).
"""
from __future__ import annotations

import numpy as np

from protomine.ingest.volume import matching_features
from protomine.label.symmetric import reverse_distances, shortlist, symmetric_best
from protomine.mine.tilts import TiltGrid, tilt_pose_distances

R, A, H = 4, 16, 6


def _volumes(n: int, rng: np.random.Generator) -> np.ndarray:
    """Random irregular objects: a column of solid cells of random height per (ring, angle) cell, seen partly."""
    v = np.zeros((n, 6, R, A, H), np.float32)
    for i in range(n):
        top = rng.integers(1, H, (R, A))
        z = np.arange(H)[None, None, :]
        v[i, 0] = (z == top[..., None] - 1)                  # surface
        v[i, 1] = (z >= top[..., None])                      # free
        v[i, 2] = rng.uniform(0.3, 1.0, (R, A, 1)) * (rng.uniform(size=(R, A, 1)) < 0.7)   # observed (partial view)
        v[i, 3:] = rng.uniform(size=(3, R, A, 1))             # colour
    return v


def _features(n: int, seed: int):
    X, W = matching_features(_volumes(n, np.random.default_rng(seed)))
    return X, W


def test_reverse_is_the_swapped_search_pair_by_pair():
    grid = TiltGrid(nsides=(1, 2))
    Xv, Wv = _features(3, 1)          # views
    P, V = _features(4, 2)            # prototypes
    asp = np.array([0.8, 1.0, 1.3])
    D = tilt_pose_distances(Xv, Wv, P, V, aspect=np.ones(4), scales=(0.9, 1.0), grid=grid).D
    sel = shortlist(D, 3, 0.0)
    rev = reverse_distances(Xv, Wv, asp, P, V, sel, (0.9, 1.0), grid)
    for i in range(3):
        for k in range(4):
            if sel[i, k]:
                ref = tilt_pose_distances(P[[k]], V[[k]], Xv[[i]], Wv[[i]], aspect=asp[[i]], scales=(0.9, 1.0),
                                          grid=grid).D[0, 0]
                np.testing.assert_allclose(rev[i, k], ref, rtol=1e-5)
            else:
                assert np.isnan(rev[i, k])
    # tipped copies are resampled on the prototype's side only, so the two directions differ
    assert np.nanmax(np.abs(rev - D) / D) > 0.01


def test_yaw_only_reverse_equals_forward():
    Xv, Wv = _features(3, 3)
    P, V = _features(3, 4)
    D = tilt_pose_distances(Xv, Wv, P, V, aspect=np.ones(3), scales=(1.0,), grid=None).D
    rev = reverse_distances(Xv, Wv, np.ones(3), P, V, np.ones((3, 3), bool), (1.0,), None)
    np.testing.assert_allclose(rev, D, rtol=1e-4)


def test_shortlist_and_decision_follow_their_definitions():
    rng = np.random.default_rng(5)
    D = rng.uniform(1.0, 3.0, (40, 6))
    D[3] = np.inf
    D[4, :5] = np.nan
    rev = rng.uniform(0.5, 4.0, D.shape)
    for top, ratio in [(2, 1.5), (3, 0.0), (4, 1.2)]:
        sel = shortlist(D, top, ratio)
        r = np.where(sel, rev, np.nan)
        best = symmetric_best(D, r)
        for i in range(len(D)):
            fin = [k for k in range(6) if np.isfinite(D[i, k])]
            near = sorted(fin, key=lambda k: (D[i, k], k))[:top]
            want = {k for k in near if ratio <= 0 or D[i, k] <= ratio * min(D[i, j] for j in fin)}
            assert set(np.flatnonzero(sel[i])) == want
            if not fin:
                assert best[i] == -1
            else:
                assert best[i] == min(want, key=lambda k: ((D[i, k] + rev[i, k]) / 2, k))
    # the decision differs from the one-way nearest on some rows (else the option would change nothing)
    ok = np.isfinite(D).any(axis=1)
    one_way = np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1)
    assert np.any(symmetric_best(D, np.where(shortlist(D, 3, 0.0), rev, np.nan))[ok] != one_way[ok])
