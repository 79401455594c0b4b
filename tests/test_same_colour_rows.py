"""Touching objects of one colour without masks: the seam between two groups as the frames see it
(``convexity.seam_steps``), on hand-made depth images with known answers, and on rows of identical items of one
colour rendered by the demo renderer (the renderer's masks as truth)."""
from __future__ import annotations

import numpy as np
import pytest

from protomine.ingest.convexity import seam_steps
from same_colour_rows import separated, write_row_capture


def _seam_image(zfun, w=60, h=40, f=100.0):
    """One frame of the surface z = zfun(X) (camera = world frame), labelled 0 left of X = 0 and 1 right of it:
    voxels = the pixels' own points, and the readings ((h, w), pixels, voxels, depth) of ``seam_steps``."""
    cx, cy = (w - 1) / 2, (h - 1) / 2
    v, u = np.mgrid[0:h, 0:w].astype(np.float64)
    z = np.full((h, w), 0.5)
    for _ in range(50):                                  # fixed point: z = zfun((u - cx) z / f)
        z = zfun((u - cx) * z / f)
    X = (u - cx) * z / f
    pts = np.stack([X, (v - cy) * z / f, z], -1).reshape(-1, 3)
    lab = (X.reshape(-1) >= 0).astype(int)
    pix = np.arange(h * w)
    return pts, lab, [((h, w), pix, pix, z.reshape(-1))]


def test_an_occluding_edge_is_a_stepped_seam_and_a_groove_a_flat_one():
    # an occluding edge: the left group 2 cm in front of the right one (a depth step over VIEW_JUMP_M, 1 cm, the
    # occluding-edge test of frame_segments); a groove: the surface folds towards the camera on both sides of
    # X = 0 (a concave crease, Stein et al. 2014) and the depths meet there.  Expected answer by construction.
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.48, 0.5))
    st, fl = seam_steps(pts, lab, 0.03, rd)[(0, 1)]
    assert st > 0 and fl == 0, (st, fl)
    # pixel pairs 1, 2 and 3 apart across the seam: 1 + 2 + 3 per row, 40 rows (the horizontal pairs only)
    assert st == 40 * 6
    pts, lab, rd = _seam_image(lambda X: 0.5 - 0.8 * np.abs(X))
    st, fl = seam_steps(pts, lab, 0.03, rd)[(0, 1)]
    assert st == 0 and fl == 40 * 6, (st, fl)


def test_only_the_seam_counts_not_an_occlusion_away_from_it():
    # the two groups 10 cm apart in depth: one hides the other in the image, but no voxel of one lies within the
    # radius of the other, so there is no seam to judge (the pair is absent)
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.4, 0.5))
    assert seam_steps(pts, lab, 0.03, rd) == {}


def test_twins_apart_needs_a_stepped_seam_and_two_copies_of_one_size():
    # the stepped seam of the first test between two groups of 1200 voxels each: twins when their heights agree
    # (two copies of one item), not when one is 20% lower (TWIN_HEIGHT_RATIO 0.95), nor across a flat seam (a
    # groove: the crease inside one object), nor when one group holds 3x the other's voxels.  Expected answer
    # by construction (the 60 x 40 image of _seam_image, columns 30-59 right of X = 0).
    from protomine.ingest.convexity import twins_apart
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.48, 0.5))
    assert np.bincount(lab).tolist() == [1200, 1200]
    h = np.full(len(lab), 0.1)
    assert twins_apart(pts, h, lab, 0.03, rd, 0.4) == {(0, 1), (1, 0)}
    assert twins_apart(pts, np.where(lab == 0, 0.08, 0.1), lab, 0.03, rd, 0.4) == set()
    few = lab.copy()
    few[(lab == 1) & (np.arange(len(lab)) % 60 >= 54)] = 2          # group 1 keeps 24 of its 30 columns (0.8)
    assert twins_apart(pts, h, few, 0.03, rd, 0.4) == {(0, 1), (1, 0)}
    few[(lab == 1) & (np.arange(len(lab)) % 60 >= 33)] = 2          # 3 columns: 120 voxels, under TWIN_VOXELS
    assert twins_apart(pts, h, few, 0.03, rd, 0.4) == set()
    pts, lab, rd = _seam_image(lambda X: 0.5 - 0.8 * np.abs(X))
    assert twins_apart(pts, h, lab, 0.03, rd, 0.4) == set()


