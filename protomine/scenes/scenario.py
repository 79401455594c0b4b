"""Generate the demo scenario: rendered capture folders plus truth files beside them.

Layout of OUT::

    OUT/scenario.json        capture folders (mining / single-frame), class split, seed
    OUT/truth.csv            object,label,yaw_deg            (object = "<capture>/<mask id>")
    OUT/truth_points.csv     capture,x,y,z,label,yaw_deg     (world base centre of each object)
    OUT/truth_full.csv       every fact about every object (class, symmetry, scale, up, split, full pose...)
    OUT/mine_000/ ...        mining captures: a ring of cameras around the table
    OUT/single_000/ ...      single-frame captures: new instances, including the held-out classes

Conventions: each capture's scene is built in a table frame (z up, table top z = 0); the capture's
world frame is a random rigid transform of it (up is not a world axis).  yaw_deg is the truth yaw of the
object's canonical x axis, right-handed about the world up and measured from
``geometry.reference_direction(up)``, in [0, 360); it is written unreduced, and ``symmetry`` in
truth_full.csv gives the period to reduce it by.  Truth never goes inside a capture folder.

Resting poses: a share ``tumbled_fraction`` of the instances is dropped rather than stood upright: a resting
face is drawn by its quasi-static probability (:mod:`protomine.scenes.resting`), then a yaw.  truth_full.csv
gives every instance's full pose, x_world = R x_model + t, as the quaternion ``qx,qy,qz,qw`` (scalar last) of
R and ``tx,ty,tz``; the model frame is the instance's own (base on z = 0, footprint centred, x = the part
that yaw rotates).  ``face`` indexes the instance's stable faces, most probable first (-1: the upright pose
is not a quasi-static rest; empty: an all-upright scene, where no face analysis runs).  For a tumbled
instance yaw_deg is the drawn yaw of the resting frame (the model rotated by the smallest rotation that takes
the face's normal to down).  ``turns`` lists the instance's symmetries that move up, in the model frame
("order:ax,ay,az" joined by ";"; ``demo_scenes.items.instance_turns``: a spool end for end, a mallet half turned
about its handle), beside ``symmetry`` about up; folders rendered before the column existed get it from
:func:`add_truth_turns` (the layouts drawn again, nothing rendered).
"""
from __future__ import annotations

import copy
import csv
import io
import json
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from scipy.spatial.transform import Rotation

from demo_scenes.items import Instance, ItemClass, format_turns, instance_turns, load_item_classes, make_instance

from ..atomic import clean_stale_temporaries, write_text
from ..capture import Intrinsics, write_capture
from ..errors import InputError
from ..geometry import direction_to_yaw
from ..progress import bar, detail
from .noise import add_sensor_noise, stereo_depth
from .render import Scene, SceneObject, look_at, render
from .resting import RestingPoses, rest_shape, shape_resting_poses
from .shapes import Shape

SCENARIO_FORMAT = "protomine.scenario/1"
DEPTH_SCALE = 1000.0
PLACE_RADIUS = 0.38          # object footprints stay inside this disc about the table centre (m)
GAP = 0.01                   # minimum gap between footprint circles (m)


def demo_intrinsics(width: int, height: int) -> Intrinsics:
    """A ~62 degree horizontal field of view, principal point at the image centre."""
    f = 0.85 * width
    return Intrinsics(width, height, f, f, (width - 1) / 2, (height - 1) / 2)


