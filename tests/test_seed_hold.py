"""The fit that holds its seed partition only when the fit's is significantly worse (``[mine] seed_hold_t``:
``seeding.medoid_distances``, ``seeding.paired_worse_t``, ``engine.PoseKMeans(seed_hold_t=...)``).

References: Student's paired t statistic, ``scipy.stats.ttest_rel``; the k-medoids objective (each cluster's summed
distance to its best medoid; Kaufman & Rousseeuw 1990, "Finding groups in data", from memory) written out by brute
force; the adjusted Rand index of scikit-learn.
"""
from __future__ import annotations

import numpy as np
from scipy.stats import ttest_rel
from sklearn.metrics import adjusted_rand_score

from protomine.mine.engine import ArraySource, PoseKMeans
from protomine.mine.seeding import medoid_cost, medoid_distances, paired_worse_t

from box_classes import drifting_fit, resting_boxes

A = 36


def _brute_medoid_distances(S: np.ndarray, labels: np.ndarray) -> np.ndarray:
    out = np.zeros(len(S))
    for k in set(labels.tolist()):
        members = [i for i in range(len(S)) if labels[i] == k]
        med = min(members, key=lambda m: (sum(S[m, j] for j in members), m))
        for i in members:
            out[i] = S[i, med]
    return out


def test_medoid_distances_and_the_paired_t_against_scipy():
    rng = np.random.default_rng(5)
    pts = rng.normal(size=(23, 3))
    S = np.linalg.norm(pts[:, None] - pts[None], axis=2)
    for _ in range(6):
        a, b = rng.integers(0, 4, 23), rng.integers(0, 5, 23)
        da, db = medoid_distances(S, a), medoid_distances(S, b)
        np.testing.assert_allclose(da, _brute_medoid_distances(S, a))
        assert np.isclose(da.sum(), medoid_cost(S, a))
        # scipy.stats.ttest_rel: the paired t of a against b
        assert np.isclose(paired_worse_t(S, a, b), ttest_rel(da, db).statistic)
    assert paired_worse_t(S, a, a) == 0.0
    # the two true groups of two far blobs against a partition that swaps members: worse, and significantly so
    pts = np.concatenate([rng.normal(size=(15, 2)), rng.normal(size=(15, 2)) + 20.0])
    S = np.linalg.norm(pts[:, None] - pts[None], axis=2)
    truth = np.repeat([0, 1], 15)
    swapped = truth.copy()
    swapped[[0, 1, 2, 15, 16, 17]] = [1, 1, 1, 0, 0, 0]
    assert paired_worse_t(S, swapped, truth) > 1.96 and paired_worse_t(S, truth, swapped) < -1.96


def test_seed_hold_holds_a_significantly_worse_fit_and_leaves_a_close_one(monkeypatch):
    rng = np.random.default_rng(1)
    X, W, aspect, truth, grid = resting_boxes(rng, 9, A)
    src = ArraySource(X, W, aspect)
    common = dict(n_clusters=2, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True)
    drifting_fit(monkeypatch, 3)  # 6 of 18 objects in the wrong class
    plain = PoseKMeans(**common).fit(src)
    held = PoseKMeans(seed_hold_t=1.96, **common).fit(src)
    assert adjusted_rand_score(truth, plain.labels_) < 0.5  # scikit-learn
    assert adjusted_rand_score(truth, held.labels_) == 1.0  # the seed partition: the two classes across their faces
    assert np.all(np.isfinite(held.distance_))
    # a threshold above the drift's t: the fit stands as it is, prototypes and all
    loose = PoseKMeans(seed_hold_t=1e6, **common).fit(src)
    np.testing.assert_array_equal(loose.labels_, plain.labels_)
    np.testing.assert_array_equal(loose.prototypes_, plain.prototypes_)
