"""Tilted copies of prototypes: the discrete up-direction part of the 3-D pose search.

Conventions: volumes as in :mod:`protomine.mine.posesearch` (P (K, C, R, A, H), V (K, R, A, H)); the
first feature channel is the surface evidence (``ingest.volume.FEATURES``); rotations as in
:mod:`protomine.rotations` (x' = R x, quaternions scalar last).

Geometry of a gridded volume
----------------------------
A volume's grid is normalised by its own footprint and height: radial bin i covers rho / rho_max in
[i/R, (i+1)/R), height bin k covers z / z_max in [k/H, (k+1)/H), with rho_max = radial_margin x footprint
radius and z_max = height_margin x height.  Lengths below are in units of rho_max, so one number per
volume, its *aspect* z_max / rho_max (:func:`grid_aspect`), fixes its metric shape up to scale.

Tilted copy (forward map)
-------------------------
The prototype resting with its direction u (prototype frame) pointing up is the prototype rotated by
M = ``rotations.tilt_matrix(u)`` about its centre c0 = (0, 0, height / 2).  Its surface cells (surface
evidence >= ``SURFACE_MIN`` where observed) are rotated; their lowest point, height and smallest enclosing
footprint circle (as ``ingest.proposals.object_frame`` measures a real object) give the copy's own base
centre b, footprint radius r' and height h', so the copy is re-normalised by its own footprint and height
exactly as an object lying that way would be lifted.  Every cell of the copy's grid is mapped back,
p = M^T (q + b) + c0, into the prototype's grid and sampled there by trilinear interpolation (azimuth
wraps; below the first radial bin centre the first bin is used; outside the prototype's cylinder the
copy's weight is 0 = unknown).  A bank resamples its copies in blocks, one ``grid_sample`` per prototype of a
block over its copies' cells inside the cylinder (:func:`_resample_copies`, :func:`sample_volumes`); the geometries (one enclosing circle per copy, all of a prototype's at once: ``ingest.proposals.min_enclosing_circles``) are kept across passes for as long as
the hull of a prototype's solid cells and its aspect do not change.

Untilting (inverse map)
-----------------------
A member matched at tilt u, aligned (yaw and scale undone), lives in the copy's grid; every prototype
cell p is mapped to q = M (p - c0) - b in the copy's grid and sampled there, which rotates the member back
into the prototype frame (cells it does not cover get weight 0).  Both maps are linear, so the engine
untilts sums of members once per (prototype, tilt) group (its scales summed first), all groups of a chunk in
one resampling (:meth:`TiltBank.untilt_many`).

Search (coarse to fine)
-----------------------
``TiltGrid(nsides=(1, 2, 4))``: HEALPix up-direction grids (``rotations.up_grid``, 12 / 48 / 192
directions, mean spacing 58.6 / 29.3 / 14.7 degrees), each rotated so its first direction is +z.  The
first level is searched for every (object, prototype) with the FFT yaw search of ``posesearch`` (a
``PoseBank`` over the K x T tilted copies); from each object's ``refine_top`` best (prototype, tilt) pairs
of that level, every later level searches its directions within ``COVER_FACTOR`` x the previous level's
spacing of the pair's previous best (HEALPix's measured covering radius is 0.79-0.81 x the mean spacing),
about 8 directions per level, at the pair's best coarse scale, and a prototype's pose is replaced by a
refined one with a lower distance.  Tilt indices index ``TiltGrid.dirs``, the levels' directions stacked.
What the engine's passes ask for less (:func:`_refine_pairs`): with labels held fixed (``focus``), only the held
prototype's pairs are refined (the others' poses could not change its pose); with ``TiltGrid.refine_margin``
(``[mine] tilt_refine_margin``, off) each level refines only the pairs within 1 + margin of the object's best so
far; with ``TiltGrid.pass_levels`` (``[mine] tilt_pass_levels``, off) Lloyd's intermediate passes stop after
that many levels (``TiltBank.levels``).  A pass of several chunks keeps the finer copies for its later chunks
(:meth:`TiltBank.more_chunks`, up to ``KEEP_REFINED_BYTES``).
``nsides=(0,)`` is the set {+z}: the yaw-only search of the 2-D case, with no resampling at all.

Threads
-------
With torch on T > 1 threads, the search's many small operations (blocks of copies, the refinement's column
factors and its groups' products) and the coarse level's bank and row blocks run on T Python threads whose torch
ops run on one thread each (:func:`pooled`, ``searchpool.spectra_pool``), not as ops on T torch threads each:
the same values to the bit, and on a shared machine far less time lost waking threads (mining 500 tumbled
objects at load 6-9: 632 s wall / 307 s CPU before, 186 s / 82 s with the pool; identical result).
"""
from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import torch
from scipy.spatial import ConvexHull, QhullError

from .. import rotations as rot
from ..cores import reused_scratch, scratch
from ..ingest.proposals import min_enclosing_circles
from .posesearch import (PoseBank, PoseMatch, _distances_from_spectra, _first_min, _prepare, _refined_yaw,
                         _spectra_of, spectrum_rows)
from .searchpool import pool_here, pooled

SURFACE_MIN = 0.4      # surface evidence above which a prototype cell counts as part of the object
OBSERVED_MIN = 0.05    # ... where its observation weight is at least this
COVER_FACTOR = 0.85    # refinement radius in units of the previous level's mean spacing
IDENTITY_DEG = 1.0     # directions within this angle of +z are the identity tilt (the canonical face)


def grid_aspect(radius: np.ndarray, height: np.ndarray, radial_margin: float, height_margin: float) -> np.ndarray:
    """Aspect z_max / rho_max of the grids of objects with footprint ``radius`` and ``height`` (metres)."""
    return (height_margin * np.asarray(height, np.float64)) / np.maximum(radial_margin * np.asarray(radius, np.float64), 1e-9)


