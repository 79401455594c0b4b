"""Property-based tests (hypothesis): the capture reader accepts a document or raises InputError, nothing else.

Two generators: (1) capture.json documents built from a valid one with random replacements of any
field by arbitrary JSON values (including huge integers, NaN, nested junk); (2) small captures whose
PNGs have random sizes, modes and bytes (8/16-bit, grey/RGB/RGBA, truncated).  The only documented
failure is protomine.errors.InputError; anything else (OverflowError, TypeError, ...) is a bug.
"""
from __future__ import annotations

import io
import json
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from PIL import Image

from protomine.capture import FORMAT, read_capture
from protomine.errors import InputError

W, H = 6, 4

huge_ints = st.integers(min_value=2 ** 1024, max_value=10 ** 400).map(lambda v: v if v % 2 else -v)  # beyond float64
json_scalars = st.one_of(st.none(), st.booleans(), st.integers(), huge_ints,
                         st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8))
json_values = st.recursive(json_scalars, lambda kids: st.one_of(st.lists(kids, max_size=5),
                                                                st.dictionaries(st.text(max_size=6), kids, max_size=4)),
                           max_leaves=20)


def _valid_doc(n_frames: int = 2) -> dict:
    return {"format": FORMAT, "depth_scale": 1000.0,
            "intrinsics": {"width": W, "height": H, "fx": 5.0, "fy": 5.0, "cx": 2.5, "cy": 1.5},
            "frames": [{"id": f"{i:06d}", "cam_to_world": np.eye(4).tolist()} for i in range(n_frames)]}


# paths into the document that a mutation may replace (or delete, with value None + delete flag)
PATHS = [("format",), ("depth_scale",), ("intrinsics",), ("intrinsics", "width"), ("intrinsics", "height"),
         ("intrinsics", "fx"), ("intrinsics", "fy"), ("intrinsics", "cx"), ("intrinsics", "cy"), ("frames",),
         ("frames", 0), ("frames", 1), ("frames", 0, "id"), ("frames", 1, "id"), ("frames", 0, "cam_to_world"),
         ("frames", 1, "cam_to_world"), ("frames", 0, "cam_to_world", 0), ("frames", 0, "cam_to_world", 2, 3),
         ("frames", 1, "cam_to_world", 3)]

matrices = st.lists(st.lists(st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64),
                                       st.integers(-5, 5), huge_ints), min_size=0, max_size=5), min_size=0, max_size=5)


def _apply(doc: dict, path: tuple, value, delete: bool) -> None:
    d = doc
    for k in path[:-1]:
        d = d[k]
    if delete and isinstance(d, dict):
        d.pop(path[-1], None)
    else:
        d[path[-1]] = value


def _write_images(folder: Path, ids: list[str]) -> None:
    for sub in ("rgb", "depth"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    for fid in ids:
        Image.fromarray(np.full((H, W, 3), 100, np.uint8)).save(folder / "rgb" / f"{fid}.png")
        Image.fromarray(np.full((H, W), 800, np.uint16)).save(folder / "depth" / f"{fid}.png")


def _read_or_input_error(folder: Path):
    try:
        return read_capture(folder)
    except InputError as e:
        assert e.message and e.path, str(e)   # the one documented error, naming the file
        return None


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutations=st.lists(st.tuples(st.sampled_from(PATHS), st.one_of(huge_ints, json_values, matrices), st.booleans()),
                          min_size=1, max_size=3))
@example(mutations=[(("intrinsics", "fx"), 10 ** 400, False)])
@example(mutations=[(("frames", 0, "cam_to_world", 2, 3), -(10 ** 400), False)])
def test_random_capture_json_is_accepted_or_input_error(mutations):
    doc = _valid_doc()
    for path, value, delete in mutations:
        try:
            _apply(doc, path, value, delete)
        except (KeyError, IndexError, TypeError):
            pass                                      # an earlier mutation removed the parent
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d) / "cap"
        folder.mkdir()
        _write_images(folder, ["000000", "000001"])
        (folder / "capture.json").write_text(json.dumps(doc))   # every generated value is JSON-encodable
        cap = _read_or_input_error(folder)
        if cap is not None:                          # accepted: then it really is a valid capture
            assert cap.intrinsics.fx > 0 and len(cap.frames) >= 1
            assert all(np.isfinite(f.cam_to_world).all() and f.cam_to_world.shape == (4, 4) for f in cap.frames)


png_modes = st.sampled_from(["L", "I;16", "RGB", "RGBA", "LA", "1", "P"])


@st.composite
def small_images(draw):
    mode = draw(png_modes)
    w, h = draw(st.integers(1, W + 2)), draw(st.integers(1, H + 2))
    seed = draw(st.integers(0, 2 ** 16))
    rng = np.random.default_rng(seed)
    if mode in ("RGB", "RGBA"):
        im = Image.fromarray(rng.integers(0, 256, (h, w, len(mode)), dtype=np.uint8), mode=mode)
    elif mode == "I;16":
        im = Image.fromarray(rng.integers(0, 65536, (h, w)).astype(np.uint16))
    else:
        im = Image.fromarray(rng.integers(0, 256, (h, w), dtype=np.uint8), mode="L").convert(mode)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    data = buf.getvalue()
    cut = draw(st.one_of(st.none(), st.integers(0, len(data))))
    return data if cut is None else data[:cut]


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rgb=small_images(), depth=small_images(), mask=st.one_of(st.none(), small_images()))
def test_random_small_capture_images_are_accepted_or_input_error(rgb, depth, mask):
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d) / "cap"
        _write_images(folder, ["000000", "000001"])
        (folder / "rgb" / "000001.png").write_bytes(rgb)
        (folder / "depth" / "000001.png").write_bytes(depth)
        if mask is not None:
            (folder / "masks").mkdir()
            for fid in ("000000", "000001"):
                (folder / "masks" / f"{fid}.png").write_bytes(mask)
        (folder / "capture.json").write_text(json.dumps(_valid_doc()))
        cap = _read_or_input_error(folder)
        if cap is not None:
            assert cap.rgb("000001").shape == (H, W, 3) and cap.depth("000001").shape == (H, W)
            assert cap.depth("000001").max() > 0
