"""The command-line grammar (cliutil docstring): positional inputs, -o/--out as the main output, one meaning
per short flag, pipeline order, --keep-going, find without its example, export from label output.

External references: shell glob expansion is Python's ``glob.glob`` (what a POSIX shell hands a command);
COCO uncompressed RLE is decoded here from its published definition (column-major run lengths starting
with zeros, cocodataset.org "Data format"), sharing no code with protomine.records; object pixels are
counted in the capture's own masks/ PNGs written by the renderer.
"""
from __future__ import annotations

import glob
import json
import shutil

import numpy as np
import pytest
from PIL import Image
from typer.main import get_command
from typer.testing import CliRunner

from protomine.cli import app

from conftest import make_tiny_capture, two_object_scene

PIPELINE = ["scenes", "ingest", "mine", "label", "tag", "find", "export", "audit"]


def _run(*argv):
    return CliRunner().invoke(app, [str(a) for a in argv])


def _rle_decode(rle: dict) -> np.ndarray:
    """COCO uncompressed RLE -> bool (h, w), from the format's definition (runs alternate 0s and 1s,
    column-major, the first run counts 0s)."""
    h, w = rle["size"]
    flat, val = [], 0
    for n in rle["counts"]:
        flat += [val] * n
        val = 1 - val
    return np.array(flat, bool).reshape((w, h)).T


def test_commands_in_pipeline_order_and_one_meaning_per_short_flag():
    group = get_command(app)
    names = list(group.list_commands(None))
    assert [n for n in names if n in PIPELINE] == PIPELINE
    meaning: dict[str, set[str]] = {}
    for name in names:
        for p in group.commands[name].params:
            shorts = [o for o in getattr(p, "opts", []) if o.startswith("-") and not o.startswith("--")]
            longs = [o for o in getattr(p, "opts", []) if o.startswith("--")]
            for s in shorts:
                meaning.setdefault(s, set()).update(longs)
    assert {s: m for s, m in meaning.items() if len(m) > 1} == {}
    assert meaning["-o"] == {"--out"}


def test_main_output_is_always_out_and_help_has_no_type_placeholders():
    group = get_command(app)
    for name in PIPELINE:
        res = _run(name, "--help")
        assert res.exit_code == 0
        assert "<bool>" not in res.output and "<path>" not in res.output and "{" not in res.output.split("\n")[0]
        if name != "tag":        # tag rewrites its input library in place
            out = [p for p in group.commands[name].params if "--out" in getattr(p, "opts", [])]
            assert out and "-o" in out[0].opts and out[0].required, name


def test_options_that_do_nothing_are_gone():
    # tag has no randomness and no config; find and export have no randomness
    for argv in (["tag", "x.h5", "--seed", "1"], ["tag", "x.h5", "--config", "fast"], ["find", "--seed", "1"],
                 ["export", "--seed", "1"]):
        res = _run(*argv)
        assert res.exit_code == 2 and "No such option" in res.output, argv


def test_export_takes_captures_as_a_glob(tmp_path, tiny_world):
    caps = tmp_path / "caps"
    for c in tiny_world["caps"]:
        shutil.copytree(c, caps / c.name)
    expanded = sorted(glob.glob(str(caps / "cap*")))          # what `export ... caps/cap*` receives from a shell
    res = _run("export", tiny_world["library"], tiny_world["store"], *expanded, "-o", tmp_path / "e", "-q")
    assert res.exit_code == 0, res.output
    summary = json.loads((tmp_path / "e" / "summary.json").read_text())
    assert summary["captures"] == ["cap0", "cap1", "cap2"]
    assert summary["images"] == sum(len(json.loads((c / "capture.json").read_text())["frames"]) for c in tiny_world["caps"])
    assert not list((tmp_path / "e").glob("*.lock"))


def test_o_is_the_main_output_of_ingest_mine_find(tmp_path, tiny_world):
    conf = tiny_world["config"]
    store, lib, matches = tmp_path / "s.h5", tmp_path / "lib" / "l.h5", tmp_path / "m.csv"
    assert _run("ingest", *tiny_world["caps"][:2], "-o", store, "-c", conf, "-q").exit_code == 0
    res = _run("mine", store, "-o", lib, "-k", "2", "-c", conf, "-q")
    assert res.exit_code == 0, res.output
    assert store.is_file() and lib.is_file()
    assert {"assignments.csv", "gallery.png", "provenance.json", "members"} <= {p.name for p in lib.parent.iterdir()}
    assert len(list((lib.parent / "members").glob("cluster-*.png"))) == 2
    res = _run("find", lib, store, "-e", "cap0/1", "-o", matches, "-c", conf, "-q")
    assert res.exit_code == 0, res.output
    assert matches.is_file()


