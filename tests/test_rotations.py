"""Rotation algebra against scipy.spatial.transform.Rotation (reference implementation) and the HEALPix
up-direction grid against its published definition (Gorski et al., ApJ 622, 759, 2005)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine import rotations as rot


def test_quaternion_matrix_round_trip_matches_scipy():
    # reference: scipy's as_quat / as_matrix use the same scalar-last convention
    r = Rotation.random(200, random_state=0)
    q = rot.matrix_to_quat(r.as_matrix())
    ref = r.as_quat()
    ref *= np.where(ref[:, 3:] < 0, -1.0, 1.0)
    np.testing.assert_allclose(q, ref, atol=1e-9)
    np.testing.assert_allclose(rot.quat_to_matrix(ref), r.as_matrix(), atol=1e-9)
    # near 180 degrees (Shepperd's branches)
    near = Rotation.from_rotvec(np.array([[np.pi - 1e-7, 0, 0], [0, np.pi, 0], [0.3, -0.4, np.pi * 0.999]]))
    np.testing.assert_allclose(rot.quat_geodesic_deg(rot.matrix_to_quat(near.as_matrix()), near.as_quat()), 0, atol=1e-4)


def test_composition_and_geodesic_angle_match_scipy():
    a, b = Rotation.random(50, random_state=1), Rotation.random(50, random_state=2)
    ab = rot.quat_multiply(a.as_quat(), b.as_quat())
    ref = (a * b).as_quat()  # scipy: a * b applies b first
    np.testing.assert_allclose(np.abs(np.sum(ab * ref, axis=1)), 1.0, atol=1e-9)
    ref_angle = np.rad2deg((a.inv() * b).magnitude())
    np.testing.assert_allclose(rot.geodesic_deg(a.as_matrix(), b.as_matrix()), ref_angle, atol=1e-6)
    np.testing.assert_allclose(rot.quat_geodesic_deg(a.as_quat(), b.as_quat()), ref_angle, atol=1e-5)


def test_tilt_and_yaw_decomposition_round_trip():
    r = Rotation.random(100, random_state=3).as_matrix()
    up, yaw = rot.matrix_to_tilt_yaw(r)
    np.testing.assert_allclose(rot.tilt_yaw_to_matrix(up, yaw), r, atol=1e-9)
    # the tilt takes its up direction to +z (definition), also for up = -z
    for u in (up[:5], np.array([[0, 0, -1.0], [0, 0, 1.0]])):
        np.testing.assert_allclose(np.einsum("nij,nj->ni", rot.tilt_matrix(u), u), [[0, 0, 1]] * len(u), atol=1e-9)
    # yaw about +z agrees with scipy's rotation about z
    np.testing.assert_allclose(rot.yaw_matrix(37.0), Rotation.from_euler("z", 37.0, degrees=True).as_matrix(), atol=1e-12)


@pytest.mark.parametrize("nside", [1, 2, 4])
def test_healpix_grid_has_12_nside2_equal_area_pixels(nside):
    # Gorski et al. 2005: N_pix = 12 N_side^2 pixels of equal area 4 pi / N_pix.  Equal area, checked from the
    # definition without the grid code: uniform points on the sphere assigned to pixels by the paper's
    # ring-scheme ang2pix (z and phi ranges per ring, written out here) fall equally into every pixel.
    c = rot.healpix_centres(nside)
    assert c.shape == (12 * nside * nside, 3)
    np.testing.assert_allclose(np.linalg.norm(c, axis=1), 1.0, atol=1e-12)
    rng = np.random.default_rng(0)
    n = 60000
    z = rng.uniform(-1, 1, n)
    phi = rng.uniform(0, 2 * np.pi, n)
    counts = np.bincount(_ang2pix_ring(nside, z, phi), minlength=12 * nside * nside)
    expected = n / (12 * nside * nside)
    assert counts.size == 12 * nside * nside
    # binomial spread: 5 standard deviations
    assert np.abs(counts - expected).max() < 5 * np.sqrt(expected)
    # the pixel centres are inside their own pixels
    zc, pc = c[:, 2], np.mod(np.arctan2(c[:, 1], c[:, 0]), 2 * np.pi)
    np.testing.assert_array_equal(_ang2pix_ring(nside, zc, pc), np.arange(12 * nside * nside))


def _ang2pix_ring(nside, z, phi):
    """Ring-scheme ang2pix from Gorski et al. 2005 (their section 4 / the HEALPix primer), written from the paper."""
    za = np.abs(z)
    tt = np.mod(phi, 2 * np.pi) / (np.pi / 2)  # in [0, 4)
    out = np.empty(len(z), np.int64)
    eq = za <= 2.0 / 3.0
    # equatorial belt
    temp1 = nside * (0.5 + tt[eq])
    temp2 = nside * z[eq] * 0.75
    jp = np.floor(temp1 - temp2).astype(np.int64)
    jm = np.floor(temp1 + temp2).astype(np.int64)
    ir = nside + 1 + jp - jm  # 1 .. 2 nside + 1
    kshift = 1 - (ir & 1)
    ip = (jp + jm - nside + kshift + 1) // 2
    ip = np.mod(ip, 4 * nside)
    out[eq] = 2 * nside * (nside - 1) + (ir - 1) * 4 * nside + ip
    # polar caps
    pc = ~eq
    tp = tt[pc] - np.floor(tt[pc])
    tmp = nside * np.sqrt(3 * (1 - za[pc]))
    jp = np.floor(tp * tmp).astype(np.int64)
    jm = np.floor((1.0 - tp) * tmp).astype(np.int64)
    ir = jp + jm + 1
    ip = np.floor(tt[pc] * ir).astype(np.int64)
    ip = np.mod(ip, 4 * ir)
    north = z[pc] > 0
    out[pc] = np.where(north, 2 * ir * (ir - 1) + ip, 12 * nside * nside - 2 * ir * (ir + 1) + ip)
    return out


@pytest.mark.parametrize("nside", [1, 2, 4])
def test_up_grid_covering_radius_against_the_published_spacing(nside):
    # Gorski et al. 2005: mean spacing Omega_pix^(1/2) = sqrt(3 / pi) 60 deg / N_side.  Any point of the sphere
    # is within the covering radius of a grid direction; for HEALPix it lies between half the spacing and the
    # spacing (the largest pixels' corners, near the poles of the caps), and halves when N_side doubles.
    g = rot.up_grid(nside)
    np.testing.assert_allclose(g[0], [0, 0, 1])
    spacing = np.sqrt(3 / np.pi) * 60.0 / nside
    assert abs(rot.grid_spacing_deg(nside) - spacing) < 1e-9
    pts = Rotation.random(20000, random_state=5).apply([0, 0, 1.0])
    cover = rot.angle_between_deg(pts[:, None], g[None]).min(axis=1).max()
    assert 0.5 * spacing < cover < 1.0 * spacing, (nside, cover, spacing)
