"""Camera poses as the layouts store them: unit quaternions, interpolation between stamps, conventions.

Conventions: quaternions are [qx, qy, qz, qw] (scalar last, as in the timestamped RGB-D sequence layout and
scipy.spatial.transform.Rotation), Hamilton product, active rotations of column vectors, x' = R x.  Poses are
(4, 4) row-major rigid transforms.  Our camera is OpenCV-style (x right, y down, z forward); an OpenGL-style
camera looks down -z with y up, i.e. the two differ by a rotation of pi about the camera x axis.
"""
from __future__ import annotations

import numpy as np

from ..geometry import invert_rigid
from ..rotations import matrix_to_quat, quat_to_matrix

# camera axes OpenGL (x right, y up, z backward) -> OpenCV (x right, y down, z forward)
GL_TO_CV = np.diag([1.0, -1.0, -1.0, 1.0])
CONVENTIONS = ("opencv-c2w", "opencv-w2c", "opengl-c2w", "opengl-w2c")


# one home for quaternion algebra (scalar last): protomine.rotations
quaternion_to_matrix = quat_to_matrix
matrix_to_quaternion = matrix_to_quat


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
