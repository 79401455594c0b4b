"""Item classes of the demo scenario: data in items.toml, one small SDF builder per class here.

Conventions: every builder gets the instance's characteristic ``size`` (metres, meaning documented in
items.toml), its drawn proportions ``p`` (name -> float) and the generator ``rng``, and returns a
:class:`protomine.scenes.shapes.Shape` in the object frame: z up, canonical x axis = the direction
that yaw rotates (asymmetric classes put a distinctive part along +x).  :func:`make_instance`
puts its base on z = 0 and, for asymmetric classes, centres its footprint box on the z axis; builders of
symmetric classes must put the symmetry axis on z.

To add a class: add an ``[[item]]`` table to items.toml and a function decorated with
``@builder("<name>")`` below.

Turn symmetries: ``symmetry`` in items.toml is about the object's up axis only.  A class whose shape (and colour:
one colour per instance) is also unchanged by a turn that moves up registers it with ``@turns("<name>")``: a function
of the instance's size and proportions returning [(order, axis (3,))] in the object frame, the axis through the
solid's centroid (the truth file's ``turns`` column; the pose metrics take poses modulo them).  A spool is the same
turned end for end; a mallet turned half about its handle.
"""
from __future__ import annotations

import colorsys
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from protomine.errors import InputError
from protomine.scenes import shapes as S
from protomine.scenes.shapes import Shape

ITEMS_TOML = Path(__file__).with_name("items.toml")

Builder = Callable[[float, dict, np.random.Generator], Shape]
BUILDERS: dict[str, Builder] = {}
Turns = Callable[[float, dict], list[tuple[int, tuple[float, float, float]]]]
TURNS: dict[str, Turns] = {}


def builder(name: str) -> Callable[[Builder], Builder]:
    """Register a builder function under an item-class name."""
    def deco(fn: Builder) -> Builder:
        BUILDERS[name] = fn
        return fn
    return deco


def turns(name: str) -> Callable[[Turns], Turns]:
    """Register the turn symmetries (module docstring) of an item class."""
    def deco(fn: Turns) -> Turns:
        TURNS[name] = fn
        return fn
    return deco


def instance_turns(inst: "Instance") -> list[tuple[int, tuple[float, float, float]]]:
    """The instance's turn symmetries that move up: [(order, unit axis (3,))] in its object frame ([] for most)."""
    fn = TURNS.get(inst.item.name)
    if fn is None:
        return []
    out = []
    for order, axis in fn(inst.size, inst.params):
        a = np.asarray(axis, np.float64)
        out.append((int(order), tuple(float(v) for v in a / np.linalg.norm(a))))
    return out


def format_turns(items: list[tuple[int, tuple[float, float, float]]]) -> str:
    """Turn symmetries as the truth file writes them: "order:ax,ay,az" joined by ";" ("" for none)."""
    return ";".join(f"{o}:{a[0]:.6f},{a[1]:.6f},{a[2]:.6f}" for o, a in items)


@dataclass(frozen=True)
class ItemClass:
    name: str
    symmetry: str                      # "continuous", "n-fold:N" or "none"
    size: tuple[float, float]
    palette: tuple[tuple[float, float, float], ...]
    params: dict[str, tuple[float, float]]
    held_out: bool = False
    random_colour_fraction: float = 0.2
    family: str = "tools"              # the scenario draws its default classes from one family

    @property
    def period_deg(self) -> float:
        """Yaw symmetry period: 0 for continuous, 360/N for n-fold, 360 for none."""
        if self.symmetry == "continuous":
            return 0.0
        if self.symmetry == "none":
            return 360.0
        return 360.0 / int(self.symmetry.split(":")[1])


@dataclass(frozen=True)
class Instance:
    item: ItemClass
    shape: Shape                       # object frame, base on z = 0
    colour: tuple[float, float, float]
    size: float                        # metres
    scale: float                       # size / geometric mean of the class size range
    params: dict[str, float]


def _hex(path: Path, fld: str, s: object) -> tuple[float, float, float]:
    if not isinstance(s, str) or len(s) != 7 or s[0] != "#":
        raise InputError(path, fld, f"expected a colour '#rrggbb', got {s!r}")
    try:
        return tuple(int(s[i:i + 2], 16) / 255.0 for i in (1, 3, 5))
    except ValueError:
        raise InputError(path, fld, f"expected a colour '#rrggbb', got {s!r}") from None


