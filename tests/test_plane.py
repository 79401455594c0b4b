"""Support-plane fit: RANSAC iteration count and normal recovery."""
from __future__ import annotations

import numpy as np
import pytest

from protomine.ingest.plane import fit_plane, ransac_iterations
from scipy.spatial.transform import Rotation


def test_iteration_count_matches_formula_hand_worked():
    # Fischler & Bolles 1981 formula N = log(1-p)/log(1-w^s); hand-worked: w=0.5, s=3, p=0.99
    # -> log(0.01)/log(0.875) = 34.49 -> 35 (also the table in Hartley & Zisserman 2004, sec. 4.7: s=3, 50% -> 35)
    assert ransac_iterations(0.99, 0.5, 3) == 35
    # Hartley & Zisserman 2004 table 4.3: s=2, 30% outliers, p=0.99 -> 7
    assert ransac_iterations(0.99, 0.7, 2) == 7


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_plane_with_40_percent_outliers_recovers_normal_within_1_degree(seed):
    rng = np.random.default_rng(seed)
    n_in, n_out = 6000, 4000
    xy = rng.uniform(-0.5, 0.5, size=(n_in, 2))
    pts = np.column_stack([xy, rng.normal(0, 0.002, n_in)])          # table, 2 mm noise
    outl = rng.uniform(-0.5, 0.5, size=(n_out, 3)) * [1, 1, 0.6] + [0, 0, 0.31]  # clutter above
    R = Rotation.random(random_state=seed).as_matrix()                 # arbitrary world frame
    t = rng.normal(size=3)
    world = np.concatenate([pts, outl]) @ R.T + t
    cam = np.array([0, 0, 1.0]) @ R.T + t                             # a camera above the table
    fit = fit_plane(world, inlier_dist=0.006, confidence=0.999, rng=rng, toward=cam)
    true_up = R[:, 2]
    ang = np.degrees(np.arccos(np.clip(fit.normal @ true_up, -1, 1)))
    assert ang < 1.0
    assert abs(fit.inlier_fraction - 0.6) < 0.05
    assert fit.residual_m < 0.004
