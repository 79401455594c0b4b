"""mine.unseen: the share of a single view's surface its posed prototype has not observed, and the decision charge of
``[mine] unseen_charge`` (shapes of our own, no capture behind them)."""
import numpy as np
import pytest

from protomine.mine.posesearch import pose_distances
from protomine.mine.tilts import TiltBank, TiltGrid
from protomine.mine.unseen import posed_weights, unseen_shares

R, A, H = 8, 36, 12


def _view(rng):
    """A single view of a block: surface evidence 1 on a slab of cells (radial bins 2-5, azimuth bins 0-8, heights 0-5),
    free space in front of it, the rest unseen; W = 0.5 (one frame of two, ``ingest.volume.matching_features``)."""
    X = np.zeros((1, 5, R, A, H), np.float32)
    W = np.zeros((1, R, A, H), np.float32)
    X[0, 0, 2:6, 0:9, 0:6] = 1.0
    X[0, 2:5, 2:6, 0:9, 0:6] = 0.3
    W[0, :, 0:12, :] = 0.5
    X[0, 1, 6:, 0:12, :] = np.sqrt(0.5)       # free beyond the slab
    X += rng.normal(0.0, 0.02, X.shape).astype(np.float32) * (W[:, None] > 0)
    return X, W


def test_share_is_the_unobserved_part_of_the_view_surface():
    """The definition (mine.unseen docstring), evaluated independently with numpy.roll for whole-bin yaws at scale 1
    (posesearch's posed prototype roll(P, s), its module docstring): share = sum over the view's surface cells of
    1 - min(v, 1), over their count."""
    rng = np.random.default_rng(0)
    X, W = _view(rng)
    V = rng.uniform(0.0, 1.2, (2, R, A, H)).astype(np.float32)
    yaw = np.array([[30.0, 250.0]])
    got = unseen_shares(V, None, X, W, np.zeros((1, 2, 3)), yaw, np.ones((1, 2)), np.ones((1, 2), bool))
    solid = (X[0, 0] >= 0.4) & (W[0] > 0)
    for k in range(2):
        v = np.roll(V[k], int(yaw[0, k] / 10), axis=1)
        assert got[0, k] == pytest.approx(float((1 - np.minimum(v, 1))[solid].sum() / solid.sum()), rel=1e-5)
    # a fully observed prototype vouches for every cell; one observed nowhere for none
    full = unseen_shares(np.stack([np.ones((R, A, H)), np.zeros((R, A, H))]).astype(np.float32), None, X, W,
                         np.zeros((1, 2, 3)), yaw, np.ones((1, 2)), np.ones((1, 2), bool))
    assert full[0] == pytest.approx([0.0, 1.0])


def test_a_scaled_down_copy_cannot_vouch_beyond_its_grid():
    """posesearch's scaling rule (module docstring): a prototype scaled by sigma < 1 samples radial bin i at
    (i + 0.5) / sigma - 0.5, and beyond the grid's edge (> R - 0.5) it is unknown.  At sigma 0.87 on 8 radial bins
    bin 7 reads 8.12 (outside), bin 6 reads 6.97 (inside): a view whose surface fills bins 6 and 7 equally is half
    unvouched by a fully observed prototype, and not at all at scale 1."""
    X = np.zeros((1, 5, R, A, H), np.float32)
    W = np.full((1, R, A, H), 0.5, np.float32)
    X[0, 0, 6:8, 3:5, 2:4] = 1.0
    V = np.ones((1, R, A, H), np.float32)
    args = (None, X, W, np.zeros((1, 1, 3)), np.zeros((1, 1)))
    assert unseen_shares(V, *args, np.full((1, 1), 0.87), np.ones((1, 1), bool))[0, 0] == pytest.approx(0.5)
    assert unseen_shares(V, *args, np.ones((1, 1)), np.ones((1, 1), bool))[0, 0] == pytest.approx(0.0)
    assert posed_weights(V, np.array([0.87]), np.array([0.0]))[0, 7].max() == 0.0


