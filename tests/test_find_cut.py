"""find's cut example ([mine] find_cut, find_cut_offsets; curate.cutexample).

The scene is built so that the answers are known by construction: one rendered frame (tests/conftest.py's tiny
capture, 64 x 48 px, fx = fy = 60 px) of a box at the table's centre, a second box beside it, and a cylinder placed so
far to the side that the image's right border cuts it off.  Which object the border cuts, and which part of the
cylinder lies outside the picture, follow from the construction (its centre and radius, the pinhole projection of
the frame's pose: the common pinhole model, from memory), not from the code under test.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from conftest import TINY_CONFIG, TINY_INTRINSICS, make_tiny_capture, tiny_box, tiny_cylinder
from protomine.config import load_config
from protomine.curate.cutexample import WithExample, cut_example, find_cut_direction, find_cut_offsets
from protomine.errors import InputError
from protomine.geometry import plane_basis
from protomine.ingest.truncation import centroid_cut_direction
from protomine.curate.oneshot import find_similar
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.sharded import open_store
from protomine.ingest.volume import Grid
from protomine.mine.pipeline import store_aspect
from protomine.scenes.render import look_at

WORLD_SEED = 1
SIDE = 0.3 + np.pi / 2            # tiny_frames' first camera sits at azimuth 0.3 rad: this is its image's right side
CYL_AT = 0.23                     # metres from the table's centre along SIDE: the right border cuts the cylinder


def _scene_to_world() -> np.ndarray:
    """tiny_frames' world frame: the scene moved by the rigid transform of ``world_seed`` (tests/conftest.py)."""
    Tw = np.eye(4)
    Tw[:3, :3] = Rotation.random(random_state=WORLD_SEED).as_matrix()
    Tw[:3, 3] = np.random.default_rng(WORLD_SEED).normal(size=3)
    return Tw


@pytest.fixture(scope="module")
def cut_world(tmp_path_factory):
    root = tmp_path_factory.mktemp("cut_world")
    (root / "tiny.toml").write_text(TINY_CONFIG)
    cfg = load_config(root / "tiny.toml")
    cyl = (CYL_AT * np.cos(SIDE), CYL_AT * np.sin(SIDE))
    objs = [(tiny_box(), 20.0, (0.0, 0.0), (0.8, 0.3, 0.2)), (tiny_cylinder(), 0.0, cyl, (0.2, 0.3, 0.8)),
            (tiny_box(0.04), 70.0, (-0.12 * np.cos(SIDE), -0.12 * np.sin(SIDE)), (0.3, 0.7, 0.3))]
    cap = make_tiny_capture(root / "cap", objs, n_frames=1, world_seed=WORLD_SEED)
    ingest_captures([cap], root / "objects.h5", cfg, seed=0)
    return {"root": root, "cfg": cfg, "store": open_store(root / "objects.h5"), "cyl": np.array([cyl[0], cyl[1], 0.0])}


def _pixels_of(points_scene: np.ndarray) -> np.ndarray:
    """Pinhole pixel coordinates (u, v) of scene points seen by tiny_frames' first camera (x right, y down, z forward)."""
    el = np.deg2rad(50.0)
    eye = 0.45 * np.array([np.cos(el) * np.cos(0.3), np.cos(el) * np.sin(0.3), np.sin(el)])
    T = look_at(eye, np.zeros(3), np.array([0, 0, 1.0]))              # camera -> scene
    pc = (np.linalg.inv(T) @ np.c_[points_scene, np.ones(len(points_scene))].T).T[:, :3]
    K = TINY_INTRINSICS
    return np.c_[K.fx * pc[:, 0] / pc[:, 2] + K.cx, K.fy * pc[:, 1] / pc[:, 2] + K.cy]


def test_the_construction_cuts_the_cylinder_and_not_the_boxes():
    # the check of the scene itself: the cylinder's far rim projects past the right border, the boxes' corners inside
    ring = np.array([[np.cos(a), np.sin(a), 0.0] for a in np.linspace(0, 2 * np.pi, 36, endpoint=False)])
    cyl = np.array([CYL_AT * np.cos(SIDE), CYL_AT * np.sin(SIDE), 0.0])
    uv = _pixels_of(cyl + 0.03 * ring)
    assert uv[:, 0].max() > TINY_INTRINSICS.width and uv[:, 0].min() < TINY_INTRINSICS.width
    for c in (np.zeros(3), np.array([-0.12 * np.cos(SIDE), -0.12 * np.sin(SIDE), 0.0])):
        uv = _pixels_of(c + 0.05 * ring)
        assert (uv[:, 0] > 2).all() and (uv[:, 0] < TINY_INTRINSICS.width - 2).all()


