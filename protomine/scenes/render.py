"""Vectorised sphere-tracing renderer for the demo scenario (depth, RGB, instance mask).

Conventions:

- The scene lives in the *table frame*: metres, z up, table top at z = 0, table centred on the origin.
  Objects are placed by ``yaw_deg`` (right-handed about table z, rotating the shape's canonical x)
  and a base-centre ``position`` (2,) on the table top.
- Camera: pinhole, x right, y down, z forward (protomine.geometry).  ``cam_to_scene`` (4, 4) maps
  camera coordinates to the table frame; callers add their own world frame on top.
- Outputs (H, W): ``depth`` is metric z along the optical axis (0 = no hit), ``mask`` the 1-based
  index of the object hit (0 = table or background), ``rgb`` (H, W, 3) float in [0, 1] with Lambertian
  shading plus ambient, ``normal`` (H, W, 3) unit surface normals in the camera frame and
  ``cos_incidence`` (H, W) = |cos| of the angle between view ray and normal (0 = no hit).

Per object, a bounding sphere stands in for the exact SDF until a ray comes within ``cull_margin`` of it,
so each step evaluates only the objects near the ray (the sphere distance is a lower bound of the object's
distance, hence a safe sphere-tracing step).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import torch

from ..capture import Intrinsics
from .shapes import Shape, box

Tensor = torch.Tensor


@dataclass
class SceneObject:
    """One object: ``shape`` in its own frame, placed by yaw about table z and base centre (2,) on the table."""

    shape: Shape
    yaw_deg: float
    position: tuple[float, float]
    colour: tuple[float, float, float]


@dataclass
class Scene:
    objects: list[SceneObject]
    table_half_extent: float = 0.9
    table_thickness: float = 0.03
    table_colour: tuple[float, float, float] = (0.62, 0.55, 0.45)
    table_texture: float = 0.06          # amplitude of the gentle wood-grain stripes (0 = plain)
    light_dir: tuple[float, float, float] = (0.35, -0.25, 1.0)
    ambient: float = 0.35


@dataclass
class Render:
    depth: np.ndarray          # (H, W) float32 metres
    rgb: np.ndarray            # (H, W, 3) float32 in [0, 1]
    mask: np.ndarray           # (H, W) int32
    normal: np.ndarray         # (H, W, 3) float32, camera frame
    cos_incidence: np.ndarray  # (H, W) float32
    steps: int = 0
    extra: dict = field(default_factory=dict)


class _Placed:
    """An object's SDF evaluated on table-frame points, with its bounding sphere in the table frame."""

    def __init__(self, obj: SceneObject):
        a = np.deg2rad(obj.yaw_deg)
        R = np.array([[np.cos(a), -np.sin(a), 0.0], [np.sin(a), np.cos(a), 0.0], [0.0, 0.0, 1.0]])
        self.R = torch.tensor(R, dtype=torch.float32)
        self.t = torch.tensor([obj.position[0], obj.position[1], 0.0], dtype=torch.float32)
        c, r = obj.shape.bounding_sphere()
        self.centre = torch.tensor(R @ c, dtype=torch.float32) + self.t
        self.radius = r
        self.shape = obj.shape

    def sdf(self, p: Tensor) -> Tensor:
        # table -> object frame for row points: (p - t) R
        return self.shape.fn((p - self.t) @ self.R)

    def bound(self, p: Tensor) -> Tensor:
        q = p - self.centre
        return (q * q).sum(dim=1).sqrt() - self.radius

    def culled_sdf(self, p: Tensor, margin: float) -> Tensor:
        """Exact SDF within ``margin`` of the bounding sphere, the sphere distance (a lower bound) elsewhere."""
        db = self.bound(p)
        near = torch.nonzero(db < margin).squeeze(1)
        if near.numel():
            db = db.index_put((near,), self.sdf(p[near]))
        return db


