"""Object-centric cylindrical feature volumes: lifting views of one object into a (C, R, A, H) grid.

Grid (see DEVELOPERS.md): radial bin i covers rho / rho_max in [i/R, (i+1)/R); azimuth bin j covers
phi in [j, j+1) * 360/A degrees counter-clockwise about up from the object's x axis (the reference
direction); height bin k covers z / z_max in [k/H, (k+1)/H).  rho_max = radial_margin * footprint
radius and z_max = height_margin * height, so every volume is scale-normalised; the metric size is kept
beside it.  Yawing the object by +d degrees rolls the volume by +d / (360/A) bins along azimuth, which is
what makes the pose search an FFT along one axis.

Channels (``CHANNELS``), per cell, fused over the frames that observed it:
  surface   1 - exp(-n / (k n75)): n = trilinear splat weight of the object's own points in this frame,
            n75 = its 75th percentile over the cells hit in this frame (resolution/distance invariant),
            k = volume.surface_points_per_cell
  free      fraction of observing frames in which a camera ray passed through the cell before
            hitting a surface (projective carving: cell depth < measured depth - margin; with
            ``carve_to_plane``, where the reading lies on the support plane, cell depth < measured depth:
            the space above an empty plane is free right down to it, so free space does not depend on
            which face is down)
  observed  number of frames that observed the cell (in front of or at the measured surface; with
            ``others_unseen``, only in front of a reading another object holds: a touching neighbour's
            surface is not evidence about this object)
            With ``others_free`` a cell at a reading another object holds counts as free instead (the
            neighbour, not this object, fills it: what the object standing alone would show there)
            With ``plane_band`` > 0 a frame counts for less than one at a cell in the band just above the
            support plane that reads empty (seen, not free, none of the object's points): the ingest gives no
            reading at or under its cut height to an object, so a part lying flush with the plane and the bare
            plane read alike there (:func:`band_discount`; the band is ``plane_band`` x that cut, which the
            plane fit's own noise sets: ``ingest.proposals.object_cut``)
  red, green, blue   mean colour of the points splatted into the cell, in [0, 1]
A cell behind a surface (occluded) or at a pixel with no depth reading is not observed in that frame, so
"unseen" is never confused with "empty": a projector shadow or a dropout leaves its cells unobserved.  A cell
with the object's points in it is observed, except, with ``unread_min_surface`` > 0, one whose own pixel has no
reading and whose surface evidence stays below that: the trilinear spill of a neighbour's points says nothing
about whether it is empty (beside a shadowed silhouette such cells read "seen, not free").  A
flying pixel (a reading between a near and a far surface at a depth edge, ``depthedges``) counts as no
reading: it is neither surface (proposals never give it to an object) nor free space in front of it.  Single-view lifting is the same code with one frame; its
volume is partial (observed = 0 where unseen).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..geometry import EPS, camera_to_world, invert_rigid, pixels_to_camera, plane_basis, transform_points
from .depthedges import steady_depth_at

_UNIT_BYTE = np.arange(256) / 255.0    # each byte's value in [0, 1], float64
_UNIT_BYTE.setflags(write=False)

CHANNELS = ("surface", "free", "observed", "red", "green", "blue")
FEATURES = ("surface", "free", "red*surface", "green*surface", "blue*surface")


@dataclass(frozen=True)
class Grid:
    radial_bins: int = 8
    azimuth_bins: int = 36
    height_bins: int = 12
    radial_margin: float = 1.15
    height_margin: float = 1.10
    surface_points_per_cell: float = 3.0
    carve_margin_cells: float = 0.75
    carve_to_plane: bool = False
    unread_min_surface: float = 0.0
    others_unseen: bool = False
    others_free: bool = False
    plane_band: float = 0.0

    @classmethod
    def from_config(cls, cfg: dict) -> "Grid":
        return cls(**cfg["volume"])

    @property
    def shape(self) -> tuple[int, int, int]:
        return (self.radial_bins, self.azimuth_bins, self.height_bins)

    @property
    def reads_others(self) -> bool:
        """Whether lifting reads the pixels other objects hold (``others_unseen`` or ``others_free``)."""
        return self.others_unseen or self.others_free


@dataclass
class View:
    """One frame's look at one object.

    depth (H, W) metres (0 = no reading); rgb (H, W, 3) uint8; K (3, 3); cam_to_world (4, 4);
    pixels: flat indices (M,) into (H, W) of the pixels that belong to the object.
    flying: (H, W) bool ``depthedges.flying_pixels(depth)`` when the caller has it (a frame's, computed once for
    all its objects); None: lifting tests the pixels it reads (``depthedges.steady_depth_at``, the same flags).
    others: (H * W,) bool, the pixels whose readings other objects of the frame hold (their masks or proposals),
    when the caller has them; with ``Grid.others_unseen`` a cell at such a reading is not observed, with
    ``Grid.others_free`` it is free.
    cut_m: the height (m) above the support plane at or below which none of this frame's readings is the object's
    (``ingest.proposals.object_cut``, from the plane fit's own noise); with ``Grid.plane_band`` > 0 the cells in the
    band up to ``plane_band`` x cut_m that read empty count less (:func:`band_discount`).
    """
    depth: np.ndarray
    rgb: np.ndarray
    K: np.ndarray
    cam_to_world: np.ndarray
    pixels: np.ndarray
    flying: np.ndarray | None = None
    others: np.ndarray | None = None
    cut_m: float = 0.0


@dataclass
class ObjectFrame:
    """Where an object sits: base centre on the plane (3,), up (3,), footprint radius and height (m)."""
    origin: np.ndarray
    up: np.ndarray
    radius: float
    height: float


def cell_centres(grid: Grid, frame: ObjectFrame) -> np.ndarray:
    """World coordinates (R, A, H, 3) of the cell centres."""
    return _cell_centres(grid, frame, plane_basis(frame.up))


def _cell_centres(grid: Grid, frame: ObjectFrame, basis: np.ndarray) -> np.ndarray:
    """:func:`cell_centres` with the object frame's ``plane_basis`` (3, 3) already computed."""
    local = _local_centres(grid, [frame])[0]
    return (local.reshape(-1, 3) @ basis + frame.origin).reshape(local.shape)   # one (R A H, 3) product, not R A small ones


def _local_centres(grid: Grid, frames: list[ObjectFrame]) -> np.ndarray:
    """(n, R, A, H, 3) the cell centres of each frame in its own (x, y, up) axes, before its basis and origin: the
    products of a meshgrid of the grid's axes (times the frame's radius and height), by broadcasting (same values,
    no grids)."""
    R, A, H = grid.shape
    rho_unit, cos_phi, sin_phi, z_unit = _cell_axes(R, A, H, grid.radial_margin, grid.height_margin)
    rho = rho_unit[None, :] * np.array([f.radius for f in frames], np.float64)[:, None]   # (n, R)
    z = z_unit[None, :] * np.array([f.height for f in frames], np.float64)[:, None]       # (n, H)
    local = np.empty((len(frames), R, A, H, 3))
    local[..., 0] = rho[:, :, None, None] * cos_phi[None, None, :, None]
    local[..., 1] = rho[:, :, None, None] * sin_phi[None, None, :, None]
    local[..., 2] = z[:, None, None, :]
    return local


@lru_cache(maxsize=16)
def _cell_axes(R: int, A: int, H: int, radial_margin: float, height_margin: float) -> tuple[np.ndarray, ...]:
    """The grid's cell-centre axes before the object's size: (i + 0.5) / R * radial_margin (R,), cos and sin of
    the azimuths (A,), (k + 0.5) / H * height_margin (H,) (read-only; times the radius and the height they are the
    same floats as computed in one expression, which multiplies left to right)."""
    rho = (np.arange(R) + 0.5) / R * radial_margin
    phi = (np.arange(A) + 0.5) / A * 2 * np.pi
    z = (np.arange(H) + 0.5) / H * height_margin
    out = (rho, np.cos(phi), np.sin(phi), z)
    for a in out:
        a.setflags(write=False)
    return out


def up_basis(up: np.ndarray) -> np.ndarray:
    """``plane_basis(up)`` (3, 3), read-only, cached by the up vector's float64 value."""
    return _basis(np.asarray(up, np.float64).tobytes())


@lru_cache(maxsize=64)
def _basis(up: bytes) -> np.ndarray:
    """``plane_basis`` of the up vector (3,) float64 given by its bytes, read-only: the objects of a capture
    share their plane's up, and the basis costs more than a thousand of their cells' arithmetic."""
    b = plane_basis(np.frombuffer(up, np.float64))
    b.setflags(write=False)
    return b


def _splat(grid: Grid, frame: ObjectFrame, pts_world: np.ndarray, values: np.ndarray,
           basis: np.ndarray | None = None) -> np.ndarray:
    """Trilinear splat of values (M, V) at world points (M, 3) into (V+1, R, A, H): weight, weighted values.

    ``basis``: the object frame's ``plane_basis`` when the caller has it already.
    """
    return _splat_stack(grid, [(frame, pts_world, values, basis)])[:, 0].reshape((-1,) + grid.shape)


def _splat_stack(grid: Grid, items: list[tuple]) -> np.ndarray:
    """(V+1, len(items), R A H): :func:`_splat` of each (frame, pts_world (M, 3), values (M, V), basis or None), V the same for all: the
    same arrays (the same floats), by one set of array operations over all the items' points (each item's object
    frame repeated per point; a scalar and an array of it give the same IEEE results) and one bincount a channel,
    item i's corners in bins i (n_cells + 1) + cell, each bin summing the same products in the same order."""
    R, A, H = grid.shape
    n_cells = R * A * H
    nv = items[0][2].shape[1] + 1 if items else 1
    counts = np.array([len(it[1]) for it in items], np.intp)
    if counts.sum() == 0:
        return np.zeros((nv, len(items), n_cells))
    local = np.concatenate([(pts - fr.origin) @ (plane_basis(fr.up) if bs is None else bs).T
                            for fr, pts, _, bs in items if len(pts)])
    values = np.concatenate([vals for _, pts, vals, _ in items if len(pts)])
    rad = np.repeat([grid.radial_margin * fr.radius for fr, *_ in items], counts)
    hgt = np.repeat([grid.height_margin * fr.height for fr, *_ in items], counts)
    rho = np.hypot(local[:, 0], local[:, 1]) / rad * R - 0.5
    phi = np.arctan2(local[:, 1], local[:, 0])
    phi += np.where(phi < 0, 2 * np.pi, 0.0)          # [0, 2 pi): np.mod(phi, 2 pi) for phi in [-pi, pi]
    phi = phi / (2 * np.pi) * A - 0.5
    z = local[:, 2] / hgt * H - 0.5
    i0, j0, k0 = np.floor(rho), np.floor(phi), np.floor(z)
    fr, fp, fz = rho - i0, phi - j0, z - k0
    # the 8 corners at once: index and weight arrays (2, 2, 2, M), corner (di, dj, dk) along the first axes;
    # points just inside the axis or the rim/top keep their whole weight in the edge bin
    step = np.arange(2)[:, None]
    ii = np.minimum(np.maximum(i0.astype(np.intp) + step, 0), R - 1)   # np.clip, without its dispatch
    jj = j0.astype(np.intp) + step                    # in [-1, A]: wrapped about the axis
    jj[jj < 0] += A
    jj[jj >= A] -= A
    kk = k0.astype(np.intp) + step
    wi, wj, wk = np.stack([1 - fr, fr]), np.stack([1 - fp, fp]), np.stack([1 - fz, fz])
    flat = (ii[:, None, None] * A + jj[None, :, None]) * H + kk[None, None, :]
    w = wi[:, None, None] * wj[None, :, None] * wk[None, None, :]
    ok = ((kk >= 0) & (kk < H))[None, None, :] & (rho < R)
    # corners outside the grid (below the base, above the top, beyond the rim) go to a spare bin past the
    # end of their item's block, dropped after: one bincount per channel over every corner, no masked copies
    flat = (np.where(ok, flat, n_cells) + np.repeat(np.arange(len(items)) * (n_cells + 1), counts)).reshape(-1)
    size = len(items) * (n_cells + 1)
    out = np.empty((nv, len(items), n_cells))
    out[0] = np.bincount(flat, weights=w.reshape(-1), minlength=size).reshape(len(items), -1)[:, :n_cells]
    for c, vc in enumerate(np.ascontiguousarray(values.T)):   # each channel's values contiguous
        out[c + 1] = np.bincount(flat, weights=(w * vc).reshape(-1), minlength=size).reshape(len(items), -1)[:, :n_cells]
    return out


def _percentile75(x: np.ndarray) -> float:
    """``np.percentile(x, 75)`` (numpy's default linear method) of a non-empty 1-D float64 array, the same float:
    the two order statistics by a partition and numpy's interpolation step, without its general machinery (which
    costs more than the rest of a single-view cell's arithmetic)."""
    n = len(x)
    vi = 0.75 * n - 0.75                             # numpy's virtual index n q + (1 - q) - 1 for q = 0.75
    lo = int(np.floor(vi))
    hi = min(lo + 1, n - 1)
    part = np.partition(x, (lo, hi)) if hi != lo else np.partition(x, lo)
    a, b, t = part[lo], part[hi], vi - lo
    diff = b - a
    return float(b - diff * (1 - t)) if t >= 0.5 else float(a + diff * t)   # numpy's _lerp


def _on_support(v: View, u: np.ndarray, r: np.ndarray, d: np.ndarray, frame: ObjectFrame, tol: float) -> np.ndarray:
    """True where the reading d (M,) at pixel (u, r) (M,) lies within ``tol`` of the support plane (the plane
    through ``frame.origin`` normal to ``frame.up``) and is not one of the object's own pixels (a long, low
    object's sides lie that close to the plane).  The ray to such a reading met nothing above the plane, so a
    cell in front of it is free right down to the plane: without this, a layer of "seen but not free" cells
    (within the carve margin of the plane) lines every volume's base, which a copy tipped onto another face
    turns into a wall of non-free cells where an object lying that way shows free space."""
    own = np.zeros(v.depth.size, bool)
    own[v.pixels] = True
    near = np.abs((camera_to_world(pixels_to_camera(u, r, d, v.K), v.cam_to_world) - frame.origin) @ frame.up) <= tol
    h, w = v.depth.shape
    return (d > 0) & near & ~own[np.clip(r, 0, h - 1) * w + np.clip(u, 0, w - 1)]  # d = 0 outside the image


def lift(views: list[View], frame: ObjectFrame, grid: Grid) -> np.ndarray:
    """Fuse views of one object into a volume (len(CHANNELS), R, A, H) float32."""
    return lift_many([(views, frame)], grid)[0]


def lift_many(objects: list[tuple[list[View], ObjectFrame]], grid: Grid) -> list[np.ndarray]:
    """:func:`lift` of each (views, frame): the same volumes, with the splats of every view of every object done
    together (:func:`_splat_stack`: a single-view object's splat is a few dozen array operations on a few thousand
    points, whose fixed cost, paid once for a frame's objects instead of once each, was most of it)."""
    R, A, H = grid.shape
    n_cells = R * A * H
    states, reads, bands, todo = [], [], [], []
    bases = [_basis(np.asarray(frame.up, np.float64).tobytes()) for _, frame in objects]   # the centres and the splat share it
    for (views, frame), basis, centres in zip(objects, bases, _cell_centres_many(grid, [f for _, f in objects], bases)):
        cell = max(grid.radial_margin * frame.radius / R, grid.height_margin * frame.height / H)
        margin = grid.carve_margin_cells * cell
        for v in views:
            todo.append((len(states), frame, basis, v, centres, margin))
            bands.append(band_fractions(grid, frame, grid.plane_band * v.cut_m) if grid.plane_band > 0 else None)
        states.append(frame)
    i = 0
    while i < len(todo):   # runs of views of one frame (the same image and camera) read together
        j = i + 1
        while j < len(todo) and _same_image(todo[j][3], todo[i][3]):
            j += 1
        group = [(v, c, m, f) for _, f, _, v, c, m in todo[i:j]]
        reads += [t[:3] + rd for t, rd in zip(todo[i:j], _read_views(group, grid))]
        i = j
    if not reads:
        return [np.zeros((len(CHANNELS), R, A, H), np.float32) for _ in objects]
    sp = _splat_stack(grid, [(frame, pw, rgb, basis) for _, frame, basis, _, _, _, pw, rgb in reads])
    d = np.stack([rd[3] for rd in reads])             # (views, n_cells), every object's views in turn
    seen = np.stack([rd[4] for rd in reads])
    free = np.stack([rd[5] for rd in reads])
    # point density depends on resolution and distance: measure splat weight against this frame's
    # typical occupied-cell weight so that evidence is the same for near and far, small and large
    hit = sp[0] > 0
    typical = np.array([_percentile75(sp[0, i][hit[i]]) if hit[i].any() else 1.0 for i in range(len(reads))])
    surf = 1.0 - np.exp(-sp[0] / (grid.surface_points_per_cell * typical)[:, None])
    # a cell observed through the object's points only (no reading at its own pixel: a shadow, a dropout, a
    # flying pixel) is observed where those points make it surface; the trilinear spill of a neighbour's
    # points alone says nothing about whether it is empty
    seen |= hit & ((d > 0) | (surf >= grid.unread_min_surface))
    free &= sp[0] <= 0.5 * grid.surface_points_per_cell  # a cell with object points is not free
    k = np.array([rd[0] for rd in reads])
    if grid.plane_band > 0:   # ``plane_band``: a cell in the band that reads empty (seen, not free, no point) counts less
        seen = band_discount(seen, free, hit, np.stack([np.zeros(n_cells) if b is None else b for b in bands]))
    if np.array_equal(k, np.arange(len(objects))):   # one view each (single-view labelling): the sums are the
        obs, surf_sum, free_sum = seen.astype(np.float64), surf * seen, free.astype(np.float64)   # terms (0 + x = x)
        col, colw = sp[1:], sp[0]
    else:                                            # each object's sums over its views, in view order
        obs, surf_sum, free_sum = (np.zeros((len(objects), n_cells)) for _ in range(3))
        col = np.zeros((3, len(objects), n_cells))
        colw = np.zeros((len(objects), n_cells))
        for i, o in enumerate(k):
            obs[o] += seen[i]
            surf_sum[o] += surf[i] * seen[i]
            free_sum[o] += free[i]
            col[:, o] += sp[1:, i]
            colw[o] += sp[0, i]
    # the mean over the observing views; with ``plane_band`` a count below one sums empty readings only (0 / 1 = 0)
    n = np.maximum(obs, 1.0)
    out = np.zeros((len(objects), len(CHANNELS), n_cells))
    out[:, 0] = surf_sum / n
    out[:, 1] = free_sum / n
    out[:, 2] = obs
    out[:, 3:6] = (col / np.maximum(colw, 1e-9)).transpose(1, 0, 2)
    return list(out.reshape(len(objects), len(CHANNELS), R, A, H).astype(np.float32))


def band_fractions(grid: Grid, frame: ObjectFrame, band_m: float) -> np.ndarray:
    """(R A H,) the share of each cell's height extent [k, k + 1) z_max / H that lies below ``band_m`` metres above
    the support plane (the object frame's base): 1 for a cell wholly in the band, 0 above it."""
    R, A, H = grid.shape
    dz = grid.height_margin * frame.height / H
    q = np.clip(band_m / dz - np.arange(H), 0.0, 1.0)
    return np.tile(q, R * A)


def band_discount(seen: np.ndarray, free: np.ndarray, hit: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Observation weights (views, n_cells) of ``[volume] plane_band``: 1 where seen, times 1 - q where the cell reads
    empty (seen, not free, none of the object's points: ``hit`` False), q (views, n_cells) the share of the cell in the
    band (:func:`band_fractions`).  Under the ingest's cut a part of the object gives no reading, so "seen, nothing
    here" there is what a flush part and the bare plane both show; a free cell (the ray went on past it) and a cell
    with the object's points keep their weight."""
    return seen * (1.0 - q * (seen & ~free & ~hit))


def _cell_centres_many(grid: Grid, frames: list[ObjectFrame], bases: list[np.ndarray]) -> list[np.ndarray]:
    """(R A H, 3) :func:`_cell_centres` of each frame with its basis (3, 3): the same floats, the frames that share a
    basis object (a frame's objects share their plane's up, :func:`_basis`) by one set of array operations and one
    (n R A H, 3) x (3, 3) product, whose rows are those of the products one frame at a time (the same sums of three
    products; a one-row product would take another kernel, and a frame has R A H > 1 rows)."""
    out: list = [None] * len(frames)
    groups: dict[int, list[int]] = {}
    for i, b in enumerate(bases):
        groups.setdefault(id(b), []).append(i)
    for idx in groups.values():
        if len(idx) == 1:
            out[idx[0]] = _cell_centres(grid, frames[idx[0]], bases[idx[0]]).reshape(-1, 3)
            continue
        local = _local_centres(grid, [frames[i] for i in idx])
        origins = np.array([np.asarray(frames[i].origin, np.float64) for i in idx])
        cen = (local.reshape(-1, 3) @ bases[idx[0]]).reshape(len(idx), -1, 3) + origins[:, None, :]
        for i, c in zip(idx, cen):
            out[i] = c
    return out


def _same_image(a: View, b: View) -> bool:
    """Whether views a and b look through one frame: the same depth, colour, flags and camera arrays, equal
    intrinsics (a capture's intrinsics give a new matrix each time)."""
    return (a.depth is b.depth and a.rgb is b.rgb and a.flying is b.flying and a.cam_to_world is b.cam_to_world
            and (a.K is b.K or np.array_equal(a.K, b.K)))


def _read_views(group: list[tuple], grid: Grid) -> list[tuple[np.ndarray, ...]]:
    """:func:`_read_view` of each (view, centres (n_cells, 3), margin, frame) of ``group``, views of one frame
    (:func:`_same_image`) with its flying-pixel flags: the same arrays, by one set of array operations over all
    their cells and all their points (a single view's reading is a few dozen array operations on a few thousand
    cells, whose fixed cost, paid once for a frame's objects instead of once each, was most of it).  The two
    products (cells into the camera, points out of it) run on the rows of all the views at once, which are the
    rows of the products one view at a time (the same sums of three products), except for a view of one point,
    whose one-row product takes another kernel: its points are done on their own."""
    v0 = group[0][0]
    if len(group) == 1 or v0.flying is None:
        return [_read_view(v, c, m, f, grid) for v, c, m, f in group]
    h, w = v0.depth.shape
    sizes = np.array([len(c) for _, c, _, _ in group])
    pc = transform_points(invert_rigid(v0.cam_to_world), np.concatenate([c for _, c, _, _ in group]))
    zc = pc[:, 2]
    zs = np.where(np.abs(zc) < EPS, EPS, zc)
    u = np.rint(v0.K[0, 0] * pc[:, 0] / zs + v0.K[0, 2]).astype(np.intp)
    r = np.rint(v0.K[1, 1] * pc[:, 1] / zs + v0.K[1, 2]).astype(np.intp)
    inside = (zc > 0) & (u >= 0) & (u < w) & (r >= 0) & (r < h)
    d = np.zeros(len(zc))
    at = r[inside] * w + u[inside]
    d[inside] = np.where(v0.flying.reshape(-1)[at], 0.0, v0.depth.reshape(-1)[at])
    margin = np.repeat([m for _, _, m, _ in group], sizes)   # each view's margin at its cells (the same floats)
    seen = inside & (d > 0) & (zc < d + margin)
    free = seen & (zc < d - margin)
    ends = np.cumsum(sizes)
    cells = [slice(e - n, e) for e, n in zip(ends, sizes)]
    for (v, _, m, frame), sl in zip(group, cells):   # what depends on the view's own pixels, on its cells (views)
        if grid.reads_others and v.others is not None:   # as in _read_view
            theirs = np.zeros(len(zc[sl]), bool)
            ins = inside[sl]
            theirs[ins] = v.others[r[sl][ins] * w + u[sl][ins]]
            if grid.others_free:
                free[sl] |= seen[sl] & theirs
            else:
                seen[sl] &= ~theirs | free[sl]
        if grid.carve_to_plane:
            free[sl] |= seen[sl] & (zc[sl] < d[sl]) & _on_support(v, u[sl], r[sl], d[sl], frame, m)
    pix = np.concatenate([v.pixels for v, *_ in group])
    vv, uu = np.divmod(pix, w)
    z = v0.depth.reshape(-1)[pix]
    good = z > 0
    vv, uu, z, pg = vv[good], uu[good], z[good], pix[good]
    upto = np.concatenate([[0], np.cumsum(good)])[np.cumsum([0] + [len(v.pixels) for v, *_ in group])]
    n_good = np.diff(upto)                              # each view's points with a reading
    pts = pixels_to_camera(uu, vv, z, v0.K)
    spans = [slice(a, b) for a, b in zip(upto[:-1], upto[1:])]
    if (n_good == 1).any():
        pw = np.concatenate([camera_to_world(pts[sp], v0.cam_to_world) for sp in spans])
    else:
        pw = camera_to_world(pts, v0.cam_to_world)
    rgb = v0.rgb.reshape(-1, 3)[pg]
    rgb = _UNIT_BYTE[rgb] if rgb.dtype == np.uint8 else rgb.astype(np.float64) / 255.0   # the same floats
    return [(d[sl], seen[sl], free[sl], pw[sp], rgb[sp]) for sl, sp in zip(cells, spans)]


def _read_view(v: View, centres: np.ndarray, margin: float, frame: ObjectFrame, grid: Grid) -> tuple[np.ndarray, ...]:
    """One view of one object, before its splat: the depth read at each cell's pixel d (n_cells,), the cells it
    sees and sees free (bool), and the object's own points in world coordinates (M, 3) with their colours (M, 3)."""
    n_cells = len(centres)
    h, w = v.depth.shape
    # geometry.world_to_pixel written out (the same operations), without stacking (u, v) to take them apart
    pc = transform_points(invert_rigid(v.cam_to_world), centres)
    zc = pc[:, 2]
    zs = np.where(np.abs(zc) < EPS, EPS, zc)
    u = np.rint(v.K[0, 0] * pc[:, 0] / zs + v.K[0, 2]).astype(np.intp)
    r = np.rint(v.K[1, 1] * pc[:, 1] / zs + v.K[1, 2]).astype(np.intp)
    inside = (zc > 0) & (u >= 0) & (u < w) & (r >= 0) & (r < h)
    d = np.zeros(n_cells)
    # depth at the cells' pixels, flying pixels read as 0 (the frame's flags, else tested at those pixels only)
    if v.flying is None:
        d[inside] = steady_depth_at(v.depth, r[inside], u[inside])
    else:
        at = r[inside] * w + u[inside]
        d[inside] = np.where(v.flying.reshape(-1)[at], 0.0, v.depth.reshape(-1)[at])
    seen = inside & (d > 0) & (zc < d + margin)
    free = seen & (zc < d - margin)
    if grid.reads_others and v.others is not None:
        # a ray that ends on another object (a touching neighbour) says the cells in front of that reading
        # are empty, but not what lies at it: the neighbour's own surface would read "seen, not free" in
        # this object's margin, a wall no instance standing alone has; those cells stay unobserved, or with
        # others_free read free of this object (the neighbour holds them; with it away the ray went on past)
        theirs = np.zeros(n_cells, bool)
        theirs[inside] = v.others[r[inside] * w + u[inside]]
        if grid.others_free:
            free |= seen & theirs
        else:
            seen &= ~theirs | free
    if grid.carve_to_plane:
        free |= seen & (zc < d) & _on_support(v, u, r, d, frame, margin)
    # the object's own points: back-project its pixels
    vv, uu = np.divmod(v.pixels, w)
    z = v.depth.reshape(-1)[v.pixels]
    good = z > 0
    vv, uu, z = vv[good], uu[good], z[good]
    pw = camera_to_world(pixels_to_camera(uu, vv, z, v.K), v.cam_to_world)
    rgb = v.rgb.reshape(-1, 3)[v.pixels[good]]
    rgb = _UNIT_BYTE[rgb] if rgb.dtype == np.uint8 else rgb.astype(np.float64) / 255.0   # the same floats
    return d, seen, free, pw, rgb


def matching_features(volumes: np.ndarray, *, free_weight: float = 0.5, colour_weight: float = 0.15,
                      obs_saturation: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """Store volumes (N, 6, R, A, H) -> features X (N, 5, R, A, H) and observation weights W (N, R, A, H).

    X = [surface, sqrt(free_weight) * free, sqrt(colour_weight) * rgb * surface] so that the squared
    distance weighs channels by free_weight and colour_weight; W = min(observed, s) / s saturates after
    s observing frames (a cell seen twice is as trustworthy as one seen eight times).
    """
    v = np.asarray(volumes, dtype=np.float32)
    surf = v[:, 0]
    X = np.empty((v.shape[0], len(FEATURES)) + v.shape[2:], dtype=np.float32)
    X[:, 0] = surf
    X[:, 1] = np.sqrt(free_weight) * v[:, 1]
    X[:, 2:5] = np.sqrt(colour_weight) * v[:, 3:6] * surf[:, None]
    W = np.minimum(v[:, 2], obs_saturation) / obs_saturation
    return X, W.astype(np.float32)
