"""Lifting an object that touches another: the neighbour's surface inside the object's grid.

The depth images are ray-cast here from their definition (a pinhole camera, the slab test for axis-aligned boxes,
a ray-plane intersection for the table), not with the demo renderer, and the expected answer is the same object
lifted from a scene where it stands alone: free-space carving (every cell a camera ray crosses before its
reading is empty, Curless & Levoy, SIGGRAPH 1996) says what the neighbour's readings say about the object, no
more."""
from __future__ import annotations

from dataclasses import replace
from types import SimpleNamespace

import numpy as np

from protomine.ingest.proposals import FrameData, Proposal, SceneObjects
from protomine.ingest.volume import Grid, ObjectFrame, View, lift
from protomine.scenes.render import look_at

W, H, F = 160, 120, 150.0
K = np.array([[F, 0, (W - 1) / 2], [0, F, (H - 1) / 2], [0, 0, 1.0]])
BOX = (np.array([-0.04, -0.03, 0.0]), np.array([0.04, 0.03, 0.10]))        # the object, base centre at 0
NEIGHBOUR = (np.array([0.041, -0.02, 0.0]), np.array([0.10, 0.02, 0.06]))   # lower, 1 mm from its +x side


def _cast(T: np.ndarray, boxes: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Depth (H, W) along the optical axis and an id image (0 table, k box k-1) of the table z = 0 and boxes."""
    v, u = np.mgrid[0:H, 0:W]
    d_cam = np.stack([(u - K[0, 2]) / F, (v - K[1, 2]) / F, np.ones_like(u, float)], -1).reshape(-1, 3)
    d = d_cam @ T[:3, :3].T                        # world direction per unit camera depth
    o = T[:3, 3]
    t = np.where(d[:, 2] < 0, -o[2] / np.where(d[:, 2] < 0, d[:, 2], -1.0), np.inf)
    ids = np.zeros(len(d), int)
    with np.errstate(divide="ignore", invalid="ignore"):
        for k, (lo, hi) in enumerate(boxes):
            t1, t2 = (lo - o) / d, (hi - o) / d
            near = np.nanmax(np.minimum(t1, t2), axis=1)
            far = np.nanmin(np.maximum(t1, t2), axis=1)
            hit = (near <= far) & (near > 0) & (near < t)
            t = np.where(hit, near, t)
            ids[hit] = k + 1
    return np.where(np.isfinite(t), t, 0.0).reshape(H, W), ids.reshape(H, W)


def _box_scene():
    """The box alone and beside its neighbour, seen from one camera: (alone depth, touching depth, the box's own
    pixels, the neighbour's pixels as a mask, rgb, the box's object frame, the grid)."""
    T = look_at(np.array([0.0, -0.45, 0.40]), np.array([0.0, 0.0, 0.05]), np.array([0.0, 0.0, 1.0]))
    alone, ids_alone = _cast(T, [BOX])
    touch, ids_touch = _cast(T, [BOX, NEIGHBOUR])
    own = np.flatnonzero(ids_touch.reshape(-1) == 1)
    # construction: the neighbour hides none of the object from this camera, so its pixels are the same
    np.testing.assert_array_equal(own, np.flatnonzero(ids_alone.reshape(-1) == 1))
    theirs = ids_touch.reshape(-1) == 2
    rgb = np.full((H, W, 3), 128, np.uint8)
    frame = ObjectFrame(origin=np.zeros(3), up=np.array([0.0, 0.0, 1.0]), radius=0.05, height=0.10)
    return T, alone, touch, own, theirs, rgb, frame, Grid(radial_bins=8, azimuth_bins=36, height_bins=12)


def test_a_touching_neighbours_surface_is_unobserved_not_a_wall():
    T, alone, touch, own, theirs, rgb, frame, grid = _box_scene()
    ref = lift([View(alone, rgb, K, T, own)], frame, grid).reshape(6, -1)
    off = lift([View(touch, rgb, K, T, own, None, theirs)], frame, grid).reshape(6, -1)
    on = lift([View(touch, rgb, K, T, own, None, theirs)], frame, replace(grid, others_unseen=True)).reshape(6, -1)
    # without the setting the neighbour's surface reads "seen, not free" where the object alone shows free space
    wall = (off[2] > 0) & (off[1] == 0) & (off[0] == 0) & (ref[1] == 1)
    assert wall.sum() >= 10
    # with it: every cell it calls observed is observed alone too, with the same surface and free space
    seen = on[2] > 0
    assert seen.sum() > 200
    assert (ref[2][seen] > 0).all()
    np.testing.assert_array_equal(on[:2, seen], ref[:2, seen])
    assert not seen[wall].any()
    # the free space in front of the neighbour stays (its rays crossed those cells before they met it)
    assert ((on[1] == 1) & (off[1] == 1)).sum() == (off[1] == 1).sum()


def test_scene_views_hand_each_object_the_pixels_the_others_hold():
    depth = np.ones((4, 5))
    fd = FrameData("f0", depth, np.zeros((4, 5, 3), np.uint8), None, np.eye(4), np.zeros((0, 3)),
                   np.zeros(0, int), np.zeros(0, bool))
    frame = ObjectFrame(np.zeros(3), np.array([0, 0, 1.0]), 0.1, 0.1)
    a = Proposal("c/a", "a", frame, np.zeros(3), 3, {"f0": np.array([0, 1, 2])})
    b = Proposal("c/b", "b", frame, np.zeros(3), 2, {"f0": np.array([7, 8])})
    c = Proposal("c/c", "c", frame, np.zeros(3), 0, {})
    scene = SceneObjects(SimpleNamespace(intrinsics=SimpleNamespace(K=K)), None, [fd], [a, b, c])
    (va,) = scene.views(a, others=True)
    (vb,) = scene.views(b, others=True)
    assert np.flatnonzero(va.others).tolist() == [7, 8]
    assert np.flatnonzero(vb.others).tolist() == [0, 1, 2]
    assert scene.views(c, others=True) == []


def test_with_others_free_the_touching_object_lifts_as_it_stands_alone():
    """[volume] others_free: the neighbour's surface inside the grid reads free of the object.  Here the neighbour
    hides none of the object, so carving (Curless & Levoy 1996) from the scene without the neighbour gives the
    expected volume on every cell the scene with it observes (the cells behind the neighbour stay unobserved)."""
    T, alone, touch, own, theirs, rgb, frame, grid = _box_scene()
    ref = lift([View(alone, rgb, K, T, own)], frame, grid).reshape(6, -1)
    off = lift([View(touch, rgb, K, T, own, None, theirs)], frame, grid).reshape(6, -1)
    on = lift([View(touch, rgb, K, T, own, None, theirs)], frame, replace(grid, others_free=True)).reshape(6, -1)
    assert (np.abs(off[:3] - ref[:3]).max(0) > 0).sum() >= 10       # without it: the wall
    seen = on[2] > 0
    assert seen.sum() > 200 and (ref[2][seen] > 0).all()
    np.testing.assert_array_equal(on[:3, seen], ref[:3, seen])       # surface, free, observed: as alone
    unseen = replace(grid, others_unseen=True)
    assert seen.sum() > (lift([View(touch, rgb, K, T, own, None, theirs)], frame, unseen)[2] > 0).sum()
    # it wins over others_unseen (both set: the cells read free, not unobserved)
    both = lift([View(touch, rgb, K, T, own, None, theirs)], frame,
                replace(grid, others_free=True, others_unseen=True)).reshape(6, -1)
    np.testing.assert_array_equal(both, on)