def _spreads_naive(xy: np.ndarray) -> tuple[float, float]:
    """The footprint's spreads from the definition: the least and the largest standard deviation (n - 1) of the
    points projected on a direction, over directions every 0.05 deg (no covariance, no eigenvalues)."""
    sd = [float(np.std(xy @ np.array([np.cos(a), np.sin(a)]), ddof=1)) for a in np.deg2rad(np.arange(0, 180, 0.05))]
    return min(sd), max(sd)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_footprint_spreads_match_their_naive_twin_and_a_rectangle_s_sides(seed):
    # a uniform rectangle w x l (w < l), turned by a random yaw: its spreads are w / sqrt(12) and l / sqrt(12) (the
    # uniform distribution's variance, w^2 / 12, from memory); and the least and largest projected spread over
    # directions (naive twin)
    from protomine.ingest.convexity import footprint_spreads
    rng = np.random.default_rng(seed)
    w, l = rng.uniform(0.01, 0.04), rng.uniform(0.05, 0.1)
    a = rng.uniform(0, np.pi)
    R = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    xy = (rng.uniform(-0.5, 0.5, (20000, 2)) * [w, l]) @ R.T + rng.normal(0, 1, 2)
    got = footprint_spreads(xy)
    assert np.allclose(got, np.array([w, l]) / np.sqrt(12), rtol=0.02)
    assert np.allclose(got, _spreads_naive(xy), rtol=1e-6)


def test_twins_apart_with_the_spread_cue_needs_two_footprints_as_wide():
    # the stepped seam of the first test between two groups of 1200 voxels, one height: twins (both footprints
    # 30 columns x 40 rows of the image); the same with one group's footprint squeezed to 0.3 of its width across
    # (a spool's flange, a disc seen edge on, against the other flange with the core), or stretched to 1.6 x its
    # length (an end with the bar that joins it to the other), is not a pair of twins at ratio 0.8, and is without
    # the cue (ratio 0).  Expected answer by construction.
    from protomine.ingest.convexity import twins_apart
    pts, lab, rd = _seam_image(lambda X: np.where(X < 0, 0.48, 0.5))
    h = np.full(len(lab), 0.1)
    assert twins_apart(pts, h, lab, 0.03, rd, 0.4, xy=pts[:, :2], spread_ratio=0.8) == {(0, 1), (1, 0)}
    short = 0 if np.ptp(pts[lab == 1, 0]) < np.ptp(pts[lab == 1, 1]) else 1
    for axis, factor in ((short, 0.3), (1 - short, 1.6)):
        xy = pts[:, :2].copy()
        centre = xy[lab == 1, axis].mean()
        xy[lab == 1, axis] = centre + factor * (xy[lab == 1, axis] - centre)
        assert twins_apart(pts, h, lab, 0.03, rd, 0.4, xy=xy, spread_ratio=0.8) == set()
        assert twins_apart(pts, h, lab, 0.03, rd, 0.4, xy=xy, spread_ratio=0.0) == {(0, 1), (1, 0)}


def _finding(folder, **keys):
    from protomine.capture import read_capture
    from protomine.config import load_config
    from protomine.ingest.proposals import find_objects
    cap = read_capture(folder)
    cfg = load_config("default")
    masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
    out = {}
    for name, (share, neck, *spread) in keys.items():
        cfg["ingest"]["seam_step_share"], cfg["ingest"]["twin_neck_cut"] = share, neck
        cfg["ingest"]["twin_spread_ratio"] = spread[0] if spread else 0.0
        out[name] = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
    return masked, out


@pytest.mark.parametrize("kind, draw, cues", [("can", 0, "seam"), ("mug", 0, "seam"), ("can", 1, "neck"),
                                              ("box", 1, "neck")])
def test_two_identical_items_of_one_colour_touching_are_two_objects(tmp_path, kind, draw, cues):
    """Two copies of one item, one colour, touching (tests/same_colour_rows.py draws; the renderer's masks as
    truth).  Without masks and without the cues: one proposal holding both (measured purity 0.50-0.52, the
    same-colour join or a part whose tops touch).  With ``[ingest] seam_step_share`` (the seam an occluding
    edge in the frames, convexity.twins_apart) the first two draws are two objects, each >= 0.95 pure with >= 0.8 of
    its masked pixels; the last two need ``[ingest] twin_neck_cut`` too (their tops touch: one convex part,
    cut at its neck by spectral bisection, Shi & Malik 2000).  ``[ingest] twin_spread_ratio`` 0.8 keeps them apart
    (two copies of one item: footprints as wide)."""
    write_row_capture(tmp_path / "row", kind, 2, draw)
    masked, runs = _finding(tmp_path / "row", off=(0.0, False), seam=(0.4, False), both=(0.4, True),
                            spread=(0.4, True, 0.8))
    assert len(runs["off"].proposals) == 1
    assert separated(runs["both"], masked, 2)[0] == 2
    assert separated(runs["spread"], masked, 2)[0] == 2
    assert separated(runs["seam"], masked, 2)[0] == (2 if cues == "seam" else 0)


