"""The label stage's member evidence ([mine] label_members, label.matcher.members_decide / member_statistic, the
calibration in mine.pipeline.view_ratio_calibration).

Sources: the k nearest neighbours of a view within each class, the k-NN rule (Cover & Hart, "Nearest neighbor pattern
classification", IEEE Trans. Information Theory 1967), with scikit-learn's NearestNeighbors on precomputed distances as
the reference for each class's k smallest distances; conformal p-values and the split-conformal cut by their
definitions (Vovk, Gammerman & Shafer 2005; Lei et al. 2018), Fisher's combination by scipy's combine_pvalues
(Fisher 1925).  The decision test is a construction whose answer is known: a class whose members lie on two sides of
their mean, a view of a second class that lies nearer the first class's prototype (the members' mean) than its own, but
next to its own class's members.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn.neighbors import NearestNeighbors

from protomine.label.matcher import member_shortlist, member_statistic, members_decide
from protomine.mine.library import Library
from protomine.mine.memberknn import class_knn
from protomine.mine.openset import best_second_ratio, conformal_cut
from protomine.mine.pipeline import view_calibrated_fields, view_ratio_calibration


def _knn_sklearn(Dm, mc, K, k):   # each class's k nearest members' mean distance, by scikit-learn
    out = np.full((len(Dm), K), np.inf)
    for c in range(K):
        cols = np.flatnonzero(mc == c)
        nn = NearestNeighbors(n_neighbors=min(k, len(cols)), metric="precomputed").fit(np.zeros((len(cols), len(cols))))
        out[:, c] = nn.kneighbors(Dm[:, cols])[0].mean(axis=1)
    return out


def test_shortlist_by_its_definition():
    rng = np.random.default_rng(3)
    D = rng.uniform(1.0, 1.6, (200, 5))
    D[rng.random((200, 5)) < 0.1] = np.inf
    got = member_shortlist(D, 1.2, 3)
    for i in range(len(D)):
        order = sorted(range(5), key=lambda j: (D[i, j], j))[:3]
        least = D[i].min()
        want = {j for j in order if np.isfinite(D[i, j]) and D[i, j] <= 1.2 * least}
        assert set(np.flatnonzero(got[i])) == (want if len(want) >= 2 else set()), i
    assert not member_shortlist(D, 0.0, 3).any()   # below 1: the members decide nothing


def test_members_decide_the_view_the_mean_draws_away():
    """Line, distance |x - y|: class 0's members at -1 and +1 (prototype 0), class 1's at 0.35 .. 0.45 (prototype 0.4),
    class 2 at 5 .. 5.2.  A view at 0.18 is nearer class 0's prototype (0.18 against 0.22), so the prototypes name it 0;
    its nearest members are class 1's.  A view at 1.8 is nearer class 1's prototype (1.4 against 1.8) and class 0's
    members (0.8 against 1.4).  Views with no second prototype within the ratio (0.41, -0.95) keep their nearest, and a
    view at 3.0 (prototypes 2 and 1 within the ratio) stays 2, whose members are nearer too.  On random shortlists the
    decision equals scikit-learn's per-class k-NN among the shortlisted."""
    members = np.array([-1.0] * 4 + [1.0] * 4 + [0.35, 0.38, 0.4, 0.42, 0.45] + [5.0, 5.1, 5.2])
    mc = np.array([0] * 8 + [1] * 5 + [2] * 3)
    protos = np.array([members[mc == c].mean() for c in range(3)])
    x = np.array([0.18, 1.8, 0.41, -0.95, 3.0])
    D = np.abs(x[:, None] - protos[None])
    Dm = np.abs(x[:, None] - members[None])
    dk = class_knn(Dm, mc, 3, 3)
    np.testing.assert_allclose(dk, _knn_sklearn(Dm, mc, 3, 3))
    best = members_decide(D, dk, D, 1.3, 3, 1.0)   # Dr = D and weight 1: the key is d_k itself
    assert list(np.argmin(D, axis=1)) == [0, 1, 1, 0, 2]
    assert list(best) == [1, 0, 1, 0, 2]
    # only the shortlist is searched: a NaN d_k is not a candidate, and without two candidates the nearest stays
    dk_short = np.where(member_shortlist(D, 1.3, 3), dk, np.nan)
    assert list(members_decide(D, dk_short, D, 1.3, 3, 1.0)) == [1, 0, 1, 0, 2]
    assert list(members_decide(D, np.full(D.shape, np.nan), D, 1.3, 3, 1.0)) == list(np.argmin(D, axis=1))
    # weight 0: the key is D, the decision the prototypes'
    assert list(members_decide(D, dk, D, 1.3, 3, 0.0)) == list(np.argmin(D, axis=1))
    # the rule by its definition on random shortlists: among the shortlisted, the least D x (d_k / Dr) ^ 0.5, d_k the
    # mean of the 3 nearest members (scikit-learn)
    rng = np.random.default_rng(5)
    D = rng.uniform(1.0, 1.5, (100, 4))
    Dr = D * rng.uniform(0.8, 1.2, (100, 4))
    Dm = rng.uniform(0.1, 2.0, (100, 20))
    mc = rng.integers(0, 4, 20)
    mc[:4] = np.arange(4)
    ref = _knn_sklearn(Dm, mc, 4, 3)
    short = member_shortlist(D, 1.25, 3)
    got = members_decide(D, class_knn(Dm, mc, 4, 3), Dr, 1.25, 3, 0.5)
    moved = 0
    for i in range(100):
        cand = np.flatnonzero(short[i])
        want = cand[np.argmin(D[i, cand] * np.sqrt(ref[i, cand] / Dr[i, cand]))] if len(cand) else np.argmin(D[i])
        assert got[i] == want, i
        moved += want != np.argmin(D[i])
    assert moved > 5


