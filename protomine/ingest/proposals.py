"""Objects in a capture: the support plane, then one proposal per physical object.

With masks: each mask id is one object across all frames.  Without masks: class-agnostic proposals
from geometry alone: points above the plane (by ``above_plane_m``, or 3x the plane's residual on noisy
sensors), fused across frames in the world
frame (static objects stay put there), voxel down-sampled, grouped by DBSCAN (scikit-learn), filtered
by size; each object then gets its per-frame pixels by projecting back (a pixel belongs to the object
whose fused points are nearest to its own 3-D point, within the DBSCAN radius), then grows into the
readings under the margin (a thin base) from the body outwards, up to LOW_GROW_M in metres.

The object frame (see protomine.geometry): origin at the base centre on the plane (the centre of the
minimum enclosing circle of the footprint, robust to one-sided views of round objects), z = up.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy.spatial import ConvexHull, QhullError, cKDTree
from sklearn.cluster import DBSCAN

from ..capture import Capture
from ..errors import InputError
from ..geometry import camera_to_pixel, camera_to_world, depth_to_points, plane_basis, world_to_camera
from ..progress import detail
from .convexity import (DARK_RGB, SAME_CHROMA, _chroma, contact_voxels, convex_parts, frame_segments, join_parts,
                        one_colour, view_votes, voxel_normals)
from .depthedges import FLYING_TOL_M, FLYING_TOL_REL, flying_pixels, line_unsupported
from .plane import PlaneFit, candidate_planes, fit_plane
from .volume import ObjectFrame, View

HEIGHT_QUANTILE = 99.0      # object height = this percentile of point heights (robust to spikes)
FOOTPRINT_TRIM = 97.0       # footprint points farther than this percentile (x 1.15) are dropped
OUTLIER_NEIGHBOURS = 8      # neighbours of the statistical outlier test before the footprint (Rusu et al. 2008)
LONE_SAMPLE = 2000          # points whose k-th neighbour distance gives lone_points' typical spacing
DBSCAN_MIN_SAMPLES = 5
FREE_SPACE_VOTES = 2         # other views that must see through a reading to drop it
REST_TOL_M = 0.02           # a point group rests on a plane when its lowest points are this close to it
NOISE_MARGIN = 3.0          # x plane residual (RMS): the table's own noise stays below this height
NORMAL_RADIUS = 0.7         # x cluster_eps_m: neighbourhood of the voxel normals (small keeps creases sharp)
SUPPORT_BAND_M = 0.025      # points this low over the plane form an object's support polygon
STAND_INSET_M = 0.003       # ... and its centre of mass must lie this far inside it to stand alone
LOW_FLOOR_M = 0.002         # the low band (grown into objects) starts this high over the plane ...
LOW_FLOOR_SIGMA = 2.5       # ... or this many plane residuals (RMS) on noisy sensors
SMOOTH_WINDOW = 5           # pixels: median window of the smoothed low band (``smoothed_band``)
LOW_GROW_M = 0.10           # an object grows into its low band at most this far (metres) from its grouped voxels
                            # (a base disc or flange reaching out beyond the body standing over it)
COLOUR_CUT = True           # mask-free: also cut adjacent voxels whose colours differ (convexity.colour_steps)
VIEW_CHECK = True           # mask-free: also cut where the frames' own depth edges and creases agree across views
GROW_CHROMA = 0.08          # chromaticity distance within which an object grows into its low band (measured on
                            # the demo: 98% of an object's pixels lie within 0.03-0.04 of its median)
FOOTPRINT_OVERLAP = 0.5     # a group with this share of its footprint inside another's is part of it
ON_PLANE = 2.0              # x the grouping margin: a group whose lowest points are this low stands on the plane
STANDS_SHARE = 0.25         # ... and, with this share of another group's voxels, is an object beside it, not its part


@dataclass
class FrameData:
    id: str
    depth: np.ndarray         # (H, W) metres
    rgb: np.ndarray           # (H, W, 3) uint8
    mask: np.ndarray | None   # (H, W) int ids
    cam_to_world: np.ndarray  # (4, 4)
    points: np.ndarray        # (M, 3) world points of every valid pixel
    pixels: np.ndarray        # (M,) flat pixel indices
    steady: np.ndarray        # (M,) bool: not a flying pixel (see flying_pixels); only these may join objects
    flying: np.ndarray | None = None  # (H, W) bool: flying_pixels(depth), for lifting (once a frame, not an object)


@dataclass
class Proposal:
    object_id: str
    key: str                            # mask id, or "p<k>" for geometry-only proposals
    frame: ObjectFrame
    center_world: np.ndarray            # (3,) centre of the object's points
    n_points: int
    pixels: dict[str, np.ndarray] = field(default_factory=dict)  # frame id -> flat pixel indices


@dataclass
class SceneObjects:
    capture: Capture
    plane: PlaneFit
    frames: list[FrameData]
    proposals: list[Proposal]
    cut_m: float = 0.0   # the height above the plane at or below which no reading is an object's (:func:`object_cut`)
    _held: dict = field(default_factory=dict, repr=False, compare=False)

    def views(self, p: Proposal, frame_ids: list[str] | None = None, *, others: bool = False) -> list[View]:
        """The frames that see ``p``; with ``others`` (``Grid.others_unseen`` or ``others_free``, the only readers),
        each with the pixels other proposals of the scene hold there (View.others)."""
        K = self.capture.intrinsics.K
        out = []
        for fd in self.frames:
            if fd.id in p.pixels and (frame_ids is None or fd.id in frame_ids):
                theirs = None
                if others:
                    theirs = self.others_held(fd, p.pixels[fd.id])
                out.append(View(fd.depth, fd.rgb, K, fd.cam_to_world, p.pixels[fd.id], fd.flying, theirs, self.cut_m))
        return out

    def others_held(self, fd: FrameData, pixels: np.ndarray) -> np.ndarray:
        """(H * W,) bool: the pixels of frame ``fd`` that a proposal other than the one holding ``pixels`` holds."""
        theirs = self.held(fd).copy()
        theirs[pixels] -= 1
        return theirs > 0

    def held(self, fd: FrameData) -> np.ndarray:
        """(H * W,) how many proposals hold each pixel of frame ``fd`` (counted once a frame)."""
        if fd.id not in self._held:
            n = np.zeros(fd.depth.size, np.int32)
            for q in self.proposals:
                if fd.id in q.pixels:
                    np.add.at(n, q.pixels[fd.id], 1)
            self._held[fd.id] = n
        return self._held[fd.id]


def load_frames(cap: Capture, frame_ids: list[str] | None = None,
                progress: Callable[[str], None] | None = None, *, line_support: float = 0.0,
                one_sided: bool = False, use_masks: bool = True) -> list[FrameData]:
    """The frames' readings, world points and flying-pixel flags (``depthedges.flying_pixels``; with
    ``line_support`` > 0 also the readings on no line through two opposite neighbours within that many x the
    frame's own noise, ``depthedges.line_unsupported``: ``[ingest] line_support``; with ``one_sided`` such a reading
    that continues a surface on one side, of its own mask when the capture has masks and ``use_masks``, is kept,
    ``[ingest] line_support_one_sided``)."""
    K = cap.intrinsics.K
    out = []
    for fr in cap.frames:
        if frame_ids is not None and fr.id not in frame_ids:
            continue
        depth = cap.depth(fr.id)
        if not np.any(depth > 0):
            raise InputError(cap.frame_file("depth", fr.id), "pixels", "all depth readings are 0 (no reading anywhere)")
        rgb = cap.rgb(fr.id)
        if rgb.shape[:2] != depth.shape:
            raise InputError(cap.frame_file("rgb", fr.id), "size", f"expected {depth.shape[::-1]} like the depth image, got {rgb.shape[1::-1]}")
        mask = cap.mask(fr.id)
        pc, idx = depth_to_points(depth, K)
        flying = flying_pixels(depth)
        if line_support > 0:
            flying |= line_unsupported(depth, float(K[0, 0]), line_support, one_sided, mask if use_masks else None)
        out.append(FrameData(fr.id, depth, rgb, mask, fr.cam_to_world, camera_to_world(pc, fr.cam_to_world), idx,
                             ~flying.reshape(-1)[idx], flying))
        detail(progress, f"{cap.name}: frame {fr.id} read ({len(idx)} depth points)")
    for fd, bad in zip(out, free_space_violations(out, K)):
        fd.steady &= ~bad
    return out


def free_space_violations(frames: list[FrameData], K: np.ndarray) -> list[np.ndarray]:
    """Per frame (M,) bool: points that other views see through.

    A reading between an object and its background (a flying pixel at a depth edge, a multipath ghost) lies
    where other cameras look past it: projected into another frame it falls in front of everything that frame
    saw around that pixel (3x3 nearest reading, so a thin part one pixel off is not at risk) by more than
    FLYING_TOL_M (or FLYING_TOL_REL x depth).  Seen through from FREE_SPACE_VOTES other frames (or from every
    other frame when there are fewer), it is dropped.
    """
    from scipy.ndimage import minimum_filter
    n = len(frames)
    if n < 2:
        return [np.zeros(len(fd.pixels), bool) for fd in frames]
    nearest = [minimum_filter(np.where(fd.depth > 0, fd.depth, np.inf), size=3) for fd in frames]
    need = min(FREE_SPACE_VOTES, n - 1)
    out = []
    for i, fd in enumerate(frames):
        votes = np.zeros(len(fd.pixels), int)
        for j, other in enumerate(frames):
            if i == j:
                continue
            uv, z = camera_to_pixel(world_to_camera(fd.points, other.cam_to_world), K)
            h, w = other.depth.shape
            u, v = np.rint(uv[:, 0]).astype(int), np.rint(uv[:, 1]).astype(int)
            inside = (z > 0) & (u >= 0) & (u < w) & (v >= 0) & (v < h)
            seen = np.full(len(z), np.inf)
            seen[inside] = nearest[j][v[inside], u[inside]]
            tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * z)
            votes += (np.isfinite(seen) & (z < seen - tol)).astype(int)
        out.append(votes >= need)
    return out


def fit_support_plane(cap: Capture, frames: list[FrameData], cfg: dict, rng: np.random.Generator) -> PlaneFit:
    """The support plane: among the dominant planes (sequential RANSAC), the one most objects rest on.

    A table usually dominates the depth images, but on a shelf seen from the front the back wall can hold
    more points than the board.  So up to three planes are found; the points on none of them are grouped
    (DBSCAN), and a group *rests* on a plane when its lowest points (2nd percentile of height) are within
    REST_TOL_M of it and it rises on the cameras' side.  The plane with the most resting groups wins; ties go
    to the larger plane.  With one plane (the usual case) this is just the RANSAC plane.
    """
    c = cfg["ingest"]
    pts = np.concatenate([f.points for f in frames])
    if len(pts) > c["max_points_per_capture"]:
        pts = pts[rng.choice(len(pts), c["max_points_per_capture"], replace=False)]
    cams = np.mean([f.cam_to_world[:3, 3] for f in frames], axis=0)
    cands = candidate_planes(pts, inlier_dist=c["plane_inlier_m"], confidence=c["plane_confidence"], rng=rng,
                             toward=cams, min_fraction=0.5 * c["plane_min_inlier_frac"])
    if not cands:
        raise InputError(cap.path, "depth", f"no support plane: no plane holds {0.5 * c['plane_min_inlier_frac']:.1%} of the "
                         f"points, expected one with at least {c['plane_min_inlier_frac']:.0%} (ingest.plane_min_inlier_frac)")
    plane = cands[0][0]
    if len(cands) > 1:
        plane = _plane_objects_rest_on(pts, cands, cfg)
    if plane.inlier_fraction < c["plane_min_inlier_frac"] and plane is cands[0][0]:
        raise InputError(cap.path, "depth", f"no support plane: the best plane holds {plane.inlier_fraction:.1%} of the points, "
                         f"expected at least {c['plane_min_inlier_frac']:.0%} (ingest.plane_min_inlier_frac)")
    return plane


def voxel_index(pts: np.ndarray, size: float) -> tuple[int, np.ndarray]:
    """Number of occupied voxels V of points (M, 3) on a grid of ``size`` and each point's voxel (M,)."""
    keys, inv = np.unique(np.floor(pts / size).astype(np.int64), axis=0, return_inverse=True)
    return len(keys), inv.reshape(-1)


