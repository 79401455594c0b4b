"""Stable resting directions of gridded volumes (``faces.stable_ups``) and the stable-face pairwise distance
(``seeding.FaceDistance``).

References: elementary statics, quasi-static resting (from memory; as in Goldberg et al., "Part pose statistics",
IEEE Trans. Robotics and Automation 1999): a rigid body rests stably on a face of its convex hull when its centre
of mass projects inside that face.  A rectangular box therefore rests on each of its six faces; a prism on an
obtuse triangle rests on its two end caps and on the triangle's longest side only (a side with an obtuse angle at
one end has the centre of mass projecting beyond that end).  The distance's reference twin is
``posesearch.pose_distances_naive`` (every shift rolled explicitly) on the resting copies.
"""
from __future__ import annotations

import numpy as np

from protomine.mine.faces import stable_ups
from protomine.mine.posesearch import pose_distances_naive
from protomine.mine.seeding import FaceDistance
from protomine.mine.tilts import TiltGrid, _cell_points, _resample_copies, copy_geometries, solid_points

from box_classes import resting_boxes

R, A, H, ASPECT = 16, 72, 24, 0.6


def _solid(inside) -> np.ndarray:
    x, y, z = _cell_points(R, A, H, 1.0, ASPECT).T
    return inside(x, y, z).reshape(R, A, H).astype(np.float32)


