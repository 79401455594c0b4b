"""The reference gridded as a single view of it (``mine.viewnorm``).  Volumes are built from the definition of the
grid by counting sample points per cell (``test_tilts``), without the lifting code or the tilt resampler; which
parts a camera sees follows from elementary occlusion (a nearer part of equal or greater extent across the line of
sight hides what lies behind it)."""
from __future__ import annotations

import numpy as np

from protomine.mine.tilts import TiltGrid
from protomine.mine.viewnorm import ViewNormaliser, face_candidates, visible_geometry, visible_mask
from test_tilts import MARGINS, _solid, _volume

GRID_T = TiltGrid(nsides=(1,), radial_margin=MARGINS[0], height_margin=MARGINS[1])


def _pillars(rng: np.random.Generator, n: int = 8000) -> tuple[np.ndarray, np.ndarray]:
    """Two equal square pillars side by side along x (centres x = -0.05 and +0.05, 0.04 wide, 0.08 tall)."""
    a = rng.uniform([-0.07, -0.02, 0.0], [-0.03, 0.02, 0.08], (n // 2, 3))
    b = rng.uniform([0.03, -0.02, 0.0], [0.07, 0.02, 0.08], (n // 2, 3))
    return np.concatenate([a, b]), np.zeros(n, int)


def test_visible_mask_hides_the_far_one_of_two_points_in_a_line():
    q = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    # seen along +x: the point at x = 1 is nearer and covers the one at the origin; the third is alone in its pixel
    assert visible_mask(q, np.array([1.0, 0.0, 0.0]), pixel=0.5, depth_tol=0.1).tolist() == [False, True, True]
    # seen along +z all three lie at the same depth, each in its own pixel or tied: all visible
    assert visible_mask(q, np.array([0.0, 0.0, 1.0]), pixel=0.5, depth_tol=0.1).all()


def test_footprint_seen_along_the_pair_holds_the_near_pillar_only():
    rng = np.random.default_rng(0)
    pts, part = _pillars(rng)
    X, W, aspect = _volume(pts, part)
    # the grid's own footprint: the smallest circle holding both pillars, centred between them (in units of rho_max)
    top = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([0.0, 0.0, 1.0]), GRID_T)
    side = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([0.0, 1.0, 0.05]), GRID_T)
    along = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([1.0, 0.0, 0.05]), GRID_T)
    r_full = 1.0 / MARGINS[0]                       # the footprint radius in units of rho_max
    # from above the whole footprint is seen: the circle is the grid's own (grown by half a cell)
    assert abs(top.base[0]) < 0.05 and abs(top.base[1]) < 0.05
    assert abs(top.rho_max / MARGINS[0] - r_full) < 0.15 * r_full
    # from the side (+y) both pillars are seen, their near faces only: as wide, moved toward the camera
    assert abs(side.base[0]) < 0.05 and side.base[1] > 0.1
    assert abs(side.rho_max / MARGINS[0] - r_full) < 0.15 * r_full
    # along +x (nearly level) the pillar at x = +0.05 hides the one behind it: the circle moves to it and holds
    # one pillar (half-diagonal 0.028 of the whole footprint's radius 0.0775: a ratio of 0.37)
    assert along.base[0] > 0.35 * r_full
    assert along.rho_max / MARGINS[0] < 0.6 * r_full


def test_face_candidates_merge_near_directions():
    fu = np.array([[0.0, 0.0, 1.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]])
    ups = face_candidates(np.array([0.99, 0.05, 0.0]), fu, np.array([3, 2, 0]), np.array([1, 1, -1]))
    # the found direction (about 3 degrees from +x) stands for +x; +z added once; the padding row left out
    assert len(ups) == 2 and np.allclose(ups[1], [0.0, 0.0, 1.0])


def test_a_view_lifted_about_its_visible_part_fits_its_view_normalised_prototype_better():
    rng = np.random.default_rng(1)
    pts, part = _solid("ell", rng)                # a bar with a taller post at its +x end
    P, V, aspect = _volume(pts, part)
    # seen level from +x, the post hides the bar behind it: the view holds the front layer only, lifted about
    # its own footprint (as ingest lifts a single view); cells it cannot see have weight 0
    front = pts[:, 0] > 0.056
    X, _, _ = _volume(pts[front], part[front])
    Wv = np.where(X[0] > 0.05, 1.0, 0.0).astype(np.float32)
    scales = (0.9, 1.0, 1.1)
    norm = ViewNormaliser(P[None], V[None], np.array([aspect]), scales, GRID_T,
                          (np.array([[[0.0, 0.0, 1.0]]]), np.array([[1]]), np.array([[1]])), top=1)
    from protomine.mine.posesearch import PoseBank
    plain = float(PoseBank(P[None], V[None], scales).match(X[None], Wv[None]).D[0, 0])
    cam = np.array([1.0, 0.0, 0.05]) / np.hypot(1.0, 0.05)
    D = np.array([[plain]])
    out = norm.improve(X[None], Wv[None], D, np.array([[[0.0, 0.0, 1.0]]]), cam[None])
    assert out[0, 0] <= plain
    assert out[0, 0] < 0.7 * plain, (out, plain)
    # no camera: nothing changes
    assert norm.improve(X[None], Wv[None], D, np.array([[[0.0, 0.0, 1.0]]]), np.zeros((1, 3)))[0, 0] == plain
