"""Flying pixels (readings between a near and a far surface at a depth edge): the close 3x3 test and the
wide test for the ragged band of active-stereo edges, against readings whose truth is known by construction.

Sources: a reading strictly between a box top and the table under it can only be a mixed reading (hand-worked
geometry of the rendered box, as in test_stereo_depth); a plane has no depth edge, so nothing on it is flying
(common practice: the between-test of flying-pixel filters must spare surfaces seen at an angle); axial noise
of the gaussian model from Nguyen, Izadi & Lovell (2012).
"""
from __future__ import annotations

import numpy as np
import pytest

import protomine.ingest.depthedges as DE
from protomine.scenes.noise import StereoSensor, add_sensor_noise, axial_sigma, stereo_depth
from test_stereo_depth import _box_frame


@pytest.fixture(scope="module")
def box_frame():
    return _box_frame(160, 150.0, 0.6, 0.2)


def test_wide_test_catches_mixed_readings_of_active_stereo_edges_the_close_test_misses(box_frame, monkeypatch):
    fr, K = box_frame
    caught_wide, caught_close, n_mixed, wrong = 0, 0, 0, 0
    for seed in range(4):
        d = stereo_depth(fr, K.fx, np.random.default_rng(seed), StereoSensor(sigma_px=0.0, subpixel=0.0), dropout=0.0)
        mixed = (d > 0.41) & (d < 0.59)          # between the box top (0.4 m) and the table (0.6 m)
        flags = DE.flying_pixels(d)
        with monkeypatch.context() as m:
            m.setattr(DE, "WIDE_WINDOW", 0)
            close = DE.flying_pixels(d)
        n_mixed += mixed.sum()
        caught_wide += (flags & mixed).sum()
        caught_close += (close & mixed).sum()
        wrong += (flags & ~mixed & (d > 0)).sum()
    assert n_mixed > 100
    # measured: 0.94 with the wide test, 0.80 with the close one alone; 1 true reading flagged in 4 frames
    assert caught_wide / n_mixed >= 0.9
    assert caught_wide > caught_close
    assert wrong <= 4


def test_true_surfaces_are_not_flying(box_frame):
    fr, _ = box_frame
    # a box over a table with gaussian axial noise and no mixing: every reading is a true surface
    for seed in range(2):
        g, _ = add_sensor_noise(fr, np.random.default_rng(seed))
        assert (g > 0).sum() > 15000
        assert not DE.flying_pixels(g).any()                      # measured: none
    # a plane seen at an angle, 8 mm deeper per pixel along u (a 1.5 cm jump within two pixels on both sides of
    # every reading, so the wide window's between-test alone would flag it): its iso-depth column supports it
    rng = np.random.default_rng(0)
    z = 0.5 + 0.008 * np.arange(200)[None, :] * np.ones((150, 1))
    z = z + rng.standard_normal(z.shape) * axial_sigma(z)
    z[rng.random(z.shape) < 0.01] = 0.0
    assert not DE.flying_pixels(z).any()                          # measured: none


def test_steady_depth_at_takes_the_wide_test_too():
    rng = np.random.default_rng(3)
    d = 0.6 + 0.05 * rng.random((40, 50))
    d[10:30, 20:35] = 0.45                                        # a box in front
    band = np.zeros(d.shape, bool)
    band[10:30, 18:20] = True
    d[band] = 0.45 + 0.15 * rng.random(band.sum())                # a mixed band two pixels wide beside it
    d[(rng.random(d.shape) < 0.3) & band] = 0.0                   # with dropouts in it
    ref = DE.steady_depth(d)
    r, u = np.nonzero(np.ones(d.shape, bool))
    np.testing.assert_array_equal(DE.steady_depth_at(d, r, u), ref[r, u])
    sub = (r >= 8) & (r < 32) & (u >= 15) & (u < 25)
    np.testing.assert_array_equal(DE.steady_depth_at(d, r[sub], u[sub]), ref[r[sub], u[sub]])


def test_the_top_of_a_curved_rim_is_not_flying(monkeypatch):
    """A sphere seen from just above the table: its topmost readings lie between the sphere's front (nearer by
    more than the tolerance within two pixels) and the wall behind (farther), with few neighbours at their own
    depth in the 5x5 square, yet they are true surface: each has an adjacent neighbour at about its depth (the rim
    continues sideways).  Hand-worked geometry: a sphere of radius 4 cm at 0.6 m, 130 px focal length."""
    from protomine.scenes import shapes as S
    from protomine.scenes.render import Scene, SceneObject, look_at, render
    from protomine.capture import Intrinsics
    K = Intrinsics(160, 120, 130.0, 130.0, 79.5, 59.5)
    el = np.deg2rad(5.0)
    scene = Scene([SceneObject(S.box((0.45, 0.01, 0.5), (0, 0, 0.5)), 0.0, (0.0, 0.22), (0.8, 0.8, 0.75)),
                   SceneObject(S.sphere(0.04, (0, 0, 0.04)), 0.0, (0.0, -0.1), (0.3, 0.7, 0.3))],
                  table_half_extent=0.3)
    T = look_at(np.array([0.0, -0.6 * np.cos(el), 0.6 * np.sin(el)]), np.array([0, 0.05, 0.05]), np.array([0, 0, 1.0]))
    r = render(scene, K, T)
    d = r.depth.astype(np.float64)
    sphere = r.mask == 2
    assert sphere.sum() > 200
    with monkeypatch.context() as m:
        m.setattr(DE, "WIDE_WINDOW", 0)
        close = DE.flying_pixels(d)                 # the close test flags a few side-rim readings already
        m.setattr(DE, "WIDE_WINDOW", 5)
        m.setattr(DE, "WIDE_ADJACENT_SUPPORT", 9)
        unguarded = DE.flying_pixels(d)
    assert (unguarded & ~close & sphere).any()      # the 5x5 counts alone would flag the top of the rim
    np.testing.assert_array_equal(DE.flying_pixels(d)[sphere], close[sphere])