def _angles(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.degrees(np.arccos(np.clip(u @ v.T, -1.0, 1.0)))


def test_a_box_rests_on_its_six_faces():
    box = _solid(lambda x, y, z: (np.abs(x) < 0.35) & (np.abs(y) < 0.2) & (z > 0.05) & (z < 0.5))
    ups = stable_ups(box, np.ones_like(box), ASPECT)
    truth = np.array([[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]], float)
    ang = _angles(ups, truth)
    # a cylindrical grid draws the flat sides in steps: every face found within 16 degrees, nothing else
    assert np.all(ang.min(axis=0) < 16.0)
    assert np.all(ang.min(axis=1) < 16.0)
    np.testing.assert_allclose(ups[0], [0, 0, 1])


def test_an_obtuse_prism_rests_on_its_caps_and_longest_side_only():
    # triangle in (x, z): A (-0.4, 0.05), B (0.2, 0.05), C (0.45, 0.4); obtuse at B, so AB (the bottom it is
    # seen on) and BC are unstable and AC is the stable side; extruded along y (|y| < 0.3): caps at +-y
    a, b, c = np.array([-0.4, 0.05]), np.array([0.2, 0.05]), np.array([0.45, 0.4])
    assert (a - b) @ (c - b) < 0  # the angle at B is obtuse

    def inside(x, y, z):
        p = np.stack([x, z], -1)
        s = [(q1 - q0)[0] * (p - q0)[..., 1] - (q1 - q0)[1] * (p - q0)[..., 0] for q0, q1 in ((a, b), (b, c), (c, a))]
        return (s[0] >= 0) & (s[1] >= 0) & (s[2] >= 0) & (np.abs(y) < 0.3)

    prism = _solid(inside)
    ups = stable_ups(prism, np.ones_like(prism), ASPECT)[1:]  # [0] is +z, the pose it was seen in
    ac = c - a
    out = np.array([-ac[1], ac[0]]) / np.linalg.norm(ac)  # normal of AC pointing away from B
    assert out @ (b - a) < 0
    truth = np.array([[-out[0], 0.0, -out[1]], [0, 1, 0], [0, -1, 0]])
    ang = _angles(ups, truth)
    assert len(ups) == 3
    assert np.all(ang.min(axis=0) < 10.0)


def test_face_distance_is_the_minimum_over_the_resting_copies():
    rng = np.random.default_rng(0)
    box = _solid(lambda x, y, z: (np.abs(x) < 0.35) & (np.abs(y) < 0.2) & (z > 0.05) & (z < 0.5))
    R2, A2, H2 = 8, 36, 12
    grid = TiltGrid(nsides=(1,))
    # two coarse prototypes (C = 2: surface and a random second channel) and three objects
    sub = box[::2, ::2, ::2]
    P = np.stack([np.stack([sub, rng.random(sub.shape).astype(np.float32) * sub]),
                  np.stack([np.roll(sub, 3, axis=1), 0.5 * np.roll(sub, 3, axis=1)])])
    V = np.ones((2,) + sub.shape, np.float32)
    X = np.clip(P[[0, 1, 0]] + 0.05 * rng.standard_normal((3,) + P.shape[1:]).astype(np.float32), 0, 1)
    W = np.ones((3,) + sub.shape, np.float32)
    aspect = np.array([ASPECT, ASPECT])
    scales = (0.93, 1.0, 1.07)
    D = FaceDistance(aspect, scales, grid)(X, W, P, V)
    for k in range(2):
        ups = stable_ups(P[k, 0], V[k], ASPECT)
        gs = copy_geometries((R2, A2, H2), ASPECT, ups, grid, solid_points(P[k, 0], V[k], ASPECT, grid))
        pc, vc = _resample_copies(np.broadcast_to(P[k], (len(gs),) + P.shape[1:]),
                                  np.broadcast_to(V[k], (len(gs),) + V.shape[1:]), gs, np.full(len(gs), ASPECT))
        pc[0], vc[0] = P[k], V[k]
        ref = pose_distances_naive(X, W, pc, vc, scales=scales).D.min(axis=1)
        np.testing.assert_allclose(D[:, k], ref, rtol=1e-4, atol=1e-6)


def test_choose_k_on_the_stable_face_matrix_joins_each_class_across_its_faces():
    # two box-like classes (invented data), every object lying on one of its class's stable faces with a random
    # yaw: the stable-face matrix's groups are the two classes (the statics above), the yaw-only matrix's are not
    from protomine.mine.choosek import choose_k
    from protomine.mine.engine import ArraySource
    rng = np.random.default_rng(1)
    X, W, aspect, _, grid = resting_boxes(rng, 9)
    src = ArraySource(X, W, np.array(aspect))
    k_faces, _ = choose_k(src, max_k=6, scales=(1.0,), random_state=0, face_grid=grid, aspect=np.array(aspect))
    assert k_faces == 2
    # the small-store rule (k_group_min = 4, k_climb) and today's default (groups of 5 counted over every object,
    # outlying ones too) keep the two classes as well: the faces do not split off
    assert choose_k(src, max_k=6, scales=(1.0,), random_state=0, face_grid=grid, aspect=np.array(aspect),
                    group_min=4, climb=True)[0] == 2
    assert choose_k(src, max_k=6, scales=(1.0,), random_state=0, face_grid=grid, aspect=np.array(aspect),
                    group_min=5, count_outlying=True)[0] == 2
    assert choose_k(src, max_k=6, scales=(1.0,), random_state=0)[0] > 2  # yaw and scale only: split by face


def test_label_search_of_exact_resting_faces_finds_a_view_resting_on_a_side():
    # the matcher's exact-face search (mine.viewsearch.ExactFaces): a box prototype and a view of it resting on a
    # side at a yaw; the view must get the minimum over the box's resting copies (reference twin:
    # posesearch.pose_distances_naive on the copies) and that copy's up, within the stable_ups tolerance above
    from protomine.mine.viewsearch import ExactFaces
    from protomine.mine.tilts import TiltBank
    box = _solid(lambda x, y, z: (np.abs(x) < 0.35) & (np.abs(y) < 0.2) & (z > 0.05) & (z < 0.5))
    P = np.stack([box, 0.5 * box])[None]
    V = np.ones((1,) + box.shape, np.float32)
    grid = TiltGrid(nsides=(1,))
    scales = (1.0,)
    bank = TiltBank(P, V, np.array([ASPECT]), scales, grid)
    ups = stable_ups(box, np.ones_like(box), ASPECT)
    side = ups[np.argmax(ups @ np.array([1.0, 0.0, 0.0]))]  # the +x side as the box's own hull gives it
    assert _angles(side[None], np.array([[1.0, 0.0, 0.0]]))[0, 0] < 16.0
    view, w = bank.copy_at(0, side)
    view = np.roll(view, 5, axis=2)[None]
    w = np.roll(w, 5, axis=1)[None]
    faces = ExactFaces.build(bank, np.array([[[0.0, 0.0, 1.0]]]), np.array([[1]]), scales)
    grid_m = bank.match(view, w)
    D, yaw, sc = grid_m.D.astype(np.float64), grid_m.yaw_deg.astype(np.float64), grid_m.scale.astype(np.float64)
    up = grid.dirs[grid_m.tilt]
    upright = grid.is_upright(grid_m.tilt)
    d_grid = float(D[0, 0])
    faces.improve(view, w, D, yaw, sc, up, upright)
    ref = pose_distances_naive(view, w, *bank.copies_at(0, faces.ups), scales=scales).D.min()
    np.testing.assert_allclose(D[0, 0], min(ref, d_grid), rtol=1e-4, atol=1e-6)
    assert D[0, 0] < 0.5 * d_grid  # the grid's nearest tilt fits a resting box far worse than its face
    assert _angles(up[0], side[None])[0, 0] < 1.0 and not upright[0, 0]
    assert abs(((yaw[0, 0] - 5 * 360 / box.shape[1]) + 180) % 360 - 180) < 1.0