@pytest.mark.parametrize("kind, draw", [("dumbbell_side", 0), ("double_block", 1), ("dumbbell_side_v", 3)])
def test_an_object_with_two_alike_ends_stays_one_object_with_the_spread_cue(tmp_path, kind, draw):
    """A dumbbell of one colour lying on its side, a double-ended block lying flat, a dumbbell of drawn sizes
    (tests/same_colour_rows.py; the renderer's masks as truth): the two ends are alike in voxels and height and the frames see the seam stepped (an
    end hides the bar next to it), so with ``seam_step_share`` and ``twin_neck_cut`` the object is cut in two
    (measured: 2 proposals, an end alone against the other end with the bar); with ``twin_spread_ratio`` 0.8 the
    two groups are not twins (footprint spreads across 1.3 against 2.0 cm for the dumbbell, along 1.8 against 2.9
    for the block; the drawn dumbbell is cut at 0.7 too) and the object is one, as without the cues."""
    write_row_capture(tmp_path / "one", kind, 1, draw)
    masked, runs = _finding(tmp_path / "one", off=(0.0, False), both=(0.4, True), spread=(0.4, True, 0.8))
    assert separated(runs["off"], masked, 1)[0] == 1
    assert separated(runs["both"], masked, 1)[0] == 0
    assert separated(runs["spread"], masked, 1)[0] == 1


def _block(x0: float, height: float, length: float = 0.06, step: float = 0.004) -> np.ndarray:
    """The seen surface of a block ``length`` x 6 cm standing on the plane z = 0 from x = x0: its top at ``height``
    and its four walls, sampled every ``step`` (voxel centres)."""
    gx, g = np.arange(0.0, length + 1e-9, step), np.arange(0.0, 0.06 + 1e-9, step)
    X, Y = np.meshgrid(gx, g, indexing="ij")
    top = np.c_[X.ravel() + x0, Y.ravel(), np.full(X.size, height)]
    z = np.arange(0.0, height, step)
    walls = [(x0 + a, y, zz) for a in gx for y in (0.0, 0.06) for zz in z]
    walls += [(x, a, zz) for a in g for x in (x0, x0 + length) for zz in z]
    return np.unique(np.round(np.concatenate([top, np.array(walls)]), 6), axis=0)


def _two_blocks(right_height: float) -> tuple[np.ndarray, np.ndarray]:
    """Two blocks 1.2 cm apart joined by a bridge one voxel wide on their tops (a neck), as one part."""
    left, right = _block(0.0, 0.1), _block(0.072, right_height)
    bridge = np.c_[np.arange(0.064, 0.072, 0.004), np.full(2, 0.032), np.full(2, 0.1)]
    pts = np.concatenate([left, right, bridge])
    return pts, np.zeros(len(pts), int)


def test_split_twins_cuts_two_blocks_at_their_neck_and_nothing_else():
    # normalized cut (Shi & Malik 2000): the bridge's few adjacency pairs against a block's thousands is a
    # conductance far under NECK_CONDUCTANCE; two blocks of one height that each stand are cut apart there, the
    # same pair with one block 8 cm high (heights within 0.8, under TWIN_HEIGHT_RATIO) is not, nor is one long
    # block of the pair's footprint, 13.2 x 6 cm (elongated, but no neck).  Expected answer by construction.
    from protomine.ingest.convexity import split_twins
    pts, parts = _two_blocks(0.1)
    kw = dict(adjacency=0.006, support_band=0.025, inset=0.003, cell=0.004)
    out, halves = split_twins(pts, parts, pts[:, :2], pts[:, 2], **kw)
    left = pts[:, 0] < 0.066
    assert halves == {(0, 1), (1, 0)}
    assert len(np.unique(out[left])) == 1 and len(np.unique(out[pts[:, 0] > 0.070])) == 1
    assert out[left][0] != out[pts[:, 0] > 0.070][0]
    pts, parts = _two_blocks(0.08)
    assert split_twins(pts, parts, pts[:, :2], pts[:, 2], **kw)[1] == set()
    one = _block(0.0, 0.1, length=0.132)
    assert split_twins(one, np.zeros(len(one), int), one[:, :2], one[:, 2], **kw)[1] == set()


