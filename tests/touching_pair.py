"""Test helper: a capture of a few objects seen from a ring of cameras, with the renderer's masks as truth, and
its proposals found with and without masks (used by the thin-part and touching-base tests)."""
from __future__ import annotations

import numpy as np

from protomine.capture import Intrinsics, read_capture, write_capture
from protomine.config import load_config
from protomine.ingest.proposals import find_objects
from protomine.scenes.noise import add_sensor_noise
from protomine.scenes.render import Scene, look_at, render


def ring_proposals(tmp_path, scene: Scene, intr: Intrinsics, rng: np.random.Generator, centre: np.ndarray,
                   distance: float, elevation_deg: tuple[float, float], target: np.ndarray | None = None,
                   frames: int = 6, cfg: dict | None = None):
    """Render ``frames`` views from ``distance`` around ``centre`` (azimuths evenly spread, jittered; elevations
    drawn in ``elevation_deg``), looking at ``target`` (default: the centre), with gaussian depth noise; write
    and read them back as a capture and return (masked proposals by key, the mask-free finding), with ``cfg``
    (default: the fast preset)."""
    target = centre if target is None else target
    views = []
    for i in range(frames):
        a, el = 2 * np.pi * i / frames + rng.uniform(0, 0.5), np.deg2rad(rng.uniform(*elevation_deg))
        eye = centre + distance * np.array([np.cos(el) * np.cos(a), np.cos(el) * np.sin(a), np.sin(el)])
        T = look_at(eye, target, np.array([0, 0, 1.0]))
        r = render(scene, intr, T)
        depth, rgb = add_sensor_noise(r, rng)
        views.append(dict(id=f"{i:06d}", cam_to_world=T, rgb=rgb, depth_m=depth, mask=r.mask))
    write_capture(tmp_path / "pair", intrinsics=intr, depth_scale=1000.0, frames=views)
    cap = read_capture(tmp_path / "pair")
    cfg = load_config("fast") if cfg is None else cfg
    masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
    return masked, find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
