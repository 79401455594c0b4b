"""The fit's moves out of its seed partition that the stable-face matrix contradicts, undone (``[mine] seed_veto_k``:
``seeding.neighbour_vetoed``, ``engine.PoseKMeans(seed_veto_k=...)``).

References: a hand-computed example of the rule's definition (mean of the k smallest distances to the objects both
partitions keep in a cluster), and the adjusted Rand index of scikit-learn.
"""
from __future__ import annotations

import numpy as np
from sklearn.metrics import adjusted_rand_score

from protomine.mine.engine import ArraySource, PoseKMeans
from protomine.mine.seeding import neighbour_vetoed

from box_classes import drifting_fit, resting_boxes

A = 36


def _points_matrix(pts: np.ndarray) -> np.ndarray:
    return np.abs(pts[:, None] - pts[None])


def test_a_moved_object_goes_back_where_its_staying_neighbours_are():
    # objects on a line: group 0 at 0, 1, 2, 3; group 1 at 10, 11, 12; the seed partition is right
    pts = np.array([0.0, 1.0, 2.0, 3.0, 10.0, 11.0, 12.0])
    S = _points_matrix(pts)
    seed = np.array([0, 0, 0, 0, 1, 1, 1])
    fit = seed.copy()
    fit[3] = 1  # the fit moved the object at 3 to group 1
    # by hand, k = 2: to the objects kept in 0 (0, 1, 2): distances 3, 2, 1 -> mean of the two smallest 1.5;
    # to those kept in 1 (10, 11, 12): 7, 8, 9 -> 7.5; 1.5 < 7.5: back to 0
    np.testing.assert_array_equal(neighbour_vetoed(S, fit, seed, 2), seed)
    # k < 1: unchanged
    np.testing.assert_array_equal(neighbour_vetoed(S, fit, seed, 0), fit)
    # a move the neighbours support stands: the object at 9 seeded in 0, moved to 1
    pts2 = np.array([0.0, 1.0, 2.0, 9.0, 10.0, 11.0, 12.0])
    seed2 = np.array([0, 0, 0, 0, 1, 1, 1])
    fit2 = np.array([0, 0, 0, 1, 1, 1, 1])
    # k = 2: to 0's stayers (0, 1, 2): 7, 8 -> 7.5; to 1's (10, 11, 12): 1, 2 -> 1.5; stays in 1
    np.testing.assert_array_equal(neighbour_vetoed(_points_matrix(pts2), fit2, seed2, 2), fit2)


def test_objects_that_moved_together_do_not_vouch_for_one_another():
    # group 0: 0, 1, 2 and a pair at 4.0, 4.1; group 1 at 7, 8, 9; the fit moved the pair to 1
    pts = np.array([0.0, 1.0, 2.0, 4.0, 4.1, 7.0, 8.0, 9.0])
    S = _points_matrix(pts)
    seed = np.array([0, 0, 0, 0, 0, 1, 1, 1])
    fit = np.array([0, 0, 0, 1, 1, 1, 1, 1])
    # k = 1, by hand: the object at 4.0 to 0's stayers (2.0) 2.0, to 1's stayers (7.0) 3.0 -> back; with the pair
    # itself as evidence, 4.1 at 0.1 would have kept it in 1.  4.1: 2.1 against 2.9 -> back
    np.testing.assert_array_equal(neighbour_vetoed(S, fit, seed, 1), seed)
    # fewer stayers than k: all of them (k = 5, the object at 4.0: mean 2, 3, 4 = 3.0 against 3, 4, 5 = 4.0 -> back)
    np.testing.assert_array_equal(neighbour_vetoed(S, fit, seed, 5), seed)
    # a cluster none stayed in: every move out of it stands (the seed's cluster 0 wholly moved to 1)
    fit4 = np.array([1, 1, 1, 1, 1, 1, 1, 1])
    np.testing.assert_array_equal(neighbour_vetoed(S, fit4, seed, 2), fit4)


def test_seed_veto_undoes_a_drift_and_leaves_a_clean_fit(monkeypatch):
    rng = np.random.default_rng(1)
    X, W, aspect, truth, grid = resting_boxes(rng, 9, A)
    src = ArraySource(X, W, aspect)
    common = dict(n_clusters=2, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True)
    clean = PoseKMeans(**common).fit(src)
    clean_veto = PoseKMeans(seed_veto_k=3, **common).fit(src)
    assert adjusted_rand_score(truth, clean.labels_) == 1.0  # scikit-learn
    # nothing moved against the stable-face matrix: the fit stands as it is, prototypes and all
    np.testing.assert_array_equal(clean_veto.labels_, clean.labels_)
    np.testing.assert_array_equal(clean_veto.prototypes_, clean.prototypes_)
    drifting_fit(monkeypatch, 3)  # 6 of 18 objects in the wrong class
    plain = PoseKMeans(**common).fit(src)
    vetoed = PoseKMeans(seed_veto_k=3, **common).fit(src)
    assert adjusted_rand_score(truth, plain.labels_) < 0.5
    assert adjusted_rand_score(truth, vetoed.labels_) == 1.0  # every swapped object back with its class
    assert np.all(np.isfinite(vetoed.distance_))
