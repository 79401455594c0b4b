"""The labelling plan: which objects to label next, and a sheet to fill in.

Allocation across clusters (Neyman allocation, Cochran 1977, Sampling Techniques, 3rd ed., sec. 5.5): the
overall purity is a stratified estimate with cluster weights W_h = N_h / N, whose variance is
sum_h W_h^2 S_h^2 / n_h.  Labels go one at a time to the cluster whose variance term drops most,
W_h^2 S_h^2 (1/n_h - 1/(n_h + 1)), which from zero labels reproduces Cochran's n_h = n W_h S_h / sum W S
up to rounding, and with labels already in hand spends only the new ones.  S_h = sqrt(p (1 - p)) with
p = (k + 1) / (n + 2) from the cluster's current labels (k of n agree; never 0, so a clean cluster with
3 labels still gets some), 0.5 for a cluster without labels.  A cluster without labels is served first
(its purity is unknown, not merely uncertain), and no cluster gets more labels than it has unlabelled members.

Within a cluster: a share ``random_share`` of its new labels (rounded up) is a simple random sample of its
unlabelled members, the rest are the members the library is least sure of, by
    u = (1 - score) / 2 + min(1, d / d_2) / 2
(far from the prototype: a low calibrated score; close to a second cluster: distance to the prototype
near the distance to the second-best one).  Members chosen for being unsure disagree with their cluster
more often than a random member, so they can only pull the purity estimate down (pessimistic, never
optimistic); the random share keeps the estimate close to the unbiased one and still finds what only
random sampling finds.  The sheet says which way each row was chosen (``pick``).

Sheet (``labelling_sheet.csv``): object, capture, frame, bbox ("u0 v0 u1 v1", pixels, inclusive-exclusive,
in that frame), cluster, cluster_name, pick, label (empty: to fill in).  The filled-in file is read by
``protomine audit LIBRARY TRUTH.csv`` as it is (extra columns are ignored).  Picture sheet (``labelling_sheet.png``): each
chosen object's crop with its id, grouped by cluster.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..atomic import write_bytes, write_text

__all__ = ["neyman_allocation", "member_uncertainty", "choose_objects", "PlanRow", "plan_rows", "write_sheet",
           "SHEET_COLUMNS"]

SHEET_COLUMNS = ("object", "capture", "frame", "bbox", "cluster", "cluster_name", "pick", "label")


def neyman_allocation(n_new: int, sizes, sd, *, have=None, room=None) -> np.ndarray:
    """New labels per cluster (H,) int: Neyman allocation of ``n_new`` labels given ``have`` already.

    sizes (H,): cluster sizes N_h.  sd (H,): S_h (> 0).  have (H,): labels already held (default 0).
    room (H,): most new labels a cluster can take (default: sizes - have).  A cluster with no label at all
    is served first (largest first).  Fewer than ``n_new`` are returned only when every cluster is full.
    """
    N = np.asarray(sizes, dtype=np.float64)
    S = np.asarray(sd, dtype=np.float64)
    have = np.zeros(N.shape, np.int64) if have is None else np.asarray(have, dtype=np.int64)
    room = (N.astype(np.int64) - have) if room is None else np.asarray(room, dtype=np.int64)
    if N.ndim != 1 or S.shape != N.shape or have.shape != N.shape or room.shape != N.shape:
        raise ValueError(f"sizes, sd, have and room must be (H,), got {N.shape}, {S.shape}, {have.shape}, {room.shape}")
    if n_new < 0 or np.any(S <= 0) or np.any(N <= 0) or np.any(have < 0) or np.any(room < 0):
        raise ValueError("need n_new >= 0, sizes > 0, sd > 0, have >= 0 and room >= 0")
    W2S2 = (N / N.sum()) ** 2 * S ** 2
    n = have.copy()
    new = np.zeros_like(n)
    for _ in range(int(n_new)):
        open_ = new < room
        if not open_.any():
            break
        unknown = np.flatnonzero(open_ & (n == 0))
        if unknown.size:                        # unknown purity first, the largest cluster first
            h = int(unknown[np.argmax(N[unknown])])
        else:                                   # else the largest drop of W^2 S^2 / n (ties: lower index)
            gain = np.where(open_, W2S2 / (n * (n + 1.0)), -1.0)
            h = int(np.argmax(gain))
        new[h] += 1
        n[h] += 1
    return new


def member_uncertainty(score, distance, second_distance) -> np.ndarray:
    """(N,) in [0, 1]: (1 - score) / 2 + min(1, d / d_2) / 2 (d_2 = inf or missing: no second cluster)."""
    score = np.asarray(score, dtype=np.float64)
    d = np.asarray(distance, dtype=np.float64)
    d2 = np.asarray(second_distance, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(np.isfinite(d2) & (d2 > 0), d / d2, 0.0)
    return 0.5 * (1.0 - np.clip(score, 0, 1)) + 0.5 * np.clip(np.nan_to_num(ratio), 0, 1)


def choose_objects(cluster, uncertainty, labelled, n_new: int, rng: np.random.Generator, *,
                   random_share: float = 0.5, agree=None) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the objects to label next and how each was chosen.

    cluster (N,) int (< 0 = unassigned, never chosen); uncertainty (N,); labelled (N,) bool: already has a
    label; agree (N,) bool: the label agrees with its cluster's majority (only read where labelled).
    Returns (indices (M,), random (M,) bool), grouped by cluster in ascending cluster order, random picks
    first within a cluster.
    """
    cluster = np.asarray(cluster, dtype=np.int64)
    u = np.asarray(uncertainty, dtype=np.float64)
    labelled = np.asarray(labelled, dtype=bool)
    agree = np.ones_like(labelled) if agree is None else np.asarray(agree, dtype=bool)
    if not (cluster.shape == u.shape == labelled.shape == agree.shape) or cluster.ndim != 1:
        raise ValueError(f"cluster, uncertainty, labelled and agree must be (N,), got {cluster.shape}, {u.shape}, "
                         f"{labelled.shape}, {agree.shape}")
    if not 0 <= random_share <= 1:
        raise ValueError(f"random_share must be in [0, 1], got {random_share}")
    ids = np.unique(cluster[cluster >= 0])
    if ids.size == 0 or n_new <= 0:
        return np.zeros(0, np.int64), np.zeros(0, bool)
    sizes = np.array([np.sum(cluster == c) for c in ids])
    have = np.array([np.sum(labelled & (cluster == c)) for c in ids])
    k = np.array([np.sum(labelled & agree & (cluster == c)) for c in ids])
    p = (k + 1.0) / (have + 2.0)
    sd = np.where(have > 0, np.sqrt(p * (1 - p)), 0.5)
    alloc = neyman_allocation(n_new, sizes, sd, have=have)
    picks, is_random = [], []
    for c, m in zip(ids.tolist(), alloc.tolist()):
        if m == 0:
            continue
        pool = np.flatnonzero((cluster == c) & ~labelled)
        n_rand = min(int(math.ceil(random_share * m)), pool.size)
        rand = rng.choice(pool, size=n_rand, replace=False) if n_rand else np.zeros(0, np.int64)
        rest = np.setdiff1d(pool, rand)
        unsure = rest[np.argsort(-u[rest], kind="stable")][:m - n_rand]
        picks += [np.sort(rand), unsure]
        is_random += [np.ones(n_rand, bool), np.zeros(unsure.size, bool)]
    return np.concatenate(picks).astype(np.int64), np.concatenate(is_random)


