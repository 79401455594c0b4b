"""The fit that keeps its seed partition (``[mine] seed_check``: ``seeding.medoid_cost``, ``engine._held_fit``).

References: the k-medoids objective, each cluster's summed distance to its best medoid (Kaufman & Rousseeuw 1990,
"Finding groups in data", from memory), written out here by brute force over every candidate medoid; the prototype
update of k-means on rolled volumes, the observation-weighted mean of the members rolled back by their yaw (common
practice), written with ``numpy.roll``; the adjusted Rand index of scikit-learn.
"""
from __future__ import annotations

import numpy as np
from sklearn.metrics import adjusted_rand_score

from protomine.mine.engine import ArraySource, PoseKMeans, _held_fit
from protomine.mine.seeding import FaceDistance, medoid_cost, pairwise_pose_distances

from box_classes import drifting_fit, resting_boxes

A = 36


def _brute_medoid_cost(S: np.ndarray, labels: np.ndarray) -> float:
    total = 0.0
    for k in set(labels.tolist()):
        members = [i for i in range(len(S)) if labels[i] == k]
        total += min(sum(S[m, j] for j in members) for m in members)
    return total


def test_medoid_cost_is_the_k_medoids_objective_of_any_partition():
    rng = np.random.default_rng(3)
    pts = rng.normal(size=(17, 2))
    S = np.linalg.norm(pts[:, None] - pts[None], axis=2)
    for _ in range(5):
        labels = rng.integers(0, 4, 17)
        assert np.isclose(medoid_cost(S, labels), _brute_medoid_cost(S, labels))
    # one cluster of everything costs the 1-medoid sum; singletons cost nothing
    assert np.isclose(medoid_cost(S, np.zeros(17, int)), S.sum(axis=1).min())
    assert medoid_cost(S, np.arange(17)) == 0.0


