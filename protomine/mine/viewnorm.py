"""The reference normalised as a single view of it: a prototype's copy re-gridded about the part a camera sees.

A single view is lifted about its *visible* footprint: the smallest circle holding the points the camera sees
(``ingest.proposals.object_frame``), and the height of the highest of them.  A part hidden behind the object (a
tripod's leg behind its column, the far side of a funnel lying down) is left out of that circle, so the view's
grid is shifted toward the camera and shrunk against the grid of the whole object, which every prototype and its
tilted copies are normalised by (``mine.tilts``).  The two then disagree cell by cell even at the true pose:
on the seed-0 demo, single views of upright tripod stands fitted their own prototype at the true pose at
0.045-0.049 and an L bracket's copy at 0.018-0.021; of the 23 misnamed known views, 22 were out-scored at the true
pose (the true class at its true pose was farther than the winner), one was a search miss.

This module gives the reference the same normalisation (analysis by synthesis, with the camera known): for a
prototype resting on a face (up direction u in its frame) and seen from a camera direction c (in the copy's
frame), its solid cells (``tilts.solid_cells``) are rotated onto the face and projected
orthographically along c onto a pixel grid of ``pixel`` cells; a cell is visible when it lies within ``depth_tol``
cells of the nearest cell of its pixel (a z-buffer).  The copy's base centre and footprint radius are the smallest
enclosing circle of the visible cells (``min_enclosing_circle``), its height the highest visible cell above the
copy's lowest cell (the support plane), grown by half a cell as ``tilts.copy_geometries`` does, and the prototype is
resampled into that grid (``tilts._resample_copies``).  The camera direction in the copy's frame depends on the
yaw, so a copy is made for every ``yaw_step`` degrees of yaw and compared, at every scale, at the azimuth shifts
within ``yaw_window`` degrees of the yaw it was made for: ``posesearch``'s distance, its sums taken directly at those
shifts (:func:`shifted_distances`) rather than by the FFT of every copy over all shifts.  Faces searched per
prototype: the face the pose search found for the view, the canonical face and the prototype's recorded resting
faces with members (directions within ``SAME_FACE_DEG`` merged).

Cost (seed-0 demo: 160 views, 372 (view, prototype) pairs, 2-5 faces, about 29 distinct copies a pair): per copy
about 1.2 ms resampling, 1.2 ms scaling (5 scales), 0.4 ms z-buffer and circle and 0.4 ms sums on this machine.
Done once instead of per copy: the rotated cells per (prototype, face), one z-buffer for all yaws of a face (one
scatter, the splat as a max filter), copies of one face with the same geometry at several yaws (18%), the view's
factors per view; the windowed sums replace the FFT bank (spectra of every copy at every scale, 34 of the 67 s).
Label CPU on that demo 60.5 -> 52.0 s back to back (11.0 s off; same decisions, distances within 2e-5).  Measured
and not taken, accuracy / AUROC against 0.859 / 0.949: the found face only 0.820 / 0.954 (2.0x faster), found and
canonical 0.844 / 0.949, a copy every 60 degrees compared within 30 0.852 / 0.930, copies shared by the views of a
5-degree band of camera elevation (at fixed camera azimuths in the copy's frame) 0.852 / 0.934 (750 copy sets for
1097 (view, prototype, face) tasks: little to share).

Used by the label decision only (``[mine] view_normalise_top``, :meth:`label.matcher.Matcher.match` with the views'
camera directions): each view's ``top`` nearest prototypes (within ``within`` x its nearest distance) take the
lesser of their pose-searched distance and this one, and the nearest then names the class; the pose and the score
stay those of the pose search (the score's calibration judges the plain distance), unless ``[mine]
view_normalise_score``: then each shortlisted prototype's score is the higher of the pose search's and that of this
distance (:meth:`ViewNormaliser.distances`, read by ``label.matcher``).

A view that cuts its object off (the image border, a nearer object: ``ingest.truncation``) is gridded about what it
sees of the object, less than the camera would see of the whole: with ``[mine] view_normalise_cut`` its copies also
lose the cells the view could not see (:func:`cut_cells`: the copy placed in the view's object frame, its cells
projected with the view's intrinsics and pose), so that the copy's footprint and height are the cut view's.  A cut
view's shortlist takes ``cut_within`` instead of ``within`` (``[mine] view_normalise_cut_within``).
"""
from __future__ import annotations

