"""protomine import: the layouts built from demo captures (tests/layout_writers.py, the other direction) must
give the same objects and clusters as ingesting the demo captures directly; quaternions and slerp against
scipy.spatial.transform (Rotation, Slerp); bad input is one line, exit 2, nothing in --out."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from scipy.spatial.transform import Rotation, Slerp
from sklearn.metrics import adjusted_rand_score

from layout_writers import to_bop, to_plain, to_tum
from protomine.config import load_config
from protomine.importers.convert import import_sources
from protomine.importers.poses import matrix_to_quaternion, quaternion_to_matrix, slerp, to_cam_to_world
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.sharded import open_store
from protomine.mine.pipeline import mine_store

W, H = 128, 96
INTR = "108.8,108.8,63.5,47.5"          # demo_intrinsics(128, 96): f = 0.85 W, centre pixel


# --- quaternions against scipy ------------------------------------------------------------------------

def test_quaternion_matrix_round_trip_matches_scipy():
    R = Rotation.random(200, random_state=1)
    q = R.as_quat()                                       # scipy: [x, y, z, w], the sequence layout's order
    assert np.allclose(quaternion_to_matrix(q), R.as_matrix(), atol=1e-12)
    mine = matrix_to_quaternion(R.as_matrix())
    ref = q * np.where(q[:, 3:] < 0, -1, 1)               # same rotation, w >= 0
    assert np.allclose(mine, ref, atol=1e-10)


@pytest.mark.parametrize("t", [0.0, 0.2, 0.5, 0.93, 1.0])
def test_slerp_matches_scipy(t):
    rots = Rotation.random(2, random_state=7)
    ref = Slerp([0.0, 1.0], rots)([t]).as_matrix()[0]
    mine = quaternion_to_matrix(slerp(rots[0].as_quat(), rots[1].as_quat(), t))
    assert np.allclose(mine, ref, atol=1e-9)


def test_slerp_takes_the_short_arc_for_antipodal_signs():
    # q and -q are one rotation: interpolating towards -q1 must equal interpolating towards q1 (scipy Slerp)
    rots = Rotation.random(2, random_state=3)
    a = quaternion_to_matrix(slerp(rots[0].as_quat(), -rots[1].as_quat(), 0.4))
    assert np.allclose(a, Slerp([0, 1], rots)([0.4]).as_matrix()[0], atol=1e-9)


@pytest.mark.parametrize("conv", ["opencv-c2w", "opencv-w2c", "opengl-c2w", "opengl-w2c"])
def test_pose_conventions_recover_the_camera(conv):
    # an OpenGL camera looks down its -z axis (common practice); the camera's forward ray must come out the same
    c2w = np.eye(4)
    c2w[:3, :3] = Rotation.random(random_state=5).as_matrix()
    c2w[:3, 3] = [0.3, -1.0, 2.0]
    gl = c2w @ np.diag([1.0, -1.0, -1.0, 1.0])
    assert np.allclose(gl[:3, :3] @ [0, 0, -1], c2w[:3, :3] @ [0, 0, 1])
    raw = gl if conv.startswith("opengl") else c2w
    raw = np.linalg.inv(raw) if conv.endswith("w2c") else raw
    assert np.allclose(to_cam_to_world(raw, conv), c2w, atol=1e-12)


# --- end to end: layouts built from demo captures -----------------------------------------------------

@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """2 demo captures x 4 frames at 128x96 (invented data) of 4 demo classes, ingested directly with and without
    masks and mined with K = 4; plus the same captures written in each layout."""
    from protomine.scenes.scenario import generate_scenario
    root = tmp_path_factory.mktemp("import_demo")
    doc = generate_scenario(root / "demo", n_mining=2, n_single=0, frames=4, width=W, height=H, seed=2,
                           classes=["spool", "tile_box", "mallet", "jug"])
    from conftest import TINY_CONFIG
    (root / "tiny.toml").write_text(TINY_CONFIG)
    cfg = load_config(root / "tiny.toml")          # a coarse grid: the comparison needs equal runs, not fine ones
    caps = [root / "demo" / c for c in doc["mining"]]
    rows = list(csv.DictReader(open(root / "demo" / "truth_full.csv")))
    out = {"root": root, "cfg": cfg, "caps": caps, "rows": rows}
    for mode in ("mask", "nomask"):
        ingest_captures(caps, root / f"direct_{mode}.h5", cfg, seed=0, use_masks=mode == "mask")
        out[f"lib_{mode}"], _ = mine_store(root / f"direct_{mode}.h5", root / f"direct_{mode}_lib" / "library.h5", cfg,
                                           seed=0, n_clusters=4)
    for c in caps:
        r = [x for x in rows if x["capture"] == c.name]
        to_bop(c, r, root / "bop" / c.name, jpeg=True)
        to_bop(c, r, root / "bop_static" / c.name, world_poses=False)
        to_tum(c, root / "tum" / c.name)
        to_plain(c, root / "plain" / c.name, convention="opengl-w2c")
    return out


def _ingest_mine(demo, caps, name, use_masks):
    st = demo["root"] / f"{name}.h5"
    ingest_captures(caps, st, demo["cfg"], seed=0, use_masks=use_masks)
    lib, _ = mine_store(st, demo["root"] / f"{name}_lib" / "library.h5", demo["cfg"], seed=0, n_clusters=4)
    return open_store(st), lib


def _same_objects_and_clusters(demo, store, lib, mode, *, centre_tol):
    """Each object of the direct ingest has an imported twin (same capture, centre within centre_tol) and the
    clusterings agree up to renaming (adjusted Rand index 1, scikit-learn)."""
    direct = open_store(demo["root"] / f"direct_{mode}.h5")
    dlib = demo[f"lib_{mode}"]
    assert len(store.objects["id"]) == len(direct.objects["id"])
    d_cl = dict(zip(dlib.members["object"], dlib.members["cluster"]))
    i_cl = dict(zip(lib.members["object"], lib.members["cluster"]))
    a, b = [], []
    for oid, cap, c in zip(direct.objects["id"], direct.objects["capture"], direct.objects["center"]):
        sel = np.flatnonzero(np.asarray(store.objects["capture"]) == cap)
        dist = np.linalg.norm(np.asarray(store.objects["center"])[sel] - c, axis=1)
        assert dist.min() < centre_tol, (oid, dist.min())
        a.append(d_cl[oid])
        b.append(i_cl[store.objects["id"][sel[dist.argmin()]]])
    assert adjusted_rand_score(a, b) == pytest.approx(1.0)


def test_bop_scene_import_gives_the_same_objects_and_clusters(demo, tmp_path):
    out = tmp_path / "caps"
    labels = tmp_path / "bop_labels.csv"
    summ = import_sources("bop", [demo["root"] / "bop" / c.name for c in demo["caps"]], out, keep_labels=labels)
    assert all(s["masks"] and s["plane_check"].frames for s in summ)
    store, lib = _ingest_mine(demo, sorted(out.iterdir()), "bop", True)
    # JPEG colour changes the colour channels a little; geometry is the benchmark's mm depth, unchanged
    _same_objects_and_clusters(demo, store, lib, "mask", centre_tol=0.002)
    # the kept labels name every instance with its benchmark obj_id, one obj_id per demo class
    kept = {r["object"]: r["label"] for r in csv.DictReader(open(labels))}
    truth = {r["object"]: r["class"] for r in demo["rows"]}
    centres = {o: c for o, c in zip(store.objects["id"], store.objects["center"])}
    assert set(kept) == set(store.objects["id"])
    pairs = set()
    direct = open_store(demo["root"] / "direct_mask.h5")
    for oid, c in zip(direct.objects["id"], direct.objects["center"]):
        twin = min(centres, key=lambda o: np.linalg.norm(centres[o] - c) if o.split("/")[0] == oid.split("/")[0] else 9)
        pairs.add((truth[oid], kept[twin]))
    assert len(pairs) == len({p[0] for p in pairs}) == len({p[1] for p in pairs})


def test_bop_scene_without_world_poses_derives_them_from_one_object(demo, tmp_path):
    out = tmp_path / "caps"
    summ = import_sources("bop", [demo["root"] / "bop_static" / c.name for c in demo["caps"]], out)
    assert all(any("derived from object" in n for n in s["notes"]) for s in summ)
    store, lib = _ingest_mine(demo, sorted(out.iterdir()), "bop_static", True)
    direct = open_store(demo["root"] / "direct_mask.h5")
    # the world is another frame now: compare what does not depend on it (size, points), then clusters
    key = lambda st: sorted(zip(st.objects["capture"], np.round(st.objects["height_m"], 4), st.objects["n_points"]))
    d, i = key(direct), key(store)
    assert [x[0] for x in d] == [x[0] for x in i] and [x[2] for x in d] == [x[2] for x in i]
    assert np.allclose([x[1] for x in d], [x[1] for x in i], atol=2e-3)
    dcl = dict(zip(demo["lib_mask"].members["object"], demo["lib_mask"].members["cluster"]))
    icl = dict(zip(lib.members["object"], lib.members["cluster"]))
    by_n = lambda st, cl: {(c, n): cl[o] for o, c, n in zip(st.objects["id"], st.objects["capture"], st.objects["n_points"])}
    a, b = by_n(direct, dcl), by_n(store, icl)
    assert adjusted_rand_score([a[k] for k in sorted(a)], [b[k] for k in sorted(a)]) == pytest.approx(1.0)


def test_sequence_import_interpolates_poses_and_matches_direct_ingest(demo, tmp_path):
    out = tmp_path / "caps"
    summ = import_sources("tum", [demo["root"] / "tum" / c.name for c in demo["caps"]], out,
                          options={"intrinsics": tuple(float(x) for x in INTR.split(","))})
    assert all(s["frames"] == 4 for s in summ)
    # the colour stamp lies midway between two ground-truth stamps rotated -/+ 2 degrees: slerp must recover it
    for c in demo["caps"]:
        src = json.loads((c / "capture.json").read_text())["frames"]
        got = json.loads((out / c.name / "capture.json").read_text())["frames"]
        assert np.allclose([f["cam_to_world"] for f in got], [f["cam_to_world"] for f in src], atol=2e-6)
    store, lib = _ingest_mine(demo, sorted(out.iterdir()), "tum", False)
    _same_objects_and_clusters(demo, store, lib, "nomask", centre_tol=0.002)


def test_plain_folder_import_with_opengl_world_to_camera_poses(demo, tmp_path):
    out = tmp_path / "caps"
    import_sources("plain", [demo["root"] / "plain" / c.name for c in demo["caps"]], out,
                   options={"intrinsics": tuple(float(x) for x in INTR.split(",")), "convention": "opengl-w2c"})
    store, lib = _ingest_mine(demo, sorted(out.iterdir()), "plain", False)
    _same_objects_and_clusters(demo, store, lib, "nomask", centre_tol=1e-4)


def test_sequence_with_half_resolution_depth_is_resampled(demo, tmp_path):
    src = to_tum(demo["caps"][0], tmp_path / demo["caps"][0].name, half_depth=True)
    (s,) = import_sources("tum", [src], tmp_path / "out", options={"intrinsics": tuple(float(x) for x in INTR.split(","))})
    assert s["plane_check"].offset_m < 0.005
    ingest_captures([tmp_path / "out" / src.name], tmp_path / "o.h5", demo["cfg"], seed=0, use_masks=False)
    n_direct = sum(np.asarray(open_store(demo["root"] / "direct_nomask.h5").objects["capture"]) == src.name)
    assert len(open_store(tmp_path / "o.h5").objects["id"]) == n_direct


# --- bad input: one line naming file and field, exit 2, nothing written ------------------------------

def _cli(*args):
    from typer.testing import CliRunner
    from protomine.cli import app
    return CliRunner().invoke(app, [str(a) for a in args])


def _copy(src: Path, dst: Path) -> Path:
    import shutil
    shutil.copytree(src, dst)
    return dst


def _break_tum_stamps(p: Path):
    lines = (p / "depth.txt").read_text().splitlines()
    (p / "depth.txt").write_text("\n".join(l if l.startswith("#") else f"{float(l.split()[0]) + 5:.6f} {l.split()[1]}"
                                          for l in lines) + "\n")


def _non_rigid_gt(p: Path):
    lines = (p / "groundtruth.txt").read_text().splitlines()
    parts = lines[3].split()
    parts[4:8] = ["0.1", "0.0", "0.0", "0.2"]
    lines[3] = " ".join(parts)
    (p / "groundtruth.txt").write_text("\n".join(lines) + "\n")


def _scaled_pose(p: Path):
    lines = (p / "poses.txt").read_text().splitlines()
    T = np.array([float(x) for x in lines[1].split()]).reshape(4, 4)
    T[:3, :3] *= 1.3
    lines[1] = " ".join(map(str, T.reshape(-1)))
    (p / "poses.txt").write_text("\n".join(lines) + "\n")


BAD = [
    ("not the layout", "tum", "bop", None, [], ("rgb.txt", "missing")),
    ("missing depth image", "bop", "bop", lambda p: (p / "depth" / "000002.png").unlink(), [], ("000002.png", "missing")),
    ("missing scene_gt", "bop", "bop", lambda p: (p / "scene_gt.json").unlink(), [], ("scene_gt.json", "missing")),
    ("timestamps never associate", "tum", "tum", _break_tum_stamps, ["--intrinsics", INTR], ("depth.txt", "timestamp")),
    ("non-rigid quaternion", "tum", "tum", _non_rigid_gt, ["--intrinsics", INTR], ("groundtruth.txt", "line 4", "rigid")),
    ("non-rigid 4x4", "plain", "plain", _scaled_pose, ["--intrinsics", INTR, "--pose-convention", "opengl-w2c"],
     ("poses.txt", "line 2", "rigid")),
    ("depth in the wrong unit", "plain", "plain", None,
     ["--intrinsics", INTR, "--pose-convention", "opengl-w2c", "--depth-scale", "5000"], ("--depth-scale", "depth unit")),
    ("pose direction", "plain", "plain", None, ["--intrinsics", INTR, "--pose-convention", "opengl-c2w"],
     ("poses.txt", "--pose-convention", "direction")),
    ("pose axes", "plain", "plain", None, ["--intrinsics", INTR, "--pose-convention", "opencv-w2c"],
     ("poses.txt", "--pose-convention", "axes")),
]


@pytest.mark.parametrize("name,layout,made_as,breaker,extra,words", BAD, ids=[b[0] for b in BAD])
def test_bad_input_is_one_line_exit_2_and_nothing_written(demo, tmp_path, name, layout, made_as, breaker, extra, words):
    good = demo["root"] / made_as / demo["caps"][1].name
    other = demo["root"] / made_as / demo["caps"][0].name        # a good source first: it must not land either
    src = _copy(good, tmp_path / "src" / good.name)
    if breaker:
        breaker(src)
    out = tmp_path / "out"
    r = _cli("import", layout, other, src, "--out", out, "-q", *extra)
    assert r.exit_code == 2, (r.output, r.exception)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:"), r.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])
    assert not out.exists() or not any(out.iterdir()), list(out.iterdir())
