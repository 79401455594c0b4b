"""Where a single view cuts its object off (``ingest.truncation``) and the frames moved toward the cut
(``ingest.proposals.shifted_frames``).  Invented images and footprints; the expected figures are plane geometry
worked out by hand (from memory: the mean unit direction of points spread symmetrically about a bisector points
along it; a circle about c holds a point set when its radius is at least the farthest point's distance)."""
from __future__ import annotations

import numpy as np

from protomine.ingest.proposals import centre_candidates, shifted_frames
from protomine.ingest.truncation import BORDER_PX, NEIGHBOUR_PX, cut_direction, cut_pixels
from protomine.ingest.volume import ObjectFrame


def _block(H, W, r0, r1, c0, c1):
    rr, cc = np.mgrid[r0:r1, c0:c1]
    return (rr * W + cc).reshape(-1)


def test_pixels_at_the_image_border_are_on_the_cut_and_inner_ones_not():
    H, W = 40, 60
    depth = np.full((H, W), 1.0)
    pix = _block(H, W, 10, 20, 50, W)          # runs off the right border
    cut = cut_pixels(pix, depth, None)
    cols = pix % W
    assert np.array_equal(cut, cols >= W - BORDER_PX)
    inner = _block(H, W, 10, 20, 20, 30)
    assert not cut_pixels(inner, depth, None).any()


def test_a_nearer_neighbour_cuts_the_pixels_beside_it_and_a_farther_one_does_not():
    H, W = 40, 60
    pix = _block(H, W, 10, 20, 20, 30)          # ours at 1.0 m
    other = np.zeros((H, W), bool)
    other[10:20, 30:36] = True                   # a neighbour just right of it
    for d_other, expect in ((0.8, True), (1.3, False)):
        depth = np.full((H, W), 2.0)
        depth.reshape(-1)[pix] = 1.0
        depth[other] = d_other
        cut = cut_pixels(pix, depth, other)
        cols = pix % W
        want = (cols >= 30 - NEIGHBOUR_PX) if expect else np.zeros(len(pix), bool)
        assert np.array_equal(cut, want), d_other


def test_cut_direction_points_at_the_cut_side_and_is_none_when_cut_all_round():
    up = np.array([0.0, 0.0, 1.0])
    ang = np.linspace(0, 2 * np.pi, 72, endpoint=False)
    pts = np.stack([0.05 * np.cos(ang), 0.05 * np.sin(ang), np.full_like(ang, 0.01)], axis=1)
    origin = np.zeros(3)
    for theta in np.deg2rad([0.0, 60.0, 150.0]):   # the arc of cut points about theta (on the 5-degree sampling)
        cut = np.cos(ang - theta) > 0.7
        d = cut_direction(pts, cut, origin, up)
        assert d is not None and abs(d @ up) < 1e-9
        assert np.allclose(d, [np.cos(theta), np.sin(theta), 0.0], atol=1e-6)
    assert cut_direction(pts, np.ones(len(pts), bool), origin, up) is None     # cut on every side
    assert cut_direction(pts, np.zeros(len(pts), bool), origin, up) is None    # not cut


def test_shifted_frames_move_the_centre_and_still_hold_the_footprint():
    up = np.array([0.0, 0.0, 1.0])
    rng = np.random.default_rng(0)
    xy = rng.uniform(-0.04, 0.04, (400, 2))
    pts = np.concatenate([xy, np.full((400, 1), 0.02)], axis=1)
    frame = ObjectFrame(origin=np.zeros(3), up=up, radius=0.057, height=0.04)
    d = np.array([0.6, 0.8, 0.0])
    out = shifted_frames(pts, frame, d, (0.0, 0.25, 0.5))
    assert out[0] is frame
    for o, f in zip((0.25, 0.5), out[1:]):
        assert np.allclose(f.origin, o * frame.radius * d)
        far = np.max(np.linalg.norm(xy - f.origin[:2], axis=1))
        assert f.radius >= far - 1e-12 and f.radius >= frame.radius and f.height == frame.height
    # centre_candidates is shifted_frames away from the camera
    cam = np.array([-1.0, 0.0, 0.5])
    a = centre_candidates(pts, frame, cam, (0.0, 0.5))
    b = shifted_frames(pts, frame, np.array([1.0, 0.0, 0.0]), (0.0, 0.5))
    assert np.allclose(a[1].origin, b[1].origin) and np.isclose(a[1].radius, b[1].radius)