def voxel_means(pts: np.ndarray, size: float, *values: np.ndarray,
                index: tuple[int, np.ndarray] | None = None) -> tuple[np.ndarray, ...]:
    """Voxel centroids (V, 3) of points (M, 3) on a grid of ``size``, and the voxel means of each (M, ...) value.
    index: ``voxel_index(pts, size)`` when the caller has it."""
    n, inv = voxel_index(pts, size) if index is None else index
    count = np.bincount(inv, minlength=n).astype(np.float64)
    out = []
    for v in (pts,) + values:
        acc = np.zeros((n,) + v.shape[1:])
        np.add.at(acc, inv, v)
        out.append(acc / count.reshape((-1,) + (1,) * (v.ndim - 1)))
    return tuple(out)


def voxel_groups(pts: np.ndarray, eps: float) -> tuple[np.ndarray, np.ndarray]:
    """Euclidean groups of points (M, 3): voxel centroids (V, 3) at eps / 3 and their DBSCAN labels (V,)."""
    if len(pts) == 0:
        return np.zeros((0, 3)), np.zeros(0, int)
    (vox,) = voxel_means(pts, eps / 3.0)
    return vox, DBSCAN(eps=eps, min_samples=DBSCAN_MIN_SAMPLES).fit_predict(vox)


def _plane_objects_rest_on(pts: np.ndarray, cands: list, cfg: dict) -> PlaneFit:
    """The candidate plane with the most point groups resting on it (ties: the larger plane)."""
    c = cfg["ingest"]
    off = np.ones(len(pts), bool)
    for _, inl in cands:
        off &= ~inl
    rest = pts[off]
    if len(rest) > 50000:
        rest = rest[np.random.default_rng(0).choice(len(rest), 50000, replace=False)]
    vox, lab = voxel_groups(rest, c["cluster_eps_m"])
    groups = [vox[lab == l] for l in range(lab.max() + 1 if len(lab) else 0) if (lab == l).sum() >= c["cluster_min_points"]]
    best, best_key = cands[0][0], (-1, 0.0)
    for plane, inl in cands:
        resting = 0
        for g in groups:
            h = plane.height(g)
            if abs(np.percentile(h, 2)) < REST_TOL_M and np.percentile(h, 98) > c["min_object_height_m"]:
                resting += 1
        key = (resting, float(inl.mean()))
        if key > best_key:
            best, best_key = plane, key
    return best


def above_plane_margin(plane: PlaneFit, cfg: dict) -> float:
    """Height above the plane from which a point counts as object: the configured margin, raised on noisy
    sensors to NOISE_MARGIN x the plane's fit residual so the table's own noise never forms objects."""
    return max(cfg["ingest"]["above_plane_m"], NOISE_MARGIN * plane.residual_m)


@functools.lru_cache(maxsize=512)
def _fixed_order(n: int) -> np.ndarray:
    """The fixed random order of n points of :func:`min_enclosing_circle` (kept: a generator costs more than
    the circle of a small hull)."""
    order = np.random.default_rng(0).permutation(n)
    order.flags.writeable = False
    return order


def min_enclosing_circle(xy: np.ndarray) -> tuple[np.ndarray, float]:
    """Smallest circle (centre (2,), radius) containing points (N, 2); Welzl's algorithm on the hull.

    The incremental form (points in a fixed random order), on Python floats: the hull has tens of
    vertices, where per-point numpy calls would cost far more than the arithmetic (the tilt search
    measures one footprint per prototype and tilt)."""
    pts = np.asarray(xy, dtype=np.float64)
    if len(pts) >= 4:
        try:
            pts = pts[ConvexHull(pts).vertices]
        except QhullError:
            pass
    pts = pts[_fixed_order(len(pts))]  # fixed order: deterministic result
    if len(pts) == 0:
        return np.zeros(2), 0.0
    P = pts.tolist()

    def circle2(a, b):
        cx, cy = (a[0] + b[0]) / 2, (a[1] + b[1]) / 2
        return cx, cy, math.hypot(a[0] - cx, a[1] - cy)

    def circle3(a, b, c):
        d = 2 * (a[0] * (b[1] - c[1]) + b[0] * (c[1] - a[1]) + c[0] * (a[1] - b[1]))
        if abs(d) < 1e-15:
            return max((circle2(a, b), circle2(a, c), circle2(b, c)), key=lambda t: t[2])
        aa, bb, cc = a[0] * a[0] + a[1] * a[1], b[0] * b[0] + b[1] * b[1], c[0] * c[0] + c[1] * c[1]
        ux = (aa * (b[1] - c[1]) + bb * (c[1] - a[1]) + cc * (a[1] - b[1])) / d
        uy = (aa * (c[0] - b[0]) + bb * (a[0] - c[0]) + cc * (b[0] - a[0])) / d
        return ux, uy, math.hypot(a[0] - ux, a[1] - uy)

    # a point is inside when hypot(p - centre) <= radius (1 + 1e-9) + 1e-12, written out in the loops (the
    # tilt search runs this for every prototype and tilt: a call per test cost more than the test)
    hypot = math.hypot
    cx, cy, r = P[0][0], P[0][1], 0.0
    lim = r * (1 + 1e-9) + 1e-12
    for i in range(1, len(P)):
        pi = P[i]
        if hypot(pi[0] - cx, pi[1] - cy) <= lim:
            continue
        cx, cy, r = pi[0], pi[1], 0.0
        lim = r * (1 + 1e-9) + 1e-12
        for j in range(i):
            pj = P[j]
            if hypot(pj[0] - cx, pj[1] - cy) <= lim:
                continue
            cx, cy, r = circle2(pi, pj)
            lim = r * (1 + 1e-9) + 1e-12
            for k in range(j):
                pk = P[k]
                if not hypot(pk[0] - cx, pk[1] - cy) <= lim:
                    cx, cy, r = circle3(pi, pj, pk)
                    lim = r * (1 + 1e-9) + 1e-12
    return np.array([cx, cy]), float(r)


