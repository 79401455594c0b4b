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
copy's weight is 0 = unknown).  The maps are index/weight arrays (8 corners per cell), built once per
(prototype, tilt) and applied with one gather, so resampling is a small part of a pass.

Untilting (inverse map)
-----------------------
A member matched at tilt u, aligned (yaw and scale undone), lives in the copy's grid; every prototype
cell p is mapped to q = M (p - c0) - b in the copy's grid and sampled there, which rotates the member back
into the prototype frame (cells it does not cover get weight 0).  Both maps are linear, so the engine
untilts sums of members once per (prototype, tilt, scale) group.

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
``nsides=(0,)`` is the set {+z}: the yaw-only search of the 2-D case, with no resampling at all.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import torch

from .. import rotations as rot
from scipy.spatial import ConvexHull, QhullError

from ..ingest.proposals import min_enclosing_circle
from .posesearch import PoseBank, PoseMatch, _prepare

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


# --- sampling maps -------------------------------------------------------------------------------

def _cell_points(R: int, A: int, H: int, rho_max: float, z_max: float) -> np.ndarray:
    """Cell centres (R A H, 3) of a cylindrical grid, in the order of a (R, A, H) reshape."""
    rho = (np.arange(R) + 0.5) / R * rho_max
    phi = (np.arange(A) + 0.5) / A * 2 * np.pi
    z = (np.arange(H) + 0.5) / H * z_max
    rr, pp, zz = np.meshgrid(rho, phi, z, indexing="ij")
    return np.stack([rr * np.cos(pp), rr * np.sin(pp), zz], -1).reshape(-1, 3)


def _trilinear(pts: np.ndarray, shape: tuple[int, int, int], rho_max: float, z_max: float
               ) -> tuple[np.ndarray, np.ndarray]:
    """Sampling map of points (M, 3) in a cylindrical grid: corner indices (8, M) into R A H and weights (8, M)
    (all 0 for points outside the grid's cylinder)."""
    R, A, H = shape
    fi = np.hypot(pts[:, 0], pts[:, 1]) / rho_max * R - 0.5
    fj = np.mod(np.arctan2(pts[:, 1], pts[:, 0]), 2 * np.pi) / (2 * np.pi) * A - 0.5
    fk = pts[:, 2] / z_max * H - 0.5
    inside = (fi <= R - 0.5) & (fk >= -0.5) & (fk <= H - 0.5)
    fi = np.clip(fi, 0.0, R - 1)
    fk = np.clip(fk, 0.0, H - 1)
    i0, j0, k0 = np.floor(fi), np.floor(fj), np.floor(fk)
    ti, tj, tk = fi - i0, fj - j0, fk - k0
    idx, wts = [], []
    for di in (0, 1):
        ii = np.minimum(i0 + di, R - 1).astype(np.int64)
        wi = ti if di else 1 - ti
        for dj in (0, 1):
            jj = np.mod(j0 + dj, A).astype(np.int64)
            wj = tj if dj else 1 - tj
            for dk in (0, 1):
                kk = np.minimum(k0 + dk, H - 1).astype(np.int64)
                wk = tk if dk else 1 - tk
                idx.append((ii * A + jj) * H + kk)
                wts.append(wi * wj * wk * inside)
    return np.stack(idx), np.stack(wts).astype(np.float32)


