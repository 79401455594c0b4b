"""Resting faces and their quasi-static probabilities; tumbled demo instances and their truth poses."""
from __future__ import annotations

import csv
import itertools

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from demo_scenes.items import load_item_classes, make_instance
from protomine import geometry as G
from protomine.capture import Intrinsics, read_capture
from protomine.config import load_config
from protomine.errors import InputError
from protomine.scenes import shapes as S
from protomine.scenes.render import Scene, SceneObject, look_at, render
from protomine.scenes.resting import (rest_shape, resting_faces, resting_rotation, shape_resting_poses,
                                      shape_samples)
from protomine.scenes.scenario import generate_scenario

DOWN = np.array([0.0, 0.0, -1.0])


def test_cube_faces_one_sixth_each():
    # by symmetry (Goldberg et al. 1999, from memory): each face of a cube 1/6, exact polytope and sampled SDF
    cube = np.array(list(itertools.product([-1.0, 1.0], repeat=3)))
    r = resting_faces(cube, np.zeros(3))
    assert len(r.faces) == 6
    np.testing.assert_allclose(r.probabilities, 1 / 6, atol=1e-9)
    rs = shape_resting_poses(S.box((0.03, 0.03, 0.03), (0.0, 0.0, 0.03)))
    assert len(rs.faces) == 6
    np.testing.assert_allclose(rs.probabilities, 1 / 6, atol=2e-3)          # measured max deviation 1e-4
    np.testing.assert_allclose(rs.centre_of_mass, [0, 0, 0.03], atol=1e-4)


def test_regular_tetrahedron_one_quarter_each():
    # by symmetry: a regular tetrahedron rests on each face with probability 1/4
    tet = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], dtype=float)
    r = resting_faces(tet, tet.mean(0))
    assert len(r.faces) == 4
    np.testing.assert_allclose(r.probabilities, 0.25, atol=1e-9)
    # the sampled SDF of the same solid (four half-spaces)
    shape = S.intersect(*[S.halfspace(tuple(-v), tuple(-v / 3)) for v in tet * 0.05])
    shape = S.Shape(shape.fn, (-0.05,) * 3, (0.05,) * 3)
    rs = shape_resting_poses(shape)
    assert len(rs.faces) == 4
    np.testing.assert_allclose(rs.probabilities, 0.25, atol=0.01)            # measured max deviation 0.002


def test_rectangular_block_face_pairs_ordered_by_size():
    # common practice: a brick lands on its largest faces most often, its smallest least often
    half = np.array([0.06, 0.04, 0.02])
    for r in (resting_faces(np.array(list(itertools.product(*[(-h, h) for h in half]))), np.zeros(3)),
              shape_resting_poses(S.box(tuple(half)))):
        assert len(r.faces) == 6
        axis = [int(np.argmax(np.abs(f.normal))) for f in r.faces]
        assert axis == [2, 2, 1, 1, 0, 0]              # normal along z = the 12 x 8 faces, then 12 x 4, then 8 x 4
        p = r.probabilities
        np.testing.assert_allclose(p[0::2], p[1::2], atol=0.01)
        assert p[1] > p[2] + 0.05 and p[3] > p[4] + 0.03


def test_hemisphere_capped_roly_poly_has_one_stable_face():
    # A capsule (a cylinder capped by two hemispheres) weighted so that its centre of mass lies inside the lower
    # cap, below that cap's centre: the lowest point of that cap is the only rest; lying on the side, the
    # mass centre's foot falls beyond the side's contact segment and the body rolls onto that cap (from memory).
    r_cap = 0.03
    surf, _ = shape_samples(S.capsule((0.0, 0.0, r_cap), (0.0, 0.0, 3 * r_cap), r_cap))
    r = resting_faces(surf, np.array([0.0, 0.0, 0.5 * r_cap]))
    assert len(r.faces) == 1
    assert r.faces[0].probability == pytest.approx(1.0)
    assert np.degrees(np.arccos(r.faces[0].normal @ DOWN)) < 3.0