def generate_scenario(out_dir: str | Path, *, n_mining: int = 12, n_single: int = 24, frames: int = 8,
                      width: int = 320, height: int = 240, seed: int = 0, classes: list[str] | None = None,
                      single_classes: list[str] | None = None, family: str = "tools", held_out: list[str] | None = None,
                      tumbled_fraction: float = 0.0, touching: bool = False, stereo_fraction: float = 0.0,
                      progress: Callable[[str], None] | None = None, executor=None) -> dict:
    """Render the demo scenario into ``out_dir`` and write its truth files.  Returns a summary dict.

    family: the item-class family (items.toml ``family``) the default class lists come from.
    classes: item classes used in mining captures (default: every class of the family not marked held_out).
    held_out: the family's classes seen only in single-frame captures (the never-mined classes), instead of those
    marked held_out in items.toml; the family's other classes are mined (``[scenes] held_out_classes``; ignored when
    ``classes`` is given).
    single_classes: classes used in single-frame captures (default: every class of the family).
    tumbled_fraction: share of instances dropped on a resting face drawn by its probability (0 = all
    upright, as built; 1 = all dropped).
    stereo_fraction: share of the mining and of the single-frame captures (evenly spread) whose depth comes
    from the active-stereo model (``noise.stereo_depth``) instead of the gaussian one; the scenes, poses and
    RGB are the same for either model at one seed, only the depth differs.
    executor (``protomine.scale.executor``; None = this process) renders the captures in its worker
    processes; the layouts are drawn here, in capture order, so the scenario does not depend on it, and each
    capture goes to a worker as soon as its layout is drawn.
    """
    if n_mining < 1 or n_single < 0 or frames < 1:
        raise InputError(None, "captures/single/frames", f"expected captures >= 1, single >= 0, frames >= 1, got {n_mining}, {n_single}, {frames}")
    if not 0.0 <= stereo_fraction <= 1.0:
        raise InputError(None, "stereo_fraction", f"expected a share in [0, 1], got {stereo_fraction}")
    if width < 16 or height < 16:
        raise InputError(None, "width/height", f"expected an image of at least 16x16, got {width}x{height}")
    if not 0.0 <= tumbled_fraction <= 1.0:
        raise InputError(None, "scenes.tumbled_fraction", f"expected a number in [0, 1], got {tumbled_fraction!r}")
    all_classes = load_item_classes()
    families = sorted({c.family for c in all_classes})
    if family not in families:
        raise InputError(None, "scenes.family", f"expected one of {families}, got {family!r}")
    by_name = {c.name: c for c in all_classes}
    own = [c for c in all_classes if c.family == family]
    if held_out is not None and classes is None:
        names = [c.name for c in own]
        bad = [n for n in held_out if n not in names]
        if bad or len(set(held_out)) >= len(names):
            raise InputError(None, "scenes.held_out_classes", f"expected classes of the {family!r} family {names}, leaving at "
                             f"least one to mine, got {list(held_out)}")
        classes = [n for n in names if n not in set(held_out)]
    mining = _pick(by_name, classes, [c.name for c in own if not c.held_out], "classes")
    single = _pick(by_name, single_classes, [c.name for c in own], "single_classes")
    return _generate(Path(out_dir), n_mining, n_single, frames, width, height, seed, mining, single,
                     float(tumbled_fraction), progress, touching, float(stereo_fraction), executor)


def held_out_setting(scenes_cfg: dict) -> list[str] | None:
    """The config's ``[scenes] held_out_classes`` as a list of class names (None when empty: items.toml's marks)."""
    names = [n.strip() for n in str(scenes_cfg.get("held_out_classes", "")).split(",") if n.strip()]
    return names or None


def scene_params(scenes_cfg: dict) -> dict:
    """The ``[scenes]`` settings a rendered scenario is recorded with (``demo_params``): an empty
    ``held_out_classes`` is left out, so scenes rendered before the key existed still match."""
    named = held_out_setting(scenes_cfg) is not None
    return {k: v for k, v in scenes_cfg.items() if named or k != "held_out_classes"}


def _pick(by_name: dict[str, ItemClass], names: list[str] | None, default: list[str], what: str) -> list[ItemClass]:
    names = default if names is None else list(names)
    unknown = [n for n in names if n not in by_name]
    if unknown or not names:
        raise InputError(None, what, f"expected a non-empty list of item classes from {sorted(by_name)}, got {names}")
    return [by_name[n] for n in names]


