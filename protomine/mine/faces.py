"""Resting faces of prototypes: which way up their members lie, how many lie so, and each face's symmetry.

Conventions: up directions are unit vectors in the prototype's canonical frame (``rotations``: a member's
up is R^T e_z for its rotation R, object frame <- prototype frame); symmetry codes as in
:mod:`protomine.mine.symmetry` (0 continuous, 1 none, n n-fold about that face's up).

Faces (``group_faces``): face 0 is the canonical face, up = +z (the frame the prototype is stored in).  The
other members' up directions are grouped greedily: the direction with the most members within
``radius_deg`` (default 25 degrees, between the finest tilt grid's spacing and the smallest angle between
two faces of a box) becomes a face (up = the normalised mean of those members' ups), its members are
removed, and so on; every member belongs to the face whose up is nearest.

Face symmetry (``face_symmetries``): the symmetry test of :mod:`symmetry` applied to the prototype's copy
resting on that face (``tilts.TiltBank.copies``), with the canonical face's noise level (the mean over
cells of each prototype's mean variance) standing for the copy's, since the members' moments are only
gathered in the canonical frame.

Stable resting directions (``stable_ups``): the directions a prototype can rest on, quasi-statically: a facet of
the convex hull of its solid cells (facets whose normals lie within ``STABLE_MERGE_DEG`` of each other are one
face) on which the centre of mass projects inside the face is a stable face, and the prototype rests on it with
up = minus its outward normal (the criterion the demo renderer's ``scenes.resting`` uses on meshes; Goldberg
et al., IEEE Trans. Robotics and Automation 1999).  The clustering's pairwise matrices (``seeding.FaceDistance``)
search these exact directions instead of a tilt grid: a grid leaves a cross-face pair up to its covering
radius away from the true tilt (the distance grows by ~20% at 10 degrees off, measured on the tumbled demo),
while a same-face pair sits exactly on the identity, so the grid alone splits classes by face.
"""
from __future__ import annotations

import numpy as np

from .. import rotations as rot
from ..geometry import plane_basis
from . import symmetry as sym

FACE_RADIUS_DEG = 25.0
STABLE_MERGE_DEG = 8.0   # hull facets whose normals lie this close are one face (a curved side's facets are many)


def group_faces(up: np.ndarray, labels: np.ndarray, K: int, radius_deg: float = FACE_RADIUS_DEG
                ) -> tuple[list[np.ndarray], list[np.ndarray], np.ndarray]:
    """Faces per prototype from members' up directions up (N, 3) and labels (N,): face ups [(F_k, 3)],
    member counts [(F_k,)] and each member's face index (N,)."""
    up = np.asarray(up, np.float64)
    face = np.zeros(len(up), np.int64)
    ups, counts = [], []
    cos_r = np.cos(np.deg2rad(radius_deg))
    for k in range(K):
        idx = np.flatnonzero(labels == k)
        u = up[idx]
        dirs = [np.array([0.0, 0.0, 1.0])]
        left = u[:, 2] < cos_r  # members not on the canonical face
        while left.any():
            cand = u[left]
            near = (cand @ cand.T) >= cos_r  # (m, m)
            best = int(np.argmax(near.sum(axis=1)))
            members = near[best]
            d = cand[members].sum(axis=0)
            dirs.append(d / max(np.linalg.norm(d), 1e-12))
            pos = np.flatnonzero(left)[members]
            left[pos] = False
        dirs = np.array(dirs)
        f = np.argmax(u @ dirs.T, axis=1) if len(idx) else np.zeros(0, np.int64)
        face[idx] = f
        ups.append(dirs)
        counts.append(np.bincount(f, minlength=len(dirs)).astype(np.int64))
    return ups, counts, face