def _range(path: Path, fld: str, v: object) -> tuple[float, float]:
    if (not isinstance(v, list) or len(v) != 2 or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
            or not 0 < v[0] <= v[1]):
        raise InputError(path, fld, f"expected [min, max] with 0 < min <= max, got {v!r}")
    return float(v[0]), float(v[1])


def load_item_classes(path: str | Path | None = None) -> list[ItemClass]:
    """Read and validate items.toml (default: the built-in scenario)."""
    path = Path(path) if path is not None else ITEMS_TOML
    try:
        doc = tomllib.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(path, None, "item-class file not found") from None
    except tomllib.TOMLDecodeError as e:
        raise InputError(path, None, f"not valid TOML ({e})") from None
    frac = doc.get("random_colour_fraction", 0.2)
    if not isinstance(frac, (int, float)) or not 0 <= frac <= 1:
        raise InputError(path, "random_colour_fraction", f"expected a number in [0, 1], got {frac!r}")
    out, seen = [], set()
    for i, it in enumerate(doc.get("item", [])):
        w = f"item[{i}]"
        name = it.get("name")
        if name not in BUILDERS:
            raise InputError(path, f"{w}.name", f"no builder registered for {name!r} (known: {', '.join(sorted(BUILDERS))})")
        if name in seen:
            raise InputError(path, f"{w}.name", f"duplicate item class {name!r}")
        seen.add(name)
        sym = it.get("symmetry")
        ok = sym in ("continuous", "none") or (isinstance(sym, str) and sym.startswith("n-fold:")
                                                and sym[7:].isdigit() and int(sym[7:]) >= 2)
        if not ok:
            raise InputError(path, f"{w}.symmetry", f"expected 'continuous', 'none' or 'n-fold:N' (N >= 2), got {sym!r}")
        palette = it.get("palette")
        if not isinstance(palette, list) or not palette:
            raise InputError(path, f"{w}.palette", f"expected a non-empty list of colours, got {palette!r}")
        params = {k: _range(path, f"{w}.params.{k}", v) for k, v in it.get("params", {}).items()}
        held = it.get("held_out", False)
        if not isinstance(held, bool):
            raise InputError(path, f"{w}.held_out", f"expected true or false, got {held!r}")
        family = it.get("family", "tools")
        if not isinstance(family, str) or not family:
            raise InputError(path, f"{w}.family", f"expected a non-empty string, got {family!r}")
        out.append(ItemClass(name, sym, _range(path, f"{w}.size", it.get("size")),
                             tuple(_hex(path, f"{w}.palette[{j}]", c) for j, c in enumerate(palette)),
                             params, held, float(frac), family))
    if not out:
        raise InputError(path, "item", "no item classes defined")
    return out


def make_instance(item: ItemClass, rng: np.random.Generator) -> Instance:
    """Draw one instance: size, proportions and colour, then build and re-centre its SDF."""
    lo, hi = item.size
    size = float(rng.uniform(lo, hi))
    params = {k: float(rng.uniform(a, b)) for k, (a, b) in item.params.items()}
    if rng.random() < item.random_colour_fraction:
        colour = tuple(float(c) for c in colorsys.hsv_to_rgb(rng.random(), rng.uniform(0.2, 0.9), rng.uniform(0.3, 0.95)))
    else:
        base = item.palette[int(rng.integers(len(item.palette)))]
        colour = tuple(float(np.clip(c + rng.normal(0.0, 0.04), 0.0, 1.0)) for c in base)
    shape = S.on_base(BUILDERS[item.name](size, params, rng), centre_xy=item.symmetry == "none")
    return Instance(item, shape, colour, size, size / math.sqrt(lo * hi), params)


# --- builders: one per class ----------------------------------------------------------------------

@builder("spool")
def _spool(size: float, p: dict, rng: np.random.Generator) -> Shape:
    rf = size * p["flange_radius"]
    ft = size * p["flange_thickness"]
    return S.union(S.cylinder(rf * p["core_ratio"], size), S.cylinder(rf, ft), S.cylinder(rf, ft, size - ft))


@turns("spool")
def _spool_turns(size: float, p: dict) -> list:
    # two equal flanges at z = 0 and z = size - ft on one core: end for end it is the same (with the turns about z, a
    # half turn about any horizontal axis through mid-height)
    return [(2, (1.0, 0.0, 0.0))]


@builder("funnel")
def _funnel(size: float, p: dict, rng: np.random.Generator) -> Shape:
    rm, hc = size * p["mouth_radius"], size * p["cone_height"]
    rs = rm * p["spout_ratio"]
    wall = max(0.002, 0.03 * rm)
    cone = S.subtract(S.frustum(rm, rs, hc), S.frustum(rm - wall, rs - wall, hc, -0.001))
    spout = S.subtract(S.cylinder(rs, size - hc + 0.002, hc - 0.002), S.cylinder(rs - wall, size, hc - 0.01))
    return S.union(cone, spout)