@dataclass
class PlanRow:
    """One line of the sheet.  bbox: [u0, v0, u1, v1) in ``frame`` (None when the store has no view)."""
    object: str
    capture: str
    frame: str
    bbox: list[int] | None
    cluster: int
    cluster_name: str
    pick: str


def plan_rows(store, object_ids, cluster, random, names: dict[int, str]) -> list[PlanRow]:
    """Sheet rows for the chosen objects: each object's best view (most pixels among the frames that have a
    crop, else among all its frames) gives the frame and box."""
    v = store.views
    crop_frames: dict[int, set] = {}
    for o, f in zip(np.asarray(store.crop_object).tolist(), np.asarray(store.crop_frame).tolist()):
        crop_frames.setdefault(int(o), set()).add(str(f))
    rows = []
    for oid, c, r in zip(object_ids, np.asarray(cluster).tolist(), np.asarray(random).tolist()):
        i = store.index_of(str(oid))
        mine = np.flatnonzero(np.asarray(v["object"]) == i)
        with_crop = [j for j in mine.tolist() if str(v["frame"][j]) in crop_frames.get(i, set())]
        cand = np.array(with_crop or mine.tolist(), dtype=np.int64)
        if cand.size:
            j = int(cand[np.argmax(np.asarray(v["n_pixels"])[cand])])
            frame, bbox = str(v["frame"][j]), [int(x) for x in np.asarray(v["bbox"])[j]]
        else:
            frame, bbox = "", None
        rows.append(PlanRow(str(oid), str(store.objects["capture"][i]), frame, bbox, int(c),
                            names.get(int(c), f"cluster {int(c)}"), "random" if r else "unsure"))
    return rows


