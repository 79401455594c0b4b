"""View prototypes (protomine.mine.pipeline.view_prototypes) and their vote in the label search
(protomine.label.matcher.ViewSearch.vote).

References: the observation-weighted mean written from its definition (sum_i w_i x_i / sum_i w_i per cell, common
practice) over views rolled back by whole azimuth bins with numpy.roll (DEVELOPERS.md: yawing an object by +d degrees
rolls its volume by +d / (360 / A) bins); the vote's per-prototype minimum written as loops.
"""
from __future__ import annotations

import numpy as np

from protomine.config import load_config
from protomine.ingest.volume import matching_features
from protomine.label.matcher import ViewSearch
from protomine.mine.pipeline import view_prototypes
from protomine.mine.tilts import TiltGrid

R, A, H = 4, 12, 5


class _Store:
    """The two things view_prototypes reads of a store: each single view's object and the views themselves."""

    def __init__(self, single_object: np.ndarray, views: np.ndarray):
        self.single_object, self._views = np.asarray(single_object), views

    def read_single_views(self, rows: np.ndarray) -> np.ndarray:
        return self._views[np.asarray(rows)]


def _volume(rng: np.random.Generator) -> np.ndarray:
    v = np.zeros((6, R, A, H), np.float32)
    v[0] = (rng.random((R, A, H)) > 0.6).astype(np.float32)      # surface
    v[1] = 1.0 - v[0]                                             # free
    v[2] = 1.0 + rng.integers(0, 3, (R, A, H))                    # observed frames
    v[3:6] = rng.random((3, R, A, H))
    return v


def test_view_prototype_is_the_weighted_mean_of_the_aligned_views():
    rng = np.random.default_rng(0)
    cfg = load_config("fast")
    fw, cw = cfg["mine"]["free_weight"], cfg["mine"]["colour_weight"]
    base = [_volume(rng) for _ in range(2)]
    # prototype 0: three objects on the canonical face, two views each, every view the base shape yawed by whole bins
    # and with its own observation counts; prototype 1: one object only (fewer than min_members: no view prototype)
    views, objs, shifts = [], [], []
    for obj, k in ((0, 0), (1, 0), (2, 0), (3, 1)):
        for _ in range(2):
            v = base[k].copy()
            v[2] = 1.0 + rng.integers(0, 3, (R, A, H))
            s = int(rng.integers(0, A))
            views.append(np.roll(v, s, axis=2))
            objs.append(obj)
            shifts.append(s)
    store = _Store(np.array(objs), np.array(views))
    P, V = matching_features(np.array(base), free_weight=fw, colour_weight=cw)
    face_up = np.array([[[0.0, 0.0, 1.0]], [[0.0, 0.0, 1.0]]])
    out = view_prototypes(store, cfg, P, V, np.array([0, 0, 0, 1]), np.zeros(4, np.int64), face_up,
                          np.array([[1], [1]]), None, (1.0,), 2)
    assert out["view_owner"].tolist() == [0] and out["view_face"].tolist() == [0]
    # the definition: each view rolled back by its own shift, then sum w x / sum w and the mean weight per cell
    X, W = matching_features(np.array(views[:6]), free_weight=fw, colour_weight=cw)
    Xa = np.stack([np.roll(x, -s, axis=2) for x, s in zip(X, shifts[:6])])
    Wa = np.stack([np.roll(w, -s, axis=1) for w, s in zip(W, shifts[:6])])
    want = (Wa[:, None] * Xa).sum(axis=0) / Wa.sum(axis=0)[None]
    np.testing.assert_allclose(out["view_features"][0], want, atol=2e-2)   # the search's sub-bin yaw refinement moves values by < 0.01
    np.testing.assert_allclose(out["view_weights"][0], Wa.mean(axis=0), atol=2e-2)
    np.testing.assert_allclose(out["view_features"][0], P[0], atol=2e-2)   # identical shapes: the prototype itself


def test_vote_takes_each_prototypes_nearest_of_its_3d_and_view_prototypes():
    rng = np.random.default_rng(1)
    P = rng.random((3, 2, R, A, H)).astype(np.float32)
    V = np.ones((3, R, A, H), np.float32)
    search = ViewSearch(P, V, np.ones(3), (1.0,), TiltGrid.identity(), np.array([[[0.0, 0.0, 1.0]]] * 3),
                        np.ones((3, 1), np.int64))
    X = rng.random((4, 2, R, A, H)).astype(np.float32)
    W = np.ones((4, R, A, H), np.float32)
    D = search.poses(X, W)[0]
    np.testing.assert_array_equal(search.vote(X, W, D), D)             # no view prototypes: unchanged
    Pv = np.concatenate([X[:1], rng.random((2, 2, R, A, H)).astype(np.float32)])   # view 0 is object 0 itself
    owner = np.array([2, 2, 0])
    search.set_views(owner, Pv, np.ones((3, R, A, H), np.float32), (1.0,))
    got = search.vote(X, W, D)
    Dv = ViewSearch(Pv, np.ones((3, R, A, H), np.float32), np.ones(3), (1.0,), TiltGrid.identity(),
                    np.array([[[0.0, 0.0, 1.0]]] * 3), np.ones((3, 1), np.int64)).poses(X, W)[0]
    for i in range(4):
        for k in range(3):
            want = min([D[i, k]] + [Dv[i, j] for j in range(3) if owner[j] == k])
            np.testing.assert_allclose(got[i, k], want, rtol=1e-6)
    assert got[0, 2] < 1e-6 and np.argmin(got[0]) == 2                  # object 0 found by its own view
