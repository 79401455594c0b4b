"""Prototype pictures: shaded orthographic views of a prototype's surface evidence in its own colours.

A cylindrical volume (6, R, A, H) (store channels) is resampled onto a Cartesian grid (n, n, n) of the
unit cylinder's bounding box (trilinear in rho and z, linear with wrap-around in azimuth).  A view
looks along one axis; each pixel shows the first cell whose surface evidence exceeds ``level``, shaded
by the view depth (near = bright) and by a Lambertian term from the depth gradient, in the cell's mean
colour.  Views: top (looking down -z), front (looking along +y), side (looking along -x); prototypes with
members resting on other faces get a fourth picture, the front view of the prototype resting on its most
common other face (``tilts.volume_on_face``).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..atomic import atomic_path


def cylinder_to_cartesian(vol: np.ndarray, n: int = 40) -> np.ndarray:
    """(C, R, A, H) cylindrical -> (C, n, n, n) Cartesian, indexed [c, x, y, z], x, y in [-1, 1], z in [0, 1]."""
    from scipy.ndimage import map_coordinates
    C, R, A, H = vol.shape
    g = (np.arange(n) + 0.5) / n
    x = 2 * g - 1
    X, Y, Z = np.meshgrid(x, x, g, indexing="ij")
    rho = np.hypot(X, Y) * R - 0.5
    phi = np.mod(np.arctan2(Y, X), 2 * np.pi) / (2 * np.pi) * A - 0.5
    zz = Z * H - 0.5
    # wrap azimuth: pad one bin on each side
    padded = np.concatenate([vol[:, :, -1:], vol, vol[:, :, :1]], axis=2)
    coords = np.stack([rho, phi + 1, zz])
    out = np.empty((C, n, n, n), dtype=np.float32)
    outside = np.hypot(X, Y) > 1
    for c in range(C):
        out[c] = map_coordinates(padded[c], coords, order=1, mode="nearest")
        out[c][outside] = 0
    return out


def _view(cart: np.ndarray, axis: int, reverse: bool, level: float) -> np.ndarray:
    """RGB image of the first surface along ``axis``."""
    surf = cart[0]
    occ = surf > level
    if reverse:
        occ = np.flip(occ, axis)
    n = occ.shape[axis]
    hit = occ.any(axis=axis)
    first = np.argmax(occ, axis=axis)                  # index of the first occupied cell
    idx = first if not reverse else n - 1 - first
    rgb = np.stack([np.take_along_axis(cart[3 + c], np.expand_dims(idx, axis), axis).squeeze(axis) for c in range(3)], -1)
    depth = first.astype(np.float64) / n
    gy, gx = np.gradient(np.where(hit, depth, depth[hit].max() if hit.any() else 0) * n)
    lam = 1.0 / np.sqrt(1 + gx ** 2 + gy ** 2)
    shade = (0.35 + 0.65 * lam) * (1.0 - 0.5 * depth)
    img = np.clip(rgb * shade[..., None] * 1.15 + 0.05, 0, 1)
    img[~hit] = 1.0
    return img


def prototype_views(vol: np.ndarray, *, n: int = 40, level: float = 0.35) -> list[np.ndarray]:
    """[top, front, side] RGB images (n, n, 3) in [0, 1] of a store-channel volume (6, R, A, H)."""
    cart = cylinder_to_cartesian(np.asarray(vol, dtype=np.float32), n)
    cart[3:6] = np.clip(cart[3:6], 0, 1)
    top = _view(cart, 2, True, level).transpose(1, 0, 2)[::-1]            # rows = y (up), cols = x
    front = _view(cart, 1, False, level).transpose(1, 0, 2)[::-1]          # rows = z (up), cols = x
    side = _view(cart, 0, True, level).transpose(1, 0, 2)[::-1]            # rows = z, cols = y
    return [top, front, side]


def symmetry_text(order: int) -> str:
    return "continuous symmetry" if order == 0 else ("no symmetry" if order == 1 else f"{order}-fold symmetry")


def render_gallery(path: str | Path, volumes: np.ndarray, *, counts: np.ndarray, symmetry: np.ndarray,
                   names: list[str] | None = None, title: str = "prototype gallery",
                   faces: list[tuple[np.ndarray, int, int] | None] | None = None) -> Path:
    """Write a PNG with one row-block per prototype: top, front and side views, label and count; with
    ``faces``, per prototype None or (volume (6, R, A, H) resting on another face, face index, members on it),
    shown as a fourth picture."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    K = len(volumes)
    cols = min(4, max(1, K))
    rows = int(np.ceil(K / cols))
    view_in, gap_in, text_in, title_in = 1.2, 0.25, 0.45, 0.45
    faces = faces if faces is not None and any(f is not None for f in faces) else None
    n_views = 4 if faces else 3
    block_w = n_views * view_in + gap_in
    W, H = cols * block_w + gap_in, rows * (view_in + text_in) + title_in
    fig = plt.figure(figsize=(W, H))
    for k in range(K):
        r, c = divmod(k, cols)
        x0 = gap_in + c * block_w
        y0 = H - title_in - (r + 1) * (view_in + text_in) + text_in
        views = prototype_views(volumes[k])
        titles = ["top", "front", "side"]
        if faces and faces[k] is not None:
            views.append(prototype_views(faces[k][0])[1])
            titles.append(f"on face {faces[k][1]} ({faces[k][2]})")
        for v, img in enumerate(views):
            ax = fig.add_axes([(x0 + v * view_in) / W, y0 / H, (view_in * 0.95) / W, (view_in * 0.95) / H])
            ax.imshow(img, interpolation="nearest")
            ax.set_xticks([]); ax.set_yticks([])
            for sp in ax.spines.values():
                sp.set_color("#cccccc")
            ax.set_title(titles[v], fontsize=6, pad=1)
        label = names[k] if names and names[k] else f"cluster {k}"
        fig.text(x0 / W, (y0 - 0.08) / H, f"{label}: {int(counts[k])} members\n{symmetry_text(int(symmetry[k]))}",
                 fontsize=7, va="top")
    fig.suptitle(title, fontsize=9, y=1 - 0.12 / H)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png", facecolor="white")
    plt.close(fig)
    return Path(path)
