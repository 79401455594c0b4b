"""Depth readings that cannot be trusted as surface or free space: flying pixels at depth edges.

Depth sensors average the near and the far surface where a depth edge crosses a pixel (time of flight) or a
matching window (structured light, active stereo): the reading lies between the two surfaces, where there
is nothing ("flying pixels"; dropping readings that lie between a nearer and a farther neighbour is common
practice).  Such a reading is neither a surface point nor evidence that the space in front of it is empty,
so object proposals never take it (``proposals``) and lifting never carves through it (``volume``).

Two tests, either flags a reading:

- close: in the 3x3 square, a neighbour nearer and one farther by more than the tolerance (FLYING_TOL_M or
  FLYING_TOL_REL x depth).  A true edge pixel sits at one of the two depths and is kept.
- wide (``WIDE_WINDOW``, 0 = off): structured-light and active-stereo sensors match windows several pixels
  wide, so their mixed readings fill a ragged band along every depth edge, with dropouts and shadows in it:
  there the 3x3 square often holds other mixed readings or no reading on one side, and the close test misses
  them.  In the wider square a reading is flagged when it has a jump beyond the tolerance on both sides and
  fewer than ``WIDE_SUPPORT_BOTH`` neighbours within ``SUPPORT_REL`` x the tolerance of its own depth, or a
  jump on one side only, fewer than ``WIDE_SUPPORT_ONE`` such neighbours and at least ``WIDE_MISSING``
  neighbours without a reading (the band shows itself by its dropouts); either way only when none of its 8
  adjacent neighbours supports it.  A surface, even one seen at a grazing angle, continues through its pixel
  along the direction in which its depth does not change, so some of its neighbours lie at about its depth
  (support), which a mixed reading, drawn anywhere between the two surfaces, seldom has.  Measured on demo
  frames rendered with both depth models (the same frames, noise-free depth as truth): the close test alone
  catches 27% of the active-stereo readings off by more than the tolerance, both tests 64%; true readings
  flagged, gaussian depth: 0.28 and 0.32 per 1000.  Without the adjacent-support rule the wide test caught 75%
  but flagged the topmost readings of a sphere seen from 5 degrees above the table (its rim curves away from
  the pixel in every direction), 0.5 mm of the sphere's height.
"""
from __future__ import annotations

import numpy as np

FLYING_TOL_M = 0.015        # a flying pixel is this far (or FLYING_TOL_REL x depth) from both neighbours
FLYING_TOL_REL = 0.03
FLYING_WINDOW = 3           # the close test's neighbourhood side (pixels)
WIDE_WINDOW = 5             # the wide test's neighbourhood side (pixels); 0 = no wide test
SUPPORT_REL = 0.5           # a neighbour supports a reading within this x the tolerance of its depth
WIDE_SUPPORT_BOTH = 4       # wide test, jumps on both sides: flagged with fewer supporting neighbours than this
WIDE_SUPPORT_ONE = 3        # ... a jump on one side only: fewer supporting neighbours than this
WIDE_MISSING = 6            # ... and at least this many neighbours without a reading
WIDE_ADJACENT_SUPPORT = 1   # either way, fewer than this many of its 8 adjacent neighbours support it


