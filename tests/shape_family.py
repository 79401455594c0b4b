"""Test helper: one capture of a family of our own shapes on a table, five cameras on a ring looking at it, the
world frame turned at random; the renderer's masks as truth (used by the thin-part and thin-handle tests)."""
from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from protomine.capture import Intrinsics, write_capture
from protomine.scenes.noise import add_sensor_noise
from protomine.scenes.render import Scene, SceneObject, look_at, render
from protomine.scenes.scenario import place_touching

W, H = 160, 120
INTR = Intrinsics(W, H, 150.0, 150.0, (W - 1) / 2, (H - 1) / 2)


def write_family_capture(folder, shapes: dict, kinds: list, rng: np.random.Generator, touching: bool,
                         target_z: float, noisy: bool, place_step: float = 0.003) -> list:
    """Write a capture of ``shapes[k]`` for each k in ``kinds`` (random yaws and colours; touching one another, or
    on a 10 cm square grid), seen from five cameras at 0.5 m and 35-55 deg elevation aimed at (0, 0, target_z);
    depth with the demo's gaussian sensor noise when ``noisy``, else exact; ``place_step``: the grid of the
    touching placement's overlap test (``scenario.place_touching``).  Returns [(kind, base centre in world
    coordinates)]."""
    objs = [shapes[k] for k in kinds]
    yaws = rng.uniform(0, 360, len(kinds))
    if touching:
        pos = place_touching(objs, yaws, rng, place_step)
    else:
        pos = [(0.1 * (i % 2) - 0.05, 0.1 * (i // 2) - 0.05) for i in range(len(kinds))]
    cols = [tuple(rng.uniform(0.2, 0.9, 3)) for _ in kinds]
    scene = Scene([SceneObject(s, float(y), p, c) for s, y, p, c in zip(objs, yaws, pos, cols)])
    Tw = np.eye(4)
    Tw[:3, :3] = Rotation.random(random_state=rng.integers(1 << 30)).as_matrix()
    frames = []
    for i in range(5):
        a, el = 2 * np.pi * i / 5 + rng.uniform(0, 1), np.deg2rad(rng.uniform(35, 55))
        eye = 0.5 * np.array([np.cos(el) * np.cos(a), np.cos(el) * np.sin(a), np.sin(el)])
        T = look_at(eye, np.array([0, 0, target_z]), np.array([0, 0, 1.0]))
        r = render(scene, INTR, T)
        if noisy:
            depth, rgb = add_sensor_noise(r, rng)
        else:
            depth, rgb = r.depth, (np.clip(r.rgb, 0, 1) * 255).astype(np.uint8)
        frames.append(dict(id=f"{i:06d}", cam_to_world=Tw @ T, rgb=rgb, depth_m=depth, mask=r.mask))
    write_capture(folder, intrinsics=INTR, depth_scale=1000.0, frames=frames)
    return [(k, Tw[:3, :3] @ np.array([p[0], p[1], 0.0]) + Tw[:3, 3]) for k, p in zip(kinds, pos)]


def matched_clusters(store, lib, truth: dict, within: float) -> tuple[list, list]:
    """Mined cluster and truth kind of every stored object whose base centre lies within ``within`` metres of a
    truth base of its capture (``truth``: capture name -> [(kind, base)] as :func:`write_family_capture` gives)."""
    cl = dict(zip(lib.members["object"], lib.members["cluster"]))
    pred, lab = [], []
    for oid, cap, base in zip(store.objects["id"], store.objects["capture"], store.objects["origin"]):
        kinds = truth[cap]
        d = [np.linalg.norm(b - base) for _, b in kinds]
        if min(d) < within:
            pred.append(cl[oid])
            lab.append(kinds[int(np.argmin(d))][0])
    return pred, lab