def _reference_flags(depth: np.ndarray) -> np.ndarray:
    """Both tests written from the module's definition, pixel by pixel, the image mirrored beyond its border as
    scipy.ndimage's mode 'reflect' does (numpy.pad 'symmetric')."""
    h, w = depth.shape
    p = np.pad(depth, 2, mode="symmetric")
    out = np.zeros(depth.shape, bool)
    for r in range(h):
        for u in range(w):
            d = depth[r, u]
            if d <= 0:
                continue
            tol = max(0.015, 0.03 * d)
            close = [p[r + 2 + i, u + 2 + j] for i in (-1, 0, 1) for j in (-1, 0, 1)]
            close = [q for q in close if q > 0]
            if d - min(close) > tol and max(close) - d > tol:
                out[r, u] = True
                continue
            nb = [(i, j, p[r + 2 + i, u + 2 + j]) for i in range(-2, 3) for j in range(-2, 3) if i or j]
            near = any(q > 0 and d - q > tol for _, _, q in nb)
            far = any(q > 0 and q - d > tol for _, _, q in nb)
            support = sum(q > 0 and abs(q - d) <= 0.5 * tol for _, _, q in nb)
            adjacent = sum(q > 0 and abs(q - d) <= 0.5 * tol for i, j, q in nb if abs(i) <= 1 and abs(j) <= 1)
            missing = sum(q <= 0 for _, _, q in nb)
            if adjacent == 0 and ((near and far and support < 4) or (near != far and support < 3 and missing >= 6)):
                out[r, u] = True
    return out


@pytest.mark.parametrize("seed", [0, 1])
def test_flags_equal_their_definition(seed, monkeypatch):
    rng = np.random.default_rng(seed)
    d = 0.6 + 0.1 * rng.random((30, 40))
    d[8:22, 10:25] = 0.45                                         # a box in front
    d[8:22, 7:10] = 0.45 + 0.15 * rng.random((14, 3))             # a mixed band beside it
    d[rng.random(d.shape) < 0.25] = 0.0
    assert (DE.WIDE_WINDOW, DE.SUPPORT_REL, DE.WIDE_SUPPORT_BOTH, DE.WIDE_SUPPORT_ONE, DE.WIDE_MISSING,
            DE.WIDE_ADJACENT_SUPPORT) == (5, 0.5, 4, 3, 6, 1)      # the values written into the reference
    ref = _reference_flags(d)
    assert ref.sum() > 10
    np.testing.assert_array_equal(DE.flying_pixels(d), ref)
    monkeypatch.setattr(DE, "WIDE_WINDOW", 0)
    assert (ref & ~DE.flying_pixels(d)).any()                    # the wide test flags readings of its own


@pytest.mark.parametrize("seed", [0, 1])
def test_steady_depth_at_equals_the_definition_at_scattered_pixels(seed):
    """The patch path (the wide test run only at the asked pixels, their patch mirrored where it meets the
    image border) against the pixel-by-pixel twin above: scattered pixel sets, sets in a corner, one pixel."""
    rng = np.random.default_rng(10 + seed)
    d = 0.6 + 0.1 * rng.random((26, 34))
    d[6:20, 12:26] = 0.45                                         # a box in front, its edges inside the image
    d[6:20, 9:12] = 0.45 + 0.15 * rng.random((14, 3))             # a mixed band beside it
    d[:5, :8] = 0.45 + 0.15 * rng.random((5, 8))                  # mixed readings in a corner (mirrored border)
    d[rng.random(d.shape) < 0.25] = 0.0
    ref = np.where(_reference_flags(d), 0.0, d)
    assert (ref != d).sum() > 10
    for r, u in [(rng.integers(0, 26, 150), rng.integers(0, 34, 150)),
                 (rng.integers(4, 22, 60), rng.integers(6, 16, 60)),
                 (rng.integers(0, 4, 20), rng.integers(0, 5, 20)),
                 (np.array([25, 0]), np.array([33, 0])), (np.array([12]), np.array([10]))]:
        np.testing.assert_array_equal(DE.steady_depth_at(d, r, u), ref[r, u])