@builder("tile_box")
def _tile_box(size: float, p: dict, rng: np.random.Generator) -> Shape:
    h = size * p["height"]
    hl = h * p["lid_height"]
    r = size * p["corner_radius"]
    body = S.rounded_box((size / 2 - 0.003, size / 2 - 0.003, (h - hl) / 2), r, (0, 0, (h - hl) / 2))
    lid = S.rounded_box((size / 2, size / 2, hl / 2), r, (0, 0, h - hl / 2))
    return S.union(body, lid)


@builder("tripod_stand")
def _tripod_stand(size: float, p: dict, rng: np.random.Generator) -> Shape:
    rl = size * p["leg_radius"]
    joint = size * p["leg_joint"]
    spread = size * p["leg_spread"]
    parts = [S.cylinder(rl * 1.2, size), S.cylinder(size * p["plate_radius"], 0.15 * size * p["plate_radius"] + 0.004,
                                                    size - 0.15 * size * p["plate_radius"] - 0.004)]
    for k in range(3):          # one leg along +x, the others at 120 and 240 degrees
        a = 2 * math.pi * k / 3
        parts.append(S.capsule((0.0, 0.0, joint), (spread * math.cos(a), spread * math.sin(a), rl), rl))
    return S.union(*parts)


@builder("mallet")
def _mallet(size: float, p: dict, rng: np.random.Generator) -> Shape:
    rh, lh = size * p["head_radius"], size * p["head_length"]
    rr = size * p["handle_radius"]
    # head: a cylinder whose axis is y, centred at x = size/2 - rh, resting on the table
    head = S.translate(S.rotate(S.cylinder(rh, lh, -lh / 2), S.axis_rotation("x", 90.0)), (size / 2 - rh, 0.0, rh))
    handle = S.capsule((-size / 2 + rr, 0.0, rr), (size / 2 - rh, 0.0, rh), rr)
    return S.union(head, handle)


@turns("mallet")
def _mallet_turns(size: float, p: dict) -> list:
    # the handle's axis runs through the head's centre, square to the head's axis (y): a half turn about it maps the
    # capsule and the centred head cylinder onto themselves
    rh, rr = size * p["head_radius"], size * p["handle_radius"]
    return [(2, (size - rh - rr, 0.0, rh - rr))]


@builder("jug")
def _jug(size: float, p: dict, rng: np.random.Generator) -> Shape:
    rb = size * p["body_radius"]
    rt = rb * p["taper"]
    hs = size * p["handle_size"]
    body = S.subtract(S.frustum(rb, rt, size), S.cylinder(rt - 0.004, size * 0.3, size * 0.75))
    ring = S.rotate(S.torus(hs, 0.022 * size), S.axis_rotation("x", 90.0))      # ring in the xz plane
    handle = S.translate(ring, ((rb + rt) / 2, 0.0, 0.58 * size))
    spout = S.capsule((-rt * 0.7, 0.0, size * 0.93), (-rt - 0.06 * size, 0.0, size * 1.02), 0.05 * size)
    return S.union(body, handle, spout)


@builder("l_bracket")
def _l_bracket(size: float, p: dict, rng: np.random.Generator) -> Shape:
    w, t = size * p["width"], size * p["thickness"]
    up = size * p["upright"]
    flat = S.box((size / 2, w / 2, t / 2), (size / 2, 0.0, t / 2))
    upright = S.box((t / 2, w / 2, up / 2), (t / 2, 0.0, up / 2))
    gusset = S.intersect(S.box((size * 0.2, t / 2, size * 0.2), (size * 0.2, 0.0, size * 0.2)),
                         S.halfspace((1.0, 0.0, 1.0), (size * 0.35, 0.0, 0.0)))
    hole = S.cylinder(w * 0.15, t * 3, -t)
    return S.union(S.subtract(flat, S.translate(hole, (size * 0.7, 0.0, 0.0))), upright, gusset)


