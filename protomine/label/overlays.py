"""Overlay pictures: each frame's RGB image with every labelled object's box, label, score and yaw arrow.

Conventions: pixel (u, v) as in :mod:`protomine.geometry` (u right, v down); boxes are the records'
``bbox`` [u0, v0, u1, v1) (inclusive-exclusive).  The yaw arrow goes from the object's base centre to a
point ``ARROW_RADII`` footprint radii along the prototype's canonical x axis, i.e. the object frame's x
axis turned by ``yaw_to_matrix(yaw_deg, up)``; both points are projected with the frame's camera.  A
continuously symmetric prototype has no yaw, so it gets a small ring at the base centre instead of an arrow.
Known objects are drawn in green, unknown ones in orange (label "unknown? <best guess>").
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

from ..atomic import atomic_path
from ..capture import Capture
from ..geometry import plane_basis, world_to_pixel, yaw_to_matrix

ARROW_RADII = 1.3
KNOWN = (40, 220, 60)
UNKNOWN = (255, 150, 20)


def label_text(rec: dict) -> str:
    """"name-or-cluster score" (with "unknown? " in front of an unknown object's best guess)."""
    what = rec["name"] or (f"cluster-{rec['cluster']}" if rec["cluster"] is not None else "none")
    return f"{'unknown? ' if rec['unknown'] else ''}{what} {rec['score']:.2f}"


def yaw_arrow_world(rec: dict) -> tuple[np.ndarray, np.ndarray]:
    """World points (3,), (3,): the base centre and the tip of the yaw arrow of a record."""
    base = np.asarray(rec["base_world"], np.float64)
    up = np.asarray(rec["up"], np.float64)
    x_axis = plane_basis(up)[0]
    direction = yaw_to_matrix(rec["yaw_deg"], up) @ x_axis
    return base, base + ARROW_RADII * rec["size_m"][0] * direction


def draw_frame(rgb: np.ndarray, records: list[dict], K: np.ndarray, cam_to_world: np.ndarray) -> Image.Image:
    """RGB (H, W, 3) uint8 with the records of this frame drawn on it."""
    im = Image.fromarray(rgb).convert("RGB")
    d = ImageDraw.Draw(im)
    for rec in records:
        col = UNKNOWN if rec["unknown"] else KNOWN
        u0, v0, u1, v1 = rec["bbox"]
        d.rectangle([u0, v0, u1 - 1, v1 - 1], outline=col, width=1)
        text = label_text(rec)
        tw = d.textlength(text)
        ty = v0 - 11 if v0 >= 11 else v1 + 1
        d.rectangle([u0, ty, u0 + tw + 2, ty + 10], fill=(0, 0, 0))
        d.text((u0 + 1, ty), text, fill=col)
        base, tip = yaw_arrow_world(rec)
        uv, z = world_to_pixel(np.stack([base, tip]), cam_to_world, K)
        if np.any(z <= 0):
            continue
        (bu, bv), (tu, tv) = uv
        if rec["symmetry"] == "continuous":
            d.ellipse([bu - 3, bv - 3, bu + 3, bv + 3], outline=col, width=2)
            continue
        d.line([bu, bv, tu, tv], fill=col, width=2)
        # arrow head: two short strokes at +-25 degrees back from the tip
        ang = np.arctan2(tv - bv, tu - bu)
        for s in (-1, 1):
            a = ang + np.pi + s * np.deg2rad(25)
            d.line([tu, tv, tu + 6 * np.cos(a), tv + 6 * np.sin(a)], fill=col, width=2)
    return im


def write_overlays(out_dir: str | Path, captures: list[Capture], records: list[dict], prov: dict | None = None,
                   progress=None) -> list[Path]:
    """One PNG per frame: ``<out_dir>/<capture>_<frame>.png`` (atomic writes), listed in the folder's
    provenance manifest when ``prov`` is given."""
    from ..progress import bar
    from ..provenance import record_outputs
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    by_frame: dict[tuple[str, str], list[dict]] = {}
    for r in records:
        by_frame.setdefault((r["capture"], r["frame"]), []).append(r)
    paths = []
    with bar(progress, "overlays", total=sum(len(c.frames) for c in captures), unit="frames") as b:
        for capture in captures:
            K = capture.intrinsics.K
            for fr in capture.frames:
                im = draw_frame(capture.rgb(fr.id), by_frame.get((capture.name, fr.id), []), K, fr.cam_to_world)
                path = out_dir / f"{capture.name}_{fr.id}.png"
                with atomic_path(path) as tmp:
                    im.save(tmp, format="PNG")
                paths.append(path)
                b.advance()
    if prov is not None and paths:
        record_outputs(paths, prov)
    return paths