def test_find_leaves_the_example_out_of_ranking_and_counts(tmp_path, tiny_world):
    out = tmp_path / "m.csv"
    res = _run("find", tiny_world["library"], tiny_world["store"], "-e", "cap0/1", "-o", out, "-c", tiny_world["config"])
    assert res.exit_code == 0, res.output
    rows = out.read_text().splitlines()[1:]
    ids = [r.split(",")[0] for r in rows]
    assert "cap0/1" not in ids and len(ids) == 6 - 1          # 3 captures x 2 objects, minus the example
    assert "5 objects ranked" in res.stdout


def _bad_json(folder):
    (folder / "capture.json").write_text("{not json")


def _missing_rgb(folder):
    next((folder / "rgb").iterdir()).unlink()


def test_ingest_lists_every_bad_capture_before_work(tmp_path, tiny_world):
    good = tiny_world["caps"][0]
    a, b = tmp_path / "a", tmp_path / "b"
    shutil.copytree(good, a)
    shutil.copytree(good, b)
    _bad_json(a)
    _missing_rgb(b)
    res = _run("ingest", good, a, b, "-o", tmp_path / "s.h5", "-c", tiny_world["config"], "-q")
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 2 and all(l.startswith("error: ") for l in lines), res.stderr
    assert str(a / "capture.json") in lines[0] and "rgb" in lines[1] and str(b) in lines[1]
    assert not (tmp_path / "s.h5").exists()


def test_keep_going_skips_one_bad_and_one_empty_capture(tmp_path, tiny_world):
    from protomine.ingest.sharded import open_store
    good = [tmp_path / "g0", tmp_path / "g1"]
    for c, g in zip(tiny_world["caps"][:2], good):
        shutil.copytree(c, g)
    bad = tmp_path / "bad"
    shutil.copytree(tiny_world["caps"][2], bad)
    _bad_json(bad)
    empty = make_tiny_capture(tmp_path / "empty", [], n_frames=2)   # the table and nothing on it
    argv = ["ingest", good[0], bad, empty, good[1], "-o", tmp_path / "s.h5", "-c", tiny_world["config"], "-q"]
    res = _run(*argv)
    assert res.exit_code == 2 and not (tmp_path / "s.h5").exists()
    res = _run(*argv, "--keep-going")
    assert res.exit_code == 3, res.output
    assert "2 of 4 captures skipped" in res.stderr
    skipped = [l for l in res.stderr.splitlines() if l.startswith("skipped: ")]
    assert len(skipped) == 2 and str(bad) in skipped[0] and "empty" in skipped[1] and "no objects" in skipped[1]
    st = open_store(tmp_path / "s.h5")
    assert sorted(set(st.objects["capture"])) == ["g0", "g1"] and len(st) == 4
    assert "ingested 4 objects from 2 captures" in res.stdout


def test_export_from_label_output_of_frames_never_ingested(tmp_path, tiny_world):
    new = [make_tiny_capture(tmp_path / f"new{k}", two_object_scene(k + 4), n_frames=1, world_seed=k + 4)
           for k in range(2)]
    labels = tmp_path / "labels.jsonl"
    res = _run("label", tiny_world["library"], *new, "-o", labels, "-q")
    assert res.exit_code == 0, res.output
    recs = [json.loads(l) for l in labels.read_text().splitlines()]
    assert recs and all(r["source"] == "single-view" for r in recs)
    for r in recs:   # alternatives follow the decision: nearest first, each with its distance and score
        d = [a["distance"] for a in r["alternatives"]]
        assert d == sorted(d) and all(x >= r["distance"] for x in d)
        assert all({"cluster", "name", "distance", "score"} <= a.keys() for a in r["alternatives"])
    res = _run("export", tiny_world["library"], labels, *new, "-o", tmp_path / "e", "-q")
    assert res.exit_code == 0, res.output
    coco = json.loads((tmp_path / "e" / "instances.json").read_text())
    assert [i["file_name"] for i in coco["images"]] == ["new0/rgb/000000.png", "new1/rgb/000000.png"]
    known = [r for r in recs if not r["unknown"]]
    assert len(coco["annotations"]) == len(known) > 0
    for ann in coco["annotations"]:
        img = coco["images"][ann["image_id"] - 1]
        mask_id = int(ann["object"].split("/")[-1])
        with Image.open(tmp_path / img["capture"] / "masks" / f"{img['frame']}.png") as im:
            truth = np.asarray(im) == mask_id
        m = _rle_decode(ann["segmentation"])
        assert m.shape == truth.shape and ann["area"] == int(m.sum())
        assert (m & truth).sum() / max((m | truth).sum(), 1) > 0.99       # the object's own pixels
    exported = [json.loads(l) for l in (tmp_path / "e" / "labels.jsonl").read_text().splitlines()]
    assert exported == recs                                               # one record schema everywhere


