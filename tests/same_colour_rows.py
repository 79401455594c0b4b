"""Test helper: rows of identical items of ONE colour touching one another (boxes, cans, handled mugs, lamps on a
thin disc), as on a shop shelf, seen from a ring of cameras; the renderer's masks as truth.  Used by
tests/test_same_colour_rows.py and by the measurements in README "Touching objects of one colour"."""
from __future__ import annotations

import numpy as np

from protomine.capture import Intrinsics, write_capture
from protomine.scenes import shapes as S
from protomine.scenes.noise import add_sensor_noise
from protomine.scenes.render import Scene, SceneObject, look_at, render
from protomine.scenes.scenario import place_touching

W, H = 200, 150
INTR = Intrinsics(W, H, 150.0, 150.0, (W - 1) / 2, (H - 1) / 2)
COLOURS = [(0.42, 0.2, 0.52), (0.75, 0.3, 0.12), (0.2, 0.45, 0.7), (0.3, 0.55, 0.25)]


def item(kind: str, rng: np.random.Generator | None = None) -> S.Shape:
    """One item of a row, base on z = 0: a box (7 x 5 x 10 cm, edges rounded 4 mm), a can (r 3.3 cm, 11 cm), a
    mug (r 4 cm, 9 cm, a ring handle along +x), a lamp (a 6 mm disc r 5 cm, a post r 8 mm to 13 cm, a shade r 3 cm);
    the single objects of ``one_item`` (``rng``: the varied ones' sizes)."""
    if kind == "box":
        return S.on_base(S.rounded_box((0.035, 0.025, 0.05), 0.004))
    if kind == "can":
        return S.cylinder(0.033, 0.11)
    if kind == "mug":
        handle = S.translate(S.rotate(S.torus(0.025, 0.006), S.axis_rotation("x", 90.0)), (0.045, 0.0, 0.045))
        return S.union(S.cylinder(0.04, 0.09), handle)
    if kind == "lamp":
        return S.union(S.cylinder(0.05, 0.006), S.cylinder(0.008, 0.13), S.frustum(0.03, 0.018, 0.04, z0=0.12))
    if kind in ONE_KINDS + VARIED_KINDS:
        return one_item(kind, rng)
    raise ValueError(f"unknown item {kind!r}")


KINDS = ("box", "can", "mug", "lamp")


def _lying(shape: S.Shape) -> S.Shape:
    """A shape built about z laid on its side (its axis along y), base on z = 0."""
    return S.on_base(S.rotate(shape, S.axis_rotation("x", 90.0)))


def one_item(kind: str, rng: np.random.Generator | None = None) -> S.Shape:
    """Single objects of one colour with two alike ends joined by a narrower part, base on z = 0: a spool lying on
    its side (flanges r 4 cm, 1 cm thick, core r 2.2 cm, 9 cm long in all), a dumbbell lying on its side (two
    weights r 3.5 cm, 3 cm thick, a bar r 1 cm, 14 cm long in all), the same dumbbell standing on a weight, a
    spool standing on a flange, and a double-ended block lying flat (two 5 x 5 x 4 cm blocks joined by a 2 x 2 cm
    bar, 16 cm long in all).  The ``_v`` kinds draw their sizes from ``rng``: the spool as the demo's spool class
    (demo_scenes/items.toml: 7-11 cm long, flanges 0.38-0.50 of it in radius and 0.08-0.13 thick, the core
    0.45-0.65 of the flange's radius), a dumbbell with weights r 2.5-4 cm, 1.5-4 cm thick, a bar r 6-12 mm,
    10-18 cm long in all, a double-ended block with blocks 3.6-6 cm square, 3-5 cm high, a bar 3-8 cm long,
    1.2-2.4 cm wide and half the blocks' height."""
    if kind in VARIED_KINDS:
        u = rng.uniform
        if kind == "spool_side_v":
            size = u(0.07, 0.11)
            rf, ft = size * u(0.38, 0.5), size * u(0.08, 0.13)
            return _lying(S.union(S.cylinder(rf * u(0.45, 0.65), size), S.cylinder(rf, ft), S.cylinder(rf, ft, size - ft)))
        if kind == "dumbbell_side_v":
            length, rw, tw = u(0.10, 0.18), u(0.025, 0.04), u(0.015, 0.04)
            return _lying(S.union(S.cylinder(u(0.006, 0.012), length), S.cylinder(rw, tw),
                                  S.cylinder(rw, tw, length - tw)))
        half, hz, bar, wide = u(0.018, 0.03), u(0.015, 0.025), u(0.03, 0.08), u(0.006, 0.012)
        x = bar / 2 + half
        return S.on_base(S.union(S.box((half, half, hz), (-x, 0.0, 0.0)), S.box((half, half, hz), (x, 0.0, 0.0)),
                                 S.box((bar / 2 + 0.002, wide, hz / 2), (0.0, 0.0, -hz / 2))))
    if kind in ("spool_side", "spool_up"):
        s = S.union(S.cylinder(0.022, 0.09), S.cylinder(0.04, 0.01), S.cylinder(0.04, 0.01, 0.08))
        return _lying(s) if kind == "spool_side" else s
    if kind in ("dumbbell_side", "dumbbell_up"):
        s = S.union(S.cylinder(0.01, 0.14), S.cylinder(0.035, 0.03), S.cylinder(0.035, 0.03, 0.11))
        return _lying(s) if kind == "dumbbell_side" else s
    if kind == "double_block":
        return S.on_base(S.union(S.box((0.025, 0.025, 0.02), (-0.055, 0.0, 0.0)),
                                 S.box((0.025, 0.025, 0.02), (0.055, 0.0, 0.0)),
                                 S.box((0.03, 0.01, 0.01), (0.0, 0.0, -0.01))))
    raise ValueError(f"unknown item {kind!r}")