def render(scene: Scene, intrinsics: Intrinsics, cam_to_scene: np.ndarray, *, max_steps: int = 64,
           eps: float = 1e-4, t_max: float = 6.0, cull_margin: float = 0.02,
           grazing_tol: float = 2e-3) -> Render:
    """Sphere-trace every pixel of a pinhole camera.

    intrinsics: width, height, fx, fy, cx, cy.  cam_to_scene: (4, 4) rigid transform.
    eps: a ray hits when the scene distance falls below this (metres).
    """
    T = np.asarray(cam_to_scene, dtype=np.float64)
    if T.shape != (4, 4):
        raise ValueError(f"cam_to_scene must have shape (4, 4), got {T.shape}")
    if not scene.objects and scene.table_half_extent <= 0:
        raise ValueError("scene is empty")
    # One intra-op thread: each step is a few dozen small tensor ops, where thread hand-off costs
    # more than it saves (measured 0.8 s vs 6-25 s per frame on a loaded 2-core machine).
    n_threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        return _render(scene, intrinsics, T, max_steps, eps, t_max, cull_margin, grazing_tol)
    finally:
        torch.set_num_threads(n_threads)


def _render(scene: Scene, K: Intrinsics, T: np.ndarray, max_steps: int, eps: float, t_max: float,
            cull_margin: float, grazing_tol: float) -> Render:
    H, W = K.height, K.width
    v, u = torch.meshgrid(torch.arange(H, dtype=torch.float32), torch.arange(W, dtype=torch.float32), indexing="ij")
    d_cam = torch.stack([(u - K.cx) / K.fx, (v - K.cy) / K.fy, torch.ones_like(u)], dim=-1).reshape(-1, 3)
    d_cam = d_cam / torch.linalg.vector_norm(d_cam, dim=1, keepdim=True)          # (P, 3) unit rays
    R = torch.tensor(T[:3, :3], dtype=torch.float32)
    origin = torch.tensor(T[:3, 3], dtype=torch.float32)
    d = d_cam @ R.T                                                             # (P, 3) table frame

    half, thick = scene.table_half_extent, scene.table_thickness
    table = box((half, half, thick / 2), (0.0, 0.0, -thick / 2))
    placed = [_Placed(o) for o in scene.objects]

    def objects_sdf(p: Tensor) -> Tensor:
        dist = torch.full((p.shape[0],), float("inf"))
        for ob in placed:
            dist = torch.minimum(dist, ob.culled_sdf(p, cull_margin))
        return dist

    # The table slab is a plane for every ray that reaches it, so its hit is closed-form: marching
    # towards a plane at a grazing angle would shrink the step only geometrically.  The objects are
    # sphere-traced up to that distance; rays start where they enter the slab of object heights.
    P = d.shape[0]
    dz = d[:, 2]
    down = dz < -1e-9
    t_table = torch.where(down, -origin[2] / torch.where(down, dz, -1.0), torch.full((P,), float("inf")))
    q = origin[:2] + t_table.clamp(max=1e3)[:, None] * d[:, :2]
    on_table = down & (q.abs().max(dim=1).values <= half) & (t_table > 0)
    t_table = torch.where(on_table, t_table, torch.full((P,), t_max))
    # Rays start where they first enter an object's (margin-grown) bounding sphere; rays that enter
    # none go straight to the table.
    t = torch.full((P,), float("inf"))
    for ob in placed:
        oc = origin - ob.centre
        b = d @ oc
        disc = b * b - (float(oc @ oc) - (ob.radius + cull_margin) ** 2)
        root = torch.sqrt(disc.clamp(min=0.0))
        enters = (disc > 0) & (-b + root > 0)
        t = torch.where(enters, torch.minimum(t, (-b - root).clamp(min=0.02)), t)
    hit = torch.zeros(P, dtype=torch.bool)
    active = torch.nonzero(t < t_table).squeeze(1)
    t = torch.where(t < t_table, t, t_table)
    steps = 0
    last_dist = torch.zeros(0)
    for steps in range(1, max_steps + 1):
        if active.numel() == 0 or not placed:
            break
        p = origin + t[active, None] * d[active]
        dist = objects_sdf(p)
        done = dist < eps
        hit[active[done]] = True
        t[active] += torch.where(done, torch.zeros_like(dist), dist)
        keep = ~done & (t[active] < t_table[active])
        active = active[keep]
        last_dist = dist[keep]
    # Rays still marching after max_steps are creeping along a silhouette: count them as hits when
    # they are within ``grazing_tol`` of a surface, otherwise let them fall through to the table.
    if active.numel():
        hit[active[last_dist < grazing_tol]] = True
    # Rays that reached the table plane (or never met an object) end on the table top.
    table_hit = ~hit & on_table
    t = torch.where(table_hit, t_table, t)
    hit |= table_hit

    idx = torch.nonzero(hit).squeeze(1)
    p = origin + t[idx, None] * d[idx]
    # Which surface was hit: the component with the smallest distance at the hit point.
    comps = [table.fn(p)] + [ob.culled_sdf(p, cull_margin) for ob in placed]
    which = torch.stack(comps, dim=1).argmin(dim=1)
    normal = torch.zeros_like(p)
    fns = [table.fn] + [ob.sdf for ob in placed]
    for k, fn in enumerate(fns):
        sel = which == k
        if sel.any():
            normal[sel] = _gradient(fn, p[sel])
    colour = torch.zeros_like(p)
    tsel = which == 0
    if tsel.any():
        grain = 1.0 + scene.table_texture * torch.sin(p[tsel, 0] * 60.0 + 2.0 * torch.sin(p[tsel, 1] * 7.0))
        colour[tsel] = torch.tensor(scene.table_colour, dtype=torch.float32) * grain[:, None]
    for k, ob in enumerate(scene.objects, start=1):
        sel = which == k
        if sel.any():
            colour[sel] = torch.tensor(ob.colour, dtype=torch.float32)
    light = torch.tensor(scene.light_dir, dtype=torch.float32)
    light = light / torch.linalg.vector_norm(light)
    lambert = (normal @ light).clamp(min=0.0)
    shade = scene.ambient + (1.0 - scene.ambient) * lambert
    rgb_hit = (colour * shade[:, None]).clamp(0.0, 1.0)

    depth = torch.zeros(P)
    depth[idx] = t[idx] * d_cam[idx, 2]
    rgb = torch.zeros(P, 3)
    rgb[idx] = rgb_hit
    mask = torch.zeros(P, dtype=torch.int32)
    mask[idx] = which.to(torch.int32)
    n_cam = torch.zeros(P, 3)
    n_cam[idx] = normal @ R          # table -> camera for row vectors: n R
    cosi = torch.zeros(P)
    cosi[idx] = (n_cam[idx] * d_cam[idx]).sum(1).abs()
    return Render(depth.reshape(H, W).numpy(), rgb.reshape(H, W, 3).numpy(), mask.reshape(H, W).numpy(),
                  n_cam.reshape(H, W, 3).numpy(), cosi.reshape(H, W).numpy(), steps)