@dataclass(frozen=True)
class TiltGrid:
    """Up directions searched, level by level (see the module docstring); margins of the volume grid."""

    nsides: tuple[int, ...] = (1, 2, 4)
    radial_margin: float = 1.15
    height_margin: float = 1.10
    refine_top: int = 3
    refine_margin: float = 0.0  # mining passes only (the engine's banks): see _refine_pairs; not kept in a library
    pass_levels: int = 0  # > 0: Lloyd's intermediate passes search only this many levels (engine; not in a library)
    coarse_bins: int = 0  # > 0: mining passes screen the first level on this many azimuth frequencies (not in a library)
    dirs: np.ndarray = field(init=False, repr=False, compare=False)
    offsets: tuple[int, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self.nsides or any(n < 0 for n in self.nsides) or (0 in self.nsides and len(self.nsides) > 1):
            raise ValueError(f"nsides must be (0,) or positive HEALPix N_side values, got {self.nsides}")
        levels = [rot.up_grid(n) for n in self.nsides]
        object.__setattr__(self, "dirs", np.concatenate(levels))
        object.__setattr__(self, "offsets", tuple(np.cumsum([0] + [len(l) for l in levels]).tolist()))

    @classmethod
    def identity(cls) -> "TiltGrid":
        return cls(nsides=(0,))

    @property
    def is_identity(self) -> bool:
        return self.nsides == (0,)

    def level(self, i: int) -> np.ndarray:
        """Indices into ``dirs`` of level i."""
        return np.arange(self.offsets[i], self.offsets[i + 1])

    def candidates(self, i: int, prev: int) -> np.ndarray:
        """Indices of level i's directions near direction ``prev`` (the refinement step)."""
        idx = self.level(i)
        radius = COVER_FACTOR * rot.grid_spacing_deg(self.nsides[i - 1])
        near = rot.angle_between_deg(self.dirs[idx], self.dirs[prev][None]) <= radius
        return idx[near]

    def is_upright(self, tilt: np.ndarray) -> np.ndarray:
        """True where tilt index (...) is the identity (the direction +z)."""
        return self.dirs[np.asarray(tilt)][..., 2] >= np.cos(np.deg2rad(IDENTITY_DEG))

    @classmethod
    def from_config(cls, d: dict) -> "TiltGrid":
        """Inverse of :meth:`to_config` (a library's ``tilts`` attribute)."""
        return cls(nsides=tuple(int(n) for n in d.get("nsides", [0])), radial_margin=float(d.get("radial_margin", 1.15)),
                   height_margin=float(d.get("height_margin", 1.10)), refine_top=int(d.get("refine_top", 3)))

    def to_config(self) -> dict:
        return {"nsides": list(self.nsides), "radial_margin": self.radial_margin,
                "height_margin": self.height_margin, "refine_top": self.refine_top}


# --- sampling ----------------------------------------------------------------------------------

def _cell_points(R: int, A: int, H: int, rho_max: float, z_max: float) -> np.ndarray:
    """Cell centres (R A H, 3) of a cylindrical grid, in the order of a (R, A, H) reshape.  The x, y columns are
    kept per (R, A, H, rho_max) (:func:`_cell_xy`): a prototype's solid cells are asked for in every pass with a new
    aspect (z_max), and the cosines and sines were most of the call (0.9 s CPU of 160 in mining 400 tumbled
    objects, tilt_mining row settings); the same values."""
    out = np.empty((R, A, H, 3))
    out[..., :2] = _cell_xy(R, A, H, float(rho_max))
    out[..., 2] = (np.arange(H) + 0.5) / H * z_max
    return out.reshape(-1, 3)


@functools.lru_cache(maxsize=8)
def _cell_xy(R: int, A: int, H: int, rho_max: float) -> np.ndarray:
    """x, y (R, A, H, 2) of the cell centres of :func:`_cell_points` (read only)."""
    rho = (np.arange(R) + 0.5) / R * rho_max
    phi = (np.arange(A) + 0.5) / A * 2 * np.pi
    rr, pp = np.meshgrid(rho, phi, indexing="ij")
    xy = np.stack([rr * np.cos(pp), rr * np.sin(pp)], -1)
    out = np.ascontiguousarray(np.broadcast_to(xy[:, :, None], (R, A, H, 2)))
    out.flags.writeable = False
    return out


def sample_volumes(vol, pts: np.ndarray, rho_max: np.ndarray, z_max: np.ndarray, *, with_inside: bool = False):
    """Trilinear samples (m, c, N) of cylindrical volumes ``vol`` (m, c, R, A, H) (array or tensor; its dtype
    is kept) at points ``pts`` (m, N, 3) of each volume's frame, whose grid extents are ``rho_max``,
    ``z_max`` (m,).  Azimuth wraps; radial and height positions below the first bin centre (or above the
    last) take that bin's value; points outside the grid's cylinder get 0 (unknown).  One
    ``torch.nn.functional.grid_sample`` over all volumes: the azimuth axis is padded by one bin on each side
    from the other end, so the wrap is ordinary interpolation.  ``with_inside``: also the (m, N) bool mask of
    the points inside the cylinder (the others got 0)."""
    vol = torch.as_tensor(vol)
    m, c, R, A, H = vol.shape
    # coordinates in numpy, in the volume's precision (cheaper than small threaded tensor operations)
    dt = np.float64 if vol.dtype == torch.float64 else np.float32
    pts = np.asarray(pts, dt)
    grid, inside = _grid_coords(pts[..., 0], pts[..., 1], pts[..., 2], rho_max, z_max, (R, A, H), dt)
    padded = torch.cat([vol[:, :, :, -1:], vol, vol[:, :, :, :1]], dim=3)
    out = _trilinear(padded, grid) * torch.from_numpy(inside).to(vol.dtype)[:, None]
    return (out, inside) if with_inside else out


def _taken_in_scratch(a: np.ndarray, sel: np.ndarray) -> torch.Tensor:
    """``torch.from_numpy(np.ascontiguousarray(a[sel]))`` (the same values) in this thread's reusable buffer
    (``cores.scratch``; a fresh tensor outside ``cores.reused_scratch``)."""
    src = scratch("taken", (len(sel),) + a.shape[1:], torch.from_numpy(a[:0]).dtype)
    np.take(a, sel, axis=0, out=src.numpy(), mode="clip")  # indices in range; "raise" would buffer the result
    return src


def _sample_in_scratch(vol: torch.Tensor, pts: np.ndarray, rho_max, z_max) -> torch.Tensor:
    """:func:`sample_volumes` (the same values) with the padded volumes in this thread's reusable buffer
    (``cores.scratch``) and the samples outside the cylinders zeroed in place: for the untilt's pieces
    (:meth:`TiltBank.untilt_many`), whose float64 temporaries of ~10 MB were mapped and page-faulted afresh
    for every piece while the search runs (``cores.large_blocks_mapped``)."""
    m, c, R, A, H = vol.shape
    dt = np.float64 if vol.dtype == torch.float64 else np.float32
    pts = np.asarray(pts, dt)
    grid, inside = _grid_coords(pts[..., 0], pts[..., 1], pts[..., 2], rho_max, z_max, (R, A, H), dt)
    padded = torch.cat([vol[:, :, :, -1:], vol, vol[:, :, :, :1]], dim=3,
                       out=scratch("padded", (m, c, R, A + 2, H), vol.dtype))
    return _trilinear(padded, grid).mul_(torch.from_numpy(inside).to(vol.dtype)[:, None])


def _trilinear(padded: torch.Tensor, grid: np.ndarray) -> torch.Tensor:
    """``grid_sample``'s trilinear reading (m, ch, N) of volumes (m, ch, R, A + 2, H) padded by one azimuth bin on
    each side (the wrap) at coordinates ``grid`` (m, N, 3) of :func:`_grid_coords`."""
    return torch.nn.functional.grid_sample(padded, torch.from_numpy(grid).view(len(padded), -1, 1, 1, 3), mode="bilinear",
                                           padding_mode="border", align_corners=True)[:, :, :, 0, 0]


def _sample_coords(fk: np.ndarray, fj: np.ndarray, fi: np.ndarray, shape: tuple[int, int, int], dt) -> np.ndarray:
    """``grid_sample`` coordinates (..., 3) from fractional cell indices ``fk`` (height), ``fj`` (azimuth, before
    the one-bin wrap pad) and ``fi`` (radius) of a grid of ``shape`` (R, A, H), with align_corners: -1 and +1 are
    the first and last samples' centres.  Height and radius are clamped to the grid; the inputs are overwritten."""
    R, A, H = shape
    grid = np.empty(fk.shape + (3,), dt)
    for j, (f, n) in enumerate(((fk, H), (fj, A + 2), (fi, R))):
        if n == 1:
            grid[..., j] = 0.0
            continue
        if j == 1:
            f += 1.0
        else:
            np.clip(f, 0.0, n - 1, out=f)
        f *= 2.0 / (n - 1)
        f -= 1.0
        grid[..., j] = f
    return grid


def _grid_coords(x: np.ndarray, y: np.ndarray, z: np.ndarray, rho_max, z_max, shape: tuple[int, int, int], dt
                 ) -> tuple[np.ndarray, np.ndarray]:
    """``grid_sample`` coordinates (m, N, 3) (dtype ``dt``) of points x, y, z (m, N) (cast to ``dt``) of cylindrical
    grids of ``shape`` (R, A, H) with extents ``rho_max``, ``z_max`` (m,), and the (m, N) mask of the points inside
    the grid's cylinder (:func:`sample_volumes`)."""
    R, A, H = shape
    m = x.shape[0]
    x, y, z = (np.asarray(a, dt) for a in (x, y, z))
    rho_max = np.asarray(rho_max, dt).reshape(m, 1)
    z_max = np.asarray(z_max, dt).reshape(m, 1)
    fi = np.hypot(x, y) / rho_max * R - 0.5
    phi = np.arctan2(y, x)  # in [-pi, pi]: np.mod(phi, 2 pi) is phi + 2 pi below 0 (the same float32 values)
    np.add(phi, dt(2 * np.pi), out=phi, where=phi < 0)
    fj = phi / (2 * np.pi) * A - 0.5
    fk = z / z_max * H - 0.5
    inside = (fi <= R - 0.5) & (fk >= -0.5) & (fk <= H - 0.5)
    return _sample_coords(fk, fj, fi, (R, A, H), dt), inside


@dataclass
class CopyGeometry:
    """Where a tilted copy sits: rotation M (3, 3), centre c0 (3,) of the prototype, copy base b (3,) and grid
    extents rho_max, z_max of the copy (units of the prototype's rho_max)."""
    M: np.ndarray
    c0: np.ndarray
    base: np.ndarray
    rho_max: float
    z_max: float


def solid_cells(surface: np.ndarray, weight: np.ndarray, aspect: float, grid: TiltGrid) -> tuple[np.ndarray, np.ndarray]:
    """Centre c0 (3,) of a volume (surface, weight (R, A, H), grid aspect) and its solid cells' centres about c0
    (m, 3), in units of the volume's rho_max (every cell when fewer than 4 are solid)."""
    R, A, H = surface.shape
    pts = _cell_points(R, A, H, 1.0, aspect)
    occ = ((surface >= SURFACE_MIN) & (weight >= OBSERVED_MIN)).reshape(-1)
    if occ.sum() < 4:  # nothing solid seen: the whole bounding cylinder stands for the object
        occ = np.ones(len(pts), bool)
    c0 = np.array([0.0, 0.0, 0.5 * aspect / grid.height_margin])
    return c0, pts[occ] - c0


def solid_points(surface: np.ndarray, weight: np.ndarray, aspect: float, grid: TiltGrid) -> tuple[np.ndarray, np.ndarray]:
    """:func:`solid_cells` reduced to their convex hull's vertices (the extents and the enclosing circle of any
    rotation of the points are those of the hull's vertices)."""
    c0, p = solid_cells(surface, weight, aspect, grid)
    try:
        p = p[ConvexHull(p).vertices]
    except QhullError:  # flat or degenerate: keep every point
        pass
    return c0, p


def copy_geometries(shape: tuple[int, int, int], aspect: float, ups: np.ndarray, grid: TiltGrid,
                    solid: tuple[np.ndarray, np.ndarray]) -> list[CopyGeometry]:
    """Geometries of the copies of one prototype (grid ``shape`` (R, A, H), ``aspect``, solid cells ``solid``
    of :func:`solid_points`) resting with each direction ``ups`` (T, 3) pointing up: all directions rotated
    at once, their enclosing circles computed together (``min_enclosing_circles``; one Python Welzl per direction
    cost 0.34 ms, ~25 s CPU of 210 in mining 300 tumbled objects (tilt_mining row settings), the batch 0.03 ms)."""
    R, A, H = shape
    c0, p = solid
    Ms = rot.tilt_matrix(np.asarray(ups, np.float64).reshape(-1, 3))
    q = np.matmul(p[None], Ms.transpose(0, 2, 1))  # (T, m, 3): each direction's rotated points
    zmin, zmax = q[..., 2].min(axis=1), q[..., 2].max(axis=1)
    # the cell centres sit up to half a cell inside the surface: grow by half a cell
    half = 0.5 * max(1.0 / R, aspect / H)
    centres, radii = min_enclosing_circles(q[..., :2])  # all directions' footprints at once
    # every direction's figures at once (one object per direction built from them: the same values)
    height = np.maximum(zmax - zmin + half, 1e-3)
    radius = np.maximum(radii + 0.5 * half, 1e-3)
    base = np.stack([centres[:, 0], centres[:, 1], zmin - 0.5 * half], 1)
    base.flags.writeable = False  # rows shared by the geometries (read only, as the kept geometries are)
    return [CopyGeometry(M, c0, b, rho, zm) for M, b, rho, zm in
            zip(Ms, base, grid.radial_margin * radius, grid.height_margin * height)]


def copy_geometry(surface: np.ndarray, weight: np.ndarray, aspect: float, up: np.ndarray, grid: TiltGrid,
                  solid: tuple[np.ndarray, np.ndarray] | None = None) -> CopyGeometry:
    """Geometry of the copy of one prototype (surface, weight (R, A, H)) resting with ``up`` (3,) pointing up
    (``solid``: its :func:`solid_points` when already computed)."""
    solid = solid if solid is not None else solid_points(surface, weight, aspect, grid)
    return copy_geometries(surface.shape, aspect, np.asarray(up)[None], grid, solid)[0]


def forward_points(gs: Sequence[CopyGeometry], shape: tuple[int, int, int]) -> np.ndarray:
    """The copies' cell centres (m, R A H, 3) mapped back into their prototype's frame, p = M^T (q + b) + c0."""
    unit = _cell_points(*shape, 1.0, 1.0)
    ext = np.array([[g.rho_max, g.rho_max, g.z_max] for g in gs])  # (m, 3)
    q = unit[None] * ext[:, None] + np.stack([g.base for g in gs])[:, None]
    return np.matmul(q, np.stack([g.M for g in gs])) + np.stack([g.c0 for g in gs])[:, None]


@functools.lru_cache(maxsize=8)
def _unit_rows(shape: tuple[int, int, int]) -> np.ndarray:
    """The unit grid's cell centres as contiguous rows (3, R A H) (x, y, z): a matrix product with a transposed
    view of (N, 3) ran 400x slower in numpy (no BLAS for that layout)."""
    out = np.ascontiguousarray(_cell_points(*shape, 1.0, 1.0).T)
    out.flags.writeable = False
    return out


def _forward_xyz(gs: Sequence[CopyGeometry], shape: tuple[int, int, int]) -> np.ndarray:
    """:func:`forward_points` as rows (m, 3, R A H) (x, y, z of each copy's cells), one matrix product for all copies:
    p = M^T (diag(ext) u + b) + c0 = (diag(ext) M)^T u + (M^T b + c0) for the unit grid's cell centres u."""
    unit = _unit_rows(tuple(shape))  # (3, N)
    m = len(gs)
    ext = np.array([[g.rho_max, g.rho_max, g.z_max] for g in gs])  # (m, 3)
    Ms = np.stack([g.M for g in gs])  # (m, 3, 3)
    lin = (ext[:, :, None] * Ms).transpose(0, 2, 1).reshape(3 * m, 3)  # row 3 m' + j: column j of diag(ext) M
    off = np.einsum("mi,mij->mj", np.stack([g.base for g in gs]), Ms) + np.stack([g.c0 for g in gs])
    out = lin @ unit
    out += off.reshape(3 * m, 1)
    return out.reshape(m, 3, -1)


def inverse_points(gs: Sequence[CopyGeometry], shape: tuple[int, int, int], aspect: np.ndarray) -> np.ndarray:
    """Prototype cell centres (m, R A H, 3) mapped into each copy's frame, q = M (p - c0) - b."""
    unit = _cell_points(*shape, 1.0, 1.0)
    p = unit[None] * np.stack([np.ones_like(aspect), np.ones_like(aspect), aspect], -1)[:, None]
    p = p - np.stack([g.c0 for g in gs])[:, None]
    return np.matmul(p, np.stack([g.M for g in gs]).transpose(0, 2, 1)) - np.stack([g.base for g in gs])[:, None]


def empty_margin(P: np.ndarray, V: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """What prototypes P (m, C, R, A, H), V (m, R, A, H) show of the empty space around them: the weighted
    mean features (m, C) and the mean weight (m,) of their margin cells, the outer radial bin and the top
    height bin (beyond the footprint radius and the height: ``radial_margin``, ``height_margin`` > 1).

    The margin stands for empty space only where it was measured empty: a lifted volume's margin lies beyond
    the object's footprint and height, so its surface evidence (first channel) is low, but volumes from
    elsewhere need not have one (invented smooth prototypes, features that fill their whole grid).  A
    prototype whose margin's weighted mean surface evidence reaches ``SURFACE_MIN`` (the level at which a cell
    counts as part of the object, :func:`solid_points`) shows no empty space: its weight is 0 (unknown).
    Measured on 300 invented tumbled objects (K 8, prototypes without an empty margin): mining NMI 0.236 with
    their margin taken as empty space, 0.972 with weight 0."""
    shell = np.zeros(V.shape[1:], bool)
    shell[-1] = True
    shell[:, :, -1] = True
    v = np.asarray(V, np.float64)[:, shell]
    x = np.asarray(P, np.float64)[:, :, shell]
    fx = (x * v[:, None]).sum(axis=2) / np.maximum(v.sum(axis=1), 1e-9)[:, None]
    return fx, np.where(fx[:, 0] < SURFACE_MIN, v.mean(axis=1), 0.0)


def _resample_copies(P: np.ndarray, V: np.ndarray, gs: Sequence[CopyGeometry], aspect: np.ndarray, *,
                     empty_outside: bool = True, index: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Copies (m, C, R, A, H), (m, R, A, H) of prototypes P (m, C, R, A, H), V (m, R, A, H) (one per
    geometry, with their aspects (m,)); with ``index`` (m,), P and V hold distinct prototypes (u, ...) and copy i
    is of prototype ``index[i]`` (each prototype is then sampled once for all its copies: one ``grid_sample`` over
    all their cells inside its cylinder, :func:`_resample_inside`, the same values as one volume per copy).  Features are means: w x is sampled and divided by
    the sampled w, so unseen cells do not dilute the seen ones.  A copy's cells outside the prototype's grid (the
    corners of a tipped object's new cylinder) are empty space the prototype's margin already shows: they take its
    :func:`empty_margin` features and weight, not weight 0.  With weight 0 a copy would be compared on only
    the part of a view it happens to cover, and a copy tipped so that it covers little of the view fits any
    object (on the demo, single views of six classes went to a tipped L bracket covering 2-40% of them).  A
    prototype whose margin is not empty (:func:`empty_margin`) leaves them at weight 0.
    ``empty_outside=False`` leaves those cells at weight 0 (the 3-D symmetry test compares a prototype with its
    own copies on what both have seen, ``symmetry.tilt_symmetries``)."""
    C = P.shape[1]
    shape = P.shape[2:]
    R, A, H = shape
    m = len(gs)
    aspect = np.broadcast_to(np.asarray(aspect, np.float64), (m,))
    xyz = _forward_xyz(gs, shape)  # (m, 3, N)
    if index is not None:
        return _resample_inside(P, V, xyz, aspect, np.asarray(index, np.int64), empty_outside)
    grid, inside = _grid_coords(xyz[:, 0], xyz[:, 1], xyz[:, 2], np.ones(m), aspect, shape, np.float32)

    # sample_volumes' trilinear reading (the points outside the cylinder are replaced below, so not zeroed there)
    out = _trilinear(_wrapped(P, V), grid).numpy()
    if not empty_outside:
        out *= inside[:, None]
    v = out[:, 0]
    pc = np.where(v[:, None] > 1e-6, out[:, 1:] / np.maximum(v[:, None], 1e-6), 0.0)
    if not empty_outside:
        return pc.reshape((m, C) + shape).astype(np.float32), v.reshape((m,) + shape).astype(np.float32)
    # the cells outside the prototype's cylinder take its empty margin
    # (in float32: the margin's float64 values are selected, then cast, so casting them first is the same)
    fx, fw = _margin_fill(P, V)
    pc = np.where(inside[:, None], pc, fx[:, :, None])
    v = np.where(inside, v, fw[:, None])
    return pc.reshape((m, C) + shape), v.reshape((m,) + shape)


def _wrapped(p: np.ndarray, v: np.ndarray) -> torch.Tensor:
    """[v, v x] (u, 1 + C, R, A + 2, H) of volumes p (u, C, R, A, H), v (u, R, A, H), the azimuth wrapped by one bin
    on each side (the reading of :func:`_trilinear`)."""
    vol = np.concatenate([v[:, None], v[:, None] * p], axis=1).astype(np.float32)
    return torch.from_numpy(np.concatenate([vol[:, :, :, -1:], vol, vol[:, :, :, :1]], axis=3))


def _margin_fill(P: np.ndarray, V: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Features (u, C) and weights (u,) float32 that the cells of a copy outside prototype P, V's cylinder take:
    its :func:`empty_margin`, features 0 where the margin's weight is 0 (unknown cells: 0, as inside)."""
    fx, fw = empty_margin(P, V)
    return np.where(fw[:, None] > 0, fx, 0.0).astype(np.float32), fw.astype(np.float32)


def _resample_inside(P: np.ndarray, V: np.ndarray, xyz: np.ndarray, aspect: np.ndarray, index: np.ndarray,
                     empty_outside: bool) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_resample_copies` with ``index``: copy i of prototype ``index[i]`` of P (u, C, R, A, H), V (u, R, A, H),
    its cells at prototype-frame points ``xyz`` (m, 3, R A H) (:func:`_forward_xyz`), grid aspects ``aspect`` (m,).

    Only the cells inside the prototype's cylinder are read (a tipped copy's cylinder reaches beyond the prototype's:
    on the bench row's copies about half of the cells lie outside): their azimuths and ``grid_sample`` coordinates
    are computed for them alone, each prototype sampled once for all its copies' inside cells, and the means written
    into outputs that already hold the outside cells' values (the prototype's :func:`_margin_fill`, or 0).  The
    same float32 operations as :func:`_grid_coords` and :func:`_resample_copies`' full reading, so the same values."""
    C, shape = P.shape[1], P.shape[2:]
    R, A, H = shape
    m, N = xyz.shape[0], xyz.shape[2]
    dt = np.float32
    x, y, z = (np.asarray(xyz[:, j], dt) for j in range(3))
    fi = np.hypot(x, y) / np.ones((m, 1), dt) * R - 0.5
    fk = z / np.asarray(aspect, dt).reshape(m, 1) * H - 0.5
    inside = (fi <= R - 0.5) & (fk >= -0.5) & (fk <= H - 0.5)
    flat = np.flatnonzero(inside)  # (copy, cell) order: copy flat // N, cell flat % N
    x, y, fi, fk = (a.reshape(-1)[flat] for a in (x, y, fi, fk))
    phi = np.arctan2(y, x)  # as _grid_coords
    np.add(phi, dt(2 * np.pi), out=phi, where=phi < 0)
    fj = phi / (2 * np.pi) * A - 0.5
    grid = _sample_coords(fk, fj, fi, (R, A, H), dt)
    pc = np.zeros((m, C, N), dt)
    v = np.zeros((m, N), dt)
    if empty_outside:
        fx, fw = _margin_fill(P, V)
        pc[:] = fx[index][:, :, None]
        v[:] = fw[index][:, None]
    rows = flat // N
    at_pc = flat + rows * ((C - 1) * N)  # the points' positions in pc's channel 0, (copy C + 0) N + cell
    owner = index[rows]
    pcf, vf = pc.reshape(-1), v.reshape(-1)
    protos = np.unique(index)
    for u in protos:
        at = np.flatnonzero(owner == u) if len(protos) > 1 else slice(None)
        s = _trilinear(_wrapped(P[u:u + 1], V[u:u + 1]), grid[at][None])[0].numpy()  # (1 + C, points)
        vs = s[0]
        vf[flat[at]] = vs
        means = np.where(vs > 1e-6, s[1:] / np.maximum(vs, 1e-6), 0.0)
        base = at_pc[at]
        for c in range(C):
            pcf[base + c * N] = means[c]
    return pc.reshape((m, C) + shape), v.reshape((m,) + shape)


def volume_on_face(vol: np.ndarray, aspect: float, up: np.ndarray, grid: TiltGrid) -> np.ndarray:
    """A store-channel volume (6, R, A, H) (``ingest.volume.CHANNELS``) resampled as resting with its direction
    ``up`` (3,) pointing up, re-normalised by that pose's footprint and height (for pictures)."""
    shape = vol.shape[1:]
    g = copy_geometry(vol[0], np.minimum(vol[2], 1.0), aspect, up, grid)
    out = sample_volumes(np.asarray(vol, np.float32)[None], forward_points([g], shape), [1.0], [aspect])
    return out[0].numpy().reshape(vol.shape)


# --- the copies' blocks on the search's pool (searchpool) --------------------------------------------

def _overlapped(prepare, run, pairs: list[tuple[int, int]]) -> None:
    """``prepare(pairs)`` then ``run(b0)`` for every block start b0 of ``COPY_BLOCK`` pairs, the blocks on the pool's
    threads as in :func:`pooled`; ``prepare`` (the copies' geometries, on this thread)
    runs a prototype at a time, and each block is started as soon as its pairs (sorted by prototype) are prepared,
    so this thread's share overlaps the threads' resampling.  The same blocks as ``prepare(pairs)`` then
    ``pooled(run, ...)``; ``prepare`` is only ever called on this thread."""
    pool = pool_here()
    if pool is None or len(pairs) <= COPY_BLOCK:
        prepare(pairs)
        pooled(run, range(0, len(pairs), COPY_BLOCK))
        return
    futures, done, b0 = [], 0, 0
    ks = np.array([k for k, _ in pairs])
    cuts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]]).tolist() + [len(pairs)]
    for p0, p1 in zip(cuts[:-1], cuts[1:]):
        prepare(pairs[p0:p1])
        done = p1
        while b0 + COPY_BLOCK <= done or (done == len(pairs) and b0 < done):
            futures.append(pool.submit(run, b0))
            b0 += COPY_BLOCK
    for f in futures:
        f.result()


# --- spectra of the refinement's columns -------------------------------------------------------

def _scale_matrix(n: int, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation along one axis of length n as a matrix (n, n) and the in-grid mask (n,):
    out(i) = a((i + 0.5) / sigma - 0.5), the scaling of ``posesearch.scale_prototypes`` (positions below the
    first bin centre take the first bin, beyond the grid's outer edge are unknown)."""
    if n == 1 or sigma == 1.0:
        return np.eye(n), np.ones(n, bool)
    pos = (np.arange(n) + 0.5) / sigma - 0.5
    inside = pos <= n - 0.5
    pos = np.clip(pos, 0.0, n - 1)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, n - 1)
    t = pos - lo
    S = np.zeros((n, n))
    np.add.at(S, (np.arange(n), lo), 1 - t)
    np.add.at(S, (np.arange(n), hi), t)
    return S, inside


def column_factors(Pc: np.ndarray, Vc: np.ndarray, sigma: float, dft: torch.Tensor, out: tuple | None = None
                   ) -> tuple[torch.Tensor, ...]:
    """Prototype factors (Pn, Pd) of copies Pc (M, C, R, A, H), Vc (M, R, A, H) scaled by ``sigma``: the
    same tensors as ``posesearch._prototype_spectra(*scale_prototypes(Pc, Vc, (sigma,)))`` (layout (A, M,
    features), ``posesearch.spectrum_rows``) up to float rounding, built for many small products.

    Per block of a few copies (staged as [v, mu] in one buffer): the scaling as two small matrices (radial, height)
    whose rows beyond the grid are zero (the scaled cells outside it are unknown, :func:`_scale_matrix`); the
    numerator factors [v, v |mu|^2, -2 v mu]; their azimuthal transform with the real DFT matrix ``dft`` (A, A)
    (``PoseBank.dft``) as two half-size products on the radix-2 folds (``posesearch._half_dfts``, half the
    arithmetic of the full product; the full product when 4 does not divide A), written into every other row of
    the result, which is already the products' layout; the denominator factor C v is C times the numerator's v
    block (the transform is linear: one product fewer, equal up to rounding).  ``Pc``, ``Vc`` may also be
    sequences of single copies (C, R, A, H), (R, A, H): each step then stages its own copies, on its pool thread,
    instead of the caller stacking all.  ``out``: tensors (A, M, (C + 2) R H), (A, M, R H) to write into (views of
    a larger bank's factors: each row's (M, features) block contiguous)."""
    from .posesearch import _half_dfts
    listed = isinstance(Pc, (list, tuple))
    M, (C, R, A, H) = (len(Pc), Pc[0].shape) if listed else (Pc.shape[0], Pc.shape[1:])
    Sr, mr = _scale_matrix(R, sigma)
    Sh, mh = _scale_matrix(H, sigma)
    scaled = sigma != 1.0 and (R > 1 or H > 1)
    Sr = torch.from_numpy((Sr * mr[:, None]).astype(np.float32))  # rows of cells beyond the grid: 0 (unknown)
    ShT = torch.from_numpy((Sh * mh[:, None]).T.astype(np.float32).copy())
    rows = dft.shape[0]
    feat, RH = (C + 2) * R * H, R * H
    if out is None:
        pn = torch.empty((rows, M, feat), dtype=torch.float32)
        pd = torch.empty((rows, M, RH), dtype=torch.float32)
    else:
        pn, pd = out
    flat = pn.view(rows, M * feat)
    halves = _half_dfts(dft)
    h = A // 2
    # a few copies at a time, so the steps' temporaries stay in cache (each column's arithmetic is the same), the
    # steps spread over the threads (:func:`pooled`)
    step = max(1, FACTOR_BLOCK_BYTES // (4 * (C + 2) * R * A * H))

    def run(m0: int) -> None:
        m1 = min(M, m0 + step)
        b = m1 - m0
        stage = np.empty((b, C + 1, R, A, H), np.float32)  # [v, mu_1 .. mu_C] of each copy
        if listed:
            for j in range(b):
                stage[j, 0] = Vc[m0 + j]
                stage[j, 1:] = Pc[m0 + j]
        else:
            stage[:, 0] = Vc[m0:m1]
            stage[:, 1:] = Pc[m0:m1]
        a = torch.from_numpy(stage)
        if scaled:
            # (..., R, A, H): radial then height interpolation, as matrix products over the other axes
            a = torch.matmul(Sr, a.reshape(-1, R, A * H)).reshape(a.shape) @ ShT
        v, p = a[:, :1], a[:, 1:]
        vmu = v * p
        num = torch.empty((b, C + 2, R, A, H), dtype=torch.float32)
        num[:, :1] = v
        torch.sum(vmu * p, dim=1, keepdim=True, out=num[:, 1:2])
        torch.mul(vmu, -2.0, out=num[:, 2:])
        az = num.permute(3, 0, 1, 2, 4)  # (A, b, C + 2, R, H)
        cols = flat[:, m0 * feat:m1 * feat]
        if halves is None:
            torch.mm(dft, az.reshape(A, -1), out=cols)
        else:
            st = torch.empty((A, b, C + 2, R, H), dtype=torch.float32)
            torch.add(az[:h], az[h:], out=st[:h])  # folds for the even bins
            torch.sub(az[:h], az[h:], out=st[h:])  # and for the odd bins
            f = st.view(A, -1)
            torch.mm(halves[0], f[:h], out=cols[0::2])
            torch.mm(halves[1], f[h:], out=cols[1::2])
        torch.mul(pn[:, m0:m1, :RH], float(C), out=pd[:, m0:m1])

    pooled(run, range(0, M, step))
    return pn, pd


def _block_factors(Pc, Vc, sigma: float, dft: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """:func:`column_factors` (the same values) written into this thread's reusable buffers (``cores.scratch``):
    valid until this thread builds the next block's.  A refinement block's factors (up to ``COLUMN_BUDGET``
    columns, ~40 MB) were otherwise a fresh block each, mapped and page-faulted by the matrix products that fill
    them (``cores.large_blocks_mapped``): on 600 tumbled objects (the tilt_mining row's settings) the largest share
    of the run's 6.6 million minor page faults."""
    M, (C, R, A, H) = (len(Pc), Pc[0].shape) if isinstance(Pc, (list, tuple)) else (Pc.shape[0], Pc.shape[1:])
    rows = dft.shape[0]
    out = (scratch("column_pn", (rows, M, (C + 2) * R * H)), scratch("column_pd", (rows, M, R * H)))
    return column_factors(Pc, Vc, sigma, dft, out=out)


def _runs(sizes: Sequence[int], budget: int) -> list[tuple[int, int]]:
    """Consecutive runs (start, stop) of items with ``sizes``, each adding items while its total stays within
    ``budget`` and, with torch on T > 1 threads, within an even share of the whole, ceil(total / T): a block whose
    products fit in one budget is still at least T runs, one for each of the pool's threads (an item larger than
    the limit is a run of its own).  Measured on the bench row's search of 2,048 tumbled objects x 16 prototypes:
    every refinement block fit in one run of ``TASK_PAIRS``, so the refinement's products (3.05 s of 11.2 s CPU)
    ran on one thread while the other idled.  Each column's reduction is its own, so the runs give the same values."""
    threads = torch.get_num_threads()
    if threads > 1 and len(sizes):
        budget = min(budget, max(1, -(-int(sum(sizes)) // threads)))
    runs, start, total = [], 0, 0
    for i, s in enumerate(sizes):
        if i > start and total + s > budget:
            runs.append((start, i))
            start, total = i, 0
        total += s
    if len(sizes):
        runs.append((start, len(sizes)))
    return runs


def _best_shifts(d: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
    """Distances d (A, L) over the shifts of L (copy, object) pairs at one scale -> D (L,), yaw_deg (L,) float32:
    ``posesearch._best_pose_nska``'s rule (the first shift holding the minimum, the parabola through it and its
    two circular neighbours) on every column, in one call for a block's products."""
    A = d.shape[0]
    D, sh = _first_min(d)
    dm = d.gather(0, ((sh - 1) % A)[None])[0]
    dp = d.gather(0, ((sh + 1) % A)[None])[0]
    return _refined_yaw(D, sh, dm, dp, A)


def band_rows(A: int, bins: int) -> np.ndarray:
    """Rows of real spectra (``posesearch.spectrum_rows`` layout [Re_0 .. Re_{F-1}, Im_1 .. Im_Fc] of A azimuth bins)
    of the frequencies 0 .. ``bins``: [Re_0 .. Re_bins, Im_1 .. Im_bins], which is the layout of the real spectra of
    2 bins + 1 azimuth bins (2 bins + 1 < A)."""
    F = spectrum_rows(A)[0]
    return np.r_[np.arange(bins + 1), F + np.arange(bins)]


def band_limited(bank: PoseBank, bins: int) -> tuple[PoseBank, torch.Tensor]:
    """A bank of the same prototypes searched on the azimuth frequencies 0 .. ``bins`` of ``bank`` only, and the rows
    (:func:`band_rows`) to take from the object spectra it is given.  Its A' = 2 bins + 1 shifts are the truncated
    Fourier series of every correlation sampled at 360 / A' degree steps (the inverse transform of A' bins evaluates
    exactly that series; its 1 / A' instead of 1 / A scales the numerator and the denominator alike), so its search
    costs about A' / A of the full one: products over 2 bins + 1 of the A spectrum rows, A' shifts to reduce.  A
    screen: the distance of azimuthally smoothed correlations, not the distance (``TiltBank``, ``[mine]
    tilt_coarse_bins``)."""
    rows = torch.from_numpy(band_rows(bank.A, bins))
    out = object.__new__(PoseBank)
    out.K, out.C, out.scales, out.dft = bank.K, bank.C, bank.scales, None
    out.A = 2 * bins + 1
    out.factors = tuple(f.index_select(0, rows) for f in bank.factors)
    return out, rows


# --- the bank ----------------------------------------------------------------------------------

GEOMETRY_CACHE_SIZE = 256  # prototypes (solid cells, aspect) whose copies' geometries are kept across passes
# (centre and hull vertices of the solid cells (solid_points), aspect, grid shape, margins) -> {tilt index:
# CopyGeometry}; the geometries are functions of these alone (copy_geometries), so a hit is exact, and a pass whose
# prototypes changed inside their hulls finds them
_GEOMETRY_CACHE: dict[tuple, dict[int, CopyGeometry]] = {}
FACTOR_BLOCK_BYTES = 1 << 20  # factors of the copies that column_factors builds at once (stays in cache)
COPY_BLOCK = 32        # copies resampled per block (bounds its temporaries; blocks spread over threads)
COARSE_ROWS = 256      # objects per product of the coarse level (bounds the per-shift distances' memory)
COLUMN_BUDGET = 384    # (copy, scale) columns whose spectra a refinement block holds at once (~90 MB)
PROTOTYPE_BATCH = 4    # prototypes whose refinement copies are held at once (TiltBank._drop_refined)
KEEP_REFINED_BYTES = 512 << 20  # a pass of several chunks keeps the refinement's copies up to this (more_chunks)
TASK_PAIRS = 8192      # (copy, object) pairs of a run of refinement products reduced at once (A x 4 bytes each)
SPLIT_WASTE = 1.5      # a refinement group runs one product per previous direction when the union's arithmetic
SPLIT_OVERHEAD = 200   # exceeds SPLIT_WASTE x the candidates' own plus this many (object, copy) pairs per product


def _refine_pairs(pd: np.ndarray, pk: np.ndarray, focus: np.ndarray | None, margin: float) -> np.ndarray:
    """The distances pd (n, m) of each object's ``refine_top`` starting pairs (prototypes pk (n, m)) so far, inf
    where a pair is not refined at the next level.  With ``focus`` (n,) only the pairs of that prototype are refined
    (exact for the focus prototype's pose: each pair is refined on its own).  With ``margin`` > 0 only the pairs
    within a factor 1 + margin of the object's best pair so far (of the focus prototype's, with ``focus``): a
    pair that far behind rarely wins after refinement, and an assignment needs only the winner's pose (a
    heuristic, ``[mine] tilt_refine_margin``; measured in configs/default.toml)."""
    keep = np.isfinite(pd)
    if focus is not None:
        keep &= pk == np.asarray(focus)[:, None]
    if margin > 0:
        best = np.min(np.where(keep, pd, np.inf), axis=1, keepdims=True)
        keep &= pd <= best * (1.0 + margin)
    return np.where(keep, pd, np.inf)


class TiltBank:
    """Prototypes P (K, C, R, A, H), V (K, R, A, H) with aspects (K,), searched over tilts x yaw x scale.

    Same interface as :class:`posesearch.PoseBank` (``spectra``, ``match_spectra``, ``match``); its
    :class:`PoseMatch` carries ``tilt`` (n, K), indices into ``grid.dirs``.  With the identity grid it is a
    PoseBank (no resampling).

    Kept for the bank's life (a pass): each (prototype, tilt)'s geometry, and the first level's copies; the
    later levels' copies only while the refinement works on their batch of prototypes (``PROTOTYPE_BATCH``:
    all of them would hold about 330 MB).  All built when first needed, many at once (one enclosing circle
    per copy, one ``grid_sample`` per prototype of a block of copies).
    """

    def __init__(self, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid,
                 *, refine_margin: float = 0.0, coarse_bins: int = 0):
        self.refine_margin = float(refine_margin)  # > 0: see _refine_pairs
        # True: the refinement keeps every later-level copy it builds (a pass's earlier chunks: the later chunks
        # need nearly the same copies; set by the engine), False: it drops them batch by batch (_drop_refined)
        self.keep_refined = False
        self.levels = 0  # > 0: the search stops after this many levels of the grid (0: all; the engine's passes)
        self.P = np.asarray(P, np.float32)
        self.V = np.asarray(V, np.float32)
        self.K, self.C = self.P.shape[:2]
        self.shape = tuple(self.P.shape[2:])
        self.A = self.shape[1]
        self.aspect = np.broadcast_to(np.asarray(aspect, np.float64), (self.K,)).copy()
        self.scales, self.grid = scales, grid
        self._geom: dict[tuple[int, int], CopyGeometry] = {}
        self._solid: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._copies: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}
        # whether each tilt index is the identity, as a list: _build asks for every pair it is given (called per
        # pair, grid.is_upright cost 0.9 s of the main thread's 25 s in mining 300 tumbled objects)
        self._upright = grid.is_upright(np.arange(len(grid.dirs))).tolist()
        lvl0 = grid.level(0)
        Pc, Vc = self.copies(np.repeat(np.arange(self.K), len(lvl0)), np.tile(lvl0, self.K))
        self.T0 = len(lvl0)

        def factors(dft: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:  # scale-major: index s K T0 + k T0 + t
            M, (C, R, A, H) = len(Pc), Pc.shape[1:]
            pn = torch.empty((dft.shape[0], len(scales) * M, (C + 2) * R * H), dtype=torch.float32)
            pd = torch.empty((dft.shape[0], len(scales) * M, R * H), dtype=torch.float32)
            for si, sigma in enumerate(scales):
                column_factors(Pc, Vc, sigma, dft, out=(pn[:, si * M:(si + 1) * M], pd[:, si * M:(si + 1) * M]))
            return pn, pd

        # the first level's copies at every scale: the refinement's column factors (blocks spread over the threads)
        self.coarse = PoseBank(Pc, Vc, scales, factors=factors)
        self.dft = self.coarse.dft
        # coarse_bins > 0 (mining passes): the first level is a screen on the azimuth frequencies 0 .. coarse_bins only
        # (band_limited); its distances rank the pairs to refine, and the refinement's exact ones replace them
        self.band = None
        if 0 < coarse_bins and 2 * coarse_bins + 1 < self.A and len(grid.nsides) > 1:
            self.coarse, self.band = band_limited(self.coarse, coarse_bins)

    def _geometries(self, pairs: Sequence[tuple[int, int]]) -> None:
        """Compute the missing geometries of (prototype, tilt) ``pairs``, one batch per prototype.  A geometry
        depends on the hull vertices of the prototype's solid cells and its aspect only, which stop changing as
        the passes converge (the hull sooner than the cells inside it): :data:`_GEOMETRY_CACHE` keeps them across
        banks (passes), keyed by exactly those."""
        by_k: dict[int, list[int]] = {}
        for k, t in pairs:
            if (k, t) not in self._geom:
                by_k.setdefault(k, []).append(t)
        for k, ts in by_k.items():
            if k not in self._solid:
                self._solid[k] = solid_points(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid)
            c0, hull = self._solid[k]
            # the geometries are functions of the solid cells' hull vertices (not of every solid cell) and the aspect
            key = (c0.tobytes(), hull.tobytes(), float(self.aspect[k]), self.shape, self.grid.nsides,
                   self.grid.radial_margin, self.grid.height_margin)
            known = _GEOMETRY_CACHE.setdefault(key, {})
            todo = [t for t in ts if t not in known]
            if todo:
                gs = copy_geometries(self.shape, float(self.aspect[k]), self.grid.dirs[todo], self.grid, self._solid[k])
                known.update(zip(todo, gs))
            self._geom.update({(k, t): known[t] for t in ts})
        while len(_GEOMETRY_CACHE) > GEOMETRY_CACHE_SIZE:
            _GEOMETRY_CACHE.pop(next(iter(_GEOMETRY_CACHE)))

    def geometry(self, k: int, t: int) -> CopyGeometry:
        self._geometries([(int(k), int(t))])
        return self._geom[(int(k), int(t))]

    def copies(self, ks: np.ndarray, ts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tilted copies (M, C, R, A, H), (M, R, A, H) of prototypes ``ks`` at tilts ``ts`` (M,).

        Copies are kept (the finer levels and later chunks ask for the same ones) until the refinement drops
        its levels' copies (:meth:`_drop_refined`); new ones are resampled together.
        """
        Pc, Vc = self.copy_list(ks, ts)
        if not Pc:
            return np.zeros((0, self.C) + self.shape, np.float32), np.zeros((0,) + self.shape, np.float32)
        return np.stack(Pc), np.stack(Vc)

    def copy_list(self, ks: np.ndarray, ts: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
        """:meth:`copies` as two lists of single copies (C, R, A, H), (R, A, H), not stacked (views of the kept
        copies: read only)."""
        self._build(list(zip((int(k) for k in ks), (int(t) for t in ts))))
        got = [self._copies[(int(k), int(t))] for k, t in zip(ks, ts)]
        return [g[0] for g in got], [g[1] for g in got]

    def _build(self, pairs: list[tuple[int, int]]) -> None:
        copies, upright = self._copies, self._upright
        todo = sorted(p for p in set(pairs) if p not in copies)  # not set(copies): that is every kept copy, each call
        tilted = [(k, t) for k, t in todo if not upright[t]]
        for k, t in todo:
            if upright[t]:
                copies[(k, t)] = (self.P[k], self.V[k])

        def run(b0: int) -> None:
            blk = tilted[b0:b0 + COPY_BLOCK]
            kk = np.array([k for k, _ in blk])
            uk, inv = np.unique(kk, return_inverse=True)
            pc, vc = _resample_copies(self.P[uk], self.V[uk], [self._geom[key] for key in blk], self.aspect[kk],
                                      index=inv)
            for j, key in enumerate(blk):
                self._copies[key] = (pc[j], vc[j])

        _overlapped(self._geometries, run, tilted)  # blocks spread over the threads

    def more_chunks(self, more: bool) -> None:
        """Tell the bank whether more chunks of the same pass follow the next search: if so, and all of the later
        levels' copies fit in ``KEEP_REFINED_BYTES``, the refinement keeps the copies it builds for them (built
        once per pass, not once per chunk: the same copies, so the same values); the last chunk drops them as it
        goes."""
        n = self.K * (len(self.grid.dirs) - self.T0)
        self.keep_refined = more and n * (self.C + 1) * int(np.prod(self.shape)) * 4 <= KEEP_REFINED_BYTES

    def _drop_refined(self, level: int | None = None, batch: int = 0) -> None:
        """Forget copies of the later levels (the refinement's): a pass needs K x (48 + 192) of them with the
        default grid, about 330 MB on the 5 x 8 x 36 x 12 grid, so the refinement builds them a batch of
        prototypes at a time.  All of them (``level`` None), or, while level ``level``'s batch ``batch`` of
        prototypes is refined, those of the earlier levels and of that level's earlier batches (copies a previous
        chunk kept for the later batches stay, :attr:`keep_refined`)."""
        first = self.grid.offsets[1] if len(self.grid.offsets) > 2 else None
        if first is None:
            return
        if level is None:
            gone = [key for key in self._copies if key[1] >= first]
        else:
            lo = self.grid.offsets[level]
            gone = [key for key in self._copies
                    if first <= key[1] < lo or (key[1] >= lo and key[1] < self.grid.offsets[level + 1]
                                                and key[0] // PROTOTYPE_BATCH < batch)]
        for key in gone:
            del self._copies[key]

    def copy_at(self, k: int, up: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Copy (C, R, A, H), (R, A, H) of prototype k resting with any direction ``up`` (3,) pointing up."""
        pc, vc = self.copies_at(k, np.asarray(up, np.float64)[None])
        return pc[0], vc[0]

    def copies_at(self, k: int, ups: np.ndarray, *, empty_outside: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """Copies (M, C, R, A, H), (M, R, A, H) of prototype k resting with any directions ``ups`` (M, 3) pointing
        up (not kept: arbitrary directions are rarely asked for twice); ``empty_outside``: see
        :func:`_resample_copies`."""
        k = int(k)
        if k not in self._solid:
            self._solid[k] = solid_points(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid)
        gs = copy_geometries(self.shape, float(self.aspect[k]), np.asarray(ups, np.float64), self.grid, self._solid[k])
        M = len(gs)
        pc = np.empty((M, self.C) + self.shape, np.float32)
        vc = np.empty((M,) + self.shape, np.float32)

        def run(b0: int) -> None:  # blocks of copies spread over the threads, as in _build
            b1 = min(M, b0 + COPY_BLOCK)
            pc[b0:b1], vc[b0:b1] = _resample_copies(self.P[k][None], self.V[k][None], gs[b0:b1],
                                                    np.full(b1 - b0, self.aspect[k]), empty_outside=empty_outside,
                                                    index=np.zeros(b1 - b0, np.int64))

        pooled(run, range(0, M, COPY_BLOCK))
        return pc, vc

    def untilt(self, k: int, t: int, a: np.ndarray) -> np.ndarray:
        """Sums a (..., R, A, H) in the copy frame of (k, t) rotated back into prototype k's frame."""
        if self.grid.is_upright(t):
            return a
        a = np.asarray(a)
        return self.untilt_many(np.array([k]), np.array([t]), a.reshape((1, -1) + self.shape))[0].reshape(a.shape)

    def prepare_untilt(self, ks: np.ndarray, ts: np.ndarray) -> None:
        """Compute now the geometries :meth:`untilt_many` of (ks, ts) reads, so that its calls (e.g. on the pool's
        threads) only read the bank's caches (they are filled by one thread only)."""
        ks, ts = np.asarray(ks, np.int64), np.asarray(ts, np.int64)
        tilted = ~self.grid.is_upright(ts)
        self._geometries(list(zip(ks[tilted].tolist(), ts[tilted].tolist())))

    def untilt_many(self, ks: np.ndarray, ts: np.ndarray, a: np.ndarray, *, in_place: bool = False) -> np.ndarray:
        """Sums a (G, B, R, A, H) in the copy frames of (ks[g], ts[g]) rotated back into their prototypes'
        frames (cells a copy does not cover get 0), all groups in one resampling; the dtype is kept.
        ``in_place``: written into ``a`` (a C-contiguous array), which is returned."""
        ks, ts = np.asarray(ks, np.int64), np.asarray(ts, np.int64)
        out = a if in_place else np.array(a, copy=True)
        sel = np.flatnonzero(~self.grid.is_upright(ts))
        if sel.size:
            pairs = [(int(ks[g]), int(ts[g])) for g in sel]
            self._geometries(pairs)
            gs = [self._geom[p] for p in pairs]
            pts = inverse_points(gs, self.shape, self.aspect[ks[sel]])
            res = _sample_in_scratch(_taken_in_scratch(out, sel), pts, [g.rho_max for g in gs], [g.z_max for g in gs])
            out[sel] = res.numpy().reshape((len(sel),) + out.shape[1:])
        return out

    def spectra(self, x: np.ndarray, w: np.ndarray, out: torch.Tensor | None = None) -> torch.Tensor:
        return _spectra_of(x, w, self.dft, out)

    def match_spectra(self, o: torch.Tensor, min_overlap: float = 1e-3, return_all: bool = False,
                      scale_index: np.ndarray | None = None, window: int = 1, focus: np.ndarray | None = None
                      ) -> PoseMatch:
        """Best (tilt, yaw, scale) per (object, prototype) from object spectra o (A, n, (C + 2) R H).  ``focus`` (n,):
        the one prototype whose pose is wanted for each object (a pass with labels held fixed): the refinement
        skips the other prototypes' pairs, whose refined poses could not change that prototype's (their distances
        stay the first level's)."""
        n, K, T0 = o.shape[1], self.K, self.T0
        # blocks of objects bound the (n, K T0, S, A) distances
        # the blocks run at once on the pool's threads: COARSE_ROWS objects over all of them (memory as one block)
        rows = max(1, COARSE_ROWS // torch.get_num_threads())
        oc = o if self.band is None else o.index_select(0, self.band)  # the screen's rows of the object spectra
        with reused_scratch():  # the row blocks' temporaries in each thread's buffers, freed before the refinement
            m = self.coarse.match_spectra(oc, min_overlap, False, scale_index, window, row_block=rows, run=pooled,
                                          reuse=True)
        del oc
        D = m.D.reshape(n, K, T0)
        bt = np.argmin(D, axis=2)
        pick = lambda a: np.take_along_axis(a.reshape(n, K, T0), bt[..., None], axis=2)[..., 0]  # noqa: E731
        out = PoseMatch(pick(m.D), pick(m.yaw_deg), pick(m.scale), None, tilt=self.grid.level(0)[bt])
        if len(self.grid.nsides) > 1:
            with reused_scratch():  # one buffer for every block's column factors (_block_factors)
                self._refine(o, m, out, min_overlap, focus)
        return out

    def _refine(self, o: torch.Tensor, coarse: PoseMatch, out: PoseMatch, min_overlap: float,
                focus: np.ndarray | None = None) -> None:
        """Coarse-to-fine over the later levels from each object's ``refine_top`` best (prototype, coarse tilt)
        pairs (in place: a refined pose replaces the prototype's pose when its distance is lower).  Several
        starting pairs, not one per prototype: the best coarse tilt can be a neighbour basin's.  The finer
        levels search at each pair's best coarse scale only (size and tilt are nearly independent).

        Pairs are grouped by (scale, prototype); a group's copies are the union of the directions its pairs
        need.  A group runs one product of its objects against that union when the union wastes little
        arithmetic, else one product per previous direction, whose candidates its pairs share exactly
        (``SPLIT_WASTE``, ``SPLIT_OVERHEAD``: a product's fixed cost counted as ~200 (object, copy) pairs).
        Measured on the bench row's 2048 objects x 16 prototypes (one thread): the unions cost 8x the
        candidates' arithmetic (794k vs 98k (object, copy) pairs per search) and their products 1.9 s; split
        as above 0.76 s.  The groups' (copy, scale) spectra are built in blocks of
        groups of one scale, about ``COLUMN_BUDGET`` columns each (:func:`column_factors`)."""
        n, K, T0 = o.shape[1], self.K, self.T0
        flat = np.where(np.isfinite(coarse.D), coarse.D, np.inf).reshape(n, K * T0)
        top = np.argsort(flat, axis=1, kind="stable")[:, :self.grid.refine_top]  # (n, m) of k T0 + t
        r = np.arange(n)[:, None]
        pk, pt = top // T0, self.grid.level(0)[top % T0]
        pd = _refine_pairs(flat[r, top], pk, focus, 0.0)  # pairs of other prototypes than the focus: inf
        pyaw = coarse.yaw_deg.reshape(n, K * T0)[r, top]
        psc = coarse.scale.reshape(n, K * T0)[r, top]
        scales32 = np.asarray(self.scales, np.float32)
        psi = np.argmin(np.abs(psc[..., None] - scales32), axis=-1)  # (n, m) scale index of each pair
        minov = self.C * min_overlap
        screened = self.band is not None
        replaced = np.zeros(pd.shape, bool)  # pairs whose screened distance was replaced by an exact one
        for level in range(1, self.levels or len(self.grid.nsides)):
            # with a margin, each level refines the pairs within it of the object's best so far
            ii, jj = np.nonzero(_refine_pairs(pd, pk, focus, self.refine_margin) < np.inf)
            if not ii.size:
                break
            prev, gk, gs = pt[ii, jj], pk[ii, jj], psi[ii, jj]
            cand = {int(t): self.grid.candidates(level, int(t)) for t in np.unique(prev)}
            # prototypes in batches of PROTOTYPE_BATCH (their copies are built, used and dropped together),
            # scale-major within a batch: a block of groups shares one scale
            order = np.lexsort((gk, gs, gk // PROTOTYPE_BATCH))
            key = np.stack([gs, gk], 1)[order]
            cut = np.flatnonzero(np.any(key[1:] != key[:-1], axis=1)) + 1
            groups = []
            for c0, c1 in zip(np.r_[0, cut], np.r_[cut, len(order)]):
                es = order[c0:c1]
                u = np.unique(np.concatenate([cand[int(t)] for t in np.unique(prev[es])]))
                if u.size:
                    groups.append((int(key[c0][0]), int(key[c0][1]), u, es))
            b, bend = 0, 0
            while b < len(groups):  # blocks of groups of one scale, about COLUMN_BUDGET columns each
                if b == bend:  # a new batch of prototypes: the previous batch's copies go, this one's are built
                    if not self.keep_refined:
                        self._drop_refined(level, groups[b][1] // PROTOTYPE_BATCH)
                    bend = b
                    while bend < len(groups) and groups[bend][1] // PROTOTYPE_BATCH == groups[b][1] // PROTOTYPE_BATCH:
                        bend += 1
                    self._build([(k, int(t)) for _, k, u, _ in groups[b:bend] for t in u])
                si, e, ncol = groups[b][0], b, 0
                while e < bend and groups[e][0] == si and (not ncol or ncol + len(groups[e][2]) <= COLUMN_BUDGET):
                    ncol += len(groups[e][2])
                    e += 1
                blk, b = groups[b:e], e
                ks = np.concatenate([np.full(len(u), k) for _, k, u, _ in blk])
                ts = np.concatenate([u for _, _, u, _ in blk])
                factors = _block_factors(*self.copy_list(ks, ts), self.scales[si], self.dft)
                jobs, prods = [], []
                c0 = 0
                for _, k, u, es in blk:
                    cb = c0  # the group's copies are rows cb .. cb + |u| of the block's factors
                    c0 += len(u)
                    tp = prev[es]
                    ps_, counts = np.unique(tp, return_counts=True)
                    exact = sum(int(c) * len(cand[int(t)]) for t, c in zip(ps_, counts))
                    if len(ps_) > 1 and len(es) * len(u) > SPLIT_WASTE * exact + SPLIT_OVERHEAD * len(ps_):
                        subs = [(cand[int(t)], es[tp == t]) for t in ps_]  # one product per previous direction
                    else:
                        subs = [(None, es)]  # one product against the union
                    for cols, es_p in subs:
                        pos = None if cols is None else cb + np.searchsorted(u, cols)
                        cols = u if cols is None else cols
                        rows = ii[es_p]
                        urows, inv = np.unique(rows, return_inverse=True)
                        mask = None
                        if cols is u and len(ps_) > 1:
                            # each pair searches its own candidates only: one row per previous direction, then
                            # each pair's row (one fancy assignment per direction, not per direction and pair set)
                            own = np.zeros((len(ps_), len(u)), bool)
                            for r, t in enumerate(ps_):
                                own[r, np.searchsorted(u, cand[int(t)])] = True
                            mask = own[np.searchsorted(ps_, tp)]
                        jobs.append((es_p, cols, inv, len(urows), mask))
                        prods.append((cb, len(u), pos, urows))

                def product(job) -> torch.Tensor:
                    cb, nu_, pos, urows = job
                    if pos is None:
                        part = tuple(f[:, cb:cb + nu_] for f in factors)
                    else:
                        part = tuple(f.index_select(1, torch.from_numpy(pos)) for f in factors)
                    og = o.index_select(1, torch.from_numpy(urows))  # the group's objects
                    return _distances_from_spectra(og, part, self.A, minov).view(self.A, -1)  # (A, |cols| nu)

                def task(span: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
                    # a run of the block's products, then the best shift of every (copy, object) of the run at once
                    # (one scale): the rule of posesearch._best_pose_nska, column by column, so only D and yaw
                    # outlive the run (the distances for every shift of a block's products were 100+ MB when one
                    # prototype held most objects' best pairs); one reduction per run, not per product (its fixed
                    # cost, ~2 ms of small ops, was most of a small product's)
                    d = [product(prods[i]) for i in range(*span)]
                    return _best_shifts(torch.cat(d, 1) if len(d) > 1 else d[0])

                best = pooled(task, _runs([len(j[1]) * j[3] for j in jobs], TASK_PAIRS))  # runs over the threads
                Db = np.concatenate([d for d, _ in best])  # (sum of |cols| nu) in the products' order
                yb = np.concatenate([y for _, y in best])
                c0 = 0
                for es_p, cols, inv, nu, mask in jobs:
                    c1 = c0 + len(cols) * nu
                    Dg, yg = Db[c0:c1].reshape(len(cols), nu).T, yb[c0:c1].reshape(len(cols), nu).T
                    c0 = c1
                    rows, cols_e = ii[es_p], jj[es_p]
                    De = Dg[inv]
                    if mask is not None:
                        De = np.where(mask, De, np.inf)
                    j = np.argmin(De, axis=1)
                    rr = np.arange(len(es_p))
                    better = De[rr, j] < pd[rows, cols_e]
                    if screened and level == 1:  # a screened pair takes its exact refined pose whatever the screen said
                        better |= np.isfinite(De[rr, j])
                        replaced[rows[better], cols_e[better]] = True
                    ri, ci = rows[better], cols_e[better]
                    pd[ri, ci] = De[rr, j][better]
                    pyaw[ri, ci] = yg[inv, j][better]
                    pt[ri, ci] = cols[j[better]]
        if not self.keep_refined:
            self._drop_refined()
        if screened:  # a prototype with an exactly refined pair gets that pair's distance, not the screen's
            ii, jj = np.nonzero(replaced)
            out.D[ii, pk[ii, jj]] = np.inf
        for j in range(pk.shape[1]):
            i = np.flatnonzero(pd[:, j] < out.D[np.arange(n), pk[:, j]])
            k = pk[i, j]
            out.D[i, k], out.yaw_deg[i, k], out.scale[i, k], out.tilt[i, k] = pd[i, j], pyaw[i, j], psc[i, j], pt[i, j]

    def match(self, x: np.ndarray, w: np.ndarray, min_overlap: float = 1e-3, return_all: bool = False) -> PoseMatch:
        return self.match_spectra(self.spectra(x, w), min_overlap)


def make_bank(P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], grid: TiltGrid | None = None,
              aspect: np.ndarray | None = None, refine_margin: float = 0.0, coarse_bins: int = 0):
    """A PoseBank (yaw-only grid or none) or a TiltBank; both give PoseMatch with ``tilt`` (n, K).  ``refine_margin``,
    ``coarse_bins``: the mining passes' switches (:class:`TiltBank`)."""
    if grid is None or grid.is_identity:
        return PoseBank(P, V, scales)
    if aspect is None:
        raise ValueError("a tilt search needs the prototypes' aspects (z_max / rho_max), got None")
    return TiltBank(P, V, aspect, scales, grid, refine_margin=refine_margin, coarse_bins=coarse_bins)


def tilt_pose_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, *, aspect: np.ndarray,
                        scales: Sequence[float] = (1.0,), grid: TiltGrid | None = None,
                        chunk_size: int = 1024, min_overlap: float = 1e-3) -> PoseMatch:
    """Pose-minimised distance of every object to every prototype over tilts x yaw x scale: PoseMatch (N, K)
    with ``tilt`` (indices into ``grid.dirs``).  P may be objects themselves (pairwise distances between
    objects); ``aspect`` (K,) are the prototypes' z_max / rho_max (:func:`grid_aspect`)."""
    X, W, P, V, scales = _prepare(X, W, P, V, scales)
    bank = make_bank(P, V, scales, grid, aspect)
    parts = []
    for i in range(0, len(X), chunk_size):
        if isinstance(bank, TiltBank):
            bank.more_chunks(i + chunk_size < len(X))
        parts.append(bank.match(X[i:i + chunk_size], W[i:i + chunk_size], min_overlap))
    K = P.shape[0]
    if not parts:
        z = np.zeros((0, K), np.float32)
        return PoseMatch(z, z, z, None, tilt=np.zeros((0, K), np.int64))
    cat = lambda name: np.concatenate([getattr(p, name) for p in parts])  # noqa: E731
    return PoseMatch(cat("D"), cat("yaw_deg"), cat("scale"), None, tilt=cat("tilt"))


def rotation_of(grid: TiltGrid, tilt: np.ndarray, yaw_deg: np.ndarray) -> np.ndarray:
    """Rotations (..., 3, 3) object frame <- prototype frame: Rz(yaw) @ tilt_matrix(dirs[tilt])."""
    return rot.tilt_yaw_to_matrix(grid.dirs[np.asarray(tilt)], yaw_deg)
