"""find's taken route ranked by the library's members ([mine] find_members, curate.knownclass.knn_margin).

Sources: the k nearest neighbours of an object within each class, the k-NN rule (Cover & Hart, "Nearest neighbor
pattern classification", IEEE Trans. Information Theory 1967); scikit-learn's NearestNeighbors on precomputed
distances is the reference for the per-class k smallest distances.  The outcome test is a construction whose answer
is known: a class whose members lie on two sides of their mean, and an impostor at that mean (it fits the prototype,
the members' mean, better than any member does, but no member well), as a never-mined class beside a mined one fits
its blurred prototype.  Precision at 10 by its definition and average precision by scikit-learn
(tests/ranking_measures.py) check the ranking.
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
from ranking_measures import p10_ap
from sklearn.neighbors import NearestNeighbors

from protomine.curate.knownclass import class_knn, fused_key, knn_margin, margin_key, members_key
from protomine.curate.oneshot import find_similar
from protomine.mine.library import Library
from test_find_known import _cfg as _known_cfg, _world


@pytest.mark.parametrize("k", [1, 3, 5])
def test_class_knn_matches_scikit_learn(k):
    rng = np.random.default_rng(k)
    Dm = rng.uniform(0.1, 2.0, (30, 17))
    mc = rng.integers(0, 3, 17)
    got = class_knn(Dm, mc, 3, k)
    for c in range(3):
        cols = np.flatnonzero(mc == c)
        nn = NearestNeighbors(n_neighbors=min(k, len(cols)), metric="precomputed").fit(np.zeros((len(cols), len(cols))))
        dist, _ = nn.kneighbors(Dm[:, cols])
        np.testing.assert_allclose(got[:, c], dist.mean(axis=1))


def test_class_knn_skips_missing_distances():
    # hand-worked: an inf (an object left out of its own row) is not a neighbour; a class with none finite is inf
    Dm = np.array([[np.inf, 0.2, 0.4, np.inf], [0.1, 0.3, 0.5, np.inf]])
    got = class_knn(Dm, np.array([0, 0, 0, 1]), 2, 2)
    np.testing.assert_allclose(got, [[0.3, np.inf], [0.2, np.inf]])


def _line():
    """1-D points, distance |x - y|: class b's 12 members at -1 and +1 (their prototype, the mean, at 0), 12 views of
    b near its members (at +-0.9 .. +-1.1), 12 impostors near 0 (never mined: the prototype fits them, no member does),
    another class c (members and views near 5).  The example is a view of b (not ranked: index 0)."""
    rng = np.random.default_rng(0)
    members = np.concatenate([np.full(6, -1.0), np.full(6, 1.0), 5.0 + rng.uniform(-0.3, 0.3, 12)])
    mc = np.array([0] * 12 + [1] * 12)
    protos = np.array([members[mc == 0].mean(), members[mc == 1].mean()])
    side = rng.choice([-1.0, 1.0], 12)
    x = np.concatenate([[1.0], side * rng.uniform(0.9, 1.1, 12), rng.uniform(-0.05, 0.05, 12), 5.0 + rng.uniform(-0.3, 0.3, 4)])
    cls = np.array(["b"] + ["b"] * 12 + ["imp"] * 12 + ["c"] * 4, dtype=object)
    return x, cls, np.abs(x[:, None] - protos[None]), np.abs(x[:, None] - members[None]), mc


def test_members_rank_the_class_before_what_fits_its_mean():
    x, cls, Dp, Dm, mc = _line()
    ids = np.array([f"o{i:02d}" for i in range(len(x))])
    by_proto = margin_key(Dp, 0)
    by_members = knn_margin(Dm, mc, 2, 0, 3)
    p_proto, ap_proto = p10_ap(by_proto, cls, ids, 0, "b")
    p_mem, ap_mem = p10_ap(by_members, cls, ids, 0, "b")
    assert p_proto == 0.0 and p_mem == 1.0, (p_proto, p_mem)
    assert ap_mem == pytest.approx(1.0) and ap_proto < 0.6
    # the margin on the members, by its definition: the mean of the 3 nearest of b's members over that of c's
    i = 5
    d_b = np.sort(np.abs(x[i] - np.array([-1.0] * 6 + [1.0] * 6)))[:3].mean()
    d_c = np.sort(Dm[i, 12:])[:3].mean()
    assert by_members[i] == pytest.approx(d_b / d_c)


def test_members_key_puts_the_shortlist_first_in_its_order():
    route = np.array([0.5, 0.1, 0.2, 0.3, 0.4, np.inf, 0.25])
    ids = np.array(["a", "b", "c", "d", "e", "f", "g"])
    key = members_key(route, np.array([1, 2, 6]), np.array([0.9, 0.1, 0.1]), ids)
    order = list(ids[np.lexsort((ids, key))])
    # the shortlist by its own key, ties by id (c before g), then the rest in the route's order, inf last
    assert order == ["c", "g", "b", "d", "e", "a", "f"]
    assert np.isinf(key[5])


def _cfg(k: int) -> dict:
    cfg = _known_cfg(0.3)
    cfg["mine"]["find_members"] = k
    cfg["mine"]["find_members_shortlist"] = 8
    cfg["mine"]["find_prototype_fuse"] = 0.5
    return cfg


def _with_members(lib: Library, store, kind: np.ndarray) -> Library:
    """The library with members: the target views in cluster 0, the other class's views in 1 (held by the store)."""
    ids = np.asarray(store.ids, dtype=object)
    sel = np.flatnonzero((kind == "target") | (kind == "other"))
    members = {"object": ids[sel], "cluster": np.where(kind[sel] == "target", 0, 1).astype(np.int64),
               "distance": np.full(len(sel), 0.01)}
    return Library(lib.prototypes, members, copy.deepcopy(lib.attrs))


