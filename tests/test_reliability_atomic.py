"""Nothing is lost: SIGKILL at named points, two writers at once, re-ingest replaces, append keeps bits.

Kill points come from the test hook in protomine.atomic (PROTOMINE_TEST_PAUSE=<point>: the process prints
"protomine-pause: <point>" on stderr and sleeps): inputs_read, mid_write (temporary file half written,
writer lock held), before_rename (temporary file complete and fsynced).
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from typer.testing import CliRunner

from conftest import make_tiny_capture, two_object_scene
from protomine.atomic import TMP_MARK, exclusive_lock
from protomine.cli import app
from protomine.errors import InputError
from protomine.ingest.sharded import open_store
from protomine.mine.library import read_library

POINTS = ["inputs_read", "mid_write", "before_rename"]


def _start(argv: list[str], point: str | None, pause_s: float = 60.0) -> subprocess.Popen:
    env = dict(os.environ)
    env.pop("PROTOMINE_TEST_PAUSE", None)
    if point:
        env.update(PROTOMINE_TEST_PAUSE=point, PROTOMINE_TEST_PAUSE_S=str(pause_s))
    return subprocess.Popen(["protomine", *argv],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def _wait_marker(proc: subprocess.Popen, point: str, timeout: float = 90.0) -> None:
    """Read stderr lines until the pause marker appears (the process is then asleep at ``point``)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        line = proc.stderr.readline()
        if not line and proc.poll() is not None:
            raise AssertionError(f"process ended (rc {proc.returncode}) before {point}: {proc.stderr.read()}")
        if line.strip() == f"protomine-pause: {point}":
            return
    proc.kill()
    raise AssertionError(f"no pause marker {point}")


def _state(path: Path) -> tuple[bytes, int]:
    return path.read_bytes(), path.stat().st_mtime_ns


def _temporaries(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if TMP_MARK in p.name)


@pytest.mark.parametrize("point", POINTS)
def test_sigkill_during_ingest_keeps_previous_store(point, tmp_path, tiny_world):
    store = tmp_path / "objects.h5"
    shutil.copy2(tiny_world["store"], store)
    before = _state(store)
    n_before = len(open_store(store))
    cap = make_tiny_capture(tmp_path / "cap3", two_object_scene(3), world_seed=3)
    proc = _start(["ingest", str(cap), "--out", str(store), "--config", tiny_world["config"], "--quiet"], point)
    _wait_marker(proc, point)
    proc.kill()                                   # SIGKILL: no cleanup handlers run
    proc.wait(timeout=30)
    assert proc.returncode == -9
    assert _state(store) == before               # previous store untouched, bit for bit
    s = open_store(store)
    assert len(s) == n_before and s.read_volumes(0, len(s)).shape[0] == n_before
    left = _temporaries(tmp_path)
    assert len(left) == (0 if point == "inputs_read" else 1), left   # at most the killed writer's one file
    # the next writing command removes the dead writer's temporary and succeeds
    res = CliRunner().invoke(app, ["ingest", str(cap), "--out", str(store), "--config", tiny_world["config"], "--quiet"])
    assert res.exit_code == 0, res.output
    assert _temporaries(tmp_path) == []
    assert len(open_store(store)) == n_before + 2


@pytest.mark.parametrize("point", POINTS)
def test_sigkill_during_mine_keeps_previous_library(point, tmp_path, tiny_world):
    lib = tmp_path / "library.h5"
    shutil.copy2(tiny_world["library"], lib)
    before = _state(lib)
    proc = _start(["mine", str(tiny_world["store"]), "--out", str(lib), "--clusters", "2", "--config", tiny_world["config"],
                   "--quiet"], point)
    _wait_marker(proc, point)
    proc.kill()
    proc.wait(timeout=30)
    assert _state(lib) == before
    old = read_library(lib)
    assert old.n_clusters == 2 and len(old.members["object"]) == 6
    assert len(_temporaries(tmp_path)) == (0 if point == "inputs_read" else 1)
    res = CliRunner().invoke(app, ["mine", str(tiny_world["store"]), "--out", str(lib), "--clusters", "2",
                                   "--config", tiny_world["config"], "--quiet"])
    assert res.exit_code == 0, res.output
    assert _temporaries(tmp_path) == []
    assert read_library(lib).n_clusters == 2


