"""Rotation algebra (quaternions, geodesic angles) and the up-direction grid of the tilt search.

Conventions (stated once, used by mining, labelling, one-shot search and the audit):

- Rotation matrices R (..., 3, 3) act on column vectors: x' = R x (row arrays: ``x @ R.T``).
- Quaternions are unit [qx, qy, qz, qw] (scalar last, Hamilton product), as in capture-format.md:
  a full pose is the rotation R with x_world = R x_prototype + t.  q and -q are the same rotation;
  :func:`matrix_to_quat` returns the one with qw >= 0.
- Geodesic angle between rotations A and B: the rotation angle of A^T B, in degrees in [0, 180].
- Tilt: the rotation that takes an up direction u (a unit vector in the prototype frame, the prototype's
  direction that points up when the object rests on that face) to +z by the shortest arc
  (:func:`tilt_matrix`).  Every rotation is Rz(yaw) @ tilt_matrix(u) with u = R^T e_z
  (:func:`tilt_yaw_to_matrix`, :func:`matrix_to_tilt_yaw`); for u = +z this is today's yaw about up.
- Up-direction grid: HEALPix pixel centres (Gorski et al., ApJ 622, 759, 2005, section 4, ring scheme):
  12 N_side^2 directions of equal area, mean spacing sqrt(4 pi / N_pix) (58.6 / N_side degrees),
  rotated as a whole so that its first pixel centre lies at +z (so the upright pose, the identity tilt,
  is always a member; a rigid rotation keeps the areas and the spacing).
"""
from __future__ import annotations

import numpy as np

EPS = 1e-12


# --- quaternions -----------------------------------------------------------------------------

def quat_to_matrix(q: np.ndarray) -> np.ndarray:
    """Unit quaternions (..., 4) [x, y, z, w] -> rotation matrices (..., 3, 3)."""
    q = np.asarray(q, np.float64)
    q = q / np.maximum(np.linalg.norm(q, axis=-1, keepdims=True), EPS)
    x, y, z, w = np.moveaxis(q, -1, 0)
    return np.stack([
        np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)], -1),
        np.stack([2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)], -1),
        np.stack([2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)], -1),
    ], -2)


def matrix_to_quat(R: np.ndarray) -> np.ndarray:
    """Rotation matrices (..., 3, 3) -> unit quaternions (..., 4) [x, y, z, w] with w >= 0.

    Shepperd's method: the largest of (w, x, y, z) squared is taken from the diagonal, the others from
    the off-diagonal sums, so there is no loss of precision near 180 degrees.
    """
    R = np.asarray(R, np.float64)
    m = R.reshape(-1, 3, 3)
    tr = np.trace(m, axis1=1, axis2=2)
    cand = np.stack([tr, m[:, 0, 0], m[:, 1, 1], m[:, 2, 2]], 1)
    pick = np.argmax(cand, axis=1)
    q = np.empty((len(m), 4))
    for i in range(len(m)):
        a = m[i]
        if pick[i] == 0:
            s = 2.0 * np.sqrt(max(1.0 + tr[i], EPS))
            q[i] = [(a[2, 1] - a[1, 2]) / s, (a[0, 2] - a[2, 0]) / s, (a[1, 0] - a[0, 1]) / s, 0.25 * s]
        elif pick[i] == 1:
            s = 2.0 * np.sqrt(max(1.0 + a[0, 0] - a[1, 1] - a[2, 2], EPS))
            q[i] = [0.25 * s, (a[0, 1] + a[1, 0]) / s, (a[0, 2] + a[2, 0]) / s, (a[2, 1] - a[1, 2]) / s]
        elif pick[i] == 2:
            s = 2.0 * np.sqrt(max(1.0 - a[0, 0] + a[1, 1] - a[2, 2], EPS))
            q[i] = [(a[0, 1] + a[1, 0]) / s, 0.25 * s, (a[1, 2] + a[2, 1]) / s, (a[0, 2] - a[2, 0]) / s]
        else:
            s = 2.0 * np.sqrt(max(1.0 - a[0, 0] - a[1, 1] + a[2, 2], EPS))
            q[i] = [(a[0, 2] + a[2, 0]) / s, (a[1, 2] + a[2, 1]) / s, 0.25 * s, (a[1, 0] - a[0, 1]) / s]
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    q *= np.where(q[:, 3:] < 0, -1.0, 1.0)
    return q.reshape(R.shape[:-2] + (4,))