CIRCLES_START = 6     # candidate points per set of min_enclosing_circles' first round (the farthest from a centre)
CIRCLES_GROW = 3      # ... added per round to the sets whose circle left a point out (the farthest from it)
CIRCLES_MAX = 32      # sets still open beyond this many candidates get min_enclosing_circle, one by one


@functools.lru_cache(maxsize=64)
def _pairs_triples(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (p, 2) and triples (t, 3) of n items, ascending within each."""
    i = np.arange(n)
    pairs = np.stack(np.triu_indices(n, 1), 1)
    a, b, c = np.meshgrid(i, i, i, indexing="ij")
    keep = (a < b) & (b < c)
    triples = np.stack([a[keep], b[keep], c[keep]], 1)
    for x in (pairs, triples):
        x.flags.writeable = False
    return pairs, triples


def _circles_of_few(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Smallest circles (centres (T, 2), radii (T,)) of T small point sets q (T, L, 2), by exhaustion: every pair's
    diametral circle and every triple's circumcircle (triples within 1e-15 of collinear skipped: a pair's circle
    holds them), the smallest holding all L points (within :func:`min_enclosing_circle`'s tolerance, compared in
    squares); the smallest circle of a set is one of these (it touches 2 or 3 of its points), and holds them.  The
    candidates are compared by squared radius; the radius returned is the distance from the winner's first point
    to its centre, as :func:`min_enclosing_circle` measures it."""
    T, L = q.shape[:2]
    pairs, triples = _pairs_triples(L)
    x, y = q[..., 0], q[..., 1]
    ax, ay, bx, by = x[:, pairs[:, 0]], y[:, pairs[:, 0]], x[:, pairs[:, 1]], y[:, pairs[:, 1]]
    px, py = (ax + bx) / 2, (ay + by) / 2
    p2 = (ax - px) ** 2 + (ay - py) ** 2
    ax, ay, bx, by = x[:, triples[:, 0]], y[:, triples[:, 0]], x[:, triples[:, 1]], y[:, triples[:, 1]]
    cx, cy = x[:, triples[:, 2]], y[:, triples[:, 2]]
    d = 2 * (ax * (by - cy) + bx * (cy - ay) + cx * (ay - by))
    ok = np.abs(d) >= 1e-15
    d[~ok] = 1.0
    aa, bb, cc = ax * ax + ay * ay, bx * bx + by * by, cx * cx + cy * cy
    ux = (aa * (by - cy) + bb * (cy - ay) + cc * (ay - by)) / d
    uy = (aa * (cx - bx) + bb * (ax - cx) + cc * (bx - ax)) / d
    u2 = (ax - ux) ** 2 + (ay - uy) ** 2
    u2[~ok] = np.inf
    cenx, ceny = np.concatenate([px, ux], 1), np.concatenate([py, uy], 1)  # (T, n circles)
    rad2 = np.concatenate([p2, u2], 1)
    lim = np.sqrt(rad2) * (1 + 1e-9) + 1e-12
    dx = x[:, None, :] - cenx[..., None]
    dy = y[:, None, :] - ceny[..., None]
    holds = np.all(dx * dx + dy * dy <= (lim * lim)[..., None], axis=2)  # (T, n circles)
    best = np.argmin(np.where(holds, rad2, np.inf), axis=1)  # the first of equal radii: deterministic
    t = np.arange(T)
    first = np.concatenate([pairs[:, 0], triples[:, 0]])[best]
    cen = np.stack([cenx[t, best], ceny[t, best]], 1)
    return cen, np.hypot(x[t, first] - cen[:, 0], y[t, first] - cen[:, 1])


def min_enclosing_circles(xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Smallest circles (centres (T, 2), radii (T,)) containing each of T point sets xy (T, N, 2): all sets at
    once, the same circles as :func:`min_enclosing_circle` of each (up to float rounding: the circle is unique,
    though not which of several points on it define it).

    Rounds over all open sets at once: a candidate subset (first the ``CIRCLES_START`` points farthest from the
    bounding box's centre) gets its smallest circle by exhaustion (:func:`_circles_of_few`).  The smallest circle
    of a subset is no larger than the whole set's, so when it holds every point (the tolerance of
    :func:`min_enclosing_circle`) it is the whole set's; a set with points outside gets its ``CIRCLES_GROW``
    farthest points from that circle's centre added, and goes another round (the core-set iteration of Badoiu
    & Clarkson, "Smaller core-sets for balls", SODA 2003, from memory, with exact circles of the subsets).  Sets
    still open at ``CIRCLES_MAX`` candidates fall back to :func:`min_enclosing_circle`."""
    pts = np.asarray(xy, dtype=np.float64)
    T, N = pts.shape[:2]
    centres, radii = np.zeros((T, 2)), np.zeros(T)
    if T == 0 or N == 0:
        return centres, radii
    if N < 3:  # no triple: one by one
        for i in range(T):
            centres[i], radii[i] = min_enclosing_circle(pts[i])
        return centres, radii
    t = np.arange(T)
    mid = (pts.min(axis=1) + pts.max(axis=1)) / 2
    far = np.hypot(pts[..., 0] - mid[:, 0, None], pts[..., 1] - mid[:, 1, None])
    L = min(N, CIRCLES_START)
    cand = np.argsort(-far, axis=1, kind="stable")[:, :L]  # (T, L) indices of the farthest points
    while t.size:
        c, r = _circles_of_few(np.take_along_axis(pts[t], cand[:, :, None], axis=1))
        dist = np.hypot(pts[t, :, 0] - c[:, 0, None], pts[t, :, 1] - c[:, 1, None])  # (t, N)
        out = dist > r[:, None] * (1 + 1e-9) + 1e-12
        done = ~out.any(axis=1)
        centres[t[done]], radii[t[done]] = c[done], r[done]
        t, cand, dist = t[~done], cand[~done], dist[~done]
        if not t.size:
            break
        if cand.shape[1] >= CIRCLES_MAX:
            for i in t:
                centres[i], radii[i] = min_enclosing_circle(pts[i])
            break
        grow = np.argsort(-dist, axis=1, kind="stable")[:, :CIRCLES_GROW]
        cand = np.concatenate([cand, grow], axis=1)
    return centres, radii


def statistical_outliers(points: np.ndarray, sigma: float, k: int = OUTLIER_NEIGHBOURS) -> np.ndarray:
    """(M,) bool: the points (M, 3) whose mean distance to their ``k`` nearest neighbours exceeds the mean of
    that figure over all points by more than ``sigma`` standard deviations (statistical outlier removal: Rusu,
    Marton, Blodow, Dolha & Beetz 2008, "Towards 3D point cloud based object maps for household environments",
    the filter PCL ships as StatisticalOutlierRemoval).  None is an outlier with ``sigma`` <= 0 or k or fewer
    points."""
    pts = np.asarray(points, np.float64)
    if not sigma > 0 or len(pts) <= k:
        return np.zeros(len(pts), bool)
    d, _ = cKDTree(pts).query(pts, k + 1)  # the nearest is the point itself
    md = d[:, 1:].mean(axis=1)
    return md > md.mean() + sigma * md.std()


def lone_points(points: np.ndarray, index: np.ndarray, factor: float, k: int = OUTLIER_NEIGHBOURS,
                tree: cKDTree | None = None, base: float | None = None) -> np.ndarray:
    """(len(index),) bool: which of the points ``points[index]`` stand alone: their ``k``-th nearest neighbour among
    ``points`` (M, 3) lies farther than ``factor`` x the median of that distance over the object's points (every
    ``ceil(M / LONE_SAMPLE)``-th point; ``base`` when given).  A reading of the object's surface has the surface
    around it, within a few spacings of the fused readings; a stray reading (a depth mixed between the object's
    edge and what lies behind it) has none.  Nothing stands alone with ``factor`` <= 0 or k or fewer points."""
    pts = np.asarray(points, np.float64)
    index = np.asarray(index, np.int64)
    if not factor > 0 or len(pts) <= k or not len(index):
        return np.zeros(len(index), bool)
    tree = cKDTree(pts) if tree is None else tree
    if base is None:
        base = lone_base(pts, tree, k)
    dk = tree.query(pts[index], k + 1)[0][:, k]   # the nearest is the point itself
    return dk > factor * base


def lone_base(points: np.ndarray, tree: cKDTree, k: int = OUTLIER_NEIGHBOURS) -> float:
    """The median distance from a point to its ``k``-th nearest neighbour over every ``ceil(M / LONE_SAMPLE)``-th
    point of ``points`` (M, 3) (:func:`lone_points`)."""
    step = max(1, -(-len(points) // LONE_SAMPLE))
    return float(np.median(tree.query(points[::step], k + 1)[0][:, k]))


def supported_circle(points: np.ndarray, basis: np.ndarray, factor: float, max_drops: int = 64
                     ) -> tuple[np.ndarray, float]:
    """The minimum enclosing circle (centre (2,) in-plane, radius) of the :func:`footprint` of the world ``points``
    (M, 3), held only by points that do not stand alone (:func:`lone_points` with ``factor``): the circle rests on
    its two or three outermost points, and one stray reading among them moves its centre by centimetres.  While a
    point the circle rests on stands alone it is dropped and the circle found again (at most ``max_drops``
    points); every other point is kept, so an object whose circle rests on its own surface keeps the circle it
    had.  ``factor`` <= 0: the plain circle (``[ingest] circle_support``)."""
    pts = np.asarray(points, np.float64)
    xy = pts @ basis[:2].T
    r_med = np.linalg.norm(xy - np.median(xy, axis=0), axis=1)
    idx = np.flatnonzero(r_med <= np.percentile(r_med, FOOTPRINT_TRIM) * 1.15)    # as footprint()
    c, r = min_enclosing_circle(xy[idx])
    if not factor > 0 or len(pts) <= OUTLIER_NEIGHBOURS:
        return c, r
    tree = cKDTree(pts)
    base = lone_base(pts, tree)
    dropped = 0
    while dropped < max_drops:
        d = np.linalg.norm(xy[idx] - c, axis=1)
        rest = idx[d >= r * (1.0 - 1e-6)]               # the points the circle rests on
        lone = rest[lone_points(pts, rest, factor, tree=tree, base=base)][: max_drops - dropped]
        if not len(lone):
            break
        idx = np.setdiff1d(idx, lone)
        dropped += len(lone)
        c, r = min_enclosing_circle(xy[idx])
    return c, r


def footprint(points: np.ndarray, basis: np.ndarray) -> np.ndarray:
    """In-plane coordinates (M', 2) of an object's world points (M, 3) (``basis``: the plane's ``plane_basis``),
    without the far stragglers (beyond ``FOOTPRINT_TRIM`` percent of the distances from the median, x 1.15)."""
    xy = np.asarray(points) @ basis[:2].T
    r = np.linalg.norm(xy - np.median(xy, axis=0), axis=1)
    return xy[r <= np.percentile(r, FOOTPRINT_TRIM) * 1.15]


def centre_candidates(points: np.ndarray, frame: ObjectFrame, camera: np.ndarray, offsets: tuple[float, ...]
                      ) -> list[ObjectFrame]:
    """Object frames for a view of one object from one camera: ``frame`` (the visible footprint's minimum
    enclosing circle, :func:`object_frame`) moved by each of ``offsets`` x its radius along the in-plane
    direction away from the camera (world position ``camera`` (3,)), each with the radius of the smallest circle
    about the new centre that still holds the visible footprint.  One view shows the side facing the camera only:
    the hidden side lies beyond the visible points, so the whole footprint's centre lies at or beyond the visible
    one's, and a part hidden in this view (a leg behind the column) pulls the visible circle toward the camera and
    shrinks it.  The view search picks the candidate whose volume fits a prototype best.  Offset 0 is ``frame``
    itself; a camera straight above the centre (no direction away from it) gives ``frame`` only."""
    up = np.asarray(frame.up, np.float64)
    B = plane_basis(up)
    away = (np.asarray(frame.origin, np.float64) - np.asarray(camera, np.float64)) @ B[:2].T
    n = float(np.linalg.norm(away))
    if n < 1e-9 * max(frame.radius, 1e-9) or not offsets:
        return [frame]
    return shifted_frames(points, frame, (away / n) @ B[:2], offsets)


def shifted_frames(points: np.ndarray, frame: ObjectFrame, direction: np.ndarray, offsets: tuple[float, ...]
                   ) -> list[ObjectFrame]:
    """``frame`` moved by each of ``offsets`` x its radius along the in-plane unit ``direction`` (3,) (world), each
    with the radius of the smallest circle about the new centre that still holds the visible footprint of the
    object's world ``points`` (M, 3); offset 0 is ``frame`` itself (:func:`centre_candidates`,
    ``ingest.truncation``)."""
    B = plane_basis(np.asarray(frame.up, np.float64))
    away = np.asarray(direction, np.float64) @ B[:2].T
    xy = footprint(points, B)
    c0 = np.asarray(frame.origin, np.float64) @ B[:2].T
    out = []
    for o in offsets:
        if o == 0:
            out.append(frame)
            continue
        c = c0 + o * frame.radius * away
        r = float(np.max(np.linalg.norm(xy - c, axis=1))) if len(xy) else frame.radius
        origin = np.asarray(frame.origin, np.float64) + (o * frame.radius * away) @ B[:2]
        out.append(ObjectFrame(origin=origin, up=frame.up, radius=max(r, frame.radius), height=frame.height))
    return out


def object_frame(points: np.ndarray, plane: PlaneFit, outlier_sigma: float = 0.0, circle_support: float = 0.0
                 ) -> tuple[ObjectFrame, np.ndarray]:
    """Object frame and centre (3,) from the object's world points (M, 3).

    ``outlier_sigma`` > 0 (``[ingest] footprint_outlier_sigma``) first drops the :func:`statistical_outliers`:
    stray readings (mixed depths at silhouettes, a neighbour's edge) lie apart from the object's surface, and a
    few of them move the minimum enclosing circle, hence the base centre every azimuth is measured about.
    ``circle_support`` > 0 (``[ingest] circle_support``) drops only such readings as the circle rests on
    (:func:`supported_circle`)."""
    points = np.asarray(points)
    out = statistical_outliers(points, outlier_sigma)
    if out.any():
        points = points[~out]
    up = plane.normal
    B = plane_basis(up)
    heights = plane.height(points)
    height = max(float(np.percentile(heights, HEIGHT_QUANTILE)), 1e-3)
    c2, radius = supported_circle(points, B, circle_support)
    # base centre: the circle's centre, on the plane
    origin = c2 @ B[:2] + plane.offset * up
    centre = origin + 0.5 * height * up
    return ObjectFrame(origin=origin, up=up, radius=max(radius, 1e-3), height=height), centre


def outlier_sigma(cfg: dict, n_frames: int) -> float:
    """``[ingest] footprint_outlier_sigma`` for a point set fused from ``n_frames`` frames: 0 (the filter off) for
    a single frame, where a thin part is a strip of pixels a few wide whose neighbour distances exceed a surface
    patch's and the test would cut it, and for a config recorded before the key existed."""
    return float(cfg["ingest"].get("footprint_outlier_sigma", 0.0)) if n_frames > 1 else 0.0


def circle_support(cfg: dict, n_frames: int) -> float:
    """``[ingest] circle_support`` for a point set fused from ``n_frames`` frames: 0 (off) for a single frame, as
    :func:`outlier_sigma`, and for a config recorded before the key existed."""
    return float(cfg["ingest"].get("circle_support", 0.0)) if n_frames > 1 else 0.0


def object_cut(plane: PlaneFit, cfg: dict) -> float:
    """The height (m) above the plane at or below which no reading is given to an object, with masks or without:
    half the :func:`above_plane_margin` (the plane's own noise, or the configured margin)."""
    return 0.5 * above_plane_margin(plane, cfg)


def _mask_proposals(cap: Capture, frames: list[FrameData], plane: PlaneFit, cfg: dict) -> list[Proposal]:
    above = object_cut(plane, cfg)
    per_id: dict[int, dict[str, np.ndarray]] = {}
    pts_id: dict[int, list[np.ndarray]] = {}
    flat = _masked_under_cut(frames, plane, cfg) if cfg["ingest"].get("under_cut_parts", False) else None
    for f, fd in enumerate(frames):
        ids = fd.mask.reshape(-1)[fd.pixels]
        h = plane.height(fd.points)
        keep = (ids > 0) & (h > above) & fd.steady
        if flat is not None:
            keep |= flat[f]
        for oid in np.unique(ids[keep]):
            sel = keep & (ids == oid)
            per_id.setdefault(int(oid), {})[fd.id] = fd.pixels[sel]
            pts_id.setdefault(int(oid), []).append(fd.points[sel])
    props = []
    for oid in sorted(per_id):
        pts = np.concatenate(pts_id[oid])
        if len(pts) < 10:
            continue
        fr, centre = object_frame(pts, plane, outlier_sigma(cfg, len(per_id[oid])), circle_support(cfg, len(per_id[oid])))
        props.append(Proposal(f"{cap.name}/{oid}", str(oid), fr, centre, len(pts), per_id[oid]))
    return props


def _masked_under_cut(frames: list[FrameData], plane: PlaneFit, cfg: dict) -> list[np.ndarray]:
    """Per frame (M,) bool: the readings of a mask at or under the cut that ``[ingest] under_cut_parts`` keeps, as
    :func:`under_cut_parts` keeps them without masks: steady, over the low band's floor and in the frame's
    smoothed band (``smoothed_band``), and farther than the grouping margin from every reading of the same mask
    above the margin (every frame): a flat part reaching out from under the body, not the lowest millimetres of
    its walls."""
    cut, floor, margin = object_cut(plane, cfg), low_floor(plane), above_plane_margin(plane, cfg)
    ids, hs = [fd.mask.reshape(-1)[fd.pixels] for fd in frames], [plane.height(fd.points) for fd in frames]
    body: dict[int, list[np.ndarray]] = {}
    for fd, i, h in zip(frames, ids, hs):
        sel = (i > 0) & (h > margin) & fd.steady
        for oid in np.unique(i[sel]):
            body.setdefault(int(oid), []).append(fd.points[sel & (i == oid)])
    trees = {oid: cKDTree(np.concatenate(b)) for oid, b in body.items()}
    out = []
    for fd, i, h in zip(frames, ids, hs):
        hf = np.zeros(fd.depth.size)
        hf[fd.pixels] = h
        smooth = smoothed_band(hf.reshape(fd.depth.shape), fd.depth > 0, plane, margin).reshape(-1)[fd.pixels]
        low = (i > 0) & (h > floor) & (h <= cut) & fd.steady & smooth
        for oid in np.unique(i[low]):
            sel = np.flatnonzero(low & (i == oid))
            if int(oid) in trees:
                low[sel] = trees[int(oid)].query(fd.points[sel], distance_upper_bound=margin)[0] > margin
        out.append(low)
    return out


def _geometry_proposals(cap: Capture, frames: list[FrameData], plane: PlaneFit, cfg: dict) -> list[Proposal]:
    c = cfg["ingest"]
    eps = c["cluster_eps_m"]
    above_sel = []
    for fd in frames:
        h = plane.height(fd.points)
        above_sel.append((h > above_plane_margin(plane, cfg)) & (h < 2.0) & fd.steady)
    pts = np.concatenate([fd.points[s] for fd, s in zip(frames, above_sel)])
    if len(pts) == 0:
        return []
    # unit vectors from each point to the camera that saw it: they orient the surface normals outwards
    views = np.concatenate([fd.cam_to_world[:3, 3] - fd.points[s] for fd, s in zip(frames, above_sel)])
    views /= np.maximum(np.linalg.norm(views, axis=1, keepdims=True), 1e-12)
    rgbs = np.concatenate([fd.rgb.reshape(-1, 3)[fd.pixels[s]] for fd, s in zip(frames, above_sel)]).astype(np.float64)
    index = voxel_index(pts, eps / 3.0)   # the voxels of the means, the frames' votes and the contact voxels
    vox, views, colours = voxel_means(pts, eps / 3.0, views, rgbs, index=index)
    lab = DBSCAN(eps=eps, min_samples=DBSCAN_MIN_SAMPLES).fit_predict(vox)
    if c["concave_deg"] < 180.0:
        normals = voxel_normals(vox, views, lab, radius=NORMAL_RADIUS * eps)
        votes = _frame_votes(cap, frames, above_sel, index, c["concave_deg"]) if VIEW_CHECK else None
        grow = bool(c.get("crumb_grow", False))
        mixed = contact_voxels(index[1], rgbs, len(vox)) if grow and COLOUR_CUT else None
        handed = np.zeros(len(vox), bool) if grow else None   # the crumbs handed to a part, out of the long seams
        parts, _ = convex_parts(vox, normals, lab, adjacency=0.5 * eps, concave_deg=c["concave_deg"], votes=votes,
                                colours=colours if COLOUR_CUT else None, regroup=bool(c.get("crumb_regroup", False)),
                                grow=grow, mixed=mixed, handed=handed)
        step_share = float(c.get("seam_step_share", 0.0))
        readings = _seam_readings(frames, above_sel, index[1]) if step_share > 0 else None
        lab = join_parts(vox, parts, vox @ plane_basis(plane.normal)[:2].T, plane.height(vox), link_radius=eps, reach=3 * eps,
                         support_band=SUPPORT_BAND_M, inset=STAND_INSET_M, min_voxels=c["cluster_min_points"],
                         low=_low_band(frames, plane, cfg, eps), colours=colours, cell=eps / 3.0, handed=handed,
                         readings=readings, step_share=step_share,
                         neck_cut=bool(c.get("twin_neck_cut", False)) and step_share > 0,
                         spread_ratio=float(c.get("twin_spread_ratio", 0.0)),
                         neck_twin_share=float(c.get("twin_neck_step_share", 0.0)),
                         cannot_link=bool(c.get("twin_cannot_link", False)),
                         normals=normals if c.get("piece_convex_seam", False) else None,
                         concave_deg=c["concave_deg"],
                         side_normals=normals if c.get("neck_side_pieces", False) else None)
    lab = _merge_overlapping_footprints(vox, lab, plane, on_plane=ON_PLANE * above_plane_margin(plane, cfg),
                                        colours=colours)
    clusters = []
    for l in range(lab.max() + 1):
        sel = lab == l
        if sel.sum() < c["cluster_min_points"]:
            continue
        fr, centre = object_frame(vox[sel], plane, outlier_sigma(cfg, len(frames)), circle_support(cfg, len(frames)))
        if fr.height < c["min_object_height_m"] or not (c["min_object_radius_m"] <= fr.radius <= c["max_object_radius_m"]):
            continue
        clusters.append((vox[sel], fr, centre))
    # stable ids: order by position in the plane's own coordinates, rounded to 1 cm
    B = plane_basis(plane.normal)
    clusters.sort(key=lambda t: tuple(np.round(t[2] @ B.T, 2)))
    props = _grown_proposals(cap, frames, above_sel, plane, cfg, clusters)
    # a group that is only a patch of a base (the rim of a disc as thick as the grouping margin) is lower
    # than an object once it holds its low band too: it gives its pixels back to the objects around it
    # so is a group that stays within the support band and lies over the footprint of a taller object
    flat = [i for i, p in enumerate(props) if p is not None and (
        p.frame.height < c["min_object_height_m"]
        or (p.frame.height < SUPPORT_BAND_M and _over_taller(clusters[i][0], p, props, plane, eps)))]
    if flat:
        clusters = [t for i, t in enumerate(clusters) if i not in flat]
        props = _grown_proposals(cap, frames, above_sel, plane, cfg, clusters)
    return [p for p in props if p is not None and p.frame.height >= c["min_object_height_m"]]


CONTEST = 2.0           # under_cut_parts: x cluster_eps_m, the reach of an object of one colour that makes a reading contested
UNDER_CUT = 1 << 30      # label offset of a reading at or under the cut that stays its object's (under_cut_parts)


def under_cut_parts(kept: list, plane: PlaneFit, cut: float, floor: float, margin: float, label_chroma: np.ndarray,
                    link: float) -> None:
    """``[ingest] under_cut_parts``: a flat part whose top lies at or under the ingest's cut (a base disc 2-4 mm
    thick) stays its object's, without masks.  ``kept``: per frame (FrameData, labels (H * W,) after the growth
    into the low band, heights (H * W,), point_of, chromaticity (H * W, 3), growth band and smoothed band
    (H * W,) bool); labels
    are changed in place: a reading at or under ``cut`` that stays its object's gets ``UNDER_CUT`` + its label.

    1. Across frames, in 3-D: the readings of the frames' low bands (from ``floor`` to the grouping ``margin``,
       steady, of a known colour) that no growth in their own frame reached (where the image border, a neighbour
       or the object's own post parts them from the body in that frame) are grown into from every object's
       readings (all frames, all heights), one ``link`` (m) step at a time, up to LOW_GROW_M: a reading joins
       object i when it lies within ``link`` of i's readings or of those joined before, is within GROW_CHROMA of
       i's colour, and no reading of another object of its colour lies within 2 ``link`` of it (never a
       neighbour's: where two bases of one colour meet nothing joins, and the growth cannot pass there; where
       they differ, the colours part them); one reached by two objects in one step joins neither.
    2. A reading at or under the cut, grown into or joined, stays its object's only where it lies in the frame's
       smoothed band (``smoothed_band``: the median of its window stands over the table's own smoothed noise, so
       a speckle of the table's noise over the floor does not) and farther than
       the ``margin`` from every reading of that object above the margin (every frame): a flat part reaching out
       from under the body (a base disc, a flange; under an overhanging peg too, which is higher than that).
       The lowest millimetres of the object's own walls lie within the margin of the wall above them and are
       left to the cut as with masks; the table's readings next to a rim stay out, as the growth crosses only
       the band between the noise floor and the margin, within the object's colour."""
    n = len(label_chroma)
    if n == 0:
        return
    body = [[] for _ in range(n)]                   # each object's readings above the margin (3-D)
    every = [[] for _ in range(n)]                  # all its readings (3-D)
    cand_pts, cand_at, cand_ch = [], [], []
    for f, (fd, lab, h, po, ch, band, _) in enumerate(kept):
        idx = np.flatnonzero(lab >= 0)
        pts, hh, ll = fd.points[po[idx]], h[idx], lab[idx]
        for i in np.unique(ll):
            mine = ll == i
            body[i].append(pts[mine & (hh > margin)])
            every[i].append(pts[mine])
        c = np.flatnonzero((lab < 0) & band & (h > floor) & (h <= margin) & (po >= 0) & ~np.isnan(ch[:, 0]))
        cand_pts.append(fd.points[po[c]])
        cand_at.append(np.stack([np.full(len(c), f), c], 1))
        cand_ch.append(ch[c])
    every_t = [cKDTree(np.concatenate(e)) if e else None for e in every]
    body_t = [cKDTree(np.concatenate(e)) if e and sum(len(x) for x in e) else None for e in body]
    P, at, C = np.concatenate(cand_pts), np.concatenate(cand_at), np.concatenate(cand_ch)
    if len(P):
        # each candidate's owner by colour and reach; contested: within 2 link of the readings of two objects
        # whose colours it has both (joins none, the growth stops there); -2: reached by two in one step
        owner = np.full(len(P), -1)
        near_any = np.zeros((len(P), n), bool)
        for i in range(n):
            if every_t[i] is not None:
                near_any[:, i] = every_t[i].query(P, distance_upper_bound=CONTEST * link)[0] <= CONTEST * link
        colour_ok = np.stack([np.linalg.norm(C - label_chroma[i], axis=1) <= GROW_CHROMA for i in range(n)], 1)
        reach_ok = np.stack([(every_t[i].query(P, distance_upper_bound=LOW_GROW_M)[0] <= LOW_GROW_M)
                             if every_t[i] is not None else np.zeros(len(P), bool) for i in range(n)], 1)
        contested = (near_any & colour_ok).sum(axis=1) > 1
        tree = cKDTree(P)
        frontier = []
        for i in range(n):
            if every_t[i] is None:
                frontier.append(np.zeros(0, int))
                continue
            hit = np.flatnonzero(every_t[i].query(P, distance_upper_bound=link)[0] <= link)
            frontier.append(hit)
        while any(len(x) for x in frontier):
            claim = np.full(len(P), -1)
            for i in range(n):
                if not len(frontier[i]):
                    continue
                cand = frontier[i]
                cand = cand[(owner[cand] == -1) & colour_ok[cand, i] & reach_ok[cand, i] & ~contested[cand]]
                cand = np.unique(cand)
                both = claim[cand] >= 0
                claim[cand[both]] = -2
                claim[cand[~both]] = i
            new = np.flatnonzero(claim >= 0)
            owner[claim == -2] = -2
            owner[new] = claim[new]
            nxt = []
            for i in range(n):
                mine = new[claim[new] == i]
                if len(mine):
                    nb = tree.query_ball_point(P[mine], link)
                    nxt.append(np.unique(np.concatenate([np.asarray(x, int) for x in nb])))
                else:
                    nxt.append(np.zeros(0, int))
            frontier = nxt
        for k in np.flatnonzero(owner >= 0):
            kept[at[k, 0]][1][at[k, 1]] = owner[k]
    for fd, lab, h, po, _, _, smooth in kept:
        idx = np.flatnonzero((lab >= 0) & (h <= cut) & smooth)
        if not len(idx):
            continue
        pts = fd.points[po[idx]]
        stay = np.zeros(len(idx), bool)
        for i in np.unique(lab[idx]):
            mine = lab[idx] == i
            if body_t[i] is None:
                stay[mine] = True
            else:
                stay[mine] = body_t[i].query(pts[mine], distance_upper_bound=margin)[0] > margin
        lab[idx[stay]] += UNDER_CUT


def _seam_readings(frames: list[FrameData], above_sel: list[np.ndarray], inv: np.ndarray) -> list:
    """Per frame ((h, w), pixels (m,), voxels (m,), depth (m,)) of its readings above the plane, for
    ``convexity.seam_steps``; inv: (M,) voxel of every selected reading, frames concatenated."""
    out, at = [], 0
    for fd, s in zip(frames, above_sel):
        pix = fd.pixels[s]
        out.append((fd.depth.shape, pix, inv[at:at + len(pix)], fd.depth.reshape(-1)[pix]))
        at += len(pix)
    return out


def _over_taller(vox: np.ndarray, p: Proposal, props: list[Proposal | None], plane: PlaneFit, eps: float) -> bool:
    """Whether most of the voxels (V, 3) of the low proposal ``p`` lie within the footprint circle (grown by
    ``eps``) of a taller proposal among ``props``."""
    B = plane_basis(plane.normal)[:2]
    xy = vox @ B.T
    for q in props:
        if q is None or q is p or q.frame.height < SUPPORT_BAND_M:
            continue
        d = np.linalg.norm(xy - q.frame.origin @ B.T, axis=1)
        if np.mean(d <= q.frame.radius + eps) > 0.5:
            return True
    return False


def _grown_proposals(cap: Capture, frames: list[FrameData], above_sel: list[np.ndarray], plane: PlaneFit, cfg: dict,
                     clusters: list[tuple[np.ndarray, ObjectFrame, np.ndarray]]) -> list[Proposal | None]:
    """One proposal per point group (voxels, frame, centre) (None when it holds no pixel): each frame's
    readings above the margin go to the nearest group's voxels (within cluster_eps_m), then the groups
    grow into the frame's low band (``grow_into_low_band``); the object frame is measured again from it."""
    eps = cfg["ingest"]["cluster_eps_m"]
    if not clusters:
        return []
    tree_pts = np.concatenate([t[0] for t in clusters])
    tree_lab = np.concatenate([np.full(len(t[0]), i) for i, t in enumerate(clusters)])
    tree = cKDTree(tree_pts)
    props = [Proposal(f"{cap.name}/p{i:03d}", f"p{i:03d}", fr, centre, 0, {}) for i, (_, fr, centre) in enumerate(clusters)]
    floor = low_floor(plane)
    own_trees = [cKDTree(t[0]) for t in clusters]
    grown: list[list[np.ndarray]] = [[] for _ in props]
    seeds_of, chroma_of = [], []
    for fd, s in zip(frames, above_sel):
        d, j = tree.query(fd.points[s], distance_upper_bound=eps)
        ok = np.isfinite(d)
        labels = np.full(fd.depth.size, -1)
        labels[fd.pixels[s][ok]] = tree_lab[j[ok]]
        rgb = fd.rgb.reshape(-1, 3).astype(np.float64)
        bright = rgb.sum(axis=1)
        ch = np.where((bright >= DARK_RGB)[:, None], rgb / np.maximum(bright, 1.0)[:, None], np.nan)
        seeds_of.append(labels)
        chroma_of.append(ch)
    # each object's colour: the median chromaticity of its readings above the margin in every frame
    lab_all = np.concatenate(seeds_of)
    ch_all = np.concatenate(chroma_of)
    label_chroma = np.full((len(props), 3), np.nan)
    for i in range(len(props)):
        sel = (lab_all == i) & ~np.isnan(ch_all[:, 0])
        if sel.any():
            label_chroma[i] = np.median(ch_all[sel], axis=0)
    kept = []      # per frame (frame, labels (H * W,), heights, point_of, chromaticity, growth band, smoothed band)
    for fd, s, labels, ch in zip(frames, above_sel, seeds_of, chroma_of):
        h = np.zeros(fd.depth.size)
        h[fd.pixels] = plane.height(fd.points)
        steady = np.zeros(fd.depth.size, bool)
        steady[fd.pixels] = fd.steady
        smooth = smoothed_band(h.reshape(fd.depth.shape), fd.depth > 0, plane, above_plane_margin(plane, cfg))
        band = (h > floor).reshape(fd.depth.shape) | smooth
        point_of = point_of_frame(fd)
        labels = _release_low_strays(labels, h, fd, point_of, ch, label_chroma, own_trees,
                                     np.inf if cfg["ingest"].get("crumb_grow", False) else SUPPORT_BAND_M)
        seeds = labels.copy()
        steps = grow_steps(fd.depth, seeds >= 0, cap.intrinsics.K, LOW_GROW_M)
        grow_band = band & steady.reshape(fd.depth.shape)
        chi = ch.reshape(fd.depth.shape + (3,))
        labels = grow_from_bodies(labels, h, ON_PLANE * above_plane_margin(plane, cfg), fd.depth, grow_band, steps,
                                  chi, label_chroma)
        seeds = np.where(labels == seeds, seeds, -1)          # readings whose object changed count as grown
        # the rings are counted at the nearest object's depth: farther objects stop at LOW_GROW_M in metres
        new = np.flatnonzero((labels >= 0) & (seeds < 0))
        for i in np.unique(labels[new]):
            sel = new[labels[new] == i]
            far = own_trees[i].query(fd.points[point_of[sel]], distance_upper_bound=LOW_GROW_M)[0] == np.inf
            labels[sel[far]] = -1
        # where two bases of one colour touch, the image-space growth of one runs on over the other's base
        # (no depth step, no colour change between them); each base lies nearest its own object's voxels, so
        # a grown reading nearest the voxels of another object of its colour is left to neither
        new = np.flatnonzero((labels >= 0) & (seeds < 0))
        if len(new):
            _, jn = tree.query(fd.points[point_of[new]])
            near, own = tree_lab[jn], labels[new]
            alike = ~(np.linalg.norm(label_chroma[near] - label_chroma[own], axis=1) > GROW_CHROMA)   # NaN: alike
            labels[new[(near != own) & alike]] = -1
        kept.append((fd, labels, h, point_of, ch, grow_band.reshape(-1), smooth.reshape(-1)))
    cut = object_cut(plane, cfg)
    if cfg["ingest"].get("under_cut_parts", False):
        under_cut_parts(kept, plane, cut, floor, above_plane_margin(plane, cfg), label_chroma, eps)
    for fd, labels, h, point_of, *_ in kept:
        # like a mask's pixels: readings from half the grouping margin up (the band under it only carried
        # the growth across a base's low rim; lower readings are the table's as much as the object's), but with
        # ``[ingest] under_cut_parts`` a flat part beyond the footprint above the cut (``under_cut_parts``)
        labels[(h <= cut) & (labels < UNDER_CUT)] = -1
        labels[labels >= UNDER_CUT] -= UNDER_CUT
        for i, p in enumerate(props):
            pix = np.flatnonzero(labels == i)
            if len(pix):
                p.pixels[fd.id] = pix
                p.n_points += len(pix)
                grown[i].append(fd.points[point_of[pix]])
    out: list[Proposal | None] = []
    for p, g in zip(props, grown):
        if p.n_points == 0:
            out.append(None)
            continue
        # the frame from every point the object holds now, its low band included (a base disc widens the
        # footprint), like a mask's pixels
        # (each within LOW_GROW_M of its grouped voxels: a base disc reaches farther out than its pegs do)
        p.frame, p.center_world = object_frame(np.concatenate(g), plane, outlier_sigma(cfg, len(g)), circle_support(cfg, len(g)))
        out.append(p)
    return out


def _frame_votes(cap: Capture, frames: list[FrameData], above_sel: list[np.ndarray], index: tuple[int, np.ndarray],
                 concave_deg: float):
    """Each frame's segments (``convexity.frame_segments``) of its readings above the plane, as per-voxel
    shares (``convexity.view_votes``) on the voxel grid ``index`` (``voxel_index`` of the concatenated selected
    readings)."""
    K = cap.intrinsics.K
    segs, fidx = [], []
    for f, (fd, s) in enumerate(zip(frames, above_sel)):
        region = np.zeros(fd.depth.size, bool)
        region[fd.pixels[s]] = True
        seg = frame_segments(fd.depth, region.reshape(fd.depth.shape), K, concave_deg)
        segs.append(seg.reshape(-1)[fd.pixels[s]])
        fidx.append(np.full(int(s.sum()), f))
    n, inv = index
    return view_votes(inv, np.concatenate(segs), np.concatenate(fidx), n)


def smoothed_band(h: np.ndarray, valid: np.ndarray, plane: PlaneFit, margin: float) -> np.ndarray:
    """(H, W) bool: readings of a frame whose height over the plane, median-filtered over a
    SMOOTH_WINDOW square, stands above the table's own smoothed noise.

    A thin base disc (a few mm) on a noisy sensor is half below the per-reading floor (2.5 x the plane's
    residual), a speckle growth cannot cross.  The median of a window is as high as the disc, and its
    spread over the table is measured in this very frame (robust MAD of the filtered heights of the
    readings near the plane), so noise correlated between neighbouring readings (stereo matching windows)
    raises the floor instead of leaking the table into objects.  h: (H, W) heights (m), valid: (H, W) bool,
    margin: the grouping margin (m)."""
    from scipy.ndimage import median_filter
    # readings above the grouping margin (the objects themselves) and holes count as low: the median only
    # rises where most of the window is low band, so it never spreads an object's body over the table
    hs = median_filter(np.where(valid & (h <= margin), h, -1.0), size=SMOOTH_WINDOW)
    near = valid & (np.abs(h) < NOISE_MARGIN * max(plane.residual_m, 1e-4)) & (hs > -1.0)
    if near.sum() < 100:
        return np.zeros(h.shape, bool)
    sigma = 1.4826 * float(np.median(np.abs(hs[near] - np.median(hs[near]))))
    return valid & (hs > max(LOW_FLOOR_M, LOW_FLOOR_SIGMA * sigma))


def _release_low_seeds(labels: np.ndarray, h: np.ndarray, low: float) -> np.ndarray:
    """Flat labels (H * W,) with the readings lower than ``low`` (m over the plane, h (H * W,)) of every object
    that also holds readings above it in the frame set free: the growth into the low band claims them again,
    from the body outwards.  Where two bases of one colour touch, the noise peaks of one base's rim stand
    over the grouping margin and sit in the fused voxels of whichever object is nearest; seeded there, the
    growth of the wrong object would start on the other's base.  Grown from the bodies, the bases part
    where the growth fronts meet."""
    body = np.unique(labels[(labels >= 0) & (h >= low)])
    out = labels.copy()
    out[(labels >= 0) & (h < low) & np.isin(labels, body)] = -1
    return out


def grow_from_bodies(labels: np.ndarray, h: np.ndarray, low: float, depth: np.ndarray, band: np.ndarray, steps: int,
                     chroma: np.ndarray | None = None, label_chroma: np.ndarray | None = None) -> np.ndarray:
    """Flat labels (H * W,) grown into ``band`` (``grow_into_low_band``) first from the bodies only: the
    readings under ``low`` of objects that stand over it in the frame are set free (``_release_low_seeds``)
    and claimed again by the growth; low readings no body reached (a base whose band the noise broke up)
    keep their object, and everything grows on from there.  h: (H * W,) heights over the plane (m); depth,
    band (H, W); chroma, label_chroma as in ``grow_into_low_band``."""
    shape = depth.shape
    first = grow_into_low_band(_release_low_seeds(labels, h, low).reshape(shape), depth, band, steps, chroma,
                               label_chroma).reshape(-1)
    back = (first < 0) & (labels >= 0)
    first[back] = labels[back]
    return grow_into_low_band(first.reshape(shape), depth, band, steps, chroma, label_chroma).reshape(-1)


def point_of_frame(fd: FrameData) -> np.ndarray:
    """(H * W,) index of each pixel's reading in ``fd.points`` (-1: no reading)."""
    out = np.full(fd.depth.size, -1)
    out[fd.pixels] = np.arange(len(fd.pixels))
    return out


def _release_low_strays(labels: np.ndarray, h: np.ndarray, fd: FrameData, point_of: np.ndarray, ch: np.ndarray,
                        label_chroma: np.ndarray, trees: list, below: float = SUPPORT_BAND_M) -> np.ndarray:
    """Readings (flat labels (H * W,)) low over the plane (under ``below``: SUPPORT_BAND_M, or every height with
    ``[ingest] crumb_grow``) that are not of their object's
    colour (chromaticity farther than GROW_CHROMA) but of a neighbour's whose voxels lie within LOW_GROW_M are
    left to no object (the neighbour's growth may take them).  Where two bases touch, the noise peaks of
    one base's rim stand over the grouping margin next to the other object's voxels; in the object's footprint
    (a minimum enclosing circle) a few of them move the base centre by millimetres.  h: (H * W,) heights,
    ch: (H * W, 3) chromaticity (NaN: too dark), label_chroma (L, 3), trees: per object a cKDTree of its voxels."""
    cand = np.flatnonzero((labels >= 0) & (h < below) & ~np.isnan(ch[:, 0]))
    if not len(cand) or len(label_chroma) < 2:
        return labels
    off = np.linalg.norm(ch[cand] - label_chroma[labels[cand]], axis=1) > GROW_CHROMA
    cand = cand[off]
    if not len(cand):
        return labels
    pts = fd.points[point_of[cand]]
    other = np.zeros(len(cand), bool)
    for j, t in enumerate(trees):
        alike = (np.linalg.norm(ch[cand] - label_chroma[j], axis=1) <= GROW_CHROMA) & (labels[cand] != j)
        if alike.any():
            near = t.query(pts[alike], distance_upper_bound=LOW_GROW_M)[0] < np.inf
            other[np.flatnonzero(alike)[near]] = True
    out = labels.copy()
    out[cand[other]] = -1
    return out


def grow_steps(depth: np.ndarray, seeds: np.ndarray, K: np.ndarray, reach_m: float) -> int:
    """Rings of pixels that span ``reach_m`` metres at the nearest seed reading of a frame: depth (H, W)
    metres, seeds (H, W) or flat bool, K the 3x3 intrinsics (pinhole: a length L at depth z spans f L / z
    pixels).  At most the image's larger side."""
    z = depth.reshape(-1)[seeds.reshape(-1)]
    z = z[z > 0]
    if not len(z):
        return 0
    return int(min(math.ceil(reach_m * max(K[0, 0], K[1, 1]) / float(z.min())), max(depth.shape)))


def low_floor(plane: PlaneFit) -> float:
    """Height over the plane from which a reading is not the table's own noise (the low band's floor)."""
    return max(LOW_FLOOR_M, LOW_FLOOR_SIGMA * plane.residual_m)


def _low_band(frames: list[FrameData], plane: PlaneFit, cfg: dict, eps: float):
    """Voxels (L, 3) of the readings between the noise floor and the grouping margin, their in-plane
    coordinates (L, 2) and connected components (L,) (neighbours within eps / 2)."""
    pts = np.concatenate([fd.points[(plane.height(fd.points) > low_floor(plane))
                                    & (plane.height(fd.points) <= above_plane_margin(plane, cfg)) & fd.steady]
                          for fd in frames])
    if len(pts) == 0:
        return None
    (vox,) = voxel_means(pts, eps / 3.0)
    pairs = cKDTree(vox).query_pairs(eps / 2, output_type="ndarray")
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    g = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(vox), len(vox)))
    comp = connected_components(g, directed=False)[1]
    return vox, vox @ plane_basis(plane.normal)[:2].T, comp