def _generate(out: Path, n_mining: int, n_single: int, frames: int, width: int, height: int, seed: int,
              mining: list[ItemClass], single: list[ItemClass], tumbled_fraction: float,
              progress: Callable[[str], None] | None, touching: bool = False,
              stereo_fraction: float = 0.0, executor=None) -> dict:
    t0 = time.monotonic()
    out.mkdir(parents=True, exist_ok=True)
    clean_stale_temporaries(out)
    rng = np.random.default_rng(seed)
    K = demo_intrinsics(width, height)
    plan = [(f"mine_{i:03d}", "mining", mining, frames) for i in range(n_mining)]
    plan += [(f"single_{i:03d}", "single", single, 1) for i in range(n_single)]
    # the i-th capture of a split is stereo when the running count floor(i f) steps up: evenly spread
    depth_model = {name: "stereo" if np.floor((i + 1) * stereo_fraction) > np.floor(i * stereo_fraction) else "gaussian"
                   for split in ("mining", "single") for i, name in enumerate(p[0] for p in plan if p[1] == split)}
    used: dict[str, dict[str, int]] = {"mining": {}, "single": {}}

    def layouts():
        # each capture's layout depends on the class counts of the captures before it: draw the layouts here,
        # in order, and hand each capture its generator and counts as they were before its layout, plus the
        # resting poses its layout asked for (the costly part of a layout), so that a worker redraws the same
        # layout without computing them again and renders it.  A generator: the executor submits each capture
        # as soon as its layout is drawn, so the workers render while this process draws the next layouts.
        for name, split, pool, n_frames_cap in plan:
            cap_rng = rng.spawn(1)[0]
            start_rng, start_used = copy.deepcopy(cap_rng), dict(used[split])
            resting = _RestingRecord()
            _layout(pool, cap_rng, used[split], tumbled_fraction, resting.compute)
            yield (str(out / name), split, [c.name for c in pool], n_frames_cap, K, start_rng, start_used,
                   tumbled_fraction, touching, depth_model[name] == "stereo", resting.poses)

    rows: list[dict] = []
    timing = {"render_s": 0.0, "frames": 0}
    with bar(progress, "render", total=sum(p[3] for p in plan), unit="frames") as b:

        def add(res: tuple[list[dict], float, str, int, float]) -> None:
            cap_rows, dt, name, n_frames_cap, wall = res
            rows.extend(cap_rows)
            timing["render_s"] += dt
            timing["frames"] += n_frames_cap
            b.advance(n_frames_cap)
            detail(progress, f"{name}: {len(cap_rows)} objects, {n_frames_cap} frame(s), {wall:.2f}s")

        if executor is None:
            for it in layouts():
                add(_capture_item(None, it))
        else:
            executor.map(_capture_item, layouts(), fold=lambda _, res: add(res))
    render_s, n_frames = timing["render_s"], timing["frames"]
    _write_truth(out, rows)
    held = sorted({c.name for c in single} - {c.name for c in mining})
    doc = {
        "format": SCENARIO_FORMAT,
        "seed": int(seed),
        "mining": [p[0] for p in plan if p[1] == "mining"],
        "single": [p[0] for p in plan if p[1] == "single"],
        "classes": {"mining": [c.name for c in mining], "single": [c.name for c in single], "held_out": held},
        "symmetry": {c.name: c.symmetry for c in {**{c.name: c for c in mining}, **{c.name: c for c in single}}.values()},
        "truth": {"objects": "truth.csv", "points": "truth_points.csv", "full": "truth_full.csv"},
        "image": {"width": width, "height": height, "frames_per_mining_capture": frames},
        "tumbled_fraction": tumbled_fraction,
        "placement": "touching" if touching else "apart",
        "depth_model": depth_model,
    }
    write_text(out / "scenario.json", json.dumps(doc, indent=1))
    return {**doc, "out": str(out), "objects": len(rows), "frames_rendered": n_frames,
            "render_seconds_per_frame": render_s / max(n_frames, 1), "seconds": time.monotonic() - t0}


@dataclass(frozen=True)
class Posed:
    """An instance as it rests on the table before its yaw: x_rest = R x_model + s (R = I, s = 0 upright)."""

    inst: Instance
    shape: Shape                 # in the resting frame: resting face on z = 0, footprint centred on z
    R: np.ndarray                # (3, 3)
    s: np.ndarray                # (3,)
    face: int | None             # index into the instance's stable faces; -1 not a rest; None not analysed
    tumbled: bool


