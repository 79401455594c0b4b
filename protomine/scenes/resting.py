"""Stable resting faces of a rigid shape, and their probabilities, computed quasi-statically.

A shape dropped on a table settles on a face of its convex hull.  Quasi-statically (no bouncing):

- the hull of the shape's surface samples is cut into faces: coplanar facets merged by region growing
  around the largest facet (vertices within ``coplanar_tol`` x the hull diameter of the seed's plane, normals
  within ``coplanar_deg``), so a curved surface does not chain into one face;
- a face is *stable* when the centre of mass ``c`` projects inside it;
- a body dropped in a uniformly random orientation first meets the table with the face that the downward
  ray from ``c`` crosses, so each face starts with the solid angle it subtends at ``c``; an unstable face
  tips over its boundary edge nearest the foot of ``c`` onto the face across it (or, where that would not
  lower ``c``, a sliver of sampling, onto its lowest neighbour) until a stable face is reached;
- a rest's probability is the solid angle of its basin over 4 pi: the quasi-static estimator of Goldberg
  et al., "Part pose statistics: estimators and experiments", IEEE Trans. Robotics and Automation 1999
  (from memory).  Triangle solid angles: Van Oosterom and Strackee 1983.

A curved surface approximated by facets has a small patch of stable facets where the smooth surface has
one resting point, so small rests within ``rest_merge_deg`` of a more probable small one are merged.  A
continuous-symmetric body lying on its side (a cylinder) physically rolls; here it gets one rest per
``rest_merge_deg`` of arc.

Conventions: points are rows (N, 3) in the shape's model frame (metres, z up, base on z = 0).  A face's
``normal`` is its outward unit normal, which points *down* (to the table) while the body rests on it.
:func:`resting_rotation` returns R (3, 3) with ``x_rest = R x_model`` that takes that normal to -z.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from scipy.spatial import ConvexHull

from .shapes import Shape

RESOLUTION = 28          # sampling grid cells along a shape's longest side
MIN_PROBABILITY = 1e-6   # rests less likely than this are dropped
SMALL_FACE = 0.05        # a face under this fraction of the hull's area may be a facet of a curved surface


@dataclass(frozen=True)
class RestingFace:
    normal: np.ndarray       # (3,) outward unit normal, model frame (down while resting on this face)
    offset: float            # the face's plane is {x : normal . x = offset}
    area: float              # m^2
    probability: float       # solid angle of the basin / 4 pi


@dataclass(frozen=True)
class RestingPoses:
    faces: tuple[RestingFace, ...]   # stable faces, most probable first
    centre_of_mass: np.ndarray       # (3,) model frame
    hull_points: np.ndarray          # (V, 3) hull vertices, model frame

    @property
    def probabilities(self) -> np.ndarray:
        return np.array([f.probability for f in self.faces])

    def face_towards(self, down: np.ndarray, max_deg: float = 3.0) -> int:
        """Index of the stable face whose normal is within ``max_deg`` of ``down`` (3,), else -1."""
        cos = np.array([f.normal @ down for f in self.faces])
        i = int(np.argmax(cos))
        return i if cos[i] >= np.cos(np.deg2rad(max_deg)) else -1

    def placement(self, i: int) -> tuple[np.ndarray, np.ndarray]:
        """(R (3, 3), s (3,)) with x_rest = R x_model + s: the body resting on face ``i`` of a table z = 0,
        its footprint box centred on the z axis."""
        R = resting_rotation(self.faces[i].normal)
        p = self.hull_points @ R.T
        lo, hi = p.min(axis=0), p.max(axis=0)
        return R, np.array([-(lo[0] + hi[0]) / 2, -(lo[1] + hi[1]) / 2, -lo[2]])


def rest_shape(shape: Shape, poses: RestingPoses, i: int) -> tuple[Shape, np.ndarray, np.ndarray]:
    """``shape`` resting on face ``i``: (the placed shape, R (3, 3), s (3,)) with x_rest = R x_model + s.

    Its box comes from the hull samples (plus 2% of their extent for the surface between samples), tighter
    than a rotated box would be, so footprints stay honest for placing objects side by side.
    """
    R, s = poses.placement(i)
    p = poses.hull_points @ R.T + s
    pad = 0.02 * float((p.max(axis=0) - p.min(axis=0)).max())
    lo, hi = p.min(axis=0) - pad, p.max(axis=0) + pad
    lo[2] = min(lo[2] + pad, 0.0)                 # the resting face is z = 0, nothing goes below it
    Rt = torch.tensor(R, dtype=torch.float32)
    st = torch.tensor(s, dtype=torch.float32)
    # x_model = R^T (x_rest - s); for row points: (p - s) @ R
    return Shape(lambda q: shape.fn((q - st) @ Rt), tuple(lo), tuple(hi)), R, s


def resting_rotation(normal: np.ndarray) -> np.ndarray:
    """The smallest rotation R (3, 3) taking the unit vector ``normal`` (3,) to -z."""
    n = np.asarray(normal, dtype=np.float64)
    n = n / np.linalg.norm(n)
    down = np.array([0.0, 0.0, -1.0])
    axis = np.cross(n, down)
    s, c = np.linalg.norm(axis), float(n @ down)
    if s < 1e-12:
        return np.eye(3) if c > 0 else np.diag([1.0, -1.0, -1.0])     # already down, or half a turn about x
    k = axis / s
    K = np.array([[0.0, -k[2], k[1]], [k[2], 0.0, -k[0]], [-k[1], k[0], 0.0]])
    return np.eye(3) + s * K + (1.0 - c) * (K @ K)                       # Rodrigues


def _merge_coplanar(hull: ConvexHull, tol: float, max_deg: float) -> np.ndarray:
    """Face label (F,) of each hull facet, by region growing around the largest unlabelled facet.

    A neighbour joins when all its vertices lie within ``tol`` of the seed facet's plane and its normal is
    within ``max_deg`` of the seed's, so a curved surface does not chain into one face.  Sliver facets (height
    under 10 tol, as along a sampled edge) have unreliable normals: they join on the distance alone, and seed
    nothing.
    """
    eq = hull.equations                                   # (F, 4): n . x + e = 0, n outward
    tri = hull.points[hull.simplices]                     # (F, 3, 3)
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    longest = np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2).max(axis=1)
    reliable = 2.0 * area / np.maximum(longest, 1e-300) >= 10.0 * tol
    cos_max = np.cos(np.deg2rad(max_deg))
    label = np.full(len(eq), -1)
    n_groups = 0
    for seed in np.argsort(-np.where(reliable, area, -1.0), kind="stable"):
        if label[seed] >= 0:
            continue
        n, e = eq[seed, :3], eq[seed, 3]
        label[seed] = n_groups
        stack = [seed]
        while stack:
            cand = np.unique(hull.neighbors[stack].ravel())
            cand = cand[label[cand] < 0]
            ok = (~reliable[cand] | (eq[cand, :3] @ n >= cos_max)) & (np.abs(tri[cand] @ n + e).max(axis=1) <= tol)
            stack = list(cand[ok])
            label[cand[ok]] = n_groups
        n_groups += 1
    return label


def _solid_angles(tri: np.ndarray) -> np.ndarray:
    """Solid angle (T,) subtended at the origin by triangles (T, 3, 3) (Van Oosterom and Strackee 1983)."""
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    la, lb, lc = (np.linalg.norm(x, axis=1) for x in (a, b, c))
    num = np.abs(np.einsum("ij,ij->i", a, np.cross(b, c)))
    den = la * lb * lc + (a * b).sum(1) * lc + (a * c).sum(1) * lb + (b * c).sum(1) * la
    return 2.0 * np.arctan2(num, den)


def _segment_distance(q: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Distance (E,) from points q (E, 3) to segments a-b (E, 3)."""
    ab = b - a
    t = np.clip(((q - a) * ab).sum(1) / np.maximum((ab * ab).sum(1), 1e-30), 0.0, 1.0)
    return np.linalg.norm(q - a - t[:, None] * ab, axis=1)


