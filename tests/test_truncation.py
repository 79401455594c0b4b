"""Where a single view cuts its object off (``ingest.truncation``) and the frames moved toward the cut
(``ingest.proposals.shifted_frames``).  Invented images and footprints; the expected figures are plane geometry
worked out by hand (from memory: the mean unit direction of points spread symmetrically about a bisector points
along it; a circle about c holds a point set when its radius is at least the farthest point's distance)."""
from __future__ import annotations

import numpy as np

from protomine.ingest.proposals import centre_candidates, shifted_frames
from protomine.ingest.truncation import BORDER_PX, NEIGHBOUR_PX, cut_direction, cut_pixels, view_cut
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


def _down_camera(height: float, f: float, W: int, H: int):
    """A pinhole camera ``height`` m above the origin looking straight down (camera x = world x, camera y = world -y,
    forward = world -z), pixel centres at integer coordinates (cx = (W - 1) / 2)."""
    K = np.array([[f, 0.0, (W - 1) / 2], [0.0, f, (H - 1) / 2], [0.0, 0.0, 1.0]])
    c2w = np.eye(4)
    c2w[:3, :3] = np.diag([1.0, -1.0, -1.0])
    c2w[:3, 3] = [0.0, 0.0, height]
    return K, c2w


def test_view_cut_hides_what_projects_outside_the_image_or_behind_a_nearer_object():
    # pinhole projection worked out by hand (from memory: u = f X / Z + cx, v = f Y / Z + cy, Z the depth along
    # the optical axis); the sensor spans u, v in [-0.5, W - 0.5), [-0.5, H - 0.5)
    W, H, f, cam_h = 40, 30, 50.0, 1.0
    K, c2w = _down_camera(cam_h, f, W, H)
    depth = np.full((H, W), cam_h)
    others = np.zeros((H, W), bool)
    others[:, 30:] = True                       # another object's pixels at columns 30.. (u >= 29.5) ...
    depth[:, 30:] = 0.8                         # ... 0.2 m above the table, nearer the camera
    ours = _block(H, W, 10, 20, 0, 10)          # ours runs off the left border: cut
    vc = view_cut(depth, K, c2w, ours, others.reshape(-1), np.zeros(3), np.array([0.0, 0.0, 1.0]), 0.1, 0.05)
    assert vc is not None
    x_left = -(W / 2) / f * cam_h                # u = -0.5 at depth 1: X = (-0.5 - cx) Z / f = -0.4 m
    x_other = (29.5 - (W - 1) / 2) / f * cam_h   # u = 29.5: X = 0.2 m
    pts = np.array([[x_left - 0.01, 0.0, 0.0],   # left of the image: hidden
                    [x_left + 0.01, 0.0, 0.0],   # just inside: seen
                    [x_other + 0.01, 0.0, 0.0],  # on the other object's pixels, below its reading: hidden
                    [x_other - 0.01, 0.0, 0.0],  # just beside it: seen
                    [0.0, 0.0, 1.5]])            # behind the camera: hidden
    assert vc.hidden(pts).tolist() == [True, False, True, False, True]
    # a point in front of the other object is seen: 0.85 m up (depth 0.15 m) at X = 0.04 m projects to
    # u = 50 x 0.04 / 0.15 + 19.5 = 32.8, a pixel of the other object, whose reading (0.8 m) lies behind it
    assert not vc.hidden(np.array([[0.04, 0.0, 0.85]]))[0]
    assert view_cut(depth, K, c2w, _block(H, W, 10, 20, 12, 20), others.reshape(-1), np.zeros(3),
                    np.array([0.0, 0.0, 1.0]), 0.1, 0.05) is None   # wholly in view, beside no nearer object
