"""``[mine] pose_polish_own_out`` (engine._polished_own_out): each member's pose decided against its prototype without
it.  The prototype without one member is checked against the weighted mean of the other members written out
(``engine.weighted_means``' definition: sum w x / sum w over the cells the others saw, mean weight sum w / (n - 1)); the
invented cluster is four L-shaped solids standing upright and one lying upside down that the fit took as upright, built
from the grid's definition by counting sample points per cell (tests/test_tilts.py's helpers), its true rotation the
one its points were turned by (scipy's Rotation)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine import rotations as rot
from protomine.mine import engine
from protomine.mine.engine import ArraySource, _polished_own_out, left_out
from protomine.mine.tilts import TiltGrid

from test_tilts import MARGINS, _posed

SCALES = (0.9, 1.0, 1.1)


def test_left_out_is_the_weighted_mean_of_the_others():
    rng = np.random.default_rng(3)
    n, shape = 5, (3, 4, 6, 2)
    X = rng.normal(size=(n,) + shape)
    W = rng.uniform(0.0, 1.0, (n,) + shape[1:])
    W[:, 0, 0, 0] = 0.0                     # a cell nobody saw
    W[1:, 1, 1, 1] = 0.0                    # a cell only member 0 saw
    num, den = (W[:, None] * X).sum(axis=0), W.sum(axis=0)
    for j in range(n):
        P2, V2 = left_out(num, den, n, X[j], W[j])
        others = [i for i in range(n) if i != j]
        for c in np.ndindex(shape[1:]):     # the definition, cell by cell
            sw = sum(W[i][c] for i in others)
            if sw / (n - 1) > engine.MIN_MEAN_WEIGHT:
                want = sum(W[i][c] * X[i][(slice(None),) + c] for i in others) / sw
            else:
                want = np.zeros(shape[0])
            np.testing.assert_allclose(P2[(slice(None),) + c], want, rtol=1e-5, atol=1e-6)
            np.testing.assert_allclose(V2[c], min(sw / (n - 1), 1.0) if sw / (n - 1) > engine.MIN_MEAN_WEIGHT else 0.0,
                                       rtol=1e-5, atol=1e-7)
    assert np.all(left_out(num, den, n, X[0], W[0])[1][1, 1, 1] == 0.0)  # seen by the left-out member only
    with pytest.raises(ValueError):
        left_out(W[0][None] * X[0], W[0], 1, X[0], W[0])


def _four_up_one_down():
    """Four L solids upright and one upside down (turned 180 deg about x): their true rotations (5, 3, 3) and their
    volumes X (5, C, R, A, H), weights W (5, R, A, H) and aspects a (5,)."""
    rng = np.random.default_rng(0)
    true = [np.eye(3)] * 4 + [Rotation.from_euler("x", 180, degrees=True).as_matrix()]
    posed = [_posed("ell", R, rng) for R in true]
    return (np.stack(true), np.stack([p[0] for p in posed]), np.stack([p[1] for p in posed]),
            np.array([p[2] for p in posed]))


def _cluster():
    """``_four_up_one_down``, every one recorded upright (identity): the prototype is their weighted mean as the fit
    would average them at those poses."""
    true, X, W, a = _four_up_one_down()
    P = ((W[:, None] * X).sum(axis=0) / np.maximum(W.sum(axis=0), 1e-12))[None].astype(np.float32)
    V = (W.sum(axis=0) / len(X))[None].astype(np.float32)
    grid = TiltGrid(nsides=(1, 2, 4), radial_margin=MARGINS[0], height_margin=MARGINS[1])
    return X, W, a, P, V, grid, true


def test_own_out_turns_back_the_member_the_fit_took_upright():
    X, W, a, P, V, grid, true = _cluster()
    start = np.stack([np.eye(3)] * len(X))
    R, moved = _polished_own_out(ArraySource(X, W, a), np.zeros(len(X), np.int64), start, P, V,
                                 np.array([float(np.mean(a))]), SCALES, grid, chunk_size=2, bank=None)
    err = rot.geodesic_deg(R, true)
    # the upside-down member starts 180 deg off; against the prototype without it, on the tilt grid's finest level and
    # N_side 8 and 16 around the best (3.7 deg apart, Gorski et al. 2005), it is found within the resampling's error
    # (test_pose_polish's bar: 12 deg); the upright four stay where they are (exactly: unmoved)
    assert moved.tolist() == [False] * 4 + [True], moved
    assert err[4] < 12.0, err
    np.testing.assert_array_equal(R[:4], start[:4])


def test_own_out_leaves_a_cluster_recorded_at_its_true_poses():
    # the same five recorded at their true rotations (the prototype their mean at those poses: the upside-down one
    # turned back by its transpose, i.e. counted upright): every own pose is nearest, nothing moves (the rule:
    # a move only when another up is 5% nearer, engine.OWN_OUT_MARGIN)
    true, X, W, a = _four_up_one_down()
    up = [_posed("ell", np.eye(3), np.random.default_rng(1))]  # the fifth as the fit would see it turned back
    Xa = np.concatenate([X[:4], up[0][0][None]])
    Wa = np.concatenate([W[:4], up[0][1][None]])
    P = ((Wa[:, None] * Xa).sum(axis=0) / np.maximum(Wa.sum(axis=0), 1e-12))[None].astype(np.float32)
    V = (Wa.sum(axis=0) / len(Xa))[None].astype(np.float32)
    grid = TiltGrid(nsides=(1, 2, 4), radial_margin=MARGINS[0], height_margin=MARGINS[1])
    R, moved = _polished_own_out(ArraySource(X, W, a), np.zeros(len(X), np.int64), true, P, V,
                                 np.array([float(np.mean(a))]), SCALES, grid, chunk_size=8, bank=None)
    assert not moved.any(), moved
    np.testing.assert_array_equal(R, true)


def test_screen_keeps_the_move_and_searches_the_member_that_needs_it(monkeypatch):
    # the screen (engine.own_out_screen: a member searched without its share only when, against the whole prototype,
    # another up is within OWN_OUT_SCREEN x its own) asked of this five-member cluster: the upside-down member is the
    # one candidate (against the whole prototype its true up is already near; the upright four fit their own up far
    # better than any other), and the screened polish makes the same move to the same rotation as the unscreened one
    X, W, a, P, V, grid, true = _cluster()
    start = np.stack([np.eye(3)] * len(X))
    asp = np.array([float(np.mean(a))])
    bank = engine.TiltBank(P, V, asp, SCALES, grid)
    near = engine.own_out_screen(np.asarray(X, np.float32), np.asarray(W, np.float32), start, bank, SCALES, grid)
    assert near.tolist() == [False] * 4 + [True], near
    runs = []
    for screen_min in (len(X) + 1, 2):      # unscreened (the cluster below the minimum), then screened
        monkeypatch.setattr(engine, "OWN_OUT_SCREEN_MIN", screen_min)
        runs.append(_polished_own_out(ArraySource(X, W, a), np.zeros(len(X), np.int64), start, P, V, asp, SCALES, grid,
                                      chunk_size=2, bank=None))
    np.testing.assert_array_equal(runs[0][1], runs[1][1])
    np.testing.assert_allclose(runs[0][0], runs[1][0], atol=1e-12)