def write_sheet(out_dir: str | Path, rows: list[PlanRow], crops) -> dict[str, Path]:
    """labelling_sheet.csv and labelling_sheet.png in ``out_dir``; crops: object id -> [(S, S, 3) uint8]."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(SHEET_COLUMNS)
    for r in rows:
        w.writerow([r.object, r.capture, r.frame, "" if r.bbox is None else " ".join(str(x) for x in r.bbox),
                    r.cluster, r.cluster_name, r.pick, ""])
    write_text(out_dir / "labelling_sheet.csv", buf.getvalue())
    write_bytes(out_dir / "labelling_sheet.png", _sheet_png(rows, crops))
    return {"labelling_sheet.csv": out_dir / "labelling_sheet.csv", "labelling_sheet.png": out_dir / "labelling_sheet.png"}


def _sheet_png(rows: list[PlanRow], crops, size: int = 96, cols: int = 8) -> bytes:
    """Crops grouped by cluster: a heading per cluster, then its objects with their ids underneath."""
    from PIL import Image, ImageDraw
    from ..drawing import cluster_colour, font as bundled_font
    from .report import PALETTE
    font, small = bundled_font(13), bundled_font(11)
    groups: dict[int, list[PlanRow]] = {}
    for r in rows:
        groups.setdefault(r.cluster, []).append(r)
    pad, head, cap = 8, 24, 30
    width = pad + cols * (size + pad)
    height = pad + sum(head + math.ceil(len(g) / cols) * (size + cap + pad) for g in groups.values()) if groups else 60
    rgb = lambda h: tuple(int(h[i:i + 2], 16) for i in (1, 3, 5))  # noqa: E731
    sheet = Image.new("RGB", (width, max(height, 60)), rgb(PALETTE["paper"]))
    draw = ImageDraw.Draw(sheet)
    if not groups:
        draw.text((pad, pad), "nothing to label: every clustered object already has a label", fill=rgb(PALETTE["ink"]), font=font)
    y = pad
    for c, g in groups.items():
        draw.rectangle([pad, y + 4, pad + 12, y + 16], fill=cluster_colour(c))
        draw.text((pad + 18, y + 2), f"cluster {c}  {g[0].cluster_name}  ({len(g)} to label)", fill=rgb(PALETTE["ink"]), font=font)
        y += head
        for i, r in enumerate(g):
            x0, y0 = pad + (i % cols) * (size + pad), y + (i // cols) * (size + cap + pad)
            thumbs = crops(r.object) if crops is not None else []
            if thumbs:
                img = Image.fromarray(np.asarray(thumbs[0], dtype=np.uint8)).convert("RGB")
                img = img.resize((size, size), Image.NEAREST) if img.width < size else img
                img.thumbnail((size, size))
                sheet.paste(img, (x0 + (size - img.width) // 2, y0 + (size - img.height) // 2))
            else:
                draw.rectangle([x0, y0, x0 + size - 1, y0 + size - 1], fill=rgb(PALETTE["rule"]))
            draw.rectangle([x0 - 1, y0 - 1, x0 + size, y0 + size], outline=cluster_colour(c), width=2)
            draw.text((x0, y0 + size + 3), _fit(draw, r.object, small, size), fill=rgb(PALETTE["ink"]), font=small)
            draw.text((x0, y0 + size + 16), r.pick, fill=rgb(PALETTE["muted"]), font=small)
        y += math.ceil(len(g) / cols) * (size + cap + pad)
    out = io.BytesIO()
    sheet.save(out, format="PNG")
    return out.getvalue()


def _fit(draw, text: str, font, width: int) -> str:
    """``text`` shortened from the left with an ellipsis until it fits ``width`` pixels."""
    if draw.textlength(text, font=font) <= width:
        return text
    while len(text) > 1 and draw.textlength("…" + text, font=font) > width:
        text = text[1:]
    return "…" + text
