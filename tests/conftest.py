"""Shared test helpers: tiny synthetic captures (64x48, a table plane plus simple solids) rendered with
protomine.scenes.render, and a session-scoped store + library built from them once.

Conventions: scene z = table up; cameras circle the scene at ``elevation`` degrees; the capture's world
frame is the scene frame moved by an arbitrary rigid transform (nothing may assume world +z is up).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine.capture import Intrinsics, write_capture
from protomine.scenes import shapes as S
from protomine.scenes.render import Scene, SceneObject, look_at, render

TINY_W, TINY_H = 64, 48
TINY_INTRINSICS = Intrinsics(TINY_W, TINY_H, 60.0, 60.0, (TINY_W - 1) / 2, (TINY_H - 1) / 2)


# a coarse grid and one scale keep a 6-object mine at about a second (the defaults take ~10 s)
TINY_CONFIG = """[volume]
radial_bins = 4
azimuth_bins = 12
height_bins = 4
[mine]
scales = [1.0]
tilt_nsides = [0]
n_init = 1
max_iter = 10
# the tiny world's tests check the pose search's own calibration and its switches; the calibration of the
# view-normalised distance (on by default) is tested in test_view_calibration.py, on this world too
view_normalise_calibrate = false
[audit]
bootstrap = 50
"""


def tiny_box(h: float = 0.05) -> S.Shape:
    """An asymmetric solid (box plus a side block) of height ``h`` metres, base on z = 0."""
    return S.union(S.box((0.035, 0.02, h / 2), (0.0, 0.0, h / 2)), S.box((0.012, 0.03, h / 4), (0.02, 0.03, h / 4)))


def tiny_cylinder() -> S.Shape:
    return S.cylinder(0.03, 0.07)


def tiny_frames(objs: list[tuple], *, n_frames: int = 3, world_seed: int = 0, elevation: float = 50.0,
                distance: float = 0.45, table: bool = True) -> list[dict]:
    """Render frames (dicts for write_capture) of ``objs`` = [(shape, yaw_deg, (x, y), (r, g, b))]."""
    scene = Scene([SceneObject(sh, yaw, pos, col) for sh, yaw, pos, col in objs])
    if not table:
        scene.table_half_extent = 1e-3
    Tw = np.eye(4)
    Tw[:3, :3] = Rotation.random(random_state=world_seed).as_matrix()
    Tw[:3, 3] = np.random.default_rng(world_seed).normal(size=3)
    frames = []
    for i in range(n_frames):
        a, el = 2 * np.pi * i / n_frames + 0.3, np.deg2rad(elevation)
        eye = distance * np.array([np.cos(el) * np.cos(a), np.cos(el) * np.sin(a), np.sin(el)])
        T = look_at(eye, np.zeros(3), np.array([0, 0, 1.0]))
        r = render(scene, TINY_INTRINSICS, T)
        frames.append(dict(id=f"{i:06d}", cam_to_world=Tw @ T, rgb=(np.clip(r.rgb, 0, 1) * 255).astype(np.uint8),
                           depth_m=r.depth, mask=r.mask))
    return frames


def make_tiny_capture(folder: Path, objs: list[tuple] | None = None, *, masks: bool = True, **kw) -> Path:
    """Write a tiny capture folder (default: one box on the table) and return it."""
    if objs is None:
        objs = [(tiny_box(), 20.0, (0.0, 0.0), (0.8, 0.3, 0.2))]
    frames = tiny_frames(objs, **kw)
    if not masks:
        for f in frames:
            f.pop("mask")
    return write_capture(folder, intrinsics=TINY_INTRINSICS, depth_scale=1000.0, frames=frames)


def depth_only_capture(folder: Path, depth: np.ndarray):
    """A one-frame capture of depth (H, W) metres (fx = fy = 200 px, centred principal point, identity pose, grey
    colour, no masks), read back."""
    from protomine.capture import read_capture
    h, w = depth.shape
    write_capture(folder, intrinsics=Intrinsics(w, h, 200.0, 200.0, (w - 1) / 2, (h - 1) / 2),
                  depth_scale=10000.0, frames=[{"id": "000000", "cam_to_world": np.eye(4), "depth_m": depth,
                                                "rgb": np.full((h, w, 3), 128, np.uint8)}])
    return read_capture(folder)


def two_object_scene(k: int) -> list[tuple]:
    """A box and a cylinder at positions/yaws that vary with k (so captures differ)."""
    return [(tiny_box(), 15.0 + 37.0 * k, (0.06, 0.0), (0.8, 0.3, 0.2)),
            (tiny_cylinder(), 0.0, (-0.07, 0.02 * (k % 2)), (0.2, 0.3, 0.8))]


@pytest.fixture(scope="session")
def tiny_world(tmp_path_factory):
    """Session data: 3 captures of 2 objects each, a store of all 3, and a library mined with K = 2.

    Returns a dict: caps (list of folders), store, library, config (TOML path, TINY_CONFIG), cfg (loaded).
    Tests must copy these files before modifying them.
    """
    from protomine.config import load_config
    from protomine.ingest.pipeline import ingest_captures
    from protomine.mine.pipeline import mine_store
    root = tmp_path_factory.mktemp("tiny_world")
    caps = [make_tiny_capture(root / f"cap{k}", two_object_scene(k), world_seed=k) for k in range(3)]
    config = root / "tiny.toml"
    config.write_text(TINY_CONFIG)
    cfg = load_config(config)
    ingest_captures(caps, root / "store" / "objects.h5", cfg, seed=0)
    mine_store(root / "store" / "objects.h5", root / "lib" / "library.h5", cfg, seed=0, n_clusters=2)
    return {"root": root, "caps": caps, "store": root / "store" / "objects.h5", "library": root / "lib" / "library.h5",
            "cfg": cfg, "config": str(config)}


@pytest.fixture(scope="session")
def demo_small(tmp_path_factory):
    """A small rendered demo scenario (invented data): 8 mining captures x 6 frames and 8 single-frame
    captures at 160x120, ingested with masks and mined with the fast preset and automatic K."""
    from protomine.config import load_config
    from protomine.ingest.pipeline import ingest_captures
    from protomine.mine.pipeline import mine_store
    from protomine.scenes.scenario import generate_scenario

    out = tmp_path_factory.mktemp("demo_small")
    doc = generate_scenario(out, n_mining=8, n_single=8, frames=6, width=160, height=120, seed=5)
    cfg = load_config("fast")
    mining = [out / c for c in doc["mining"]]
    ingest_captures(mining, out / "objects.h5", cfg, seed=0)
    lib, info = mine_store(out / "objects.h5", out / "library.h5", cfg, seed=0)
    return {"out": out, "doc": doc, "cfg": cfg, "mining": mining, "lib": lib, "info": info}


def score_without_stretch(two: np.ndarray) -> np.ndarray:
    """x from the matcher's score s = x (1 - ln x) (Fisher's combination of x with one p-value of 1, the score
    without its stretch factor), by bisection on [0, 1], element-wise (0 where s is 0)."""
    xs = np.empty_like(two)
    for idx, v in np.ndenumerate(two):
        lo, hi = 0.0, 1.0
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if mid * (1 - np.log(mid)) < v else (lo, mid)
        xs[idx] = 0.5 * (lo + hi) if v > 0 else 0.0
    return xs