def quat_multiply(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Hamilton product a * b of quaternions (..., 4) [x, y, z, w]: the rotation 'b, then a'."""
    a = np.asarray(a, np.float64)
    b = np.asarray(b, np.float64)
    ax, ay, az, aw = np.moveaxis(a, -1, 0)
    bx, by, bz, bw = np.moveaxis(b, -1, 0)
    return np.stack([aw * bx + ax * bw + ay * bz - az * by,
                     aw * by - ax * bz + ay * bw + az * bx,
                     aw * bz + ax * by - ay * bx + az * bw,
                     aw * bw - ax * bx - ay * by - az * bz], -1)


def geodesic_deg(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Rotation angle of A^T B in degrees [0, 180] for matrices (..., 3, 3)."""
    A = np.asarray(A, np.float64)
    B = np.asarray(B, np.float64)
    tr = np.einsum("...ji,...ji->...", A, B)  # trace(A^T B)
    return np.rad2deg(np.arccos(np.clip((tr - 1.0) / 2.0, -1.0, 1.0)))


def quat_geodesic_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Geodesic angle in degrees between unit quaternions (..., 4): 2 acos |<a, b>|."""
    d = np.abs(np.sum(np.asarray(a, np.float64) * np.asarray(b, np.float64), axis=-1))
    return np.rad2deg(2.0 * np.arccos(np.clip(d, 0.0, 1.0)))


def yaw_matrix(yaw_deg: np.ndarray | float) -> np.ndarray:
    """Rotation (..., 3, 3) by yaw_deg about +z (right-handed)."""
    a = np.deg2rad(np.asarray(yaw_deg, np.float64))
    c, s = np.cos(a), np.sin(a)
    z, o = np.zeros_like(a), np.ones_like(a)
    return np.stack([np.stack([c, -s, z], -1), np.stack([s, c, z], -1), np.stack([z, z, o], -1)], -2)


# --- tilts -----------------------------------------------------------------------------------

def tilt_matrix(up: np.ndarray) -> np.ndarray:
    """Shortest-arc rotation(s) (..., 3, 3) taking unit direction(s) ``up`` (..., 3) to +z.

    For up = -z (no unique shortest arc) the rotation is 180 degrees about +x.
    """
    u = np.asarray(up, np.float64)
    u = u / np.maximum(np.linalg.norm(u, axis=-1, keepdims=True), EPS)
    flat = u.reshape(-1, 3)
    c = flat[:, 2]
    down = c < -1.0 + 1e-12
    # K = [v x e_z]_x with v x e_z = (v_y, -v_x, 0) (unnormalised; |k| = sin angle), all directions at once
    K = np.zeros((len(flat), 3, 3))
    K[:, 0, 2], K[:, 1, 2] = -flat[:, 0], -flat[:, 1]
    K[:, 2, 0], K[:, 2, 1] = flat[:, 0], flat[:, 1]
    out = np.eye(3) + K + K @ K / np.where(down, 1.0, 1.0 + c)[:, None, None]
    out[down] = np.diag([1.0, -1.0, -1.0])
    return out.reshape(u.shape[:-1] + (3, 3))


def tilt_yaw_to_matrix(up: np.ndarray, yaw_deg: np.ndarray | float) -> np.ndarray:
    """Rz(yaw) @ tilt_matrix(up): the prototype resting with ``up`` pointing up, then turned by yaw."""
    return yaw_matrix(yaw_deg) @ tilt_matrix(up)


def matrix_to_tilt_yaw(R: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`tilt_yaw_to_matrix`: up = R^T e_z (..., 3), yaw (...) degrees in [0, 360)."""
    R = np.asarray(R, np.float64)
    up = R[..., 2, :]
    Y = R @ np.swapaxes(tilt_matrix(up), -1, -2)  # a rotation about z
    return up, np.mod(np.rad2deg(np.arctan2(Y[..., 1, 0], Y[..., 0, 0])), 360.0)


# --- HEALPix up-direction grid ------------------------------------------------------------------

def healpix_centres(nside: int) -> np.ndarray:
    """(12 nside^2, 3) pixel-centre unit vectors of the HEALPix ring scheme (Gorski et al. 2005, sec. 4).

    Rings i = 1 .. 4 nside - 1 from the north pole: polar caps (i < nside) hold 4 i pixels at
    z = 1 - i^2 / (3 nside^2), phi = pi / (2 i) (j - 1/2); the equatorial belt (nside <= i <= 3 nside)
    holds 4 nside pixels at z = 4/3 - 2 i / (3 nside), phi = pi / (2 nside) (j - 1 + s / 2),
    s = (i - nside + 1) mod 2; the south cap mirrors the north.
    """
    if nside < 1:
        raise ValueError(f"nside must be >= 1, got {nside}")
    z_all, phi_all = [], []
    for i in range(1, 4 * nside):
        if i < nside:
            z = 1.0 - i * i / (3.0 * nside * nside)
            phi = np.pi / (2 * i) * (np.arange(1, 4 * i + 1) - 0.5)
        elif i <= 3 * nside:
            z = 4.0 / 3.0 - 2.0 * i / (3.0 * nside)
            s = (i - nside + 1) % 2
            phi = np.pi / (2 * nside) * (np.arange(1, 4 * nside + 1) - 1 + s / 2.0)
        else:
            ii = 4 * nside - i
            z = -(1.0 - ii * ii / (3.0 * nside * nside))
            phi = np.pi / (2 * ii) * (np.arange(1, 4 * ii + 1) - 0.5)
        z_all.append(np.full(len(phi), z))
        phi_all.append(phi)
    z = np.concatenate(z_all)
    phi = np.concatenate(phi_all)
    st = np.sqrt(np.maximum(1.0 - z * z, 0.0))
    return np.stack([st * np.cos(phi), st * np.sin(phi), z], 1)


def up_grid(nside: int) -> np.ndarray:
    """(12 nside^2, 3) HEALPix centres rotated rigidly so that the first one is +z (the identity tilt).

    nside = 0 gives the one-direction set {+z} (yaw-only search, the 2-D case).
    """
    if nside == 0:
        return np.array([[0.0, 0.0, 1.0]])
    c = healpix_centres(nside)
    out = c @ tilt_matrix(c[0]).T
    out[0] = [0.0, 0.0, 1.0]  # exact, not 1e-16 off
    return out / np.linalg.norm(out, axis=1, keepdims=True)


def grid_spacing_deg(nside: int) -> float:
    """Mean spacing sqrt(4 pi / (12 nside^2)) of the HEALPix grid in degrees (Gorski et al. 2005); 360 for nside 0."""
    return 360.0 if nside == 0 else float(np.rad2deg(np.sqrt(4 * np.pi / (12 * nside * nside))))


def angle_between_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Angle in degrees between unit vectors a (..., 3) and b (..., 3)."""
    return np.rad2deg(np.arccos(np.clip(np.sum(np.asarray(a) * np.asarray(b), axis=-1), -1.0, 1.0)))