def _gradient(fn, p: Tensor, h: float = 2e-4) -> Tensor:
    """Unit SDF gradient (N, 3) by the four-point tetrahedral difference."""
    ks = torch.tensor([[1, -1, -1], [-1, -1, 1], [-1, 1, -1], [1, 1, 1]], dtype=torch.float32)
    g = sum(k * fn(p + h * k)[:, None] for k in ks)
    return g / (torch.linalg.vector_norm(g, dim=1, keepdim=True) + 1e-12)


def look_at(eye: np.ndarray, target: np.ndarray, up: np.ndarray, roll_deg: float = 0.0) -> np.ndarray:
    """cam_to_scene (4, 4) for a camera at ``eye`` (3,) looking at ``target`` (3,), image 'up' towards ``up``.

    Camera z = forward, x = forward x up (right), y = z x x (down); then rolled about z by roll_deg.
    """
    f = np.asarray(target, float) - eye
    f = f / np.linalg.norm(f)
    x = np.cross(f, up)
    x = x / np.linalg.norm(x)
    y = np.cross(f, x)
    a = np.deg2rad(roll_deg)
    x, y = np.cos(a) * x + np.sin(a) * y, -np.sin(a) * x + np.cos(a) * y
    T = np.eye(4)
    T[:3, 0], T[:3, 1], T[:3, 2], T[:3, 3] = x, y, f, eye
    return T
