"""Ingest: yaw equivariance of volumes, multi-view fusion, proposals without masks, store updates."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine.capture import Intrinsics, read_capture, write_capture
from protomine.config import load_config
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.proposals import find_objects
from protomine.ingest.sharded import open_store
from protomine.ingest.volume import Grid, lift
from protomine.scenes import shapes as S
from protomine.scenes.render import Scene, SceneObject, look_at, render

W, H = 160, 120


def _lshape(h=0.02):
    return S.union(S.box((0.06, 0.015, h), (0.03, 0.0, h)), S.box((0.015, 0.04, h), (-0.015, 0.04, h)))


def _capture(path, objs, *, n_frames=8, world_seed=0, elevation=45.0):
    I = Intrinsics(W, H, 150.0, 150.0, (W - 1) / 2, (H - 1) / 2)
    scene = Scene([SceneObject(sh, yaw, pos, col) for sh, yaw, pos, col in objs])
    Tw = np.eye(4)
    Tw[:3, :3] = Rotation.random(random_state=world_seed).as_matrix()   # arbitrary world frame
    Tw[:3, 3] = np.random.default_rng(world_seed).normal(size=3)
    frames = []
    for i in range(n_frames):
        a, el, d = 2 * np.pi * i / n_frames + 0.3, np.deg2rad(elevation), 0.7
        eye = np.array([d * np.cos(el) * np.cos(a), d * np.cos(el) * np.sin(a), d * np.sin(el)])
        r = render(scene, I, look_at(eye, np.zeros(3), np.array([0, 0, 1.0])))
        frames.append(dict(id=f"{i:06d}", cam_to_world=Tw @ look_at(eye, np.zeros(3), np.array([0, 0, 1.0])),
                           rgb=(np.clip(r.rgb, 0, 1) * 255).astype(np.uint8), depth_m=r.depth, mask=r.mask))
    write_capture(path, intrinsics=I, depth_scale=1000.0, frames=frames)
    return Tw


@pytest.fixture(scope="module")
def cfg():
    return load_config("fast")


@pytest.mark.parametrize("d", [50.0, 130.0])
def test_yaw_rotation_is_a_cyclic_shift_of_the_volume(tmp_path, cfg, d):
    grid = Grid.from_config(cfg)
    vols = []
    for name, yaw in (("a", 20.0), ("b", 20.0 + d)):
        _capture(tmp_path / name, [(_lshape(), yaw, (0.0, 0.0), (0.8, 0.3, 0.2))], world_seed=3)
        scene = find_objects(read_capture(tmp_path / name), cfg, np.random.default_rng(0))
        (p,) = scene.proposals
        vols.append(lift(scene.views(p), p.frame, grid))
    a, b = vols[0][0], vols[1][0]
    A = grid.azimuth_bins
    corr = [np.sum(a * np.roll(b, -s, axis=1)) for s in range(A)]
    shift = int(np.argmax(corr))
    expected = d / (360.0 / A)
    err = min(abs(shift - expected), A - abs(shift - expected))
    assert err <= 1.0, (shift, expected)


def test_fusion_covers_more_than_any_single_view_and_views_are_subsets(tmp_path, cfg):
    grid = Grid.from_config(cfg)
    _capture(tmp_path / "c", [(S.cylinder(0.04, 0.12), 10.0, (0.0, 0.0), (0.8, 0.3, 0.2))], world_seed=5)
    scene = find_objects(read_capture(tmp_path / "c"), cfg, np.random.default_rng(0))
    (p,) = scene.proposals
    fused = lift(scene.views(p), p.frame, grid)
    fused_obs = fused[2] > 0
    surface = fused[0] > 0.5                       # the object's own cells, as the fused views see them
    single_vols = [lift(scene.views(p, [fid]), p.frame, grid) for fid in p.pixels]
    singles = [v[2] > 0 for v in single_vols]
    # coverage of the object: fraction of its surface cells on which a view put surface evidence
    best_single = max((v[0][surface] > 0.5).mean() for v in single_vols)
    assert best_single < 0.7, best_single
    for s in singles:   # a single view observes a subset of what the fused views observe
        assert (s & ~fused_obs).sum() == 0


def test_proposals_without_masks_find_the_masked_objects(tmp_path, cfg):
    objs = [(_lshape(), 30.0, (0.1, 0.0), (0.8, 0.2, 0.2)), (S.cylinder(0.04, 0.08), 0.0, (-0.12, 0.05), (0.2, 0.3, 0.8)),
            (S.sphere(0.035, (0, 0, 0.035)), 0.0, (0.0, -0.15), (0.3, 0.7, 0.3))]
    _capture(tmp_path / "c", objs, world_seed=7)
    cap = read_capture(tmp_path / "c")
    with_m = find_objects(cap, cfg, np.random.default_rng(0), use_masks=True)
    without = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
    assert len(with_m.proposals) == len(without.proposals) == 3
    cm = np.array([p.center_world for p in with_m.proposals])
    cw = np.array([p.center_world for p in without.proposals])
    d = np.linalg.norm(cm[:, None] - cw[None], axis=2).min(axis=1)
    assert np.all(d < 0.01)
    # the cylinder's footprint radius and height are measured within 5 mm
    cyl = min(with_m.proposals, key=lambda p: np.linalg.norm(p.frame.radius - 0.04) + abs(p.frame.height - 0.08))
    assert abs(cyl.frame.radius - 0.04) < 0.005 and abs(cyl.frame.height - 0.08) < 0.005


def test_store_replaces_reingested_capture_and_keeps_others_bit_identical(tmp_path, cfg):
    _capture(tmp_path / "a", [(_lshape(), 10.0, (0.0, 0.0), (0.8, 0.3, 0.2))], n_frames=3, world_seed=1)
    _capture(tmp_path / "b", [(S.cylinder(0.04, 0.08), 0.0, (0.05, 0.0), (0.2, 0.3, 0.8))], n_frames=3, world_seed=2)
    store = tmp_path / "objects.h5"
    ingest_captures([tmp_path / "a"], store, cfg)
    ingest_captures([tmp_path / "b"], store, cfg)
    s1 = open_store(store)
    assert sorted(s1.ids) == ["a/1", "b/1"]
    vol_a = s1.read_volumes(s1.index_of("a/1"), s1.index_of("a/1") + 1)
    res = ingest_captures([tmp_path / "b"], store, cfg)
    assert res["store"] == {"kept": 1, "replaced": 1, "added": 1}
    s2 = open_store(store)
    assert sorted(s2.ids) == ["a/1", "b/1"]
    assert np.array_equal(vol_a, s2.read_volumes(s2.index_of("a/1"), s2.index_of("a/1") + 1))
    assert len(s2.captures["name"]) == 2
    assert np.all(s2.captures["plane_residual_m"] < 0.003)
    assert not [p for p in tmp_path.iterdir() if ".tmp-" in p.name]


def test_flying_pixels_at_depth_edges_do_not_inflate_the_object(tmp_path, cfg):
    # real sensors average foreground and background at depth edges, and masks often include those pixels
    # (common practice: drop readings lying between their neighbours); build that on a rendered cylinder
    from PIL import Image
    from scipy.ndimage import binary_dilation
    _capture(tmp_path / "c", [(S.cylinder(0.04, 0.08), 0.0, (0.0, 0.0), (0.2, 0.3, 0.8))], world_seed=4)
    for p in sorted((tmp_path / "c" / "depth").glob("*.png")):
        depth = np.asarray(Image.open(p)).astype(np.int64)
        mpath = tmp_path / "c" / "masks" / p.name
        mask = np.asarray(Image.open(mpath)).astype(np.int64)
        ring = binary_dilation(mask > 0, iterations=1) & (mask == 0) & (depth > 0)
        fg = np.where(mask > 0, depth, 0).max()
        depth[ring] = (depth[ring] + fg) // 2            # halfway between the object and what lies behind
        mask = np.where(ring, mask.max(), mask)           # and the sloppy mask claims them
        Image.fromarray(depth.astype(np.uint16)).save(p)
        Image.fromarray(mask.astype(np.uint16)).save(mpath)
    scene = find_objects(read_capture(tmp_path / "c"), cfg, np.random.default_rng(0))
    (p,) = scene.proposals
    assert abs(p.frame.radius - 0.04) < 0.006 and abs(p.frame.height - 0.08) < 0.006


def _shelf_capture(path, *, board: float, elevation: float, wall_h: float):
    """A shelf-like capture: a back wall (a long, tall box) behind three objects, seen from the front only."""
    I = Intrinsics(W, H, 130.0, 130.0, (W - 1) / 2, (H - 1) / 2)
    objs = [(S.box((0.45, 0.01, wall_h), (0, 0, wall_h)), 0.0, (0.0, 0.22), (0.8, 0.8, 0.75)),
            (S.cylinder(0.04, 0.1), 0.0, (-0.12, 0.05), (0.2, 0.3, 0.8)),
            (S.box((0.05, 0.03, 0.04), (0, 0, 0.04)), 30.0, (0.1, 0.0), (0.8, 0.2, 0.2)),
            (S.sphere(0.04, (0, 0, 0.04)), 0.0, (0.0, -0.1), (0.3, 0.7, 0.3))]
    scene = Scene([SceneObject(sh, yaw, pos, col) for sh, yaw, pos, col in objs], table_half_extent=board)
    Tw = np.eye(4)
    Tw[:3, :3] = Rotation.random(random_state=0).as_matrix()
    frames = []
    for i in range(5):
        a, el, d = np.deg2rad(-90 + (i - 2) * 15), np.deg2rad(elevation), 0.6
        T = look_at(np.array([d * np.cos(el) * np.cos(a), d * np.cos(el) * np.sin(a), d * np.sin(el)]),
                    np.array([0, 0.05, 0.05]), np.array([0, 0, 1.0]))
        r = render(scene, I, T)
        frames.append(dict(id=f"{i:06d}", cam_to_world=Tw @ T, rgb=(np.clip(r.rgb, 0, 1) * 255).astype(np.uint8),
                           depth_m=r.depth))
    write_capture(path, intrinsics=I, depth_scale=1000.0, frames=frames)
    return Tw


@pytest.mark.parametrize("board,elevation,wall_h", [(0.9, 15.0, 0.35), (0.3, 5.0, 0.5), (0.3, 20.0, 0.5)])
def test_a_wall_behind_the_objects_is_neither_the_support_nor_an_object(tmp_path, cfg, board, elevation, wall_h):
    # with a small board and a tall wall the wall holds most depth points; the support is still the board,
    # because the objects rest on it, and the wall neither swallows the objects nor becomes one
    Tw = _shelf_capture(tmp_path / "c", board=board, elevation=elevation, wall_h=wall_h)
    found = find_objects(read_capture(tmp_path / "c"), cfg, np.random.default_rng(0), use_masks=False)
    assert np.degrees(np.arccos(np.clip(found.plane.normal @ Tw[:3, 2], -1, 1))) < 1.0
    assert sorted(round(p.frame.height, 2) for p in found.proposals) == [0.08, 0.08, 0.1]


def test_free_space_reaches_down_to_the_support_plane(tmp_path, cfg):
    # projective carving (common practice; Kutulakos and Seitz, "A theory of shape by space carving", IJCV
    # 2000, from memory): a cell that a camera ray crosses before it meets a surface is empty.  Rays that end on
    # the empty support plane cross every cell above it, so beside the object the lowest layer is as free as
    # the layers above; a layer of "seen, not free" cells along the base would turn into a wall when the
    # object is compared lying on another face
    grid = replace(Grid.from_config(cfg), carve_to_plane=True)
    _capture(tmp_path / "c", [(_lshape(0.06), 20.0, (0.0, 0.0), (0.8, 0.3, 0.2))], world_seed=2)
    scene = find_objects(read_capture(tmp_path / "c"), cfg, np.random.default_rng(0))
    (p,) = scene.proposals
    vol = lift(scene.views(p), p.frame, grid)
    surface, free, observed = vol[0], vol[1], vol[2]
    empty = (surface.max(axis=2) < 0.05)[..., None] & (observed > 0)   # columns with no object cell in them
    assert empty[..., 0].sum() >= 20, empty[..., 0].sum()
    bottom = free[..., 0][empty[..., 0]].mean()
    above = free[..., 1:][empty[..., 1:]].mean()
    assert bottom >= 0.9 and bottom >= above - 0.05, (bottom, above)


# --- statistical outlier removal before the object frame ----------------------------------------

def _outliers_by_definition(pts: np.ndarray, k: int, sigma: float) -> np.ndarray:
    """Reference twin from the definition (Rusu et al. 2008; PCL StatisticalOutlierRemoval): all pairwise
    distances by scipy's cdist, each point's k nearest others by sorting, mean + sigma x std (population)."""
    from scipy.spatial.distance import cdist
    d = np.sort(cdist(pts, pts), axis=1)[:, 1:k + 1]
    md = d.mean(axis=1)
    return md > md.mean() + sigma * md.std()


def test_statistical_outliers_match_their_definition():
    from protomine.ingest.proposals import statistical_outliers
    rng = np.random.default_rng(3)
    pts = np.concatenate([rng.normal(0.0, 0.02, (400, 3)), rng.uniform(-0.3, 0.3, (12, 3))])
    got = statistical_outliers(pts, 2.0, k=8)
    np.testing.assert_array_equal(got, _outliers_by_definition(pts, 8, 2.0))
    assert 5 <= got.sum() <= 40  # the scattered points are among them, the blob is kept
    assert not statistical_outliers(pts, 0.0).any()          # sigma 0: the filter is off
    assert not statistical_outliers(pts[:8], 2.0, k=8).any()  # k or fewer points: nothing to judge


def test_object_frame_centre_ignores_stray_readings():
    """A mallet-like footprint on the plane z = 0 (a handle bar x in [-0.13, 0.07], 2 cm wide, and a head disc of
    radius 3 cm at x = 0.10: minimum enclosing circle centred near the origin, radius 13 cm), sampled densely, plus
    six stray readings about 15 cm out beside the head (mixed depths beside a silhouette).  The footprint trim
    (measured from the median point, which sits in the head) keeps them, and they pull the enclosing circle's
    centre by centimetres; with the outlier test the centre stays within 3 mm and the radius near 13 cm."""
    from protomine.ingest.plane import PlaneFit
    from protomine.ingest.proposals import object_frame
    rng = np.random.default_rng(0)
    r = 0.03 * np.sqrt(rng.uniform(0, 1, 2000))
    a = rng.uniform(0, 2 * np.pi, 2000)
    head = np.stack([0.1 + r * np.cos(a), r * np.sin(a)], 1)
    handle = np.stack([rng.uniform(-0.13, 0.07, 1400), rng.uniform(-0.01, 0.01, 1400)], 1)
    stray = np.stack([0.1 + rng.uniform(-0.01, 0.01, 6), rng.uniform(0.14, 0.16, 6)], 1)
    xy = np.concatenate([head, handle, stray])
    pts = np.concatenate([xy, rng.uniform(0.0, 0.03, (len(xy), 1))], 1)
    plane = PlaneFit(np.array([0, 0, 1.0]), 0.0, 0.8, 0.002, 10)
    plain, _ = object_frame(pts, plane)
    filtered, _ = object_frame(pts, plane, outlier_sigma=2.0)
    assert np.linalg.norm(plain.origin[:2]) > 0.015
    assert np.linalg.norm(filtered.origin[:2]) < 0.003
    assert abs(filtered.radius - 0.13) < 0.003


def _mallet_footprint(rng, n_stray=6):
    """The mallet-like point set of test_object_frame_centre_ignores_stray_readings: a handle bar x in [-0.13, 0.07],
    2 cm wide, a head disc of radius 3 cm at x = 0.10, heights in [0, 3 cm], and ``n_stray`` stray readings in a
    2 cm square about 15 cm out beside the head."""
    r = 0.03 * np.sqrt(rng.uniform(0, 1, 2000))
    a = rng.uniform(0, 2 * np.pi, 2000)
    head = np.stack([0.1 + r * np.cos(a), r * np.sin(a)], 1)
    handle = np.stack([rng.uniform(-0.13, 0.07, 1400), rng.uniform(-0.01, 0.01, 1400)], 1)
    stray = np.stack([0.1 + rng.uniform(-0.01, 0.01, n_stray), rng.uniform(0.14, 0.16, n_stray)], 1)
    xy = np.concatenate([head, handle, stray])
    return np.concatenate([xy, rng.uniform(0.0, 0.03, (len(xy), 1))], 1)


def test_supported_circle_drops_only_lone_points_it_rests_on():
    """Known answer (elementary geometry, from memory): the footprint of a bar x in [-0.13, 0.07], |y| <= 0.01 and
    a disc of radius 0.03 about (0.10, 0) has as minimum enclosing circle the one through the bar's far corners
    (-0.13, +-0.01) and the disc's far point (0.13, 0): centre (c, 0) with (0.13 - c)^2 = (0.13 + c)^2 + 0.01^2,
    c = -0.01^2 / 0.52 = -0.19 mm, radius 0.13019 m.  Six stray readings 15 cm out (a depth mixed between the
    head's edge and the table) pull the plain circle's centre by centimetres; ``supported_circle`` drops them, as
    their 8th nearest neighbour lies > 10 cm off (the surface's own within a few mm), and finds the known circle
    within the sampling (2 mm).  Where the circle rests on the object's own surface (no strays) it is the plain
    circle exactly, also the bar's thin end (2 cm wide, as dense as the rest): a real extremity is not dropped."""
    from protomine.ingest.proposals import footprint, min_enclosing_circle, supported_circle
    B = np.eye(3)                               # in-plane axes x, y; up z
    pts = _mallet_footprint(np.random.default_rng(0))
    c0, r0 = min_enclosing_circle(footprint(pts, B))
    c1, r1 = supported_circle(pts, B, 4.0)
    assert np.linalg.norm(c0) > 0.015                                  # the strays hold the plain circle
    cx = -0.01 ** 2 / 0.52
    assert np.linalg.norm(np.asarray(c1) - [cx, 0.0]) < 0.002
    assert abs(r1 - np.hypot(0.13 - cx, 0.0)) < 0.002
    c2, r2 = supported_circle(pts, B, 0.0)                              # 0: off, the plain circle
    assert np.array_equal(c2, c0) and r2 == r0
    clean = _mallet_footprint(np.random.default_rng(0), n_stray=0)
    c3, r3 = supported_circle(clean, B, 4.0)
    c4, r4 = min_enclosing_circle(footprint(clean, B))
    assert np.array_equal(c3, c4) and r3 == r4
    assert r3 > 0.128                                                   # the bar's end still holds it


def _lone_by_definition(pts, index, factor, k):
    """Reference twin of proposals.lone_points from its definition: full distance matrix (scipy cdist), each
    point's k-th smallest distance to another point, the median of it over every ceil(M / 2000)-th point."""
    from scipy.spatial.distance import cdist
    D = cdist(pts, pts)
    kth = np.sort(D, axis=1)[:, k]              # column 0 is the point itself
    step = -(-len(pts) // 2000)
    return kth[index] > factor * np.median(kth[::step])


def test_lone_points_match_their_definition():
    from protomine.ingest.proposals import lone_points
    rng = np.random.default_rng(1)
    # a surface patch (10 x 10 cm, 0.5 mm noise) and ten readings scattered about it
    sheet = np.concatenate([rng.uniform(-0.05, 0.05, (2500, 2)), rng.normal(0.0, 0.0005, (2500, 1))], 1)
    pts = np.concatenate([sheet, rng.uniform(-0.3, 0.3, (10, 3))])
    index = np.arange(len(pts))
    got = lone_points(pts, index, 4.0, k=8)
    np.testing.assert_array_equal(got, _lone_by_definition(pts, index, 4.0, 8))
    assert got[2500:].sum() >= 8 and not got[:2500].any()      # the scattered ones stand alone, the surface does not
    assert not lone_points(pts, index, 0.0).any()              # factor 0: off


def test_centre_candidates_recover_a_circle_from_its_camera_facing_arc():
    """Geometry of a circle's partial arc (from memory, elementary): the points of an arc of half-angle theta
    <= 90 deg of a circle (centre c, radius R) have as minimum enclosing circle the chord's diametral circle,
    centred at the chord's midpoint, R cos(theta) from c toward the arc, radius R sin(theta).  A view that sees
    only the camera-facing arc (a tripod's legs, the far one hidden) so places the base centre too near the camera
    and the footprint too small; the candidate moved cot(theta) visible radii away from the camera, with the radius
    of the smallest circle about it that holds the arc, is the whole circle again (c, R).  In a tilted world frame
    with the plane off the origin, so nothing depends on world axes."""
    from protomine.geometry import plane_basis
    from protomine.ingest.plane import PlaneFit
    from protomine.ingest.proposals import centre_candidates, object_frame
    rng = np.random.default_rng(4)
    up = np.array([0.3, -0.5, 0.81])
    up /= np.linalg.norm(up)
    plane = PlaneFit(up, 0.7, 0.8, 0.002, 10)
    B = plane_basis(up)
    c2, R, theta = np.array([0.4, -0.2]), 0.12, np.deg2rad(60.0)
    toward = np.array([np.cos(2.0), np.sin(2.0)])              # in-plane direction from the centre to the camera
    a = np.arctan2(toward[1], toward[0]) + rng.uniform(-theta, theta, 3000)
    a[:2] = np.arctan2(toward[1], toward[0]) + np.array([-theta, theta])   # the arc's ends are seen
    xy = c2 + R * np.stack([np.cos(a), np.sin(a)], 1)
    h = rng.uniform(0.0, 0.05, len(xy))
    pts = xy @ B[:2] + (plane.offset + h)[:, None] * up
    camera = (c2 + 0.8 * toward) @ B[:2] + (plane.offset + 0.5) * up
    frame, _ = object_frame(pts, plane)
    seen = frame.origin @ B[:2].T
    np.testing.assert_allclose(seen, c2 + R * np.cos(theta) * toward, atol=1e-3)
    assert abs(frame.radius - R * np.sin(theta)) < 1e-3
    cands = centre_candidates(pts, frame, camera, (0.0, 1.0 / np.tan(theta)))
    assert cands[0] is frame                                    # offset 0: the visible circle itself
    np.testing.assert_allclose(cands[1].origin @ B[:2].T, c2, atol=1e-3)
    assert abs(float(cands[1].origin @ up) - plane.offset) < 1e-9  # still on the plane
    assert abs(cands[1].radius - R) < 1e-3
    assert cands[1].height == frame.height
    # a camera straight above the centre has no direction away from it: the visible circle only
    assert centre_candidates(pts, frame, frame.origin + 0.5 * up, (0.0, 0.5)) == [frame]


def test_single_views_keep_their_camera_direction_in_their_object_frame(tmp_path, cfg):
    """single/camera: unit vectors whose elevation above the support plane is the camera's as seen from the object's
    centre (geometry of ``_capture``'s orbit, from memory: sin el = (d sin 45 - h / 2) / |eye - centre|), and the
    direction the label stage's ``lift_frame`` gives the same object in the same frame (label.matcher)."""
    from protomine.label.matcher import lift_frame
    h = 0.08
    _capture(tmp_path / "c", [(S.cylinder(0.04, h), 0.0, (0.0, 0.0), (0.2, 0.3, 0.8))], n_frames=4, world_seed=3)
    ingest_captures([tmp_path / "c"], tmp_path / "objects.h5", cfg)
    st = open_store(tmp_path / "objects.h5")
    cams = st.single_camera
    assert cams is not None and cams.shape == (len(st.single_object), 3) and len(cams) >= 2
    assert np.allclose(np.linalg.norm(cams, axis=1), 1.0)
    d, el = 0.7, np.deg2rad(45.0)
    want = np.arcsin((d * np.sin(el) - h / 2) / np.hypot(d * np.cos(el), d * np.sin(el) - h / 2))
    assert np.allclose(np.arcsin(cams[:, 2]), want, atol=np.deg2rad(2.0))
    cap = read_capture(tmp_path / "c")
    grid = Grid.from_config(cfg)
    for cam, fid in zip(cams, st.single_frame):
        scene = find_objects(cap, cfg, np.random.default_rng(0), frame_ids=[fid])
        fo = lift_frame(scene, fid, grid, W, geometry_ids=False)
        assert len(fo.cameras) == 1
        assert np.degrees(np.arccos(np.clip(fo.cameras[0] @ cam, -1, 1))) < 1.0