def test_member_statistic():
    # hand-worked: each searched prototype's d_k over the least d_k among the others; NaN without a rival or a d_k
    dk = np.array([[0.2, np.nan, 0.4], [0.3, 0.1, 0.6], [np.nan, 0.5, np.nan]])
    got = member_statistic(dk)
    want = np.array([[0.5, np.nan, 2.0], [3.0, 1 / 3, 6.0], [np.nan, np.nan, np.nan]])
    np.testing.assert_allclose(got, want)


def _loo(v):   # each value's p-value among all, itself counted: #{j: v_j >= v_i} / m (written out)
    return np.array([np.mean(v >= w) for w in v])


def _fisher(*ps):   # scipy's Fisher combination, one view at a time
    return np.array([stats.combine_pvalues(list(p), method="fisher")[1] for p in zip(*ps)])


def test_member_p_values_per_class():
    """Label time: (1 + #{x_i >= x}) / (m + 1) among the held-out values of the column's class when it has >= 19 of
    them, else among all; 1 where there is no statistic.  Held out: leave-one-out, #{j: x_j >= x_i} / m within the
    class (or all)."""
    from protomine.mine.openset import MIN_CLASS_MEMBER_VIEWS, member_pvalues, mondrian_loo_pvalues
    rng = np.random.default_rng(2)
    values = np.r_[rng.uniform(0.5, 1.0, 25), rng.uniform(1.0, 2.0, 30), rng.uniform(0.1, 3.0, 5)]
    classes = np.r_[np.zeros(25, int), np.ones(30, int), np.full(5, 2)]
    x = rng.uniform(0.3, 2.5, (40, 3))
    x[3, 1] = np.nan
    got = member_pvalues(values, classes, x)
    for i in range(40):
        for c in range(3):
            pool = values[classes == c] if c < 2 else values
            want = 1.0 if np.isnan(x[i, c]) else (1 + np.sum(pool >= x[i, c])) / (len(pool) + 1)
            assert got[i, c] == pytest.approx(want)
    loo = mondrian_loo_pvalues(values, classes, MIN_CLASS_MEMBER_VIEWS)
    for i in range(len(values)):
        pool = values[classes == classes[i]] if classes[i] < 2 else values
        assert loo[i] == pytest.approx(np.mean(pool >= values[i]))


def _heldout(rng, n):
    own = rng.integers(0, 3, n)
    D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
    D[np.arange(n), own] = D.min(axis=1) * np.exp(-np.abs(rng.normal(0.1, 0.2, n)))
    dk = D * np.exp(rng.normal(0.5, 0.3, (n, 3)))
    return own, D, dk


