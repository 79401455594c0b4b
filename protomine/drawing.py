"""Pictures for people: the cluster palette, a readable font and text with a halo (overlays, member sheets).

Text is drawn with Pillow's bundled scalable font (``ImageFont.load_default(size)``, no system fonts
needed) with a thin dark halo (a stroke) so it stays readable on any image.  Cluster k is drawn in
``cluster_colour(k)``: the Okabe-Ito colour-blind-safe set, then further well separated hues.
"""
from __future__ import annotations

import functools

from PIL import ImageDraw, ImageFont

# Okabe & Ito (2008), "Color Universal Design", without black; then five more hues far from those
PALETTE = [(230, 159, 0), (86, 180, 233), (0, 158, 115), (240, 228, 66), (0, 114, 178), (213, 94, 0),
           (204, 121, 167), (148, 103, 189), (152, 223, 138), (220, 20, 60), (255, 0, 255), (200, 200, 255)]
UNKNOWN = (235, 235, 235)
HALO = (16, 16, 16)


def cluster_colour(k: int | None) -> tuple[int, int, int]:
    """RGB of cluster k (``UNKNOWN`` grey-white for None)."""
    return UNKNOWN if k is None or k < 0 else PALETTE[int(k) % len(PALETTE)]


@functools.lru_cache(maxsize=8)
def font(size: int) -> ImageFont.FreeTypeFont:
    """Pillow's bundled scalable font at ``size`` pixels."""
    return ImageFont.load_default(size=size)


def text_size(text: str, size: int) -> tuple[int, int]:
    """(width, height) in pixels of ``text`` at ``size`` (halo included)."""
    x0, y0, x1, y1 = font(size).getbbox(text, stroke_width=max(1, size // 8))
    return int(x1 - min(x0, 0)), int(y1 - min(y0, 0))


def halo_text(d: ImageDraw.ImageDraw, xy: tuple[float, float], text: str, fill, size: int) -> None:
    """``text`` with its top-left at ``xy``, in ``fill`` with a thin dark halo."""
    d.text(xy, text, fill=fill, font=font(size), stroke_width=max(1, size // 8), stroke_fill=HALO)
