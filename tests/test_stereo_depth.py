"""The active-stereo depth model of the demo renderer, checked against its own published formulas.

Sources: Khoshelham & Elberink (2012), "Accuracy and resolution of Kinect depth data for indoor mapping
applications", Sensors 12(2): depth from disparity z = f b / d, so a disparity step s gives depth levels
z^2 s / (f b) apart and a disparity error sigma_d gives a depth error z^2 sigma_d / (f b) (first-order error
propagation).  Projector shadows: a rectified camera/projector pair at baseline b along x; a point at depth
z is lit from projector column u - f b / z, so an edge at depth z_near over a surface at z_far hides a band
f b (1/z_near - 1/z_far) pixels wide on the side away from the projector (hand-worked geometry).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from protomine.capture import Intrinsics, read_capture
from protomine.scenes import shapes as S
from protomine.scenes.noise import StereoSensor, projector_shadow, stereo_depth
from protomine.scenes.render import Render, Scene, SceneObject, look_at, render
from protomine.scenes.scenario import generate_scenario

QUIET = dict(edge_dropout=0.0, edge_flying=0.0)   # no edge effects: the formulas below are about the rest


def _flat_render(depth: np.ndarray) -> Render:
    """A synthetic frame: the given depth (H, W), facing the camera (cos incidence 1), grey."""
    h, w = depth.shape
    return Render(depth.astype(np.float32), np.full((h, w, 3), 0.5, np.float32), np.zeros((h, w), np.int32),
                  np.zeros((h, w, 3), np.float32), np.ones((h, w), np.float32))


@pytest.mark.parametrize("z0", [1.0, 2.5])
def test_depth_terraces_are_z_squared_step_over_f_b(z0):
    sensor = StereoSensor(sigma_px=0.0, **QUIET)
    # a gentle ramp of depth along the rows (constant along each row: no shadow, no depth edge)
    rows = np.linspace(z0 - 0.05 * z0, z0 + 0.05 * z0, 400)
    fr = _flat_render(np.repeat(rows[:, None], 8, axis=1))
    d = stereo_depth(fr, 300.0, np.random.default_rng(0), sensor, dropout=0.0)
    levels = np.unique(np.round(d[d > 0], 9))
    gaps = np.diff(levels)
    mids = 0.5 * (levels[1:] + levels[:-1])
    # Khoshelham & Elberink 2012: resolution z^2 s / (f b); for the first Kinect about 7 cm at 5 m
    want = mids ** 2 * (1 / 8) / (580.0 * 0.075)
    np.testing.assert_allclose(gaps, want, rtol=0.01)
    assert len(levels) >= 5
    np.testing.assert_allclose(sensor.terrace_m(5.0), 0.07, rtol=0.05)   # "about 7 cm at 5 m" (from memory)


def test_depth_noise_grows_with_z_squared():
    sensor = StereoSensor(subpixel=0.0, **QUIET)
    rng = np.random.default_rng(1)
    stds = []
    for z0 in (1.0, 3.0):
        d = stereo_depth(_flat_render(np.full((200, 200), z0)), 300.0, rng, sensor, dropout=0.0)
        stds.append(d[d > 0].std())
    # first-order propagation of sigma_d through z = f b / d: sigma_z = z^2 sigma_d / (f b)
    want = np.array([1.0, 9.0]) * 0.07 / (580.0 * 0.075)
    np.testing.assert_allclose(stds, want, rtol=0.05)
    # the paper's figure (from memory): about 4 cm at the 5 m end of the range
    assert 0.03 < 25.0 * 0.07 / (580.0 * 0.075) < 0.05


def _box_frame(width: int, f: float, cam_height: float, box_height: float) -> tuple[Render, Intrinsics]:
    K = Intrinsics(width, width * 3 // 4, f, f, (width - 1) / 2, (width * 3 // 4 - 1) / 2)
    T = look_at(np.array([0.0, 0.0, cam_height]), np.zeros(3), np.array([0.0, 1.0, 0.0]))
    scene = Scene([SceneObject(S.box((0.05, 0.05, box_height / 2), (0.0, 0.0, box_height / 2)), 0.0, (0.0, 0.0),
                               (0.5, 0.5, 0.5))])
    return render(scene, K, T), K


@pytest.fixture(scope="module")
def box_frame():
    return _box_frame(160, 150.0, 0.6, 0.2)


def test_shadow_beside_a_box_is_f_b_times_inverse_depth_difference(box_frame):
    fr, K = box_frame
    b = 0.075
    shadow = projector_shadow(fr.depth, K.fx, b)
    want = K.fx * b * (1 / (0.6 - 0.2) - 1 / 0.6)         # 9.375 px (hand-worked)
    box_rows = np.flatnonzero((fr.mask > 0).sum(1) > 10)[5:-5]
    assert len(box_rows) > 20
    for r in box_rows:
        cols = np.flatnonzero(fr.mask[r] > 0)
        left = shadow[r, :cols[0]]
        # the band touches the box on the side away from the projector (camera -x) and nowhere else
        assert abs(left.sum() - want) <= 1.0
        assert left[cols[0] - int(want) + 1:].all()
        assert not shadow[r, cols[-1] + 1:].any() and not shadow[r, cols].any()
    # stereo depth has no reading there (edge effects off), and its own readings elsewhere
    d = stereo_depth(fr, K.fx, np.random.default_rng(0), StereoSensor(**QUIET), dropout=0.0)
    assert (d[shadow] == 0).all()
    assert (d[(fr.depth > 0) & ~shadow] > 0).mean() > 0.99


def test_depth_edges_drop_readings_and_leave_flying_pixels_only_there(box_frame):
    fr, K = box_frame
    sensor = StereoSensor(sigma_px=0.0, subpixel=0.0)
    d = stereo_depth(fr, K.fx, np.random.default_rng(2), sensor, dropout=0.0)
    valid = fr.depth > 0
    shadow = projector_shadow(fr.depth, K.fx, sensor.baseline_m)
    # readings strictly between the box top (0.4 m) and the table (0.6 m) can only be flying pixels
    flying = (d > 0.41) & (d < 0.59)
    lost = valid & ~shadow & (d == 0)
    assert flying.sum() > 10 and lost.sum() > 10
    # within half a 9-pixel matching window (scaled to this image) of the box outline, nowhere else
    from scipy.ndimage import binary_dilation
    half = max(1, round(4 * K.fx / sensor.focal_px))
    outline = binary_dilation(fr.mask > 0, np.ones((3, 3), bool)) & ~binary_dilation(fr.mask == 0, np.ones((3, 3), bool)) | \
        (binary_dilation(fr.mask > 0, np.ones((3, 3), bool)) & (fr.mask == 0)) | shadow
    near_edge = binary_dilation(outline, np.ones((2 * half + 3,) * 2, bool))
    assert not (flying & ~near_edge).any() and not (lost & ~near_edge).any()


def test_scenario_stereo_captures_share_scenes_with_gaussian_ones(tmp_path):
    kw = dict(n_mining=2, n_single=0, frames=2, width=80, height=60, seed=4)
    generate_scenario(tmp_path / "g", **kw)
    doc = generate_scenario(tmp_path / "m", stereo_fraction=0.5, **kw)
    assert doc["depth_model"] == {"mine_000": "gaussian", "mine_001": "stereo"}
    assert json.loads((tmp_path / "m" / "scenario.json").read_text())["depth_model"]["mine_001"] == "stereo"
    for name, same_depth in (("mine_000", True), ("mine_001", False)):
        g, m = read_capture(tmp_path / "g" / name), read_capture(tmp_path / "m" / name)
        for fg, fm in zip(g.frames, m.frames):
            np.testing.assert_array_equal(fg.cam_to_world, fm.cam_to_world)
            np.testing.assert_array_equal(g.rgb(fg.id), m.rgb(fm.id))
            assert np.array_equal(g.depth(fg.id), m.depth(fm.id)) == same_depth


def test_lifting_leaves_flying_pixels_unobserved_not_free(box_frame):
    """A reading halfway between the box top and the table (a flying pixel) is neither surface nor free
    space: the cells that project onto it are unobserved, as they are where the reading is missing."""
    from protomine.geometry import world_to_pixel
    from protomine.ingest.volume import Grid, ObjectFrame, View, cell_centres, lift
    fr, K = box_frame
    T = look_at(np.array([0.0, 0.0, 0.6]), np.zeros(3), np.array([0.0, 1.0, 0.0]))
    depth = fr.depth.astype(np.float64)
    cols = np.flatnonzero((fr.mask > 0).any(axis=0))
    rows = np.flatnonzero(fr.mask[:, cols[0]] > 0)
    mixed = depth.copy()
    mixed[rows, cols[0] - 1] = 0.5                   # mixed readings along the box's left edge
    missing = depth.copy()
    missing[rows, cols[0] - 1] = 0.0
    grid = Grid(radial_bins=8, azimuth_bins=36, height_bins=8)
    frame = ObjectFrame(origin=np.zeros(3), up=np.array([0.0, 0.0, 1.0]), radius=0.09, height=0.2)
    rgb = (fr.rgb * 255).astype(np.uint8)
    pix = np.flatnonzero(fr.mask.reshape(-1) > 0)
    vol_mixed = lift([View(mixed, rgb, K.K, T, pix)], frame, grid)
    vol_missing = lift([View(missing, rgb, K.K, T, pix)], frame, grid)
    uv, _ = world_to_pixel(cell_centres(grid, frame).reshape(-1, 3), T, K.K)
    u, v = np.rint(uv[:, 0]).astype(int), np.rint(uv[:, 1]).astype(int)
    on_column = (u == cols[0] - 1) & np.isin(v, rows)
    assert on_column.sum() >= 4
    np.testing.assert_array_equal(vol_mixed[2].reshape(-1)[on_column], vol_missing[2].reshape(-1)[on_column])
    assert (vol_mixed[1].reshape(-1)[on_column] == 0).all()          # no free space in front of it


def test_cells_without_a_reading_are_observed_only_through_real_surface(box_frame):
    """Beside the box a band of pixels has no reading (a projector shadow).  The cells there that only the
    trilinear spill of the box's own points reaches are unobserved with ``unread_min_surface`` set (nothing
    says whether they are empty), observed but not free without it; the box's surface cells are the same either
    way (hand-worked geometry: camera straight above the box)."""
    from dataclasses import replace
    from protomine.geometry import world_to_pixel
    from protomine.ingest.volume import Grid, ObjectFrame, View, cell_centres, lift
    fr, K = box_frame
    T = look_at(np.array([0.0, 0.0, 0.6]), np.zeros(3), np.array([0.0, 1.0, 0.0]))
    depth = fr.depth.astype(np.float64)
    cols = np.flatnonzero((fr.mask > 0).any(axis=0))
    rows = np.flatnonzero(fr.mask[:, cols[0]] > 0)
    depth[rows[0]:rows[-1] + 1, cols[0] - 8:cols[0]] = 0.0          # the shadow band left of the box
    grid = Grid(radial_bins=8, azimuth_bins=36, height_bins=8)
    frame = ObjectFrame(origin=np.zeros(3), up=np.array([0.0, 0.0, 1.0]), radius=0.09, height=0.2)
    rgb = (fr.rgb * 255).astype(np.uint8)
    pix = np.flatnonzero(fr.mask.reshape(-1) > 0)
    plain = lift([View(depth, rgb, K.K, T, pix)], frame, grid).reshape(6, -1)
    strict = lift([View(depth, rgb, K.K, T, pix)], frame, replace(grid, unread_min_surface=0.5)).reshape(6, -1)
    uv, _ = world_to_pixel(cell_centres(grid, frame).reshape(-1, 3), T, K.K)
    u, v = np.rint(uv[:, 0]).astype(int), np.rint(uv[:, 1]).astype(int)
    inside = (u >= 0) & (u < depth.shape[1]) & (v >= 0) & (v < depth.shape[0])
    unread = np.zeros(len(u), bool)
    unread[inside] = depth[v[inside], u[inside]] == 0
    spill = unread & (plain[2] > 0) & (plain[0] < 0.5)
    assert spill.sum() >= 4                                          # the case exists without the setting
    assert (plain[1][spill] == 0).all()                              # ... observed there, never free
    assert (strict[2][spill] == 0).all()                             # with it: unobserved
    solid = plain[0] >= 0.5
    assert solid.sum() > 20
    np.testing.assert_array_equal(strict[:, solid], plain[:, solid])
    assert (strict[2][~unread] == plain[2][~unread]).all()           # cells with a reading: as before
