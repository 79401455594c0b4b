"""Fast paths of lifting and labelling against what they replace: the carving depth's flying-pixel test on a
patch (scipy.ndimage filters over the whole image as reference), lifting with a frame's flags computed once
(against lifting that tests the pixels it reads), the splat (a per-point, per-corner loop
from the trilinear definition in ``ingest.volume``'s docstring), the segmentation RLE (the image-sized mask
encoded by ``records.mask_to_rle``) and the batched face / pose reduction of the matcher (``faces.face_pose``
called once per prototype)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine.geometry import plane_basis
from protomine.ingest.depthedges import flying_pixels, steady_depth, steady_depth_at
from protomine.ingest.volume import Grid, ObjectFrame, View, _splat, lift
from protomine.mine.faces import face_poses
from protomine.mine.faces import face_pose
from protomine.mine.symmetry import group_elements
from protomine.records import mask_to_rle, pixels_to_rle


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_steady_depth_at_pixels_equals_the_whole_image_filter(seed):
    rng = np.random.default_rng(seed)
    h, w = 37, 53
    depth = 0.6 + 0.4 * rng.random((h, w))                     # rough surfaces: many flying readings
    depth[rng.random((h, w)) < 0.2] = 0.0
    depth[:, w // 2:] += 0.3                                    # a depth edge
    ref = steady_depth(depth)                                   # the whole image, mirrored beyond it (tests/test_depthedges.py checks it against its definition)
    assert (ref != depth).any()                                 # the test sees flying pixels at all
    corners = (np.array([0, h - 1, 0, h - 1]), np.array([0, w - 1, w - 1, 0]))
    for r, u in [corners, (rng.integers(0, h, 400), rng.integers(0, w, 400)),
                 (rng.integers(10, 20, 50), rng.integers(30, 40, 50)), (np.array([5]), np.array([7]))]:
        np.testing.assert_array_equal(steady_depth_at(depth, r, u), ref[r, u])
    assert steady_depth_at(depth, np.zeros(0, int), np.zeros(0, int)).shape == (0,)


def test_lifting_with_the_frames_flags_equals_testing_the_pixels_read():
    """A view given its frame's flying-pixel flags (``View.flying``, computed once a frame) lifts to the same
    volume, to the bit, as one that tests the pixels it reads; the flags matter (all-clear flags differ)."""
    from protomine.scenes.render import look_at
    from protomine.scenes.noise import StereoSensor, stereo_depth
    from test_stereo_depth import _box_frame
    fr, K = _box_frame(160, 150.0, 0.6, 0.2)
    depth = stereo_depth(fr, K.fx, np.random.default_rng(0), StereoSensor(sigma_px=0.0, subpixel=0.0), dropout=0.0)
    T = look_at(np.array([0.0, 0.0, 0.6]), np.zeros(3), np.array([0.0, 1.0, 0.0]))
    rgb = (fr.rgb * 255).astype(np.uint8)
    pix = np.flatnonzero((fr.mask.reshape(-1) > 0) & (depth.reshape(-1) > 0))
    frame = ObjectFrame(origin=np.zeros(3), up=np.array([0.0, 0.0, 1.0]), radius=0.09, height=0.2)
    grid = Grid(radial_bins=8, azimuth_bins=36, height_bins=8)
    flags = flying_pixels(depth)
    per_pixel = lift([View(depth, rgb, K.K, T, pix)], frame, grid)
    np.testing.assert_array_equal(lift([View(depth, rgb, K.K, T, pix, flags)], frame, grid), per_pixel)
    assert not np.array_equal(lift([View(depth, rgb, K.K, T, pix, np.zeros_like(flags))], frame, grid), per_pixel)


def _splat_reference(grid: Grid, frame: ObjectFrame, pts: np.ndarray, values: np.ndarray) -> np.ndarray:
    """From the definition: each point's weight shared among its 8 neighbouring cell centres by the trilinear
    weights in (rho, phi, z) bin coordinates; azimuth wraps, radius clamps to the edge bins, height drops
    what falls below the base or above the top, points beyond the rim radius are dropped."""
    R, A, H = grid.shape
    out = np.zeros((values.shape[1] + 1, R, A, H))
    B = plane_basis(frame.up)
    for p, val in zip(pts, values):
        x, y, z = B @ (p - frame.origin)
        fi = np.hypot(x, y) / (grid.radial_margin * frame.radius) * R - 0.5
        fj = (np.arctan2(y, x) % (2 * np.pi)) / (2 * np.pi) * A - 0.5
        fk = z / (grid.height_margin * frame.height) * H - 0.5
        if fi >= R:
            continue
        for di in (0, 1):
            for dj in (0, 1):
                for dk in (0, 1):
                    i, j, k = int(np.floor(fi)) + di, int(np.floor(fj)) + dj, int(np.floor(fk)) + dk
                    if not 0 <= k < H:
                        continue
                    wt = ((fi - np.floor(fi)) if di else 1 - (fi - np.floor(fi))) * \
                         ((fj - np.floor(fj)) if dj else 1 - (fj - np.floor(fj))) * \
                         ((fk - np.floor(fk)) if dk else 1 - (fk - np.floor(fk)))
                    cell = (min(max(i, 0), R - 1), j % A, k)
                    out[(0,) + cell] += wt
                    out[(slice(1, None),) + cell] += wt * val
    return out


def test_splat_equals_the_trilinear_definition():
    rng = np.random.default_rng(4)
    grid = Grid(radial_bins=4, azimuth_bins=12, height_bins=5)
    up = Rotation.random(random_state=5).apply([0.0, 0.0, 1.0])
    frame = ObjectFrame(origin=np.array([0.2, -0.1, 0.4]), up=up, radius=0.05, height=0.08)
    local = np.column_stack([rng.uniform(-0.07, 0.07, (300, 2)), rng.uniform(-0.01, 0.1, 300)])  # some outside
    pts = frame.origin + local @ plane_basis(up)
    vals = rng.random((300, 3))
    got = _splat(grid, frame, pts, vals)
    np.testing.assert_allclose(got, _splat_reference(grid, frame, pts, vals), rtol=1e-12, atol=1e-12)
    assert got[0].sum() > 0 and np.isclose(got[0].sum(), _splat_reference(grid, frame, pts, vals)[0].sum())


def test_pixels_to_rle_equals_the_mask_encoding():
    # worked example (COCO uncompressed RLE, column-major, first run counts zeros; from memory): a 2 x 3 image
    # with pixels (row 0, col 1) and (row 1, col 1) set -> columns read top to bottom: 0 0 | 1 1 | 0 0
    assert pixels_to_rle(np.array([1, 4]), 2, 3) == {"size": [2, 3], "counts": [2, 2, 2]}
    rng = np.random.default_rng(6)
    for _ in range(300):
        h, w = (int(x) for x in rng.integers(1, 9, 2))
        pix = rng.integers(0, h * w, rng.integers(0, 2 * h * w + 1))   # duplicates, empty, full
        mask = np.zeros(h * w, bool)
        mask[pix] = True
        assert pixels_to_rle(pix, h, w) == mask_to_rle(mask.reshape(h, w))


def test_batched_face_poses_equal_face_pose_per_prototype():
    rng = np.random.default_rng(7)
    n, K, F = 20, 6, 3
    R = Rotation.random(n * K, random_state=8).as_matrix().reshape(n, K, 3, 3)
    face_up = Rotation.random(K * F, random_state=9).apply([0.0, 0.0, 1.0]).reshape(K, F, 3)
    face_sym = rng.choice([0, 1, 2, 4], (K, F))
    face_sym[1, 2] = face_sym[4, 1:] = -1                         # padding
    flip = Rotation.from_rotvec([np.pi, 0.0, 0.0]).as_matrix()     # a symmetry that moves up
    groups = [group_elements(np.eye(3)[None], c) for c in (1, 0, 3)] + \
             [group_elements(np.stack([np.eye(3), flip]), c) for c in (1, 2, 6)]
    face, rot, yaw = face_poses(R, face_up, face_sym, groups)
    for k in range(K):
        f_ref, r_ref, y_ref = face_pose(R[:, k], face_up[k], face_sym[k], groups[k])
        np.testing.assert_array_equal(face[:, k], f_ref)
        np.testing.assert_allclose(rot[:, k], r_ref, atol=1e-12)
        np.testing.assert_allclose(yaw[:, k], y_ref, atol=1e-9)


def _stereo_box(seed: int, eye: np.ndarray):
    """A rendered box seen from ``eye`` with active-stereo depth (tests/test_stereo_depth.py's frame): depth, rgb
    (uint8), intrinsics, cam_to_world, the box's pixels with a reading and the frame's flying-pixel flags."""
    from protomine.scenes.render import look_at
    from protomine.scenes.noise import StereoSensor, stereo_depth
    from test_stereo_depth import _box_frame
    fr, K = _box_frame(160, 150.0, 0.6, 0.2)
    depth = stereo_depth(fr, K.fx, np.random.default_rng(seed), StereoSensor(sigma_px=0.5, subpixel=0.1), dropout=0.02)
    T = look_at(eye, np.zeros(3), np.array([0.0, 1.0, 0.0]))
    pix = np.flatnonzero((fr.mask.reshape(-1) > 0) & (depth.reshape(-1) > 0))
    return depth, (fr.rgb * 255).astype(np.uint8), K, T, pix, flying_pixels(depth)


def test_lifting_objects_together_equals_lifting_each():
    """``lift_many`` (a frame's objects' splats and sums done together) gives each object the volume ``lift`` gives
    it alone, to the bit: objects of different sizes and places, one with no points, one seen twice; and the 75th
    percentile it takes of the splat weights is numpy's ``np.percentile(x, 75)`` (reference), float for float."""
    from protomine.ingest.volume import _percentile75, lift_many
    depth, rgb, K, T, pix, flags = _stereo_box(0, np.array([0.0, 0.0, 0.6]))
    grid = Grid(radial_bins=8, azimuth_bins=36, height_bins=8)
    objects = [([View(depth, rgb, K.K, T, pix[::k], flags)],
                ObjectFrame(origin=np.array([0.01 * k, -0.005 * k, 0.0]), up=plane_basis(np.array([0.05 * k, 0.0, 1.0]))[2],
                            radius=0.07 + 0.01 * k, height=0.15 + 0.02 * k)) for k in (1, 2, 3)]
    objects.append(([View(depth, rgb, K.K, T, pix[:0], flags)], objects[0][1]))                 # no points
    objects.append(([View(depth, rgb, K.K, T, pix[::2], flags), View(depth, rgb, K.K, T, pix[1::2])], objects[1][1]))
    together = lift_many(objects, grid)
    for (views, frame), vol in zip(objects, together):
        np.testing.assert_array_equal(vol, lift(views, frame, grid))
    assert not np.array_equal(together[0], together[1])
    rng = np.random.default_rng(0)
    for n in list(range(1, 40)) + [257, 1000, 3455]:
        x = rng.exponential(size=n) * rng.integers(0, 3, n)                                     # ties and zeros
        assert _percentile75(x) == np.percentile(x, 75)


@pytest.mark.parametrize("options", [{}, {"carve_to_plane": True}, {"others_unseen": True}, {"others_free": True},
                                     {"unread_min_surface": 0.3, "carve_to_plane": True, "others_unseen": True}])
def test_reading_a_frames_objects_together_equals_reading_each(options):
    """The views of one frame read together (``volume._read_views``: every object's cells and points in one set of
    array operations, their cell centres in one product for objects on one plane, ``_cell_centres_many``) lift each
    object to the volume ``lift`` gives it alone, to the bit: objects on one plane of different sizes and places,
    one with one point, one with none, with the pixels other objects hold (``View.others``) for the options that
    read them."""
    from protomine.ingest.volume import lift_many
    depth, rgb, K, T, pix, flags = _stereo_box(1, np.array([0.0, 0.1, 0.6]))
    grid = Grid(radial_bins=6, azimuth_bins=24, height_bins=8, **options)
    up = plane_basis(np.array([0.02, -0.03, 1.0]))[2]
    parts = [pix[::3], pix[1::3], pix[2::5], pix[:1], pix[:0]]
    held = np.zeros(depth.size, np.int32)
    for p in parts:
        np.add.at(held, p, 1)
    def view(p):
        theirs = held.copy()
        theirs[p] -= 1
        return View(depth, rgb, K.K, T, p, flags, theirs > 0)
    objects = [([view(p)], ObjectFrame(origin=np.array([0.01 * k, -0.004 * k, 0.0]), up=up, radius=0.06 + 0.01 * k,
                                       height=0.12 + 0.03 * k)) for k, p in enumerate(parts)]
    together = lift_many(objects, grid)
    for (views, frame), vol in zip(objects, together):
        np.testing.assert_array_equal(vol, lift(views, frame, grid))
    assert not np.array_equal(together[0], together[1])
    assert together[3][2].any() and not np.array_equal(together[3], together[4])   # one point: seen cells, a volume of its own