def resting_faces(points: np.ndarray, centre_of_mass: np.ndarray, *, coplanar_tol: float = 1e-3,
                  coplanar_deg: float = 5.0, rest_merge_deg: float = 20.0) -> RestingPoses:
    """Stable resting faces of the convex hull of ``points`` (N, 3) for a body with ``centre_of_mass`` (3,).

    coplanar_tol, coplanar_deg: facets merge into one face when their vertices lie within this distance (a
    fraction of the hull diameter) of the seed facet's plane and their normals within this angle of its normal.
    rest_merge_deg: stable faces within this angle of a more probable stable face are one rest (a curved
    surface approximated by facets has a small patch of stable facets where the smooth surface has one point).
    """
    P = np.asarray(points, dtype=np.float64)
    c = np.asarray(centre_of_mass, dtype=np.float64)
    if P.ndim != 2 or P.shape[1] != 3 or len(P) < 4:
        raise ValueError(f"points must be (N >= 4, 3), got {P.shape}")
    hull = ConvexHull(P)
    V = P[hull.vertices]
    diam = float(np.linalg.norm(V.max(0) - V.min(0)))
    label = _merge_coplanar(hull, coplanar_tol * diam, coplanar_deg)
    G = int(label.max()) + 1
    tri = hull.points[hull.simplices]                                      # (F, 3, 3)
    cr = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    area = 0.5 * np.linalg.norm(cr, axis=1)
    # Face planes: area-weighted facet normals; offset through the face's farthest vertex.
    n = np.zeros((G, 3))
    np.add.at(n, label, hull.equations[:, :3] * area[:, None])
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    off = np.full(G, -np.inf)
    np.maximum.at(off, label, (tri @ n[label][:, :, None])[:, :, 0].max(axis=1))
    if (off - n @ c).min() <= 0:
        raise ValueError("the centre of mass is not inside the hull")
    height = off - n @ c                                                  # COM height when resting on each face
    foot = c + height[:, None] * n                                        # (G, 3) the COM's foot on each face plane

    # Stable: the foot lies inside the face polygon, i.e. inside one of its (convex union of) triangles.
    q = foot[label]                                                       # (F, 3)
    cfl = n[label]
    side = np.stack([(np.cross(tri[:, (k + 1) % 3] - tri[:, k], q - tri[:, k]) * cfl).sum(1) for k in range(3)], 1)
    eps = 1e-12 * diam * diam                                             # qhull's facets are not consistently ordered
    inside = (side >= -eps).all(axis=1) | (side <= eps).all(axis=1)
    stable = np.zeros(G, dtype=bool)
    stable[label[inside]] = True

    # Unstable faces tip over the boundary edge nearest the foot, onto the face across it.
    f_idx, k_idx = np.nonzero(label[hull.neighbors] != label[:, None])    # boundary edges (facet, opposite vertex)
    ea = hull.points[hull.simplices[f_idx, (k_idx + 1) % 3]]
    eb = hull.points[hull.simplices[f_idx, (k_idx + 2) % 3]]
    g_of = label[f_idx]
    dist = _segment_distance(foot[g_of], ea, eb)
    order = np.lexsort((dist, g_of))
    nb = label[hull.neighbors[f_idx, k_idx]]                              # the face across each boundary edge
    first = order[np.r_[True, g_of[order][1:] != g_of[order][:-1]]]
    tip = np.arange(G)
    tip[g_of[first]] = nb[first]
    # A roll lowers the centre of mass.  Where the face across the nearest edge is not lower (a sliver facet
    # of a sampled curved surface), the roll goes on to the lowest neighbouring face instead.
    order = np.lexsort((height[nb], g_of))
    lowest = np.arange(G)
    lowest[g_of[order[np.r_[True, g_of[order][1:] != g_of[order][:-1]]]]] = nb[order[np.r_[True, g_of[order][1:] != g_of[order][:-1]]]]
    idx = np.arange(G)
    succ = np.where(height[tip] < height, tip, np.where(height[lowest] < height, lowest, idx))
    succ = np.where(stable, idx, succ)
    rest = succ == np.arange(G)
    while True:                                                           # pointer jumping to the rests
        nxt = succ[succ]
        if np.array_equal(nxt, succ):
            break
        succ = nxt
    # Probability: solid angle subtended at the centre of mass by the faces rolling into each rest.
    omega = np.bincount(label, weights=_solid_angles(tri - c), minlength=G)
    prob = np.bincount(succ, weights=omega, minlength=G) / (4.0 * np.pi)

    # Rests: faces that end a roll (stable ones, and local minima of the height that faceting left just
    # short of stable), most probable first.  Small rests within ``rest_merge_deg`` of a more probable small
    # one join it: a curved surface approximated by facets has a patch of them where the smooth surface has
    # one point (or, rolling on a cylinder, one arc per rest_merge_deg).
    cands = np.flatnonzero(rest & (prob > MIN_PROBABILITY))
    face_area = np.bincount(label, weights=area, minlength=G)
    cands = cands[np.lexsort((-face_area[cands], -prob[cands]))]
    cos_merge = np.cos(np.deg2rad(rest_merge_deg))
    small = face_area < SMALL_FACE * area.sum()
    taken = np.zeros(G, dtype=bool)
    faces = []
    for g in cands:
        if taken[g]:
            continue
        join = cands[~taken[cands] & (n[cands] @ n[g] >= cos_merge) & small[cands]] if small[g] else [g]
        taken[join] = True
        normal = (prob[join, None] * n[join]).sum(0)
        normal /= np.linalg.norm(normal)
        faces.append(RestingFace(normal, float((V @ normal).max()), float(face_area[join].sum()),
                                 float(prob[join].sum())))
    faces.sort(key=lambda f: -f.probability)
    return RestingPoses(tuple(faces), c, V)