def _grid_block(x0: float, x1: float, step: float = 0.004) -> np.ndarray:
    """Points every ``step`` on a block x0..x1 x 0..4 cm x 0..4 cm (voxel centres of one group)."""
    g = np.arange(0.0, 0.04 + 1e-9, step)
    X, Y, Z = np.meshgrid(np.arange(x0, x1 + 1e-9, step), g, g, indexing="ij")
    return np.c_[X.ravel(), Y.ravel(), Z.ravel()]


@pytest.mark.parametrize("cannot_link", [False, True])
def test_twins_kept_apart_stay_apart_through_a_piece_of_both(cannot_link):
    # two blocks of one colour kept apart (twins, ``apart``) and a small block of their colour between them, 8 mm
    # from either (within the 12 mm seam radius): the small block meets each along a long seam (SEAM_LONG), so each
    # twin joins it.  Without ``cannot_link`` that puts the two twins in one object through it; with it the
    # cannot-link constraint holds for the merged sets (Wagstaff et al. 2001, constrained clustering: a merge that
    # would put two cannot-linked items in one cluster is refused; from memory), so the twins end in two objects
    # and the small block in one of them.  Expected answer by construction.
    from protomine.ingest.convexity import _join_same_colour
    a, b, c = _grid_block(0.0, 0.048), _grid_block(0.072, 0.12), _grid_block(0.056, 0.064)
    pts = np.concatenate([a, b, c])
    lab = np.repeat([0, 1, 2], [len(a), len(b), len(c)])
    colours = np.tile([180.0, 60.0, 40.0], (len(pts), 1))
    assert len(np.unique(_join_same_colour(pts, colours, lab, 0.012))) == 1          # nothing apart: one object
    out = _join_same_colour(pts, colours, lab, 0.012, apart={(0, 1), (1, 0)}, cannot_link=cannot_link)
    if cannot_link:
        assert out[lab == 0][0] != out[lab == 1][0]
        assert out[lab == 2][0] in (out[lab == 0][0], out[lab == 1][0])
        assert len(np.unique(out)) == 2
    else:
        assert len(np.unique(out)) == 1


def test_two_mugs_joined_at_their_tops_are_cut_with_the_twin_neck_share(tmp_path):
    """Two handled mugs of one colour touching (tests/same_colour_rows.py, draw 1; the renderer's masks as truth):
    their tops touch, one convex part, and the neck cut's halves are twins, but the seam between them is stepped
    in under 0.4 of its pixel pairs (the flat pairs where the tops touch; measured 0.37): one proposal with
    ``seam_step_share`` 0.4 alone, two objects (each >= 0.95 pure with >= 0.8 of its masked pixels) with
    ``[ingest] twin_neck_step_share`` 0.25 (and ``twin_cannot_link``: the handle's piece meets both halves)."""
    write_row_capture(tmp_path / "row", "mug", 2, 1)
    from protomine.capture import read_capture
    from protomine.config import load_config
    from protomine.ingest.proposals import find_objects
    cap = read_capture(tmp_path / "row")
    cfg = load_config("default")
    masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
    found = {}
    for share in (0.0, 0.25):
        cfg["ingest"].update(seam_step_share=0.4, twin_neck_cut=True, twin_spread_ratio=0.8,
                             twin_neck_step_share=share, twin_cannot_link=True)
        found[share] = separated(find_objects(cap, cfg, np.random.default_rng(0), use_masks=False), masked, 2)[0]
    assert found == {0.0: 0, 0.25: 2}


