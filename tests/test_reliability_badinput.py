"""Bad input gets one clear error, through the CLI and through the library.

Each case breaks one thing in an otherwise valid tiny world (captures, store, library, truth CSV, config)
and checks: the library call raises InputError naming the file (and field); the CLI exits with code 2,
prints exactly one stderr line starting "error:" that names the file and says what was expected, prints
no traceback, and creates or changes no output file (bytes and mtime compared; no temporaries left).
The reader's own 24 capture cases live in tests/test_capture_io.py; here every capture case goes through
`protomine ingest` end to end.
"""
from __future__ import annotations

import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import h5py
import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from conftest import TINY_H, TINY_W, make_tiny_capture
from protomine.capture import read_capture
from protomine.cli import app
from protomine.config import load_config
from protomine.errors import InputError


@dataclass
class Case:
    argv: list[str]                        # CLI arguments after `protomine`
    api: Callable[[], object]              # the same failure through the library
    file: str                              # must appear in the message (a path suffix)
    words: tuple[str, ...]                 # field / expectation words that must appear in the message
    outputs: list[Path] = field(default_factory=list)   # must not be created or changed


_CONFIG: list[str] = []       # the tiny world's config file, set by the first case built


def _cfg():
    return load_config(_CONFIG[0])


# --- capture breakers ----------------------------------------------------------------------

def _edit(doc_fn):
    def fn(cap: Path) -> None:
        p = cap / "capture.json"
        doc = json.loads(p.read_text())
        doc_fn(doc)
        p.write_text(json.dumps(doc))
    return fn


def _set(path: list, value):
    def fn(doc):
        d = doc
        for k in path[:-1]:
            d = d[k]
        d[path[-1]] = value
    return fn


def _del_fx(doc):
    del doc["intrinsics"]["fx"]


def _dup(doc):
    doc["frames"][1]["id"] = doc["frames"][0]["id"]


_nan = np.eye(4).tolist()
_nan[1][3] = float("nan")
_scaled = np.diag([2.0, 2.0, 2.0, 1.0]).tolist()
_reflected = np.diag([-1.0, 1.0, 1.0, 1.0]).tolist()


def _png(rel: str, arr: np.ndarray):
    return lambda cap: Image.fromarray(arr).save(cap / rel)