def test_export_of_a_store_writes_the_same_record_fields_as_label(tmp_path, tiny_world):
    res = _run("export", tiny_world["library"], tiny_world["store"], tiny_world["caps"][0], "-o", tmp_path / "e", "-q")
    assert res.exit_code == 0, res.output
    rec = json.loads((tmp_path / "e" / "labels.jsonl").read_text().splitlines()[0])
    new = make_tiny_capture(tmp_path / "n", two_object_scene(1), n_frames=1)
    assert _run("label", tiny_world["library"], new, "-o", tmp_path / "l.jsonl", "-q").exit_code == 0
    lab = json.loads((tmp_path / "l.jsonl").read_text().splitlines()[0])
    assert rec.keys() == lab.keys() and rec["source"] == "mined"
    from protomine.records import FIELDS
    assert set(FIELDS) <= rec.keys()


@pytest.mark.parametrize("line, field", [
    ("{broken", "line 1"),
    ('{"capture": "new0"}', "line 1.frame"),
])
def test_export_of_bad_label_output_is_one_line(tmp_path, tiny_world, line, field):
    labels = tmp_path / "labels.jsonl"
    labels.write_text(line + "\n")
    res = _run("export", tiny_world["library"], labels, tiny_world["caps"][0], "-o", tmp_path / "e")
    assert res.exit_code == 2
    assert res.stderr.count("\n") == 1 and res.stderr.startswith(f"error: {labels}: {field}")


def test_label_with_another_grid_says_so(tmp_path, tiny_world):
    new = make_tiny_capture(tmp_path / "n", two_object_scene(1), n_frames=1)
    res = _run("label", tiny_world["library"], new, "-o", tmp_path / "l.jsonl", "-c", "fast", "-q")
    assert res.exit_code == 0
    assert "notice:" in res.stderr and "volume.azimuth_bins=12" in res.stderr


def test_mine_with_another_grid_says_so_and_records_the_store_grid(tmp_path, tiny_world):
    from protomine.mine.library import read_library
    lib = tmp_path / "l.h5"
    res = _run("mine", tiny_world["store"], "-o", lib, "-k", "2", "-c", "fast", "-q")
    assert res.exit_code == 0, res.output
    assert "notice:" in res.stderr and "volume.azimuth_bins=12" in res.stderr
    assert read_library(lib).config["volume"]["azimuth_bins"] == 12          # usable by label: the store's grid
    new = make_tiny_capture(tmp_path / "n", two_object_scene(1), n_frames=1)
    assert _run("label", lib, new, "-o", tmp_path / "l.jsonl", "-q").exit_code == 0


def test_label_lists_every_bad_capture_before_work(tmp_path, tiny_world):
    a, b = tmp_path / "a", tmp_path / "b"
    shutil.copytree(tiny_world["caps"][0], a)
    shutil.copytree(tiny_world["caps"][1], b)
    _bad_json(a)
    _missing_rgb(b)
    res = _run("label", tiny_world["library"], a, tiny_world["caps"][2], b, "-o", tmp_path / "l.jsonl")
    assert res.exit_code == 2 and not (tmp_path / "l.jsonl").exists()
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 2 and str(a) in lines[0] and str(b) in lines[1]


@pytest.mark.parametrize("module", ["protomine", "protomine.cli"])
def test_python_dash_m_runs_the_same_command_line(module):
    """``python -m protomine`` and ``python -m protomine.cli`` run the app (Python's documented ``-m`` behaviour:
    the package's ``__main__`` / the module run as ``__main__``), listing every pipeline command."""
    import subprocess
    import sys
    out = subprocess.run([sys.executable, "-m", module, "--help"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert all(cmd in out.stdout for cmd in PIPELINE)
