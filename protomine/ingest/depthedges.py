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
FLYING_WINDOW = 3           # neighbourhood side (pixels)


def flying_pixels(depth: np.ndarray) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres (0 = none) that lie between a nearer and a farther
    neighbour by more than FLYING_TOL_M (or FLYING_TOL_REL x depth) on both sides, in a FLYING_WINDOW square.

    A true edge pixel sits at one of the two depths and is kept.  A 3x3 window: measured on the demo, a
    7x7 window (with a neighbour-support rule to spare surfaces seen at grazing angles) caught twice the
    mixed readings of the active-stereo model (66% against 34%) but also changed a few true rim readings of
    gaussian-depth scenes, enough to flip a borderline symmetry decision (the jug's handle) and raise the
    yaw error's 90th percentile from 2.4 to 12.3 degrees there.
    """
    from scipy.ndimage import maximum_filter, minimum_filter
    d = np.asarray(depth, np.float64)
    valid = d > 0
    hi = maximum_filter(np.where(valid, d, 0.0), size=FLYING_WINDOW)
    lo = minimum_filter(np.where(valid, d, np.inf), size=FLYING_WINDOW)
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d)
    return valid & (d - lo > tol) & (hi - d > tol)


def steady_depth(depth: np.ndarray) -> np.ndarray:
    """depth (H, W) with its flying pixels set to 0 (no reading)."""
    return np.where(flying_pixels(depth), 0.0, depth)

