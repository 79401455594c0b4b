"""The single-view residual the score judges: squared, or tolerant of a one-cell slip of the surface.

A single view of a known object misses its prototype most along its own silhouette and rims: depth noise that
grows with range, disparity steps, readings mixed across a depth edge and a footprint estimated from a partial
view all move where the view puts a surface or stops carving free space by about one cell.  A never-seen
object differs by whole parts (a handle where the prototype has none), many cells away from any prototype
cell like it.  The tolerant residual keeps the second and forgives the first: each cell of the aligned view is
compared with the best matching of the prototype's cells at that cell and its six face neighbours,

    e_tol(c) = min over c' in {c} u N6(c) of  mean_channels (x_c - mu_c')^2

(azimuth wraps about the axis, radius and height stop at the grid's edges), a discrete form of comparing
shapes up to a tolerance band (the idea of a one-sided Hausdorff / chamfer comparison with a dead zone of one
cell, applied to every channel).  ``[mine] tolerant_residual`` switches it on; the leave-one-out calibration
of the single-view score (``pipeline.single_view_calibration``) and the matcher then both judge

    D_tol = sum w v lambda e_tol / sum w v lambda

at the pose the FFT search found with the plain distance (lambda the per-cell reliability of
``mine.reliability`` on the canonical face, 1 on other resting faces), on every resting face: a view on
another face is compared with the prototype's copy resting on that face.  The pose search and the decision
(nearest prototype by the plain distance) do not change.

The ring beyond the footprint.  The grid reaches ``radial_margin`` x the footprint radius, so its outer radial
bins (those starting at or beyond the footprint radius, :func:`footprint_rings`) are empty space for *every*
object by construction: scale normalisation puts any object's footprint inside them.  They tell a known
object from a never-seen one only through how far its silhouette and the free space beside it were read
right, which is what sensors get wrong (shadows, mixed edge readings, range noise, a neighbour's rim).  With
``[mine] score_margin_ring`` below 1 the single-view score gives their cells that weight (0: left out), in the
calibration and in the matcher alike, on every resting face (a copy on another face has the same ring in its
own grid).

The surface mass.  A never-seen object that a prototype fits by the residual can still hold far less (or more)
surface in the cells the view saw than the prototype expects there: a thin blade against a bracket's upright leg,
the blurred prototype charging little for surface it holds at a fraction.  A sensor moves surface by a cell or
drops a few readings; it leaves the total about where it was.  With ``[mine] score_surface_mass`` = a > 0 the
single-view score judges

    D_mass = D exp(a |ln((sum w v x_surface + e) / (sum w v mu_surface + e))|)        (e = 1e-3)

(w the aligned view's observation weights, v the prototype's, no reliability or ring weights: the mass the view
saw against the mass the prototype puts there), in the calibration and in the matcher alike (``reliability.
reliable_distances``), on the canonical face only, so the calibrated (mu, sigma) and the cut see it.  A match on
another face keeps its distance: against the resampled tilted copies the factor cost the default demo's other-face
views (AUROC 0.795 -> 0.702, seed 0, a = 0.5).

Shapes: aligned views x (n, C, R, A, H), prototypes p (n or 1, C, R, A, H); residuals (n, R, A, H).
"""
from __future__ import annotations

import numpy as np

__all__ = ["NEIGHBOURS", "shift_cells", "tolerant_residuals", "squared_residuals", "residuals", "weighted_mean",
           "footprint_rings", "ring_weights", "pair_distances", "tilted_distances", "surface_mass_ratio",
           "mass_factor", "score_rings", "score_mass"]

NEIGHBOURS = ((0, 0, 0), (1, 0, 0), (-1, 0, 0), (0, 1, 0), (0, -1, 0), (0, 0, 1), (0, 0, -1))


def shift_cells(p: np.ndarray, dr: int, da: int, dh: int) -> np.ndarray:
    """p (..., R, A, H) with cell (i, j, k) holding p's cell (i - dr, j - da, k - dh): azimuth wraps about the
    axis, radius and height repeat their edge cells."""
    q = np.roll(p, da, axis=-2) if da else p
    if dr:
        q = q[..., np.clip(np.arange(p.shape[-3]) - dr, 0, p.shape[-3] - 1), :, :]
    if dh:
        q = q[..., np.clip(np.arange(p.shape[-1]) - dh, 0, p.shape[-1] - 1)]
    return q


def squared_residuals(x: np.ndarray, p: np.ndarray) -> np.ndarray:
    """mean over channels of (x - p)^2: (n, R, A, H)."""
    return ((np.asarray(x, np.float64) - np.asarray(p, np.float64)) ** 2).mean(axis=1)


def tolerant_residuals(x: np.ndarray, p: np.ndarray) -> np.ndarray:
    """The tolerant residual e_tol (n, R, A, H) of aligned views x against prototypes p (module docstring)."""
    x, p = np.asarray(x, np.float64), np.asarray(p, np.float64)
    out = None
    for o in NEIGHBOURS:
        e = ((x - shift_cells(p, *o)) ** 2).mean(axis=1)
        out = e if out is None else np.minimum(out, e)
    return out


def residuals(x: np.ndarray, p: np.ndarray, tolerant: bool) -> np.ndarray:
    """Per-cell residuals (n, R, A, H): tolerant or squared."""
    return tolerant_residuals(x, p) if tolerant else squared_residuals(x, p)


def footprint_rings(radial_bins: int, radial_margin: float) -> int:
    """Number of radial bins that start inside the footprint radius: bin i covers rho / rho_max in [i/R, (i+1)/R)
    with rho_max = radial_margin x footprint radius, so it starts inside when i / R x radial_margin < 1."""
    return min(int(radial_bins), int(np.ceil(radial_bins / max(float(radial_margin), 1.0) - 1e-9)))