class _RestingRecord:
    """The resting poses a layout asks for, in the order it asks (:meth:`compute`), and the same handed back
    in that order when the layout is drawn again from the same generator (:meth:`replay`).  Each is keyed
    by its shape's bounds, so a replay that strays from the recorded draw fails instead of posing the wrong
    shape."""

    def __init__(self, poses: tuple = ()):
        self.poses: tuple = tuple(poses)
        self._next = 0

    @staticmethod
    def _key(shape: Shape) -> tuple:
        return tuple(np.asarray(shape.lo, float).tolist()) + tuple(np.asarray(shape.hi, float).tolist())

    def compute(self, shape: Shape) -> RestingPoses:
        poses = shape_resting_poses(shape)
        self.poses += ((self._key(shape), poses),)
        return poses

    def replay(self, shape: Shape) -> RestingPoses:
        if self._next >= len(self.poses) or self.poses[self._next][0] != self._key(shape):
            raise RuntimeError("a capture's layout drawn again asked for other resting poses than when it was first drawn")
        self._next += 1
        return self.poses[self._next - 1][1]


def _pose(inst: Instance, rng: np.random.Generator, tumbled_fraction: float,
          resting: Callable[[Shape], RestingPoses] = shape_resting_poses) -> Posed:
    """Upright as built, or (with probability ``tumbled_fraction``) dropped on a face drawn by its probability.
    All-upright scenes draw nothing here, so they stay the scenes they were before resting poses existed.
    ``resting``: the shape's resting poses (:func:`shape_resting_poses`, or a record of them)."""
    if tumbled_fraction <= 0.0:
        return Posed(inst, inst.shape, np.eye(3), np.zeros(3), None, False)
    tumbled = bool(rng.random() < tumbled_fraction)
    poses = resting(inst.shape)
    if not tumbled:
        return Posed(inst, inst.shape, np.eye(3), np.zeros(3), poses.face_towards(np.array([0.0, 0.0, -1.0])), False)
    face = int(rng.choice(len(poses.faces), p=poses.probabilities / poses.probabilities.sum()))
    shape, R, s = rest_shape(inst.shape, poses, face)
    return Posed(inst, shape, R, s, face, True)


def _place(posed: list[Posed], rng: np.random.Generator) -> list[tuple[float, float]] | None:
    """Non-overlapping footprint circles inside PLACE_RADIUS, or None when this draw does not fit."""
    radii = [p.shape.footprint_radius() for p in posed]
    order = np.argsort(radii)[::-1]
    pos: dict[int, np.ndarray] = {}
    for i in order:
        r = radii[i]
        room = PLACE_RADIUS - r
        if room < 0:
            return None
        for _ in range(300):
            rho, a = room * np.sqrt(rng.random()), rng.uniform(0, 2 * np.pi)
            c = np.array([rho * np.cos(a), rho * np.sin(a)])
            if all(np.linalg.norm(c - pos[j]) > r + radii[j] + GAP for j in pos):
                pos[i] = c
                break
        else:
            return None
    return [tuple(pos[i]) for i in range(len(posed))]


CONTACT_M = 0.001            # touching placement: the shapes' clearance at the contact (m)


def _inside_samples(shape, yaw_deg: float, step: float = 0.003) -> np.ndarray:
    """(M, 3) points just inside a shape's surface (a 2-step shell), rotated by yaw about z (table frame)."""
    import torch
    lo, hi = np.asarray(shape.lo), np.asarray(shape.hi)
    axes = [np.arange(a, b + step, step) for a, b in zip(lo, hi)]
    g = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 3)
    d = shape.fn(torch.tensor(g, dtype=torch.float32)).numpy()
    pts = g[(d < 0) & (d > -2 * step)]
    a = np.deg2rad(yaw_deg)
    R = np.array([[np.cos(a), -np.sin(a), 0.0], [np.sin(a), np.cos(a), 0.0], [0.0, 0.0, 1.0]])
    return pts @ R.T


