"""The tolerant single-view residual (protomine.mine.viewdistance).

References: the residual's definition (best of the prototype's cell and its six face neighbours) written out
as an explicit loop over cells with index arithmetic (no shared helper); comparing shapes up to a tolerance
band of one cell (the dead zone of a thresholded one-sided Hausdorff / chamfer comparison, common practice
in shape matching); AUROC by scikit-learn's roc_auc_score.
"""
from __future__ import annotations

import numpy as np
from sklearn.metrics import roc_auc_score

from protomine.mine.posesearch import pose_distances
from protomine.mine.reliability import reliable_distances
from protomine.mine.viewdistance import pair_distances, squared_residuals, tolerant_residuals

R, A, H, C = 4, 12, 5, 2


def _tolerant_naive(x, p):
    n = x.shape[0]
    out = np.zeros((n, R, A, H))
    steps = [(0, 0, 0), (1, 0, 0), (-1, 0, 0), (0, 1, 0), (0, -1, 0), (0, 0, 1), (0, 0, -1)]
    for i in range(n):
        for r in range(R):
            for a in range(A):
                for h in range(H):
                    best = np.inf
                    for dr, da, dh in steps:
                        # the neighbour's cell: azimuth wraps, radius and height stay on the grid
                        rr, aa, hh = min(max(r + dr, 0), R - 1), (a + da) % A, min(max(h + dh, 0), H - 1)
                        e = np.mean([(x[i, c, r, a, h] - p[0, c, rr, aa, hh]) ** 2 for c in range(C)])
                        best = min(best, e)
                    out[i, r, a, h] = best
    return out


def test_tolerant_residual_matches_the_definition():
    rng = np.random.default_rng(0)
    x, p = rng.random((2, C, R, A, H)), rng.random((1, C, R, A, H))
    np.testing.assert_allclose(tolerant_residuals(x, p), _tolerant_naive(x, p), rtol=1e-12)
    # never more than the squared residual (the cell itself is one of the candidates)
    assert np.all(tolerant_residuals(x, p) <= squared_residuals(x, p) + 1e-15)


def test_a_one_cell_slip_costs_nothing_two_cells_do():
    p = np.zeros((1, C, R, A, H))
    p[0, :, 1, 5, 2] = 1.0                                  # one solid cell
    for shift in [(1, 0, 0), (0, 1, 0), (0, -1, 0), (0, 0, -1)]:
        x = np.zeros_like(p)
        x[0, :, 1 + shift[0], 5 + shift[1], 2 + shift[2]] = 1.0
        assert squared_residuals(x, p).sum() > 0.5
        np.testing.assert_allclose(tolerant_residuals(x, p), 0.0, atol=1e-15)
    x = np.zeros_like(p)
    x[0, :, 3, 5, 2] = 1.0                                  # two cells away
    assert tolerant_residuals(x, p).sum() > 0.5


def test_pair_distances_without_tolerance_are_the_plain_distance_at_the_pose():
    rng = np.random.default_rng(2)
    x, w = rng.random((3, C, R, A, H)).astype(np.float32), rng.random((3, R, A, H)).astype(np.float32)
    P, V = rng.random((1, C, R, A, H)).astype(np.float32), rng.random((1, R, A, H)).astype(np.float32)
    yaw, sc = np.array([[0.0], [60.0], [330.0]]), np.ones((3, 1))
    want = reliable_distances(x, w, P, V, None, yaw, sc)[:, 0]
    got = pair_distances(x, w, np.repeat(P, 3, 0), np.repeat(V, 3, 0), yaw[:, 0], sc[:, 0], tolerant=False)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    tol = reliable_distances(x, w, P, V, None, yaw, sc, tolerant=True)[:, 0]
    np.testing.assert_allclose(pair_distances(x, w, np.repeat(P, 3, 0), np.repeat(V, 3, 0), yaw[:, 0], sc[:, 0],
                                              tolerant=True), tol, rtol=1e-12)
    assert np.all(tol < want)