def test_find_ranks_the_routes_shortlist_by_its_members():
    lib, store, kind = _world()
    lib = _with_members(lib, store, kind)
    off = find_similar(lib, store, "t/example", _cfg(0))
    on = find_similar(lib, store, "t/example", _cfg(2))
    assert off.route.taken and on.route.taken and on.route.cluster == 0
    # only the route's first 8 are re-ordered, the rest keep its order after them; distances and scores unchanged
    assert set(on.order[:8]) == set(off.order[:8])
    assert list(on.order[8:]) == list(off.order[8:])
    np.testing.assert_array_equal(on.distance, off.distance)
    np.testing.assert_array_equal(on.score, off.score)
    # the shortlist's order is the fused key of the margin on the members, each object's own row without itself
    from protomine.curate import oneshot
    short = off.order[:8]
    X, W = oneshot._features(store, short, oneshot._feature_weights(lib, _cfg(2)))
    mrows = np.array([store.index_of(str(o)) for o in lib.members["object"]])
    P, V = oneshot._features(store, mrows, oneshot._feature_weights(lib, _cfg(2)))
    asp = oneshot._aspects(store, mrows)
    from protomine.mine.tilts import tilt_pose_distances
    mc = np.asarray(lib.members["cluster"])
    kw = dict(scales=tuple(lib.scales), grid=oneshot._grid(lib))
    # the named class's members each as the one prototype, the others in one search of them all (module docstring 6.)
    Dm = np.empty((len(short), len(mrows)))
    for j in np.flatnonzero(mc == 0):
        Dm[:, j] = tilt_pose_distances(X, W, P[j:j + 1], V[j:j + 1], aspect=asp[j:j + 1], **kw).D[:, 0]
    rest = np.flatnonzero(mc != 0)
    Dm[:, rest] = tilt_pose_distances(X, W, P[rest], V[rest], aspect=asp[rest], **kw).D
    Dm[short[:, None] == mrows[None, :]] = np.inf
    want = fused_key(knn_margin(Dm, lib.members["cluster"], 2, 0, 2),
                     oneshot.both_ways(off.distance, off.reverse)[short], 0.5)
    sid = np.asarray(store.ids).astype(str)[short]
    assert list(on.order[:8]) == list(short[np.lexsort((sid, want))])


def test_without_the_members_volumes_the_route_ranks_as_before():
    lib, store, kind = _world()
    lib = _with_members(lib, store, kind)
    lib.members["object"] = np.array([f"elsewhere/{i}" for i in range(len(lib.members["object"]))], dtype=object)
    off = find_similar(lib, store, "t/example", _cfg(0))
    on = find_similar(lib, store, "t/example", _cfg(2))
    np.testing.assert_array_equal(on.rank_key, off.rank_key)


class _Lib:
    def __init__(self, members):
        self.members = members


def test_sure_members_leaves_out_the_members_mining_was_unsure_of():
    # hand-worked: ratios d / d2 = 0.2, 0.8, 0.5 (cluster 0), 1.05 (cluster 1), inf second distance (cluster 1: sure);
    # at 0.75 the 0.8 and 1.05 members go; cluster 2's only member (0.9) stays, as a cluster never loses all of them
    from protomine.mine.memberknn import sure_members
    m = {"cluster": np.array([0, 0, 0, 1, 1, 2]), "distance": np.array([0.2, 0.8, 0.5, 1.05, 0.3, 0.9]),
         "second_distance": np.array([1.0, 1.0, 1.0, 1.0, np.inf, 1.0])}
    np.testing.assert_array_equal(sure_members(_Lib(m), 0.75), [True, False, True, False, True, True])
    np.testing.assert_array_equal(sure_members(_Lib(m), 0.0), [True] * 6)


def test_edited_members_stop_a_misassigned_member_pulling_its_class_in():
    # the edited nearest-neighbour rule (Wilson, IEEE Trans. SMC 1972, from memory): a sample of class B filed under A
    # makes B's objects look like A's to the k-NN rule; left out, they go back to B.  Members: A = 0, 1 and a B object
    # misfiled under A (index 2, mining margin 0.95); B = 3, 4.  A view of B at distance 0.1 from the misfiled member
    # and 0.3 from B's members: with it, d_1(A) = 0.1 < d_1(B) = 0.3 (margin for A 1/3, it ranks as an A); edited,
    # d_1(A) = 0.9 (hand-computed), margin for A 3.0.
    from protomine.mine.memberknn import Members, subset, sure_members
    m = {"cluster": np.array([0, 0, 0, 1, 1]), "distance": np.array([0.2, 0.3, 0.95, 0.2, 0.25]),
         "second_distance": np.ones(5)}
    Dm = np.array([[0.9, 0.95, 0.1, 0.3, 0.35]])
    assert knn_margin(Dm, m["cluster"], 2, 0, 1)[0] == pytest.approx(0.1 / 0.3)
    keep = sure_members(_Lib(m), 0.75)
    mem = Members(np.zeros((5, 1, 1, 1, 1)), np.zeros((5, 1, 1, 1)), np.ones(5), m["cluster"], np.array(list("abcde")))
    ed = subset(mem, keep)
    assert list(ed.ids) == ["a", "b", "d", "e"]
    assert knn_margin(Dm[:, keep], ed.cluster, 2, 0, 1)[0] == pytest.approx(0.9 / 0.3)