@pytest.mark.parametrize("within", [0.0, 1.3])
def test_calibration_joins_the_members_p_value(within):
    """The held-out views' member statistics (d_k of the decided prototype over the least d_k of the others, by its
    definition here) at the decided prototype (decided as the label stage decides: D x (d_k / Dr) ^ 0.5 among the
    shortlisted) are kept sorted, and the member cut is the split-conformal cut of Fisher's combination of the
    score, the ratio's leave-one-out p-value (the ratio of the view's least distance) and the statistic's; the cut
    without the members stays the one computed without them."""
    rng = np.random.default_rng(17)
    n = 200
    own, D, dk = _heldout(rng, n)
    j = np.arange(n)
    d, own_up = D[j, own], np.ones(n, bool)
    fields, _ = view_calibrated_fields(d, np.ones(n), own, own_up, 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=own_up, view_normalised=True)
    least = np.argmin(D, axis=1)
    r = best_second_ratio(D)[j, least]
    short = member_shortlist(D, within, 3)
    Dr = D * np.exp(rng.normal(0.0, 0.1, D.shape))
    key = D * np.sqrt(dk / Dr)
    b = np.array([np.flatnonzero(short[i])[np.argmin(key[i, short[i]])] if short[i].any() else least[i] for i in j])
    if within > 0:
        assert (b != least).sum() > 10
    x = np.array([dk[i, b[i]] / np.delete(dk[i], b[i]).min() for i in j])
    px = np.empty(n)   # among the views decided on the same prototype (each decides >= 19 here)
    for c in range(3):
        assert (b == c).sum() >= 19
        px[b == c] = _loo(x[b == c])
    plain = view_ratio_calibration(D, d, own, own_up, fields, 0.05)
    got = view_ratio_calibration(D, d, own, own_up, fields, 0.05, members=(dk, Dr, within, 3, 0.5, True))
    order = np.lexsort((x, b))
    assert np.array_equal(got["unknown_view_members"], x[order])
    assert np.array_equal(got["unknown_view_member_classes"], b[order])
    assert got["unknown_view_ratio_cut"] == plain["unknown_view_ratio_cut"]
    want = conformal_cut(_fisher(s, _loo(r), px), 0.05)
    assert np.isclose(got["unknown_view_member_cut"], want, rtol=1e-9)
    assert not np.isclose(got["unknown_view_member_cut"], plain["unknown_view_ratio_cut"])
    # decision only (no score): no member attributes
    assert "unknown_view_members" not in view_ratio_calibration(D, d, own, own_up, fields, 0.05,
                                                                members=(dk, Dr, within, 3, 0.5, False))


