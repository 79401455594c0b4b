"""Overlay pictures: each labelled frame drawn for a person checking labels and poses.

The frame is upscaled ``upscale_of(w, h)`` times (bilinear: 2x for frames up to ``UPSCALE_UP_TO`` pixels
on their long side, where 1x text and lines would be too coarse; larger frames stay 1x) and each
labelled object gets:

- its mask outline (from the record's ``segmentation``) in its cluster's colour (``drawing.cluster_colour``),
  over a light tint of the same colour; unknown objects get a dashed white outline and no tint;
- its yaw arrow: from the object's base centre along the prototype's canonical x axis turned by yaw_deg
  about up, ``ARROW_RADII`` footprint radii long, both ends projected with the frame's camera (a ring at
  the base centre for continuously symmetric prototypes, which have no yaw);
- its name hung from the base centre on a short leader line: the name (``?`` in front for unknown
  objects, then the best guess), and under it the score as a small bar (full = 1, a tick at 0.5, the score
  of a typical member); text has a thin dark halo.  Labels are placed greedily, nearest-to-camera base
  first, at the first free place among a few below and above the anchor, so no label hides another.

Conventions: pixel (u, v) as in :mod:`protomine.geometry` (u right, v down), scaled by the upscale factor.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw
from scipy import ndimage

from ..atomic import atomic_path
from ..capture import Capture
from ..drawing import HALO, cluster_colour, halo_text, text_size
from ..geometry import plane_basis, world_to_pixel, yaw_to_matrix

UPSCALE = 2
UPSCALE_UP_TO = 1024
ARROW_RADII = 1.3
TINT = 0.22            # alpha of the cluster colour over the object's pixels
DASH = 5               # dash length of an unknown object's outline (upscaled pixels)
BAR_W, BAR_H = 44, 5   # score bar (upscaled pixels)
LEADER = 10            # length of the leader line before the first candidate place (upscaled pixels)


def label_text(rec: dict) -> str:
    """The name (``cluster-<k>`` when unnamed); ``? <best guess>`` for an unknown object."""
    what = rec["name"] or (f"cluster-{rec['cluster']}" if rec["cluster"] is not None else "nothing")
    return f"? {what}" if rec["unknown"] else what


def yaw_arrow_world(rec: dict) -> tuple[np.ndarray, np.ndarray]:
    """World points (3,), (3,): the base centre and the tip of the yaw arrow of a record."""
    base = np.asarray(rec["base_world"], np.float64)
    up = np.asarray(rec["up"], np.float64)
    x_axis = plane_basis(up)[0]
    direction = yaw_to_matrix(rec["yaw_deg"], up) @ x_axis
    return base, base + ARROW_RADII * rec["size_m"][0] * direction


def rle_to_mask(rle: dict) -> np.ndarray:
    """(h, w) bool mask of an uncompressed COCO RLE (column-major runs, the first run counts 0s)."""
    h, w = rle["size"]
    counts = np.asarray(rle["counts"], np.int64)
    values = np.arange(len(counts)) % 2 == 1
    return np.repeat(values, counts).reshape(w, h).T


def _outline(mask: np.ndarray) -> np.ndarray:
    """Pixels of ``mask`` (H, W) on its border, 2 pixels wide."""
    return mask & ~ndimage.binary_erosion(mask, iterations=2, border_value=0)


def _dashes(edge: np.ndarray) -> np.ndarray:
    """Every other ``DASH``-long piece of an outline (a dashed line along any contour shape)."""
    v, u = np.indices(edge.shape)
    return edge & (((u + v) // DASH) % 2 == 0)


def upscale_of(width: int, height: int) -> int:
    """The factor a frame of this size is drawn at (``UPSCALE`` for small frames, else 1)."""
    return UPSCALE if max(width, height) <= UPSCALE_UP_TO else 1


def _project(points: np.ndarray, K: np.ndarray, cam_to_world: np.ndarray, up: int) -> np.ndarray | None:
    uv, z = world_to_pixel(points, cam_to_world, K)
    return None if np.any(z <= 0) else (uv + 0.5) * up - 0.5


def _arrow(d: ImageDraw.ImageDraw, a: np.ndarray, b: np.ndarray, col, width: int = 3) -> None:
    ang = np.arctan2(b[1] - a[1], b[0] - a[0])
    heads = [(b[0] + 11 * np.cos(ang + np.pi + s * np.deg2rad(28)), b[1] + 11 * np.sin(ang + np.pi + s * np.deg2rad(28)))
             for s in (-1, 1)]
    for w, c in ((width + 2, HALO), (width, col)):
        d.line([tuple(a), tuple(b)], fill=c, width=w)
        for h in heads:
            d.line([tuple(b), h], fill=c, width=w)


def _place(anchor: tuple[float, float], size: tuple[int, int], taken: list[tuple[float, float, float, float]],
           W: int, H: int, avoid_v: float) -> tuple[float, float]:
    """Top-left of a label box of ``size`` hung near ``anchor``: the first candidate (below the anchor,
    then further below, then above the object's top ``avoid_v``, then sideways) inside the picture that
    overlaps no box in ``taken``; the least overlapping one when none is free."""
    w, h = size
    ax, ay = anchor
    steps = [LEADER + k * (h + 4) for k in range(4)]
    cands = [(ax - w / 2, ay + s) for s in steps]
    cands += [(ax - w / 2, avoid_v - LEADER - h - k * (h + 4)) for k in range(3)]
    cands += [(ax + dx, ay + LEADER) for dx in (8, -w - 8)]

    def overlap(x, y):
        return sum(max(0.0, min(x + w, X1) - max(x, X0)) * max(0.0, min(y + h, Y1) - max(y, Y0))
                   for X0, Y0, X1, Y1 in taken)

    best, best_cost = None, np.inf
    for x, y in cands:
        x = float(np.clip(x, 2, max(2, W - w - 2)))
        if y < 2 or y + h > H - 2:
            continue
        cost = overlap(x, y)
        if cost == 0:
            return x, y
        if cost < best_cost:
            best, best_cost = (x, y), cost
    return best if best is not None else (float(np.clip(ax - w / 2, 2, max(2, W - w - 2))), float(np.clip(ay + LEADER, 2, max(2, H - h - 2))))


def layout_labels(anchors: list[tuple[float, float]], sizes: list[tuple[int, int]], tops: list[float],
                  W: int, H: int) -> list[tuple[float, float]]:
    """Top-left corners of label boxes of ``sizes`` hung from ``anchors`` in a W x H picture, placed so that
    none overlaps another where the picture has room (``tops``: each object's top edge, to place above it).

    Greedy: the anchor lowest in the picture (nearest the camera, usually) is placed first.
    """
    out: list[tuple[float, float] | None] = [None] * len(anchors)
    taken: list[tuple[float, float, float, float]] = []
    for i in sorted(range(len(anchors)), key=lambda i: -anchors[i][1]):
        w, h = sizes[i]
        x, y = _place(anchors[i], (w, h), taken, W, H, tops[i])
        taken.append((x - 2, y - 2, x + w + 2, y + h + 2))
        out[i] = (x, y)
    return out


def draw_frame(rgb: np.ndarray, records: list[dict], K: np.ndarray, cam_to_world: np.ndarray) -> Image.Image:
    """RGB (H, W, 3) uint8 -> (s H, s W) picture (s = ``upscale_of(W, H)``) with the records of this frame."""
    h0, w0 = rgb.shape[:2]
    up = upscale_of(w0, h0)
    W, H = w0 * up, h0 * up
    base = np.asarray(Image.fromarray(rgb).convert("RGB").resize((W, H), Image.BILINEAR), np.float64)
    # masks first (tint, outlines), so arrows and labels sit on top of every object's outline
    outlines = []
    for rec in records:
        col = np.array(cluster_colour(None if rec["unknown"] else rec["cluster"]), np.float64)
        seg = rec.get("segmentation")
        if not seg:
            continue
        m = np.kron(rle_to_mask(seg), np.ones((up, up), bool)).astype(bool)
        if not rec["unknown"]:
            base[m] = (1 - TINT) * base[m] + TINT * col
        edge = _outline(m)
        outlines.append((_dashes(edge) if rec["unknown"] else edge, col))
    for edge, col in outlines:
        halo = ndimage.binary_dilation(edge, iterations=1) & ~edge
        base[halo] = 0.5 * base[halo]
        base[edge] = col
    im = Image.fromarray(base.clip(0, 255).astype(np.uint8))
    d = ImageDraw.Draw(im)
    text_px = max(14, H // 30)
    # anchors: the projected base centre of each object (records without a pose anchor at the mask bottom)
    items = []
    for rec in records:
        col = cluster_colour(None if rec["unknown"] else rec["cluster"])
        ends = _project(np.stack(yaw_arrow_world(rec)), K, cam_to_world, up)
        u0, v0, u1, v1 = (np.asarray(rec["bbox"], np.float64) * up).tolist()
        anchor = (float(ends[0, 0]), float(ends[0, 1])) if ends is not None else ((u0 + u1) / 2, v1)
        items.append((rec, col, ends, anchor, v0))
    for rec, col, ends, anchor, _ in items:
        if ends is None or rec["cluster"] is None:
            continue
        if rec.get("symmetry") == "continuous":
            r = 7
            d.ellipse([anchor[0] - r, anchor[1] - r, anchor[0] + r, anchor[1] + r], outline=HALO, width=5)
            d.ellipse([anchor[0] - r, anchor[1] - r, anchor[0] + r, anchor[1] + r], outline=col, width=3)
        else:
            _arrow(d, ends[0], ends[1], col)
    texts = [label_text(rec) for rec, *_ in items]
    tsizes = [text_size(t, text_px) for t in texts]
    sizes = [(max(tw, BAR_W), th + 3 + BAR_H) for tw, th in tsizes]
    boxes = layout_labels([it[3] for it in items], sizes, [it[4] for it in items], W, H)
    for (rec, col, ends, anchor, _), text, (tw, th), (bw, bh), (x, y) in zip(items, texts, tsizes, sizes, boxes):
        # leader: from the anchor to the nearest point of the label's top or bottom edge
        lx = float(np.clip(anchor[0], x, x + bw))
        ly = y if y >= anchor[1] else y + bh
        d.line([anchor, (lx, ly)], fill=HALO, width=4)
        d.line([anchor, (lx, ly)], fill=col, width=2)
        d.ellipse([anchor[0] - 3, anchor[1] - 3, anchor[0] + 3, anchor[1] + 3], fill=col, outline=HALO)
        halo_text(d, (x + (bw - tw) / 2, y), text, col if not rec["unknown"] else (255, 255, 255), text_px)
        # score bar: dark trough, filled to the score, a tick at 0.5 (a typical member's score)
        bx, by = x + (bw - BAR_W) / 2, y + th + 3
        d.rectangle([bx - 1, by - 1, bx + BAR_W + 1, by + BAR_H + 1], fill=HALO)
        fill = int(round(BAR_W * float(np.clip(rec["score"], 0.0, 1.0))))
        if fill > 0:
            d.rectangle([bx, by, bx + fill - 1, by + BAR_H], fill=col)
        d.line([bx + BAR_W / 2, by - 1, bx + BAR_W / 2, by + BAR_H + 1], fill=(200, 200, 200), width=1)
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