def _clearance(shape, yaw_deg: float, pos: np.ndarray, pts: np.ndarray) -> float:
    """Smallest SDF of the placed shape over table-frame points (M, 3): < 0 means they overlap it."""
    import torch
    a = np.deg2rad(yaw_deg)
    R = np.array([[np.cos(a), -np.sin(a), 0.0], [np.sin(a), np.cos(a), 0.0], [0.0, 0.0, 1.0]])
    local = (pts - np.array([pos[0], pos[1], 0.0])) @ R       # table -> object frame (row points)
    return float(shape.fn(torch.tensor(local, dtype=torch.float32)).min()) if len(pts) else np.inf


def place_touching(shapes: list[Shape], yaws: np.ndarray, rng: np.random.Generator,
                   step: float = 0.003) -> list[tuple[float, float]]:
    """Positions (x, y) where every object touches at least one other, none overlapping.

    The overlap is tested on samples a ``step`` (m) grid puts just inside each shape (``_inside_samples``): a
    part thinner than about ``step`` may hold none and interpenetrate its neighbour (a 3 mm base disc on the
    3 mm grid: two peg posts' discs of r 4 cm placed 45-47 mm apart, sharing a third of their area).

    The largest object goes to the centre; each next one picks an already placed anchor and a direction,
    and slides towards the anchor (bisection on the distance between the two base centres) until the
    shapes' SDF clearance is about CONTACT_M: the surfaces touch.  A slide that would overlap a third
    object or leave the table disc is redrawn.
    """
    radii = [sh.footprint_radius() for sh in shapes]
    order = list(np.argsort(radii)[::-1])
    shells = [_inside_samples(sh, float(y), step) for sh, y in zip(shapes, yaws)]
    pos: dict[int, np.ndarray] = {int(order[0]): np.zeros(2)}
    for i in order[1:]:
        i = int(i)
        for _ in range(200):
            j = list(pos)[int(rng.integers(len(pos)))]
            a = rng.uniform(0, 2 * np.pi)
            u = np.array([np.cos(a), np.sin(a)])

            def gap(dist: float) -> float:
                c = pos[j] + dist * u
                pts = shells[i] + np.array([c[0], c[1], 0.0])
                return min(_clearance(shapes[k], float(yaws[k]), pos[k], pts) for k in pos)

            lo, hi = 0.0, radii[i] + radii[j] + 0.01
            if gap(hi) <= 0:
                continue
            for _ in range(14):
                mid = 0.5 * (lo + hi)
                lo, hi = (mid, hi) if gap(mid) <= CONTACT_M else (lo, mid)
            c = pos[j] + hi * u
            if np.linalg.norm(c) + radii[i] <= PLACE_RADIUS + 0.1 and gap(hi) > 0:
                pos[i] = c
                break
        else:
            raise RuntimeError("could not place the objects touching one another")
    return [tuple(pos[i]) for i in range(len(shapes))]


