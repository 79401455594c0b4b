"""The pose search against an independent reference twin, and its scale resampling against an analytic shape.

The twin (tests/posesearch_reference.py) rotates sample positions explicitly in Cartesian coordinates, reads
the prototype with scipy.ndimage.map_coordinates and evaluates the weighted distance from its definition:
it shares no helper with protomine.mine.posesearch, so agreement checks the FFT correlation, the distance
expansion, the scale resampling, the no-overlap rule and the sub-bin refinement together.
"""
from __future__ import annotations

import numpy as np
import pytest

import posesearch_reference as ref
from protomine.mine.posesearch import pose_distances


def _random(rng, n=5, k=2, grid=(2, 5, 12, 3)):
    C, R, A, H = grid
    X = rng.normal(size=(n, C, R, A, H))
    W = rng.random((n, R, A, H)) * (rng.random((n, R, A, H)) > 0.3)
    P = rng.normal(size=(k, C, R, A, H))
    V = rng.random((k, R, A, H)) * (rng.random((k, R, A, H)) > 0.2)
    return X, W, P, V


# scales chosen so that no resampled cell centre falls exactly on the grid's outer edge (R = 5, H = 3)
@pytest.mark.parametrize("scales", [(1.0,), (0.8, 1.0, 1.3)])
def test_fast_search_equals_explicit_rotation_twin(scales):
    X, W, P, V = _random(np.random.default_rng(11))
    fast = pose_distances(X, W, P, V, scales=scales, return_all=True, chunk_size=2)
    slow = ref.all_distances(X, W, P, V, scales)
    np.testing.assert_allclose(fast.all_D, slow, rtol=2e-4, atol=1e-5)
    D, yaw, sc = ref.best_pose(slow, scales)
    np.testing.assert_allclose(fast.D, D, rtol=2e-4, atol=1e-5)
    np.testing.assert_array_equal(fast.scale, sc.astype(np.float32))
    dyaw = np.abs(np.mod(fast.yaw_deg - yaw + 180.0, 360.0) - 180.0)
    assert dyaw.max() < 1e-3                      # float32 rounding of the parabola (measured 2e-5 deg)


def test_twin_finds_a_turned_and_scaled_copy():
    # the twin itself on a known answer: an object made by turning a prototype by 90 degrees (3 of 12 bins)
    # and scaling it by 0.8 through the twin's own resampling is found at that pose with distance 0
    _, _, P, V = _random(np.random.default_rng(12), k=1)
    V = np.ones_like(V)
    mu, v = ref.posed_prototype(P[0], V[0], ref.yaw_rotation(90.0), 0.8)
    allD = ref.all_distances(mu[None], v[None], P, V, (0.8, 1.0, 1.3))
    D, yaw, sc = ref.best_pose(allD, (0.8, 1.0, 1.3))
    assert D[0, 0] < 1e-12 and sc[0, 0] == 0.8 and yaw[0, 0] == pytest.approx(90.0, abs=1e-6)
    # and the fast path agrees on that object
    m = pose_distances(mu[None], v[None], P, V, scales=(0.8, 1.0, 1.3))
    assert m.scale[0, 0] == pytest.approx(0.8) and m.yaw_deg[0, 0] == pytest.approx(90.0, abs=0.05)


def test_no_overlap_is_infinite_in_both():
    # an object seen only near the axis against a prototype known only at the rim: no shared cell
    X, W, P, V = _random(np.random.default_rng(13), n=1, k=1)
    W[:] = 0.0
    W[:, 0] = 1.0
    V[:] = 0.0
    V[:, -1] = 1.0
    fast = pose_distances(X, W, P, V, scales=(1.0,), return_all=True)
    assert np.all(np.isinf(fast.all_D)) and np.all(np.isinf(ref.all_distances(X, W, P, V, (1.0,))))


# --- scale resampling against an analytic shape ----------------------------------------------

R_BINS, H_BINS = 16, 16
RADIUS, HEIGHT = 0.45, 0.55       # the cylinder in units of the grid's rho_max and z_max


def _cylinder(radius: float, height: float, A: int = 4) -> np.ndarray:
    """Solid cylinder occupancy (R, A, H): 1 at cell centres with rho < radius and z < height."""
    rho = (np.arange(R_BINS) + 0.5) / R_BINS
    z = (np.arange(H_BINS) + 0.5) / H_BINS
    occ = (rho[:, None] < radius) & (z[None, :] < height)
    return np.repeat(occ[:, None, :], A, axis=1).astype(np.float64)