def test_two_ingests_into_one_store_serialise_and_keep_both(tmp_path, tiny_world):
    """A holds the writer lock (paused mid-write); B waits, then reads A's store inside the lock."""
    store = tmp_path / "objects.h5"
    shutil.copy2(tiny_world["store"], store)
    c3 = make_tiny_capture(tmp_path / "cap3", two_object_scene(3), world_seed=3)
    c4 = make_tiny_capture(tmp_path / "cap4", two_object_scene(4), world_seed=4)
    a = _start(["ingest", str(c3), "--out", str(store), "--config", tiny_world["config"], "--quiet"], "mid_write", pause_s=4.0)
    _wait_marker(a, "mid_write")
    # a third writer that will not wait fails with the one clear error
    with pytest.raises(InputError, match="another protomine process is writing"):
        with exclusive_lock(store, timeout=0.2):
            pass
    b = _start(["ingest", str(c4), "--out", str(store), "--config", tiny_world["config"], "--quiet"], None)
    assert a.wait(timeout=90) == 0, a.stderr.read()
    assert b.wait(timeout=90) == 0, b.stderr.read()
    s = open_store(store)
    ids = s.ids
    assert len(ids) == len(set(ids)) == 10        # 6 old + 2 from A + 2 from B: nothing lost
    assert {i.split("/")[0] for i in ids} == {"cap0", "cap1", "cap2", "cap3", "cap4"}
    assert _temporaries(tmp_path) == []


def test_library_writer_lock_blocks_a_second_writer(tmp_path, tiny_world):
    lib = tmp_path / "library.h5"
    shutil.copy2(tiny_world["library"], lib)
    a = _start(["mine", str(tiny_world["store"]), "--out", str(lib), "--clusters", "2", "--config", tiny_world["config"],
                "--quiet"], "mid_write", pause_s=3.0)
    _wait_marker(a, "mid_write")
    with pytest.raises(InputError) as ei:
        with exclusive_lock(lib, timeout=0.2):
            pass
    assert "library.h5" in str(ei.value)
    assert a.wait(timeout=90) == 0
    assert read_library(lib).n_clusters == 2


def _object_bits(store: Path, capture: str) -> dict:
    """Everything stored about one capture's objects, as bytes (volumes, table rows, views, crops, singles)."""
    s = open_store(store)
    idx = [i for i, c in enumerate(s.objects["capture"]) if c == capture]
    out = {"ids": [s.ids[i] for i in idx]}
    with h5py.File(store, "r") as f:
        out["volumes"] = f["volumes"][idx].tobytes()
        for k in f["objects"]:
            out[f"objects/{k}"] = repr([f["objects"][k][i] for i in idx])
        for grp in ("crops", "single"):
            rows = np.flatnonzero(np.isin(f[f"{grp}/object"][()], idx))
            for k in f[grp]:
                if k != "object":
                    out[f"{grp}/{k}"] = f[grp][k][rows].tobytes() if f[grp][k].dtype != object else repr(list(f[grp][k][rows]))
        vrows = np.flatnonzero(np.isin(f["views/object"][()], idx))
        out["views"] = f["views/bbox"][vrows].tobytes() + repr(list(f["views/frame"][vrows])).encode()
    return out


def test_cli_reingest_replaces_and_append_keeps_old_objects_bit_identical(tmp_path, tiny_world):
    store = tmp_path / "objects.h5"
    run = lambda *caps: CliRunner().invoke(app, ["ingest", *map(str, caps), "--out", str(store), "--config", tiny_world["config"], "--quiet"])  # noqa: E731
    c0, c1 = tiny_world["caps"][0], tiny_world["caps"][1]
    assert run(c0).exit_code == 0
    bits0 = _object_bits(store, "cap0")
    res = run(c1)
    assert res.exit_code == 0 and "0 replaced, 2 added" in res.output
    assert _object_bits(store, "cap0") == bits0                     # append: old objects bit-identical
    bits1 = _object_bits(store, "cap1")
    res = run(c1)
    assert res.exit_code == 0 and "2 kept, 2 replaced, 2 added" in res.output
    s = open_store(store)
    assert sorted(s.ids) == ["cap0/1", "cap0/2", "cap1/1", "cap1/2"]   # replaced, no duplicates
    assert list(s.captures["name"]).count("cap1") == 1
    assert _object_bits(store, "cap0") == bits0
    assert _object_bits(store, "cap1")["volumes"] == bits1["volumes"]   # same inputs + seed: same volumes