def nearest_faces(ups: np.ndarray, others: np.ndarray, radius_deg: float = FACE_RADIUS_DEG) -> np.ndarray:
    """Face ups (F, 3) each replaced by the nearest of ``others`` (G, 3) when that lies within ``radius_deg`` (the
    first, +z, stays +z)."""
    ups = np.array(ups, np.float64, copy=True)
    others = np.asarray(others, np.float64).reshape(-1, 3)
    if not len(others):
        return ups
    cos = ups[1:] @ others.T
    j = np.argmax(cos, axis=1)
    near = cos[np.arange(len(j)), j] >= np.cos(np.deg2rad(radius_deg))
    ups[1:][near] = others[j[near]]
    return ups


def face_symmetries(bank, face_ups: list[np.ndarray], noise: np.ndarray, canonical: np.ndarray, *,
                    factor: float = sym.DEFAULT_FACTOR, tol: float = sym.DEFAULT_TOL, run=None,
                    break_effect: float = 0.0) -> list[np.ndarray]:
    """Symmetry code per face [(F_k,)]: face 0 keeps the prototype's ``canonical`` (K,) code; the others are
    tested on the prototype's copy resting on them.  ``bank`` is a ``tilts.TiltBank`` over the canonical
    prototypes (its grid gives the copies' margins), ``noise`` (K,) each prototype's mean cell variance.
    ``run(fn, items)``, when given, runs the prototypes (independent; ``[fn(k) for k in items]`` by default, the
    engine spreads them over threads), results in the order of ``items``.  ``break_effect`` > 0: a turn of a face's
    copy that moves more than this share of its variance is no symmetry (``symmetry.detect_symmetry``)."""

    def one(k: int) -> np.ndarray:
        ups = face_ups[k]
        codes = np.full(len(ups), int(canonical[k]), np.int64)
        for f in range(1, len(ups)):
            Pc, Vc = bank.copy_at(k, ups[f])
            codes[f] = int(sym.detect_symmetry(Pc[None], Vc[None], float(noise[k]), factor=factor, tol=tol,
                                               break_effect=break_effect)[0])
        return codes

    return (run or (lambda fn, items: [fn(i) for i in items]))(one, range(len(face_ups)))


def reduce_rotation(R: np.ndarray, period_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rotations (N, 3, 3) = Rz(yaw) tilt(up) with yaw reduced modulo each member's face period (N,) (0 =
    continuous: yaw 0).  Returns the reduced rotations and yaws (N,)."""
    up, yaw = rot.matrix_to_tilt_yaw(R)
    p = np.asarray(period_deg, np.float64)
    yaw = np.where(p > 0, np.mod(yaw, np.where(p > 0, p, 1.0)), 0.0)
    return rot.tilt_yaw_to_matrix(up, yaw), yaw


def face_pose(R: np.ndarray, face_up: np.ndarray, face_symmetry: np.ndarray, group: np.ndarray | None = None
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Resting face, reduced rotation and yaw of rotations R (n, 3, 3) (object frame <- prototype frame) of
    one prototype with library faces face_up (F, 3), face_symmetry (F,) (-1 = padding): the rotation modulo
    the prototype's symmetry ``group`` (G, 3, 3) (``symmetry.reduce_modulo_group``; None or identity only:
    as it is), the face whose up is nearest its up R^T e_z, and the rotation with its yaw modulo that face's
    period.  Returns face (n,), R (n, 3, 3), yaw_deg (n,)."""
    R = np.asarray(R, np.float64).reshape(-1, 3, 3)
    if group is not None and len(group) > 1 and len(R):
        R = sym.reduce_modulo_group(R, group)
    valid = np.flatnonzero(np.asarray(face_symmetry) >= 0)
    up = R[:, 2, :]
    face = valid[np.argmax(up @ np.asarray(face_up, np.float64)[valid].T, axis=1)] if len(R) else np.zeros(0, np.int64)
    code = np.asarray(face_symmetry)[face]
    Rr, yaw = reduce_rotation(R, np.where(code == 0, 0.0, 360.0 / np.maximum(code, 1)))
    return face.astype(np.int64), Rr, yaw