def flying_pixels(depth: np.ndarray) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres (0 = none) flagged by the close or the wide test (module
    docstring); beyond the image the depth is mirrored (scipy.ndimage's ``mode='reflect'``)."""
    d = np.asarray(depth, np.float64)
    half = _half()
    return _flags(np.pad(d, half, mode="symmetric"), half, d.shape)   # numpy 'symmetric' = ndimage 'reflect'


def _half() -> int:
    return max(FLYING_WINDOW, WIDE_WINDOW) // 2


def _between(d: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Readings d (0 = none) more than the tolerance above their window's least reading lo and below its
    greatest hi: the close test, given the window's extremes."""
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d)
    return (d > 0) & (d - lo > tol) & (hi - d > tol)


def _extremes(p: np.ndarray, half: int, shape: tuple[int, int], size: int) -> tuple[np.ndarray, np.ndarray]:
    """Greatest and least reading (0 = none is skipped) in the size x size square about each pixel of the
    interior (shape) of the padded array p (border ``half``): running maxima / minima of shifted slices,
    along columns then rows (exact: no rounding in max/min)."""
    ph, pw = shape
    k = size // 2
    valid = p > 0
    p_hi, p_lo = np.where(valid, p, 0.0), np.where(valid, p, np.inf)
    rows = slice(half - k, half + k + ph)
    row_hi, row_lo = p_hi[rows, half - k:half - k + pw].copy(), p_lo[rows, half - k:half - k + pw].copy()
    for j in range(1, size):
        np.maximum(row_hi, p_hi[rows, half - k + j:half - k + j + pw], out=row_hi)
        np.minimum(row_lo, p_lo[rows, half - k + j:half - k + j + pw], out=row_lo)
    hi, lo = row_hi[:ph].copy(), row_lo[:ph].copy()
    for i in range(1, size):
        np.maximum(hi, row_hi[i:i + ph], out=hi)
        np.minimum(lo, row_lo[i:i + ph], out=lo)
    return hi, lo


def _flags(p: np.ndarray, half: int, shape: tuple[int, int]) -> np.ndarray:
    """Flags (shape) of the readings p[half:-half, half:-half] of a padded depth array p: both tests.  The wide
    test's counts are taken at the readings with a jump in the wide square only (a few percent of them)."""
    ph, pw = shape
    d = p[half:half + ph, half:half + pw]
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d)
    flags = _between(d, *_extremes(p, half, shape, FLYING_WINDOW)[::-1])
    if not WIDE_WINDOW:
        return flags
    hi, lo = _extremes(p, half, shape, WIDE_WINDOW)
    cand = (d > 0) & ~flags & ((d - lo > tol) | (hi - d > tol))
    r, u = np.nonzero(cand)
    if len(r) == 0:
        return flags
    w = WIDE_WINDOW // 2
    off = np.array([(i, j) for i in range(-w, w + 1) for j in range(-w, w + 1) if i or j])
    q = p[r[:, None] + half + off[:, 0], u[:, None] + half + off[:, 1]]          # (n, window - 1) neighbours
    dc, tc = d[r, u][:, None], tol[r, u][:, None]
    ok = q > 0
    near = (ok & (dc - q > tc)).any(1)
    far = (ok & (q - dc > tc)).any(1)
    sup = ok & (np.abs(q - dc) <= SUPPORT_REL * tc)
    support = sup.sum(1)
    adjacent = sup[:, (np.abs(off) <= 1).all(1)].sum(1)
    missing = (~ok).sum(1)
    both = near & far & (support < WIDE_SUPPORT_BOTH)
    one = (near ^ far) & (support < WIDE_SUPPORT_ONE) & (missing >= WIDE_MISSING)
    flags[r, u] = (both | one) & (adjacent < WIDE_ADJACENT_SUPPORT)
    return flags


def steady_depth(depth: np.ndarray) -> np.ndarray:
    """depth (H, W) with its flying pixels set to 0 (no reading)."""
    return np.where(flying_pixels(depth), 0.0, depth)


def steady_depth_at(depth: np.ndarray, r: np.ndarray, u: np.ndarray) -> np.ndarray:
    """``steady_depth(depth)[r, u]`` for pixels (r, u) (M,): the tests of :func:`flying_pixels` run on the
    patch the pixels span only (lifting asks for one object's few thousand cells), with a border of half the
    widest window (beyond the image mirrored as there)."""
    if len(r) == 0:
        return np.zeros(0, np.asarray(depth).dtype)
    h, w = depth.shape
    half = _half()
    r0, r1 = int(r.min()), int(r.max()) + 1
    u0, u1 = int(u.min()), int(u.max()) + 1
    a0, a1, b0, b1 = max(r0 - half, 0), min(r1 + half, h), max(u0 - half, 0), min(u1 + half, w)
    d = np.asarray(depth[a0:a1, b0:b1], np.float64)
    pad = ((a0 - (r0 - half), r1 + half - a1), (b0 - (u0 - half), u1 + half - b1))
    if any(p for side in pad for p in side):
        d = np.pad(d, pad, mode="symmetric")      # numpy's 'symmetric' is scipy.ndimage's 'reflect'
    ph, pw = r1 - r0, u1 - u0
    flying = _flags(d, half, (ph, pw))
    steady = np.where(flying, 0.0, depth[r0:r1, u0:u1])
    return steady.reshape(-1).take((np.asarray(r) - r0) * pw + (np.asarray(u) - u0))