def grow_into_low_band(labels: np.ndarray, depth: np.ndarray, band: np.ndarray, steps: int,
                       chroma: np.ndarray | None = None, label_chroma: np.ndarray | None = None) -> np.ndarray:
    """Object labels (H, W) (-1 = none) grown into the pixels of ``band`` (H, W) bool (readings between the
    plane's noise floor and the grouping margin: a base disc, the lower edge of a lying part), one 4-neighbour
    ring per step, only across continuous depth (|dz| <= FLYING_TOL_M or FLYING_TOL_REL x z), at most
    ``steps`` rings.  The table itself lies below the band, so growth stops at the object's rim.

    chroma: optional (H, W, 3) chromaticity (r, g, b) / (r + g + b) of the pixels (NaN where too dark to
    tell) and label_chroma (L, 3) each label's own: a label then grows only into pixels within GROW_CHROMA
    of its colour (two bases that touch lie at one height, nothing but their colours tells them apart)."""
    lab = labels.copy()
    free = band & (lab < 0) & (depth > 0)
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * depth)
    gate = chroma is not None and label_chroma is not None and len(label_chroma) > 0
    for _ in range(steps):
        new = np.full_like(lab, -1)
        for axis, shift in ((0, 1), (0, -1), (1, 1), (1, -1)):
            nb = np.roll(lab, shift, axis=axis)
            nd = np.roll(depth, shift, axis=axis)
            edge = np.zeros_like(free)
            sl = [slice(None)] * 2
            sl[axis] = slice(0, 1) if shift == 1 else slice(-1, None)
            edge[tuple(sl)] = True                       # np.roll wraps around: not a neighbour
            take = free & (new < 0) & (nb >= 0) & ~edge & (np.abs(nd - depth) <= tol)
            if gate and take.any():
                t = np.flatnonzero(take)
                d = np.linalg.norm(chroma.reshape(-1, 3)[t] - label_chroma[nb.reshape(-1)[t]], axis=1)
                take.reshape(-1)[t[d > GROW_CHROMA]] = False           # NaN (dark) compares False: kept
            new[take] = nb[take]
        if not (new >= 0).any():
            break
        lab = np.where(new >= 0, new, lab)
        free &= new < 0
    return lab