def ring_weights(omega: np.ndarray, rings: int | tuple[int, float] | None) -> np.ndarray:
    """omega (..., R, A, H) with the radial bins from ``rings`` on weighted by 0, or from ``rings[0]`` on by
    ``rings[1]`` (None: unchanged)."""
    first, weight = (rings, 0.0) if isinstance(rings, (int, np.integer)) else (rings if rings is not None else (None, 1.0))
    if first is None or first >= omega.shape[-3] or weight == 1.0:
        return omega
    out = np.array(omega, np.float64, copy=True)
    out[..., first:, :, :] *= weight
    return out


def weighted_mean(e: np.ndarray, omega: np.ndarray, min_overlap: float = 1e-3) -> np.ndarray:
    """(n,) sum omega e / sum omega over cells of e, omega (n, R, A, H); inf where sum omega <= min_overlap."""
    num, den = (omega * e).sum(axis=(1, 2, 3)), omega.sum(axis=(1, 2, 3))
    return np.where(den > min_overlap, num / np.maximum(den, 1e-12), np.inf)


MASS_EPS = 1e-3         # added to both surface masses (cells x weight; a view's is 50-200 on the demo's grid)


def surface_mass_ratio(xa: np.ndarray, wa: np.ndarray, p: np.ndarray, v: np.ndarray) -> np.ndarray:
    """(n,) ln of the aligned views' surface mass over the prototype's in the cells they saw: xa (n, C, R, A, H)
    (channel 0 = surface), wa (n, R, A, H), p (n or 1, C, R, A, H), v (n or 1, R, A, H) (module docstring)."""
    om = np.asarray(wa, np.float64) * np.asarray(v, np.float64)
    mv = (om * np.asarray(xa, np.float64)[:, 0]).sum(axis=(1, 2, 3))
    mp = (om * np.asarray(p, np.float64)[:, 0]).sum(axis=(1, 2, 3))
    return np.log(mv + MASS_EPS) - np.log(mp + MASS_EPS)


def mass_factor(xa: np.ndarray, wa: np.ndarray, p: np.ndarray, v: np.ndarray, mass: float) -> np.ndarray | float:
    """exp(mass |surface_mass_ratio|) (n,), or 1.0 when ``mass`` is 0 (``[mine] score_surface_mass``)."""
    return 1.0 if mass == 0.0 else np.exp(mass * np.abs(surface_mass_ratio(xa, wa, p, v)))


def pair_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, yaw_deg: np.ndarray, scale: np.ndarray,
                   *, tolerant: bool, rings: int | tuple[int, float] | None = None, min_overlap: float = 1e-3) -> np.ndarray:
    """(n,) distances of views X (n, C, R, A, H), W (n, R, A, H) each against its own prototype (copy) P (n, C, R,
    A, H), V (n, R, A, H) at the pose yaw_deg, scale (n,) (object ~= prototype rolled by yaw and scaled), with no
    reliability (lambda = 1): a view matched on another resting face against the copy resting on it.  ``rings``:
    the first radial bin left out, or (first bin, weight) (None: all counted; see :func:`ring_weights`)."""
    from .engine import align_to_prototype
    n = len(X)
    if n == 0:
        return np.zeros(0)
    xa, wa = align_to_prototype(np.asarray(X, np.float32), np.asarray(W, np.float32), np.asarray(yaw_deg, np.float64),
                                np.asarray(scale, np.float64))
    omega = ring_weights(wa.astype(np.float64) * np.asarray(V, np.float64), rings)
    return weighted_mean(residuals(xa, P, tolerant), omega, min_overlap)


def tilted_distances(bank, X: np.ndarray, W: np.ndarray, up: np.ndarray, yaw_deg: np.ndarray, scale: np.ndarray,
                     pairs: np.ndarray, *, tolerant: bool, rings: int | tuple[int, float] | None = None) -> np.ndarray:
    """(n, K) distances of views X (n, C, R, A, H), W (n, R, A, H) matched on another resting face: for every
    (view, prototype) in ``pairs`` (n, K) bool, against prototype k's copy resting with ``up`` (n, K, 3) up
    (``tilts.TiltBank.copies_at``, one copy per distinct direction) at the pose yaw_deg, scale (n, K); inf
    elsewhere."""
    out = np.full(pairs.shape, np.inf)
    for k in np.flatnonzero(pairs.any(axis=0)):
        rows = np.flatnonzero(pairs[:, k])
        dirs, inv = np.unique(np.round(np.asarray(up[rows, k], np.float64), 9), axis=0, return_inverse=True)
        Pc, Vc = bank.copies_at(int(k), dirs)
        inv = np.asarray(inv).reshape(-1)
        out[rows, k] = pair_distances(X[rows], W[rows], Pc[inv], Vc[inv], yaw_deg[rows, k], scale[rows, k],
                                      tolerant=tolerant, rings=rings)
    return out


def score_rings(cfg: dict, radial_bins: int) -> tuple[int, float] | None:
    """The single-view score's ring beyond the footprint: None (counted like the rest) when ``[mine]
    score_margin_ring`` is 1, else (its first radial bin, :func:`footprint_rings`; its weight)."""
    weight = float(cfg["mine"].get("score_margin_ring", 1.0))
    first = footprint_rings(radial_bins, float(cfg["volume"]["radial_margin"]))
    return None if weight == 1.0 or first >= radial_bins else (first, weight)


def score_mass(cfg: dict) -> float:
    """The single-view score's surface-mass weight, ``[mine] score_surface_mass`` (0 = off, and for a library mined
    before the key)."""
    return float(cfg["mine"].get("score_surface_mass", 0.0))
