"""Audit report from synthetic inputs, and the truth CSV reader / matcher."""
from __future__ import annotations

import base64
import json
import re

import numpy as np
import pytest

from protomine.audit.report import Assignments, NOTICE, build_audit, write_report
from protomine.audit.truth import ObjectTable, TruthRow, match_truth, read_truth
from protomine.config import load_config
from protomine.errors import InputError

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _scene(seed: int = 0):
    """Synthetic library output: clusters 0 (mug, clean), 1 (box + can, mixed), 2 (mug again), 3 (no labels)."""
    rng = np.random.default_rng(seed)
    plan = [(0, "mug", 10), (1, "box", 6), (1, "can", 5), (2, "mug", 8), (3, None, 6)]
    ids, cl, labels = [], [], []
    for c, lab, n in plan:
        for _ in range(n):
            ids.append(f"cap{len(ids) % 2}/{len(ids) + 1}")
            cl.append(c)
            labels.append(lab)
    n = len(ids)
    yaw = rng.uniform(0, 360, n)
    asg = Assignments(ids, cl, yaw, rng.uniform(0.9, 1.1, n), rng.random(n), rng.random(n))
    objects = ObjectTable(ids, [i.split("/")[0] for i in ids], rng.normal(size=(n, 3)) * 0.5)
    offsets = {0: 30.0, 1: 200.0, 2: 10.0, 3: 0.0}
    rows = []
    for i, (oid, c, lab) in enumerate(zip(ids, cl, labels)):
        if lab is None or i % 3 == 2:                  # a third of the objects stay unlabelled
            continue
        rows.append(TruthRow(row=len(rows) + 2, label=lab, object=oid,
                             yaw_deg=float((yaw[i] + offsets[c] + rng.normal(0, 2)) % 360)))
    rows.append(TruthRow(row=99, label="mug", capture="cap0", point=(40.0, 0.0, 0.0)))   # matches nothing
    return asg, rows, objects


def _audit(seed: int = 0, **kw):
    asg, rows, objects = _scene(seed)
    cfg = load_config("fast")
    return build_audit(asg, rows, objects, symmetry_period_deg={0: 360.0, 1: 180.0, 2: 360.0, 3: float("inf")},
                       names={0: "tall mug"}, cfg=cfg, rng=np.random.default_rng(seed), **kw)


def test_build_audit_numbers_and_verdicts():
    a = _audit()
    json.dumps(a, allow_nan=False)                              # plain, strict JSON
    assert a["notice"] == NOTICE and "not ground truth" in a["notice"]
    n = a["counts"]
    assert n["objects"] == 35 and n["clusters"] == 4
    assert n["unmatched_truth_rows"] == 1 and a["unmatched_truth"][0]["row"] == 99
    assert n["labelled"] + n["unlabelled_objects"] == n["objects"]
    assert len(a["unlabelled_objects"]) == n["unlabelled_objects"]
    by = {c["cluster"]: c for c in a["clusters"]}
    assert by[0]["name"] == "tall mug" and by[1]["name"] == "cluster 1"
    assert by[1]["verdict"] == "mixed" and set(by[1]["split_labels"]) == {"box", "can"}
    # clusters 0 and 2 are both clean "mug": the better-supported one stays, the other is a duplicate of it
    assert {by[0]["verdict"], by[2]["verdict"]} == {"clean", "duplicate"}
    dup = by[0] if by[0]["verdict"] == "duplicate" else by[2]
    assert dup["merge_with"] in (0, 2) and dup["merge_with"] != dup["cluster"]
    assert by[3]["verdict"] == "unlabelled" and by[3]["purity"] is None
    assert by[3]["purity_interval"] == [0.0, 1.0]
    for c in a["clusters"]:
        assert c["size"] == len(c["members"])
        assert c["labels_needed"] >= 1 and c["more_labels_needed"] == max(c["labels_needed"] - c["labelled"], 0)
    # global numbers consistent with the per-cluster table
    s = a["scores"]
    k = sum(max(c["label_counts"].values()) for c in a["clusters"] if c["labelled"])
    assert s["purity"] == pytest.approx(k / n["labelled"])
    # overall purity: size-weighted over the 3 labelled clusters (cluster 3 has none), interval never zero-width
    lab = [c for c in a["clusters"] if c["labelled"]]
    w = np.array([c["size"] for c in lab], float)
    p = np.array([max(c["label_counts"].values()) / c["labelled"] for c in lab])
    assert a["purity"]["estimate"] == pytest.approx(float((w * p).sum() / w.sum()))      # stratified mean, by hand
    lo, hi = a["purity"]["interval"]
    assert 0 <= lo < a["purity"]["estimate"] <= hi <= 1
    assert a["purity"]["clusters_labelled"] == 3 and a["purity"]["clusters"] == 4
    # unlabelled cluster 3 (6 of 35 objects) may hold anything: the all-objects bound widens by its share
    assert a["purity"]["all_objects_interval"][0] == pytest.approx(lo * 29 / 35)
    assert "3 of 4 clusters" in a["headline"] and "unknown purity" in a["headline"]
    for key in ("nmi", "ari", "hungarian_accuracy"):
        iv = a["intervals"][key]
        assert (iv["interval"] is None) != (iv["reason"] is None)
    # yaw: offsets recovered, small errors (noise sd 2 degrees); cluster 3 has no truth yaw
    assert by[0]["pose"]["offset_deg"] == pytest.approx(30.0, abs=3)
    assert by[1]["pose"]["offset_deg"] == pytest.approx(200.0 % 180, abs=3)      # modulo the 2-fold period
    assert a["pose"]["median_error_deg"] < 4 and a["pose"]["n"] == n["labelled_with_yaw"]
    assert [p["draws"] for p in a["propagation"]] == [1, 3, 5]
    for p in a["propagation"]:
        assert p["interval"][0] <= p["mean"] <= p["ceiling"] + 1e-12


