"""Depth readings that cannot be trusted as surface or free space: flying pixels at depth edges.

Depth sensors average the near and the far surface where a depth edge crosses a pixel (time of flight) or a
matching window (structured light, active stereo): the reading lies between the two surfaces, where there
is nothing ("flying pixels"; dropping readings that lie between a nearer and a farther neighbour is common
practice).  Such a reading is neither a surface point nor evidence that the space in front of it is empty,
so object proposals never take it (``proposals``) and lifting never carves through it (``volume``).
"""
from __future__ import annotations

import numpy as np

FLYING_TOL_M = 0.015        # a flying pixel is this far (or FLYING_TOL_REL x depth) from both neighbours
FLYING_TOL_REL = 0.03
FLYING_WINDOW = 7           # a stereo matching window spreads mixed readings up to ~3 px from the edge
MIN_SUPPORT = 2             # a reading with this many 8-neighbours within the tolerance lies on a surface


def _between(depth: np.ndarray, valid: np.ndarray, tol: np.ndarray, size: int) -> np.ndarray:
    from scipy.ndimage import maximum_filter, minimum_filter
    hi = maximum_filter(np.where(valid, depth, 0.0), size=size)
    lo = minimum_filter(np.where(valid, depth, np.inf), size=size)
    return valid & (depth - lo > tol) & (hi - depth > tol)


def flying_pixels(depth: np.ndarray) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres (0 = none) lying between a nearer and a farther reading
    by more than the tolerance (FLYING_TOL_M, or FLYING_TOL_REL x depth) on both sides.

    Between a nearer and a farther 8-neighbour: flying.  Between a nearer and a farther reading within two
    pixels (a FLYING_WINDOW square), flying unless fewer than MIN_SUPPORT of its 8 neighbours lie within the
    tolerance of it: a surface seen at a grazing angle changes depth fast but stays continuous along it, a
    mixed reading in a band of mixed readings has no such neighbours.  A true edge pixel sits at one of the
    two depths and is kept.
    """
    d = np.asarray(depth, np.float64)
    valid = d > 0
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d)
    near_far = _between(d, valid, tol, FLYING_WINDOW)
    if not near_far.any():
        return near_far
    pad = np.pad(np.where(valid, d, np.nan), 1, constant_values=np.nan)
    H, W = d.shape
    support = np.zeros((H, W), int)
    for dv in (-1, 0, 1):
        for du in (-1, 0, 1):
            if dv or du:
                nb = pad[1 + dv:1 + dv + H, 1 + du:1 + du + W]
                support += np.abs(nb - d) <= tol          # NaN (no reading) compares False
    return near_far & (_between(d, valid, tol, 3) | (support < MIN_SUPPORT))


def steady_depth(depth: np.ndarray) -> np.ndarray:
    """depth (H, W) with its flying pixels set to 0 (no reading)."""
    return np.where(flying_pixels(depth), 0.0, depth)

