"""One-sided support of depth readings (``[ingest] line_support_one_sided``): a reading the centred lines of
``line_unsupported`` reject is kept when it continues a surface on one side, z0 ~ 2 z1 - z2.

Sources: for independent readings of std sigma, z0 - 2 z1 + z2 has variance (1 + 4 + 1) sigma^2 = 6 sigma^2 and the
centred z0 - (z_a + z_b) / 2 has 1.5 sigma^2 (hand-worked), so the one-sided tolerance is sqrt(6 / 1.5) = 2 x the
centred one; a normal variable lies within 3 std with probability erf(3 / sqrt 2) = 0.99730 (standard table).  On a
parabola z = c x^2 sampled at step h, z0 - 2 z1 + z2 = 2 c h^2 and z0 - (z_-1 + z_1) / 2 = -c h^2 (Taylor, exact for a
quadratic).  Mixed readings at depth edges lie between the near and the far surface (common practice for flying
pixels); a true outline reading, a corner, a crease or the tip of a thin part has its own surface behind it.
"""
from __future__ import annotations

from math import erf, sqrt

import numpy as np
from conftest import depth_only_capture

from protomine.ingest.depthedges import (EXTRAPOLATION_SCALE, SIDE_DIRECTIONS, line_unsupported,
                                         one_sided_support)


def _one_sided_support_naive(depth: np.ndarray, at: np.ndarray, tol: np.ndarray,
                             labels: np.ndarray | None = None) -> np.ndarray:
    """From the definition: loops over the readings and the 8 directions, no shared helper."""
    H, W = depth.shape
    out = np.zeros(len(at), bool)
    for i, (flat, t) in enumerate(zip(at, tol)):
        r, c = divmod(int(flat), W)
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                if not (dr or dc):
                    continue
                r1, c1, r2, c2 = r + dr, c + dc, r + 2 * dr, c + 2 * dc
                if not (0 <= r2 < H and 0 <= c2 < W):
                    continue
                z0, z1, z2 = depth[r, c], depth[r1, c1], depth[r2, c2]
                same = labels is None or labels[r1, c1] == labels[r, c] == labels[r2, c2]
                if z0 > 0 and z1 > 0 and z2 > 0 and same and abs(z0 - (2 * z1 - z2)) <= t:
                    out[i] = True
    return out


def test_one_sided_support_matches_the_definition():
    rng = np.random.default_rng(0)
    depth = rng.uniform(0.5, 0.52, (13, 17))
    depth[rng.random(depth.shape) < 0.2] = 0.0
    at = np.flatnonzero(depth > 0)
    tol = rng.uniform(0.0, 0.02, len(at))
    got = one_sided_support(depth, at, tol)
    np.testing.assert_array_equal(got, _one_sided_support_naive(depth, at, tol))
    assert got.any() and not got.all()
    labels = rng.integers(0, 3, depth.shape)
    got_l = one_sided_support(depth, at, tol, labels)
    np.testing.assert_array_equal(got_l, _one_sided_support_naive(depth, at, tol, labels))
    assert (got & ~got_l).any() and not (got_l & ~got).any()
    assert len(SIDE_DIRECTIONS) == 8 and len(set(SIDE_DIRECTIONS)) == 8


def test_the_extrapolation_tolerance_follows_the_noise_formula():
    assert EXTRAPOLATION_SCALE == sqrt(6 / 1.5)
    # rows of 3 readings between empty rows: the first reading of a row has one line only, to its right, so it is
    # supported iff |z0 - 2 z1 + z2| <= tol; with tol = 2 x 3 x the centred residual's std sqrt(1.5) sigma, that is
    # 3 std of the one-sided residual: a share of erf(3 / sqrt 2)
    sigma, n = 0.0015, 40000
    rng = np.random.default_rng(1)
    depth = np.zeros((2 * n, 3))
    depth[::2] = 0.7 + rng.normal(0.0, sigma, (n, 3))
    at = np.arange(n) * 2 * 3                          # (2i, 0)
    tol = np.full(n, EXTRAPOLATION_SCALE * 3 * sqrt(1.5) * sigma)
    share = one_sided_support(depth, at, tol).mean()
    assert abs(share - erf(3 / sqrt(2))) < 0.0015       # binomial std 0.00026; measured: 0.9976
    # curvature: on a parabola the one-sided residual is twice the centred one
    x = np.arange(3) * 0.01
    c = 3.0
    z = c * x ** 2
    assert np.isclose(abs(z[0] - 2 * z[1] + z[2]), EXTRAPOLATION_SCALE * abs(z[1] - (z[0] + z[2]) / 2))