def test_solid_hemisphere_flat_face_probability_is_its_solid_angle():
    # Solid hemisphere of radius a: centroid 3a/8 above the flat face (from memory).  The flat face is a disc
    # seen from the centroid on its axis at d = 3a/8: solid angle 2 pi (1 - d / sqrt(d^2 + a^2)) (from memory).
    a = 0.05
    r = shape_resting_poses(S.intersect(S.sphere(a), S.halfspace((0.0, 0.0, -1.0), (0.0, 0.0, 0.0))))
    assert r.centre_of_mass[2] == pytest.approx(3 * a / 8, abs=0.02 * a)
    flat = r.face_towards(DOWN)
    assert flat >= 0
    d = 3 * a / 8
    expected = (1 - d / np.hypot(d, a)) / 2
    assert r.faces[flat].probability == pytest.approx(expected, abs=0.015)   # measured 0.336 vs 0.324
    # the rest of the sphere rolls to one rest on the dome, opposite the flat face (a rocking toy)
    assert len(r.faces) == 2 and r.faces[1 - flat].normal[2] > np.cos(np.radians(3))


def test_resting_rotation_takes_normal_down():
    rng = np.random.default_rng(0)
    for n in [DOWN, -DOWN, *rng.normal(size=(20, 3))]:
        n = n / np.linalg.norm(n)
        R = resting_rotation(n)
        np.testing.assert_allclose(R @ n, DOWN, atol=1e-12)
        # scipy as the reference: a proper rotation
        assert Rotation.from_matrix(R).magnitude() <= np.pi + 1e-9
        np.testing.assert_allclose(R.T @ R, np.eye(3), atol=1e-12)
        assert np.linalg.det(R) == pytest.approx(1.0)


@pytest.mark.parametrize("name", ["l_bracket", "jug"])
def test_tumbled_instance_rests_on_the_plane(name):
    item = next(c for c in load_item_classes() if c.name == name)
    inst = make_instance(item, np.random.default_rng(3))
    poses = shape_resting_poses(inst.shape)
    for i in range(min(2, len(poses.faces))):
        shape, R, s = rest_shape(inst.shape, poses, i)
        pts, _ = shape_samples(shape)
        cell = float(np.max(np.subtract(shape.hi, shape.lo))) / 28
        assert abs(pts[:, 2].min()) < 0.25 * cell             # lowest point on the table plane z = 0
        assert (pts[:, 2] > -0.25 * cell).all()
        np.testing.assert_allclose(R @ poses.faces[i].normal, DOWN, atol=1e-9)
        # the surface samples of the placed shape are the model's, moved by x_rest = R x_model + s
        model, _ = shape_samples(inst.shape)
        moved = model @ R.T + s
        assert np.abs(np.sort(moved[:, 2])[:20] - np.sort(pts[:, 2])[:20]).max() < cell
    # rendered: the object's back-projected pixels reach down to the table top and not below it
    shape, _, _ = rest_shape(inst.shape, poses, min(1, len(poses.faces) - 1))
    K = Intrinsics(160, 120, 140.0, 140.0, 79.5, 59.5)
    eye = np.array([0.45 * np.cos(0.35), 0.0, 0.45 * np.sin(0.35)])
    T = look_at(eye, np.array([0.0, 0.0, 0.02]), np.array([0.0, 0.0, 1.0]))
    fr = render(Scene([SceneObject(shape, 30.0, (0.0, 0.0), (0.8, 0.2, 0.2))]), K, T)
    p_cam, _ = G.depth_to_points(fr.depth, K.K, fr.mask == 1)
    z = G.camera_to_world(p_cam, T)[:, 2]
    assert len(z) > 200 and z.min() > -0.001 and z.min() < 0.004   # measured 0.2-1.5 mm (pixel footprint)


def test_config_bounds_the_tumbled_fraction():
    assert load_config(None)["scenes"]["tumbled_fraction"] == 0.5
    with pytest.raises(InputError):
        load_config(None, {"scenes": {"tumbled_fraction": 1.5}})
    with pytest.raises(InputError):
        generate_scenario("/nonexistent/never", family="no_such_family")