def test_build_audit_same_seed_same_numbers():
    assert _audit(3) == _audit(3)


def test_write_report_files_and_self_contained_html(tmp_path):
    a = _audit(provenance={"seed": 0, "producer": "protomine"})
    gallery = tmp_path / "in_gallery.png"
    from PIL import Image
    Image.new("RGB", (20, 10), (200, 50, 50)).save(gallery)
    seen = []

    def crops(oid: str) -> list[np.ndarray]:
        seen.append(oid)
        return [np.full((48, 40, 3), (hash(oid) % 200) + 20, np.uint8)]

    out = tmp_path / "report"
    written = write_report(out, a, gallery_png=gallery, crops=crops)
    for name in ("yaw_error.png", "gallery.png", "cluster_0.png", "cluster_3.png"):
        assert (out / name).read_bytes()[:8] == PNG_MAGIC
        assert written[name] == out / name
    assert not [p for p in out.iterdir() if ".tmp-" in p.name]     # atomic writes left no temporaries
    doc = json.loads((out / "report.json").read_text())
    for key in ("format", "notice", "headline", "purity", "counts", "scores", "intervals", "clusters", "confusion",
                "pose", "propagation", "unlabelled_objects", "unmatched_truth", "labelled_unassigned", "provenance"):
        assert key in doc
    page = (out / "report.html").read_text()
    assert "not ground truth" in page
    srcs = re.findall(r'src="([^"]*)"', page)
    # every written picture but the per-cluster sheets is on the page, plus one member strip per cluster row
    assert len(srcs) == len([n for n in written if n.endswith(".png") and not n.startswith("cluster_")]) + 4
    assert page.index(a["headline"].split(",")[0]) < page.index("<table")     # the headline comes first
    assert "inverse_purity" not in page and "Inverse purity" in page            # readable metric names
    for s in srcs:                                               # every image is embedded, none linked
        assert s.startswith("data:image/png;base64,")
        assert base64.b64decode(s.split(",", 1)[1])[:8] == PNG_MAGIC
    assert "http" not in page and "<link" not in page and "<script" not in page
    assert "split:" in page and "merge into cluster" in page
    assert "row 99" in page                                      # unmatched rows are listed, not dropped
    assert set(seen) >= {m["object"] for c in a["clusters"] for m in c["members"]}


def test_write_report_rejects_bad_gallery(tmp_path):
    bad = tmp_path / "g.png"
    bad.write_text("not a png")
    with pytest.raises(InputError, match="PNG"):
        write_report(tmp_path / "r", _audit(), gallery_png=bad)


def test_audit_without_any_labelled_object(tmp_path):
    asg, _, objects = _scene()
    rows = [TruthRow(row=2, label="mug", capture="cap1", point=(99.0, 0.0, 0.0))]
    a = build_audit(asg, rows, objects, symmetry_period_deg={}, names={}, cfg=load_config("fast"),
                    rng=np.random.default_rng(0))
    assert a["scores"] is None and a["counts"]["labelled"] == 0 and a["counts"]["unmatched_truth_rows"] == 1
    write_report(tmp_path / "r", a)
    assert "nothing can be scored" in (tmp_path / "r" / "report.html").read_text()