def test_tolerance_separates_unknown_shapes_that_a_slipping_silhouette_hides():
    """Known views = the prototype's solid with its boundary one cell further out at random places (what range
    noise, mixed edge readings and a partial footprint do); unknown views = the same solid with a small knob
    clear of the body by a cell, same slips.  The tolerant distance ranks them far better than the squared one."""
    rng = np.random.default_rng(4)
    solid = np.zeros((R, A, H), bool)
    solid[:2, :, :3] = True                                 # a squat cylinder
    extra = np.zeros((R, A, H), bool)
    extra[3, 2:4, 1] = True                                 # a small knob, clear of the body by a cell

    def views(shape, n):
        out = np.zeros((n, C, R, A, H), np.float32)
        for i in range(n):
            grown = shape.copy()                            # the solid grown by one cell outwards and upwards
            grown[1:] |= shape[:-1]
            grown[:, :, 1:] |= shape[:, :, :-1]
            slip = rng.random((R, A, H)) < 0.5              # where the view's boundary sits one cell out
            s = np.where(slip, grown, shape)
            out[i, 0] = s
            out[i, 1] = ~s
        return out, np.ones((n, R, A, H), np.float32)

    P = np.stack([solid, ~solid]).astype(np.float32)[None]
    V = np.ones((1, R, A, H), np.float32)
    xk, wk = views(solid, 30)
    xu, wu = views(solid | extra, 30)
    X, W = np.concatenate([xk, xu]), np.concatenate([wk, wu])
    known = np.r_[np.ones(30), np.zeros(30)]
    pm = pose_distances(X, W, P, V)
    sq = reliable_distances(X, W, P, V, None, pm.yaw_deg, pm.scale)[:, 0]
    tol = reliable_distances(X, W, P, V, None, pm.yaw_deg, pm.scale, tolerant=True)[:, 0]
    auc_sq, auc_tol = roc_auc_score(known, -sq), roc_auc_score(known, -tol)
    # measured: squared 0.70, tolerant 1.00
    assert auc_sq < 0.9 and auc_tol > 0.95


