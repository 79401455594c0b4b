"""Capture folder reader: a valid round trip and malformed captures that must fail with a clear InputError."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from protomine.capture import FORMAT, Intrinsics, read_capture, write_capture
from protomine.errors import InputError

W, H = 8, 6


def _write_valid(folder: Path) -> Path:
    rng = np.random.default_rng(0)
    frames = []
    for k in range(2):
        T = np.eye(4)
        T[:3, 3] = [0.1 * k, 0.0, 0.0]
        frames.append({"id": f"{k:06d}", "cam_to_world": T,
                       "rgb": rng.integers(0, 256, (H, W, 3), dtype=np.uint8),
                       "depth_m": rng.uniform(0.5, 1.5, (H, W)),
                       "mask": rng.integers(0, 3, (H, W))})
    return write_capture(folder, intrinsics=Intrinsics(W, H, 10.0, 10.0, 3.5, 2.5), depth_scale=1000.0, frames=frames)


def _edit_json(folder: Path, fn) -> None:
    p = folder / "capture.json"
    doc = json.loads(p.read_text())
    fn(doc)
    p.write_text(json.dumps(doc))


def _set_pose(matrix):
    def fn(doc):
        doc["frames"][0]["cam_to_world"] = matrix
    return fn


_scaled = (np.eye(4) * 1.5).tolist()
_scaled[3][3] = 1.0
_reflected = np.diag([1.0, 1.0, -1.0, 1.0]).tolist()
_nan_pose = np.eye(4).tolist()
_nan_pose[0][3] = float("nan")


def _del_intrinsics_fx(doc):
    del doc["intrinsics"]["fx"]


def _zero_fx(doc):
    doc["intrinsics"]["fx"] = 0.0


def _negative_fy(doc):
    doc["intrinsics"]["fy"] = -300.0


def _no_frames(doc):
    doc["frames"] = []


def _duplicate_id(doc):
    doc["frames"][1]["id"] = doc["frames"][0]["id"]


def _wrong_format(doc):
    doc["format"] = "some.other/2"


def _zero_depth_scale(doc):
    doc["depth_scale"] = 0


def _pose_3x4(doc):
    doc["frames"][0]["cam_to_world"] = np.eye(4)[:3].tolist()


def _slash_id(doc):
    doc["frames"][0]["id"] = "../000000"


def _png(folder: Path, rel: str, arr: np.ndarray, mode: str | None = None) -> None:
    Image.fromarray(arr, mode=mode).save(folder / rel) if mode else Image.fromarray(arr).save(folder / rel)


# (name, how to break the capture, file expected in the error, field expected in the error)
CASES = [
    ("missing capture.json", lambda f: (f / "capture.json").unlink(), "capture.json", None),
    ("not JSON", lambda f: (f / "capture.json").write_text("{frames: oops"), "capture.json", None),
    ("wrong format tag", lambda f: _edit_json(f, _wrong_format), "capture.json", "format"),
    ("zero depth scale", lambda f: _edit_json(f, _zero_depth_scale), "capture.json", "capture.depth_scale"),
    ("missing intrinsics field", lambda f: _edit_json(f, _del_intrinsics_fx), "capture.json", "intrinsics.fx"),
    ("zero focal length", lambda f: _edit_json(f, _zero_fx), "capture.json", "intrinsics.fx"),
    ("negative focal length", lambda f: _edit_json(f, _negative_fy), "capture.json", "intrinsics.fy"),
    ("frames empty", lambda f: _edit_json(f, _no_frames), "capture.json", "frames"),
    ("duplicate frame ids", lambda f: _edit_json(f, _duplicate_id), "capture.json", "frames[1].id"),
    ("frame id escapes the folder", lambda f: _edit_json(f, _slash_id), "capture.json", "frames[0].id"),
    ("pose with NaN", lambda f: _edit_json(f, _set_pose(_nan_pose)), "capture.json", "frames[0].cam_to_world"),
    ("scaled pose", lambda f: _edit_json(f, _set_pose(_scaled)), "capture.json", "frames[0].cam_to_world"),
    ("reflected pose", lambda f: _edit_json(f, _set_pose(_reflected)), "capture.json", "frames[0].cam_to_world"),
    ("3x4 pose", lambda f: _edit_json(f, _pose_3x4), "capture.json", "frames[0].cam_to_world"),
    ("missing rgb file", lambda f: (f / "rgb/000001.png").unlink(), "rgb/000001.png", "frame 000001"),
    ("missing mask file", lambda f: (f / "masks/000000.png").unlink(), "masks/000000.png", "frame 000000"),
    ("truncated PNG", lambda f: (f / "depth/000000.png").write_bytes((f / "depth/000000.png").read_bytes()[:40]),
     "depth/000000.png", "depth"),
    ("8-bit depth", lambda f: _png(f, "depth/000000.png", np.full((H, W), 200, np.uint8)), "depth/000000.png", "depth"),
    ("RGB depth", lambda f: _png(f, "depth/000001.png", np.full((H, W, 3), 9, np.uint8)), "depth/000001.png", "depth"),
    ("greyscale rgb", lambda f: _png(f, "rgb/000000.png", np.full((H, W), 9, np.uint8)), "rgb/000000.png", "rgb"),
    ("rgb/depth size mismatch", lambda f: _png(f, "rgb/000000.png", np.zeros((H + 2, W, 3), np.uint8)),
     "rgb/000000.png", "size"),
    ("mask of wrong size", lambda f: _png(f, "masks/000001.png", np.zeros((H, W + 1), np.uint16)), "masks/000001.png", "size"),
    ("RGB mask", lambda f: _png(f, "masks/000000.png", np.ones((H, W, 3), np.uint8)), "masks/000000.png", "mask"),
    ("all-zero depth", lambda f: _png(f, "depth/000000.png", np.zeros((H, W), np.uint16)), "depth/000000.png", "pixels"),
]


def test_valid_capture_round_trips(tmp_path):
    folder = _write_valid(tmp_path / "cap")
    cap = read_capture(folder)
    assert cap.name == "cap" and [f.id for f in cap.frames] == ["000000", "000001"]
    assert cap.has_masks and cap.intrinsics == Intrinsics(W, H, 10.0, 10.0, 3.5, 2.5)
    d = cap.depth("000000")
    assert d.shape == (H, W) and 0.5 - 5e-4 <= d.min() and d.max() <= 1.5 + 5e-4
    assert cap.rgb("000001").dtype == np.uint8 and cap.mask("000001").max() <= 2
    np.testing.assert_allclose(cap.frames[1].cam_to_world[:3, 3], [0.1, 0.0, 0.0])
    assert json.loads((folder / "capture.json").read_text())["format"] == FORMAT


def test_case_names_distinct():
    assert len({c[0] for c in CASES}) == len(CASES) >= 12


@pytest.mark.parametrize("name,breaker,file,fld", CASES, ids=[c[0] for c in CASES])
def test_malformed_capture_names_file_and_field(tmp_path, name, breaker, file, fld):
    folder = _write_valid(tmp_path / "cap")
    breaker(folder)
    with pytest.raises(InputError) as ei:
        read_capture(folder)
    err = ei.value
    assert err.path is not None and Path(err.path) == folder / file, (name, str(err))
    assert err.field == fld, (name, str(err))
    assert err.message and file in str(err)


def test_missing_folder(tmp_path):
    with pytest.raises(InputError) as ei:
        read_capture(tmp_path / "nope")
    assert Path(ei.value.path) == tmp_path / "nope"


def test_cli_reports_bad_capture_in_one_line(tmp_path):
    from protomine.cli import app
    folder = _write_valid(tmp_path / "cap")
    _edit_json(folder, _set_pose(_reflected))
    res = CliRunner().invoke(app, ["ingest", str(folder), "--out", str(tmp_path / "s.h5"), "--quiet"])
    assert res.exit_code == 2
    out = (res.stderr if hasattr(res, "stderr") and res.stderr else res.output).strip()
    assert out.startswith("error:") and "capture.json" in out and "frames[0].cam_to_world" in out and "reflection" in out
    assert "Traceback" not in res.output
    assert not (tmp_path / "s.h5").exists()
