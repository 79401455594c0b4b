"""Local convexity (Stein et al., CVPR 2014) on hand-made point sets with known answers."""
from __future__ import annotations

import numpy as np

from protomine.ingest.convexity import convex_parts, stands_alone, voxel_normals


def _sphere(c, r, n=1500, seed=0):
    v = np.random.default_rng(seed).normal(size=(n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    return np.asarray(c) + r * v


def _parts(pts, cams):
    views = cams - pts
    views /= np.linalg.norm(views, axis=1, keepdims=True)
    lab = np.zeros(len(pts), int)
    n = voxel_normals(pts, views, lab, radius=0.008)
    parts, _ = convex_parts(pts, n, lab, adjacency=0.006, concave_deg=15.0)
    sizes = np.bincount(parts)
    return (sizes >= 0.2 * len(pts) / 2).sum()


def test_one_sphere_is_one_convex_part():
    pts = _sphere((0, 0, 0.05), 0.04)
    assert _parts(pts, pts * 3.0) == 1            # viewed from outside: normals point away from the centre


def _fold(sign: float) -> int:
    """Parts of two 5 x 6 cm planes meeting at 90 degrees along the y axis, z = sign |x|, seen from above."""
    g = np.stack(np.meshgrid(np.arange(-0.05, 0.05, 0.003), np.arange(0, 0.06, 0.003), indexing="ij"), -1).reshape(-1, 2)
    pts = np.c_[g, sign * np.abs(g[:, 0])]
    views = np.tile([0, 0, 1.0], (len(pts), 1))
    lab = np.zeros(len(pts), int)
    n = voxel_normals(pts, views, lab, radius=0.0084)
    parts, _ = convex_parts(pts, n, lab, adjacency=0.006, concave_deg=15.0)
    return int((np.bincount(parts) >= 0.3 * len(pts) / 2).sum())


def test_a_groove_is_cut_and_a_ridge_is_not():
    # the definition: (n_i - n_j) . (x_i - x_j) < 0 is concave (Stein et al. 2014, eq. 1-2)
    assert _fold(+1.0) == 2          # a V groove, as where two objects meet
    assert _fold(-1.0) == 1          # a roof ridge, as a box's edge


def test_stands_alone_by_the_centre_of_mass_over_the_support_polygon():
    rng = np.random.default_rng(0)
    # a post on a disc: centre of mass over the disc
    disc = rng.uniform(-0.04, 0.04, (400, 2))
    disc = disc[np.linalg.norm(disc, axis=1) < 0.04]
    post = np.c_[rng.normal(0, 0.005, (300, 2))]
    xy = np.concatenate([disc, post])
    h = np.concatenate([np.full(len(disc), 0.005), rng.uniform(0, 0.1, 300)])
    assert stands_alone(xy, h, support_band=0.025, inset=0.003)
    # a slanted leg: its foot is a small patch, its mass leans away from it
    t = rng.uniform(0, 1, 300)
    leg_xy = np.c_[0.06 * t, np.zeros(300)] + rng.normal(0, 0.002, (300, 2))
    assert not stands_alone(leg_xy, 0.1 * t, support_band=0.025, inset=0.003)
