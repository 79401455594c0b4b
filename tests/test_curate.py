"""Curate verbs: cluster names, one-shot find/add, label export (JSON lines + COCO)."""
from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from protomine.capture import read_capture
from protomine.config import load_config
from protomine.curate.export import export_labels
from protomine.records import mask_to_rle
from protomine.curate.names import name_cluster
from protomine.curate.oneshot import MATCH_COLUMNS, add_oneshot, evaluate_oneshot, find_similar, write_matches
from protomine.errors import InputError
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.store import ObjectStore
from protomine.ingest.volume import matching_features
from protomine.mine.library import read_library
from protomine.mine.pipeline import mine_store
from protomine.mine.posesearch import pose_distances_naive
from protomine.scenes.scenario import generate_scenario

CLASSES = ["spool", "mallet", "tile_box"]


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    """A small rendered scene: 4 captures x 4 frames at 128x96, ingested with and without masks, mined (K = 3)."""
    root = tmp_path_factory.mktemp("curate")
    generate_scenario(root / "scene", n_mining=4, n_single=0, frames=4, width=128, height=96, seed=3, classes=CLASSES)
    cfg = load_config("fast")
    caps = sorted(p for p in (root / "scene").iterdir() if p.is_dir())
    ingest_captures(caps, root / "objects.h5", cfg)
    ingest_captures(caps, root / "objects_nomask.h5", cfg, use_masks=False)
    mine_store(root / "objects.h5", root / "lib" / "library.h5", cfg, seed=0, n_clusters=3)
    return {"root": root, "cfg": cfg, "caps": caps, "truth": root / "scene" / "truth.csv"}


def _copy_lib(world, tmp_path) -> Path:
    shutil.copytree(world["root"] / "lib", tmp_path / "lib")
    return tmp_path / "lib" / "library.h5"


def test_tag_names_rename_clear_and_gallery(world, tmp_path):
    path = _copy_lib(world, tmp_path)
    gallery = path.parent / "gallery.png"
    before = gallery.read_bytes()
    lib0 = read_library(path)
    oid = str(lib0.members["object"][0])
    k = int(lib0.members["cluster"][0])
    lib = name_cluster(path, name=" widget ", object_id=oid)
    lib = read_library(path)
    assert lib.names == {k: "widget"}
    assert lib.prototypes["name_example"][k] == oid
    assert gallery.read_bytes() != before                      # re-rendered with the name
    other = (k + 1) % lib.n_clusters
    name_cluster(path, name="gadget", cluster=other)
    name_cluster(path, name="sprocket", object_id=oid)         # rename
    lib = read_library(path)
    assert lib.names == {k: "sprocket", other: "gadget"}
    assert lib.prototypes["name_example"][other] == ""
    assert lib.display_name(other) == "gadget"
    name_cluster(path, name=None, cluster=k, clear=True)
    lib = read_library(path)
    assert lib.names == {other: "gadget"} and lib.display_name(k) == f"cluster-{k}"
    # everything but the names is untouched
    for f in ("features", "count", "fused_mu"):
        np.testing.assert_array_equal(lib.prototypes[f], lib0.prototypes[f])
    np.testing.assert_array_equal(lib.members["cluster"], lib0.members["cluster"])


def test_naming_several_clusters_at_once_equals_naming_them_one_by_one(world, tmp_path):
    """``name_clusters`` (one rewrite, one gallery) leaves the same library, gallery and member sheets as
    ``name_cluster`` called for each pair in turn (the reference), a later pair for a cluster winning."""
    from protomine.curate.names import name_clusters
    one = _copy_lib(world, tmp_path / "one")
    many = _copy_lib(world, tmp_path / "many")
    lib0 = read_library(one)
    firsts = {}
    for o, c in zip(lib0.members["object"], lib0.members["cluster"]):
        firsts.setdefault(int(c), str(o))
    pairs = [(o, f"item {k}") for k, o in sorted(firsts.items())] + [(firsts[min(firsts)], "renamed")]
    for oid, name in pairs:
        name_cluster(one, name=name, object_id=oid)
    name_clusters(many, pairs)
    a, b = read_library(one), read_library(many)
    assert a.names == b.names and a.names[min(firsts)] == "renamed" and len(a.names) == len(firsts) >= 2
    assert list(a.prototypes["name_example"]) == list(b.prototypes["name_example"])
    for f in sorted(p.relative_to(one.parent) for p in one.parent.rglob("*.png")):
        assert (one.parent / f).read_bytes() == (many.parent / f).read_bytes(), f