def _probe_scaled(P: np.ndarray, V: np.ndarray, sigma: float) -> np.ndarray:
    """The scaled prototype read back through pose_distances alone: (R, H), nan where unknown.

    One probe object per (radial, height) ring: features 0, weight 1 on that ring only, so the documented
    distance is the ring's mean of v mu^2 / mean of v = mu^2 for a rotationally symmetric prototype
    with a uniform weight (inf when the ring is unknown in the scaled prototype).
    """
    R, A, H = V.shape[1:]
    W = np.zeros((R * H, R, A, H))
    for i in range(R):
        for k in range(H):
            W[i * H + k, i, :, k] = 1.0
    X = np.zeros((R * H, 1, R, A, H))
    m = pose_distances(X, W, P, V, scales=(sigma,), min_overlap=1e-6)
    d = m.D[:, 0].reshape(R, H).astype(np.float64)
    return np.where(np.isfinite(d), np.sqrt(np.where(np.isfinite(d), d, 0.0)), np.nan)


@pytest.mark.parametrize("sigma", [0.6, 0.8, 1.25, 1.5])
def test_scaled_cylinder_has_the_scaled_radius_and_height(sigma):
    occ = _cylinder(RADIUS, HEIGHT)
    P, V = occ[None, None], np.ones((1,) + occ.shape)
    mu = _probe_scaled(P, V, sigma)                                     # (R, H)
    rho = (np.arange(R_BINS) + 0.5) / R_BINS
    z = (np.arange(H_BINS) + 0.5) / H_BINS
    # cells whose source position lies outside the grid (centre / sigma > 1) are unknown, the others known
    unknown = (rho[:, None] / sigma > 1) | (z[None, :] / sigma > 1)
    np.testing.assert_array_equal(np.isnan(mu), unknown)
    # analytic cylinder of radius sigma * RADIUS and height sigma * HEIGHT: the known cells more than one
    # source bin away from its surface are exactly full or empty
    r_s, h_s = sigma * RADIUS, sigma * HEIGHT
    margin_r, margin_h = sigma / R_BINS, sigma / H_BINS
    inside = (rho[:, None] < r_s - margin_r) & (z[None, :] < h_s - margin_h)
    outside = ((rho[:, None] > r_s + margin_r) | (z[None, :] > h_s + margin_h)) & ~unknown
    assert inside.sum() > 10 and outside.sum() > 10
    np.testing.assert_allclose(mu[inside], 1.0, atol=1e-3)
    np.testing.assert_allclose(mu[outside], 0.0, atol=1e-3)
    # radius and height read off the profiles (integral of occupancy along the axis through the bottom ring
    # and the central column) are within half a bin of the analytic ones (measured: within 0.35 bin)
    col, ring = mu[0, :], mu[:, 0]
    est_h = np.nansum(col) / H_BINS
    est_r = np.nansum(ring) / R_BINS
    assert abs(est_r - r_s) <= 0.5 / R_BINS, (est_r, r_s)
    assert abs(est_h - h_s) <= 0.5 / H_BINS, (est_h, h_s)


def test_scale_search_picks_the_cylinder_size():
    # objects: analytic cylinders at several sizes; the prototype: the unit one; every object picks its scale
    scales = (0.6, 0.8, 1.0, 1.25, 1.5)
    P = _cylinder(RADIUS, HEIGHT)[None, None]
    V = np.ones(P.shape[:1] + P.shape[2:])
    X = np.stack([_cylinder(s * RADIUS, s * HEIGHT)[None] for s in scales])
    W = np.ones((len(scales),) + X.shape[2:])
    m = pose_distances(X, W, P, V, scales=scales)
    np.testing.assert_allclose(m.scale[:, 0], scales)


def test_identity_tilt_search_equals_the_twin():
    # the 3-D search with only the upright direction (TiltGrid nsides=(0,)) is the yaw x scale search:
    # the same best pose as the explicit-rotation twin
    from protomine.mine.tilts import TiltGrid, tilt_pose_distances
    scales = (0.8, 1.0, 1.3)
    X, W, P, V = _random(np.random.default_rng(14), n=4)
    m = tilt_pose_distances(X, W, P, V, aspect=np.ones(len(P)), scales=scales, grid=TiltGrid(nsides=(0,)))
    D, yaw, sc = ref.best_pose(ref.all_distances(X, W, P, V, scales), scales)
    np.testing.assert_allclose(m.D, D, rtol=2e-4, atol=1e-5)
    np.testing.assert_array_equal(m.scale, sc.astype(np.float32))
    assert np.abs(np.mod(m.yaw_deg - yaw + 180.0, 360.0) - 180.0).max() < 1e-3
    assert np.all(m.tilt == 0)