@pytest.mark.parametrize("draw", [0, 4])
def test_a_piece_of_the_middle_can_joins_its_own_can_across_a_convex_seam(tmp_path, draw):
    """Three cans of one colour in a row (tests/same_colour_rows.py, draws 0 and 4; the renderer's masks as truth):
    the neighbours hide the middle can's walls at both contacts, so local convexity leaves it in two pieces, and
    the one that does not stand (measured 580 and 443 voxels) shares more voxel pairs with a neighbouring can (874
    and 811) than with its own other piece (471 and 234): it joined the neighbour, no group was a twin of another
    and the row became one proposal.  Its seam with its own piece is convex (a surface running on, concave share
    0.00), with the neighbours concave (0.55-0.79: two solids in contact meet in a concave crease, Stein et al.
    2014).  With ``[ingest] piece_convex_seam`` it joins its own piece and the three cans are three objects (each
    >= 0.95 pure with >= 0.8 of its masked pixels)."""
    assert _separated_off_and_on(tmp_path, "can", 3, draw, "piece_convex_seam") == {False: (0, 1), True: (3, 3)}


def test_seam_concavity_of_two_touching_spheres_and_of_one_sphere():
    # points on two unit-radius spheres touching at the origin (centres at x = -1 and x = +1), outward normals:
    # adjacent pairs across the contact are concave (the surfaces fold towards the viewer between them), pairs on
    # one sphere are convex: (n_i - n_j) . (x_i - x_j) = |n_i - n_j|^2 > 0 (Stein et al. 2014's criterion;
    # expected answer by construction)
    from protomine.ingest.convexity import _seam_concavity
    rng = np.random.default_rng(0)
    d = rng.normal(size=(400, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    d = d[d[:, 0] > 0.8]                                   # the caps facing the contact
    left = np.c_[-1 + d[:, 0], d[:, 1], d[:, 2]]           # sphere at x = -1, the cap facing +x
    nl = left - [-1, 0, 0]
    right = np.c_[1 - d[:, 0], d[:, 1], d[:, 2]]           # sphere at x = +1, the cap facing -x
    nr = right - [1, 0, 0]
    pts, nrm = np.concatenate([left, right]), np.concatenate([nl, nr])
    m = len(left)
    i, j = np.repeat(np.arange(m), m), np.tile(np.arange(m), m) + m
    # adjacent pairs across the contact (within 0.3, the test is local) whose normals differ by over 15 deg
    near = np.linalg.norm(pts[i] - pts[j], axis=1) < 0.3
    near &= np.einsum("ei,ei->e", nrm[i], nrm[j]) < np.cos(np.deg2rad(15))
    assert near.sum() > 100 and _seam_concavity(pts, nrm, i[near], j[near], 15.0).all()
    a, b = np.repeat(np.arange(m), m), np.tile(np.arange(m), m)
    assert not _seam_concavity(pts, nrm, a[a != b], b[a != b], 15.0).any()


def _separated_off_and_on(tmp_path, kind: str, count: int, draw: int, key: str) -> dict:
    """{off, on: (items separated, proposals)} of a row of ``count`` items of ``kind`` (draw ``draw``) found without
    masks with ``[ingest] key`` off and on, against the proposals found with the renderer's masks."""
    write_row_capture(tmp_path / "row", kind, count, draw)
    from protomine.capture import read_capture
    from protomine.config import load_config
    from protomine.ingest.proposals import find_objects
    cap = read_capture(tmp_path / "row")
    cfg = load_config("default")
    masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
    found = {}
    for on in (False, True):
        cfg["ingest"][key] = on
        free = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
        found[on] = (separated(free, masked, count)[0], len(free.proposals))
    return found


@pytest.mark.parametrize("kind, draw", [("can", 5), ("box", 3)])
def test_a_neck_cut_side_counts_the_pieces_of_its_own_item(tmp_path, kind, draw):
    """Two cans / two boxes of one colour touching (tests/same_colour_rows.py, can pair draw 5, box pair draw 3; the
    renderer's masks as truth): their tops touch, one convex part, and the neck cut finds the neck between the two
    items, but the neighbour hides one item's walls next to the contact and local convexity left its lower walls in
    other parts: the side holding its top does not stand by itself (its centre of mass outside the walls it shows)
    and is no twin of the other side (measured on the cans: 694 voxels against 1354), so the cut was refused and the
    pair stayed one proposal.  The pieces of its own item meet that side along a convex seam (two solids in contact
    meet in a concave crease, Stein et al. 2014); with ``[ingest] neck_side_pieces`` they count with it (the cans'
    side 1353 voxels with them, standing), the two sides are twins, and the two items are two objects (each >= 0.95
    pure with >= 0.8 of its masked pixels)."""
    assert _separated_off_and_on(tmp_path, kind, 2, draw, "neck_side_pieces") == {False: (0, 1), True: (2, 2)}