@pytest.mark.parametrize("kwargs, field", [
    ({"name": "x", "object_id": "no/such"}, "members.object"),
    ({"name": "x", "cluster": 99}, "prototypes"),
    ({"name": "  ", "cluster": 0}, "--name"),
    ({"name": "two\nlines", "cluster": 0}, "--name"),
    ({"name": "x"}, "--object/--cluster"),
    ({"name": "x", "cluster": 0, "clear": True}, "--name"),
])
def test_tag_bad_input(world, tmp_path, kwargs, field):
    path = _copy_lib(world, tmp_path)
    with pytest.raises(InputError) as e:
        name_cluster(path, **kwargs)
    assert e.value.field == field


def test_find_ranks_store_with_library_distance(world, tmp_path):
    lib = read_library(world["root"] / "lib" / "library.h5")
    st = ObjectStore(world["root"] / "objects.h5")
    ex = st.ids[1]
    mt = find_similar(lib, st, ex, world["cfg"])
    # the example matches itself at distance 0 but is not a find: it is left out of the ranking
    assert ex not in mt.object[mt.order] and len(mt.order) == len(st) - 1
    assert mt.distance[st.index_of(ex)] == pytest.approx(0.0, abs=1e-6)
    assert mt.score[st.index_of(ex)] > 0.99
    # ranked by the ranking key ([mine] find_symmetric: the shortlist by the mean of both directions, then the
    # rest by distance; without it the key is the distance)
    assert np.all(np.diff(mt.rank_key[mt.order]) >= 0)
    assert np.all((mt.score >= 0) & (mt.score <= 1))
    # score is a decreasing function of distance
    o = mt.order[np.isfinite(mt.distance[mt.order])]
    o = o[np.argsort(mt.distance[o], kind="stable")]
    assert np.all(np.diff(mt.score[o]) <= 1e-12)
    # same distances as the slow reference twin of the pose search on a few objects
    m = lib.config["mine"]
    X, W = matching_features(st.read_volumes(0, len(st)), free_weight=m["free_weight"], colour_weight=m["colour_weight"])
    sub = np.arange(min(6, len(st)))
    ref = pose_distances_naive(X[sub], W[sub], X[[st.index_of(ex)]], W[[st.index_of(ex)]], scales=lib.scales)
    np.testing.assert_allclose(mt.distance[sub], ref.D[:, 0], rtol=1e-3, atol=1e-6)
    out = write_matches(tmp_path / "m.csv", mt, top=3)
    rows = list(csv.DictReader(out.open()))
    assert tuple(rows[0]) == MATCH_COLUMNS and len(rows) == 3 and ex not in [r["object"] for r in rows]
    with pytest.raises(InputError):
        find_similar(lib, st, "no/such", world["cfg"])


def test_oneshot_retrieval_on_small_scene(world):
    lib = read_library(world["root"] / "lib" / "library.h5")
    st = ObjectStore(world["root"] / "objects.h5")
    table = evaluate_oneshot(st, world["truth"], lib, world["cfg"], np.random.default_rng(0))
    assert {r["label"] for r in table} <= set(CLASSES) and len(table) >= 2
    # three well-separated demo classes: a single example finds its class ahead of the others
    assert np.mean([r["ap"] for r in table]) >= 0.8, table
    assert all(0 <= r["p_at_10"] <= 1 and 1 <= r["k"] <= 10 for r in table)


