"""Single-view labelling: records, accuracy on new instances, open-set flagging, overlays, CLI.

The module fixture renders a small demo scenario (invented data: 6 mining captures x 6 frames plus 10
single-frame captures at 160x120, including the two held-out classes), ingests and mines it with the
fast config and K = 8 (the number of mining classes), then labels the single-frame captures.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from PIL import Image
from scipy.stats import t as student_t
from typer.testing import CliRunner

from protomine.cli import app
from protomine.config import load_config
from protomine.ingest.pipeline import ingest_captures
from protomine.label.evaluate import evaluate_labels
from protomine.label.matcher import label_captures, symmetry_name
from protomine.label.overlays import yaw_arrow_world
from protomine.mine.library import match_score
from protomine.mine.pipeline import mine_store
from protomine.records import FIELDS as RECORD_FIELDS
from protomine.scenes.scenario import generate_scenario

FIELDS = {"capture": str, "frame": str, "object": str, "bbox": list, "center_world": list, "size_m": list,
          "yaw_deg": float, "score": float, "unknown": bool, "alternatives": list}


@pytest.fixture(scope="module")
def labelled(tmp_path_factory):
    out = tmp_path_factory.mktemp("label_scene")
    doc = generate_scenario(out, n_mining=6, n_single=10, frames=6, width=160, height=120, seed=3)
    cfg = load_config("fast")
    ingest_captures([out / c for c in doc["mining"]], out / "objects.h5", cfg, seed=0)
    lib, _ = mine_store(out / "objects.h5", out / "library.h5", cfg, seed=0, n_clusters=8)
    singles = [out / c for c in doc["single"]]
    stats: dict = {}
    weighted = label_captures(lib, singles, cfg, seed=0, stats=stats)
    plain = label_captures(lib, singles, cfg, seed=0, weighted=False)
    return {"out": out, "lib": lib, "singles": singles, "weighted": weighted, "plain": plain, "cfg": cfg,
            "scores": stats["scores"]}


def test_records_have_the_documented_fields_and_types(labelled):
    recs = labelled["weighted"]
    assert len(recs) >= 40
    K = labelled["lib"].n_clusters
    for r in recs:
        assert set(RECORD_FIELDS) <= r.keys() and r["source"] == "single-view"   # the one schema, records.py
        for k, t in FIELDS.items():
            assert isinstance(r[k], t), (k, r[k])
        json.dumps(r)  # JSON-ready
        assert r["object"].startswith(r["capture"] + "/")
        u0, v0, u1, v1 = r["bbox"]
        assert 0 <= u0 < u1 <= 160 and 0 <= v0 < v1 <= 120
        assert r["cluster"] is None or 0 <= r["cluster"] < K
        assert 0.0 <= r["score"] <= 1.0
        assert r["unknown"] == (r["score"] < float(labelled["lib"].attrs["unknown_cut"]))
        if r["symmetry"] == "continuous":
            assert r["yaw_deg"] == 0.0
        else:
            period = 360.0 if r["symmetry"] == "none" else 360.0 / int(r["symmetry"].split(":")[1])
            assert 0.0 <= r["yaw_deg"] < period
        assert len(r["alternatives"]) == min(3, K - 1)
        assert r["cluster"] not in [a["cluster"] for a in r["alternatives"]]


def test_known_classes_are_named_and_unknown_classes_flagged(labelled):
    out = labelled["out"]
    ev = evaluate_labels(labelled["weighted"], out / "truth_full.csv", labelled["lib"], out / "truth_full.csv")
    assert ev["n_unknown"] >= 5 and ev["n_known"] >= 30
    assert ev["accuracy"] >= 0.8
    assert ev["median_yaw_error_deg"] <= 1.5           # measured 0.52 deg: bar ~3x
    assert ev["auroc"] >= 0.85            # roc_auc_score from scikit-learn (reference implementation)
    assert ev["unknown_flagged"] >= 0.6
    assert ev["known_flagged"] <= 0.25


def test_weighted_distance_is_at_least_as_accurate_as_plain(labelled):
    out = labelled["out"]
    ev_w = evaluate_labels(labelled["weighted"], out / "truth_full.csv", labelled["lib"], out / "truth_full.csv")
    ev_p = evaluate_labels(labelled["plain"], out / "truth_full.csv", labelled["lib"], out / "truth_full.csv")
    # measured 0.959 weighted vs 0.898 plain (3 of 49 known views): strictly better, not a tie
    assert ev_w["accuracy"] > ev_p["accuracy"]


def test_cli_writes_json_lines_and_one_overlay_per_frame(labelled, tmp_path):
    res = CliRunner().invoke(app, ["label", str(labelled["out"] / "library.h5"), *map(str, labelled["singles"][:3]),
                                   "--out", str(tmp_path / "labels.jsonl"), "--overlays", str(tmp_path / "ov"),
                                   "--config", "fast", "--quiet"])
    assert res.exit_code == 0, res.output
    lines = (tmp_path / "labels.jsonl").read_text().splitlines()
    n = sum(1 for r in labelled["weighted"] if r["capture"] in {c.name for c in labelled["singles"][:3]})
    assert len(lines) == n
    pngs = sorted((tmp_path / "ov").glob("*.png"))
    assert len(pngs) == 3
    with Image.open(pngs[0]) as im:
        assert im.size == (320, 240) and im.mode == "RGB"      # drawn on the frame upscaled 2x
    assert "labels.jsonl" in json.loads((tmp_path / "provenance.json").read_text())["files"]
    assert len(json.loads((tmp_path / "ov" / "provenance.json").read_text())["files"]) == 3


def test_cli_bad_library_is_one_line_error(tmp_path):
    bad = tmp_path / "lib.h5"
    bad.write_text("not hdf5")
    cap = tmp_path / "cap"
    cap.mkdir()
    res = CliRunner().invoke(app, ["label", str(bad), str(cap), "--out", str(tmp_path / "x.jsonl")])
    assert res.exit_code == 2
    assert "error:" in res.output and "Traceback" not in res.output


def test_yaw_arrow_turns_counter_clockwise_about_up():
    # hand-worked: up = world z, reference direction = world x; yaw 90 turns x onto y
    rec = {"base_world": [1.0, 2.0, 0.0], "up": [0.0, 0.0, 1.0], "yaw_deg": 90.0, "size_m": [0.1, 0.2]}
    base, tip = yaw_arrow_world(rec)
    np.testing.assert_allclose(base, [1.0, 2.0, 0.0])
    d = (tip - base) / np.linalg.norm(tip - base)
    np.testing.assert_allclose(d, [0.0, 1.0, 0.0], atol=1e-12)


def test_unknown_threshold_is_the_student_t_quantile():
    # score = 1 - T_4((ln d - mu) / sigma): the distance exp(mu + sigma * T_4^-1(1 - u)) scores exactly u
    # (scipy.stats.t as reference implementation)
    mu, sigma, u = -4.0, 0.3, 0.025
    d = math.exp(mu + sigma * student_t.ppf(1 - u, 4))
    assert match_score(np.array([d]), mu, sigma)[0] == pytest.approx(u, rel=1e-9)
    assert match_score(np.array([d * 1.01]), mu, sigma)[0] < u


@pytest.mark.parametrize("code,name", [(0, "continuous"), (1, "none"), (3, "n-fold:3"), (4, "n-fold:4")])
def test_symmetry_names_follow_the_item_file_spelling(code, name):
    assert symmetry_name(code) == name


def test_deciding_by_distance_is_at_least_as_accurate_as_by_score(labelled):
    # the rule README "Score" documents: the nearest cluster wins, the score only judges the match
    S = labelled["scores"]
    recs = labelled["weighted"]
    assert S.shape == (len(recs), labelled["lib"].n_clusters)
    for r, row in zip(recs, S):
        if r["cluster"] is not None:
            assert row[r["cluster"]] == pytest.approx(r["score"])
            assert [a["score"] for a in r["alternatives"]] == pytest.approx([row[a["cluster"]] for a in r["alternatives"]])
    out = labelled["out"]
    ev = evaluate_labels(recs, out / "truth_full.csv", labelled["lib"], out / "truth_full.csv", scores=S)
    assert ev["accuracy"] >= ev["accuracy_by_score"]


def test_record_groups_split_by_depth_model_and_by_the_face_matched():
    """The demo's breakdown (label.evaluate.record_groups): the depth-model groups and the face groups each
    partition the records, by the record's capture (its model, "gaussian" when the scenario names none) and by
    whether it matched on the canonical face (face 0); checked against a partition written out by hand
    (common practice: every record in exactly one group of each kind)."""
    from protomine.label.evaluate import record_groups
    recs = [{"capture": c, "face": f, "i": i} for i, (c, f) in enumerate(
        [("a", 0), ("a", 2), ("b", 0), ("b", None), ("c", 1), ("c", 0)])]
    groups = dict(record_groups(recs, {"a": "gaussian", "b": "stereo"}))   # c: not named -> gaussian
    assert list(groups) == ["gaussian depth", "stereo depth", "canonical face", "other face"]
    ids = lambda name: [r["i"] for r in groups[name]]  # noqa: E731
    assert ids("gaussian depth") == [0, 1, 4, 5] and ids("stereo depth") == [2, 3]
    assert ids("canonical face") == [0, 2, 5] and ids("other face") == [1, 3, 4]
    # one depth model: no depth groups; a kind no record has: left out
    one = record_groups([r for r in recs if r["face"] == 0], {"a": "stereo", "b": "stereo", "c": "stereo"})
    assert [name for name, _ in one] == ["canonical face"]


def test_candidate_centres_keep_per_prototype_the_nearest_candidate(labelled):
    """``Matcher.match`` on volumes (n, C, ...) (each object lifted about C candidate base centres,
    ``[mine] view_centre_offsets``) gives, per object and prototype, every figure of the candidate at the least
    distance, by definition: checked against C separate matches of (n, ...) volumes and an explicit argmin."""
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    st = open_store(labelled["out"] / "objects.h5")
    vols = st.read_single_views(np.arange(min(12, len(st.single_object))))
    mt = make_matcher(labelled["lib"], labelled["cfg"])
    cand = np.stack([vols, vols[::-1], np.roll(vols, 1, axis=0)], axis=1)        # (n, 3, 6, R, A, H)
    got = mt.match(cand)
    each = [mt.match(np.ascontiguousarray(cand[:, c])) for c in range(3)]
    n, K = len(vols), mt.K
    for i in range(n):
        for k in range(K):
            d = [e["distance"][i, k] for e in each]
            c = int(np.argmin([x if np.isfinite(x) else np.inf for x in d]))
            assert got["centre"][i, k] == c
            for key in ("distance", "score", "yaw_deg", "fit_scale", "face"):
                assert got[key][i, k] == each[c][key][i, k] or (np.isnan(got[key][i, k]) and np.isnan(each[c][key][i, k]))
        row = np.where(np.isfinite(got["distance"][i]), got["distance"][i], np.inf)
        assert got["best"][i] == (int(np.argmin(row)) if np.isfinite(row).any() else -1)
    # label_captures with the switch on: one record per object, each lifted about three candidate centres
    lib = labelled["lib"]
    cfg_lib = lib.config
    cfg_lib["mine"]["view_centre_offsets"] = [0.0, 0.25, 0.5]
    lib.attrs["config"], before = json.dumps(cfg_lib), lib.attrs["config"]
    try:
        recs = label_captures(lib, labelled["singles"][:2], labelled["cfg"], seed=0)
    finally:
        lib.attrs["config"] = before
    base = [r for r in labelled["weighted"] if r["capture"] in {p.name for p in labelled["singles"][:2]}]
    assert [r["object"] for r in recs] == [r["object"] for r in base]


def test_symmetric_decision_is_the_mean_of_both_searches(labelled):
    """``[mine] label_symmetric`` (``Matcher.symmetric_top``): the class is, by definition, the argmin over each view's
    shortlist of the mean of the one-way distance and the swapped search (the view as the prototype with its grid
    aspect from its size, the prototype as the object; ``tilt_pose_distances`` one pair at a time, here); every other
    figure stays the one-way search's."""
    from protomine.ingest.sharded import open_store
    from protomine.label import symmetric as sym
    from protomine.label.matcher import make_matcher
    from protomine.mine.tilts import grid_aspect, tilt_pose_distances
    st = open_store(labelled["out"] / "objects.h5")
    vols = st.read_single_views(np.arange(min(8, len(st.single_object))))
    sizes = np.column_stack([np.linspace(0.04, 0.08, len(vols)), np.linspace(0.12, 0.06, len(vols))])
    mt = make_matcher(labelled["lib"], labelled["cfg"])
    off = mt.match(vols, None, sizes)
    mt.symmetric_top = 3
    on = mt.match(vols, None, sizes)
    for key in ("distance", "score", "yaw_deg", "fit_scale", "face"):
        np.testing.assert_array_equal(on[key], off[key])
    X, W = mt.features(vols)
    asp = grid_aspect(sizes[:, 0], sizes[:, 1], mt.tilts.radial_margin, mt.tilts.height_margin)
    grid = None if mt.tilts.is_identity else mt.tilts
    D = off["distance"]
    for i in range(len(vols)):
        fin = [k for k in range(mt.K) if np.isfinite(D[i, k])]
        near = sorted(fin, key=lambda k: (D[i, k], k))[:3]
        short = [k for k in near if D[i, k] <= sym.RATIO * D[i, near[0]]]
        rev = {k: tilt_pose_distances(mt.P[[k]], mt.V[[k]], X[[i]], W[[i]], aspect=asp[[i]], scales=mt.scales,
                                      grid=grid).D[0, 0] for k in short}
        key = {k: 0.5 * (D[i, k] + rev[k]) for k in short}
        want = min(short, key=lambda k: (key[k], k))
        got = int(on["best"][i])
        # the decision's key is the definition's (the batched search may differ in the last float bits)
        assert got == want or np.isclose(key[got], key[want], rtol=1e-5)


