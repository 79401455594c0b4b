"""Member sheets: real crops of each cluster's members, so a person can name clusters right after mining.

``members/cluster-<k>.png`` beside the library, one per cluster: up to ``MAX_TILES`` members spread evenly
over the cluster's members sorted by distance to the prototype (nearest first, so the first rows show
typical members and the last ones its edge, where a mixed cluster shows), each the store's largest
thumbnail of that object (the frame that sees most of it) with its object id and score beneath.  The
title names the cluster as ``protomine tag --cluster K`` or ``--object ID`` would.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

from ..atomic import atomic_path
from ..drawing import cluster_colour, halo_text, text_size
from ..ingest.store import ObjectStore
from ..progress import bar
from ..provenance import provenance_of, record_outputs
from .library import Library

MAX_TILES = 40
COLUMNS = 8
TILE = 128          # thumbnails are upscaled to this side (pixels)
TEXT = 12           # caption size (pixels)


def sheet_order(distance: np.ndarray, n: int = MAX_TILES) -> np.ndarray:
    """Indices of at most n members, evenly spread over the members sorted by distance (nearest first)."""
    order = np.argsort(np.asarray(distance, np.float64), kind="stable")
    if len(order) <= n:
        return order
    return order[np.unique(np.round(np.linspace(0, len(order) - 1, n)).astype(int))]


def render_member_sheet(title: str, colour: tuple[int, int, int], tiles: list[tuple[np.ndarray | None, str, str]]) -> Image.Image:
    """A sheet: ``title`` over a grid of (crop (S, S, 3) uint8 or None, caption line 1, caption line 2)."""
    cols = min(COLUMNS, max(1, len(tiles)))
    rows = max(1, -(-len(tiles) // cols))
    cap_h = 2 * (TEXT + 3) + 4
    head = 2 * TEXT + 16
    W, H = cols * (TILE + 6) + 6, head + rows * (TILE + cap_h + 6) + 6
    im = Image.new("RGB", (W, H), (32, 32, 36))
    d = ImageDraw.Draw(im)
    d.rectangle([0, 0, W - 1, head - 6], fill=(22, 22, 26))
    d.rectangle([0, head - 8, W - 1, head - 6], fill=colour)
    halo_text(d, (8, 6), title, (245, 245, 245), TEXT + 4)
    for t, (crop, line1, line2) in enumerate(tiles):
        x = 6 + (t % cols) * (TILE + 6)
        y = head + (t // cols) * (TILE + cap_h + 6)
        if crop is not None:
            im.paste(Image.fromarray(np.asarray(crop, np.uint8)).resize((TILE, TILE), Image.BILINEAR), (x, y))
        else:
            d.rectangle([x, y, x + TILE - 1, y + TILE - 1], outline=(90, 90, 90))
        d.rectangle([x, y, x + TILE - 1, y + TILE - 1], outline=colour)
        for j, line in enumerate((line1, line2)):
            while line and text_size(line, TEXT)[0] > TILE:
                line = ".." + line[3:]
            halo_text(d, (x, y + TILE + 2 + j * (TEXT + 3)), line, (235, 235, 235), TEXT)
    return im


def write_member_sheets(folder: str | Path, lib: Library, store: ObjectStore, *, clusters: list[int] | None = None,
                        progress=None) -> list[Path]:
    """One ``cluster-<k>.png`` per cluster into ``folder`` (atomic), listed in the folder's manifest.

    clusters: only these sheets (a renamed cluster); None = all, and sheets of clusters that no longer
    exist are removed.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    m = lib.members
    width = len(str(max(lib.n_clusters - 1, 0)))
    stale = {p for p in folder.glob("cluster-*.png")} if clusters is None else set()
    todo = range(lib.n_clusters) if clusters is None else [int(k) for k in clusters]
    paths = []
    with bar(progress, "member sheets", total=len(todo), unit="clusters") as b:
        for k in todo:
            rows = np.flatnonzero(np.asarray(m["cluster"]) == k)
            pick = rows[sheet_order(np.asarray(m["distance"])[rows])]
            tiles = []
            for r in pick:
                oid = str(m["object"][r])
                crops = store.crops(oid)
                tiles.append((crops[0] if crops else None, oid, f"score {float(m['score'][r]):.2f}"))
            title = (f"cluster {k}" + (f" \"{lib.names[k]}\"" if k in lib.names else "")
                     + f": {len(rows)} members" + (f", {len(pick)} shown, nearest first" if len(pick) < len(rows)
                                                   else ", nearest first"))
            path = folder / f"cluster-{k:0{width}d}.png"
            with atomic_path(path) as tmp:
                render_member_sheet(title, cluster_colour(k), tiles).save(tmp, format="PNG")
            paths.append(path)
            stale.discard(path)
            b.advance()
    for p in stale:                          # sheets of clusters an earlier run had and this one has not
        p.unlink(missing_ok=True)
    if paths:
        record_outputs(paths, provenance_of(lib.attrs))
    return paths