def test_add_oneshot_moves_only_better_fits(world, tmp_path):
    path = _copy_lib(world, tmp_path)
    lib0 = read_library(path)
    st = ObjectStore(world["root"] / "objects.h5")
    ex = str(lib0.members["object"][2])
    mt = find_similar(lib0, st, ex, world["cfg"])
    lib, info = add_oneshot(path, st, ex, world["cfg"], name="newthing", matches=mt)
    lib = read_library(path)
    K = lib0.n_clusters
    assert lib.n_clusters == K + 1 and info["cluster"] == K
    assert lib.prototypes["origin"][K] == "one-shot" and lib.prototypes["name"][K] == "newthing"
    assert lib.prototypes["name_example"][K] == ex
    np.testing.assert_array_equal(lib.prototypes["features"][:K], lib0.prototypes["features"])
    assert lib.prototypes["count"].sum() == len(lib.members["object"]) == len(lib0.members["object"])
    moved = lib.members["cluster"] != lib0.members["cluster"]
    assert lib.members["cluster"][lib0.member_index(ex)] == K
    assert np.all(lib.members["cluster"][moved] == K)
    idx = np.array([st.index_of(str(o)) for o in lib0.members["object"]])
    assert np.all(mt.score[idx][moved] > lib0.members["score"][moved])
    assert np.all(mt.score[idx][~moved] <= lib0.members["score"][~moved])
    np.testing.assert_array_equal(lib.members["score"][~moved], lib0.members["score"][~moved])
    rows = list(csv.DictReader((path.parent / "assignments.csv").open()))
    assert sum(int(r["cluster"]) == K for r in rows) == int(moved.sum())
    with pytest.raises(InputError):
        add_oneshot(path, st, ex, world["cfg"], name="")


def _rle_decode(rle: dict) -> np.ndarray:
    """COCO data format (Lin et al. 2014, cocodataset.org format description), from memory: uncompressed
    RLE counts alternate runs of 0s and 1s, starting with 0s, over the mask flattened column by column."""
    h, w = rle["size"]
    flat = np.zeros(h * w, bool)
    pos, val = 0, False
    for c in rle["counts"]:
        flat[pos:pos + c] = val
        pos += c
        val = not val
    assert pos == h * w
    return flat.reshape((w, h)).T


def test_rle_hand_worked():
    # column-major: [[0, 1], [1, 1]] -> 0, 1, 1, 1 -> one 0, three 1s (COCO format description, from memory)
    assert mask_to_rle(np.array([[0, 1], [1, 1]], bool)) == {"size": [2, 2], "counts": [1, 3]}
    # a mask that starts with a 1 begins with an empty run of 0s
    assert mask_to_rle(np.array([[1, 0, 0]], bool)) == {"size": [1, 3], "counts": [0, 1, 2]}
    m = np.random.default_rng(1).random((7, 5)) > 0.5
    np.testing.assert_array_equal(_rle_decode(mask_to_rle(m)), m)


def test_export_coco_structure(world, tmp_path):
    path = _copy_lib(world, tmp_path)
    name_cluster(path, name="first", cluster=0)
    lib = read_library(path)
    st = ObjectStore(world["root"] / "objects.h5")
    caps = world["caps"][:2]
    s = export_labels(lib, st, caps, tmp_path / "out", world["cfg"], min_score=0.0)
    coco = json.loads((tmp_path / "out" / "instances.json").read_text())
    assert set(coco) >= {"images", "annotations", "categories"}
    img = {i["id"]: i for i in coco["images"]}
    assert len(img) == len(coco["images"]) == sum(len(read_capture(c).frames) for c in caps)
    ann_ids = [a["id"] for a in coco["annotations"]]
    assert len(set(ann_ids)) == len(ann_ids) > 0
    cats = {c["id"]: c["name"] for c in coco["categories"]}
    assert len(set(cats.values())) == len(cats) and "first" in cats.values()
    assert set(cats.values()) >= {f"cluster-{k}" for k in range(1, lib.n_clusters)}
    masks = {}
    for a in coco["annotations"]:
        assert set(a) >= {"id", "image_id", "category_id", "bbox", "area", "segmentation", "iscrowd"}
        im = img[a["image_id"]]
        x, y, w, h = a["bbox"]
        assert 0 <= x and 0 <= y and w > 0 and h > 0 and x + w <= im["width"] and y + h <= im["height"]
        assert a["category_id"] in cats
        m = _rle_decode(a["segmentation"])
        assert a["segmentation"]["size"] == [im["height"], im["width"]]
        assert m.sum() == a["area"]
        vv, uu = np.nonzero(m)
        assert [uu.min(), vv.min(), uu.max() + 1 - uu.min(), vv.max() + 1 - vv.min()] == a["bbox"]
        # the decoded mask is exactly the capture's mask for that object id
        cap = read_capture(Path(caps[0]).parent / im["capture"])
        key = int(a["object"].split("/")[1])
        np.testing.assert_array_equal(m, cap.mask(im["frame"]) == key)
        masks[a["id"]] = m
    lines = [json.loads(l) for l in (tmp_path / "out" / "labels.jsonl").read_text().splitlines()]
    assert len(lines) == s["labels"] >= len(coco["annotations"])
    assert set(lines[0]) >= {"frame", "object", "bbox", "cluster", "name", "yaw_deg", "scale", "center_world", "score", "unknown"}
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert "not ground truth" in summary["note"] and summary["dropped_below_min_score"] == 0
    assert sum(r["labels"] for r in summary["classes"]) == len(lines)
    # --min-score drops exactly the labels below it, and says how many
    thr = float(np.median([l["score"] for l in lines]))
    s2 = export_labels(lib, st, caps, tmp_path / "out2", world["cfg"], min_score=thr)
    assert s2["dropped_below_min_score"] == sum(l["score"] < thr for l in lines) > 0
    assert s2["labels"] + s2["dropped_below_min_score"] == len(lines)


