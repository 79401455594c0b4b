"""Signed distance functions (SDFs) in torch for the demo scenario's objects.

Conventions:

- A :class:`Shape` is evaluated on points ``p`` (N, 3) float32 in the object's own frame (metres,
  z up, base on z = 0, canonical x axis = the direction yaw rotates) and returns distances (N,):
  negative inside, positive outside.
- Every SDF here is a *lower bound* of the true Euclidean distance (Lipschitz constant <= 1), which is
  what sphere tracing needs; primitives are exact, subtraction/intersection/smooth union are bounds.
- Each shape carries an axis-aligned box ``lo``/``hi`` (3,) in its frame that contains the surface;
  the renderer turns it into a bounding sphere for culling.
- Rotations are (3, 3) matrices R taking shape coordinates to parent coordinates (p_parent = R p).

Primitive formulas are the standard closed forms for sphere, box, rounded box, capped cylinder,
capped cone, torus and capsule (Quilez, "distance functions", 2008-2023; from memory).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Callable

import numpy as np
import torch

Tensor = torch.Tensor
SDFFn = Callable[[Tensor], Tensor]


@dataclass(frozen=True)
class Shape:
    """An SDF ``fn`` (N, 3) -> (N,) with its bounding box ``lo``, ``hi`` (3,) in the same frame."""

    fn: SDFFn
    lo: tuple[float, float, float]
    hi: tuple[float, float, float]

    def __call__(self, p: Tensor) -> Tensor:
        return self.fn(p)

    def bounding_sphere(self) -> tuple[np.ndarray, float]:
        """Centre (3,) and radius of a sphere containing the bounding box."""
        lo, hi = np.asarray(self.lo), np.asarray(self.hi)
        return (lo + hi) / 2, float(np.linalg.norm(hi - lo) / 2)

    def footprint_radius(self) -> float:
        """Radius about the frame's z axis of a circle containing the shape's footprint."""
        xs = (self.lo[0], self.hi[0])
        ys = (self.lo[1], self.hi[1])
        return float(max(np.hypot(x, y) for x in xs for y in ys))


def _length2(x: Tensor, y: Tensor) -> Tensor:
    return torch.sqrt(x * x + y * y)


def _norm(q: Tensor) -> Tensor:
    """Row norms (N,) of (N, 3); cheaper per call than torch.linalg.vector_norm on small tensors."""
    return (q * q).sum(dim=1).sqrt()


# --- primitives ----------------------------------------------------------------------------------

def sphere(radius: float, centre: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> Shape:
    c = torch.tensor(centre, dtype=torch.float32)

    def fn(p: Tensor) -> Tensor:
        return _norm(p - c) - radius
    return Shape(fn, tuple(np.subtract(centre, radius)), tuple(np.add(centre, radius)))


def box(half: tuple[float, float, float], centre: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> Shape:
    """Axis-aligned box with half extents ``half`` (3,) about ``centre``."""
    return rounded_box(half, 0.0, centre)


def rounded_box(half: tuple[float, float, float], radius: float,
                centre: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> Shape:
    """Box with half extents ``half`` whose edges are rounded with ``radius`` (< min(half))."""
    c = torch.tensor(centre, dtype=torch.float32)
    inner = torch.tensor(half, dtype=torch.float32) - radius

    def fn(p: Tensor) -> Tensor:
        q = (p - c).abs() - inner
        outside = _norm(q.clamp(min=0.0))
        inside = q.max(dim=1).values.clamp(max=0.0)
        return outside + inside - radius
    return Shape(fn, tuple(np.subtract(centre, half)), tuple(np.add(centre, half)))


def cylinder(radius: float, height: float, z0: float = 0.0) -> Shape:
    """Capped cylinder about the z axis from z0 to z0 + height."""
    zc, hh = z0 + height / 2, height / 2

    def fn(p: Tensor) -> Tensor:
        dx = _length2(p[:, 0], p[:, 1]) - radius
        dz = (p[:, 2] - zc).abs() - hh
        return torch.maximum(dx, dz).clamp(max=0.0) + _length2(dx.clamp(min=0.0), dz.clamp(min=0.0))
    return Shape(fn, (-radius, -radius, z0), (radius, radius, z0 + height))


def frustum(r_bottom: float, r_top: float, height: float, z0: float = 0.0) -> Shape:
    """Capped cone about z from z0 (radius r_bottom) to z0 + height (radius r_top); r_top = 0 is a cone."""
    hh = height / 2
    zc = z0 + hh
    k2x, k2y = r_top - r_bottom, 2 * hh
    k2dot = k2x * k2x + k2y * k2y

    def fn(p: Tensor) -> Tensor:
        qx = _length2(p[:, 0], p[:, 1])
        qy = p[:, 2] - zc
        rr = torch.where(qy < 0, r_bottom, r_top)
        cax = qx - torch.minimum(qx, rr)
        cay = qy.abs() - hh
        t = (((r_top - qx) * k2x + (hh - qy) * k2y) / k2dot).clamp(0.0, 1.0)
        cbx = qx - r_top + k2x * t
        cby = qy - hh + k2y * t
        s = torch.where((cbx < 0) & (cay < 0), -1.0, 1.0)
        return s * torch.sqrt(torch.minimum(cax * cax + cay * cay, cbx * cbx + cby * cby))
    r = max(r_bottom, r_top)
    return Shape(fn, (-r, -r, z0), (r, r, z0 + height))


def torus(major: float, minor: float, centre: tuple[float, float, float] = (0.0, 0.0, 0.0)) -> Shape:
    """Torus in the plane z = centre_z with ring radius ``major`` and tube radius ``minor``."""
    c = torch.tensor(centre, dtype=torch.float32)

    def fn(p: Tensor) -> Tensor:
        q = p - c
        return _length2(_length2(q[:, 0], q[:, 1]) - major, q[:, 2]) - minor
    e = major + minor
    return Shape(fn, tuple(np.add(centre, (-e, -e, -minor))), tuple(np.add(centre, (e, e, minor))))


def capsule(a: tuple[float, float, float], b: tuple[float, float, float], radius: float) -> Shape:
    """Segment a-b (3,) swept by a ball of ``radius``."""
    ta = torch.tensor(a, dtype=torch.float32)
    ba = torch.tensor(b, dtype=torch.float32) - ta
    bb = float(ba @ ba)

    def fn(p: Tensor) -> Tensor:
        pa = p - ta
        h = ((pa @ ba) / bb).clamp(0.0, 1.0)
        return _norm(pa - h[:, None] * ba) - radius
    lo = np.minimum(a, b) - radius
    hi = np.maximum(a, b) + radius
    return Shape(fn, tuple(lo), tuple(hi))


def halfspace(normal: tuple[float, float, float], point: tuple[float, float, float]) -> Shape:
    """The half-space behind the plane through ``point`` with outward ``normal`` (unbounded; use in intersect)."""
    n = np.asarray(normal, dtype=np.float64)
    n = n / np.linalg.norm(n)
    tn = torch.tensor(n, dtype=torch.float32)
    off = float(n @ np.asarray(point, dtype=np.float64))
    inf = float("inf")
    return Shape(lambda p: p @ tn - off, (-inf, -inf, -inf), (inf, inf, inf))


# --- transforms ----------------------------------------------------------------------------------

def _box_corners(lo, hi) -> np.ndarray:
    return np.array(list(itertools.product(*zip(lo, hi))), dtype=np.float64)  # (8, 3)


def translate(shape: Shape, offset: tuple[float, float, float]) -> Shape:
    t = torch.tensor(offset, dtype=torch.float32)
    return Shape(lambda p: shape.fn(p - t), tuple(np.add(shape.lo, offset)), tuple(np.add(shape.hi, offset)))


def rotate(shape: Shape, R: np.ndarray) -> Shape:
    """Rotate a shape by R (3, 3) (shape coordinates -> parent coordinates)."""
    R = np.asarray(R, dtype=np.float64)
    # Row points: p_shape = R^T p_parent, i.e. p_parent @ R for row arrays.
    Rt = torch.tensor(R, dtype=torch.float32)
    corners = _box_corners(shape.lo, shape.hi) @ R.T
    return Shape(lambda p: shape.fn(p @ Rt), tuple(corners.min(0)), tuple(corners.max(0)))


def axis_rotation(axis: str, degrees: float) -> np.ndarray:
    """(3, 3) right-handed rotation about the named axis 'x', 'y' or 'z'."""
    a = np.deg2rad(degrees)
    c, s = np.cos(a), np.sin(a)
    i = "xyz".index(axis)
    j, k = (i + 1) % 3, (i + 2) % 3
    R = np.eye(3)
    R[j, j], R[j, k], R[k, j], R[k, k] = c, -s, s, c
    return R


# --- combinators ---------------------------------------------------------------------------------

def _fold(shapes: tuple[Shape, ...], op, lo: np.ndarray, hi: np.ndarray) -> Shape:
    """Combine SDFs pointwise with ``op`` (torch.minimum = union, torch.maximum = intersection)."""
    def fn(p: Tensor) -> Tensor:
        d = shapes[0].fn(p)
        for s in shapes[1:]:
            d = op(d, s.fn(p))
        return d
    return Shape(fn, tuple(lo), tuple(hi))


def union(*shapes: Shape) -> Shape:
    return _fold(shapes, torch.minimum, np.min([s.lo for s in shapes], axis=0), np.max([s.hi for s in shapes], axis=0))


def subtract(a: Shape, b: Shape) -> Shape:
    """a minus b."""
    return Shape(lambda p: torch.maximum(a.fn(p), -b.fn(p)), a.lo, a.hi)


def intersect(*shapes: Shape) -> Shape:
    return _fold(shapes, torch.maximum, np.max([s.lo for s in shapes], axis=0), np.min([s.hi for s in shapes], axis=0))


def smooth_union(a: Shape, b: Shape, k: float) -> Shape:
    """Polynomial smooth minimum with blend radius k (metres)."""
    def fn(p: Tensor) -> Tensor:
        da, db = a.fn(p), b.fn(p)
        h = (0.5 + 0.5 * (db - da) / k).clamp(0.0, 1.0)
        return db + (da - db) * h - k * h * (1.0 - h)
    # Inside needs min(da, db) < k / 4, so the added material stays within k / 4 of either part.
    lo = np.minimum(a.lo, b.lo) - k / 4
    hi = np.maximum(a.hi, b.hi) + k / 4
    return Shape(fn, tuple(lo), tuple(hi))


def on_base(shape: Shape, *, centre_xy: bool = True) -> Shape:
    """Translate so the bottom lies on z = 0 and (if centre_xy) the bounding box is centred on the z axis.

    Symmetric shapes keep their xy placement (centre_xy=False): their symmetry axis is the z axis,
    which the bounding-box centre need not be (three legs at 0/120/240 degrees).
    """
    lo, hi = np.asarray(shape.lo), np.asarray(shape.hi)
    if not centre_xy:
        return translate(shape, (0.0, 0.0, -lo[2]))
    return translate(shape, (-(lo[0] + hi[0]) / 2, -(lo[1] + hi[1]) / 2, -lo[2]))