def test_labelled_but_unassigned_objects_are_listed():
    asg, rows, objects = _scene()
    cl = asg.cluster.copy()
    cl[0] = -1                                                   # the first (labelled) object left unassigned
    asg2 = Assignments(asg.object_ids, cl, asg.yaw_deg, asg.scale, asg.distance, asg.score)
    a = build_audit(asg2, rows, objects, symmetry_period_deg={}, names={}, cfg=load_config("fast"),
                    rng=np.random.default_rng(0))
    assert a["counts"]["labelled_unassigned"] == 1 and a["labelled_unassigned"][0]["object"] == asg.object_ids[0]
    assert a["counts"]["unassigned"] == 1


def test_assigned_object_missing_from_store_is_an_input_error():
    asg, rows, objects = _scene()
    small = ObjectTable(objects.ids[1:], objects.captures[1:], objects.centres[1:])
    with pytest.raises(InputError, match="not in the object store"):
        build_audit(asg, [], small, symmetry_period_deg={}, names={}, cfg=load_config("fast"),
                    rng=np.random.default_rng(0))


# --- truth CSV ---------------------------------------------------------------------------------

def _write(tmp_path, text: str):
    p = tmp_path / "truth.csv"
    p.write_text(text)
    return p


def test_read_truth_by_object(tmp_path):
    rows = read_truth(_write(tmp_path, "object,label,yaw_deg\ncap0/1,mug,370\ncap0/2, box ,\n\n"))
    assert [r.object for r in rows] == ["cap0/1", "cap0/2"]
    assert rows[0].yaw_deg == pytest.approx(10.0) and rows[1].yaw_deg is None
    assert rows[1].label == "box" and rows[1].row == 3


def test_read_truth_by_point(tmp_path):
    rows = read_truth(_write(tmp_path, "capture,x,y,z,label\ncapA,0.1,-0.2,0.3,can\n"))
    assert rows[0].capture == "capA" and rows[0].point == (0.1, -0.2, 0.3) and rows[0].yaw_deg is None


@pytest.mark.parametrize("text, field, words", [
    ("label,yaw_deg\nmug,3\n", "header", "expected columns"),
    ("capture,x,y,label\ncapA,1,2,mug\n", "header", "missing column(s) z"),
    ("object,label,yaw_deg\ncap0/1,mug,abc\n", "row 2, column yaw_deg", "expected a number, got 'abc'"),
    ("capture,x,y,z,label\ncapA,1,nan,0,mug\n", "row 2, column y", "finite"),
    ("object,label\ncap0/1,mug\ncap0/2,\n", "row 3, column label", "empty label"),
    ("object,label\ncap0/1,mug\ncap0/1,box\n", "row 3, column object", "already labelled in row 2"),
    ("object,label\ncap0/1,mug,extra\n", "row 2", "expected 2 cells"),
    ("", "header", "empty file"),
])
def test_read_truth_errors_name_file_row_column(tmp_path, text, field, words):
    p = _write(tmp_path, text)
    with pytest.raises(InputError) as e:
        read_truth(p)
    assert e.value.path == str(p) and e.value.field == field and words in e.value.message


def test_read_truth_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_truth(tmp_path / "nope.csv")


def _table():
    return ObjectTable(["a/1", "a/2", "b/1"], ["a", "a", "b"], [[0, 0, 0], [1, 0, 0], [0, 0, 0]])


def test_match_by_id_unknown_id_is_listed_when_another_row_matches(tmp_path):
    rows = [TruthRow(row=2, label="mug", object="a/1"), TruthRow(row=3, label="box", object="zz/9")]
    m = match_truth(rows, _table(), radius_m=0.05, path=tmp_path / "t.csv")
    assert [r.row for r in m.rows] == [2]
    assert [(r.row, "zz/9" in why) for r, why in m.unmatched] == [(3, True)]


def test_match_by_id_only_unknown_ids_is_error(tmp_path):
    rows = [TruthRow(row=2, label="mug", object="zz/8"), TruthRow(row=3, label="box", object="zz/9")]
    with pytest.raises(InputError) as e:
        match_truth(rows, _table(), radius_m=0.05, path=tmp_path / "t.csv")
    assert e.value.field == "row 2, column object" and "zz/8" in e.value.message and "2 unknown" in e.value.message


