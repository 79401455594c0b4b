"""Geometry conventions: pinhole round trips (hand-worked) and rotation helpers against scipy."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine import geometry as G


def test_pinhole_projection_hand_worked():
    K = G.intrinsics_matrix(100.0, 120.0, 50.0, 40.0)
    # hand-worked: u = 100 * 0.2 / 2 + 50 = 60, v = 120 * (-0.1) / 2 + 40 = 34
    uv, z = G.camera_to_pixel(np.array([0.2, -0.1, 2.0]), K)
    np.testing.assert_allclose(uv, [60.0, 34.0])
    assert z == 2.0


def test_back_projection_round_trip_hand_worked():
    K = G.intrinsics_matrix(100.0, 120.0, 50.0, 40.0)
    depth = np.zeros((80, 100))
    depth[34, 60] = 2.0
    pts, idx = G.depth_to_points(depth, K)
    assert idx.tolist() == [34 * 100 + 60]
    np.testing.assert_allclose(pts[0], [0.2, -0.1, 2.0], atol=1e-12)   # hand-worked inverse of the test above


def test_world_pixel_round_trip():
    rng = np.random.default_rng(1)
    T = np.eye(4)
    T[:3, :3] = Rotation.random(random_state=rng).as_matrix()
    T[:3, 3] = rng.normal(size=3)
    K = G.intrinsics_matrix(300.0, 300.0, 159.5, 119.5)
    cam = np.column_stack([rng.uniform(-0.3, 0.3, (50, 2)), rng.uniform(0.5, 2.0, 50)])
    world = G.camera_to_world(cam, T)
    uv, z = G.world_to_pixel(world, T, K)
    np.testing.assert_allclose(z, cam[:, 2], atol=1e-12)
    np.testing.assert_allclose(G.world_to_camera(world, T), cam, atol=1e-12)
    back = np.column_stack([(uv[:, 0] - 159.5) * z / 300.0, (uv[:, 1] - 119.5) * z / 300.0, z])
    np.testing.assert_allclose(back, cam, atol=1e-12)
    np.testing.assert_allclose(G.invert_rigid(T), np.linalg.inv(T), atol=1e-12)   # numpy as reference


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_yaw_to_matrix_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    up = G.normalize(rng.normal(size=3))
    yaw = rng.uniform(-400, 400, 7)
    ours = G.yaw_to_matrix(yaw, up)
    ref = Rotation.from_rotvec(np.deg2rad(yaw)[:, None] * up).as_matrix()   # scipy as reference
    np.testing.assert_allclose(ours, ref, atol=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_matrix_yaw_round_trip_and_tilt_ignored(seed):
    rng = np.random.default_rng(seed)
    up = G.normalize(rng.normal(size=3))
    yaw = rng.uniform(0, 360, 20)
    R = G.yaw_to_matrix(yaw, up)
    np.testing.assert_allclose(G.angle_diff_deg(G.matrix_to_yaw(R, up), yaw), 0.0, atol=1e-9)
    d = R @ G.reference_direction(up)
    np.testing.assert_allclose(G.angle_diff_deg(G.direction_to_yaw(d, up), yaw), 0.0, atol=1e-9)
    # a small tilt about an in-plane axis does not change the yaw much (scipy builds the tilt)
    tilt = Rotation.from_rotvec(np.deg2rad(3.0) * G.plane_basis(up)[1]).as_matrix()
    assert G.angle_diff_deg(G.matrix_to_yaw(R[0] @ tilt, up), yaw[0]) < 0.5


def test_plane_basis_right_handed_and_reference_direction():
    rng = np.random.default_rng(5)
    for up in [np.array([1.0, 0.0, 0.0]), np.array([0.0, 0.0, 1.0]), *rng.normal(size=(5, 3))]:
        B = G.plane_basis(up)
        np.testing.assert_allclose(B @ B.T, np.eye(3), atol=1e-9)
        assert np.linalg.det(B) == pytest.approx(1.0)
        np.testing.assert_allclose(B[2], G.normalize(up), atol=1e-9)
    # world +x projected onto the plane (hand-worked for up = +z and up = +y)
    np.testing.assert_allclose(G.reference_direction(np.array([0.0, 0.0, 1.0])), [1.0, 0.0, 0.0], atol=1e-9)
    np.testing.assert_allclose(G.reference_direction(np.array([0.0, 1.0, 0.0])), [1.0, 0.0, 0.0], atol=1e-9)
    # near-vertical x falls back to world +y (documented convention)
    np.testing.assert_allclose(G.reference_direction(np.array([1.0, 0.0, 0.0])), [0.0, 1.0, 0.0], atol=1e-9)


def test_yaw_is_counter_clockwise_seen_from_above():
    up = np.array([0.0, 0.0, 1.0])
    assert G.direction_to_yaw(np.array([0.0, 1.0, 0.0]), up) == pytest.approx(90.0)   # hand-worked
    assert G.direction_to_yaw(np.array([0.0, -1.0, 0.0]), up) == pytest.approx(270.0)


def test_world_object_round_trip():
    rng = np.random.default_rng(7)
    up = G.normalize(rng.normal(size=3))
    origin = rng.normal(size=3)
    p = rng.normal(size=(10, 3))
    np.testing.assert_allclose(G.object_to_world(G.world_to_object(p, origin, up), origin, up), p, atol=1e-12)
    np.testing.assert_allclose(G.world_to_object(origin + 0.3 * G.normalize(up), origin, up), [0, 0, 0.3], atol=1e-9)


def test_is_rigid_rejects_scale_reflection_nan():
    R = Rotation.from_euler("xyz", [10, 20, 30], degrees=True).as_matrix()
    T = np.eye(4)
    T[:3, :3] = R
    assert G.is_rigid(T) is None
    assert "orthonormal" in G.is_rigid(np.diag([1.5, 1.5, 1.5, 1.0]))
    assert "reflection" in G.is_rigid(np.diag([1.0, 1.0, -1.0, 1.0]))
    bad = T.copy()
    bad[0, 0] = np.nan
    assert "NaN" in G.is_rigid(bad)


def test_angle_diff_with_period():
    assert G.angle_diff_deg(350.0, 10.0) == pytest.approx(20.0)
    assert G.angle_diff_deg(100.0, 5.0, period=90.0) == pytest.approx(5.0)
    assert G.angle_diff_deg(123.0, 5.0, period=float("inf")) == 0.0