import numpy as np
import torch

from .. import rotations as rot
from ..cores import one_blas_thread
from ..ingest.proposals import min_enclosing_circle
from ..ingest.truncation import ViewCut
from .posesearch import distance_of_sums, scale_prototypes
from .tilts import IDENTITY_DEG, CopyGeometry, TiltGrid, _resample_copies, solid_cells

SAME_FACE_DEG = 10.0     # resting directions this close are searched once
CUT_ITERATIONS = 4       # placements of a copy about the cells a cut view would see (cut_cells)
MIN_CUT_CELLS = 4        # a cut leaving fewer of a copy's visible cells is not applied


def _cross3(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``np.cross`` of two 3-vectors, its products and differences written out (the same float64 operations, so the
    same bits; ``np.cross`` spent 0.1 ms a call on its axis handling, 2.8 s of the seed-0 demo's label CPU)."""
    a0, a1, a2 = a.tolist()
    b0, b1, b2 = b.tolist()
    return np.array([a1 * b2 - a2 * b1, a2 * b0 - a0 * b2, a0 * b1 - a1 * b0])


def _projection(q: np.ndarray, camera: np.ndarray, pixel: float) -> tuple[np.ndarray, np.ndarray]:
    """Pixel indices (m, 2) int64 and depths (m,) of points q (m, 3) seen from direction ``camera`` (3,): an
    orthographic image plane across the line of sight, pixels of side ``pixel`` (:func:`visible_mask`)."""
    d = np.asarray(camera, np.float64)
    d = d / max(float(np.linalg.norm(d)), 1e-12)
    a = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = _cross3(d, a)
    e1 /= np.linalg.norm(e1)
    e2 = _cross3(d, e1)
    return np.floor(np.stack([q @ e1, q @ e2], 1) / pixel).astype(np.int64), q @ d


def visible_mask(q: np.ndarray, camera: np.ndarray, pixel: float, depth_tol: float, splat: int = 1) -> np.ndarray:
    """(m,) bool: points q (m, 3) seen from direction ``camera`` (3,) (orthographic z-buffer: per pixel of side
    ``pixel``, the points within ``depth_tol`` of the nearest point to the camera; each point also occludes the
    pixels within ``splat`` of its own, so the gaps between the sparse cell centres of a surface do not show what
    lies behind it)."""
    return visible_masks(q, np.asarray(camera, np.float64)[None], pixel, depth_tol, splat)[0]


def visible_masks(q: np.ndarray, cameras: np.ndarray, pixel: float, depth_tol: float, splat: int = 1) -> np.ndarray:
    """(Y, m) bool: :func:`visible_mask` of points q (m, 3) from each of the directions ``cameras`` (Y, 3), all
    images in one z-buffer: each point written once into its own pixel (the nearest depth per pixel), then
    every pixel takes the nearest of the pixels within ``splat`` of it (the same maxima as writing each point into
    all those pixels, with one scatter instead of (2 splat + 1)^2)."""
    cams = np.asarray(cameras, np.float64).reshape(-1, 3)
    Y, m = len(cams), len(q)
    if not m:
        return np.zeros((Y, 0), bool)
    proj = [_projection(q, c, pixel) for c in cams]
    ij = np.stack([p[0] for p in proj])                         # (Y, m, 2)
    depth = np.stack([p[1] for p in proj])                      # (Y, m)
    ij -= ij.min(axis=1, keepdims=True) - splat
    n0, n1 = (ij.max(axis=(0, 1)) + splat + 1).tolist()
    flat = (np.arange(Y)[:, None] * n0 + ij[..., 0]) * n1 + ij[..., 1]
    own = np.full(Y * n0 * n1, -np.inf)
    np.maximum.at(own, flat.reshape(-1), depth.reshape(-1))
    own = own.reshape(Y, n0, n1)
    near = own.copy()
    for di in range(-splat, splat + 1):
        for dj in range(-splat, splat + 1):
            if di or dj:   # near[i, j] = max over |di|, |dj| <= splat of own[i - di, j - dj]
                np.maximum(near[:, max(di, 0):n0 + min(di, 0), max(dj, 0):n1 + min(dj, 0)],
                           own[:, max(-di, 0):n0 + min(-di, 0), max(-dj, 0):n1 + min(-dj, 0)],
                           out=near[:, max(di, 0):n0 + min(di, 0), max(dj, 0):n1 + min(dj, 0)])
    return depth >= near.reshape(-1)[flat] - depth_tol


def visible_geometry(surface: np.ndarray, weight: np.ndarray, aspect: float, up: np.ndarray, camera: np.ndarray,
                     grid: TiltGrid, *, pixel: float = 1.0, depth_tol: float = 1.0,
                     solid: tuple[np.ndarray, np.ndarray] | None = None) -> CopyGeometry:
    """Geometry of the copy of a prototype (surface, weight (R, A, H), ``aspect``) resting with ``up`` (3,) pointing
    up, gridded about the footprint and height of its cells visible from ``camera`` (3,, the copy's frame);
    ``pixel`` and ``depth_tol`` in cells (module docstring); ``solid``: :func:`solid_cells` when known."""
    solid = solid if solid is not None else solid_cells(surface, weight, aspect, grid)
    rest = resting_cells(surface.shape, aspect, up, solid)
    return visible_geometries(rest, np.asarray(camera, np.float64)[None], grid, pixel=pixel, depth_tol=depth_tol)[0]


def resting_cells(shape: tuple[int, int, int], aspect: float, up: np.ndarray, solid: tuple[np.ndarray, np.ndarray]
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
    """The solid cells ``solid`` (:func:`solid_cells`) of a prototype (grid ``shape`` (R, A, H), ``aspect``) resting
    with ``up`` (3,) pointing up: (M (3, 3), c0 (3,), the rotated cells q (m, 3), the lowest cell's height, half a
    cell); the part of :func:`visible_geometry` that does not depend on the camera."""
    R, A, H = shape
    c0, p = solid
    u = np.asarray(up, np.float64)
    u = u / max(float(np.linalg.norm(u)), 1e-12)
    M = np.eye(3) if u[2] >= np.cos(np.deg2rad(IDENTITY_DEG)) else rot.tilt_matrix(u)
    q = p @ M.T
    return M, c0, q, float(q[:, 2].min()), 0.5 * max(1.0 / R, aspect / H)


def visible_geometries(rest: tuple[np.ndarray, np.ndarray, np.ndarray, float, float], cameras: np.ndarray,
                       grid: TiltGrid, *, pixel: float = 1.0, depth_tol: float = 1.0, cut: ViewCut | None = None,
                       yaws: np.ndarray | None = None) -> list[CopyGeometry]:
    """:func:`visible_geometry` of one resting prototype (:func:`resting_cells`) seen from each of ``cameras``
    (Y, 3): one z-buffer for all (:func:`visible_masks`), one enclosing circle each.  With ``cut`` (the view's
    :class:`ingest.truncation.ViewCut`) and ``yaws`` (Y,) (degrees: camera y is the view's camera seen from the copy
    turned by yaws[y]) the visible cells also lose those the view could not see (:func:`cut_cells`)."""
    M, c0, q, lo, half = rest
    out = []
    for y, seen in enumerate(visible_masks(q, cameras, pixel * 2 * half, depth_tol * 2 * half)):
        qv = q[seen]
        if cut is not None:
            qv = qv[cut_cells(qv, lo, half, float(yaws[y]), cut)]
        centre, radius = min_enclosing_circle(qv[:, :2])
        height = max(float(qv[:, 2].max()) - lo + half, 1e-3)
        radius = max(radius + 0.5 * half, 1e-3)
        base = np.array([centre[0], centre[1], lo - 0.5 * half])
        out.append(CopyGeometry(M, c0, base, grid.radial_margin * radius, grid.height_margin * height))
    return out


def cut_cells(qv: np.ndarray, lo: float, half: float, yaw: float, cut: ViewCut) -> np.ndarray:
    """(m,) bool: which of a copy's visible cells qv (m, 3) (its frame, prototype units; lowest cell ``lo``, half a
    cell ``half``) the cut view ``cut`` would see, the copy turned by ``yaw`` degrees into the view's object frame.

    The copy is placed as the view's object would be if it were this copy (analysis by synthesis): in metres, at the
    least scale the view allows (the copy's visible radius and height, grown by half a cell as
    :func:`visible_geometries` grows them, scaled to the view's ``cut.radius`` and ``cut.height``: a cut only shrinks
    a view, so the larger of the two scales), its base on the support plane, and its footprint's centre on the view's
    origin.  But the view's origin is the centre of what the view *sees* of its footprint (the cut part left out),
    so the centre placed there is that of the cells left after the cut: starting from every visible cell, the copy
    is placed, the cells :meth:`ViewCut.hidden` hides dropped, and the copy placed again about the remaining cells'
    enclosing circle and height, until the kept cells no longer change (at most ``CUT_ITERATIONS`` times).  A cut
    that would leave fewer than ``MIN_CUT_CELLS`` cells keeps the cells of the step before."""
    keep = np.ones(len(qv), bool)
    if len(qv) < MIN_CUT_CELLS:
        return keep
    R = rot.yaw_matrix(float(yaw))
    base = lo - 0.5 * half
    _, r0 = min_enclosing_circle(qv[:, :2])
    s = max(cut.radius / max(r0 + 0.5 * half, 1e-6), cut.height / max(float(qv[:, 2].max()) - lo + half, 1e-6))
    for _ in range(CUT_ITERATIONS):
        centre, _ = min_enclosing_circle(qv[keep][:, :2])
        pts = (qv - np.array([centre[0], centre[1], base])) @ (s * R).T
        new = ~cut.hidden(pts)
        if new.sum() < MIN_CUT_CELLS or np.array_equal(new, keep):
            break
        keep = new
    return keep


def window_shifts(A: int, made: np.ndarray, window: float) -> np.ndarray:
    """(Y, A) bool: for each yaw ``made`` (Y,) (degrees) the azimuth shifts of an A-bin grid within ``window``
    degrees of it."""
    yaws = np.arange(A) * 360.0 / A
    return np.abs((yaws[None, :] - np.asarray(made, np.float64)[:, None] + 180.0) % 360.0 - 180.0) <= window + 1e-9


def object_factors(x: np.ndarray, w: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    """The factors of one view x (C, R, A, H), w (R, A, H) for :func:`shifted_distances`, at every azimuth shift
    s: numerator [w |x|^2, w, w x_1 .. w x_C] (A, (C + 2) R A H) and denominator w (A, R A H), each rolled by
    -s (row s: the factor at azimuth j + s, met by the posed prototype's j)."""
    xt = torch.from_numpy(np.ascontiguousarray(x, np.float32))
    wt = torch.from_numpy(np.ascontiguousarray(w, np.float32))
    C, R, A, H = xt.shape
    num = torch.cat([(wt * (xt * xt).sum(0))[None], wt[None], wt[None] * xt], 0)   # (C + 2, R, A, H)
    idx = (torch.arange(A)[:, None] + torch.arange(A)[None, :]) % A                 # (shift, j) -> j + s
    return (num[:, :, idx].permute(2, 0, 1, 3, 4).reshape(A, -1).contiguous(),
            wt[:, idx].permute(1, 0, 2, 3).reshape(A, -1).contiguous())


def shifted_distances(obj: tuple[torch.Tensor, torch.Tensor], pc: np.ndarray, vc: np.ndarray,
                      scales: tuple[float, ...], min_overlap: float = 1e-3) -> np.ndarray:
    """Distances (n, S, A) of one view (:func:`object_factors`) to copies pc (n, C, R, A, H), vc (n, R, A, H) at
    every scale and azimuth shift: the distance of ``posesearch`` (module docstring there: D = sum w v |x - mu|^2 /
    (C sum w v + eps), the posed prototype scaled by ``scale_prototypes`` and rolled by the shift; inf where
    C sum w v <= C ``min_overlap``), its sums taken directly, two matrix products of the copies' factors with the
    view's rolled ones, instead of through the spectra of ``PoseBank`` (which would transform every copy)."""
    n, C = pc.shape[:2]
    S, A = len(scales), pc.shape[3]
    fnum, fden = copy_factors(pc, vc, scales)
    return distance_of_sums(torch.mm(fnum.reshape(n * S, -1), obj[0].T), torch.mm(fden.reshape(n * S, -1), obj[1].T),
                            C * min_overlap).reshape(n, S, A).numpy()


def copy_factors(pc: np.ndarray, vc: np.ndarray, scales: tuple[float, ...]) -> tuple[torch.Tensor, torch.Tensor]:
    """The factors of copies pc (n, C, R, A, H), vc (n, R, A, H) scaled by every scale (``scale_prototypes``), met
    by the view's :func:`object_factors`: numerator [v, v |mu|^2, -2 v mu_1 .. -2 v mu_C] (n, S, (C + 2) R A H)
    and denominator C v (n, S, R A H)."""
    n, C = pc.shape[:2]
    Ps, Vs = scale_prototypes(pc, vc, scales)                       # (n, S, C, R, A, H), (n, S, R, A, H)
    p, v = torch.from_numpy(Ps), torch.from_numpy(Vs)
    vmu = v[:, :, None] * p
    fnum = torch.cat([v[:, :, None], (vmu * p).sum(2)[:, :, None], -2.0 * vmu], 2).reshape(n, len(scales), -1)
    return fnum, (C * v).reshape(n, len(scales), -1)




def _resting_ups(face_up: np.ndarray, face_count: np.ndarray, face_symmetry: np.ndarray) -> np.ndarray:
    """The prototype's resting up directions (F', 3), not normalised: +z, then its recorded faces with members
    (face_up (F, 3), face_count (F,), face_symmetry (F,), -1 = padding)."""
    fu = np.asarray(face_up, np.float64).reshape(-1, 3)
    have = (np.asarray(face_symmetry) >= 0) & (np.asarray(face_count) > 0)
    return np.concatenate([[[0.0, 0.0, 1.0]], fu[have]])


def face_candidates(found: np.ndarray, face_up: np.ndarray, face_count: np.ndarray, face_symmetry: np.ndarray
                    ) -> list[np.ndarray]:
    """Up directions searched for one (view, prototype): the one the pose search found, +z, and the prototype's
    recorded faces with members, those within ``SAME_FACE_DEG`` of an earlier one left out."""
    cos_same = np.cos(np.deg2rad(SAME_FACE_DEG))
    keep: list[np.ndarray] = []
    for u in [np.asarray(found, np.float64), *_resting_ups(face_up, face_count, face_symmetry)]:
        n = float(np.linalg.norm(u))
        if n < 1e-9:
            continue
        u = u / n
        if all(float(u @ v) < cos_same for v in keep):
            keep.append(u)
    return keep


def rest_mask(ups: list[np.ndarray], face_up: np.ndarray, face_count: np.ndarray, face_symmetry: np.ndarray
              ) -> np.ndarray:
    """(len(ups),) bool: which of the up directions ``ups`` (:func:`face_candidates`) lie within ``SAME_FACE_DEG`` of a
    resting face of the prototype, +z or a recorded face with members (face_up (F, 3), face_count (F,),
    face_symmetry (F,), -1 = padding): the pose search's found direction, first in ``ups``, may be a tilt of the grid
    no member rests on."""
    faces = _resting_ups(face_up, face_count, face_symmetry)
    faces = faces / np.maximum(np.linalg.norm(faces, axis=1, keepdims=True), 1e-12)
    cos_same = np.cos(np.deg2rad(SAME_FACE_DEG))
    return np.array([bool(np.any(faces @ (np.asarray(u, np.float64) / max(float(np.linalg.norm(u)), 1e-12)) >= cos_same))
                     for u in ups], bool).reshape(-1)


def _least(d: np.ndarray) -> float:
    """The least of distances d (n,), inf when there are none."""
    return float(d.min()) if len(d) else np.inf


class ViewNormaliser:
    """The distances of single views to prototypes P (K, C, R, A, H), V (K, R, A, H) (grid aspects (K,)) normalised as
    views from their cameras (module docstring); ``faces`` = (face_up (K, F, 3), face_count (K, F), face_symmetry
    (K, F)) of the library; ``max_faces``: only the first that many of :func:`face_candidates` (0 = all; fewer lost
    accuracy, module docstring); ``cut_within``: ``within`` for the views given a cut (:meth:`distances`; None: the
    same ``within``)."""

    def __init__(self, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid,
                 faces: tuple[np.ndarray, np.ndarray, np.ndarray], *, top: int = 4, within: float = 1.5,
                 yaw_step: float = 30.0, yaw_window: float = 15.0, pixel: float = 1.0, depth_tol: float = 1.0,
                 max_faces: int = 0, cut_within: float | None = None, cut_rest: bool = False):
        self.P, self.V = np.asarray(P, np.float32), np.asarray(V, np.float32)
        self.aspect = np.asarray(aspect, np.float64)
        self.scales, self.grid, self.faces = tuple(scales), grid, faces
        self.top, self.within = int(top), float(within)
        self.yaw_step, self.yaw_window, self.pixel, self.depth_tol = yaw_step, yaw_window, pixel, depth_tol
        self.max_faces = int(max_faces)
        self.cut_within = self.within if cut_within is None else float(cut_within)   # a cut view's shortlist
        self.cut_rest = bool(cut_rest)   # a cut view's deciding distance: copies on resting faces only (``rest_mask``)
        self._solid: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._rest_cache: dict[tuple, tuple] = {}

    def _rest(self, k: int, up: np.ndarray) -> tuple:
        """:func:`resting_cells` of prototype k on ``up`` (kept: the pose search's faces repeat across views)."""
        key = (k, np.asarray(up, np.float64).tobytes())
        if key not in self._rest_cache:
            if k not in self._solid:
                self._solid[k] = solid_cells(self.P[k, 0], self.V[k], float(self.aspect[k]), self.grid)
            self._rest_cache[key] = resting_cells(self.P.shape[2:], float(self.aspect[k]), up, self._solid[k])
        return self._rest_cache[key]

    def distance(self, x: np.ndarray, w: np.ndarray, k: int, ups: list[np.ndarray], camera: np.ndarray,
                 obj: tuple[torch.Tensor, torch.Tensor] | None = None, cut: ViewCut | None = None) -> float:
        """The least of :meth:`face_distances` (inf when ``ups`` is empty)."""
        return _least(self.face_distances(x, w, k, ups, camera, obj, cut))

    def face_distances(self, x: np.ndarray, w: np.ndarray, k: int, ups: list[np.ndarray], camera: np.ndarray,
                       obj: tuple[torch.Tensor, torch.Tensor] | None = None, cut: ViewCut | None = None) -> np.ndarray:
        """Least distances (len(ups),) of one view x (1, C, R, A, H), w (1, R, A, H) (camera direction ``camera`` (3,) in
        its object frame) to prototype k's copies resting on each of ``ups``, each gridded as seen from the camera at every
        ``yaw_step`` degrees of yaw, the yaw kept within ``yaw_window`` of it (``obj``: the view's
        :func:`object_factors` when known).  Copies of one face whose geometry is the same for several yaws (the
        same visible circle and height) are resampled and compared once, at all those yaws' shifts.  ``cut``: the
        view's :class:`ingest.truncation.ViewCut` (``[mine] view_normalise_cut``; None: the copies keep every cell the
        camera sees)."""
        k = int(k)
        y0 = np.arange(0.0, 360.0, self.yaw_step)
        cams = rot.yaw_matrix(-y0) @ np.asarray(camera, np.float64)   # (Y, 3): the camera in the copy's frame
        ok = window_shifts(x.shape[3], y0, self.yaw_window)           # (Y, A)
        gs: list[CopyGeometry] = []
        shifts: list[np.ndarray] = []
        face: list[int] = []                                          # the index in ``ups`` of each copy
        for f, u in enumerate(ups):
            seen: dict[bytes, int] = {}
            for g, row in zip(visible_geometries(self._rest(k, u), cams, self.grid, pixel=self.pixel,
                                                 depth_tol=self.depth_tol, cut=cut, yaws=y0), ok):
                key = np.concatenate([g.base, [g.rho_max, g.z_max]]).tobytes()
                if key in seen:
                    shifts[seen[key]] = shifts[seen[key]] | row
                else:
                    seen[key] = len(gs)
                    gs.append(g)
                    shifts.append(row)
                    face.append(f)
        best = np.full(len(ups), np.inf)
        n = len(gs)
        if not n:
            return best
        pc, vc = _resample_copies(self.P[k][None], self.V[k][None], gs, np.full(n, float(self.aspect[k])),
                                  index=np.zeros(n, np.int64))
        obj = obj if obj is not None else object_factors(x[0], w[0])
        fnum, fden = copy_factors(pc, vc, self.scales)                # (n, S, L), (n, S, R A H)
        for m, row in enumerate(shifts):                              # each copy at its own shifts only
            sh = torch.from_numpy(np.flatnonzero(row))
            d = distance_of_sums(torch.mm(obj[0].index_select(0, sh), fnum[m].T),
                                 torch.mm(obj[1].index_select(0, sh), fden[m].T), x.shape[1] * 1e-3)
            best[face[m]] = min(best[face[m]], float(d.min()))
        return best

    def distances(self, X: np.ndarray, W: np.ndarray, D: np.ndarray, up: np.ndarray, cameras: np.ndarray,
                  cuts: list[ViewCut | None] | None = None, rest: np.ndarray | None = None) -> np.ndarray:
        """View-normalised distances (n, K) of views X (n, C, R, A, H), W (n, R, A, H) to each view's ``top`` nearest
        prototypes by D (n, K) (within ``within`` x its nearest), NaN for every other pair; ``up`` (n, K, 3) the faces
        the pose search found, ``cameras`` (n, 3) the camera directions in the views' object frames (a row of zeros
        or NaN: none, the row all NaN); ``cuts`` (n,): each view's :class:`ingest.truncation.ViewCut` or None (None:
        none).  ``rest`` (n, K), filled in place when given: the same distances, but for a view given a cut, with
        ``cut_rest`` (``[mine] view_normalise_cut_rest``), the least over the copies on the prototype's resting faces
        (:func:`rest_mask`; not the pose search's found direction when it is none of them)."""
        out = np.full(np.shape(D), np.nan)
        with one_blas_thread():  # many small numpy products (``tilts._forward_xyz``, the projections): no BLAS pool
            self._fill(out, X, W, D, up, cameras, cuts if cuts is not None else [None] * len(D), rest)
        return out

    def listed(self, d: np.ndarray, cut: bool, cut_within: float | None = None) -> np.ndarray:
        """The shortlist of one view's distances d (K,): its ``top`` nearest prototypes within ``within`` (a cut view:
        ``cut_within``, or the argument when given) x its nearest, nearest first (none when no distance is finite)."""
        Df = np.where(np.isfinite(d), d, np.inf)
        order = np.argsort(Df, kind="stable")[:self.top]
        if not len(order) or not np.isfinite(Df[order[0]]):
            return order[:0]
        f = (self.cut_within if cut_within is None else float(cut_within)) if cut else self.within
        return order[Df[order] <= f * Df[order[0]]]

    def shortlist_mask(self, D: np.ndarray, cuts: list | None, cut_within: float | None = None) -> np.ndarray:
        """(n, K) True at each view's :meth:`listed` prototypes (``cuts`` (n,): a view's cut or None)."""
        mask = np.zeros(np.shape(D), bool)
        for i in range(len(D)):
            mask[i, self.listed(D[i], cuts is not None and cuts[i] is not None, cut_within)] = True
        return mask

    def _fill(self, out: np.ndarray, X: np.ndarray, W: np.ndarray, D: np.ndarray, up: np.ndarray,
              cameras: np.ndarray, cuts: list[ViewCut | None], rest: np.ndarray | None = None) -> None:
        """:meth:`distances` into ``out`` (n, K) (and ``rest`` (n, K) when given)."""
        face_up, face_count, face_symmetry = self.faces
        for i in range(len(D)):
            cam = np.asarray(cameras[i], np.float64)
            if not np.all(np.isfinite(cam)) or np.linalg.norm(cam) < 1e-9:
                continue
            listed = self.listed(D[i], cuts[i] is not None)
            if not len(listed):
                continue
            obj = object_factors(X[i], W[i])
            for k in listed:
                ups = face_candidates(up[i, k], face_up[k], face_count[k], face_symmetry[k])
                ups = ups[:self.max_faces] if self.max_faces > 0 else ups
                per = self.face_distances(X[i:i + 1], W[i:i + 1], int(k), ups, cam, obj, cuts[i])
                out[i, k] = _least(per)
                if rest is not None:
                    rest[i, k] = (_least(per[rest_mask(ups, face_up[k], face_count[k], face_symmetry[k])])
                                  if self.cut_rest and cuts[i] is not None else out[i, k])