def test_switch_scores_views_by_the_tolerant_distance_the_library_was_calibrated_on(tiny_world, tmp_path):
    """[mine] tolerant_residual: the library's single-view calibration and the matcher both use the tolerant
    distance (each view's score is the library's score of that distance at the found pose), and the calibrated
    location is below the squared one's (the tolerant residual never exceeds the squared one)."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"tolerant_residual": True}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    plain = read_library(tiny_world["library"])
    assert np.all(lib.prototypes["single_mu"] < plain.prototypes["single_mu"])
    st = open_store(tiny_world["store"])
    vols = st.read_single_views(np.arange(min(4, len(st.single_object))))
    m = make_matcher(lib, cfg)
    assert m.tolerant and not make_matcher(plain, tiny_world["cfg"]).tolerant
    got = m.match(vols)
    X, W = m.features(vols)
    pm = pose_distances(X, W, m.P, m.V, scales=m.scales)
    Dt = reliable_distances(X, W, m.P, m.V, lib.prototypes["cell_reliability"], pm.yaw_deg, pm.scale, tolerant=True)
    np.testing.assert_allclose(got["score"], lib.score(Dt, np.arange(lib.n_clusters)[None, :], single_view=True),
                               atol=1e-5)


def test_footprint_rings_are_the_bins_starting_inside_the_footprint():
    from protomine.mine.viewdistance import footprint_rings
    # bin i starts at i / R x margin footprint radii (DEVELOPERS.md grid convention), by hand:
    # R = 8, margin 1.15: bin 7 starts at 1.006 (beyond), bin 6 at 0.8625 (inside) -> 7 bins
    assert footprint_rings(8, 1.15) == 7
    assert footprint_rings(8, 1.5) == 6          # bin 6 starts at 1.125, bin 5 at 0.9375
    assert footprint_rings(4, 1.15) == 4         # bin 3 starts at 0.8625: every bin reaches inside
    assert footprint_rings(8, 1.0) == 8


def test_distance_without_the_margin_ring_matches_the_definition():
    rng = np.random.default_rng(5)
    x, w = rng.random((2, C, R, A, H)), rng.random((2, R, A, H))
    P, V = rng.random((1, C, R, A, H)), rng.random((1, R, A, H))
    got = reliable_distances(x, w, P, V, None, np.zeros((2, 1)), np.ones((2, 1)), rings=3)[:, 0]
    for i in range(2):
        num = den = 0.0
        for r in range(3):                                  # radial bins 0..2 only
            for a in range(A):
                for h in range(H):
                    om = w[i, r, a, h] * V[0, r, a, h]
                    num += om * np.mean((x[i, :, r, a, h] - P[0, :, r, a, h]) ** 2)
                    den += om
        np.testing.assert_allclose(got[i], num / den, rtol=1e-6)


def test_views_on_another_face_are_scored_against_the_copy_resting_on_it():
    """tilted_distances: each (view, prototype) pair marked is the distance of pair_distances against that
    prototype's copy at the pair's up direction (copies asked for one by one); unmarked pairs are inf."""
    from protomine.mine.tilts import TiltBank, TiltGrid
    from protomine.mine.viewdistance import tilted_distances
    rng = np.random.default_rng(7)
    P = rng.random((2, C, R, A, H)).astype(np.float32)
    V = (rng.random((2, R, A, H)) > 0.2).astype(np.float32)
    bank = TiltBank(P, V, np.array([1.0, 0.8]), (1.0,), TiltGrid(nsides=(1,)))
    x, w = rng.random((3, C, R, A, H)).astype(np.float32), rng.random((3, R, A, H)).astype(np.float32)
    up = np.zeros((3, 2, 3))
    up[:, 0] = bank.grid.dirs[4]
    up[:, 1] = bank.grid.dirs[7]
    up[2, 0] = bank.grid.dirs[9]
    yaw, sc = rng.uniform(0, 360, (3, 2)), np.ones((3, 2))
    pairs = np.array([[True, False], [True, True], [True, True]])
    got = tilted_distances(bank, x, w, up, yaw, sc, pairs, tolerant=False, rings=7)
    assert np.isinf(got[0, 1])
    for i, k in zip(*np.nonzero(pairs)):
        pc, vc = bank.copy_at(int(k), up[i, k])
        want = pair_distances(x[i:i + 1], w[i:i + 1], pc[None], vc[None], yaw[i:i + 1, k], sc[i:i + 1, k],
                              tolerant=False, rings=7)[0]
        np.testing.assert_allclose(got[i, k], want, rtol=1e-6)


def test_distance_with_the_margin_ring_down_weighted_matches_the_definition():
    rng = np.random.default_rng(6)
    x, w = rng.random((2, C, R, A, H)), rng.random((2, R, A, H))
    P, V = rng.random((1, C, R, A, H)), rng.random((1, R, A, H))
    got = reliable_distances(x, w, P, V, None, np.zeros((2, 1)), np.ones((2, 1)), rings=(2, 0.5))[:, 0]
    for i in range(2):
        num = den = 0.0
        for r in range(R):
            for a in range(A):
                for h in range(H):
                    om = w[i, r, a, h] * V[0, r, a, h] * (0.5 if r >= 2 else 1.0)
                    num += om * np.mean((x[i, :, r, a, h] - P[0, :, r, a, h]) ** 2)
                    den += om
        np.testing.assert_allclose(got[i], num / den, rtol=1e-6)


def test_score_rings_from_the_config():
    from protomine.config import load_config
    from protomine.mine.viewdistance import score_rings
    cfg = load_config(None)
    assert score_rings(cfg, 8) is None                                   # default: counted like the rest
    half = load_config(None, {"mine": {"score_margin_ring": 0.5}})
    assert score_rings(half, 8) == (7, 0.5)                               # R = 8, margin 1.15: bin 7 is beyond


def test_surface_mass_factor_matches_the_definition():
    """[mine] score_surface_mass: the distance at the pose times exp(a |ln((sum w v x_s + e) / (sum w v mu_s + e))|),
    written out as an explicit loop over cells (module docstring of mine.viewdistance)."""
    from protomine.mine.viewdistance import MASS_EPS
    rng = np.random.default_rng(8)
    x, w = rng.random((2, C, R, A, H)), rng.random((2, R, A, H))
    P, V = rng.random((1, C, R, A, H)), rng.random((1, R, A, H))
    x[1, 0] *= 0.3                                          # the second view saw far less surface
    plain = reliable_distances(x, w, P, V, None, np.zeros((2, 1)), np.ones((2, 1)))[:, 0]
    got = reliable_distances(x, w, P, V, None, np.zeros((2, 1)), np.ones((2, 1)), mass=0.7)[:, 0]
    for i in range(2):
        mv = mp = 0.0
        for r in range(R):
            for a in range(A):
                for h in range(H):
                    mv += w[i, r, a, h] * V[0, r, a, h] * x[i, 0, r, a, h]
                    mp += w[i, r, a, h] * V[0, r, a, h] * P[0, 0, r, a, h]
        np.testing.assert_allclose(got[i], plain[i] * np.exp(0.7 * abs(np.log((mv + MASS_EPS) / (mp + MASS_EPS)))),
                                   rtol=1e-6)
    assert got[1] / plain[1] > got[0] / plain[0]


def test_half_the_surface_costs_a_factor_two_to_the_weight():
    """By arithmetic: a view holding half the prototype's surface in every cell it saw has a mass ratio of 1/2,
    so its distance grows by exp(a ln 2) = 2^a; twice the surface costs the same (|ln 2|)."""
    p = np.zeros((1, C, R, A, H))
    p[0, 0, :2, :, :3] = 1.0
    ones = np.ones((1, R, A, H))
    for scale in (0.5, 2.0):
        x = p * np.array([scale, 1.0])[None, :, None, None, None]
        plain = reliable_distances(x, ones, p, ones, None, np.zeros((1, 1)), np.ones((1, 1)))[0, 0]
        got = reliable_distances(x, ones, p, ones, None, np.zeros((1, 1)), np.ones((1, 1)), mass=1.5)[0, 0]
        np.testing.assert_allclose(got / plain, 2.0 ** 1.5, rtol=1e-4)   # e = 1e-3 against a mass of 108 cells


def test_mass_switch_scores_views_by_the_distance_the_library_was_calibrated_on(tiny_world, tmp_path):
    """[mine] score_surface_mass: the calibration and the matcher both multiply the canonical face's distance by the
    mass factor (each view's score is the library's score of that distance at the found pose), so the calibrated
    location is at or above the plain one's (the factor is >= 1)."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"score_surface_mass": 1.0}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    plain = read_library(tiny_world["library"])
    assert np.all(lib.prototypes["single_mu"] >= plain.prototypes["single_mu"] - 1e-9)
    assert np.any(lib.prototypes["single_mu"] > plain.prototypes["single_mu"] + 1e-6)
    st = open_store(tiny_world["store"])
    vols = st.read_single_views(np.arange(min(4, len(st.single_object))))
    m = make_matcher(lib, cfg)
    assert m.mass == 1.0 and make_matcher(plain, tiny_world["cfg"]).mass == 0.0
    got = m.match(vols)
    X, W = m.features(vols)
    pm = pose_distances(X, W, m.P, m.V, scales=m.scales)
    Dm = reliable_distances(X, W, m.P, m.V, lib.prototypes["cell_reliability"], pm.yaw_deg, pm.scale, mass=1.0)
    np.testing.assert_allclose(got["score"], lib.score(Dm, np.arange(lib.n_clusters)[None, :], single_view=True),
                               atol=1e-5)