def test_export_mask_free_rederives_store_pixels(world, tmp_path):
    lib = read_library(world["root"] / "lib" / "library.h5")
    st = ObjectStore(world["root"] / "objects_nomask.h5")
    s = export_labels(lib, st, world["caps"][:2], tmp_path / "out", world["cfg"])
    assert s["objects_without_pixels"] == 0
    views = {(st.ids[o], f): list(map(int, b)) for o, f, b in zip(st.views["object"], st.views["frame"], st.views["bbox"])}
    lines = [json.loads(l) for l in (tmp_path / "out" / "labels.jsonl").read_text().splitlines()]
    assert len(lines) == sum(1 for (o, _) in views if o.split("/")[0] in {c.name for c in world["caps"][:2]})
    assert all(views[(l["object"], l["frame"])] == l["bbox"] for l in lines)
    # the library was mined from the masked store: these ids are not its members, so every label is unknown
    assert all(l["unknown"] and l["cluster"] is None for l in lines) and s["annotations"] == 0


def test_export_bad_input(world, tmp_path):
    lib = read_library(world["root"] / "lib" / "library.h5")
    st = ObjectStore(world["root"] / "objects.h5")
    with pytest.raises(InputError):
        export_labels(lib, st, [tmp_path / "not_ingested"], tmp_path / "o", world["cfg"])
    with pytest.raises(InputError):
        export_labels(lib, st, [], tmp_path / "o", world["cfg"])


def test_cli_tag_find_export(world, tmp_path):
    from protomine.cli import app
    path = _copy_lib(world, tmp_path)
    store = world["root"] / "objects.h5"
    r = CliRunner().invoke(app, ["tag", str(path), "--cluster", "1", "--name", "thing", "-q"])
    assert r.exit_code == 0, r.output
    assert "thing" in r.output
    r = CliRunner().invoke(app, ["tag", str(path), "--cluster", "50", "--name", "x"])
    assert r.exit_code == 2
    ex = ObjectStore(store).ids[0]
    r = CliRunner().invoke(app, ["find", str(path), str(store), "--example", ex, "--top", "4", "--out", str(tmp_path / "m.csv"), "-q"])
    assert r.exit_code == 0, r.output
    assert len((tmp_path / "m.csv").read_text().splitlines()) == 5
    r = CliRunner().invoke(app, ["find", str(path), str(store), "--example", "no/such", "--out", str(tmp_path / "m.csv")])
    assert r.exit_code == 2
    r = CliRunner().invoke(app, ["export", str(path), str(store), str(world["caps"][0]), "--out", str(tmp_path / "e"), "-q"])
    assert r.exit_code == 0, r.output
    assert "not ground truth" in r.output and (tmp_path / "e" / "instances.json").is_file()