def test_only_the_cut_object_is_a_cut_example(cut_world):
    st, grid = cut_world["store"], Grid.from_config(cut_world["cfg"])
    Tw = _scene_to_world()
    true = Tw[:3, :3] @ cut_world["cyl"] + Tw[:3, 3]
    found = {}
    for i in range(len(st)):
        found[i] = cut_example(st, i, grid, (0.25, 0.5))
    cut = [i for i in found if found[i] is not None]
    assert len(st) == 3 and len(cut) == 1
    i = cut[0]
    ce = found[i]
    # the cut object is the cylinder: its visible footprint's centre lies within its radius (0.03 m) of the true one
    assert np.linalg.norm(ce.origins[0] - true) < 0.03
    # the store's volume is candidate 0, bit for bit; two more candidates, each about its own frame
    assert ce.volumes.shape[0] == 3 and np.array_equal(ce.volumes[0], st.read_volume_at(np.array([i]))[0])
    assert np.allclose(ce.sizes[:, 1], ce.sizes[0, 1]) and (ce.sizes[1:, 0] >= ce.sizes[0, 0]).all()
    # what the view could not see: the cylinder's rim point farthest along the image's right (outside the picture by
    # the construction's projection) is hidden, the opposite rim (in the picture, nothing nearer) is not
    far = cut_world["cyl"] + 0.03 * np.array([np.cos(SIDE), np.sin(SIDE), 0.0])
    assert _pixels_of(far[None])[0, 0] > TINY_INTRINSICS.width
    to_obj = lambda p: (Tw[:3, :3] @ p + Tw[:3, 3] - ce.cut.origin) @ ce.cut.basis.T
    assert ce.cut.hidden(to_obj(far)[None])[0]
    near = cut_world["cyl"] + np.array([-0.03 * np.cos(SIDE), -0.03 * np.sin(SIDE), 0.035])   # the rim facing inward
    assert 2 < _pixels_of(near[None])[0, 0] < TINY_INTRINSICS.width - 2
    assert not ce.cut.hidden(to_obj(near)[None])[0]


def test_a_store_without_its_capture_gives_no_cut_example(cut_world, tmp_path):
    st = open_store(cut_world["root"] / "objects.h5")
    st.captures = dict(st.captures, path=np.array([str(tmp_path / "gone")], dtype=object))
    assert all(cut_example(st, i, Grid.from_config(cut_world["cfg"]), (0.25,)) is None for i in range(len(st)))


def test_with_example_replaces_the_one_object(cut_world):
    st = cut_world["store"]
    vol = np.full(st.read_volume_at(np.array([0])).shape[1:], 0.5, np.float32)
    w = WithExample(st, 1, vol, np.array([0.05, 0.02]))
    got = w.read_volume_at(np.array([2, 1, 0]))
    assert np.array_equal(got[1], vol) and np.array_equal(got[0], st.read_volume_at(np.array([2]))[0])
    assert np.array_equal(w.read_volumes(0, 3)[1], vol) and np.array_equal(w.read_volumes(0, 1)[0], st.read_volume_at(np.array([0]))[0])
    # the grid aspect z_max / rho_max = (height_margin x height) / (radial_margin x radius) (DEVELOPERS.md's volume
    # convention), at the replaced size for object 1 and the store's for the others
    v = st.config["volume"]
    want = v["height_margin"] * 0.02 / (v["radial_margin"] * 0.05)
    a = store_aspect(w, {})
    assert a[1] == pytest.approx(want) and a[0] == pytest.approx(store_aspect(st, {})[0])
    assert w.ids == st.ids and len(w) == len(st)


def test_find_cut_offsets_reads_the_non_zero_entries():
    cfg = load_config(None)
    assert find_cut_offsets(cfg) == ()
    cfg["mine"]["find_cut_offsets"] = [0.0, 0.25, 0.5]
    assert find_cut_offsets(cfg) == (0.25, 0.5)