def test_tilted_match_reads_the_copy_on_its_face():
    """A match on another face is charged by the copy resting on that face (``TiltBank.copies_at``), the same share
    as the definition evaluated on that copy by hand."""
    rng = np.random.default_rng(1)
    X, W = _view(rng)
    P = np.zeros((1, 5, R, A, H), np.float32)
    P[0, 0, :5, :, :8] = 1.0                 # a squat cylinder, solid
    V = np.ones((1, R, A, H), np.float32)
    V[0, :, :, :3] = 0.0                     # never seen near its base (flush with the support plane)
    bank = TiltBank(P, V, np.array([1.0]), (1.0,), TiltGrid(nsides=(1,)))
    u = np.array([1.0, 0.0, 0.0])
    got = unseen_shares(V, bank, X, W, u[None, None], np.array([[20.0]]), np.ones((1, 1)), np.zeros((1, 1), bool))
    _, vc = bank.copies_at(0, u[None])
    v = np.roll(vc[0], 2, axis=1)
    solid = (X[0, 0] >= 0.4) & (W[0] > 0)
    assert got[0, 0] == pytest.approx(float((1 - np.minimum(v, 1))[solid].sum() / solid.sum()), rel=1e-5)
    assert 0.0 < got[0, 0] < 1.0


def test_charge_stops_rewarding_a_prototype_that_saw_little_of_the_view():
    """Two prototypes of a view of a block (from memory, the failure the charge is for): the block itself, observed
    everywhere but a little off (surface 0.85 where the view reads 1), and a prototype that saw only one corner of
    the view, where it agrees exactly.  The observation-weighted distance compares each on what it saw, so the
    corner wins; with the charge (``[mine] unseen_charge`` 0.01, on the order of the demo's chosen value) the block
    does, and the corner's charge is its unseen share (about 0.9) x 0.01."""
    rng = np.random.default_rng(2)
    X, W = _view(rng)
    block = np.array(X[0], copy=True)
    block[0] = np.where(X[0, 0] > 0.5, 0.85, 0.0)
    block[1] = np.where(W[0] > 0, X[0, 1], 0.0)
    corner = np.array(X[0], copy=True)
    V = np.ones((2, R, A, H), np.float32)
    V[1] = 0.0
    V[1, 2:4, 0:3, 0:3] = 1.0                  # the corner of the slab it saw
    P = np.stack([block, corner]).astype(np.float32)
    m = pose_distances(X, W, P, V, scales=(1.0,))
    D = np.asarray(m.D, np.float64)
    assert np.argmin(D[0]) == 1                # the corner wins without the charge
    share = unseen_shares(V, None, X, W, np.zeros((1, 2, 3)), np.asarray(m.yaw_deg, np.float64),
                          np.asarray(m.scale, np.float64), np.ones((1, 2), bool))
    assert share[0, 0] < 0.01 and share[0, 1] > 0.85
    assert np.argmin(D[0] + 0.01 * share[0]) == 0


def test_matcher_adds_the_charge_to_the_decision_distance_only(tiny_world):
    """[mine] unseen_charge c through the label matcher: every decision distance is the one without the charge plus
    c x the share of the definition (recomputed here at the search's poses), the scored distance (the calibration's)
    is untouched, and the class is the argmin of the charged distances."""
    import json
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library

    def matcher(c: float):
        lib = read_library(tiny_world["library"])
        cfg = lib.config
        cfg["mine"]["unseen_charge"] = c
        lib.attrs["config"] = json.dumps(cfg)
        return make_matcher(lib, tiny_world["cfg"])

    vols = open_store(tiny_world["store"]).read_single_views()
    plain, charged = matcher(0.0), matcher(0.02)
    m0, m1 = plain.match(vols), charged.match(vols)
    X, W = charged.features(vols)
    _, raw, scale, up, upright = charged.search.poses(X, W)
    share = unseen_shares(charged.V, charged.search.bank, X, W, up, raw, scale, upright)
    assert ((share >= 0) & (share <= 1)).all() and share.max() > 0
    fin = np.isfinite(m0["distance"])
    np.testing.assert_allclose(m1["distance"][fin], m0["distance"][fin] + 0.02 * share[fin], rtol=1e-6)
    np.testing.assert_array_equal(m1["scored_distance"], m0["scored_distance"])
    np.testing.assert_array_equal(m1["best"], np.argmin(np.where(fin, m1["distance"], np.inf), axis=1))