def _scene(rng: np.random.Generator, noise_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """A steep table (4 mm a pixel down the rows: a grazing view) with a box turned 27 degrees (a staircase outline
    with 4 corners) whose top is a roof, 58-80 mm nearer than the table, nearest along a ridge (a convex crease);
    and a part 1 pixel wide, 3 cm above the table, ending in a tip.  Depth (H, W) with noise, the same without,
    the table's depth, the box's mask."""
    h, w = 120, 160
    r, c = np.mgrid[0:h, 0:w].astype(float)
    table = 0.6 + 0.004 * r
    a = np.deg2rad(27.0)
    x = (c - 70) * np.cos(a) + (r - 60) * np.sin(a)
    y = -(c - 70) * np.sin(a) + (r - 60) * np.cos(a)
    box = (np.abs(x) < 30) & (np.abs(y) < 18)
    z = np.where(box, table - 0.08 + 0.0012 * np.abs(y), table)
    z = np.where((r == 100) & (c >= 110) & (c < 150), table - 0.03, z)
    return z + rng.normal(0.0, noise_m, z.shape), z, table, box


def _inside(h: int, w: int) -> np.ndarray:
    inside = np.ones((h, w), bool)
    inside[:2] = inside[-2:] = inside[:, :2] = inside[:, -2:] = False     # lines reach 2 pixels out
    return inside


def test_true_outlines_corners_creases_and_tips_are_kept():
    depth, _, _, _ = _scene(np.random.default_rng(3), 0.0015)
    inside = _inside(*depth.shape)
    centred = line_unsupported(depth, 200.0, 3.0) & inside
    kept = line_unsupported(depth, 200.0, 3.0, one_sided=True) & inside
    assert centred.sum() > 100          # measured: 165 true readings (outline steps, corners, the tip, table beside)
    assert kept.sum() <= 2              # measured: 0
    assert not (kept & ~centred).any()  # one-sided support only ever keeps a reading


def test_mixed_readings_on_an_outline_are_still_flagged():
    rng = np.random.default_rng(4)
    depth, clean, table, box = _scene(rng, 0.0015)
    p = np.pad(box, 1)
    outline = box & ~(p[2:, 1:-1] & p[:-2, 1:-1] & p[1:-1, 2:] & p[1:-1, :-2])
    # the outline reads a mix of box (near) and table (far): 15-85% of the way
    depth = np.where(outline, depth + rng.uniform(0.15, 0.85, depth.shape) * (table - clean), depth)
    ring = np.zeros(depth.shape, bool)
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            ring |= np.roll(np.roll(outline, dr, 0), dc, 1)
    inside = _inside(*depth.shape)
    centred = line_unsupported(depth, 200.0, 3.0) & inside
    kept = line_unsupported(depth, 200.0, 3.0, one_sided=True) & inside
    assert kept[outline].mean() > 0.2                          # measured: 0.25 (centred lines alone 0.46; the
    assert kept[outline].mean() > 0.5 * centred[outline].mean()   # rest fit the line across the edge near halfway)
    # the true readings beside the mixed outline: the centred lines drop many, one-sided support none
    beside = ring & ~outline & inside
    assert centred[beside].sum() > 50                          # measured: 136
    assert kept[beside].sum() <= 2                             # measured: 0


def test_ingest_key_reaches_the_frames(tmp_path):
    """``[ingest] line_support_one_sided`` reaches the frames' flags (``proposals.load_frames``): the box's true
    outline and corners, which the centred lines drop, read as depth again; the older tests' flags stay."""
    from protomine.ingest.proposals import load_frames
    depth, _, _, _ = _scene(np.random.default_rng(5), 0.0015)
    h, w = depth.shape
    cap = depth_only_capture(tmp_path / "cap", depth)
    off = load_frames(cap)[0].flying
    centred = load_frames(cap, line_support=3.0)[0].flying
    sided = load_frames(cap, line_support=3.0, one_sided=True)[0].flying
    assert not (off & ~sided).any() and not (sided & ~centred).any()
    inside = _inside(h, w)
    assert (centred & ~off & inside).sum() > 100 and (sided & ~off & inside).sum() <= 2   # measured: 165 and 0


def test_with_masks_support_comes_from_the_readings_own_object():
    """A mixed reading inside one object's mask that reads as the continuation of the surface beside it (a touching
    neighbour, the table) is a point a jump away from its object: with the frame's masks only readings of its own
    mask support it.  True readings keep their support: their own surface lies behind them."""
    rng = np.random.default_rng(6)
    depth, clean, table, box = _scene(rng, 0.0015)
    labels = box.astype(np.int32)
    labels[100, 110:150] = 2                                       # the thin part is a second object
    inside = _inside(*depth.shape)
    assert (line_unsupported(depth, 200.0, 3.0, True, labels) & inside).sum() <= 2     # measured: 0
    # 30% of the box's outline read the table: the table's own line continued into the box's mask
    p = np.pad(box, 1)
    outline = box & ~(p[2:, 1:-1] & p[:-2, 1:-1] & p[1:-1, 2:] & p[1:-1, :-2])
    some = outline & (rng.random(depth.shape) < 0.3)
    mixed = np.where(some, table + rng.normal(0.0, 0.0015, depth.shape), depth)
    free = line_unsupported(mixed, 200.0, 3.0, True)
    own = line_unsupported(mixed, 200.0, 3.0, True, labels)
    assert free[some].mean() < 0.1                                 # measured: 0.0 (the table's line goes on through them)
    assert own[some].mean() > 0.6                                  # measured: 0.75 (as the centred lines alone: the
    #                                                                rest sit between two such readings on the outline)
    assert (own & ~some & inside).sum() <= 2                       # measured: 0
    assert not (free & ~own).any()


def test_mask_free_ingest_keeps_the_older_tests_unless_asked(tmp_path):
    """``[ingest] line_support_maskfree``: a capture without masks is read with the two older flying-pixel tests
    only (the frames' flags equal ``load_frames`` without line_support), and with line_support when the key is on
    (the centred lines alone here, one-sided support off, so that the box's outline shows the difference: equal to
    ``load_frames`` with them).  Reference: the same frames read directly."""
    from protomine.config import load_config
    from protomine.ingest.proposals import find_objects, load_frames
    rng = np.random.default_rng(7)
    depth, _, _, _ = _scene(rng, 0.0015)
    cap = depth_only_capture(tmp_path / "cap", depth)
    assert not cap.has_masks
    older = load_frames(cap)[0].flying
    both = load_frames(cap, line_support=3.0, one_sided=False, use_masks=False)[0].flying
    cfg = load_config(None)
    cfg["ingest"]["line_support_one_sided"] = False
    assert cfg["ingest"]["line_support"] > 0 and not cfg["ingest"]["line_support_maskfree"]
    got = find_objects(cap, cfg, np.random.default_rng(0)).frames[0].flying
    assert np.array_equal(got, older)
    cfg["ingest"]["line_support_maskfree"] = True
    got = find_objects(cap, cfg, np.random.default_rng(0)).frames[0].flying
    assert np.array_equal(got, both) and (both & ~older).sum() > 100      # measured: the outline, as above
