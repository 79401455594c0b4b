"""Camera poses as the layouts store them: unit quaternions, interpolation between stamps, conventions.

Conventions: quaternions are [qx, qy, qz, qw] (scalar last, as in the timestamped RGB-D sequence layout and
scipy.spatial.transform.Rotation), Hamilton product, active rotations of column vectors, x' = R x.  Poses are
(4, 4) row-major rigid transforms.  Our camera is OpenCV-style (x right, y down, z forward); an OpenGL-style
camera looks down -z with y up, i.e. the two differ by a rotation of pi about the camera x axis.
"""
from __future__ import annotations

import numpy as np

from ..geometry import invert_rigid

# camera axes OpenGL (x right, y up, z backward) -> OpenCV (x right, y down, z forward)
GL_TO_CV = np.diag([1.0, -1.0, -1.0, 1.0])
CONVENTIONS = ("opencv-c2w", "opencv-w2c", "opengl-c2w", "opengl-w2c")


def quaternion_to_matrix(q: np.ndarray) -> np.ndarray:
    """(..., 4) quaternions [x, y, z, w] (normalised here) -> (..., 3, 3) rotation matrices."""
    q = np.asarray(q, dtype=np.float64)
    q = q / np.linalg.norm(q, axis=-1, keepdims=True)
    x, y, z, w = np.moveaxis(q, -1, 0)
    return np.stack([
        np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)], -1),
        np.stack([2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)], -1),
        np.stack([2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)], -1),
    ], -2)


def matrix_to_quaternion(R: np.ndarray) -> np.ndarray:
    """(..., 3, 3) rotations -> (..., 4) unit quaternions [x, y, z, w] with w >= 0 (Shepperd's method:
    the largest of the four squared components is taken first, which keeps the square root well-conditioned)."""
    R = np.asarray(R, dtype=np.float64)
    m = R.reshape(-1, 3, 3)
    tr = np.trace(m, axis1=1, axis2=2)
    cand = np.stack([1 + 2 * m[:, 0, 0] - tr, 1 + 2 * m[:, 1, 1] - tr, 1 + 2 * m[:, 2, 2] - tr, 1 + tr], -1)  # 4 q_i^2
    k = cand.argmax(-1)
    out = np.zeros((len(m), 4))
    for i in range(len(m)):
        a, r = k[i], m[i]
        s = 2.0 * np.sqrt(max(cand[i, a], 1e-300))
        if a == 3:
            q = [(r[2, 1] - r[1, 2]) / s, (r[0, 2] - r[2, 0]) / s, (r[1, 0] - r[0, 1]) / s, s / 4]
        elif a == 0:
            q = [s / 4, (r[0, 1] + r[1, 0]) / s, (r[0, 2] + r[2, 0]) / s, (r[2, 1] - r[1, 2]) / s]
        elif a == 1:
            q = [(r[0, 1] + r[1, 0]) / s, s / 4, (r[1, 2] + r[2, 1]) / s, (r[0, 2] - r[2, 0]) / s]
        else:
            q = [(r[0, 2] + r[2, 0]) / s, (r[1, 2] + r[2, 1]) / s, s / 4, (r[1, 0] - r[0, 1]) / s]
        out[i] = q
    out *= np.where(out[:, 3:] < 0, -1.0, 1.0)
    out /= np.linalg.norm(out, axis=1, keepdims=True)
    return out.reshape(R.shape[:-2] + (4,))


def slerp(q0: np.ndarray, q1: np.ndarray, t: float) -> np.ndarray:
    """Spherical linear interpolation (Shoemake 1985) between unit quaternions (4,) at t in [0, 1], along
    the shorter arc (q and -q are one rotation)."""
    q0 = np.asarray(q0, dtype=np.float64) / np.linalg.norm(q0)
    q1 = np.asarray(q1, dtype=np.float64) / np.linalg.norm(q1)
    c = float(q0 @ q1)
    if c < 0:
        q1, c = -q1, -c
    if c > 0.9995:                                    # nearly equal: linear, then renormalise
        q = q0 + t * (q1 - q0)
        return q / np.linalg.norm(q)
    theta = np.arccos(c)
    return (np.sin((1 - t) * theta) * q0 + np.sin(t * theta) * q1) / np.sin(theta)


def interpolate_pose(stamps: np.ndarray, positions: np.ndarray, quats: np.ndarray, t: float) -> np.ndarray | None:
    """(4, 4) pose at time t between the bracketing stamps (N,) sorted: translation linear, rotation slerp.
    None when t lies outside [stamps[0], stamps[-1]]."""
    if len(stamps) == 0 or t < stamps[0] or t > stamps[-1]:
        return None
    j = int(np.searchsorted(stamps, t, side="right"))
    i = max(j - 1, 0)
    j = min(j, len(stamps) - 1)
    a = 0.0 if stamps[j] == stamps[i] else (t - stamps[i]) / (stamps[j] - stamps[i])
    T = np.eye(4)
    T[:3, :3] = quaternion_to_matrix(slerp(quats[i], quats[j], a))
    T[:3, 3] = (1 - a) * positions[i] + a * positions[j]
    return T


def to_cam_to_world(T: np.ndarray, convention: str) -> np.ndarray:
    """A pose (4, 4) in ``convention`` (see CONVENTIONS: camera axes, then direction) -> our cam_to_world."""
    axes, direction = convention.split("-")
    T = np.asarray(T, dtype=np.float64)
    c2w = invert_rigid(T) if direction == "w2c" else T
    return c2w @ GL_TO_CV if axes == "opengl" else c2w
