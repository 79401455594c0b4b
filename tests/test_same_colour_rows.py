"""Touching objects of one colour without masks: the seam between two groups as the frames see it
(``convexity.seam_steps``), on hand-made depth images with known answers, and on rows of identical items of one
colour rendered by the demo renderer (the renderer's masks as truth)."""
from __future__ import annotations

import numpy as np

from protomine.ingest.convexity import seam_steps


def _seam_image(zfun, w=60, h=40, f=100.0):
    """One frame of the surface z = zfun(X) (camera = world frame), labelled 0 left of X = 0 and 1 right of it:
    voxels = the pixels' own points, and the readings ((h, w), pixels, voxels, depth) of ``seam_steps``."""
    cx, cy = (w - 1) / 2, (h - 1) / 2
    v, u = np.mgrid[0:h, 0:w].astype(np.float64)
    z = np.full((h, w), 0.5)
    for _ in range(50):                                  # fixed point: z = zfun((u - cx) z / f)
        z = zfun((u - cx) * z / f)
    X = (u - cx) * z / f
    pts = np.stack([X, (v - cy) * z / f, z], -1).reshape(-1, 3)
    lab = (X.reshape(-1) >= 0).astype(int)
    pix = np.arange(h * w)
    return pts, lab, [((h, w), pix, pix, z.reshape(-1))]


def test_an_occluding_edge_is_a_stepped_seam_and_a_groove_a_flat_one():
    # an occluding edge: the left group 2 cm in front of the right one (a depth step over VIEW_JUMP_M, 1 cm, the
    # occluding-edge test of frame_segments); a groove: the surface folds towards the camera on both sides of
    # X = 0 (a concave crease, Stein et al. 2014) and the depths meet there.  Expected answer by construction.
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.48, 0.5))
    st, fl = seam_steps(pts, lab, 0.03, rd)[(0, 1)]
    assert st > 0 and fl == 0, (st, fl)
    # pixel pairs 1, 2 and 3 apart across the seam: 1 + 2 + 3 per row, 40 rows (the horizontal pairs only)
    assert st == 40 * 6
    pts, lab, rd = _seam_image(lambda X: 0.5 - 0.8 * np.abs(X))
    st, fl = seam_steps(pts, lab, 0.03, rd)[(0, 1)]
    assert st == 0 and fl == 40 * 6, (st, fl)


def test_only_the_seam_counts_not_an_occlusion_away_from_it():
    # the two groups 10 cm apart in depth: one hides the other in the image, but no voxel of one lies within the
    # radius of the other, so there is no seam to judge (the pair is absent)
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.4, 0.5))
    assert seam_steps(pts, lab, 0.03, rd) == {}