def shape_samples(shape: Shape, resolution: int = RESOLUTION, newton_steps: int = 4) -> tuple[np.ndarray, np.ndarray]:
    """Surface points (N, 3) and the solid's centre of mass (3,) (uniform density) of an SDF shape.

    A grid of ``resolution`` cells along the longest side of the bounding box; grid points within a cell of
    the surface are pulled onto it by Newton steps on the SDF (p <- p - f grad f / |grad f|^2), which also
    converges for the bounded (non-exact) SDFs of intersections and subtractions.
    """
    lo, hi = np.asarray(shape.lo, dtype=np.float64), np.asarray(shape.hi, dtype=np.float64)
    if not (np.isfinite(lo).all() and np.isfinite(hi).all()):
        raise ValueError("shape has an unbounded box")
    cell = float((hi - lo).max()) / resolution
    # A grid centred on the box, so a symmetric solid gets a symmetric sample.
    axes = [(a + b) / 2 + cell * (np.arange(int(np.ceil((b - a) / cell)) + 3) - (np.ceil((b - a) / cell) + 2) / 2)
            for a, b in zip(lo, hi)]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    with torch.no_grad():
        f = torch.cat([shape.fn(torch.as_tensor(grid[i:i + 65536], dtype=torch.float32))
                       for i in range(0, len(grid), 65536)]).numpy().astype(np.float64)
    # Each cell's share of solid from its SDF value (partial volume), so the centre of mass has sub-cell accuracy.
    occ = np.clip(0.5 - f / cell, 0.0, 1.0)
    if occ.sum() < 4:
        raise ValueError(f"shape too thin for a grid of {resolution} cells along its longest side")
    com = (grid * occ[:, None]).sum(axis=0) / occ.sum()
    p = torch.as_tensor(grid[np.abs(f) < 1.5 * cell], dtype=torch.float32)
    # Tetrahedral differences (four evaluations), not autograd: SDFs have 0/0 derivatives at some points.
    ks = torch.tensor([[1, -1, -1], [-1, -1, 1], [-1, 1, -1], [1, 1, 1]], dtype=torch.float32)
    h = 0.05 * cell
    with torch.no_grad():
        for _ in range(newton_steps):
            fp = shape.fn(p)
            g = sum(k * shape.fn(p + h * k)[:, None] for k in ks) / (4.0 * h)
            p = p - (fp / (g * g).sum(1).clamp(min=1e-6))[:, None] * g
        fp = shape.fn(p).abs()
    surf = p.numpy().astype(np.float64)[(fp < 0.02 * cell).numpy()]
    return surf, com


def shape_resting_poses(shape: Shape, resolution: int = RESOLUTION) -> RestingPoses:
    """Stable resting faces of an SDF shape (its surface samples' hull, its solid's centre of mass)."""
    # One intra-op thread: the SDF calls are small tensor ops, where thread hand-off costs more than it saves.
    n_threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        surf, com = shape_samples(shape, resolution)
    finally:
        torch.set_num_threads(n_threads)
    return resting_faces(surf, com)