def apply_map(a: np.ndarray, idx: np.ndarray, wts: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    """Sample a (..., R, A, H) through a map (8, M) -> (..., R', A', H') with ``shape`` = (R', A', H')."""
    flat = a.reshape(a.shape[:-3] + (-1,))
    out = (flat[..., idx] * wts).sum(axis=-2)
    return out.reshape(a.shape[:-3] + shape).astype(np.float32)


@dataclass
class CopyGeometry:
    """Where a tilted copy sits: rotation M (3, 3), centre c0 (3,) of the prototype, copy base b (3,) and grid
    extents rho_max, z_max of the copy (units of the prototype's rho_max)."""
    M: np.ndarray
    c0: np.ndarray
    base: np.ndarray
    rho_max: float
    z_max: float


def solid_points(surface: np.ndarray, weight: np.ndarray, aspect: float, grid: TiltGrid) -> tuple[np.ndarray, np.ndarray]:
    """Centre c0 (3,) of a volume (surface, weight (R, A, H)) and its solid cells' centres about c0 (m, 3),
    reduced to their convex hull's vertices (the extents and the enclosing circle of any rotation of the
    points are those of the hull's vertices)."""
    R, A, H = surface.shape
    pts = _cell_points(R, A, H, 1.0, aspect)
    occ = ((surface >= SURFACE_MIN) & (weight >= OBSERVED_MIN)).reshape(-1)
    if occ.sum() < 4:  # nothing solid seen: the whole bounding cylinder stands for the object
        occ = np.ones(len(pts), bool)
    c0 = np.array([0.0, 0.0, 0.5 * aspect / grid.height_margin])
    p = pts[occ] - c0
    try:
        p = p[ConvexHull(p).vertices]
    except QhullError:  # flat or degenerate: keep every point
        pass
    return c0, p


def copy_geometry(surface: np.ndarray, weight: np.ndarray, aspect: float, up: np.ndarray, grid: TiltGrid,
                  solid: tuple[np.ndarray, np.ndarray] | None = None) -> CopyGeometry:
    """Geometry of the copy of one prototype (surface, weight (R, A, H)) resting with ``up`` (3,) pointing up
    (``solid``: its :func:`solid_points` when already computed)."""
    R, A, H = surface.shape
    c0, p = solid if solid is not None else solid_points(surface, weight, aspect, grid)
    M = rot.tilt_matrix(up)
    q = p @ M.T
    zmin, zmax = q[:, 2].min(), q[:, 2].max()
    centre, radius = min_enclosing_circle(q[:, :2])
    # the cell centres sit up to half a cell inside the surface: grow by half a cell
    half = 0.5 * max(1.0 / R, aspect / H)
    height = max(zmax - zmin + half, 1e-3)
    radius = max(radius + 0.5 * half, 1e-3)
    base = np.array([centre[0], centre[1], zmin - 0.5 * half])
    return CopyGeometry(M, c0, base, grid.radial_margin * radius, grid.height_margin * height)


def volume_on_face(vol: np.ndarray, aspect: float, up: np.ndarray, grid: TiltGrid) -> np.ndarray:
    """A store-channel volume (6, R, A, H) (``ingest.volume.CHANNELS``) resampled as resting with its direction
    ``up`` (3,) pointing up, re-normalised by that pose's footprint and height (for pictures)."""
    shape = vol.shape[1:]
    g = copy_geometry(vol[0], np.minimum(vol[2], 1.0), aspect, up, grid)
    return apply_map(vol, *forward_map(g, shape, aspect), shape)


def forward_map(g: CopyGeometry, shape: tuple[int, int, int], aspect: float) -> tuple[np.ndarray, np.ndarray]:
    """Map from the copy's grid cells into the prototype's grid (sample the prototype there)."""
    q = _cell_points(*shape, g.rho_max, g.z_max)
    p = (q + g.base) @ g.M + g.c0  # M^T (q + b) + c0 for row points
    return _trilinear(p, shape, 1.0, aspect)


def inverse_map(g: CopyGeometry, shape: tuple[int, int, int], aspect: float) -> tuple[np.ndarray, np.ndarray]:
    """Map from the prototype's grid cells into the copy's grid (sample a member aligned in the copy there)."""
    p = _cell_points(*shape, 1.0, aspect)
    q = (p - g.c0) @ g.M.T - g.base
    return _trilinear(q, shape, g.rho_max, g.z_max)


# --- the bank ----------------------------------------------------------------------------------

class TiltBank:
    """Prototypes P (K, C, R, A, H), V (K, R, A, H) with aspects (K,), searched over tilts x yaw x scale.

    Same interface as :class:`posesearch.PoseBank` (``spectra``, ``match_spectra``, ``match``); its
    :class:`PoseMatch` carries ``tilt`` (n, K), indices into ``grid.dirs``.  With the identity grid it is a
    PoseBank (no resampling).
    """

    def __init__(self, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid):
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
        lvl0 = grid.level(0)
        Pc, Vc = self.copies(np.repeat(np.arange(self.K), len(lvl0)), np.tile(lvl0, self.K))
        self.T0 = len(lvl0)
        self.coarse = PoseBank(Pc, Vc, scales)
        self.dft = self.coarse.dft

    def geometry(self, k: int, t: int) -> CopyGeometry:
        key = (int(k), int(t))
        if key not in self._geom:
            if k not in self._solid:
                self._solid[k] = solid_points(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid)
            self._geom[key] = copy_geometry(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid.dirs[t], self.grid,
                                            self._solid[k])
        return self._geom[key]

    def copies(self, ks: np.ndarray, ts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tilted copies (M, C, R, A, H), (M, R, A, H) of prototypes ``ks`` at tilts ``ts`` (M,).

        Copies are kept for the bank's life (the finer levels ask for the same ones at several scales);
        new ones are resampled together: one sampling map over all their cells, one gather.
        """
        todo = sorted({(int(k), int(t)) for k, t in zip(ks, ts)} - set(self._copies))
        tilted = [(k, t) for k, t in todo if not self.grid.is_upright(t)]
        for k, t in todo:
            if self.grid.is_upright(t):
                self._copies[(k, t)] = (self.P[k], self.V[k])
        if tilted:
            M, RAH = len(tilted), int(np.prod(self.shape))
            pts = []
            for k, t in tilted:
                g = self.geometry(k, t)
                q = _cell_points(*self.shape, g.rho_max, g.z_max)
                # into prototype k's grid, in units of its rho_max; z scaled so every prototype's
                # height maps to the same index range (the sampler takes one aspect)
                p = (q + g.base) @ g.M + g.c0
                p[:, 2] /= self.aspect[k]
                pts.append(p)
            idx, wts = _trilinear(np.concatenate(pts), self.shape, 1.0, 1.0)  # (8, M RAH)
            idx = idx.reshape(8, M, RAH).transpose(1, 0, 2)
            wts = wts.reshape(8, M, RAH).transpose(1, 0, 2)
            kk = np.array([k for k, _ in tilted])
            for b0 in range(0, M, 64):  # blocks of copies bound the gather's temporaries
                sl = slice(b0, min(M, b0 + 64))
                m = sl.stop - sl.start
                Vk = self.V[kk[sl]].reshape(m, 1, RAH)
                stack = np.concatenate([Vk, Vk * self.P[kk[sl]].reshape(m, self.C, RAH)], axis=1)  # (m, 1 + C, RAH)
                g = stack[np.arange(m)[:, None, None, None], np.arange(1 + self.C)[None, :, None, None], idx[sl][:, None]]
                out = (g * wts[sl][:, None]).sum(axis=2)  # (m, 1 + C, RAH): sampled [w, w x]
                v = out[:, 0]
                # features are means: sample w x and divide, so unseen cells do not dilute the seen ones
                pc = np.where(v[:, None] > 1e-6, out[:, 1:] / np.maximum(v[:, None], 1e-6), 0.0)
                for j, key in enumerate(tilted[sl]):
                    self._copies[key] = (pc[j].reshape((self.C,) + self.shape).astype(np.float32),
                                         v[j].reshape(self.shape).astype(np.float32))
        Pc = np.stack([self._copies[(int(k), int(t))][0] for k, t in zip(ks, ts)]) if len(ks) else \
            np.zeros((0, self.C) + self.shape, np.float32)
        Vc = np.stack([self._copies[(int(k), int(t))][1] for k, t in zip(ks, ts)]) if len(ks) else \
            np.zeros((0,) + self.shape, np.float32)
        return Pc, Vc

    def copy_at(self, k: int, up: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Copy (C, R, A, H), (R, A, H) of prototype k resting with any direction ``up`` (3,) pointing up."""
        g = copy_geometry(self.P[k, 0], self.V[k], float(self.aspect[k]), np.asarray(up, np.float64), self.grid)
        return self._resample(k, forward_map(g, self.shape, float(self.aspect[k])))

    def _resample(self, k: int, fmap: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        idx, wts = fmap
        v = apply_map(self.V[k], idx, wts, self.shape)
        # features are means: sample w x and divide, so unseen cells do not dilute the seen ones
        wx = apply_map(self.V[k][None] * self.P[k], idx, wts, self.shape)
        return np.where(v > 1e-6, wx / np.maximum(v, 1e-6), 0.0).astype(np.float32), v

    def untilt(self, k: int, t: int, a: np.ndarray) -> np.ndarray:
        """Sums a (..., R, A, H) in the copy frame of (k, t) rotated back into prototype k's frame."""
        if self.grid.is_upright(t):
            return a
        idx, wts = inverse_map(self.geometry(k, t), self.shape, float(self.aspect[k]))
        return apply_map(a, idx, wts, self.shape)

    def _level_bank(self, k: int, si: int, dirs: np.ndarray) -> tuple[PoseBank, dict[int, int]]:
        """Bank of prototype k's copies at tilts ``dirs``, at the one scale ``scales[si]``, and each tilt's position."""
        dirs = np.asarray(sorted(int(t) for t in dirs), np.int64)
        bank = PoseBank(*self.copies(np.full(len(dirs), k), dirs), (self.scales[si],))
        return bank, {int(t): j for j, t in enumerate(dirs)}

    def spectra(self, x: np.ndarray, w: np.ndarray) -> torch.Tensor:
        return self.coarse.spectra(x, w)

    def match_spectra(self, o: torch.Tensor, min_overlap: float = 1e-3, return_all: bool = False,
                      scale_index: np.ndarray | None = None, window: int = 1) -> PoseMatch:
        """Best (tilt, yaw, scale) per (object, prototype) from object spectra o (2F, n, (C + 2) R H)."""
        n, K, T0 = o.shape[1], self.K, self.T0
        m = self.coarse.match_spectra(o, min_overlap, False, scale_index, window)
        D = m.D.reshape(n, K, T0)
        bt = np.argmin(D, axis=2)
        pick = lambda a: np.take_along_axis(a.reshape(n, K, T0), bt[..., None], axis=2)[..., 0]  # noqa: E731
        out = PoseMatch(pick(m.D), pick(m.yaw_deg), pick(m.scale), None, tilt=self.grid.level(0)[bt])
        if len(self.grid.nsides) > 1:
            self._refine(o, m, out, min_overlap, scale_index, window)
        return out

    def _refine(self, o: torch.Tensor, coarse: PoseMatch, out: PoseMatch, min_overlap: float,
                scale_index: np.ndarray | None, window: int) -> None:
        """Coarse-to-fine over the later levels from each object's ``refine_top`` best (prototype, coarse tilt)
        pairs (in place: a refined pose replaces the prototype's pose when its distance is lower).  Several
        starting pairs, not one per prototype: the best coarse tilt can be a neighbour basin's.  The finer
        levels search at each pair's best coarse scale only (size and tilt are nearly independent), so a
        level builds one copy per (prototype, scale, direction) its pairs need, for this chunk only."""
        n, K, T0 = o.shape[1], self.K, self.T0
        flat = np.where(np.isfinite(coarse.D), coarse.D, np.inf).reshape(n, K * T0)
        top = np.argsort(flat, axis=1, kind="stable")[:, :self.grid.refine_top]  # (n, m) of k T0 + t
        r = np.arange(n)[:, None]
        pk, pt = top // T0, self.grid.level(0)[top % T0]
        pd = flat[r, top]
        pyaw = coarse.yaw_deg.reshape(n, K * T0)[r, top]
        psc = coarse.scale.reshape(n, K * T0)[r, top]
        scale_pos = {float(v): i for i, v in enumerate(np.asarray(self.scales, np.float32))}
        for level in range(1, len(self.grid.nsides)):
            groups: dict[tuple[int, int, int], list[tuple[int, int]]] = {}
            for i, j in zip(*np.nonzero(np.isfinite(pd))):
                key = (int(pk[i, j]), scale_pos[float(psc[i, j])], int(pt[i, j]))
                groups.setdefault(key, []).append((i, j))
            cands = {key: self.grid.candidates(level, key[2]) for key in groups}
            need: dict[tuple[int, int], set[int]] = {}
            for (k, si, _), c in cands.items():
                need.setdefault((k, si), set()).update(int(t) for t in c)
            # one product per (prototype, scale): every object with a pair there against every direction
            # needed there, each pair then taking the best of its own candidates (few large products run
            # far faster than many small ones)
            for (k, si), dirs in sorted(need.items()):
                if not dirs:
                    continue
                bank, pos = self._level_bank(k, si, np.array(sorted(dirs)))
                entries = [(e, key[2]) for key, es in groups.items() if key[:2] == (k, si) for e in es]
                rows = np.array([e[0][0] for e in entries])
                cols = np.array([e[0][1] for e in entries])
                urows, inv = np.unique(rows, return_inverse=True)
                m = bank.match_spectra(o[:, torch.from_numpy(urows)], min_overlap)
                allowed = np.zeros((len(entries), len(pos)), bool)
                for e, (_, t) in enumerate(entries):
                    allowed[e, [pos[int(c)] for c in cands[(k, si, t)]]] = True
                De = np.where(allowed, m.D[inv], np.inf)
                j = np.argmin(De, axis=1)
                rr = np.arange(len(entries))
                better = De[rr, j] < pd[rows, cols]
                ri, ci = rows[better], cols[better]
                pd[ri, ci] = De[rr, j][better]
                pyaw[ri, ci] = m.yaw_deg[inv, j][better]
                dir_of = np.array(sorted(dirs), np.int64)
                pt[ri, ci] = dir_of[j[better]]
        for j in range(pk.shape[1]):
            i = np.flatnonzero(pd[:, j] < out.D[np.arange(n), pk[:, j]])
            k = pk[i, j]
            out.D[i, k], out.yaw_deg[i, k], out.scale[i, k], out.tilt[i, k] = pd[i, j], pyaw[i, j], psc[i, j], pt[i, j]

    def match(self, x: np.ndarray, w: np.ndarray, min_overlap: float = 1e-3, return_all: bool = False) -> PoseMatch:
        return self.match_spectra(self.spectra(x, w), min_overlap)


def make_bank(P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], grid: TiltGrid | None = None,
              aspect: np.ndarray | None = None):
    """A PoseBank (yaw-only grid or none) or a TiltBank; both give PoseMatch with ``tilt`` (n, K)."""
    if grid is None or grid.is_identity:
        return PoseBank(P, V, scales)
    if aspect is None:
        raise ValueError("a tilt search needs the prototypes' aspects (z_max / rho_max), got None")
    return TiltBank(P, V, aspect, scales, grid)


def tilt_pose_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, *, aspect: np.ndarray,
                        scales: Sequence[float] = (1.0,), grid: TiltGrid | None = None,
                        chunk_size: int = 1024, min_overlap: float = 1e-3) -> PoseMatch:
    """Pose-minimised distance of every object to every prototype over tilts x yaw x scale: PoseMatch (N, K)
    with ``tilt`` (indices into ``grid.dirs``).  P may be objects themselves (pairwise distances between
    objects); ``aspect`` (K,) are the prototypes' z_max / rho_max (:func:`grid_aspect`)."""
    X, W, P, V, scales = _prepare(X, W, P, V, scales)
    bank = make_bank(P, V, scales, grid, aspect)
    parts = [bank.match(X[i:i + chunk_size], W[i:i + chunk_size], min_overlap) for i in range(0, len(X), chunk_size)]
    K = P.shape[0]
    if not parts:
        z = np.zeros((0, K), np.float32)
        return PoseMatch(z, z, z, None, tilt=np.zeros((0, K), np.int64))
    cat = lambda name: np.concatenate([getattr(p, name) for p in parts])  # noqa: E731
    return PoseMatch(cat("D"), cat("yaw_deg"), cat("scale"), None, tilt=cat("tilt"))


def rotation_of(grid: TiltGrid, tilt: np.ndarray, yaw_deg: np.ndarray) -> np.ndarray:
    """Rotations (..., 3, 3) object frame <- prototype frame: Rz(yaw) @ tilt_matrix(dirs[tilt])."""
    return rot.tilt_yaw_to_matrix(grid.dirs[np.asarray(tilt)], yaw_deg)
