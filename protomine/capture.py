"""Capture folders (format ``protomine.capture/1``): validated reader and atomic writer.

The binding contract is shared/spec/capture-format.md.  In short::

    <capture>/capture.json   format, depth_scale, intrinsics, frames[{id, cam_to_world}]
    <capture>/rgb/<id>.png   8-bit RGB (H, W, 3)
    <capture>/depth/<id>.png 16-bit greyscale; metres = value / depth_scale; 0 = no reading
    <capture>/masks/<id>.png optional 16-bit greyscale instance ids, 0 = no object

The reader also accepts, beyond the format (what real rigs write): colour as ``rgb/<id>.jpg`` (or .jpeg)
when no PNG is there, 8-bit greyscale masks (ids 1..255), and a
depth image of another size than the colour image with the same aspect ratio (a registered depth at its own
resolution: resampled to the colour image's grid, whose intrinsics the capture gives).

Every problem raises :class:`protomine.errors.InputError` naming the file and the field.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image

from .atomic import atomic_path, write_text
from .errors import InputError
from .geometry import intrinsics_matrix, is_rigid

FORMAT = "protomine.capture/1"


@dataclass(frozen=True)
class Intrinsics:
    width: int
    height: int
    fx: float
    fy: float
    cx: float
    cy: float

    @property
    def K(self) -> np.ndarray:
        return intrinsics_matrix(self.fx, self.fy, self.cx, self.cy)


@dataclass
class Frame:
    id: str
    cam_to_world: np.ndarray  # (4, 4)


@dataclass
class Capture:
    """A validated capture folder.  Images are read on demand with :meth:`rgb`, :meth:`depth`, :meth:`mask`."""

    path: Path
    depth_scale: float
    intrinsics: Intrinsics
    frames: list[Frame]
    has_masks: bool = False
    meta: dict = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.path.name

    def frame_file(self, kind: str, frame_id: str) -> Path:
        p = self.path / kind / f"{frame_id}.png"
        if kind == "rgb" and not p.is_file():
            for ext in (".jpg", ".jpeg"):
                if (alt := p.with_suffix(ext)).is_file():
                    return alt
        return p

    def rgb(self, frame_id: str) -> np.ndarray:
        """(H, W, 3) uint8."""
        return _read_png(self.frame_file("rgb", frame_id), "rgb", self.intrinsics)

    def depth(self, frame_id: str) -> np.ndarray:
        """(H, W) float64 metres, 0 = no reading."""
        raw = _read_png(self.frame_file("depth", frame_id), "depth", self.intrinsics)
        return resample_depth(raw, (self.intrinsics.height, self.intrinsics.width)).astype(np.float64) / self.depth_scale

    def mask(self, frame_id: str) -> np.ndarray | None:
        """(H, W) int32 instance ids, or None when the capture has no masks."""
        if not self.has_masks:
            return None
        return _read_png(self.frame_file("masks", frame_id), "mask", self.intrinsics).astype(np.int32)

    def check_headers(self) -> None:
        """Open every frame file's PNG header (no pixel decoding): present, readable, right mode and size.

        Cheap enough to run on every capture before a long job starts; :meth:`validate_images` decodes too.
        """
        kinds = ("rgb", "depth") + (("masks",) if self.has_masks else ())
        for fr in self.frames:
            for kind in kinds:
                path, what = self.frame_file(kind, fr.id), "mask" if kind == "masks" else kind
                want, modes = _EXPECT[what]
                try:
                    with Image.open(path) as im:
                        mode, (w, h) = im.mode, im.size
                except FileNotFoundError:
                    raise InputError(path, f"frame {fr.id}", f"{kind} image is missing") from None
                except (OSError, SyntaxError, ValueError) as e:
                    raise InputError(path, what, f"cannot read PNG ({e})") from None
                if mode not in modes:
                    raise InputError(path, what, f"expected {want}, got PIL mode {mode}")
                if (w, h) != (self.intrinsics.width, self.intrinsics.height):
                    raise InputError(path, "size", f"expected {self.intrinsics.width}x{self.intrinsics.height} "
                                     f"(intrinsics), got {w}x{h}")

    def validate_images(self) -> None:
        """Open every frame file once so bad PNGs fail before any work starts."""
        for fr in self.frames:
            self.rgb(fr.id)
            d = self.depth(fr.id)
            if not np.any(d > 0):
                raise InputError(self.frame_file("depth", fr.id), "pixels", "all depth readings are 0 (no reading anywhere)")
            self.mask(fr.id)


def _fail(path: Path, fld: str, msg: str) -> InputError:
    return InputError(path, fld, msg)


def _number(doc: dict, key: str, path: Path, where: str, *, positive: bool = False, integer: bool = False) -> float:
    if key not in doc:
        raise _fail(path, f"{where}.{key}", "missing")
    v = doc[key]
    # JSON integers are unbounded: one beyond float64 is not a finite number either (no OverflowError)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or (isinstance(v, int) and abs(v) > 1e300) or not math.isfinite(v):
        raise _fail(path, f"{where}.{key}", f"expected a finite number, got {v!r}")
    if integer and (float(v) != int(v)):
        raise _fail(path, f"{where}.{key}", f"expected a whole number, got {v!r}")
    if positive and v <= 0:
        raise _fail(path, f"{where}.{key}", f"expected a value > 0, got {v!r}")
    return int(v) if integer else float(v)


def read_capture(folder: str | Path, *, check_images: bool = True) -> Capture:
    """Read and validate a capture folder.

    check_images: also open every PNG (dtype, channels, size, non-empty depth).  Readers that stream
    frames may pass False and rely on the per-frame checks in :meth:`Capture.rgb` etc.
    """
    folder = Path(folder)
    jpath = folder / "capture.json"
    if not folder.is_dir():
        raise InputError(folder, None, "capture folder not found")
    if not jpath.is_file():
        raise InputError(jpath, None, "capture.json is missing")
    try:
        doc = json.loads(jpath.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise InputError(jpath, None, f"not valid JSON ({e})") from None
    if not isinstance(doc, dict):
        raise _fail(jpath, "<root>", f"expected a JSON object, got {type(doc).__name__}")
    if doc.get("format") != FORMAT:
        raise _fail(jpath, "format", f"expected {FORMAT!r}, got {doc.get('format')!r}")
    depth_scale = _number(doc, "depth_scale", jpath, "capture", positive=True)
    intr = doc.get("intrinsics")
    if not isinstance(intr, dict):
        raise _fail(jpath, "intrinsics", f"expected an object with width, height, fx, fy, cx, cy, got {intr!r}")
    intrinsics = Intrinsics(
        width=_number(intr, "width", jpath, "intrinsics", positive=True, integer=True),
        height=_number(intr, "height", jpath, "intrinsics", positive=True, integer=True),
        fx=_number(intr, "fx", jpath, "intrinsics", positive=True),
        fy=_number(intr, "fy", jpath, "intrinsics", positive=True),
        cx=_number(intr, "cx", jpath, "intrinsics"),
        cy=_number(intr, "cy", jpath, "intrinsics"),
    )
    frames_doc = doc.get("frames")
    if not isinstance(frames_doc, list) or not frames_doc:
        raise _fail(jpath, "frames", f"expected a non-empty list of frames, got {frames_doc!r}")
    frames: list[Frame] = []
    seen: set[str] = set()
    for i, f in enumerate(frames_doc):
        where = f"frames[{i}]"
        if not isinstance(f, dict):
            raise _fail(jpath, where, f"expected an object with id and cam_to_world, got {f!r}")
        fid = f.get("id")
        if not isinstance(fid, str) or not fid or "/" in fid or fid.startswith("."):
            raise _fail(jpath, f"{where}.id", f"expected a non-empty file-name string, got {fid!r}")
        if fid in seen:
            raise _fail(jpath, f"{where}.id", f"duplicate frame id {fid!r}")
        seen.add(fid)
        T = f.get("cam_to_world")
        try:
            arr = np.array(T, dtype=np.float64)
        except (TypeError, ValueError, OverflowError):
            raise _fail(jpath, f"{where}.cam_to_world", f"expected a 4x4 array of finite numbers, got {str(T)[:80]}") from None
        reason = is_rigid(arr)
        if reason:
            raise _fail(jpath, f"{where}.cam_to_world", f"not a rigid transform: {reason}")
        frames.append(Frame(fid, arr))
    has_masks = (folder / "masks").is_dir()
    cap = Capture(folder, depth_scale, intrinsics, frames, has_masks, {k: v for k, v in doc.items() if k not in {"format", "depth_scale", "intrinsics", "frames"}})
    for fr in frames:
        for kind in ("rgb", "depth") + (("masks",) if has_masks else ()):
            p = cap.frame_file(kind, fr.id)
            if not p.is_file():
                raise InputError(p, f"frame {fr.id}", f"{kind} image is missing")
    if check_images:
        cap.validate_images()
    return cap


_EXPECT = {"rgb": ("8-bit RGB", {"RGB"}), "depth": ("16-bit greyscale", {"I;16", "I;16B", "I"}),
           "mask": ("16-bit (or 8-bit) greyscale", {"I;16", "I;16B", "I", "L"})}


def resample_depth(depth: np.ndarray, shape: tuple[int, int], *, smooth_rel: float = 0.02) -> np.ndarray:
    """A depth image (h, w) on the pixel grid of another size (H, W) with the same field of view.

    Pixel centre u of the target grid sits at (u + 0.5) w / W - 0.5 on the source grid, which is what scaling
    the intrinsics (fx, cx + 0.5) by W / w means.  Bilinear where the four source readings around a target
    pixel exist and agree within ``smooth_rel`` x depth (a smooth surface: nearest neighbour would leave
    terraces there), nearest neighbour elsewhere (averaging across an edge would invent depths between an
    object and its background).  A depth of the target size is returned unchanged.
    """
    h, w = depth.shape
    H, W = shape
    if (h, w) == (H, W):
        return depth
    y = np.clip((np.arange(H) + 0.5) * h / H - 0.5, 0, h - 1)
    x = np.clip((np.arange(W) + 0.5) * w / W - 0.5, 0, w - 1)
    y0, x0 = np.floor(y).astype(int), np.floor(x).astype(int)
    y1, x1 = np.minimum(y0 + 1, h - 1), np.minimum(x0 + 1, w - 1)
    fy, fx = (y - y0)[:, None], (x - x0)[None, :]
    d = depth.astype(np.float64)
    q = [d[y0][:, x0], d[y0][:, x1], d[y1][:, x0], d[y1][:, x1]]
    bil = (q[0] * (1 - fx) + q[1] * fx) * (1 - fy) + (q[2] * (1 - fx) + q[3] * fx) * fy
    lo, hi = np.minimum.reduce(q), np.maximum.reduce(q)
    smooth = (lo > 0) & (hi - lo <= smooth_rel * hi)
    near = d[np.where(fy < 0.5, y0[:, None], y1[:, None]), np.where(fx < 0.5, x0[None, :], x1[None, :])]
    return np.where(smooth, bil, near).astype(depth.dtype) if depth.dtype.kind == "f" else np.where(smooth, np.rint(bil), near).astype(depth.dtype)


def read_image(path: str | Path, kind: str) -> np.ndarray:
    """Read one image as ``kind`` ("rgb": (H, W, 3) uint8, PNG or JPEG; "depth": (H, W) 16-bit; "mask":
    (H, W) 16- or 8-bit), or raise InputError naming the file."""
    path = Path(path)
    want, modes = _EXPECT[kind]
    try:
        with Image.open(path) as im:
            mode = im.mode
            im.load()
            arr = np.asarray(im)
    except FileNotFoundError:
        raise InputError(path, kind, f"{kind} image is missing") from None
    except (OSError, SyntaxError, ValueError) as e:
        raise InputError(path, kind, f"cannot read PNG (or JPEG) ({e})") from None
    if mode not in modes:
        raise InputError(path, kind, f"expected {want}, got PIL mode {mode} with shape {arr.shape}")
    if kind == "rgb":
        if arr.dtype != np.uint8 or arr.ndim != 3 or arr.shape[2] != 3:
            raise InputError(path, kind, f"expected {want} (H, W, 3) uint8, got {arr.dtype} {arr.shape}")
    else:
        if arr.ndim != 2:
            raise InputError(path, kind, f"expected {want} (H, W), got shape {arr.shape}")
        if mode == "I" and (arr.min(initial=0) < 0 or arr.max(initial=0) > 65535):
            raise InputError(path, kind, f"expected {want} values in [0, 65535]")
    return arr


def _read_png(path: Path, kind: str, intr: Intrinsics) -> np.ndarray:
    arr = read_image(path, kind)
    h, w = arr.shape[:2]
    if kind == "depth" and (h, w) != (intr.height, intr.width):
        # a registered depth at its own resolution: same field of view, so the same aspect ratio
        if abs(w * intr.height - h * intr.width) > max(w, h, intr.width, intr.height):
            raise InputError(path, "size", f"expected {intr.width}x{intr.height} (intrinsics) or the same aspect "
                             f"ratio, got {w}x{h}")
        return arr
    if (h, w) != (intr.height, intr.width):
        raise InputError(path, "size", f"expected {intr.width}x{intr.height} (intrinsics), got {w}x{h}")
    return arr


# --- writer --------------------------------------------------------------------------------

def write_png(path: str | Path, arr: np.ndarray) -> None:
    """Write (H, W, 3) uint8 as 8-bit RGB or (H, W) uint16 as 16-bit greyscale, atomically."""
    arr = np.asarray(arr)
    if arr.ndim == 3 and arr.dtype == np.uint8:
        im = Image.fromarray(arr, mode="RGB") if arr.shape[2] == 3 else None
    elif arr.ndim == 2 and arr.dtype == np.uint16:
        im = Image.fromarray(arr)
        if im.mode != "I;16":
            im = Image.fromarray(arr.astype(np.uint16), mode="I;16")
    else:
        im = None
    if im is None:
        raise ValueError(f"write_png expects (H, W, 3) uint8 or (H, W) uint16, got {arr.dtype} {arr.shape}")
    with atomic_path(path) as tmp:
        im.save(tmp, format="PNG")


def write_capture(folder: str | Path, *, intrinsics: Intrinsics, depth_scale: float, frames: list[dict], extra: dict | None = None) -> Path:
    """Write a capture folder.

    frames: list of dicts with ``id`` (str), ``cam_to_world`` (4, 4), ``rgb`` (H, W, 3) uint8,
    ``depth_m`` (H, W) float metres (0 = no reading), optional ``mask`` (H, W) integer ids.
    Depth is quantised to the depth scale (round to nearest) and clipped to the 16-bit range.
    """
    folder = Path(folder)
    for sub in ("rgb", "depth"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    if any("mask" in f for f in frames):
        (folder / "masks").mkdir(exist_ok=True)
    for f in frames:
        write_png(folder / "rgb" / f"{f['id']}.png", f["rgb"])
        q = np.clip(np.rint(np.asarray(f["depth_m"]) * depth_scale), 0, 65535).astype(np.uint16)
        write_png(folder / "depth" / f"{f['id']}.png", q)
        if "mask" in f:
            write_png(folder / "masks" / f"{f['id']}.png", np.asarray(f["mask"]).astype(np.uint16))
    doc = {
        "format": FORMAT,
        "depth_scale": float(depth_scale),
        "intrinsics": {"width": intrinsics.width, "height": intrinsics.height, "fx": intrinsics.fx,
                       "fy": intrinsics.fy, "cx": intrinsics.cx, "cy": intrinsics.cy},
        "frames": [{"id": f["id"], "cam_to_world": np.asarray(f["cam_to_world"], dtype=float).tolist()} for f in frames],
    }
    if extra:
        doc.update(extra)
    write_text(folder / "capture.json", json.dumps(doc, indent=1))
    return folder
