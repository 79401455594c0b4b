"""`protomine audit LIBRARY [TRUTH.csv] --plan N -o DIR`: the labelling sheet, read back as it is as TRUTH.csv; bad truth files.

Checks: the sheet's columns and rows against the store (object ids, frames, boxes); the filled-in sheet
accepted unchanged; one `error:` line and exit code 2 for bad input (common practice for CLIs).
"""
from __future__ import annotations

import csv
import json

import numpy as np
from typer.testing import CliRunner

from protomine.audit.plan import SHEET_COLUMNS
from protomine.cli import app
from protomine.ingest.sharded import open_store
from protomine.mine.library import read_library

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _audit(world, *args):
    return CliRunner().invoke(app, ["audit", str(world["library"]), "--store", str(world["store"]),
                                    "--config", world["config"], "-q", *map(str, args)])


def _truth_label(object_id: str) -> str:
    # tiny world: mask id 1 is the box, 2 the cylinder (conftest.two_object_scene order)
    return "box" if object_id.endswith("/1") else "cylinder"


def test_plan_without_truth_then_the_filled_sheet_is_the_truth(tmp_path, tiny_world):
    out = tmp_path / "plan"
    res = _audit(tiny_world, "--plan", 4, "--out", out)
    assert res.exit_code == 0, res.output
    assert "purity of these clusters is unknown" in res.output and "4 objects to label next" in res.output
    with open(out / "labelling_sheet.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0].keys()) == SHEET_COLUMNS and len(rows) == 4
    st = open_store(tiny_world["store"])
    m = read_library(tiny_world["library"]).members
    lib_clusters = dict(zip(m["object"].tolist(), m["cluster"].tolist()))
    for r in rows:
        i = st.index_of(r["object"])
        assert r["capture"] == st.objects["capture"][i] and r["label"] == ""
        assert int(r["cluster"]) == lib_clusters[r["object"]] and r["pick"] in ("random", "unsure")
        u0, v0, u1, v1 = map(int, r["bbox"].split())
        views = np.flatnonzero((st.views["object"] == i) & (st.views["frame"] == r["frame"]))
        assert views.size == 1 and [u0, v0, u1, v1] == st.views["bbox"][views[0]].tolist()
    assert {int(r["cluster"]) for r in rows} == {0, 1}               # both clusters, neither has labels yet
    assert (out / "labelling_sheet.png").read_bytes()[:8] == PNG_MAGIC
    assert (out / "report.html").is_file()

    # fill in the label column only, keep every other column: audit reads it as it is
    for r in rows:
        r["label"] = _truth_label(r["object"])
    sheet = tmp_path / "filled.csv"
    with open(sheet, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=SHEET_COLUMNS)
        w.writeheader()
        w.writerows(rows)
    rep = tmp_path / "report"
    res = _audit(tiny_world, sheet, "--out", rep, "--plan", 2)
    assert res.exit_code == 0, res.output
    doc = json.loads((rep / "report.json").read_text())
    assert doc["counts"]["labelled"] == 4 and doc["purity"]["clusters_labelled"] == 2
    assert "from 4 labels in 2 of 2 clusters" in doc["headline"]
    planned = [r["object"] for r in csv.DictReader(open(rep / "labelling_sheet.csv"))]
    assert len(planned) == 2 and not set(planned) & {r["object"] for r in rows}   # never asks again
    assert doc["open_set"]["views"] > 0 and 0 <= doc["open_set"]["rate"] <= 1


def test_unknown_ids_are_listed_when_another_row_matches(tmp_path, tiny_world):
    truth = tmp_path / "t.csv"
    truth.write_text("object,label\ncap0/1,box\ncap9/7,mug\n")
    res = _audit(tiny_world, truth, "--out", tmp_path / "r")
    assert res.exit_code == 0, res.output
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    assert [u["row"] for u in doc["unmatched_truth"]] == [3] and "cap9/7" in doc["unmatched_truth"][0]["reason"]
    assert "cap9/7" in (tmp_path / "r" / "report.html").read_text()


def test_bad_sheet_and_missing_inputs_get_one_error_line(tmp_path, tiny_world):
    res = _audit(tiny_world, "--out", tmp_path / "r")
    assert res.exit_code == 2 and "TRUTH.csv" in res.output and "--plan" in res.output and "Traceback" not in res.output
    sheet = tmp_path / "s.csv"
    sheet.write_text(",".join(SHEET_COLUMNS) + "\ncap0/1,cap0,000000,1 2 3 4,0,cluster 0,random,box\n"
                     "cap0/2,cap0,000000,1 2 3 4,1,cluster 1,unsure,\n")
    res = _audit(tiny_world, sheet, "--out", tmp_path / "r2")
    assert res.exit_code == 2 and "s.csv: row 3, column label: empty label" in res.output
    sheet.write_text("object,lable\ncap0/1,box\n")
    res = _audit(tiny_world, sheet, "--out", tmp_path / "r3")
    assert res.exit_code == 2 and "header" in res.output
