"""[volume] plane_band: cells just above the support plane that read empty count less.

The ingest gives no reading at or under its cut height (half the plane margin, ``proposals.object_cut``) to an
object, so a part lying flush with the plane reads like the bare plane: "seen, nothing here".  The scene is ray-cast
here from its definition (``test_touching_volume._cast``: a pinhole camera, the slab test for boxes, a ray-plane
intersection for the table): a box with a 3 mm plate lying on the table beside it, below a 4 mm cut.  The expected
weights are written out from the definition: a cell's share of its height extent [k, k + 1) z_max / H below the band,
and observation weight 1 - that share where the one-view volume reads seen, not free and without surface."""
from __future__ import annotations

from dataclasses import replace
from types import SimpleNamespace

import numpy as np

from protomine.ingest.plane import PlaneFit
from protomine.ingest.proposals import FrameData, Proposal, SceneObjects, object_cut
from protomine.ingest.volume import Grid, ObjectFrame, View, band_fractions, lift
from protomine.scenes.render import look_at
from test_touching_volume import K, _cast

BODY = (np.array([-0.04, -0.03, 0.0]), np.array([0.0, 0.03, 0.10]))      # the upright part
PLATE = (np.array([0.0, -0.03, 0.0]), np.array([0.06, 0.03, 0.003]))     # 3 mm thick, flush with the table
CUT = 0.004                                                              # the ingest's cut (m)


def _scene():
    """Depth, the object's own pixels (its readings above the cut, as the ingest gives them), rgb, frame, grid."""
    T = look_at(np.array([0.05, -0.40, 0.35]), np.array([0.01, 0.0, 0.03]), np.array([0.0, 0.0, 1.0]))
    depth, ids = _cast(T, [BODY, PLATE])
    v, u = np.mgrid[0:depth.shape[0], 0:depth.shape[1]]
    ray = np.stack([(u - K[0, 2]) / K[0, 0], (v - K[1, 2]) / K[1, 1], np.ones_like(u, float)], -1) * depth[..., None]
    height = (ray.reshape(-1, 3) @ T[:3, :3].T + T[:3, 3])[:, 2]
    ids = ids.reshape(-1)
    assert ((ids == 2) & (depth.reshape(-1) > 0)).sum() > 100      # construction: the plate is in view
    own = np.flatnonzero((ids > 0) & (height > CUT))
    rgb = np.full(depth.shape + (3,), 128, np.uint8)
    frame = ObjectFrame(origin=np.zeros(3), up=np.array([0.0, 0.0, 1.0]), radius=0.07, height=0.10)
    return depth, own, rgb, T, frame, Grid(radial_bins=8, azimuth_bins=36, height_bins=12)


def test_band_fractions_are_each_cells_share_below_the_band():
    grid = Grid(radial_bins=3, azimuth_bins=4, height_bins=5, height_margin=1.1)
    frame = ObjectFrame(np.zeros(3), np.array([0, 0, 1.0]), 0.05, 0.02)
    dz = 1.1 * 0.02 / 5                                   # 4.4 mm a height bin
    for band in (0.0, 0.003, 0.0044, 0.0101, 0.5):
        q = band_fractions(grid, frame, band).reshape(3, 4, 5)
        want = [max(0.0, min(band, (k + 1) * dz) - k * dz) / dz for k in range(5)]   # overlap of [k dz, (k+1) dz] with [0, band]
        np.testing.assert_allclose(q, np.broadcast_to(want, (3, 4, 5)), atol=1e-12)


def test_object_cut_is_half_the_plane_margin_and_views_carry_it():
    cfg = {"ingest": {"above_plane_m": 0.008}}
    quiet = PlaneFit(np.array([0, 0, 1.0]), 0.0, 0.9, 0.001, 10)
    noisy = PlaneFit(np.array([0, 0, 1.0]), 0.0, 0.9, 0.004, 10)
    assert object_cut(quiet, cfg) == 0.004                  # max(0.008, 3 x 0.001) / 2
    assert abs(object_cut(noisy, cfg) - 0.006) < 1e-12      # max(0.008, 3 x 0.004) / 2: the fit's own noise
    fd = FrameData("f0", np.ones((4, 5)), np.zeros((4, 5, 3), np.uint8), None, np.eye(4), np.zeros((0, 3)),
                   np.zeros(0, int), np.zeros(0, bool))
    p = Proposal("c/a", "a", ObjectFrame(np.zeros(3), np.array([0, 0, 1.0]), 0.1, 0.1), np.zeros(3), 3,
                 {"f0": np.array([0, 1, 2])})
    scene = SceneObjects(SimpleNamespace(intrinsics=SimpleNamespace(K=K)), quiet, [fd], [p], 0.004)
    assert [v.cut_m for v in scene.views(p)] == [0.004]


