"""The line-support test of depth readings (``[ingest] line_support``): second differences, the frame's own noise
estimate, and which readings it flags.

Sources: the second difference z_i - (z_{i-1} + z_{i+1}) / 2 is the discrete Laplacian along a line (common
practice); checked against scipy.ndimage.correlate with that kernel and against loops over the definition.  Depth
from a quantised, noisy disparity (Khoshelham & Elberink 2012, Sensors 12(2)): z = f b / d, so a disparity error
sigma_d gives a depth error z^2 sigma_d / (f b) (first-order propagation), and a quantisation step s adds a uniform
error of variance s^2 / 12 to the disparity (Widrow's quantisation noise model, valid when the noise spans a step or
more, from memory); independent readings give second differences of variance 1.5 sigma_z^2 (hand-worked).
Mixed readings at depth edges lie between the near and the far surface (common practice for flying pixels).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import correlate

from conftest import depth_only_capture

from protomine.ingest.depthedges import LINE_DIRECTIONS, depth_noise, line_unsupported, second_differences


def _second_differences_naive(depth: np.ndarray) -> np.ndarray:
    """(4, H, W) from the definition, one pixel and one line at a time (NaN where a reading is missing)."""
    H, W = depth.shape
    out = np.full((4, H, W), np.nan)
    for k, (dr, dc) in enumerate(LINE_DIRECTIONS):
        for r in range(H):
            for c in range(W):
                ra, ca, rb, cb = r + dr, c + dc, r - dr, c - dc
                if not (0 <= ra < H and 0 <= ca < W and 0 <= rb < H and 0 <= cb < W):
                    continue
                z, za, zb = depth[r, c], depth[ra, ca], depth[rb, cb]
                if z > 0 and za > 0 and zb > 0:
                    out[k, r, c] = z - (za + zb) / 2
    return out


def test_second_differences_match_the_definition_and_scipy():
    rng = np.random.default_rng(0)
    depth = rng.uniform(0.5, 1.0, (11, 13))
    depth[rng.random(depth.shape) < 0.15] = 0.0
    got = second_differences(depth)
    np.testing.assert_allclose(got, _second_differences_naive(depth), rtol=0, atol=1e-12)
    assert np.isnan(got).any() and np.isfinite(got).any()
    # all readings present: the interior is a correlation with the line's [-1/2, 1, -1/2] kernel
    full = rng.uniform(0.5, 1.0, (9, 10))
    got = second_differences(full)
    for k, (dr, dc) in enumerate(LINE_DIRECTIONS):
        kern = np.zeros((3, 3))
        kern[1, 1] = 1.0
        kern[1 + dr, 1 + dc] = kern[1 - dr, 1 - dc] = -0.5
        np.testing.assert_allclose(got[k, 1:-1, 1:-1], correlate(full, kern)[1:-1, 1:-1], atol=1e-12)


def _slanted_plane(h: int = 240, w: int = 320) -> np.ndarray:
    """A table seen obliquely: depth from 0.5 m (bottom rows) to 1.0 m (top rows), tilted a little along the rows."""
    r, c = np.mgrid[0:h, 0:w]
    return 1.0 / (1 / 0.5 + (1 / 1.0 - 1 / 0.5) * (h - 1 - r) / (h - 1)) + 0.02 * c / w


@pytest.mark.parametrize("sigma_px", [0.1, 0.2])
def test_noise_of_a_terraced_plane_follows_z_squared(sigma_px):
    fb, step = 580.0 * 0.075, 1.0 / 8.0
    z = _slanted_plane()
    rng = np.random.default_rng(1)
    d = np.rint((fb / z + rng.normal(0.0, sigma_px, z.shape)) / step) * step
    depth = fb / d
    at, spread = depth_noise(depth)
    assert len(at) >= 6 and at.min() < 0.6 and at.max() > 0.85
    expected = at ** 2 * np.sqrt(sigma_px ** 2 + step ** 2 / 12) / fb     # depth std, first-order propagation
    np.testing.assert_allclose(spread / np.sqrt(1.5), expected, rtol=0.15)   # measured: within 3.4%


def test_noise_of_gaussian_depth_is_its_std():
    z = _slanted_plane()
    sigma = 0.0012 + 0.002 * (z - 0.5)                  # grows with depth, not as z^2
    depth = z + np.random.default_rng(2).normal(0.0, 1.0, z.shape) * sigma
    at, spread = depth_noise(depth)
    np.testing.assert_allclose(spread / np.sqrt(1.5), 0.0012 + 0.002 * (at - 0.5), rtol=0.1)   # measured: within 2.1%


def _box_on_table(rng: np.random.Generator, noise_m: float) -> tuple[np.ndarray, np.ndarray]:
    """A steep table (depth growing 4 mm a pixel down the rows: a grazing view) with a box 8 cm nearer in the middle;
    noisy depth (H, W) and the box's mask."""
    h, w = 120, 160
    r, c = np.mgrid[0:h, 0:w]
    table = 0.6 + 0.004 * r
    box = (np.abs(r - 60) < 25) & (np.abs(c - 80) < 30)
    z = np.where(box, table - 0.08, table)
    return z + rng.normal(0.0, noise_m, z.shape), box


def test_mixed_readings_flagged_surfaces_kept():
    rng = np.random.default_rng(3)
    depth, box = _box_on_table(rng, 0.0015)
    true_depth = depth.copy()
    # the box's outline (pixels with a neighbour across the edge) reads a mix of the two surfaces
    inner = box & ~np.pad(box, 1)[2:, 1:-1] | box & ~np.pad(box, 1)[:-2, 1:-1] | box & ~np.pad(box, 1)[1:-1, 2:] \
        | box & ~np.pad(box, 1)[1:-1, :-2]
    a = rng.uniform(0.15, 0.85, depth.shape)
    mixed = depth + a * 0.08                                  # between the box (near) and the table (far)
    depth = np.where(inner, mixed, depth)
    flags = line_unsupported(depth, 200.0, 3.0)
    assert flags[inner].mean() > 0.5                          # measured: 0.65 (the rest lie near halfway: across
    #                                                           the edge they fit the line from the near to the far side)
    border = np.zeros(depth.shape, bool)
    border[[0, -1]] = border[:, [0, -1]] = True
    ring = np.zeros(depth.shape, bool)                       # the readings beside the mixed outline
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            ring |= np.roll(np.roll(inner, dr, 0), dc, 1)
    kept = ~inner & ~ring & ~border
    assert flags[kept].mean() < 0.002                         # measured: 5.6e-5 (1 reading)
    assert line_unsupported(true_depth, 200.0, 3.0)[~border].mean() < 0.01   # measured: 5 readings (the box's corners)


def test_ingest_key_flags_the_mixed_readings(tmp_path):
    """``[ingest] line_support`` reaches the frames' flags (``proposals.load_frames``): mixed readings beside the box
    no longer read as depth for lifting, and the other tests' flags stay."""
    from protomine.ingest.proposals import load_frames
    rng = np.random.default_rng(4)
    depth, box = _box_on_table(rng, 0.0015)
    inner = box & ~(np.roll(box, 1, 0) & np.roll(box, -1, 0) & np.roll(box, 1, 1) & np.roll(box, -1, 1))
    depth = np.where(inner, depth + rng.uniform(0.15, 0.85, depth.shape) * 0.08, depth)
    cap = depth_only_capture(tmp_path / "cap", depth)
    off = load_frames(cap)[0].flying
    on = load_frames(cap, line_support=3.0)[0].flying
    assert not (off & ~on).any()
    assert on[inner].mean() > off[inner].mean() + 0.2          # measured: 0.71 -> 0.98