def _layout(pool: list[ItemClass], rng: np.random.Generator, used: dict[str, int], tumbled_fraction: float,
            resting: Callable[[Shape], RestingPoses] = shape_resting_poses) -> tuple[list[Posed], list[tuple[float, float]]]:
    """5-8 new instances with resting poses and placements.  ``used`` counts instances per class so far
    (updated here): each scene takes the least-used classes (random tie-break), which keeps them balanced.
    ``resting`` gives an instance's resting poses (see :func:`_pose`)."""
    target = int(rng.integers(5, 9))
    for attempt in range(60):
        n = max(5, target - attempt // 15)     # a crowded draw gives up one object every 15 attempts
        order = sorted(pool, key=lambda c: (used.get(c.name, 0), rng.random()))
        posed = [_pose(make_instance(order[i % len(order)], rng), rng, tumbled_fraction, resting) for i in range(n)]
        pos = _place(posed, rng)
        if pos is not None:
            for p in posed:
                used[p.inst.item.name] = used.get(p.inst.item.name, 0) + 1
            return posed, pos
    raise RuntimeError("could not place 5 objects without overlap; item sizes too large for the table disc")


def _capture_item(shared: None, item: tuple) -> tuple[list[dict], float, str, int, float]:
    """One capture (an executor item): its truth rows, render seconds, name, frames and wall seconds."""
    folder, split, names, n_frames, K, rng, used, tumbled_fraction, touching, stereo, poses = item
    t1 = time.monotonic()
    by_name = {c.name: c for c in load_item_classes()}
    rows, dt = _one_capture(Path(folder), split, [by_name[n] for n in names], n_frames, K, rng, used,
                            tumbled_fraction, touching, stereo, _RestingRecord(poses).replay)
    return rows, dt, Path(folder).name, n_frames, time.monotonic() - t1


def _one_capture(folder: Path, split: str, pool: list[ItemClass], n_frames: int, K: Intrinsics,
                 rng: np.random.Generator, used: dict[str, int], tumbled_fraction: float,
                 touching: bool = False, stereo: bool = False,
                 resting: Callable[[Shape], RestingPoses] = shape_resting_poses) -> tuple[list[dict], float]:
    posed, pos = _layout(pool, rng, used, tumbled_fraction, resting)
    yaws = rng.uniform(0.0, 360.0, len(posed))
    if touching and len(posed) > 1:
        pos = place_touching([p.shape for p in posed], yaws, rng)
    scene = Scene([SceneObject(p.shape, float(y), xy, p.inst.colour) for p, y, xy in zip(posed, yaws, pos)],
                  table_colour=tuple(np.clip(np.array([0.62, 0.55, 0.45]) + rng.normal(0, 0.05, 3), 0, 1)),
                  table_texture=float(rng.uniform(0.0, 0.06)))
    # The capture's world frame: a random rigid transform of the table frame.
    world_from_table = np.eye(4)
    world_from_table[:3, :3] = Rotation.random(random_state=rng).as_matrix()
    world_from_table[:3, 3] = rng.uniform(-1.5, 1.5, 3)
    az0 = rng.uniform(0.0, 360.0)
    out_frames, dt = [], 0.0
    for k in range(n_frames):
        az = np.deg2rad(az0 + 360.0 * k / n_frames + rng.uniform(-8.0, 8.0))
        el = np.deg2rad(rng.uniform(35.0, 60.0))
        dist = rng.uniform(0.55, 0.9)
        eye = dist * np.array([np.cos(el) * np.cos(az), np.cos(el) * np.sin(az), np.sin(el)])
        target = np.array([*rng.normal(0.0, 0.03, 2), 0.03])
        cam_to_table = look_at(eye, target, np.array([0.0, 0.0, 1.0]), roll_deg=rng.uniform(-3.0, 3.0))
        t1 = time.monotonic()
        frame = render(scene, K, cam_to_table)
        dt += time.monotonic() - t1
        depth, rgb = add_sensor_noise(frame, rng)
        if stereo:
            # a child generator: the parent's stream (poses of the next frames) is the gaussian run's
            depth = stereo_depth(frame, K.fx, rng.spawn(1)[0])
        out_frames.append({"id": f"{k:06d}", "cam_to_world": world_from_table @ cam_to_table, "rgb": rgb,
                           "depth_m": depth, "mask": frame.mask.astype(np.uint16)})
    write_capture(folder, intrinsics=K, depth_scale=DEPTH_SCALE, frames=out_frames)
    Rw, tw = world_from_table[:3, :3], world_from_table[:3, 3]
    up = Rw[:, 2]
    rows = []
    for mid, (p, yaw, xy) in enumerate(zip(posed, yaws, pos), start=1):
        inst = p.inst
        Rz = Rotation.from_euler("z", yaw, degrees=True).as_matrix()
        base = Rw @ np.array([xy[0], xy[1], 0.0]) + tw
        # x_world = Rw (Rz (R x_model + s) + base_table) + tw
        R_full = Rw @ Rz @ p.R
        t_full = Rw @ (Rz @ p.s) + base
        q = Rotation.from_matrix(R_full).as_quat()              # [qx, qy, qz, qw], scalar last
        rows.append({"capture": folder.name, "mask_id": mid, "object": f"{folder.name}/{mid}", "class": inst.item.name,
                     "symmetry": inst.item.symmetry, "yaw_deg": float(direction_to_yaw(Rw @ Rz[:, 0], up)),
                     "scale": inst.scale, "size_m": inst.size, "x": base[0], "y": base[1], "z": base[2],
                     "up_x": up[0], "up_y": up[1], "up_z": up[2], "split": split,
                     "qx": q[0], "qy": q[1], "qz": q[2], "qw": q[3], "tx": t_full[0], "ty": t_full[1], "tz": t_full[2],
                     "face": "" if p.face is None else p.face, "tumbled": int(p.tumbled),
                     "turns": format_turns(instance_turns(inst))})
    return rows, dt


def _csv(header: list[str], rows: list[list]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for r in rows:
        w.writerow([f"{v:.6f}" if isinstance(v, (float, np.floating)) else v for v in r])
    return buf.getvalue()


def _write_truth(out: Path, rows: list[dict]) -> None:
    write_text(out / "truth.csv", _csv(["object", "label", "yaw_deg"], [[r["object"], r["class"], r["yaw_deg"]] for r in rows]))
    write_text(out / "truth_points.csv", _csv(["capture", "x", "y", "z", "label", "yaw_deg"],
                                               [[r["capture"], r["x"], r["y"], r["z"], r["class"], r["yaw_deg"]] for r in rows]))
    full = ["capture", "mask_id", "object", "class", "symmetry", "yaw_deg", "scale", "size_m", "x", "y", "z",
            "up_x", "up_y", "up_z", "split", "qx", "qy", "qz", "qw", "tx", "ty", "tz", "face", "tumbled", "turns"]
    write_text(out / "truth_full.csv", _csv(full, [[r[k] for k in full] for r in rows]))


def scenario_turns(out: str | Path) -> dict[str, tuple[str, str, float]]:
    """{object id: (class, its ``turns`` entry, size in metres)} of a rendered scenario folder, from its
    scenario.json: every capture's layout drawn again from the seed as :func:`_generate` draws it (instances, resting
    poses and placements; nothing rendered)."""
    out = Path(out)
    doc = json.loads((out / "scenario.json").read_text())
    by_name = {c.name: c for c in load_item_classes()}
    pools = {split: [by_name[n] for n in doc["classes"][split]] for split in ("mining", "single")}
    plan = [(name, "mining") for name in doc["mining"]] + [(name, "single") for name in doc["single"]]
    rng = np.random.default_rng(int(doc["seed"]))
    used: dict[str, dict[str, int]] = {"mining": {}, "single": {}}
    turns = {}
    for name, split in plan:
        posed, _ = _layout(pools[split], rng.spawn(1)[0], used[split], float(doc.get("tumbled_fraction", 0.0)))
        for mid, p in enumerate(posed, start=1):
            turns[f"{name}/{mid}"] = (p.inst.item.name, format_turns(instance_turns(p.inst)), p.inst.size)
    return turns


def add_truth_turns(out: str | Path) -> bool:
    """Give a scenario folder's truth_full.csv the ``turns`` column when it lacks it (:func:`scenario_turns`);
    True when it was written."""
    out = Path(out)
    path = out / "truth_full.csv"
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        header = list(reader.fieldnames or [])
        rows = list(reader)
    if "turns" in header:
        return False
    turns = scenario_turns(out)
    # the layouts drawn again must be the ones rendered: the same class and size for every object
    missing = [r["object"] for r in rows if r["object"] not in turns or turns[r["object"]][0] != r["class"]
               or abs(turns[r["object"]][2] - float(r["size_m"])) > 1e-5]
    if missing:
        raise InputError(path, "object", f"objects the scenario's layouts do not draw again: {missing[:3]}")
    for r in rows:
        r["turns"] = turns[r["object"]][1]
    write_text(path, _csv(header + ["turns"], [[r[k] for k in header + ["turns"]] for r in rows]))
    return True