ONE_KINDS = ("spool_side", "dumbbell_side", "dumbbell_up", "spool_up", "double_block")
VARIED_KINDS = ("spool_side_v", "dumbbell_side_v", "double_block_v")


def row_scene(kind: str, n: int, rng: np.random.Generator) -> tuple[Scene, list[tuple[float, float]]]:
    """``n`` copies of one item, one colour, random yaws, each touching another (``place_touching``); the scene
    and the base positions (mask id i + 1 is object i)."""
    shapes = [item(kind, rng)] * n
    yaws = rng.uniform(0, 360, n)
    pos = place_touching(shapes, yaws, rng)
    col = COLOURS[int(rng.integers(len(COLOURS)))]
    return Scene([SceneObject(s, float(y), p, col) for s, y, p in zip(shapes, yaws, pos)]), pos


def write_row_capture(folder, kind: str, n: int, draw: int) -> None:
    """Draw ``draw`` of a row of ``n`` items ``kind`` (generator seed 1000 x kind index + 100 n + draw), seen by six
    cameras on a ring 0.45-0.6 m from the row's centre at 30-50 deg elevation (even draws) or 45-65 (odd), with
    the demo's gaussian depth noise, written as a capture with the renderer's masks."""
    rng = np.random.default_rng(1000 * (KINDS + ONE_KINDS + VARIED_KINDS).index(kind) + 100 * n + draw)
    scene, pos = row_scene(kind, n, rng)
    centre = np.array([*np.mean(pos, axis=0), 0.0])
    dist = rng.uniform(0.45, 0.6)
    elev = (30, 50) if draw % 2 == 0 else (45, 65)
    views = []
    for i in range(6):
        a, el = 2 * np.pi * i / 6 + rng.uniform(0, 0.5), np.deg2rad(rng.uniform(*elev))
        eye = centre + dist * np.array([np.cos(el) * np.cos(a), np.cos(el) * np.sin(a), np.sin(el)])
        r = render(scene, INTR, look_at(eye, centre + [0, 0, 0.04], np.array([0, 0, 1.0])))
        depth, rgb = add_sensor_noise(r, rng)
        views.append(dict(id=f"{i:06d}", cam_to_world=look_at(eye, centre + [0, 0, 0.04], np.array([0, 0, 1.0])),
                          rgb=rgb, depth_m=depth, mask=r.mask))
    write_capture(folder, intrinsics=INTR, depth_scale=1000.0, frames=views)


def separated(free, masked: dict, n: int, purity: float = 0.95, share: float = 0.8) -> tuple[int, list[float]]:
    """How many of the ``n`` objects the mask-free finding ``free`` separates (one proposal whose pixels are at
    least ``purity`` of that object by the rendered masks and hold at least ``share`` of its masked pixels;
    ``masked``: the masked proposals by key) and each proposal's purity."""
    masks = {fd.id: fd.mask.reshape(-1) for fd in free.frames}
    found, purities = set(), []
    for p in free.proposals:
        ids = np.concatenate([masks[f][pix] for f, pix in p.pixels.items()])
        ids = ids[ids > 0]
        if not len(ids):
            purities.append(0.0)
            continue
        top = int(np.bincount(ids).argmax())
        pur = float(np.mean(ids == top))
        purities.append(pur)
        m = masked.get(str(top))
        if m is None:
            continue
        mine = sum(np.isin(pix, m.pixels.get(f, [])).sum() for f, pix in p.pixels.items())
        if pur >= purity and mine >= share * m.n_points:
            found.add(top)
    return len(found), purities
