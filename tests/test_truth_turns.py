"""The demo truth's turn symmetries (demo_scenes.items ``@turns``) and the pose metrics modulo them.

References: the shapes' own signed distance functions (a symmetry maps the surface onto itself: the turned surface
points stay on the surface; common practice); scipy.spatial.transform.Rotation for the rotations.
"""
from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.spatial.transform import Rotation

from demo_scenes.items import instance_turns, load_item_classes, make_instance

GRID_M = 0.002


def _surface_and_centroid(shape):
    # cell centres of an even split of the box: symmetric about its centre, none on a face of the box
    axes = [lo + (np.arange(n) + 0.5) * (hi - lo) / n
            for lo, hi, n in ((lo, hi, max(1, int(round((hi - lo) / GRID_M)))) for lo, hi in zip(shape.lo, shape.hi))]
    g = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 3)
    v = shape(torch.tensor(g, dtype=torch.float32)).numpy()
    surf = g[np.abs(v) < 0.75 * GRID_M]
    return surf[:: max(1, len(surf) // 3000)], g[v < 0].mean(axis=0)


def _excess(shape, R: np.ndarray, size: float) -> float:
    """95th percentile of |sdf| of the surface points turned by R about the solid's centroid, less the unturned
    points', over the instance's size."""
    surf, c = _surface_and_centroid(shape)
    base = np.percentile(np.abs(shape(torch.tensor(surf, dtype=torch.float32)).numpy()), 95)
    q = (surf - c) @ R.T + c
    return float((np.percentile(np.abs(shape(torch.tensor(q, dtype=torch.float32)).numpy()), 95) - base) / size)


@pytest.mark.parametrize("name", ["spool", "mallet"])
def test_registered_turns_are_shape_symmetries(name):
    item = {c.name: c for c in load_item_classes()}[name]
    rng = np.random.default_rng(1)
    for _ in range(3):
        inst = make_instance(item, rng)
        turns = instance_turns(inst)
        assert turns, name
        for order, axis in turns:
            R = Rotation.from_rotvec(2 * np.pi / order * np.asarray(axis)).as_matrix()
            assert _excess(inst.shape, R, inst.size) < 0.01
            # a turn about an axis 10 degrees off is no symmetry: the check can fail
            off = Rotation.from_rotvec(np.deg2rad(10) * np.cross(axis, [0, 0, 1]) / np.linalg.norm(np.cross(axis, [0, 0, 1])))
            R_off = Rotation.from_rotvec(2 * np.pi / order * off.apply(axis)).as_matrix()
            assert _excess(inst.shape, R_off, inst.size) > 0.01


def test_jug_has_no_turns_and_its_flip_is_no_symmetry():
    item = {c.name: c for c in load_item_classes()}["jug"]
    inst = make_instance(item, np.random.default_rng(2))
    assert instance_turns(inst) == []
    assert _excess(inst.shape, Rotation.from_euler("x", 180, degrees=True).as_matrix(), inst.size) > 0.01


def test_metrics_take_poses_modulo_turns_per_object():
    # scipy Rotation as the reference: a spool (continuous about z) turned end for end, a mallet half turned about its
    # own (per-instance) handle axis, each besides a residual of 7 degrees about a horizontal axis
    from protomine.audit.metrics import AboutZ, rotation_error_deg, rotation_offset
    from protomine.mine.evaluate import truth_group
    rng = np.random.default_rng(0)
    n = 6
    R_true = Rotation.random(n, random_state=1).as_matrix()
    # spool: prediction = truth turned end for end (about x), then turned about z by anything, plus 7 degrees about x
    flip = Rotation.from_euler("x", 180, degrees=True).as_matrix()
    about_z = Rotation.from_euler("z", rng.uniform(0, 360, (n, 1)), degrees=True).as_matrix()
    tip = Rotation.from_euler("y", 7, degrees=True).as_matrix()
    spool = [{"symmetry": "continuous", "turns": [(2, np.array([1.0, 0.0, 0.0]))]} for _ in range(n)]
    pred = R_true @ flip @ about_z @ tip
    group = AboutZ(np.stack([truth_group(t).reps for t in spool]))
    assert isinstance(truth_group(spool[0]), AboutZ)
    np.testing.assert_allclose(rotation_error_deg(pred, R_true, np.eye(3), group), 7.0, atol=1e-6)
    np.testing.assert_allclose(rotation_error_deg(pred, R_true, np.eye(3), None), 173.0, atol=1e-6)   # the flip counts without
    # mallet: each instance its own axis; half turns about the right axis are no error, about another axis they are
    axes = np.stack([[1.0, 0.0, t] for t in np.tan(np.deg2rad(rng.uniform(4, 8, n)))])
    axes /= np.linalg.norm(axes, axis=1, keepdims=True)
    mallet = [{"symmetry": "none", "turns": [(2, a)]} for a in axes]
    half = Rotation.from_rotvec(np.pi * axes).as_matrix()
    pred = R_true @ half
    G = np.stack([truth_group(t) for t in mallet])                                   # (n, 2, 3, 3)
    np.testing.assert_allclose(rotation_error_deg(pred, R_true, np.eye(3), G), 0.0, atol=1e-5)
    shared = truth_group({"symmetry": "none", "turns": [(2, np.array([1.0, 0.0, 0.0]))]})   # one axis for all: wrong
    assert np.all(rotation_error_deg(pred, R_true, np.eye(3), shared) > 7.0)
    O = Rotation.from_euler("xyz", [10, 20, 30], degrees=True).as_matrix()
    O_hat = rotation_offset(pred @ O.T, R_true, G)       # the offset, found modulo each member's own group
    np.testing.assert_allclose(rotation_error_deg(pred @ O.T, R_true, O_hat, G), 0.0, atol=1e-5)


@pytest.mark.parametrize("symmetry", ["none", "continuous"])
def test_members_group_takes_rows_with_and_without_turns(symmetry):
    # a class where only some instances list a turn (an older truth file, a shape whose turn depends on its draw):
    # each row keeps its own group; the error of every member is the one its own row's group gives (scipy Rotation
    # as the reference for the rotations)
    from protomine.audit.metrics import AboutZ, rotation_error_deg
    from protomine.mine.evaluate import _members_group, truth_group
    rows = [{"symmetry": symmetry, "turns": [(2, np.array([1.0, 0.0, 0.0]))]},
            {"symmetry": symmetry, "turns": []},
            {"symmetry": symmetry}]
    R_true = Rotation.random(3, random_state=4).as_matrix()
    flip = Rotation.from_euler("x", 180, degrees=True).as_matrix()
    tip = Rotation.from_euler("x", 5, degrees=True).as_matrix()          # 185 degrees about x in all
    pred = R_true @ flip @ tip
    group = _members_group(rows)
    assert isinstance(group, AboutZ) == (symmetry == "continuous")
    err = rotation_error_deg(pred, R_true, np.eye(3), group)
    one = [rotation_error_deg(pred[i:i + 1], R_true[i:i + 1], np.eye(3), truth_group(r))[0] for i, r in enumerate(rows)]
    np.testing.assert_allclose(err, one, atol=1e-6)
    np.testing.assert_allclose(err, [5.0, 175.0, 175.0], atol=1e-6)   # the flip is a symmetry of the first row only