def test_a_flush_part_reads_empty_and_the_band_discounts_it_as_defined():
    depth, own, rgb, T, frame, grid = _scene()
    view = View(depth, rgb, K, T, own, cut_m=CUT)
    off = lift([view], frame, grid).reshape(6, -1)
    for factor in (1.0, 2.5):
        on = lift([view], frame, replace(grid, plane_band=factor)).reshape(6, -1)
        q = band_fractions(grid, frame, factor * CUT)
        # the definition: one view, weight 1 where seen, 1 - q where it reads seen, not free, no surface
        empty = (off[2] > 0) & (off[1] == 0) & (off[0] == 0)
        np.testing.assert_allclose(on[2], off[2] * (1 - q * empty), atol=1e-6)
        np.testing.assert_array_equal(on[[0, 1, 3, 4, 5]], off[[0, 1, 3, 4, 5]])   # what the cells read stays
        above = q == 0
        np.testing.assert_array_equal(on[:, above], off[:, above])
    # the plate: its cells in the bottom bin read "seen, nothing here" (the cut took its readings) and the band
    # lowers their weight; cells the ray passed through (free) keep theirs
    R, A, H = grid.shape
    rho = (np.arange(R) + 0.5) / R * grid.radial_margin * frame.radius
    phi = (np.arange(A) + 0.5) / A * 2 * np.pi
    x, y = rho[:, None] * np.cos(phi)[None], rho[:, None] * np.sin(phi)[None]
    over_plate = np.zeros((R, A, H), bool)
    over_plate[..., 0] = (x > PLATE[0][0] + 0.008) & (x < PLATE[1][0]) & (np.abs(y) < 0.03)
    over_plate = over_plate.reshape(-1)
    on = lift([view], frame, replace(grid, plane_band=1.0)).reshape(6, -1)
    seen_plate = over_plate & (off[2] > 0)
    flush = seen_plate & (off[0] == 0) & (off[1] == 0)            # the flush part: no surface, not free
    assert flush.sum() >= 10 and flush.sum() >= 0.8 * seen_plate.sum()
    q0 = CUT / (grid.height_margin * frame.height / H)
    np.testing.assert_allclose(off[2, flush], 1.0)
    np.testing.assert_allclose(on[2, flush], 1 - q0, atol=1e-6)
    free = off[1] > 0
    assert free.sum() > 50 and (on[2, free] == off[2, free]).all()


def test_two_views_average_with_the_discounted_weight():
    """Fused views: the observation count sums the weights and the surface / free means divide by it."""
    depth, own, rgb, T, frame, grid = _scene()
    T2 = look_at(np.array([-0.30, 0.25, 0.30]), np.array([0.0, 0.0, 0.03]), np.array([0.0, 0.0, 1.0]))
    depth2, ids2 = _cast(T2, [BODY, PLATE])
    v2, u2 = np.mgrid[0:depth2.shape[0], 0:depth2.shape[1]]
    ray = np.stack([(u2 - K[0, 2]) / K[0, 0], (v2 - K[1, 2]) / K[1, 1], np.ones_like(u2, float)], -1) * depth2[..., None]
    h2 = (ray.reshape(-1, 3) @ T2[:3, :3].T + T2[:3, 3])[:, 2]
    own2 = np.flatnonzero((ids2.reshape(-1) > 0) & (h2 > CUT))
    views = [View(depth, rgb, K, T, own, cut_m=CUT), View(depth2, rgb, K, T2, own2, cut_m=CUT)]
    g = replace(grid, plane_band=2.0)
    one = [lift([v], frame, grid).reshape(6, -1) for v in views]
    got = lift(views, frame, g).reshape(6, -1)
    q = band_fractions(grid, frame, 2.0 * CUT)
    w = [o[2] * (1 - q * ((o[2] > 0) & (o[1] == 0) & (o[0] == 0))) for o in one]
    np.testing.assert_allclose(got[2], w[0] + w[1], atol=1e-6)
    n = np.maximum(w[0] + w[1], 1.0)
    for c in (0, 1):      # surface, free: the weighted mean of the views' readings
        np.testing.assert_allclose(got[c], (w[0] * one[0][c] + w[1] * one[1][c]) / n, atol=1e-6)
    assert ((w[0] + w[1] > 0) & (w[0] + w[1] < 2) & (np.abs(got[1] - (one[0][1] + one[1][1]) / 2) > 0.05)).any()