def face_poses(R: np.ndarray, face_up: np.ndarray, face_symmetry: np.ndarray, groups: list[np.ndarray]
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``face_pose`` for every prototype at once: rotations R (n, K, 3, 3) of n objects against K
    prototypes with faces face_up (K, F, 3), face_symmetry (K, F) (-1 = padding) and symmetry groups
    (K of (G, 3, 3)) -> face (n, K), reduced rotation (n, K, 3, 3), yaw_deg (n, K).

    The same rule as face_pose (the rotation modulo the group, the valid face whose up is nearest R^T e_z,
    the yaw modulo that face's period), with the face choice and the reduction run once over every pair
    instead of once per prototype (a Python loop over K costs more than matching a frame's objects)."""
    R = np.array(R, np.float64).reshape(-1, len(groups), 3, 3)
    n, K = R.shape[:2]
    for k, g in enumerate(groups):
        if g is not None and len(g) > 1 and n:
            R[:, k] = sym.reduce_modulo_group(R[:, k], g)
    fs = np.asarray(face_symmetry)
    cos = np.einsum("nki,kfi->nkf", R[:, :, 2, :], np.asarray(face_up, np.float64))
    face = np.argmax(np.where(fs[None] >= 0, cos, -np.inf), axis=2)             # first of equals, as face_pose
    code = fs[np.arange(K)[None, :], face]
    Rr, yaw = reduce_rotation(R.reshape(-1, 3, 3), np.where(code == 0, 0.0, 360.0 / np.maximum(code, 1)).reshape(-1))
    return face.astype(np.int64), Rr.reshape(n, K, 3, 3), yaw.reshape(n, K)


def stable_ups(surface: np.ndarray, weight: np.ndarray, aspect: float, *, merge_deg: float = STABLE_MERGE_DEG
               ) -> np.ndarray:
    """Up directions (F, 3) on which a volume (surface evidence, weight (R, A, H); grid aspect z_max / rho_max)
    rests stably, +z first (the pose it was seen in).  Solid cells as the tilt search takes them
    (``tilts.SURFACE_MIN``, ``tilts.OBSERVED_MIN``); the centre of mass is their centroid weighted by cell
    volume (proportional to the cell's radius), and it must project at least half a cell inside a face (see
    the module docstring)."""
    from scipy.spatial import ConvexHull, QhullError
    from .tilts import OBSERVED_MIN, SURFACE_MIN, _cell_points
    R, A, H = surface.shape
    up = np.array([[0.0, 0.0, 1.0]])
    occ = ((surface >= SURFACE_MIN) & (weight >= OBSERVED_MIN)).reshape(-1)
    pts = _cell_points(R, A, H, 1.0, float(aspect))[occ]
    if len(pts) < 4:
        return up
    vol = np.hypot(pts[:, 0], pts[:, 1])
    com = (pts * vol[:, None]).sum(axis=0) / max(vol.sum(), 1e-12)
    try:
        hull = ConvexHull(pts)
    except QhullError:  # flat or degenerate: no faces to rest on besides the one seen
        return up
    normal = hull.equations[:, :3]
    tri = pts[hull.simplices]  # (facets, 3, 3) corners
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    cos_m = np.cos(np.deg2rad(merge_deg))
    margin = 0.5 * max(1.0 / R, float(aspect) / H)  # inside by half a cell: a corner's sliver facets do not count
    left = np.ones(len(normal), bool)
    out = [up[0]]
    for f in np.argsort(-area, kind="stable"):  # the largest facet first gathers its face
        if not left[f]:
            continue
        grp = left & (normal @ normal[f] >= cos_m)
        left &= ~grp
        n = (normal[grp] * area[grp, None]).sum(axis=0)
        n /= max(np.linalg.norm(n), 1e-12)
        E = plane_basis(n)[:2]  # in-plane axes of the face
        q2 = pts[np.unique(hull.simplices[grp])] @ E.T
        c = E @ com
        try:
            poly = ConvexHull(q2)
        except QhullError:  # a sliver: an edge, not a face
            continue
        if np.all(poly.equations[:, :2] @ c + poly.equations[:, 2] <= -margin):  # the centre projects inside
            u = -n
            if np.all(np.asarray(out) @ u < cos_m):
                out.append(u)
    return np.asarray(out)