@builder("hand_plane")
def _hand_plane(size: float, p: dict, rng: np.random.Generator) -> Shape:
    w, hb = size * p["width"], size * p["body_height"]
    rk = size * p["knob_radius"]
    body = S.rounded_box((size / 2, w / 2, hb / 2), min(0.2 * hb, 0.01), (0.0, 0.0, hb / 2))
    # a pointed toe at +x, a small knob in front and a tall closed tote behind make front and back differ
    toe = S.intersect(body, S.halfspace((1.0, 0.7, 0.0), (size / 2, 0.0, 0.0)), S.halfspace((1.0, -0.7, 0.0), (size / 2, 0.0, 0.0)))
    knob = S.sphere(rk, (size * 0.28, 0.0, hb + rk * 0.7))
    tote = S.translate(S.rotate(S.torus(size * 0.14, size * 0.045), S.axis_rotation("x", 90.0)),
                       (-size * 0.24, 0.0, hb + size * 0.11))
    return S.union(toe, knob, S.intersect(tote, S.halfspace((0.0, 0.0, -1.0), (0.0, 0.0, hb * 0.9))))


@builder("trowel")
def _trowel(size: float, p: dict, rng: np.random.Generator) -> Shape:
    lb, wb = size * p["blade_length"], size * p["blade_width"]
    t = max(0.003, 0.012 * size)
    tip = (lb, 0.0, 0.0)
    blade = S.intersect(S.box((lb / 2, wb / 2, t / 2), (lb / 2, 0.0, t / 2)),
                        S.halfspace((0.5, 0.866, 0.0), tip), S.halfspace((0.5, -0.866, 0.0), tip))
    hh = size * p["handle_height"]
    rr = 0.045 * size
    tang = S.capsule((0.05 * size, 0.0, t), (-0.08 * size, 0.0, hh), 0.012 * size)
    grip = S.capsule((-0.08 * size, 0.0, hh), (-(size - lb), 0.0, hh), rr)
    return S.union(blade, tang, grip)


@builder("tape_dispenser")
def _tape_dispenser(size: float, p: dict, rng: np.random.Generator) -> Shape:
    w, hb = size * p["width"], size * p["base_height"]
    rr = size * p["roll_radius"]
    base = S.rounded_box((size / 2, w / 2, hb / 2), min(0.25 * hb, 0.012), (0.0, 0.0, hb / 2))
    roll = S.translate(S.rotate(S.cylinder(rr, w * 0.6, -w * 0.3), S.axis_rotation("x", 90.0)),
                       (-size / 2 + rr, 0.0, hb + rr * 0.55))
    hub = S.translate(S.rotate(S.cylinder(rr * 0.35, w * 0.9, -w * 0.45), S.axis_rotation("x", 90.0)),
                      (-size / 2 + rr, 0.0, hb + rr * 0.55))
    cutter = S.box((size * 0.08, w * 0.35, hb * 0.6), (size / 2 - size * 0.08, 0.0, hb * 1.2))
    return S.union(base, roll, hub, cutter)


# --- the "angles" family: classes that differ only in the relative angles of their parts ----------------

def _pegged_post(size: float, p: dict, azimuths_deg: tuple[float, float, float]) -> Shape:
    """A post on a thin base disc with three equal pegs at 30/55/80% of the height, pointing at the given
    azimuths (the lowest along +x).  Every height layer holds one peg, so the magnitudes of each layer's
    azimuthal spectrum (a yaw-invariant descriptor) are the same whichever way the pegs point."""
    rd, td = size * p["disc_radius"], size * 0.04
    rp = size * 0.06
    lp, rr = size * p["peg_length"], size * p["peg_radius"]
    parts = [S.cylinder(rd, td), S.cylinder(rp, size)]
    for h, a in zip((0.30, 0.55, 0.80), azimuths_deg):
        c, s = math.cos(math.radians(a)), math.sin(math.radians(a))
        parts.append(S.capsule((c * rp * 0.5, s * rp * 0.5, h * size), (c * (rp + lp), s * (rp + lp), h * size), rr))
    return S.union(*parts)


@builder("peg_helix_right")
def _peg_helix_right(size: float, p: dict, rng: np.random.Generator) -> Shape:
    return _pegged_post(size, p, (0.0, 120.0, 240.0))


@builder("peg_helix_left")
def _peg_helix_left(size: float, p: dict, rng: np.random.Generator) -> Shape:
    return _pegged_post(size, p, (0.0, -120.0, -240.0))          # the mirror image of peg_helix_right


@builder("peg_fan_right")
def _peg_fan_right(size: float, p: dict, rng: np.random.Generator) -> Shape:
    return _pegged_post(size, p, (0.0, 60.0, 180.0))


@builder("peg_fan_left")
def _peg_fan_left(size: float, p: dict, rng: np.random.Generator) -> Shape:
    return _pegged_post(size, p, (0.0, -60.0, -180.0))           # the mirror image of peg_fan_right
