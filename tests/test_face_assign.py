"""The fit's partition by the lesser of the tilt search and the object turned onto its own faces (``[mine]
face_assign``: ``engine._face_assign``, ``PoseKMeans(face_assign=True)``).

References: the definition written out here (the lesser of the two distances, the argmin over prototypes), with the
turned copies' distances by ``posesearch.pose_distances_naive`` (every shift rolled explicitly); the adjusted Rand
index of scikit-learn; a box's resting faces are perpendicular (from memory).
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
from sklearn.metrics import adjusted_rand_score

from protomine.mine.engine import ArraySource, PoseKMeans, _face_assign
from protomine.mine.faces import stable_ups
from protomine.mine.posesearch import pose_distances_naive
from protomine.mine.tilts import _resample_copies, copy_geometries, solid_points, tilt_pose_distances

from box_classes import resting_boxes

A = 36


def _boxes(seed: int):
    # two invented classes (a slab, a box on a post), six objects each on three of their resting faces; the
    # prototypes are one upright member of each (as a mined prototype is mostly its upright members' mean)
    X, W, aspect, truth, grid = resting_boxes(np.random.default_rng(seed), 6, A)
    return X, W, aspect, truth, grid, X[[0, 6]], W[[0, 6]], aspect[[0, 6]]


def test_face_assign_is_the_lesser_of_the_two_searches():
    X, W, aspect, truth, grid, P, V, pa = _boxes(0)
    D = np.asarray(tilt_pose_distances(X, W, P, V, aspect=pa, scales=(1.0,), grid=grid).D, np.float64)
    D = np.where(np.isfinite(D), D, np.inf)
    Du = np.full_like(D, np.inf)
    for i in range(len(X)):  # each object turned onto each of its stable faces but the one it lies on
        a = float(aspect[i])
        ups = stable_ups(X[i, 0], W[i], a)[1:]
        gs = copy_geometries(X.shape[2:], a, ups, grid, solid_points(X[i, 0], W[i], a, grid))
        pc, vc = _resample_copies(np.repeat(X[i:i + 1], len(gs), 0), np.repeat(W[i:i + 1], len(gs), 0), gs,
                                  np.full(len(gs), a))
        du = np.asarray(pose_distances_naive(pc, vc, P, V, scales=(1.0,)).D, np.float64)
        Du[i] = np.where(np.isfinite(du), du, np.inf).min(axis=0)
    want = np.argmin(np.minimum(D, Du), axis=1)
    res = SimpleNamespace(P=P, V=V, aspect=pa, labels=np.argmin(D, axis=1))
    labels, src, pre = _face_assign(ArraySource(X, W, aspect), res, scales=(1.0,), chunk_size=5, grid=grid)
    np.testing.assert_array_equal(labels, want)
    # the tilt search alone puts the box on a post lying on its sides with the slab; turned back up, they fit theirs
    assert adjusted_rand_score(truth, np.argmin(D, axis=1)) < 0.5
    assert adjusted_rand_score(truth, labels) == 1.0
    # exactly the objects whose label came from a turned copy are replaced, by a proper rotation onto a face a right
    # angle from the one they lie on, and the copy fits its prototype at the lesser distance
    r = np.arange(len(X))
    turned = np.flatnonzero(Du[r, labels] < D[r, labels])
    moved = np.flatnonzero(~np.all(np.isclose(pre, np.eye(3)), axis=(1, 2)))
    np.testing.assert_array_equal(moved, turned)
    xt, wt = src.read(0, len(X))
    keep = np.setdiff1d(r, turned)
    np.testing.assert_array_equal(xt[keep], X[keep])
    for i in turned:
        assert np.allclose(pre[i] @ pre[i].T, np.eye(3), atol=1e-9) and np.isclose(np.linalg.det(pre[i]), 1.0)
        assert abs(np.degrees(np.arccos(np.clip(pre[i][2, 2], -1, 1))) - 90.0) < 8.0
        d = pose_distances_naive(xt[i:i + 1], wt[i:i + 1], P, V, scales=(1.0,)).D[0, labels[i]]
        np.testing.assert_allclose(d, Du[i, labels[i]], rtol=1e-4)


def _fits(seed: int, *options: dict):
    """The boxes of ``seed`` fitted from one upright member of each class: truth, the plain fit, and one fit per
    ``options`` (PoseKMeans keywords; default: face_assign)."""
    X, W, aspect, truth, grid, P, V, pa = _boxes(seed)
    common = dict(n_clusters=2, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True,
                  init=(P, V, pa))
    return (truth,) + tuple(PoseKMeans(**o, **common).fit(ArraySource(X, W, aspect))
                            for o in ({},) + (options or ({"face_assign": True},)))


def test_fit_with_face_assign_keeps_each_class_across_its_faces():
    # started from one upright member of each class, the fit's passes keep the lying boxes on a post with the slab;
    # with face_assign they join their class, and the partition is held there
    truth, plain, fa = _fits(0)
    assert adjusted_rand_score(truth, plain.labels_) < 0.5
    assert adjusted_rand_score(truth, fa.labels_) == 1.0
    assert np.all(np.isfinite(fa.distance_))
    # the lying ones are reported on their own face: a right angle from the standing ones' up
    angle = lambda u, v: np.degrees(np.arccos(np.clip(u @ v, -1.0, 1.0)))  # noqa: E731
    assert abs(angle(fa.up_[7], fa.up_[6]) - 90.0) < 10.0


def test_face_assign_leaves_a_fit_it_does_not_move():
    # seed 1's boxes: the tilt search already places every object right, so the fit is the same to the bit
    truth, plain, fa = _fits(1)
    assert adjusted_rand_score(truth, plain.labels_) == 1.0
    np.testing.assert_array_equal(fa.labels_, plain.labels_)
    np.testing.assert_array_equal(fa.prototypes_, plain.prototypes_)
    np.testing.assert_array_equal(fa.distance_, plain.distance_)


def test_face_assign_updates_0_moves_labels_and_keeps_the_fit_prototypes():
    # [mine] face_assign_updates = 0: the same partition as face_assign, but the fit's prototypes as they stand (no held
    # update), each object placed at the lesser distance of the two searches, so no object is farther than the plain
    # fit put it (the definition: min over prototypes of min(D, Du) <= min over prototypes of D)
    truth, plain, held, keep = _fits(0, {"face_assign": True}, {"face_assign": True, "face_updates": 0})
    assert adjusted_rand_score(truth, plain.labels_) < 0.5
    assert adjusted_rand_score(truth, keep.labels_) == 1.0
    np.testing.assert_array_equal(keep.labels_, held.labels_)
    np.testing.assert_array_equal(keep.prototypes_, plain.prototypes_)
    assert not np.array_equal(held.prototypes_, plain.prototypes_)
    assert np.all(np.isfinite(keep.distance_))
    assert np.all(keep.distance_ <= plain.distance_ * (1 + 1e-4) + 1e-9)
    angle = lambda u, v: np.degrees(np.arccos(np.clip(u @ v, -1.0, 1.0)))  # noqa: E731
    assert abs(angle(keep.up_[7], keep.up_[6]) - 90.0) < 10.0


def _three_classes(seed: int):
    """The boxes of ``seed`` and a third invented class: six upright posts with a side arm at random yaws, which
    neither search confuses with the boxes (no object of theirs moves)."""
    from protomine.mine.posesearch import shift_volume
    from protomine.mine.tilts import _cell_points
    X, W, aspect, truth, grid = resting_boxes(np.random.default_rng(seed), 6, A)
    rng = np.random.default_rng(seed + 100)
    x, y, z = _cell_points(8, A, 12, 1.0, 1.0).T
    post = ((np.hypot(x, y) < 0.3) | ((np.abs(y) < 0.12) & (x > 0) & (x < 0.8) & (z < 0.3))) & (z < 0.95)
    surf = post.reshape(8, A, 12).astype(np.float32)
    x3 = [np.clip(shift_volume(np.stack([surf, 0.5 * surf])[None], rng.uniform(0, A), axis=3)[0]
                  + 0.05 * rng.standard_normal((2, 8, A, 12)), 0, 1) for _ in range(6)]
    X = np.concatenate([X, np.stack(x3).astype(np.float32)])
    W = np.concatenate([W, np.ones((6, 8, A, 12), np.float32)])
    return X, W, np.concatenate([aspect, np.ones(6)]), np.concatenate([truth, np.full(6, 2)]), grid


def test_face_assign_leaves_the_clusters_it_does_not_move_as_the_fit_left_them():
    # [mine] face_assign_hold_unmoved, by its definition (common practice for a partial refit): a cluster no object
    # joined or left keeps the fit's prototype, its members' poses and distances to the bit; only the clusters that
    # changed are refitted
    X, W, aspect, truth, grid = _three_classes(0)
    common = dict(n_clusters=3, scales=(1.0,), n_init=1, max_iter=5, random_state=0, tilts=grid, face_pairs=True,
                  init=(X[[0, 6, 12]], W[[0, 6, 12]], aspect[[0, 6, 12]]))
    plain, fa, upd = (PoseKMeans(**o, **common).fit(ArraySource(X, W, aspect))
                      for o in ({}, {"face_assign": True, "face_hold_unmoved": True}, {"face_assign": True}))
    moved = np.flatnonzero(plain.labels_ != fa.labels_)
    assert len(moved) and adjusted_rand_score(truth, fa.labels_) == 1.0
    kept = np.setdiff1d(np.arange(3), np.concatenate([plain.labels_[moved], fa.labels_[moved]]))
    assert len(kept) == 1
    k = int(kept[0])
    members = np.flatnonzero(fa.labels_ == k)
    np.testing.assert_array_equal(members, np.flatnonzero(plain.labels_ == k))
    np.testing.assert_array_equal(fa.prototypes_[k], plain.prototypes_[k])
    np.testing.assert_array_equal(fa.prototype_weights_[k], plain.prototype_weights_[k])
    assert fa.aspect_[k] == plain.aspect_[k] and fa.symmetry_[k] == plain.symmetry_[k]
    np.testing.assert_array_equal(fa.distance_[members], plain.distance_[members])
    np.testing.assert_array_equal(fa.yaw_deg_[members], plain.yaw_deg_[members])
    np.testing.assert_array_equal(fa.rotation_[members], plain.rotation_[members])
    # the clusters that changed are refitted from their new members, as without the switch
    np.testing.assert_array_equal(fa.labels_, upd.labels_)
    for j in np.setdiff1d(np.arange(3), kept):
        assert not np.array_equal(fa.prototypes_[j], plain.prototypes_[j])
    # without it the held fit's update moves the unmoved cluster's prototype too (what the switch is for)
    assert not np.array_equal(upd.prototypes_[k], plain.prototypes_[k])
