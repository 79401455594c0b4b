"""Same answer twice, and every output says where it came from.

Determinism: same inputs, config and seed give byte-identical store volumes, library datasets and
assignments.csv; 1 vs 2 torch threads give the same assignments and prototypes within THREAD_ATOL
(float32 reductions may be summed in a different order; the documented tolerance).
Provenance: `protomine provenance FILE` prints config, seed, input fingerprints and code version for
every file ingest, mine and audit wrote; a sidecar that no longer matches its file is an error.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest
import torch
from typer.testing import CliRunner

from protomine.cli import app
from protomine.ingest.pipeline import ingest_captures
from protomine.mine.pipeline import mine_store
from protomine.provenance import MANIFEST, SIDECAR_SUFFIX, read_provenance

THREAD_ATOL = 1e-4   # prototypes / distances, 1 vs 2 threads (float32 sums in another order)


def _h5_content(path: Path) -> dict:
    """Every dataset's bytes and every attribute of an HDF5 file (file bytes also hold timestamps/layout)."""
    out = {}
    with h5py.File(path, "r") as f:
        out["attrs"] = {k: repr(v) for k, v in f.attrs.items()}
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()].tobytes() if obj.dtype != object else repr(obj[()].tolist()))
                     if isinstance(obj, h5py.Dataset) else None)
    return out


def test_same_seed_gives_byte_identical_store_and_library(tmp_path, tiny_world):
    cfg = tiny_world["cfg"]
    contents = []
    for run in ("a", "b"):
        d = tmp_path / run
        store = d / "objects.h5"
        ingest_captures(tiny_world["caps"], store, cfg, seed=7)
        shutil.copy2(store, tmp_path / "objects.h5")       # same store path in both runs (recorded in the library)
        mine_store(tmp_path / "objects.h5", d / "library.h5", cfg, seed=7, n_clusters=2)
        contents.append((_h5_content(store), _h5_content(d / "library.h5"), (d / "assignments.csv").read_bytes()))
    (s1, l1, a1), (s2, l2, a2) = contents
    assert s1 == s2
    assert l1.keys() == l2.keys() and all(l1[k] == l2[k] for k in l1), [k for k in l1 if l1[k] != l2[k]]
    assert a1 == a2


def test_one_and_two_threads_agree_within_tolerance(tmp_path, tiny_world):
    cfg = tiny_world["cfg"]
    saved = torch.get_num_threads()
    libs = []
    try:
        for n in (1, 2):
            torch.set_num_threads(n)
            lib, _ = mine_store(tiny_world["store"], tmp_path / f"t{n}" / "library.h5", cfg, seed=3, n_clusters=2)
            libs.append(lib)
    finally:
        torch.set_num_threads(saved)
    a, b = libs
    np.testing.assert_array_equal(a.members["cluster"], b.members["cluster"])
    np.testing.assert_allclose(a.prototypes["features"], b.prototypes["features"], atol=THREAD_ATOL)
    np.testing.assert_allclose(a.members["distance"], b.members["distance"], atol=THREAD_ATOL, rtol=1e-4)
    yaw_diff = np.abs((a.members["yaw_deg"] - b.members["yaw_deg"] + 180) % 360 - 180)
    assert yaw_diff.max() <= 1e-3


def _prov_cli(path: Path) -> dict:
    res = CliRunner().invoke(app, ["provenance", str(path)])
    assert res.exit_code == 0, (path, res.output)
    keys = {line.split(":", 1)[0] for line in res.stdout.splitlines() if ":" in line and not line.startswith(" ")}
    return {"text": res.stdout, "keys": keys}


def test_every_output_of_ingest_mine_audit_has_provenance(tmp_path, tiny_world):
    conf = tiny_world["config"]
    store, lib, rep = tmp_path / "s" / "objects.h5", tmp_path / "l" / "library.h5", tmp_path / "report"
    r = CliRunner()
    assert r.invoke(app, ["ingest", *map(str, tiny_world["caps"]), "--out", str(store), "--config", conf, "--seed", "5", "-q"]).exit_code == 0
    assert r.invoke(app, ["mine", str(store), "--out", str(lib), "-k", "2", "--config", conf, "--seed", "5", "-q"]).exit_code == 0
    truth = tmp_path / "truth.csv"
    truth.write_text("object,label\ncap0/1,box\ncap0/2,can\ncap1/1,box\ncap1/2,can\n")
    res = r.invoke(app, ["audit", str(lib), str(truth), "--out", str(rep), "--config", conf, "--seed", "5", "-q"])
    assert res.exit_code == 0, res.output
    # no lock file outlives the command that held it
    assert not [p for p in tmp_path.rglob("*.lock")]
    outputs = [store, lib] + sorted(p for p in lib.parent.iterdir() if p.is_file() and p.name != MANIFEST) \
        + sorted(p for p in rep.iterdir() if p.name != MANIFEST)
    names = {p.name for p in outputs}
    assert {"assignments.csv", "gallery.png", "report.json", "report.html"} <= names
    for p in outputs:
        prov = read_provenance(p)
        assert prov["producer"] == "protomine" and prov["seed"] == 5 and prov["code_version"], p
        assert json.loads(prov["config"])["volume"]["azimuth_bins"] == 12, p     # the tiny config, not the defaults
        assert json.loads(prov["inputs"]), p                                    # input fingerprints recorded
        out = _prov_cli(p)
        assert {"seed", "config", "inputs", "code_version", "command"} <= out["keys"], (p, out["text"])
    assert json.loads(read_provenance(store)["inputs"]).keys() == {"cap0", "cap1", "cap2"}
    # one manifest per output folder, no sidecar per file
    assert not list(tmp_path.rglob("*" + SIDECAR_SUFFIX))
    # a file changed after protomine wrote it no longer matches its manifest entry: one clear error
    (lib.parent / "assignments.csv").write_text("object,cluster\n")
    res = r.invoke(app, ["provenance", str(lib.parent / "assignments.csv")])
    assert res.exit_code == 2 and "provenance.json: files.assignments.csv.fingerprint" in res.stderr and "changed" in res.stderr


def test_export_outputs_have_provenance(tmp_path, tiny_world):
    out = tmp_path / "exp"
    res = CliRunner().invoke(app, ["export", str(tiny_world["library"]), str(tiny_world["store"]),
                                   str(tiny_world["caps"][0]), "--out", str(out)])
    assert res.exit_code == 0, res.output
    written = sorted(p.name for p in out.iterdir() if p.name != MANIFEST)
    assert {"labels.jsonl", "instances.json", "summary.json"} <= set(written)    # the loop below is not vacuous
    for name in written:
        assert read_provenance(out / name)["producer"] == "protomine"


def test_find_matches_csv_has_provenance(tmp_path, tiny_world):
    lib = tmp_path / "library.h5"
    shutil.copy2(tiny_world["library"], lib)
    out = tmp_path / "matches.csv"
    res = CliRunner().invoke(app, ["find", str(lib), str(tiny_world["store"]), "--example", "cap0/1", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert read_provenance(out)["producer"] == "protomine"