def test_matcher_joins_the_members_p_value(tiny_world, tmp_path):
    """A library mined with label_members = 1 and label_members_score records the held-out statistics and their cut;
    the matcher's d_k is each view's least pose-searched distance to each class's members (their fused volumes read
    from the mined store, searched here one class at a time, the nearest by scikit-learn), and its score is Fisher's
    combination (scipy's chi-squared tail) of the score without the members (the library without their attributes)
    and the statistic's conformal p-value (1 + #{x_i >= x}) / (m + 1), written out; the flag uses the member cut."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.ingest.volume import matching_features
    from protomine.label.matcher import make_matcher
    from protomine.mine.pipeline import mine_store, store_aspect
    from protomine.mine.tilts import tilt_pose_distances
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "label_members": 1, "label_members_score": True}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    assert "unknown_view_members" in lib.attrs and "unknown_view_member_cut" in lib.attrs
    cal = np.asarray(lib.attrs["unknown_view_members"], np.float64)
    st = open_store(tiny_world["store"])
    views, cams = st.read_single_views(np.arange(len(st.single_object))), np.asarray(st.single_camera)
    mt = make_matcher(lib, cfg)
    assert mt.unknown_cut == float(lib.attrs["unknown_view_member_cut"])
    got = mt.match(views, cams)
    # the twin: each class's members searched apart, d_1 by scikit-learn's nearest neighbour
    X, W = mt.features(views)
    rows = np.array([list(st.ids).index(str(o)) for o in lib.members["object"]])
    P, V = matching_features(st.read_volume_at(rows), free_weight=mt.free_weight, colour_weight=mt.colour_weight)
    asp = store_aspect(st, cfg)[rows]
    mc = np.asarray(lib.members["cluster"])
    dk = np.empty((len(views), 2))
    for c in range(2):
        j = np.flatnonzero(mc == c)
        Dc = tilt_pose_distances(X, W, P[j], V[j], aspect=asp[j], scales=mt.scales, grid=None).D
        dk[:, c] = _knn_sklearn(Dc, np.zeros(len(j), int), 1, 1)[:, 0]
    np.testing.assert_allclose(got["member_distance"], dk, rtol=1e-5)
    attrs = {k: v for k, v in lib.attrs.items() if k not in ("unknown_view_members", "unknown_view_member_cut")}
    three = make_matcher(Library(lib.prototypes, lib.members, attrs, lib.path), cfg).match(views, cams)["score"]
    x3 = np.exp(-stats.chi2.isf(np.clip(three, 1e-300, 1.0), 6) / 2)   # S = chi2_6 tail of -2 ln x: x back
    stat = dk / dk[:, ::-1]
    pm = np.array([(1 + np.sum(cal >= v - 1e-12)) / (len(cal) + 1) for v in stat.ravel()]).reshape(stat.shape)
    np.testing.assert_allclose(got["score"], stats.chi2.sf(-2 * np.log(x3 * pm), 8), rtol=1e-6, atol=1e-9)


def test_member_blocks_give_the_whole_banks_distances(monkeypatch):
    """Members are searched in blocks of ``memberknn.MEMBER_BLOCK`` (memory); without tilts the pose search is exhaustive
    over yaw x scale for every (view, member) pair, so a pair's distance cannot depend on the bank it is searched in:
    blocks of 3 over groups of 7 and 2 members give the one-bank search's distances, in the right columns, and inf
    where a group does not reach.  Equal up to float32 rounding, not to the bit: the products' kernels depend on the
    batch's shape on some CPUs (a block of one member differed in the 7th digit on an AVX-512 machine)."""
    from protomine.mine import memberknn
    from protomine.mine.synthetic import SCALES, synthetic_objects, synthetic_prototypes
    from protomine.mine.tilts import tilt_pose_distances
    rng = np.random.default_rng(11)
    grid = (5, 4, 12, 6)
    P = synthetic_prototypes(rng, 3, grid)
    Xm, Wm, *_ = synthetic_objects(rng, P, 9)
    X, W, *_ = synthetic_objects(rng, P, 5)
    asp = np.ones(9)
    groups = [(np.array([0, 1, 2, 4]), np.arange(7)), (np.array([3]), np.array([7, 8]))]
    monkeypatch.setattr(memberknn, "MEMBER_BLOCK", 3)
    got = memberknn.searched_distances(X, W, Xm, Wm, asp, groups, SCALES, None)
    for views, mem in groups:
        want = tilt_pose_distances(X[views], W[views], Xm[mem], Wm[mem], aspect=asp[mem], scales=SCALES, grid=None).D
        np.testing.assert_allclose(got[np.ix_(views, mem)], want, rtol=1e-5, atol=1e-6)
    assert np.isinf(got[3, :7]).all() and np.isinf(got[np.ix_([0, 1, 2, 4], [7, 8])]).all()


def test_cluster_members_bound():
    """A cluster's searched members: all of them up to the bound, else that many evenly spaced in member order (the
    first and the last kept, gaps within one of M / cap), never another cluster's."""
    from protomine.mine.memberknn import cluster_members
    mc = np.array([0, 1] * 50 + [2] * 5)
    assert list(cluster_members(mc, 2, 32)) == list(range(100, 105))
    got = cluster_members(mc, 0, 8)
    want = np.flatnonzero(mc == 0)
    assert len(got) == 8 and got[0] == want[0] and got[-1] == want[-1] and set(got) <= set(want)
    gaps = np.diff(np.searchsorted(want, got))
    assert gaps.min() >= 1 and gaps.max() - gaps.min() <= 1   # evenly spaced: 49 steps over 7 gaps, 7 each
    assert list(cluster_members(mc, 1, 0)) == list(np.flatnonzero(mc == 1))   # 0: no bound