def _truncate(rel: str):
    def fn(cap: Path) -> None:
        b = (cap / rel).read_bytes()
        (cap / rel).write_bytes(b[: len(b) // 2])
    return fn


def _noise_depth(cap: Path) -> None:
    """Depth readings scattered through a 1 m cube: no plane holds 15% of them."""
    rng = np.random.default_rng(0)
    for p in sorted((cap / "depth").glob("*.png")):
        Image.fromarray(rng.integers(300, 1500, (TINY_H, TINY_W)).astype(np.uint16)).save(p)


# (name, breaker(capture folder), file named in the error, words in the message)
CAPTURE_CASES = [
    ("capture.json missing", lambda c: (c / "capture.json").unlink(), "capture.json", ("missing",)),
    ("capture.json not JSON", lambda c: (c / "capture.json").write_text("{'frames': ["), "capture.json", ("JSON",)),
    ("wrong format tag", _edit(_set(["format"], "protomine.capture/9")), "capture.json", ("format", "expected")),
    ("intrinsics field missing", _edit(_del_fx), "capture.json", ("intrinsics.fx", "missing")),
    ("zero focal length", _edit(_set(["intrinsics", "fx"], 0)), "capture.json", ("intrinsics.fx", "> 0")),
    ("negative focal length", _edit(_set(["intrinsics", "fy"], -60.0)), "capture.json", ("intrinsics.fy", "> 0")),
    ("frames empty", _edit(_set(["frames"], [])), "capture.json", ("frames", "non-empty")),
    ("duplicate frame ids", _edit(_dup), "capture.json", ("frames[1].id", "duplicate")),
    ("pose with NaN", _edit(_set(["frames", 0, "cam_to_world"], _nan)), "capture.json", ("frames[0].cam_to_world",)),
    ("scaled pose", _edit(_set(["frames", 1, "cam_to_world"], _scaled)), "capture.json", ("frames[1].cam_to_world", "rigid")),
    ("reflected pose", _edit(_set(["frames", 2, "cam_to_world"], _reflected)), "capture.json", ("frames[2].cam_to_world", "rigid")),
    ("rgb file missing", lambda c: (c / "rgb/000001.png").unlink(), "rgb/000001.png", ("frame 000001", "missing")),
    ("depth file missing", lambda c: (c / "depth/000002.png").unlink(), "depth/000002.png", ("frame 000002", "missing")),
    ("truncated PNG", _truncate("depth/000000.png"), "depth/000000.png", ("depth", "PNG")),
    ("8-bit depth", _png("depth/000001.png", np.full((TINY_H, TINY_W), 90, np.uint8)), "depth/000001.png", ("16-bit",)),
    ("RGB depth", _png("depth/000000.png", np.full((TINY_H, TINY_W, 3), 90, np.uint8)), "depth/000000.png", ("16-bit",)),
    ("rgb/depth size mismatch", _png("rgb/000002.png", np.zeros((TINY_H // 2, TINY_W // 2, 3), np.uint8)),
     "rgb/000002.png", ("size", f"{TINY_W}x{TINY_H}")),
    ("mask of wrong size", _png("masks/000001.png", np.zeros((TINY_H, TINY_W + 3), np.uint16)),
     "masks/000001.png", ("size", f"{TINY_W}x{TINY_H}")),
    ("all-zero depth", _png("depth/000002.png", np.zeros((TINY_H, TINY_W), np.uint16)), "depth/000002.png", ("depth readings are 0",)),
    ("no support plane", _noise_depth, "cap0", ("no support plane", "plane_min_inlier_frac")),
]


def _capture_case(name, breaker, file, words, tmp_path, world) -> Case:
    cap = tmp_path / "cap0"
    shutil.copytree(world["caps"][0], cap)
    breaker(cap)
    store = tmp_path / "out" / "objects.h5"
    cfg = _cfg()

    def api():
        from protomine.ingest.pipeline import ingest_captures
        read_capture(cap)   # the reader alone must already fail, except for plane/objects problems
        return ingest_captures([cap], store, cfg)
    if name == "no support plane":
        api = lambda: __import__("protomine.ingest.pipeline", fromlist=["x"]).ingest_captures([cap], store, cfg)  # noqa: E731
    return Case(["ingest", str(cap), "--out", str(store), "--config", _CONFIG[0], "--quiet"], api, file, words, [store])


# --- other inputs ----------------------------------------------------------------------------

def _hdf5_with_format(path: Path, fmt: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    with h5py.File(path, "w") as f:
        f.attrs["format"] = fmt
        f.create_dataset("x", data=np.arange(3))
    return path


def _text(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def _mine_case(store: Path, tmp_path: Path, file: str, words, extra=(), n_clusters=None, config=None) -> Case:
    config = config or _CONFIG[0]
    lib = tmp_path / "libout" / "library.h5"
    outs = [lib, lib.parent / "assignments.csv", lib.parent / "gallery.png"]

    def api():
        from protomine.mine.pipeline import mine_store
        return mine_store(store, lib, load_config(config), n_clusters=n_clusters)
    argv = ["mine", str(store), "--out", str(lib), "--config", str(config), "--quiet", *extra]
    return Case(argv, api, file, words, outs)


def _audit_case(lib: Path, truth: Path, store: Path, tmp_path: Path, file: str, words) -> Case:
    out = tmp_path / "report"

    def api():
        from protomine.audit.run import run_audit
        return run_audit(lib, truth, out, _cfg(), store=store)
    argv = ["audit", str(lib), str(truth), "--out", str(out), "--store", str(store), "--config", _CONFIG[0], "--quiet"]
    return Case(argv, api, file, words, [out])


def _other_case(name: str, tmp_path: Path, world) -> Case:
    store, library = world["store"], world["library"]
    good_truth = _text(tmp_path / "truth_ok.csv", "object,label\ncap0/1,box\n")
    if name == "capture folder missing":
        s = tmp_path / "out" / "objects.h5"
        from protomine.ingest.pipeline import ingest_captures
        return Case(["ingest", str(tmp_path / "nope"), "--out", str(s), "--quiet"],
                    lambda: ingest_captures([tmp_path / "nope"], s, _cfg()), "nope", ("not found",), [s])
    if name == "capture with no objects":
        cap = make_tiny_capture(tmp_path / "empty", [], n_frames=2)
        s = tmp_path / "out" / "objects.h5"
        from protomine.ingest.pipeline import ingest_captures
        return Case(["ingest", str(cap), "--out", str(s), "--config", _CONFIG[0], "--quiet"],
                    lambda: ingest_captures([cap], s, _cfg()), "empty", ("objects", "no objects"), [s])
    if name == "duplicate capture names":
        a, b = tmp_path / "x" / "cap", tmp_path / "y" / "cap"
        shutil.copytree(world["caps"][0], a)
        shutil.copytree(world["caps"][1], b)
        s = tmp_path / "out" / "objects.h5"
        from protomine.ingest.pipeline import ingest_captures
        return Case(["ingest", str(a), str(b), "--out", str(s), "--quiet"],
                    lambda: ingest_captures([a, b], s, _cfg()), "<input>", ("captures", "unique"), [s])
    if name == "ingest into a store that is not HDF5":
        s = _text(tmp_path / "out" / "objects.h5", "not an hdf5 file\n")
        from protomine.ingest.pipeline import ingest_captures
        return Case(["ingest", str(world["caps"][0]), "--out", str(s), "--config", _CONFIG[0], "--quiet"],
                    lambda: ingest_captures([world["caps"][0]], s, _cfg()), "objects.h5", ("HDF5",), [s])
    if name == "ingest into a store built with another grid":
        s = tmp_path / "out" / "objects.h5"
        s.parent.mkdir()
        shutil.copy2(store, s)
        conf = _text(tmp_path / "grid.toml", "[volume]\nradial_bins = 6\n")
        from protomine.ingest.pipeline import ingest_captures
        return Case(["ingest", str(world["caps"][1]), "--out", str(s), "--config", str(conf), "--quiet"],
                    lambda: ingest_captures([world["caps"][1]], s, load_config(conf)), "objects.h5", ("grid",), [s])
    if name == "mine: store is not HDF5":
        return _mine_case(_text(tmp_path / "bad.h5", "hello\n"), tmp_path, "bad.h5", ("HDF5",))
    if name == "mine: store of another format version":
        return _mine_case(_hdf5_with_format(tmp_path / "old.h5", "protomine.store/0"), tmp_path, "old.h5",
                          ("format", "protomine.store/1"))
    if name == "mine: a library given as the store":
        return _mine_case(library, tmp_path, "library.h5", ("format", "protomine.store/1"))
    if name == "mine: --clusters larger than the number of objects":
        return _mine_case(store, tmp_path, "objects.h5", ("--clusters=50", "6"), extra=["--clusters", "50"], n_clusters=50)
    if name == "audit: library is not HDF5":
        return _audit_case(_text(tmp_path / "lib.h5", "x,y\n"), good_truth, store, tmp_path, "lib.h5", ("HDF5",))
    if name == "audit: library of another format version":
        return _audit_case(_hdf5_with_format(tmp_path / "lib2.h5", "protomine.library/0"), good_truth, store, tmp_path,
                           "lib2.h5", ("format", "protomine.library/2"))
    if name == "audit: library written before 3-D poses":
        return _audit_case(_hdf5_with_format(tmp_path / "lib1.h5", "protomine.library/1"), good_truth, store, tmp_path,
                           "lib1.h5", ("protomine.library/1", "re-mine"))
    if name == "audit: truth CSV with unknown object ids":
        # only unknown ids: nothing to audit (one unknown id among matching rows is listed in the report instead)
        t = _text(tmp_path / "truth.csv", "object,label\ncap9/7,mug\ncap9/8,box\n")
        return _audit_case(library, t, store, tmp_path, "truth.csv", ("row 2", "cap9/7"))
    if name == "audit: truth CSV with missing columns":
        t = _text(tmp_path / "truth.csv", "object,yaw_deg\ncap0/1,10\n")
        return _audit_case(library, t, store, tmp_path, "truth.csv", ("header", "label"))
    if name == "audit: truth CSV with a bad number":
        t = _text(tmp_path / "truth.csv", "capture,x,y,z,label\ncap0,0.1,abc,0,box\n")
        return _audit_case(library, t, store, tmp_path, "truth.csv", ("row 2, column y", "number"))
    if name == "audit: store is not HDF5":
        return _audit_case(library, good_truth, _text(tmp_path / "s.h5", "zz"), tmp_path, "s.h5", ("HDF5",))
    if name.startswith("config:"):
        text = {"config: unknown key": "[mine]\nclusterz = 3\n",
                "config: value out of range": "[mine]\nn_init = 0\n",
                "config: wrong type": "[volume]\nazimuth_bins = \"many\"\n",
                "config: not TOML": "[mine\nn_init = 2\n"}[name]
        words = {"config: unknown key": ("mine.clusterz", "unknown key"),
                 "config: value out of range": ("mine.n_init", "out of range"),
                 "config: wrong type": ("volume.azimuth_bins", "expected int"),
                 "config: not TOML": ("TOML",)}[name]
        conf = _text(tmp_path / "my.toml", text)
        return _mine_case(store, tmp_path, "my.toml", words, config=conf)
    raise KeyError(name)


OTHER_CASES = [
    "capture folder missing", "capture with no objects", "duplicate capture names",
    "ingest into a store that is not HDF5", "ingest into a store built with another grid",
    "mine: store is not HDF5", "mine: store of another format version", "mine: a library given as the store",
    "mine: --clusters larger than the number of objects",
    "audit: library is not HDF5", "audit: library of another format version", "audit: library written before 3-D poses", "audit: truth CSV with unknown object ids",
    "audit: truth CSV with missing columns", "audit: truth CSV with a bad number", "audit: store is not HDF5",
    "config: unknown key", "config: value out of range", "config: wrong type", "config: not TOML",
]
ALL = [c[0] for c in CAPTURE_CASES] + OTHER_CASES


def _build(name: str, tmp_path: Path, world) -> Case:
    _CONFIG[:] = [world["config"]]
    for c in CAPTURE_CASES:
        if c[0] == name:
            return _capture_case(*c, tmp_path, world)
    return _other_case(name, tmp_path, world)


def _snapshot(paths: list[Path]) -> dict:
    """Bytes + mtime of each output path (None when absent), and the listing of their folders."""
    snap = {}
    for p in paths:
        snap[p] = (p.read_bytes(), p.stat().st_mtime_ns) if p.is_file() else ("dir" if p.is_dir() else None)
        if p.parent.is_dir():
            snap[p.parent] = sorted(q.name for q in p.parent.iterdir() if not q.name.endswith(".lock"))
    return snap


def test_at_least_25_distinct_kinds():
    assert len(set(ALL)) == len(ALL) >= 25


@pytest.mark.parametrize("name", ALL)
def test_cli_bad_input_one_line_exit_2_no_output(name, tmp_path, tiny_world):
    case = _build(name, tmp_path, tiny_world)
    before = _snapshot(case.outputs)
    res = CliRunner().invoke(app, case.argv)
    assert res.exit_code == 2, (res.exit_code, res.output, res.exception)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    line = lines[0]
    assert line.startswith("error: ") and case.file in line, line
    for w in case.words:
        assert w in line, (w, line)
    assert "Traceback" not in res.output and "Traceback" not in res.stderr
    assert _snapshot(case.outputs) == before


@pytest.mark.parametrize("name", ALL)
def test_library_bad_input_raises_input_error(name, tmp_path, tiny_world):
    case = _build(name, tmp_path, tiny_world)
    before = _snapshot(case.outputs)
    with pytest.raises(InputError) as ei:
        case.api()
    msg = str(ei.value)
    assert case.file in msg and ei.value.message, msg
    for w in case.words:
        assert w in msg, (w, msg)
    assert _snapshot(case.outputs) == before


def test_cli_subprocess_prints_one_line_and_no_traceback(tmp_path, tiny_world):
    """The real console script (not the test runner): stderr has exactly the one error line."""
    import subprocess
    cap = tmp_path / "cap0"
    shutil.copytree(tiny_world["caps"][0], cap)
    _edit(_set(["frames", 0, "cam_to_world"], _reflected))(cap)
    store = tmp_path / "objects.h5"
    r = subprocess.run(["protomine", "ingest", str(cap), "--out", str(store), "--quiet"], capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 2 and r.stdout == ""
    assert r.stderr.count("\n") == 1 and r.stderr.startswith("error: ") and "capture.json: frames[0].cam_to_world" in r.stderr
    assert not store.exists()


def test_provenance_of_a_foreign_file_is_one_clear_error(tmp_path):
    f = _text(tmp_path / "notes.txt", "hello\n")
    res = CliRunner().invoke(app, ["provenance", str(f)])
    assert res.exit_code == 2 and res.stderr.startswith("error: ") and "notes.txt" in res.stderr