def test_held_fit_keeps_the_labels_and_averages_the_members_rolled_back():
    # two invented profiles on a (C 2, R 3, A 36, H 2) grid, each object a whole-bin yaw of its class's profile
    rng = np.random.default_rng(0)
    base = rng.random((2, 2, 3, A, 2)).astype(np.float32)
    truth = np.repeat([0, 1], 6)
    yaws = rng.integers(0, A, len(truth))
    X = np.stack([np.roll(base[k], s, axis=2) for k, s in zip(truth, yaws)]).astype(np.float32)
    X += 0.01 * rng.standard_normal(X.shape).astype(np.float32)
    X[::2] += 0.2  # every other object brighter: where it is seen less, the weighted mean is darker
    W = np.ones((len(X),) + X.shape[2:], np.float32)
    W[::2, :, :A // 2] = 0.2  # ... on the half of its azimuth it is seen less
    start = base  # each class's profile as it is: its members' poses against it are their yaws
    fit = lambda labels: _held_fit(ArraySource(X, W), labels, start, np.ones((2,) + X.shape[2:], np.float32),  # noqa: E731
                                   scales=(1.0,), chunk_size=64, moments=True, cache=None, grid=None, aspect=None)
    given = truth.copy()
    given[[0, 7]] = [1, 0]  # not the partition a Lloyd pass would reach: held anyway
    assert np.array_equal(fit(given).labels, given)
    given = truth
    res = fit(given)
    # the update's poses were found against the start, the reported ones against the update: the same whole bins
    shift = np.round(np.asarray(res.yaw) / (360.0 / A)).astype(int)
    np.testing.assert_allclose(np.asarray(res.yaw)[given == truth], (yaws * 360.0 / A)[given == truth], atol=1.0)
    for k in range(2):
        m = np.flatnonzero(given == k)
        xa = np.stack([np.roll(X[i], -shift[i], axis=2) for i in m])
        wa = np.stack([np.roll(W[i], -shift[i], axis=1) for i in m])
        ref = (wa[:, None] * xa).sum(axis=0) / wa.sum(axis=0)[None]
        # within the sub-bin yaw's interpolation; the unweighted mean lies ~0.05 away
        np.testing.assert_allclose(res.P[k], ref, atol=5e-3)
        assert np.abs(xa.mean(axis=0) - ref).max() > 0.03


def test_seed_check_keeps_the_partition_of_lower_stable_face_cost(monkeypatch):
    # the fit is made to drift (its passes' partition has two objects swapped between the classes, as the tilt-grid
    # passes moved a spool and an L bracket on touching stores): the check keeps the seed partition, the plain fit
    # keeps the drift
    rng = np.random.default_rng(1)
    X, W, aspect, truth, grid = resting_boxes(rng, 6, A)
    src = ArraySource(X, W, aspect)
    drifting_fit(monkeypatch, 1)
    common = dict(n_clusters=2, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True)
    plain = PoseKMeans(**common).fit(src)
    kept = PoseKMeans(seed_check=True, **common).fit(src)
    S = pairwise_pose_distances(X, W, FaceDistance(aspect, (1.0,), grid))
    # the one objective: the kept partition's k-medoids cost on the stable-face matrix is below the drifted one's
    assert medoid_cost(S, kept.labels_) < medoid_cost(S, plain.labels_)
    assert adjusted_rand_score(truth, kept.labels_) == 1.0  # scikit-learn: the two classes, across their faces
    assert adjusted_rand_score(truth, plain.labels_) < 1.0
    assert np.all(np.isfinite(kept.distance_)) and kept.prototypes_.shape == plain.prototypes_.shape


def test_own_faces_turns_only_a_far_member_onto_its_own_face():
    # one class of invented slabs: four lying flat (the canonical face), one on its side; the prototype is a flat
    # one.  Given its distance as the yaw search finds it (far: over 3x the median), the one on its side is turned
    # onto its own resting face, and then fits the prototype better; the flat ones are left as they are
    from protomine.mine.engine import _own_faces
    from protomine.mine.posesearch import pose_distances
    rng = np.random.default_rng(1)
    X, W, aspect, truth, grid = resting_boxes(rng, 12, A)
    rows = np.array([3, 6, 9, 0, 2])  # faces 0, 0, 0, 0 (lying flat) and 2 (on a side), resting_boxes' order
    x, w, a = X[rows], W[rows], aspect[rows]
    P, V = X[0:1], W[0:1]
    scales = (0.87, 0.93, 1.0, 1.07, 1.15)  # configs/default.toml
    d = pose_distances(x, w, P, V, scales=scales).D[:, 0]
    assert d[4] > 3 * np.median(d)  # the one on its side is far from a flat prototype about up alone
    src, pre = _own_faces(ArraySource(x, w, a), np.zeros(5, np.int64), P, V, d, scales, grid, 64)
    assert pre is not None
    np.testing.assert_allclose(pre[:4], np.broadcast_to(np.eye(3), (4, 3, 3)))  # the flat ones: not turned
    xt, wt = src.read(0, 5)
    np.testing.assert_array_equal(xt[:4], x[:4])
    # a proper rotation, taking one of the object's own stable faces (faces.stable_ups) to up: the object lay on a
    # long side, so that face is 90 degrees from its up (a box's faces are perpendicular: from memory)
    assert np.allclose(pre[4] @ pre[4].T, np.eye(3), atol=1e-9) and np.isclose(np.linalg.det(pre[4]), 1.0)
    u = pre[4][2]  # pre u = +z
    assert abs(np.degrees(np.arccos(np.clip(u[2], -1, 1))) - 90.0) < 8.0
    # turned, it fits the flat prototype about up at half its distance, within a few times the flat ones' (turning
    # resamples it once more: 0.016 against 0.032, the flat ones 0 to 0.0075)
    dt = pose_distances(xt[4:], wt[4:], P, V, scales=scales).D[0, 0]
    assert dt < 0.6 * d[4] and dt < 3.0 * d[:4].max()
    assert src.aspect[4] < a[4]  # lying flat, lower than it stood (aspect = height / footprint)


def test_held_fit_reports_a_turned_member_on_its_own_face():
    # the invented box-on-a-post class: two of its six objects stand on their base, the others lie on a side (two
    # sides, one face by the box's four-fold symmetry); the held fit turns the two standing ones onto a side to fit
    # the prototype (_own_faces), and reports their pose through that turn: their up direction in the prototype's
    # frame lies a right angle from the lying ones' (a box's faces are perpendicular: from memory), not on the
    # canonical face the turned copy was matched on
    from protomine.mine import engine
    rng = np.random.default_rng(1)
    X, W, aspect, truth, grid = resting_boxes(rng, 6, A)
    turned = []
    own = engine._own_faces

    def spy(*args, **kwargs):
        out = own(*args, **kwargs)
        turned.append(out[1])
        return out

    import pytest
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(engine, "_own_faces", spy)
        m = PoseKMeans(n_clusters=2, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True,
                       seed_check=True).fit(ArraySource(X, W, aspect))
    standing, lying = np.array([6, 9]), np.array([7, 8, 10, 11])  # resting_boxes: class 1, faces 0, 1, 2, 0, 1, 2
    assert adjusted_rand_score(truth, m.labels_) == 1.0
    pre = turned[-1]
    assert pre is not None
    moved = np.flatnonzero(~np.all(np.isclose(pre, np.eye(3)), axis=(1, 2)))
    np.testing.assert_array_equal(moved, standing)
    angle = lambda u, v: np.degrees(np.arccos(np.clip(u @ v, -1.0, 1.0)))  # noqa: E731
    for i in standing:
        for j in lying:
            assert abs(angle(m.up_[i], m.up_[j]) - 90.0) < 10.0
    assert np.all(np.isfinite(m.distance_))