def test_truth_pose_maps_the_rendered_points_into_the_model(tmp_path):
    """x_model = R^T (x_world - t) with R, t from truth_full.csv puts every rendered point of a tumbled tile box
    inside the box's model envelope (|x|, |y| <= side / 2, 0 <= z <= 0.55 side, items.toml), and the points
    fill it along its three axes; a box lying on its side under a wrong rotation would stick out."""
    out = tmp_path / "tumbled"
    generate_scenario(out, n_mining=1, n_single=0, frames=2, width=160, height=120, seed=7,
                      classes=["tile_box"], tumbled_fraction=1.0)
    rows = list(csv.DictReader(open(out / "truth_full.csv")))
    assert len(rows) >= 5 and all(r["tumbled"] == "1" and int(r["face"]) >= 0 for r in rows)
    cap = read_capture(out / rows[0]["capture"])
    K = G.intrinsics_matrix(cap.intrinsics.fx, cap.intrinsics.fy, cap.intrinsics.cx, cap.intrinsics.cy)
    on_side, checked = 0, 0
    for r in rows:
        R = Rotation.from_quat([float(r[k]) for k in ("qx", "qy", "qz", "qw")]).as_matrix()
        t = np.array([float(r[k]) for k in ("tx", "ty", "tz")])
        up = np.array([float(r[k]) for k in ("up_x", "up_y", "up_z")])
        side = float(r["size_m"])
        pts = []
        for fr in cap.frames:
            sel = cap.mask(fr.id) == int(r["mask_id"])
            pts.append(G.camera_to_world(G.depth_to_points(cap.depth(fr.id), K, sel)[0], fr.cam_to_world))
        pts = np.concatenate(pts)
        if len(pts) < 50:
            continue
        checked += 1
        m = (pts - t) @ R                                       # rows: R^T (x - t)
        tol = 0.004                                             # depth quantisation and sensor noise
        assert np.abs(m[:, :2]).max() < side / 2 + tol
        assert m[:, 2].min() > -tol and m[:, 2].max() < 0.55 * side + tol
        assert np.ptp(m[:, 0]) > 0.6 * side and np.ptp(m[:, 1]) > 0.6 * side
        on_side += abs(R[:, 2] @ up) < 0.5                     # model z lies along the table: on a side face
    assert checked >= 4 and on_side >= 1


def test_upright_scenes_are_unchanged_and_record_upright_rotations(tmp_path):
    out = tmp_path / "up"
    generate_scenario(out, n_mining=1, n_single=0, frames=1, width=64, height=48, seed=2)
    for r in csv.DictReader(open(out / "truth_full.csv")):
        assert r["face"] == "" and r["tumbled"] == "0"
        R = Rotation.from_quat([float(r[k]) for k in ("qx", "qy", "qz", "qw")]).as_matrix()
        up = np.array([float(r[k]) for k in ("up_x", "up_y", "up_z")])
        np.testing.assert_allclose(R[:, 2], up, atol=1e-5)                    # model z = world up
        assert float(G.direction_to_yaw(R[:, 0], up)) == pytest.approx(float(r["yaw_deg"]), abs=1e-3)
        np.testing.assert_allclose([float(r[k]) for k in ("tx", "ty", "tz")],
                                   [float(r[k]) for k in ("x", "y", "z")], atol=1e-5)


def test_scenes_command_takes_the_family_and_tumbled_share_from_the_config(tmp_path):
    from typer.testing import CliRunner

    from protomine.cli import app
    cfg = tmp_path / "c.toml"
    cfg.write_text('[scenes]\nfamily = "angles"\ntumbled_fraction = 1.0\n')
    res = CliRunner().invoke(app, ["scenes", "-o", str(tmp_path / "s"), "--captures", "1", "--single", "0",
                                   "--frames", "1", "--width", "48", "--height", "36", "-c", str(cfg), "-q"])
    assert res.exit_code == 0, res.output
    rows = list(csv.DictReader(open(tmp_path / "s" / "truth_full.csv")))
    assert rows and all(r["tumbled"] == "1" and r["class"].startswith("peg_") for r in rows)
    cfg.write_text('[scenes]\nfamily = "no_such_family"\n')
    res = CliRunner().invoke(app, ["scenes", "-o", str(tmp_path / "t"), "-c", str(cfg), "-q"])
    assert res.exit_code == 2 and "scenes.family" in res.output and "Traceback" not in res.output