def test_the_centroid_direction_moves_the_cut_cylinder_toward_its_hidden_part(cut_world):
    # known by construction: the image's right border (direction SIDE in the scene, the pinhole projection above) cuts
    # the cylinder's far part off (about half of it), so the true base centre lies from the visible points toward
    # SIDE.  The move from the visible points' centroid to the cut points' centroid must point toward SIDE and bring
    # every moved centre (0.1, 0.25, 0.5 radii) nearer the true one than the visible circle's centre is
    st, grid = cut_world["store"], Grid.from_config(cut_world["cfg"])
    Tw = _scene_to_world()
    true = Tw[:3, :3] @ cut_world["cyl"] + Tw[:3, 3]
    B = plane_basis(Tw[:3, :3] @ np.array([0.0, 0.0, 1.0]))
    side = (Tw[:3, :3] @ np.array([np.cos(SIDE), np.sin(SIDE), 0.0])) @ B[:2].T
    i = [j for j in range(len(st)) if cut_example(st, j, grid, ()) is not None][0]
    ce = cut_example(st, i, grid, (0.1, 0.25, 0.5), "centroid")
    moves = (ce.origins[1:] - ce.origins[0]) @ B[:2].T
    r = ce.sizes[0, 0]
    assert np.allclose(np.linalg.norm(moves, axis=1), np.array([0.1, 0.25, 0.5]) * r)
    assert (moves @ side / np.linalg.norm(moves, axis=1) > 0.7).all()
    dist = np.linalg.norm((ce.origins - true) @ B[:2].T, axis=1)
    assert (dist[1:] < dist[0]).all()
    # the store's volume stays candidate 0 whichever direction
    assert np.array_equal(ce.volumes[0], st.read_volume_at(np.array([i]))[0])


def test_centroid_cut_direction_on_a_constructed_half_disc():
    # a disc of radius 1 about (2, 0) on the plane z = 0, seen only where x < 2.3 (a border at x = 2.3 cuts the rest):
    # the visible points' centroid lies left of the border, the points at the border are the cut ones, so the direction
    # is +x (geometry from memory); no point on a cut gives None
    g = np.stack(np.meshgrid(np.linspace(-1, 1, 81), np.linspace(-1, 1, 81)), -1).reshape(-1, 2)
    g = g[np.linalg.norm(g, axis=1) <= 1] + np.array([2.0, 0.0])
    g = g[g[:, 0] < 2.3]
    pts = np.c_[g, np.zeros(len(g))]
    cut = g[:, 0] > 2.3 - 0.03
    d = centroid_cut_direction(pts, cut, np.array([0.0, 0.0, 1.0]))
    assert d is not None and np.allclose(d, [1.0, 0.0, 0.0], atol=1e-6)
    assert centroid_cut_direction(pts, np.zeros(len(g), bool), np.array([0.0, 0.0, 1.0])) is None


def test_find_cut_direction_reads_and_checks_the_key():
    cfg = load_config(None)
    assert find_cut_direction(cfg) == "circle"
    cfg["mine"]["find_cut_direction"] = "centroid"
    assert find_cut_direction(cfg) == "centroid"
    cfg["mine"]["find_cut_direction"] = "middle"
    with pytest.raises(InputError):
        find_cut_direction(cfg)


def test_find_cut_leaves_an_example_the_view_does_not_cut_alone(cut_world, tiny_world):
    from protomine.mine.library import read_library
    lib = read_library(tiny_world["library"])
    st = cut_world["store"]
    off = copy.deepcopy(cut_world["cfg"])
    on = copy.deepcopy(off)
    on["mine"].update(find_cut=True, find_cut_offsets=[0.25, 0.5])
    whole = [i for i in range(len(st)) if cut_example(st, i, Grid.from_config(off), ()) is None][0]
    a, b = find_similar(lib, st, st.ids[whole], off), find_similar(lib, st, st.ids[whole], on)
    assert np.array_equal(a.distance, b.distance) and np.array_equal(a.rank_key, b.rank_key)
    # the centroid direction, a small move, the store's volume deciding: an uncut example still takes the unchanged path
    cen = copy.deepcopy(off)
    cen["mine"].update(find_cut=True, find_cut_offsets=[0.1], find_cut_direction="centroid", find_cut_decide=False)
    c = find_similar(lib, st, st.ids[whole], cen)
    assert np.array_equal(a.distance, c.distance) and np.array_equal(a.rank_key, c.rank_key)
