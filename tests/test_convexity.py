"""Local convexity (Stein et al., CVPR 2014) on hand-made point sets with known answers."""
from __future__ import annotations

import numpy as np

from protomine.ingest.convexity import convex_parts, stands_alone, voxel_normals


def _sphere(c, r, n=1500, seed=0):
    v = np.random.default_rng(seed).normal(size=(n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    return np.asarray(c) + r * v


def _parts(pts, cams):
    views = cams - pts
    views /= np.linalg.norm(views, axis=1, keepdims=True)
    lab = np.zeros(len(pts), int)
    n = voxel_normals(pts, views, lab, radius=0.008)
    parts, _ = convex_parts(pts, n, lab, adjacency=0.006, concave_deg=15.0)
    sizes = np.bincount(parts)
    return (sizes >= 0.2 * len(pts) / 2).sum()


def test_one_sphere_is_one_convex_part():
    pts = _sphere((0, 0, 0.05), 0.04)
    assert _parts(pts, pts * 3.0) == 1            # viewed from outside: normals point away from the centre


def _fold(sign: float) -> int:
    """Parts of two 5 x 6 cm planes meeting at 90 degrees along the y axis, z = sign |x|, seen from above."""
    g = np.stack(np.meshgrid(np.arange(-0.05, 0.05, 0.003), np.arange(0, 0.06, 0.003), indexing="ij"), -1).reshape(-1, 2)
    pts = np.c_[g, sign * np.abs(g[:, 0])]
    views = np.tile([0, 0, 1.0], (len(pts), 1))
    lab = np.zeros(len(pts), int)
    n = voxel_normals(pts, views, lab, radius=0.0084)
    parts, _ = convex_parts(pts, n, lab, adjacency=0.006, concave_deg=15.0)
    return int((np.bincount(parts) >= 0.3 * len(pts) / 2).sum())


def test_a_groove_is_cut_and_a_ridge_is_not():
    # the definition: (n_i - n_j) . (x_i - x_j) < 0 is concave (Stein et al. 2014, eq. 1-2)
    assert _fold(+1.0) == 2          # a V groove, as where two objects meet
    assert _fold(-1.0) == 1          # a roof ridge, as a box's edge


def test_stands_alone_by_the_centre_of_mass_over_the_support_polygon():
    rng = np.random.default_rng(0)
    # a post on a disc: centre of mass over the disc
    disc = rng.uniform(-0.04, 0.04, (400, 2))
    disc = disc[np.linalg.norm(disc, axis=1) < 0.04]
    post = np.c_[rng.normal(0, 0.005, (300, 2))]
    xy = np.concatenate([disc, post])
    h = np.concatenate([np.full(len(disc), 0.005), rng.uniform(0, 0.1, 300)])
    assert stands_alone(xy, h, support_band=0.025, inset=0.003)
    # a slanted leg: its foot is a small patch, its mass leans away from it
    t = rng.uniform(0, 1, 300)
    leg_xy = np.c_[0.06 * t, np.zeros(300)] + rng.normal(0, 0.002, (300, 2))
    assert not stands_alone(leg_xy, 0.1 * t, support_band=0.025, inset=0.003)


# --- per-frame segments (occluding edges and creases in one depth image) -----------------------------------

def _image(zfun, w=80, h=60, f=100.0):
    """A depth image (h, w) of the surface z = zfun(X) (camera frame, X = (u - cx) z / f solved by iteration)."""
    K = np.array([[f, 0, (w - 1) / 2], [0, f, (h - 1) / 2], [0, 0, 1.0]])
    u = np.tile(np.arange(w, dtype=float), (h, 1))
    z = np.full((h, w), 0.5)
    for _ in range(50):                         # fixed point: z = zfun((u - cx) z / f)
        z = zfun((u - K[0, 2]) * z / f)
    return z, K


def _segments(z, K):
    from protomine.ingest.convexity import frame_segments
    seg = frame_segments(z, np.ones(z.shape, bool), K, 15.0)
    sizes = np.bincount(seg[seg >= 0])
    return seg, int((sizes >= 0.2 * z.size / 2).sum())


def test_frame_segments_cut_a_groove_and_an_occluding_edge_but_not_a_ridge():
    # the definition of a concave connection as in Stein et al. 2014 (eq. 1-2), on the image grid: a V groove
    # (the surface folds towards the camera on both sides) is cut, a roof ridge (a box's edge) is not
    groove, K = _image(lambda X: 0.5 - 0.8 * np.abs(X))
    ridge, _ = _image(lambda X: 0.4 + 0.8 * np.abs(X))
    assert _segments(groove, K)[1] == 2
    assert _segments(ridge, K)[1] == 1
    # an occluding edge: a near half (0.42 m) in front of a far half (0.5 m); the far side's edge readings
    # are the boundary, so the near surface keeps its readings up to one ring from its edge
    step, _ = _image(lambda X: np.where(X < 0, 0.42, 0.5))
    seg, n = _segments(step, K)
    assert n == 2
    cols = np.flatnonzero(seg[30] < 0)
    # near half: u <= 39 (X < 0); it loses only the one ring at u = 39, the far side VIEW_STEP pixels + a ring
    assert seg[30, 38] >= 0 and seg[30, 39] < 0
    assert seg[30, 38] != seg[30, 45] and seg[30, 45] >= 0
    assert cols.tolist() == [0, 39, 40, 41, 42, 79], cols               # and the image border's ring


def test_view_votes_cut_pairs_the_frames_put_apart():
    from protomine.ingest.convexity import view_disagreement, view_votes
    # 4 voxels seen in 3 frames: voxels 0 and 1 share a segment in every frame; 1 and 2 in one frame of the
    # two that see both; voxel 3 lies on a boundary (-1) in every frame
    inv = np.array([0, 1, 0, 1, 2, 0, 1, 2, 3, 3])
    frame = np.array([0, 0, 1, 1, 1, 2, 2, 2, 0, 1])
    segment = np.array([5, 5, 2, 2, 2, 7, 7, 8, -1, -1])
    votes = view_votes(inv, segment, frame, 4)
    cut = view_disagreement(np.array([[0, 1], [1, 2], [0, 2], [2, 3]]), votes)
    # pair (1, 2): agree in 1 of 2 frames = 0.5, not below VIEW_AGREE; (0, 2) likewise; (2, 3): 3 has no vote
    assert cut.tolist() == [False, False, False, True]
    segment2 = segment.copy()
    segment2[4] = 3                                           # now frame 1 puts 2 apart from 0 and 1 as well
    cut = view_disagreement(np.array([[0, 1], [1, 2]]), view_votes(inv, segment2, frame, 4))
    assert cut.tolist() == [False, True]


def _block(lo, hi, step=0.004):
    axes = [np.arange(a, b + 1e-9, step) for a, b in zip(lo, hi)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 3)


def test_a_lid_rests_on_its_own_walls_not_on_a_touching_neighbour_of_another_colour():
    """A box cut into its lid and two walls (creases), and a block of another colour that touches one wall
    and reaches under the lid's overhang.  The lid cannot stand alone; it rests on both walls (one object)
    and the block stays apart.  Expected answer by construction."""
    from protomine.ingest.convexity import join_parts
    pieces = [_block((-0.07, -0.04, 0.062), (0.07, 0.04, 0.066)),        # lid, 2 cm overhang
              _block((-0.05, -0.04, 0.0), (-0.042, 0.04, 0.058)),        # wall
              _block((0.042, -0.04, 0.0), (0.05, 0.04, 0.058)),          # wall
              _block((0.054, -0.04, 0.0), (0.12, 0.04, 0.056))]          # neighbour, partly under the overhang
    pts = np.concatenate(pieces)
    parts = np.concatenate([np.full(len(p), i) for i, p in enumerate(pieces)])
    rgb = np.array([[150, 100, 50]] * 3 + [[50, 80, 180]], float)[parts]
    lab = join_parts(pts, parts, pts[:, :2], pts[:, 2], link_radius=0.012, reach=0.036, support_band=0.025,
                     inset=0.003, min_voxels=30, colours=rgb)
    assert lab[parts == 0][0] == lab[parts == 1][0] == lab[parts == 2][0]
    assert lab[parts == 3][0] != lab[parts == 0][0]
    assert len(np.unique(lab)) == 2


def _surface_of_box(lo, hi, step=0.002):
    """Points on the faces of an axis-aligned box seen from above and the sides (top and four walls, no bottom)."""
    g = _block(lo, hi, step)
    lo, hi = np.asarray(lo), np.asarray(hi)
    on = (np.isclose(g[:, 2], g[:, 2].max()) | np.isclose(g[:, 0], g[:, 0].min()) | np.isclose(g[:, 0], g[:, 0].max())
          | np.isclose(g[:, 1], g[:, 1].min()) | np.isclose(g[:, 1], g[:, 1].max()))
    return g[on]


def test_column_centre_is_the_centre_of_mass_of_the_solid_under_the_surface():
    """A step: a 4 x 4 x 8 cm block beside a 8 x 4 x 2 cm slab, both on the plane, sampled on their visible
    faces only.  Centre of mass of uniform solids from the definition (volume-weighted mean of the box
    centres): x = (128 cm3 x 2 cm + 64 cm3 x 8 cm) / 192 cm3 = 4 cm.  The column-filled centre finds it within
    a cell; the mean of the surface points, weighing by area, does not."""
    from protomine.ingest.convexity import column_centre
    boxes = [((0.0, 0.0, 0.0), (0.04, 0.04, 0.08)), ((0.04, 0.0, 0.0), (0.12, 0.04, 0.02))]
    pts = np.unique(np.concatenate([_surface_of_box(lo, hi) for lo, hi in boxes]).round(6), axis=0)
    vol = [np.prod(np.subtract(hi, lo)) for lo, hi in boxes]
    true_x = sum(v * 0.5 * (lo[0] + hi[0]) for v, (lo, hi) in zip(vol, boxes)) / sum(vol)
    assert abs(true_x - 0.04) < 1e-9
    cx = column_centre(pts[:, :2], pts[:, 2], 0.004)[0]
    assert abs(cx - true_x) < 0.004
    assert abs(pts[:, 0].mean() - true_x) > abs(cx - true_x)


def test_chroma_normalises_each_colour_before_the_median():
    """Two lit and shaded reds and a rim of table colour: the chromaticity of red (200, 20, 20) / 240 by
    definition; a median of the raw channels would give (150, 20, 20) / 190, mixing the table's red channel
    with the reds' green and blue."""
    from protomine.ingest.convexity import _chroma, one_colour
    rgb = np.array([[200, 20, 20], [100, 10, 10], [150, 150, 100]], float)
    np.testing.assert_allclose(_chroma(rgb), np.array([200, 20, 20]) / 240.0)
    assert not one_colour(rgb, 0.08)                       # a third of them is another colour
    assert one_colour(np.array([[200, 20, 20], [100, 10, 10], [202, 22, 19]], float), 0.08)


def test_a_mallet_leaning_on_a_post_of_another_colour_stays_an_object():
    """A 4 cm cube head on the plane with its handle raised to rest on a 20 cm post of another colour: the head
    stands by itself, head and handle together do not (the handle's weight is past the head's edge).  With
    colours they stay two objects (the handle leans on the post); without, the mallet is taken as a piece of
    the post, as before.  Expected answer by construction."""
    from protomine.ingest.convexity import join_parts
    t = np.arange(0.0, 1.0 + 1e-9, 0.02)
    axis = np.array([0.02, 0.0, 0.03]) + t[:, None] * np.array([0.09, 0.0, 0.11])       # head's top edge -> post
    ring = np.array([(0, dy, dz) for dy in (-0.004, 0.0, 0.004) for dz in (-0.004, 0.0, 0.004)])
    pieces = [_block((-0.02, -0.02, 0.0), (0.02, 0.02, 0.04)),                             # head
              (axis[:, None, :] + ring[None]).reshape(-1, 3),                              # handle
              _block((0.112, -0.016, 0.0), (0.144, 0.016, 0.2))]                            # post
    pts = np.concatenate(pieces)
    parts = np.concatenate([np.full(len(p), i) for i, p in enumerate(pieces)])
    kw = dict(link_radius=0.012, reach=0.036, support_band=0.025, inset=0.003, min_voxels=30, cell=0.004)
    assert stands_alone(pts[parts == 0, :2], pts[parts == 0, 2], support_band=0.025, inset=0.003, cell=0.004)
    m = parts <= 1
    assert not stands_alone(pts[m, :2], pts[m, 2], support_band=0.025, inset=0.003, cell=0.004)
    rgb = np.array([[200, 40, 20]] * 2 + [[120, 120, 125]], float)[parts]
    lab = join_parts(pts, parts, pts[:, :2], pts[:, 2], colours=rgb, **kw)
    assert lab[parts == 0][0] == lab[parts == 1][0] != lab[parts == 2][0]
    assert len(np.unique(join_parts(pts, parts, pts[:, :2], pts[:, 2], **kw))) == 1


def _two_patches_and_a_bridge():
    """Two flat 4 x 4 cm patches (z = 0, normals up, 4 mm grid) 8 mm apart along x, so no pair of them is within
    the 6 mm adjacency, joined by one voxel between them at x = 0 (4 mm from either patch): a voxel at the
    contact of two touching objects, mixing readings of both.  Geometry alone (flat, no crease) keeps them one
    part."""
    g = np.stack(np.meshgrid(np.arange(0.0, 0.04 + 1e-9, 0.004), np.arange(0.0, 0.04 + 1e-9, 0.004), indexing="ij"),
                 -1).reshape(-1, 2)
    left = np.c_[g[:, 0] - 0.044, g[:, 1], np.zeros(len(g))]
    right = np.c_[g[:, 0] + 0.004, g[:, 1], np.zeros(len(g))]
    pts = np.concatenate([left, right, [[0.0, 0.02, 0.0]]])
    side = np.r_[np.zeros(len(g), int), np.ones(len(g), int), 2]
    normals = np.tile([0.0, 0.0, 1.0], (len(pts), 1))
    return pts, side, normals


def test_a_colour_step_cuts_the_bridge_between_two_objects_of_other_colours():
    """The definition of chromaticity, (r, g, b) / (r + g + b): a red patch (200, 40, 20) and a blue one
    (30, 60, 190) differ by 0.6; the mixed bridge voxel (their mean, 115, 50, 105) lies 0.3 from either.
    With colours the bridge is cut (two parts, the bridge voxel taken by one side); without, one part.
    Expected answer by construction."""
    from protomine.ingest.convexity import colour_steps
    pts, side, normals = _two_patches_and_a_bridge()
    lab = np.zeros(len(pts), int)
    rgb = np.array([[200, 40, 20], [30, 60, 190], [115, 50, 105]], float)[side]
    one, _ = convex_parts(pts, normals, lab, adjacency=0.006, concave_deg=15.0)
    assert len(np.unique(one)) == 1
    two, pairs = convex_parts(pts, normals, lab, adjacency=0.006, concave_deg=15.0, colours=rgb)
    assert len(np.unique(two)) == 2
    assert len(np.unique(two[side == 0])) == 1 and len(np.unique(two[side == 1])) == 1
    assert two[side == 0][0] != two[side == 1][0]
    # only the bridge's connections are colour steps: its neighbours within 6 mm, 3 on either side (4 mm and
    # 4 sqrt(2) = 5.7 mm away)
    step = colour_steps(rgb, pairs)
    assert step.sum() == 6 and (pairs[step] == len(pts) - 1).any(axis=1).all()


def test_shading_and_dark_readings_do_not_cut_one_colour():
    """One object's colour under shading: RGB scaled by 0.25-1.0 across the patches (chromaticity unchanged
    by a common factor, by definition), the bridge voxel the same colour, and a few readings too dark to have
    a chromaticity (sum under DARK_RGB, any hue): one part."""
    pts, side, normals = _two_patches_and_a_bridge()
    lab = np.zeros(len(pts), int)
    shade = 0.25 + 0.75 * (pts[:, 0] - pts[:, 0].min()) / np.ptp(pts[:, 0])
    rgb = shade[:, None] * np.array([200.0, 40.0, 20.0])
    rgb[::17] = [5.0, 30.0, 10.0]                       # dark: sum 45 < DARK_RGB, a greenish hue
    parts, _ = convex_parts(pts, normals, lab, adjacency=0.006, concave_deg=15.0, colours=rgb)
    assert len(np.unique(parts)) == 1


def _patch_and_thin_leg():
    """A red 4 x 4 cm patch (z = 0, normals up, 4 mm grid) that one frame sees as one segment, and, all of them on
    a boundary in that frame (unvoted: the view check cuts every pair they are in), a blue thin leg (2 x 40
    voxels running off the patch's edge 4 mm away, like a tripod's leg on an occluding edge in every frame), a
    blue stub of 6 voxels just beyond the patch's top edge (nearer the patch than the leg, 18 mm from the leg),
    and a grey patch of 12 voxels of the table's noise beside the patch, far from the leg."""
    s = 0.004
    g = np.stack(np.meshgrid(np.arange(11) * s, np.arange(11) * s, indexing="ij"), -1).reshape(-1, 2)
    leg = np.stack(np.meshgrid(0.044 + np.arange(40) * s, [0.032, 0.036], indexing="ij"), -1).reshape(-1, 2)
    stub = np.stack(np.meshgrid([0.036, 0.040], [0.044, 0.048, 0.052], indexing="ij"), -1).reshape(-1, 2)
    noise = np.stack(np.meshgrid([-0.004, -0.008, -0.012], [0.0, 0.004, 0.008, 0.012], indexing="ij"), -1).reshape(-1, 2)
    xy = np.concatenate([g, leg, stub, noise])
    pts = np.c_[xy, np.zeros(len(xy))]
    what = np.r_[np.zeros(len(g), int), np.ones(len(leg), int), np.full(len(stub), 2), np.full(len(noise), 3)]
    rgb = np.array([[200, 40, 20], [30, 60, 190], [30, 60, 190], [120, 120, 120]], float)[what]
    return pts, what, rgb


def test_regrouped_crumbs_keep_a_thin_leg_apart_from_its_neighbour():
    """[ingest] crumb_regroup.  Without it every unvoted voxel is a crumb taken by its nearest big voxel: the
    leg, the stub and the noise all go to the red patch (one part).  With it the leg's 80 crumbs, linked where
    the fused cloud shows no cut (flat, one colour), are a part of their own; the stub (6 < REGROUP_VOXELS) joins
    the nearest voxel of its own colour within CRUMB_REACH_M (the leg), and the grey noise, with no voxel of
    its colour near, its nearest voxel (the patch).  Expected answer by construction; the partition is compared
    with scikit-learn's adjusted_rand_score (reference implementation)."""
    from sklearn.metrics import adjusted_rand_score
    from protomine.ingest.convexity import view_votes
    pts, what, rgb = _patch_and_thin_leg()
    V = len(pts)
    votes = view_votes(np.arange(V), np.where(what == 0, 0, -1), np.zeros(V, int), V)
    normals = np.tile([0.0, 0.0, 1.0], (V, 1))
    lab = np.zeros(V, int)
    off, _ = convex_parts(pts, normals, lab, adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb)
    assert len(np.unique(off)) == 1
    on, _ = convex_parts(pts, normals, lab, adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb, regroup=True)
    want = np.where(what == 3, 0, np.minimum(what, 1))      # patch + noise, leg + stub
    assert adjusted_rand_score(want, on) == 1.0


def test_a_run_of_crumbs_mixing_two_colours_is_not_a_part():
    """A red and a blue 4 x 4 cm patch (voted: one segment each) 24 cm apart, joined by a line of 60 unvoted
    crumbs whose RGB runs from red to blue in small steps (no colour step cuts it: the readings where two
    objects touch, mixed): the run is long enough (>= REGROUP_VOXELS) but not of one colour, so it stays crumbs
    and each goes to a patch; two parts, not three.  Expected answer by construction."""
    from protomine.ingest.convexity import view_votes
    s = 0.004
    g = np.stack(np.meshgrid(np.arange(11) * s, np.arange(11) * s, indexing="ij"), -1).reshape(-1, 2)
    run = np.c_[0.044 + np.arange(60) * s, np.full(60, 0.02)]
    xy = np.concatenate([g, run, g + [0.284, 0.0]])
    pts = np.c_[xy, np.zeros(len(xy))]
    red, blue = np.array([200.0, 40.0, 20.0]), np.array([30.0, 60.0, 190.0])
    t = np.linspace(0.0, 1.0, 60)[:, None]
    rgb = np.concatenate([np.tile(red, (len(g), 1)), (1 - t) * red + t * blue, np.tile(blue, (len(g), 1))])
    V = len(pts)
    seg = np.r_[np.zeros(len(g), int), np.full(60, -1), np.ones(len(g), int)]
    votes = view_votes(np.arange(V), seg, np.zeros(V, int), V)
    normals = np.tile([0.0, 0.0, 1.0], (V, 1))
    parts, _ = convex_parts(pts, normals, np.zeros(V, int), adjacency=0.006, concave_deg=15.0, votes=votes,
                            colours=rgb, regroup=True)
    assert len(np.unique(parts)) == 2
    assert parts[0] != parts[-1]


def _strip_between(a_rgb, leg_rgb, b_rgb):
    """A 4 x 4 cm patch A (x 0-4 cm, 4 mm grid, one frame sees it as one segment), a 4 x 4 cm patch B 24 cm
    along x (its own segment) and between them a strip 2 voxels wide (x 4.4-23.6 cm, 98 voxels), all of it on
    a boundary in that frame (unvoted: a thin part on an edge in every frame, like a tripod's leg), flat: its
    near end 4 mm from A, its far end 4 mm from B.  Colours A / strip / B given as RGB."""
    from protomine.ingest.convexity import view_votes
    s = 0.004
    g = np.stack(np.meshgrid(np.arange(11) * s, np.arange(11) * s, indexing="ij"), -1).reshape(-1, 2)
    strip = np.stack(np.meshgrid(0.044 + np.arange(49) * s, [0.016, 0.020], indexing="ij"), -1).reshape(-1, 2)
    xy = np.concatenate([g, strip, g + [0.24, 0.0]])
    what = np.r_[np.zeros(len(g), int), np.ones(len(strip), int), np.full(len(g), 2)]
    pts = np.c_[xy, np.zeros(len(xy))]
    rgb = np.array([a_rgb, leg_rgb, b_rgb], float)[what]
    V = len(pts)
    votes = view_votes(np.arange(V), np.array([0, -1, 1])[what], np.zeros(V, int), V)
    return pts, what, rgb, votes


def test_grown_crumbs_take_the_body_their_surface_comes_from():
    """[ingest] crumb_grow.  A blue strip of crumbs runs from a blue body B (flat, one colour: the surface goes on
    unbroken) to 4 mm beside a red patch A (a colour step cuts it from A).  By nearest voxel (neither switch) the
    strip's half nearer A goes to A; as a run of its own (crumb_regroup) it is a third part; grown along the
    surface it is all B's: two parts, A and B with the strip.  Expected answer by construction; partitions
    compared with scikit-learn's adjusted_rand_score (reference implementation)."""
    from sklearn.metrics import adjusted_rand_score
    red, blue = [200, 40, 20], [30, 60, 190]
    pts, what, rgb, votes = _strip_between(red, blue, blue)
    V = len(pts)
    normals, lab = np.tile([0.0, 0.0, 1.0], (V, 1)), np.zeros(V, int)
    kw = dict(adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb)
    want = np.minimum(what, 1)                                   # A | strip + B
    near, _ = convex_parts(pts, normals, lab, **kw)
    assert adjusted_rand_score(want, near) < 0.9
    assert len(np.unique(convex_parts(pts, normals, lab, regroup=True, **kw)[0])) == 3
    grown, _ = convex_parts(pts, normals, lab, grow=True, **kw)
    assert adjusted_rand_score(want, grown) == 1.0


def test_grown_crumbs_stop_at_a_close_colour(monkeypatch):
    """[ingest] crumb_grow's colour test.  A red patch A and an orange body B with an orange strip of crumbs
    between them: red and orange chromaticities lie 0.05 apart, under the colour step (0.08: no cut between
    the strip and A) but over CRUMB_CHROMA (0.03), so A may not grow into the strip and all of it is B's.
    With the test widened (CRUMB_CHROMA 1.0) A takes the strip's half nearer it.  Expected answers by
    construction (chromaticity r / (r + g + b): red (0.769, 0.154, 0.077), orange (0.735, 0.191, 0.074))."""
    import protomine.ingest.convexity as cx
    red, orange = [200, 40, 20], [200, 52, 20]
    pts, what, rgb, votes = _strip_between(red, orange, orange)
    V = len(pts)
    normals, lab = np.tile([0.0, 0.0, 1.0], (V, 1)), np.zeros(V, int)
    kw = dict(adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb, grow=True)
    parts, _ = convex_parts(pts, normals, lab, **kw)
    assert len(np.unique(parts)) == 2
    assert (parts[what == 1] == parts[what == 2][0]).all() and parts[0] != parts[-1]
    monkeypatch.setattr(cx, "CRUMB_CHROMA", 1.0)
    wide, _ = convex_parts(pts, normals, lab, **kw)
    strip = wide[what == 1]
    assert (strip == wide[0]).sum() >= 40 and (strip == wide[-1]).sum() >= 40


def _grow_naive(points, pairs, fused, comp, small, colours, tol, dark):
    """Reference twin of convexity._grow_crumbs from its definition: per part, Bellman-Ford relaxation (repeat
    over every admissible pair until no distance drops) from its voxels next to a crumb, through crumbs whose
    chromaticity r / (r + g + b) lies within tol of the median of the part's own bright voxels' (or that are
    too dark to have one); each crumb to the part of the least distance (ties: the lower part id)."""
    V = len(points)
    best, take = [float("inf")] * V, list(comp)
    def chroma(c):
        t = float(sum(c))
        return [c[0] / t, c[1] / t, c[2] / t]
    parts = sorted({int(comp[v]) for v in range(V) if not small[v]})
    for p in parts:
        own = [v for v in range(V) if comp[v] == p and not small[v]]
        bright = [chroma(colours[v]) for v in own if sum(colours[v]) >= dark]
        med = [float(np.median([c[k] for c in bright])) for k in range(3)]
        def open_(v):
            if comp[v] == p and not small[v]:
                return True
            if not small[v]:
                return False
            if sum(colours[v]) < dark:
                return True
            c = chroma(colours[v])
            return sum((c[k] - med[k]) ** 2 for k in range(3)) ** 0.5 <= tol
        edges = []
        for (a, b), f in zip(pairs, fused):
            if f or not (small[a] or small[b]) or not (open_(a) and open_(b)):
                continue
            w = max(float(np.linalg.norm(points[a] - points[b])), 1e-9)
            edges.append((a, b, w))
        dist = [float("inf")] * V
        for a, b, _ in edges:
            for v in (a, b):
                if comp[v] == p and not small[v]:
                    dist[v] = 0.0
        changed = True
        while changed:
            changed = False
            for a, b, w in edges:
                for x, y in ((a, b), (b, a)):
                    if dist[x] + w < dist[y]:
                        dist[y] = dist[x] + w
                        changed = True
        for v in range(V):
            if small[v] and dist[v] < best[v]:
                best[v], take[v] = dist[v], p
    reached = [small[v] and best[v] < float("inf") for v in range(V)]
    return np.array([take[v] if reached[v] else comp[v] for v in range(V)]), np.array(
        [small[v] and not reached[v] for v in range(V)])


def test_grow_crumbs_matches_its_naive_twin():
    """_grow_crumbs (sparse Dijkstra per part) against _grow_naive (Bellman-Ford from the definition) on random
    voxel sets: 3 parts, a third of the voxels crumbs, a fifth of the pairs cut, colours from three hues
    with noise and a few too dark."""
    from scipy.spatial import cKDTree
    from protomine.ingest.convexity import CRUMB_CHROMA, DARK_RGB, _grow_crumbs
    for seed in range(4):
        rng = np.random.default_rng(seed)
        V = 90
        pts = rng.uniform(0.0, 0.05, size=(V, 3))
        pairs = cKDTree(pts).query_pairs(0.012, output_type="ndarray")
        fused = rng.uniform(size=len(pairs)) < 0.2
        small = rng.uniform(size=V) < 0.35
        comp = np.where(small, np.arange(V) + 100, rng.integers(0, 3, V))
        hue = np.array([[200.0, 40.0, 20.0], [200.0, 48.0, 20.0], [30.0, 60.0, 190.0]])
        rgb = hue[rng.integers(0, 3, V)] + rng.normal(0.0, 4.0, (V, 3))
        rgb[rng.uniform(size=V) < 0.1] = [10.0, 10.0, 10.0]
        rgb = np.clip(rgb, 1.0, 255.0)
        got_c, got_s = _grow_crumbs(pts, pairs, fused, comp, small, rgb)
        want_c, want_s = _grow_naive(pts, pairs, fused, comp, small, rgb, CRUMB_CHROMA, DARK_RGB)
        assert (got_s == want_s).all()
        assert (got_c == want_c).all()
        assert 0 < (small & ~got_s).sum() < small.sum()        # some crumbs grown, some not: the case is not trivial


def _contact_naive(inv, colours, n_voxels, step, dark):
    """Reference twin of convexity.contact_voxels from its definition, one voxel at a time: its bright readings'
    chromaticities r / (r + g + b); the one farthest from their mean; the readings within step / 2 of it on one
    side, the rest on the other; mixed when both sides hold a reading and their means lie more than step apart."""
    out = []
    for v in range(n_voxels):
        c = [[x / float(sum(rgb)) for x in rgb] for k, rgb in zip(inv, colours) if k == v and sum(rgb) >= dark]
        if not c:
            out.append(False)
            continue
        mean = [sum(x[k] for x in c) / len(c) for k in range(3)]
        dist = [sum((x[k] - mean[k]) ** 2 for k in range(3)) ** 0.5 for x in c]
        far = c[int(np.argmax(dist))]
        a = [x for x in c if sum((x[k] - far[k]) ** 2 for k in range(3)) ** 0.5 <= step / 2]
        b = [x for x in c if sum((x[k] - far[k]) ** 2 for k in range(3)) ** 0.5 > step / 2]
        if not a or not b:
            out.append(False)
            continue
        ma = [sum(x[k] for x in a) / len(a) for k in range(3)]
        mb = [sum(x[k] for x in b) / len(b) for k in range(3)]
        out.append(sum((ma[k] - mb[k]) ** 2 for k in range(3)) ** 0.5 > step)
    return np.array(out)


def test_contact_voxels_match_their_naive_twin_and_flag_two_colour_voxels():
    """[ingest] crumb_grow's mixed voxels.  Readings of one colour with noise (sigma 6 of 255 a channel) are
    never mixed; a voxel holding readings of a red and a blue object is, whichever side holds more; a voxel of
    dark readings only has no chromaticity and is not.  The vectorised function equals its naive twin on 300
    random voxels of one, two or three colours.  Expected answers by construction."""
    from protomine.ingest.convexity import COLOUR_STEP, DARK_RGB, contact_voxels
    rng = np.random.default_rng(3)
    red, blue, dark = np.array([200.0, 40, 20]), np.array([30.0, 60, 190]), np.array([10.0, 12, 9])
    inv = np.repeat(np.arange(5), 6)
    rgb = np.concatenate([np.tile(red, (6, 1)),                                   # 0: red
                          np.r_[np.tile(red, (3, 1)), np.tile(blue, (3, 1))],    # 1: half and half
                          np.r_[np.tile(red, (5, 1)), blue[None]],               # 2: one blue reading
                          np.tile(dark, (6, 1)),                                  # 3: too dark
                          np.r_[np.tile(blue, (5, 1)), dark[None]]])             # 4: blue and a dark one
    rgb = np.clip(rgb + rng.normal(0, 6, rgb.shape), 0, 255)
    assert contact_voxels(inv, rgb, 5).tolist() == [False, True, True, False, False]
    palette = np.array([red, blue, [60.0, 180, 40]])
    inv = rng.integers(0, 300, 2400)
    rgb = np.clip(palette[rng.integers(0, 3, 2400) * (rng.random(2400) < 0.3)] + rng.normal(0, 8, (2400, 3)), 0, 255)
    want = _contact_naive(inv.tolist(), rgb.tolist(), 300, COLOUR_STEP, DARK_RGB)
    got = contact_voxels(inv, rgb, 300)
    assert want.any() and not want.all()
    assert (got == want).all()


def test_mixed_voxels_at_a_flush_contact_do_not_bridge_two_colours():
    """[ingest] crumb_grow.  A red and an orange 4 x 4 cm patch meet flush (one flat surface, one frame sees both
    as one segment: no crease, no edge), with two voxels at the seam whose readings are half red, half orange:
    red (0.769, 0.154, 0.077) and orange (0.690, 0.241, 0.069) lie 0.118 apart in chromaticity, over the colour
    step (0.08), but the seam's mean (0.727, 0.200, 0.073) lies within 0.062 of either, so without the
    mixed-voxel test the seam bridges the two (one part); with it (``mixed``) its pairs are cut and the patches
    are two parts, the seam voxels crumbs that take a side.  Expected answer by construction."""
    from protomine.ingest.convexity import view_votes
    s = 0.004
    g = np.stack(np.meshgrid(np.arange(11) * s, np.arange(11) * s, indexing="ij"), -1).reshape(-1, 2)
    seam = np.array([[0.044, 0.016], [0.044, 0.020]])
    xy = np.concatenate([g, seam, g + [0.048, 0.0]])
    what = np.r_[np.zeros(len(g), int), np.ones(2, int), np.full(len(g), 2)]
    pts = np.c_[xy, np.zeros(len(xy))]
    red, orange = np.array([200.0, 40, 20]), np.array([200.0, 70, 20])
    rgb = np.array([red, (red + orange) / 2, orange])[what]
    V = len(pts)
    votes = view_votes(np.arange(V), np.zeros(V, int), np.zeros(V, int), V)
    normals, lab = np.tile([0.0, 0.0, 1.0], (V, 1)), np.zeros(V, int)
    kw = dict(adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb, grow=True)
    one, _ = convex_parts(pts, normals, lab, **kw)
    assert len(np.unique(one)) == 1
    two, _ = convex_parts(pts, normals, lab, mixed=what == 1, **kw)
    assert len(np.unique(two)) == 2 and two[0] != two[-1]
    assert (two[what == 0] == two[0]).all() and (two[what == 2] == two[-1]).all()


def test_crumbs_behind_a_crease_grow_into_their_own_colour_not_a_close_neighbour():
    """[ingest] crumb_grow's second growth.  The strip of crumbs between a red patch A and an orange body B is
    orange; B's surface turns up 30 degrees where it meets the strip (a concave crease: the fused cloud cuts
    B from the strip) and A's red lies 0.05 from orange in chromaticity (under the colour step: no cut, over
    CRUMB_CHROMA: A may not grow into it).  Along the unbroken surface no part reaches the strip; grown into
    across the creases by colour, all of it is B's (two parts).  Expected answer by construction."""
    red, orange = [200, 40, 20], [200, 52, 20]
    pts, what, rgb, votes = _strip_between(red, orange, orange)
    V = len(pts)
    a = np.deg2rad(30.0)
    normals = np.tile([0.0, 0.0, 1.0], (V, 1))
    normals[what == 2] = [-np.sin(a), 0.0, np.cos(a)]          # B's normal leans back towards the strip
    parts, _ = convex_parts(pts, normals, np.zeros(V, int), adjacency=0.006, concave_deg=15.0, votes=votes,
                            colours=rgb, grow=True)
    assert len(np.unique(parts)) == 2
    assert (parts[what == 1] == parts[what == 2][0]).all() and parts[0] != parts[-1]


def test_crumbs_handed_out_do_not_make_a_long_seam_with_another_object_of_one_colour():
    """[ingest] crumb_grow and the same-colour join.  Slabs along x, all one colour: post A | base P (its longest
    seam is with A: 2 of its 14 slices), whose last two slices are crumbs handed to it, and, 9 mm beyond P,
    the band of crumbs handed to another base B, whose own voxels start 24 mm from P and whose longest seam is
    with its own post B'.  Counted on every voxel, 1 of P's 14 slices lies on a seam with B (0.071, over
    SEAM_LONG 0.05): P joins A and B too, one object.  A seam of handed-out crumbs only is no long seam:
    {A, P} and {B, B'}.  With P's band its own voxels (a piece's own surface meets the other's crumbs, as
    where a handle's crease band was handed to the body) the seam counts again: one object.  Expected answers
    by construction."""
    from protomine.ingest.convexity import SEAM_LONG, _join_same_colour
    xs = lambda lo, hi: np.arange(lo, hi + 1e-9, 0.004)

    def slab(x):
        y, z = np.meshgrid(np.arange(0.0, 0.041, 0.004), np.arange(0.0, 0.041, 0.004), indexing="ij")
        return np.stack([np.full(y.size, x), y.ravel(), z.ravel()], 1)

    sets = [xs(-0.1005, -0.0605), xs(-0.056, -0.012), xs(-0.008, -0.004), xs(0.005, 0.009), xs(0.020, 0.060),
            xs(0.0645, 0.1045)]                                     # A, P, P's crumbs, B's crumbs, B, B'
    pts = [np.concatenate([slab(x) for x in xx]) for xx in sets]
    what = np.concatenate([np.full(len(p), i) for i, p in enumerate(pts)])
    pts = np.concatenate(pts)
    lab = np.array([0, 1, 1, 2, 2, 3])[what]
    rgb = np.tile([90.0, 160.0, 60.0], (len(pts), 1))
    assert 1 / 14 >= SEAM_LONG
    assert len(np.unique(_join_same_colour(pts, rgb, lab, 0.012))) == 1
    out = _join_same_colour(pts, rgb, lab, 0.012, (what == 2) | (what == 3))
    assert len(np.unique(out)) == 2
    assert out[what == 0][0] == out[what == 1][0] != out[what == 4][0] == out[what == 5][0]
    assert len(np.unique(_join_same_colour(pts, rgb, lab, 0.012, what == 3))) == 1


def test_convex_parts_reports_the_crumbs_it_hands_out():
    """``convex_parts(handed=)`` with crumb_grow: the strip of crumbs grown into from B (the test above's
    layout) is flagged, A's and B's own voxels are not; without crumb_grow nothing is filled in.  Expected
    answer by construction."""
    red, blue = [200, 40, 20], [30, 60, 190]
    pts, what, rgb, votes = _strip_between(red, blue, blue)
    V = len(pts)
    normals, lab = np.tile([0.0, 0.0, 1.0], (V, 1)), np.zeros(V, int)
    kw = dict(adjacency=0.006, concave_deg=15.0, votes=votes, colours=rgb)
    handed = np.zeros(V, bool)
    convex_parts(pts, normals, lab, grow=True, handed=handed, **kw)
    assert (handed == (what == 1)).all()
    handed[:] = False
    convex_parts(pts, normals, lab, handed=handed, **kw)
    assert not handed.any()
