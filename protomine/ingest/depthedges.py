"""Depth readings that cannot be trusted as surface or free space: flying pixels at depth edges.

Depth sensors average the near and the far surface where a depth edge crosses a pixel (time of flight) or a
matching window (structured light, active stereo): the reading lies between the two surfaces, where there
is nothing ("flying pixels"; dropping readings that lie between a nearer and a farther neighbour is common
practice).  Such a reading is neither a surface point nor evidence that the space in front of it is empty,
so object proposals never take it (``proposals``) and lifting never carves through it (``volume``).
"""
from __future__ import annotations

import numpy as np

FLYING_TOL_M = 0.015        # depth steps larger than this (or FLYING_TOL_REL x depth) break a surface (proposals)
FLYING_TOL_REL = 0.03
BETWEEN_TOL_M = 0.008       # a flying pixel is this far (or BETWEEN_TOL_REL x depth) from both neighbours
BETWEEN_TOL_REL = 0.01
FLYING_WINDOW = 3           # neighbourhood side (pixels) of the plain between-test (no support rule)
WIDE_WINDOW = 7             # neighbourhood side (pixels) of the between-test with the support rule
SUPPORT_WINDOW = 5          # neighbourhood side (pixels) where a reading's own surface is looked for
SUPPORT_TOL_M = 0.01        # a neighbour within this (or SUPPORT_TOL_REL x depth) lies on the same surface
SUPPORT_TOL_REL = 0.01
SUPPORT_MIN = 3             # ... and this many such neighbours make the reading a surface point, never flying
HOLES_MIN = 14              # the wide test applies where the WIDE_WINDOW square misses at least this many readings
FLYING_REACH = max(FLYING_WINDOW, WIDE_WINDOW, SUPPORT_WINDOW) // 2   # pixels beyond a reading that the test looks at


def surface_support(depth: np.ndarray, *, size: int = SUPPORT_WINDOW, tol_m: float = SUPPORT_TOL_M,
                    tol_rel: float = SUPPORT_TOL_REL) -> np.ndarray:
    """(H, W) int: for each reading of depth (H, W) metres (0 = none), the number of other readings in the
    size x size square around it within max(tol_m, tol_rel x depth) of its depth (0 where there is none)."""
    d = np.asarray(depth, np.float64)
    H, W = d.shape
    r = size // 2
    pad = np.pad(np.where(d > 0, d, np.nan), r, constant_values=np.nan)
    tol = np.maximum(tol_m, tol_rel * d)
    count = np.zeros(d.shape, np.int32)
    for dy in range(-r, r + 1):
        for dx in range(-r, r + 1):
            if dy or dx:
                count += np.abs(pad[r + dy:r + dy + H, r + dx:r + dx + W] - d) <= tol   # nan compares False
    return np.where(d > 0, count, 0)


def _between(d: np.ndarray, valid: np.ndarray, size: int, tol: np.ndarray) -> np.ndarray:
    """Readings more than tol nearer than the farthest and farther than the nearest reading of a size x size square."""
    from scipy.ndimage import maximum_filter, minimum_filter
    hi = maximum_filter(np.where(valid, d, 0.0), size=size)
    lo = minimum_filter(np.where(valid, d, np.inf), size=size)
    return valid & (d - lo > tol) & (hi - d > tol)


def flying_pixels(depth: np.ndarray) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres (0 = none) that lie between a nearer and a farther reading
    (1) by more than FLYING_TOL_M (or FLYING_TOL_REL x depth) on both sides in a FLYING_WINDOW square, or
    (2) by more than BETWEEN_TOL_M (or BETWEEN_TOL_REL x depth) on both sides in a WIDE_WINDOW square, with
    fewer than SUPPORT_MIN neighbours on their own surface (``surface_support``).

    (1) catches a one-pixel veil hugging a silhouette, even a smooth one (time-of-flight mixing); (2) catches
    the wider, ragged band that a matching window straddling an edge leaves (structured light, active
    stereo), and only where that band shows itself: the same failure drops readings there, so (2) applies
    where at least HOLES_MIN of the WIDE_WINDOW square's readings are missing (a sensor with only sparse
    random dropout never qualifies).  The support rule is what separates a mixed reading from a rim or a
    surface seen at a grazing angle: both lie between a nearer and a farther surface, but a real surface
    continues in some direction (its neighbours along the rim, or along the iso-depth line of a slanted face,
    read the same depth within noise), while mixed readings take an arbitrary depth between the two
    surfaces, each its own.

    Measured on the demo scenes (3 captures x 8 frames, 320x240, object pixels; readings more than 2 cm off
    the same scene's gaussian depth and more than 5 mm in front of the farthest reading around counted as
    mixed): (1) alone catches 31% of the active-stereo model's mixed readings, (1) or (2) 61%; on gaussian
    depth they flag 0.22% of the readings against 0.21% for (1) alone.  Without the holes condition (2)
    caught 81% but flagged 0.30% of gaussian readings, a few of them on a jug's thin handle in every frame,
    which was enough to turn the mined jug continuously symmetric (its handle's effect size fell from 0.17
    to 0.10, below the symmetry test's 0.12).  The wide band's stray readings were what inflated the
    footprints of long thin objects under stereo depth (by 20% at the median, mallet and bracket).
    """
    d = np.asarray(depth, np.float64)
    valid = d > 0
    plain = _between(d, valid, FLYING_WINDOW, np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d))
    wide = _between(d, valid, WIDE_WINDOW, np.maximum(BETWEEN_TOL_M, BETWEEN_TOL_REL * d)) & ~plain
    if wide.any():
        from scipy.ndimage import uniform_filter
        holes = uniform_filter((~valid).astype(np.float64), size=WIDE_WINDOW, mode="nearest") * WIDE_WINDOW ** 2
        wide &= holes > HOLES_MIN - 0.5
        plain |= wide & (surface_support(d) < SUPPORT_MIN)
    return plain
def steady_depth(depth: np.ndarray) -> np.ndarray:
    """depth (H, W) with its flying pixels set to 0 (no reading)."""
    return np.where(flying_pixels(depth), 0.0, depth)