def test_match_by_point_nearest_within_radius():
    rows = [
        TruthRow(row=2, label="mug", capture="a", point=(0.02, 0.0, 0.0)),     # -> a/1
        TruthRow(row=3, label="box", capture="a", point=(0.99, 0.01, 0.0)),    # -> a/2
        TruthRow(row=4, label="can", capture="b", point=(0.5, 0.0, 0.0)),      # too far from b/1
        TruthRow(row=5, label="cup", capture="a", point=(0.01, 0.0, 0.0)),     # nearer to a/1 than row 2
    ]
    m = match_truth(rows, _table(), radius_m=0.05)
    got = {r.row: int(i) for r, i in zip(m.rows, m.object_index)}
    assert got == {3: 1, 5: 0}
    reasons = {r.row: why for r, why in m.unmatched}
    assert "within 0.05 m" in reasons[4] and "nearer row 5" in reasons[2]
    assert m.unlabelled.tolist() == [2]
    assert m.distance_m.tolist() == pytest.approx([0.01 * 2 ** 0.5, 0.01])


def test_match_by_point_unknown_capture_is_error():
    with pytest.raises(InputError, match="unknown capture"):
        match_truth([TruthRow(row=2, label="x", capture="zz", point=(0, 0, 0))], _table(), radius_m=0.05)


def test_unlabelled_cluster_named_like_a_clean_one_is_a_duplicate():
    # cluster 3 has no hand labels, but the user named it "mug" like the clean mug clusters: suggest a merge
    asg, rows, objects = _scene(0)
    a = build_audit(asg, rows, objects, symmetry_period_deg={0: 360.0, 1: 180.0, 2: 360.0, 3: float("inf")},
                    names={3: "mug"}, cfg=load_config("fast"), rng=np.random.default_rng(0))
    by = {c["cluster"]: c for c in a["clusters"]}
    assert by[3]["verdict"] == "duplicate" and by[3]["merge_with"] in (0, 2)


def test_pose_consistency_uses_the_rotation_error_modulo_the_prototype_group(tmp_path):
    # truth poses R_true = R_pred g O (one offset O per cluster, g a symmetry of the prototype) plus a small
    # known turn per object; the error is that turn's angle (scipy.spatial.transform.Rotation.magnitude as the
    # reference) once the prototype's group (scipy's D2: half turns about x, y, z) absorbs g
    from scipy.spatial.transform import Rotation
    rng = np.random.default_rng(5)
    n = 12
    ids = [f"cap0/{i + 1}" for i in range(n)]
    Rp = Rotation.random(n, random_state=1)
    group = Rotation.create_group("D2")
    g = group[rng.integers(0, len(group), n)]
    turn = Rotation.from_rotvec(rng.normal(size=(n, 3)) * np.deg2rad(4.0))
    O = Rotation.random(random_state=2)
    Rt = turn * Rp * g * O
    asg = Assignments(ids, np.zeros(n, int), np.zeros(n), np.ones(n), np.ones(n), np.ones(n), rotation=Rp.as_quat())
    rows = [TruthRow(row=i + 2, label="tile", object=oid, rotation=tuple(Rt[i].as_quat())) for i, oid in enumerate(ids)]
    objects = ObjectTable(ids, ["cap0"] * n, np.zeros((n, 3)))
    a = build_audit(asg, rows, objects, symmetry_period_deg={0: 180.0}, names={}, cfg=load_config("fast"),
                    rng=np.random.default_rng(0), symmetry_groups={0: group.as_matrix()})
    pose = a["clusters"][0]["pose"]
    assert pose["kind"] == "rotation" and pose["n"] == n
    # the medoid offset is one member's: errors are relative to that member's turn, so within twice the turns
    ref = turn.magnitude() * 180 / np.pi
    assert np.max(pose["errors_deg"]) <= 2 * ref.max() + 1e-6
    assert np.median(pose["errors_deg"]) < 10.0
    # without the group the half turns g show up as errors near 180 degrees
    b = build_audit(asg, rows, objects, symmetry_period_deg={0: 180.0}, names={}, cfg=load_config("fast"),
                    rng=np.random.default_rng(0))
    assert np.max(b["clusters"][0]["pose"]["errors_deg"]) > 150.0
    # the truth CSV's quaternion columns are read into the rows
    p = tmp_path / "truth.csv"
    p.write_text("object,label,qx,qy,qz,qw\ncap0/1,tile,0,0,0,1\ncap0/2,tile,,,,\n")
    got = read_truth(p)
    assert got[0].rotation == (0.0, 0.0, 0.0, 1.0) and got[1].rotation is None
