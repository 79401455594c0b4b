"""The reference gridded as a single view of it (``mine.viewnorm``).  Volumes are built from the definition of the
grid by counting sample points per cell (``test_tilts``), without the lifting code or the tilt resampler; which
parts a camera sees follows from elementary occlusion (a nearer part of equal or greater extent across the line of
sight hides what lies behind it)."""
from __future__ import annotations

import numpy as np
import pytest

from protomine.mine.tilts import TiltGrid
from protomine.mine.viewnorm import (ViewNormaliser, _cross3, face_candidates, object_factors, shifted_distances,
                                      visible_geometry, visible_mask, visible_masks)
from test_tilts import MARGINS, _solid, _volume

GRID_T = TiltGrid(nsides=(1,), radial_margin=MARGINS[0], height_margin=MARGINS[1])


def _pillars(rng: np.random.Generator, n: int = 8000) -> tuple[np.ndarray, np.ndarray]:
    """Two equal square pillars side by side along x (centres x = -0.05 and +0.05, 0.04 wide, 0.08 tall)."""
    a = rng.uniform([-0.07, -0.02, 0.0], [-0.03, 0.02, 0.08], (n // 2, 3))
    b = rng.uniform([0.03, -0.02, 0.0], [0.07, 0.02, 0.08], (n // 2, 3))
    return np.concatenate([a, b]), np.zeros(n, int)


def test_visible_mask_hides_the_far_one_of_two_points_in_a_line():
    q = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    # seen along +x: the point at x = 1 is nearer and covers the one at the origin; the third is alone in its pixel
    assert visible_mask(q, np.array([1.0, 0.0, 0.0]), pixel=0.5, depth_tol=0.1).tolist() == [False, True, True]
    # seen along +z all three lie at the same depth, each in its own pixel or tied: all visible
    assert visible_mask(q, np.array([0.0, 0.0, 1.0]), pixel=0.5, depth_tol=0.1).all()


def test_footprint_seen_along_the_pair_holds_the_near_pillar_only():
    rng = np.random.default_rng(0)
    pts, part = _pillars(rng)
    X, W, aspect = _volume(pts, part)
    # the grid's own footprint: the smallest circle holding both pillars, centred between them (in units of rho_max)
    top = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([0.0, 0.0, 1.0]), GRID_T)
    side = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([0.0, 1.0, 0.05]), GRID_T)
    along = visible_geometry(X[0], W, aspect, np.array([0.0, 0.0, 1.0]), np.array([1.0, 0.0, 0.05]), GRID_T)
    r_full = 1.0 / MARGINS[0]                       # the footprint radius in units of rho_max
    # from above the whole footprint is seen: the circle is the grid's own (grown by half a cell)
    assert abs(top.base[0]) < 0.05 and abs(top.base[1]) < 0.05
    assert abs(top.rho_max / MARGINS[0] - r_full) < 0.15 * r_full
    # from the side (+y) both pillars are seen, their near faces only: as wide, moved toward the camera
    assert abs(side.base[0]) < 0.05 and side.base[1] > 0.1
    assert abs(side.rho_max / MARGINS[0] - r_full) < 0.15 * r_full
    # along +x (nearly level) the pillar at x = +0.05 hides the one behind it: the circle moves to it and holds
    # one pillar (half-diagonal 0.028 of the whole footprint's radius 0.0775: a ratio of 0.37)
    assert along.base[0] > 0.35 * r_full
    assert along.rho_max / MARGINS[0] < 0.6 * r_full


def test_cross3_equals_numpy_cross_to_the_bit():
    # reference: numpy's own np.cross (the function it replaces on the projection's 3-vectors)
    rng = np.random.default_rng(3)
    for a, b in zip(rng.normal(size=(500, 3)) * 10.0 ** rng.integers(-6, 6, (500, 1)), rng.normal(size=(500, 3))):
        assert np.cross(a, b).tobytes() == _cross3(a, b).tobytes()
    assert _cross3(np.array([1.0, 0.0, 0.0]), np.array([0.0, 1.0, 0.0])).tolist() == [0.0, 0.0, 1.0]


def test_face_candidates_merge_near_directions():
    fu = np.array([[0.0, 0.0, 1.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]])
    ups = face_candidates(np.array([0.99, 0.05, 0.0]), fu, np.array([3, 2, 0]), np.array([1, 1, -1]))
    # the found direction (about 3 degrees from +x) stands for +x; +z added once; the padding row left out
    assert len(ups) == 2 and np.allclose(ups[1], [0.0, 0.0, 1.0])


def test_a_view_lifted_about_its_visible_part_fits_its_view_normalised_prototype_better():
    rng = np.random.default_rng(1)
    pts, part = _solid("ell", rng)                # a bar with a taller post at its +x end
    P, V, aspect = _volume(pts, part)
    # seen level from +x, the post hides the bar behind it: the view holds the front layer only, lifted about
    # its own footprint (as ingest lifts a single view); cells it cannot see have weight 0
    front = pts[:, 0] > 0.056
    X, _, _ = _volume(pts[front], part[front])
    Wv = np.where(X[0] > 0.05, 1.0, 0.0).astype(np.float32)
    scales = (0.9, 1.0, 1.1)
    norm = ViewNormaliser(P[None], V[None], np.array([aspect]), scales, GRID_T,
                          (np.array([[[0.0, 0.0, 1.0]]]), np.array([[1]]), np.array([[1]])), top=1)
    from protomine.mine.posesearch import PoseBank
    plain = float(PoseBank(P[None], V[None], scales).match(X[None], Wv[None]).D[0, 0])
    cam = np.array([1.0, 0.0, 0.05]) / np.hypot(1.0, 0.05)
    D = np.array([[plain]])
    out = np.fmin(D, norm.distances(X[None], Wv[None], D, np.array([[[0.0, 0.0, 1.0]]]), cam[None]))  # the label decision's
    assert out[0, 0] <= plain
    assert out[0, 0] < 0.7 * plain, (out, plain)
    # no camera: nothing changes
    assert np.fmin(D, norm.distances(X[None], Wv[None], D, np.array([[[0.0, 0.0, 1.0]]]), np.zeros((1, 3))))[0, 0] == plain


# --- the fast path against its definition -------------------------------------------------------------------

def _zbuffer_by_points(q: np.ndarray, camera: np.ndarray, pixel: float, depth_tol: float, splat: int = 1) -> np.ndarray:
    """The z-buffer written out point by point (the definition in ``visible_mask``'s docstring): a point is seen
    when no point whose pixel lies within ``splat`` pixels of its own is nearer the camera by more than
    ``depth_tol``.  The image plane: e1 = d x a (a = x, or y when d is near x), e2 = d x e1."""
    d = camera / np.linalg.norm(camera)
    a = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = np.cross(d, a)
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(d, e1)
    pix = [(int(np.floor(p @ e1 / pixel)), int(np.floor(p @ e2 / pixel))) for p in q]
    depth = [float(p @ d) for p in q]
    out = []
    for i, (pi, di) in enumerate(zip(pix, depth)):
        hidden = any(abs(pj[0] - pi[0]) <= splat and abs(pj[1] - pi[1]) <= splat and dj > di + depth_tol
                     for pj, dj in zip(pix, depth))
        out.append(not hidden)
    return np.array(out)


def test_visible_masks_of_many_cameras_equal_the_point_by_point_zbuffer():
    rng = np.random.default_rng(3)
    for _ in range(20):
        q = rng.normal(size=(int(rng.integers(2, 60)), 3))
        cams = rng.normal(size=(4, 3))
        pixel, tol = float(rng.uniform(0.1, 0.6)), float(rng.uniform(0.0, 0.3))
        many = visible_masks(q, cams, pixel, tol)
        for c, m in zip(cams, many):
            assert np.array_equal(m, _zbuffer_by_points(q, c, pixel, tol))
            assert np.array_equal(m, visible_mask(q, c, pixel, tol))


def _random_pair(rng: np.random.Generator, n: int = 3):
    """A view (C, R, A, H), (R, A, H) with unseen cells and n copies (n, C, R, A, H), (n, R, A, H) with unknown ones."""
    C, (R, A, H) = 3, (4, 12, 5)
    x = rng.random((C, R, A, H), dtype=np.float32)
    w = (rng.random((R, A, H)) * (rng.random((R, A, H)) > 0.3)).astype(np.float32)
    pc = rng.random((n, C, R, A, H), dtype=np.float32)
    vc = (rng.random((n, R, A, H)) * (rng.random((n, R, A, H)) > 0.2)).astype(np.float32)
    return x, w, pc, vc


def test_shifted_distances_follow_the_definition_and_the_fft_search():
    from protomine.mine.posesearch import EPS, PoseBank, scale_prototypes
    rng = np.random.default_rng(4)
    x, w, pc, vc = _random_pair(rng)
    scales = (0.9, 1.0, 1.12)
    d = shifted_distances(object_factors(x, w), pc, vc, scales)          # (n, S, A)
    # the definition (posesearch's module docstring), in float64: the copy scaled, rolled by s (roll(a, s)[j] =
    # a[j - s]), D = sum w v |x - mu|^2 / (C sum w v + eps)
    Ps, Vs = scale_prototypes(pc, vc, scales)
    C, A = x.shape[0], x.shape[2]
    ref = np.empty(d.shape)
    for i in range(len(pc)):
        for si in range(len(scales)):
            for s in range(A):
                mu = np.roll(Ps[i, si].astype(np.float64), s, axis=2)
                v = np.roll(Vs[i, si].astype(np.float64), s, axis=1)
                den = C * (w * v).sum()
                ref[i, si, s] = np.inf if den <= C * 1e-3 else (w * v * ((x - mu) ** 2).sum(0)).sum() / (den + EPS)
    assert np.array_equal(np.isinf(d), np.isinf(ref))
    f = np.isfinite(ref)
    assert f.mean() > 0.9
    np.testing.assert_allclose(d[f], ref[f], rtol=1e-4)
    # the FFT search over every shift (the slow path this replaces) gives the same distances
    fft = PoseBank(pc, vc, scales).match(x[None], w[None], return_all=True).all_D[0]   # (n, S, A)
    np.testing.assert_allclose(d[f], fft[f], rtol=1e-4)


def _reference_distance(norm: ViewNormaliser, x, w, k, ups, camera) -> float:
    """The view-normalised distance as first written: one copy per face and yaw step (``visible_geometry`` each),
    every copy matched at every shift by the FFT pose search (``PoseBank``), the shifts within the yaw window
    of the copy's own yaw kept."""
    from protomine.mine.posesearch import PoseBank
    from protomine.mine.tilts import _resample_copies
    from protomine import rotations as rot
    y0 = np.arange(0.0, 360.0, norm.yaw_step)
    cams = rot.yaw_matrix(-y0) @ camera
    gs = [visible_geometry(norm.P[k, 0], norm.V[k], float(norm.aspect[k]), u, c, norm.grid) for u in ups for c in cams]
    pc, vc = _resample_copies(norm.P[k][None], norm.V[k][None], gs, np.full(len(gs), float(norm.aspect[k])),
                              index=np.zeros(len(gs), np.int64))
    allD = PoseBank(pc, vc, norm.scales).match(x, w, return_all=True).all_D[0]
    A = allD.shape[-1]
    made = np.tile(y0, len(ups))
    ok = np.abs((np.arange(A)[None] * 360.0 / A - made[:, None] + 180.0) % 360.0 - 180.0) <= norm.yaw_window + 1e-9
    return float(np.where(ok[:, None, :] & np.isfinite(allD), allD, np.inf).min())


def test_view_normalised_distance_equals_the_copy_by_copy_search():
    rng = np.random.default_rng(5)
    pts, part = _solid("tee", rng)
    P, V, aspect = _volume(pts, part)
    front = pts[:, 1] < 0.0                                   # a view of the half facing -y
    X, _, _ = _volume(pts[front], part[front])
    Wv = np.where(X[0] > 0.05, 1.0, 0.3).astype(np.float32)
    faces = (np.array([[[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]]), np.array([[2, 1]]), np.array([[1, 1]]))
    norm = ViewNormaliser(P[None], V[None], np.array([aspect]), (0.9, 1.0, 1.1), GRID_T, faces, top=1)
    ups = face_candidates(np.array([0.0, 1.0, 0.0]), *(f[0] for f in faces))
    assert len(ups) == 3                                      # found (+y), +z and the recorded +x
    for cam in (np.array([0.0, -1.0, 0.4]), np.array([0.3, -1.0, 0.05]), np.array([0.0, 0.0, 1.0])):
        cam = cam / np.linalg.norm(cam)
        fast = norm.distance(X[None], Wv[None], 0, ups, cam)
        ref = _reference_distance(norm, X[None], Wv[None], 0, ups, cam)
        assert np.isfinite(ref) and abs(fast - ref) <= 1e-4 * ref, (fast, ref)


def test_switch_scores_a_match_by_the_better_of_its_two_distances(tiny_world):
    """[mine] view_normalise_score: the class decision is that of view_normalise_top alone; the score of every
    (view, prototype) pair whose view-normalised distance was computed is the higher of the pose search's score and
    the library's calibrated score of that distance, 1 - T_4((ln d - mu_k) / sigma_k) (README "Score"; the Student-t
    tail from scipy here), and every other pair keeps the pose search's score.  The view-normalised distances are
    recomputed pair by pair on each view's shortlist written out from its definition (the ``top`` nearest within
    1.5 x the nearest, ``view_normalise_within`` set to 1.5)."""
    import json
    from scipy.stats import t as student_t
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library

    def matcher(top: int, score: bool):
        lib = read_library(tiny_world["library"])
        c = lib.config
        c["mine"].update(view_normalise_top=top, view_normalise_score=score, view_normalise_within=1.5)
        lib.attrs["config"] = json.dumps(c)
        return make_matcher(lib, tiny_world["cfg"])

    st = open_store(tiny_world["store"])
    vols = st.read_single_views()
    az = np.random.default_rng(2).uniform(0.0, 2 * np.pi, len(vols))   # cameras 50 degrees up, as the captures'
    cams = np.stack([np.cos(az), np.sin(az), np.full(len(vols), np.tan(np.deg2rad(50.0)))], 1)
    cams /= np.linalg.norm(cams, axis=1, keepdims=True)
    plain, dec, both = matcher(0, False).match(vols, cams), matcher(2, False).match(vols, cams), matcher(2, True)
    got = both.match(vols, cams)
    np.testing.assert_array_equal(got["best"], dec["best"])
    np.testing.assert_array_equal(got["distance"], dec["distance"])
    pr = both.library.prototypes
    X, W = both.features(vols)
    raised = 0
    for i in range(len(vols)):
        D = plain["distance"][i]
        near = sorted(range(both.K), key=lambda k: (D[k], k))[:2]
        for k in range(both.K):
            want = plain["score"][i, k]
            if k in near and D[k] <= 1.5 * min(D):
                ups = face_candidates(np.array([0.0, 0.0, 1.0]), pr["face_up"][k], pr["face_count"][k],
                                      pr["face_symmetry"][k])
                dv = both.normaliser.distance(X[i:i + 1], W[i:i + 1], k, ups, cams[i])
                sv = student_t.sf((np.log(dv) - pr["single_mu"][k]) / pr["single_sigma"][k], 4)
                raised += sv > want + 1e-6
                want = max(want, sv)
            assert got["score"][i, k] == pytest.approx(want, abs=1e-6), (i, k)
    assert raised > 0      # the test sees the switch act (measured: 3 of the 36 pairs)


def test_a_copy_cut_by_the_image_border_keeps_the_part_the_view_sees():
    # a flat square of cells (20 x 20 at 0.1 prototype units, one layer) under a camera looking straight down whose
    # image's right border crosses it; expected figures worked out by hand from the pinhole projection (from memory:
    # u = f X / Z + cx, the sensor ending at u = W - 0.5) and the smallest circle of a rectangle (centred on it).
    from protomine.ingest.truncation import ViewCut
    from protomine.mine.viewnorm import cut_cells
    xs = np.arange(-0.95, 1.0, 0.1)
    gx, gy = np.meshgrid(xs, xs, indexing="ij")
    qv = np.stack([gx.ravel(), gy.ravel(), np.zeros(gx.size)], 1)
    lo, half, a = 0.0, 0.05, 0.1             # a: metres per prototype unit of the object the view shows
    c_true = 0.3                             # the object's centre, world x (m)
    x_b = c_true + 0.1 * 0.21                # the image's right border at the cells' depth: cells x <= 0.15 seen
    f, W, H = 100.0, 200, 100
    z = (lo - (lo - 0.5 * half)) * a         # the cells' height above the plane once placed: 0.0025 m
    cam_h = 1.0
    Z = cam_h - z
    cx = (W - 0.5) - f * x_b / Z             # puts u = W - 0.5 at world x = x_b
    K = np.array([[f, 0.0, cx], [0.0, f, (H - 1) / 2], [0.0, 0.0, 1.0]])
    w2c = np.eye(4)
    w2c[:3, :3] = np.diag([1.0, -1.0, -1.0])  # camera above the world origin, looking down
    w2c[:3, 3] = [0.0, 0.0, cam_h]
    seen = xs[xs < 0.21]                     # the columns the view sees: x from -0.95 to 0.15
    origin_x = c_true + a * 0.5 * (seen[0] + seen[-1])   # the view's origin: the centre of its visible footprint
    r_view = a * np.hypot(0.5 * (seen[-1] - seen[0]), 0.95)
    cut = ViewCut(K, (W, H), w2c, np.array([origin_x, 0.0, 0.0]), np.eye(3), r_view, a * half,
                  np.zeros(0, np.int64), np.zeros(0))
    keep = cut_cells(qv, lo, half, 0.0, cut)
    kept_x = np.unique(np.round(qv[keep, 0], 6))
    assert all(np.sum(np.isclose(qv[keep, 0], x)) == len(xs) for x in kept_x)   # whole columns (the border is straight)
    # the iteration halves the placement's error each step; on cells it stops within one column of the truth
    # (0.15), the whole (0.95) or the first placement's cut (0.55) would be far off
    assert kept_x.min() == pytest.approx(-0.95) and abs(kept_x.max() - 0.15) <= 0.1 + 1e-9
    # nothing to cut (the border far off): every cell kept
    far = ViewCut(np.array([[f, 0.0, W / 2], [0.0, f, (H - 1) / 2], [0.0, 0.0, 1.0]]), (W * 10, H), w2c,
                  np.array([origin_x, 0.0, 0.0]), np.eye(3), r_view, a * half, np.zeros(0, np.int64), np.zeros(0))
    assert cut_cells(qv, lo, half, 0.0, far).all()


def test_cut_decide_lets_the_wider_shortlist_decide_and_keeps_the_ratio_of_the_narrow_one(tiny_world):
    """[mine] view_normalise_cut_decide: for a view given a cut the class is decided with the view-normalised
    distances of the wider shortlist (the same decision and distances as view_normalise_cut_within = the wider
    factor), while the best/second-best ratio joined to the score is that of the distances whose view-normalised
    part stays on the shortlist of view_normalise_cut_within (the decided class: that of the narrow shortlist's
    best).  The score is written out from its definitions:
    the calibrated Student-t tail 1 - T_4((ln d - mu_k) / sigma_k) of the lesser distance (scipy), the conformal
    p-value (1 + #{c >= r}) / (m + 1) of the ratio (split conformal, Angelopoulos & Bates 2021) and Fisher's
    combination P(chi2_4 >= -2 ln(s p)) (Fisher 1925; scipy)."""
    import json
    from scipy.stats import chi2, t as student_t
    from protomine.ingest.sharded import open_store
    from protomine.ingest.truncation import ViewCut
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library

    calib = np.linspace(0.4, 1.0, 19)                 # the held-out views' ratios (invented, sorted)

    def matcher(within: float, decide: float):
        lib = read_library(tiny_world["library"])
        pr = lib.prototypes                           # the view calibration: the pose search's fields, both faces
        pr.update(single_view_mu=pr["single_mu"], single_view_sigma=pr["single_sigma"],
                  single_view_tilt_mu=pr["single_mu"], single_view_tilt_sigma=pr["single_sigma"])
        lib.attrs.update(unknown_view_cut=0.01, unknown_view_ratios=calib, unknown_view_ratio_cut=0.01)
        c = lib.config
        c["mine"].update(view_normalise_top=2, view_normalise_score=True, view_normalise_calibrate=True,
                         view_normalise_ratio=True, view_normalise_cut=True, view_normalise_cut_within=within,
                         view_normalise_cut_decide=decide, unseen_charge=0.0)
        lib.attrs["config"] = json.dumps(c)
        return make_matcher(lib, tiny_world["cfg"])

    st = open_store(tiny_world["store"])
    vols = st.read_single_views()
    n = len(vols)
    az = np.random.default_rng(2).uniform(0.0, 2 * np.pi, n)   # cameras 50 degrees up, as the captures'
    cams = np.stack([np.cos(az), np.sin(az), np.full(n, np.tan(np.deg2rad(50.0)))], 1)
    cams /= np.linalg.norm(cams, axis=1, keepdims=True)
    w2c = np.eye(4)
    w2c[:3, :3] = np.diag([1.0, -1.0, -1.0])                   # looking down from 1 m, an image far wider than the view
    w2c[:3, 3] = [0.0, 0.0, 1.0]
    cut = ViewCut(np.array([[100.0, 0.0, 1000.0], [0.0, 100.0, 500.0], [0.0, 0.0, 1.0]]), (2000, 1000), w2c,
                  np.zeros(3), np.eye(3), 0.05, 0.05, np.zeros(0, np.int64), np.zeros(0))
    cuts = [cut] * n
    narrow, wide = matcher(1.0, 0.0), matcher(100.0, 0.0)
    got_m = matcher(1.0, 100.0)
    assert got_m.view_cut_decide == 100.0
    a, b = narrow.match(vols, cams, cuts=cuts), wide.match(vols, cams, cuts=cuts)
    got = got_m.match(vols, cams, cuts=cuts)
    np.testing.assert_array_equal(got["best"], b["best"])          # the wider shortlist decides
    np.testing.assert_array_equal(got["distance"], b["distance"])
    pr = got_m.library.prototypes
    Da = np.where(np.isfinite(a["distance"]), a["distance"], np.inf)
    differs = 0
    for i in range(n):
        for k in range(got_m.K):
            j = a["best"][i] if k == got["best"][i] else k   # the decided class: the narrow best's ratio
            others = np.delete(Da[i], j)
            r = Da[i, j] / others.min() if np.isfinite(others.min()) else 0.0
            p = (1.0 + np.sum(calib >= r)) / (len(calib) + 1.0)
            d = np.fmin(got["scored_distance"][i, k], got["view_distance"][i, k])
            s = student_t.sf((np.log(d) - pr["single_mu"][k]) / pr["single_sigma"][k], 4)
            want = min(1.0, chi2.sf(-2.0 * np.log(s * p), 4)) if s * p > 0 else 0.0
            assert got["score"][i, k] == pytest.approx(want, abs=1e-6), (i, k)
            differs += abs(got["score"][i, k] - b["score"][i, k]) > 1e-6
    # the test sees the ratio differ from the wider shortlist's (measured: 3 of the 36 pairs)
    assert differs > 0, differs


def test_decided_ratios_give_the_wider_decision_the_narrow_best_ratio():
    # worked by hand from the definition (best/second-best ratio, openset.best_second_ratio): Dq's ratios are
    # 1 / 1.6, 1.6 / 1, 2 / 1; the decision (least D) is prototype 1, which takes the narrow best's 0.625
    from protomine.label.matcher import decided_ratios
    D = np.array([[1.0, 0.8, 2.0], [1.0, 1.6, 2.0]])
    Dq = np.array([[1.0, 1.6, 2.0], [1.0, 1.6, 2.0]])
    np.testing.assert_allclose(decided_ratios(D, Dq), [[0.625, 0.625, 2.0], [0.625, 1.6, 2.0]])
    np.testing.assert_allclose(decided_ratios(Dq, Dq), [[0.625, 1.6, 2.0]] * 2)   # off: the plain ratios


def test_rest_mask_keeps_the_resting_faces_and_drops_a_tilt_no_member_rests_on():
    # worked by hand from the definition (the angle between unit vectors, arccos of their dot product, against
    # SAME_FACE_DEG = 10): recorded faces +z (canonical), +x (3 members), -y (0 members: not a resting face) and a
    # padding row (symmetry -1)
    from protomine.mine.viewnorm import rest_mask
    face_up = np.array([[0.0, 0.0, 1.0], [1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, 0.0]])
    count, sym = np.array([5, 3, 0, 0]), np.array([1, 1, 1, -1])
    t5, t20 = np.deg2rad(5.0), np.deg2rad(20.0)
    ups = [np.array([np.sin(t5), 0.0, np.cos(t5)]),     # 5 deg off +z: the canonical face
           np.array([np.cos(t20), 0.0, np.sin(t20)]),   # 20 deg off +x, 70 off +z: no face
           np.array([0.0, -1.0, 0.0]),                  # the face without members
           2.0 * np.array([np.cos(t5), np.sin(t5), 0.0]),   # 5 deg off +x, not unit length
           np.array([0.0, 0.0, 1.0])]
    np.testing.assert_array_equal(rest_mask(ups, face_up, count, sym), [True, False, False, True, True])


def test_face_distances_are_each_face_searched_alone_and_rest_takes_the_resting_ones():
    # each entry of face_distances equals the copy-by-copy reference twin searched on that face alone (the FFT pose
    # search, _reference_distance); ViewNormaliser.distances' ``rest`` is the least over every face for a view
    # without a cut, and with cut_rest for a cut view the least over the faces rest_mask keeps (here the pose search's
    # found +y, not a recorded face, is left out)
    from protomine.ingest.truncation import ViewCut
    from protomine.mine.viewnorm import rest_mask
    rng = np.random.default_rng(5)
    pts, part = _solid("tee", rng)
    P, V, aspect = _volume(pts, part)
    turned = pts @ np.array([[1.0, 0.0, 0.0], [0.0, 0.0, -1.0], [0.0, 1.0, 0.0]]).T   # the tee lying with its +y up
    front = turned[:, 1] < 0.0
    X, _, _ = _volume(turned[front], part[front])
    Wv = np.where(X[0] > 0.05, 1.0, 0.3).astype(np.float32)
    faces = (np.array([[[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]]), np.array([[2, 1]]), np.array([[1, 1]]))
    ups = face_candidates(np.array([0.0, 1.0, 0.0]), *(f[0] for f in faces))
    cam = np.array([0.3, -1.0, 0.4]) / np.linalg.norm([0.3, -1.0, 0.4])
    norm = ViewNormaliser(P[None], V[None], np.array([aspect]), (0.9, 1.0, 1.1), GRID_T, faces, top=1, cut_rest=True)
    per = norm.face_distances(X[None], Wv[None], 0, ups, cam)
    for j, u in enumerate(ups):
        ref = _reference_distance(norm, X[None], Wv[None], 0, [u], cam)
        assert abs(per[j] - ref) <= 1e-4 * ref, (j, per[j], ref)
    on = rest_mask(ups, *(f[0] for f in faces))
    np.testing.assert_array_equal(on, [False, True, True])
    assert per[0] < per[on].min()                    # the view rests on the found +y: leaving it out matters
    # an image far wider than the view (nothing hidden): the copies keep every cell, so the cut changes no distance
    w2c = np.eye(4)
    w2c[:3, :3] = np.diag([1.0, -1.0, -1.0])
    w2c[:3, 3] = [0.0, 0.0, 1.0]
    wide = ViewCut(np.array([[100.0, 0.0, 1000.0], [0.0, 100.0, 500.0], [0.0, 0.0, 1.0]]), (2000, 1000), w2c,
                   np.zeros(3), np.eye(3), 0.05, 0.05, np.zeros(0, np.int64), np.zeros(0))
    up = np.array([[[0.0, 1.0, 0.0]], [[0.0, 1.0, 0.0]]])
    rest = np.full((2, 1), np.nan)
    out = norm.distances(np.stack([X, X]), np.stack([Wv, Wv]), np.ones((2, 1)), up, np.stack([cam, cam]),
                         [None, wide], rest)
    np.testing.assert_allclose(out[:, 0], per.min(), rtol=1e-6)
    np.testing.assert_allclose(rest[:, 0], [per.min(), per[on].min()], rtol=1e-6)


def test_cut_rest_decides_by_the_resting_copies_and_scores_as_before(tiny_world):
    """[mine] view_normalise_cut_rest: a cut view's deciding distance is the lesser of the pose search's and the
    view-normalised distance over its copies on resting faces (ViewNormaliser.distances' ``rest``); the score's
    view-normalised distance and every view without a cut are those of the switch off (bit for bit).  The tiny world's
    objects stand upright, so here the resting copies hold the nearest one: what is left out is checked by
    test_face_distances_are_each_face_searched_alone_and_rest_takes_the_resting_ones."""
    import json
    from protomine.ingest.sharded import open_store
    from protomine.ingest.truncation import ViewCut
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library

    def matcher(rest: bool):
        lib = read_library(tiny_world["library"])
        c = lib.config
        c["mine"].update(view_normalise_top=2, view_normalise_score=True, view_normalise_cut=True,
                         view_normalise_cut_rest=rest, view_normalise_cut_decide=0.0, unseen_charge=0.0)
        lib.attrs["config"] = json.dumps(c)
        return make_matcher(lib, tiny_world["cfg"])

    vols = open_store(tiny_world["store"]).read_single_views()
    n = len(vols)
    az = np.random.default_rng(2).uniform(0.0, 2 * np.pi, n)
    cams = np.stack([np.cos(az), np.sin(az), np.full(n, np.tan(np.deg2rad(50.0)))], 1)
    cams /= np.linalg.norm(cams, axis=1, keepdims=True)
    w2c = np.eye(4)
    w2c[:3, :3] = np.diag([1.0, -1.0, -1.0])
    w2c[:3, 3] = [0.0, 0.0, 1.0]
    cut = ViewCut(np.array([[100.0, 0.0, 1000.0], [0.0, 100.0, 500.0], [0.0, 0.0, 1.0]]), (2000, 1000), w2c,
                  np.zeros(3), np.eye(3), 0.05, 0.05, np.zeros(0, np.int64), np.zeros(0))
    cuts = [cut if i % 2 else None for i in range(n)]            # every other view cut
    on, off = matcher(True), matcher(False)
    assert on.view_cut_rest and not off.view_cut_rest
    a, b = on.match(vols, cams, cuts=cuts), off.match(vols, cams, cuts=cuts)
    np.testing.assert_array_equal(a["view_distance"], b["view_distance"])
    plain = np.array([c is None for c in cuts])
    np.testing.assert_array_equal(a["distance"][plain], b["distance"][plain])
    np.testing.assert_array_equal(a["score"][plain], b["score"][plain])
    X, W = on.features(vols)
    D, _, _, up, _ = on.search.poses(X, W)
    rest = np.full(D.shape, np.nan)
    on.normaliser.distances(X, W, D, up, cams, cuts, rest)
    np.testing.assert_allclose(a["distance"], np.fmin(D, rest), rtol=1e-12)
    assert np.all(a["distance"][~plain] >= b["distance"][~plain])   # fewer copies: never nearer


def test_within_sets_which_prototypes_an_uncut_view_also_compares_as_seen_from_its_camera(tiny_world):
    """[mine] view_normalise_within: a view not cut off takes the view-normalised distance for the prototypes that
    are among its view_normalise_top nearest by the pose search's distance *and* within this factor of its nearest
    (the shortlist written out from that definition here, from the distances of a matcher without the view
    normaliser); every other prototype keeps no view-normalised distance (NaN), and the decision is the nearest
    of the lesser of the two distances."""
    import json
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library

    def matcher(top: int, within: float):
        lib = read_library(tiny_world["library"])
        c = lib.config
        c["mine"].update(view_normalise_top=top, view_normalise_within=within, view_normalise_score=False,
                         view_normalise_calibrate=False, unseen_charge=0.0)
        lib.attrs["config"] = json.dumps(c)
        return make_matcher(lib, tiny_world["cfg"])

    vols = open_store(tiny_world["store"]).read_single_views()
    n = len(vols)
    az = np.random.default_rng(3).uniform(0.0, 2 * np.pi, n)   # cameras 50 degrees up, as the captures'
    cams = np.stack([np.cos(az), np.sin(az), np.full(n, np.tan(np.deg2rad(50.0)))], 1)
    D = matcher(0, 1.5).match(vols, cams)["distance"]        # the pose search's distances alone
    lists = {}
    for within in (1.0, 100.0):
        mt = matcher(2, within)
        assert mt.normaliser.within == within
        got = mt.match(vols, cams)
        want = np.zeros(D.shape, bool)
        for i in range(n):
            fin = [k for k in np.argsort(D[i], kind="stable") if np.isfinite(D[i, k])][:2]
            want[i, [k for k in fin if D[i, k] <= within * D[i, fin[0]]]] = True
        np.testing.assert_array_equal(np.isfinite(got["view_distance"]), want)
        np.testing.assert_array_equal(got["distance"], np.fmin(D, got["view_distance"]))
        np.testing.assert_array_equal(got["best"], np.argmin(np.where(np.isfinite(got["distance"]), got["distance"], np.inf), 1))
        lists[within] = want
    assert lists[100.0].sum() > lists[1.0].sum()             # the wider factor lists more prototypes
