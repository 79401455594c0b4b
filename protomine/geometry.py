"""Geometry helpers shared by every stage.

Conventions (stated once, used everywhere):

- Units are metres; angles in the public API are degrees, internally radians where named ``*_rad``.
- Camera frame: pinhole, x right, y down, z forward.  Pixel (u, v) has u along x (columns), v along y
  (rows); the centre of the top-left pixel is (0, 0).
- Points are row vectors in arrays of shape (..., 3).  A rigid transform T (4, 4) maps a column point
  p to R p + t, so for row arrays ``points @ R.T + t``.
- ``cam_to_world`` (4, 4) takes camera coordinates to world coordinates.
- The world frame is arbitrary.  "Up" is the support plane's unit normal, pointing to the cameras' side.
- Yaw is a right-handed rotation about up (counter-clockwise seen from above), degrees in [0, 360).
- Object/plane frame: z along up; x along the *reference direction*, the projection of world +x onto
  the plane (world +y when world x is within ~25 degrees of up); y = z cross x.
  Yaw of an object is measured from that reference direction, so it is a property of the capture's
  world frame and the object, never of a camera.
"""
from __future__ import annotations

import numpy as np

EPS = 1e-9


def check_shape(name: str, a: np.ndarray, shape: tuple) -> None:
    """Raise ValueError unless ``a`` matches ``shape`` (None = any size; leading ... allowed)."""
    a_shape = tuple(np.shape(a))
    if shape and shape[0] is Ellipsis:
        tail = shape[1:]
        ok = len(a_shape) >= len(tail) and all(s is None or s == d for s, d in zip(tail, a_shape[len(a_shape) - len(tail):]))
    else:
        ok = len(a_shape) == len(shape) and all(s is None or s == d for s, d in zip(shape, a_shape))
    if not ok:
        raise ValueError(f"{name} must have shape {shape}, got {a_shape}")


# --- pinhole -------------------------------------------------------------------------------

def intrinsics_matrix(fx: float, fy: float, cx: float, cy: float) -> np.ndarray:
    """(3, 3) pinhole matrix K."""
    return np.array([[fx, 0.0, cx], [0.0, fy, cy], [0.0, 0.0, 1.0]])


def pixel_grid(width: int, height: int) -> tuple[np.ndarray, np.ndarray]:
    """u (H, W) and v (H, W) pixel coordinates."""
    v, u = np.mgrid[0:height, 0:width]
    return u.astype(np.float64), v.astype(np.float64)