def _merge_overlapping_footprints(pts: np.ndarray, lab: np.ndarray, plane: PlaneFit, on_plane: float = 0.0,
                                  colours: np.ndarray | None = None) -> np.ndarray:
    """Merge DBSCAN groups whose footprints overlap (one object whose thin parts lost contact).

    Objects rest side by side on the support surface, so when most (FOOTPRINT_OVERLAP) of one group's
    footprint lies inside another group's footprint (its 2-D convex hull in the plane), the two are parts
    of one object (e.g. a post and its legs).  A long group (a wall, a shelf edge) only absorbs what lies
    over it.  A group that reaches down to the plane itself (its 2nd height percentile below ``on_plane``)
    and holds at least STANDS_SHARE of the other's voxels stands there on its own: a touching neighbour
    whose pegs or rim overhang another's base is not absorbed by it (a small piece still is).  With
    ``colours`` (V, 3) RGB, neither is a group of one colour (``convexity.one_colour``) reaching down to the
    plane whose colour differs from the host's (median chromaticity farther apart than convexity.SAME_CHROMA):
    a neighbour standing inside the convex hull of an L-shaped or leaning object.  A crumb mixing two
    objects' edges and their shadows has no one colour and is still absorbed.  Returns relabelled groups 0..n-1 (noise stays -1).
    """
    from scipy.spatial import Delaunay
    n = lab.max() + 1
    if n < 2:
        return lab
    B = plane_basis(plane.normal)
    xy = [pts[lab == l] @ B[:2].T for l in range(n)]
    hulls = []
    for q in xy:
        try:
            hulls.append(Delaunay(q[ConvexHull(q).vertices]) if len(q) >= 4 else None)
        except QhullError:
            hulls.append(None)
    parent = list(range(n))

    def root(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    low = [float(np.percentile(plane.height(pts[lab == l]), 2)) < on_plane for l in range(n)]
    chroma = [_chroma(colours[lab == l]) for l in range(n)] if colours is not None else None
    alone = [colours is not None and one_colour(colours[lab == l], GROW_CHROMA) for l in range(n)]
    for i in range(n):
        # one host per group (the one covering most of it): a crumb between two touching objects lies in
        # both their hulls and must not glue them together
        best, best_share = -1, FOOTPRINT_OVERLAP
        for j in range(n):
            if i == j or hulls[j] is None or len(xy[i]) > len(xy[j]):
                continue
            if low[i] and len(xy[i]) >= STANDS_SHARE * len(xy[j]):
                continue                 # a neighbour of its own size, standing on the plane beside it
            if low[i] and alone[i] and np.linalg.norm(chroma[i] - chroma[j]) >= SAME_CHROMA:
                continue                 # a neighbour of another colour, standing on the plane beside it
            share = float(np.mean(hulls[j].find_simplex(xy[i]) >= 0))
            if share >= best_share:
                best, best_share = j, share
        if best >= 0:
            parent[root(i)] = root(best)
    roots = np.array([root(i) for i in range(n)])
    _, new = np.unique(roots, return_inverse=True)
    return np.where(lab >= 0, new[np.maximum(lab, 0)], -1)


def find_objects(cap: Capture, cfg: dict, rng: np.random.Generator, *, frame_ids: list[str] | None = None,
                 use_masks: bool = True, progress: Callable[[str], None] | None = None) -> SceneObjects:
    """Support plane and object proposals of a capture (or of the frames ``frame_ids`` only)."""
    masked = use_masks and cap.has_masks
    ing = cfg["ingest"]
    # mask-free, line_support only with line_support_maskfree: it cost the geometry-only proposals (configs);
    # a store's config recorded before these keys existed was made without them
    k = ing.get("line_support", 0.0) if masked or ing.get("line_support_maskfree", False) else 0.0
    frames = load_frames(cap, frame_ids, progress, line_support=k,
                         one_sided=ing.get("line_support_one_sided", False), use_masks=use_masks)
    plane = fit_support_plane(cap, frames, cfg, rng)
    if masked:
        props = _mask_proposals(cap, frames, plane, cfg)
    else:
        props = _geometry_proposals(cap, frames, plane, cfg)
    return SceneObjects(cap, plane, frames, props, object_cut(plane, cfg))