def test_views_cut_by_the_image_border_get_frames_moved_toward_it(labelled):
    """``[mine] view_cut_offsets``: an object whose mask runs off the image is also lifted about its visible circle
    moved toward the border (``ingest.truncation``); an object wholly in view and clear of nearer objects repeats its
    visible circle, and its record is the one of the switch off (the repeated candidate is searched once).  The
    expected side is plain projection (from memory): the moved base centre projects nearer the image edge the mask
    touches than the visible circle's centre does."""
    from protomine.capture import read_capture
    from protomine.geometry import camera_to_pixel, world_to_camera
    from protomine.ingest.pipeline import capture_rng
    from protomine.ingest.proposals import find_objects
    from protomine.label.matcher import lift_frame, make_matcher
    mt = make_matcher(labelled["lib"], labelled["cfg"])
    moved = distinct = 0
    cut_ids = set()
    for path in labelled["singles"]:
        cap = read_capture(path, check_images=False)
        fr = cap.frames[0]
        scene = find_objects(cap, labelled["cfg"], capture_rng(0, cap.name), frame_ids=[fr.id])
        fo = lift_frame(scene, fr.id, mt.grid, cap.intrinsics.width, geometry_ids=False, cut_offsets=(0.25,))
        H, W = cap.intrinsics.height, cap.intrinsics.width
        fd = scene.frames[0]
        props = [p for p in scene.proposals if len(p.pixels.get(fr.id, ())) >= 10]
        assert fo.volumes.shape[:2] == (len(props), 2)
        for p, v in zip(props, fo.volumes):
            pix = p.pixels[fr.id]
            r, c = pix // W, pix % W
            edges = {"top": int(r.min() < 2), "bottom": int(r.max() >= H - 2), "left": int(c.min() < 2),
                     "right": int(c.max() >= W - 2)}
            if np.array_equal(v[0], v[1]):
                continue    # not cut, cut all round, or its cut points straddle the centre: no one direction
            distinct += 1
            cut_ids.add(p.object_id)
            if not any(edges.values()) or sum(edges.values()) > 1:
                continue    # cut by a nearer object only, or at a corner
            moved += 1
            # where the moved frame's origin is: redo the one frame and project both origins
            from protomine.label.matcher import _cut_frames
            sel = np.isin(fd.pixels, pix)
            f1 = _cut_frames(scene, fd, p, pix, fd.points[sel], fd.pixels[sel], (0.25,))[0]
            K = cap.intrinsics.K
            uv0, _ = camera_to_pixel(world_to_camera(np.asarray(p.frame.origin)[None], fd.cam_to_world), K)
            uv1, _ = camera_to_pixel(world_to_camera(np.asarray(f1.origin)[None], fd.cam_to_world), K)
            gap = lambda uv: min([uv[0, 1]] * edges["top"] + [H - 1 - uv[0, 1]] * edges["bottom"]  # noqa: E731
                                 + [uv[0, 0]] * edges["left"] + [W - 1 - uv[0, 0]] * edges["right"])
            assert gap(uv1) < gap(uv0), (p.object_id, edges)
    assert moved >= 1
    # the switch on: records of the objects not cut are those of the switch off
    lib = labelled["lib"]
    cfg_lib = lib.config
    cfg_lib["mine"]["view_cut_offsets"] = [0.25]
    lib.attrs["config"], before = json.dumps(cfg_lib), lib.attrs["config"]
    try:
        recs = label_captures(lib, labelled["singles"], labelled["cfg"], seed=0)
    finally:
        lib.attrs["config"] = before
    base = labelled["weighted"]
    assert [r["object"] for r in recs] == [r["object"] for r in base]
    assert sum(a == b for a, b in zip(recs, base)) >= len(base) - distinct - len(base) // 10
    # a record of an object not cut differs only where its decision is a near tie that the float rounding of another
    # batch flips (seen on an AVX-512 CPU: 2 of 44 views, their best prototypes 0.3% and 3% apart, the searched pose
    # on a near-tied tilt): its decided distance stays within 5%
    for a, b in zip(recs, base):
        if a["object"] not in cut_ids and a != b:
            assert abs(a["distance"] - b["distance"]) <= 0.05 * b["distance"], (a["object"], a["distance"], b["distance"])