def depth_to_points(depth: np.ndarray, K: np.ndarray, mask: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Back-project a metric depth image to camera points.

    depth: (H, W) metres, 0 = no reading.  mask: optional (H, W) bool.
    Returns points (N, 3) in the camera frame and their flat pixel indices (N,) into (H, W).
    """
    check_shape("depth", depth, (None, None))
    valid = depth > 0
    if mask is not None:
        valid &= mask
    idx = np.flatnonzero(valid)
    h, w = depth.shape
    v, u = np.divmod(idx, w)
    z = depth.reshape(-1)[idx].astype(np.float64)
    return pixels_to_camera(u, v, z, K), idx


def pixels_to_camera(u: np.ndarray, v: np.ndarray, z: np.ndarray, K: np.ndarray) -> np.ndarray:
    """Camera points (N, 3) of pixels (column u, row v) (N,) at depths z (N,) metres (pinhole model, K (3, 3))."""
    return np.stack([(u - K[0, 2]) * z / K[0, 0], (v - K[1, 2]) * z / K[1, 1], z], axis=1)


def camera_to_pixel(points_cam: np.ndarray, K: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Project camera points (..., 3) to pixels (..., 2) (u, v) and return their depth z (...)."""
    check_shape("points_cam", points_cam, (..., 3))
    z = points_cam[..., 2]
    zs = np.where(np.abs(z) < EPS, EPS, z)
    u = K[0, 0] * points_cam[..., 0] / zs + K[0, 2]
    v = K[1, 1] * points_cam[..., 1] / zs + K[1, 2]
    return np.stack([u, v], axis=-1), z


def transform_points(T: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Apply a (4, 4) rigid transform to row points (..., 3)."""
    check_shape("T", T, (4, 4))
    return points @ T[:3, :3].T + T[:3, 3]


def invert_rigid(T: np.ndarray) -> np.ndarray:
    """Inverse of a rigid (4, 4) transform."""
    R, t = T[:3, :3], T[:3, 3]
    out = np.eye(4)
    out[:3, :3] = R.T
    out[:3, 3] = -R.T @ t
    return out


def camera_to_world(points_cam: np.ndarray, cam_to_world_T: np.ndarray) -> np.ndarray:
    return transform_points(cam_to_world_T, points_cam)


def world_to_camera(points_world: np.ndarray, cam_to_world_T: np.ndarray) -> np.ndarray:
    return transform_points(invert_rigid(cam_to_world_T), points_world)


def world_to_pixel(points_world: np.ndarray, cam_to_world_T: np.ndarray, K: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """World points (..., 3) -> pixels (..., 2) and camera depth (...)."""
    return camera_to_pixel(world_to_camera(points_world, cam_to_world_T), K)


def is_rigid(T: np.ndarray, tol: float = 1e-4) -> str | None:
    """None if T (4, 4) is a finite rigid transform, else a reason."""
    T = np.asarray(T, dtype=np.float64)
    if T.shape != (4, 4):
        return f"expected a 4x4 matrix, got shape {T.shape}"
    if not np.all(np.isfinite(T)):
        return "contains NaN or infinity"
    if not np.allclose(T[3], [0, 0, 0, 1], atol=tol):
        return f"last row must be [0, 0, 0, 1], got {T[3].tolist()}"
    R = T[:3, :3]
    err = np.abs(R @ R.T - np.eye(3)).max()
    if err > tol:
        return f"rotation is not orthonormal (max |R R^T - I| = {err:.3g} > {tol})"
    det = np.linalg.det(R)
    if det < 0:
        return f"rotation is a reflection (det = {det:.3f}, expected +1)"
    return None


# --- yaw about an arbitrary up ----------------------------------------------------------------

def normalize(v: np.ndarray, eps: float = EPS) -> np.ndarray:
    v = np.asarray(v, dtype=np.float64)
    # max(norm, eps), not norm + eps: the latter leaves unit vectors ~1e-9 short of unit length,
    # which shows up as 1e-7 degree yaw errors and non-orthonormal bases.
    return v / np.maximum(np.linalg.norm(v, axis=-1, keepdims=True), eps)


def axis_angle_to_matrix(axis: np.ndarray, angle_rad: np.ndarray | float) -> np.ndarray:
    """Rodrigues: right-handed rotation by angle_rad (...) about unit axis (3,) -> (..., 3, 3)."""
    k = normalize(axis)
    Kx = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    a = np.asarray(angle_rad, dtype=np.float64)[..., None, None]
    return np.eye(3) + np.sin(a) * Kx + (1 - np.cos(a)) * (Kx @ Kx)


def yaw_to_matrix(yaw_deg: np.ndarray | float, up: np.ndarray) -> np.ndarray:
    """Rotation (..., 3, 3) by yaw_deg about ``up`` (right-handed)."""
    return axis_angle_to_matrix(up, np.deg2rad(yaw_deg))


def reference_direction(up: np.ndarray) -> np.ndarray:
    """The documented yaw-zero direction: world +x projected onto the plane (world +y if x is near up)."""
    up = normalize(up)
    ref = np.array([1.0, 0.0, 0.0])
    if abs(ref @ up) > 0.9:
        ref = np.array([0.0, 1.0, 0.0])
    return normalize(ref - (ref @ up) * up)


def plane_basis(up: np.ndarray) -> np.ndarray:
    """(3, 3) matrix whose rows are the object-frame axes x, y, z (= up) in world coordinates."""
    z = normalize(up)
    x = reference_direction(z)
    y = np.cross(z, x)
    return np.stack([x, y, z])


def matrix_to_yaw(R: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Yaw (degrees in [0, 360)) of rotation(s) R (..., 3, 3) about up; the tilt part is ignored.

    Measured as the angle by which R turns the reference direction, seen in the plane.
    """
    B = plane_basis(up)
    d = R @ B[0]                      # (..., 3) rotated reference direction
    ang = np.arctan2(d @ B[1], d @ B[0])
    return np.mod(np.rad2deg(ang), 360.0)


def direction_to_yaw(direction: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Yaw (degrees in [0, 360)) of world direction(s) (..., 3) projected onto the plane."""
    B = plane_basis(up)
    return np.mod(np.rad2deg(np.arctan2(direction @ B[1], direction @ B[0])), 360.0)


def world_to_object(points_world: np.ndarray, origin: np.ndarray, up: np.ndarray) -> np.ndarray:
    """World points (..., 3) -> object frame (origin on the plane, z = up, x = reference direction)."""
    B = plane_basis(up)
    return (points_world - origin) @ B.T


def object_to_world(points_obj: np.ndarray, origin: np.ndarray, up: np.ndarray) -> np.ndarray:
    B = plane_basis(up)
    return points_obj @ B + origin


def angle_diff_deg(a: np.ndarray, b: np.ndarray, period: float = 360.0) -> np.ndarray:
    """Smallest absolute difference of angles a, b (degrees) modulo ``period`` (inf period = 0)."""
    if not np.isfinite(period) or period <= 0:
        return np.zeros(np.broadcast(np.asarray(a), np.asarray(b)).shape)
    d = np.mod(np.asarray(a, dtype=np.float64) - b, period)
    return np.minimum(d, period - d)
