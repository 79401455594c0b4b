"""find's member route ([mine] find_member_route, curate.knownclass.reciprocal_member_rank): an example the known-class
route does not take ranks by the cluster nearest to it by its members when it is a reciprocal neighbour of that cluster.

Sources: the k-reciprocal test (Zhong, Zheng, Cao & Li, "Re-ranking Person Re-identification with k-reciprocal
Encoding", CVPR 2017: i is a neighbour of j's and j of i's) between an object and a cluster; the rank of a value among
others by scipy.stats.rankdata (method "min": 1 + the number strictly below) as the reference for the count.  The
outcome test uses the scene of tests/test_find_known.py, whose answer is known by construction: an occluded view of
the target class whose one-shot ranking puts views of a never-mined twin first, and a view of a class no member
resembles; the library's members are the target's and the other class's views.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import rankdata

from protomine.curate.knownclass import reciprocal_member_rank
from protomine.curate.oneshot import find_similar
from test_find_known import _world
from test_find_members import _cfg as _members_cfg, _with_members


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rank_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    m = rng.uniform(0.3, 1.5, 40)
    m[rng.choice(40, 5, replace=False)] = np.inf           # objects without a margin never rank before the example
    m[3] = m[7]                                               # a tie is not below
    for e in (m[7], 0.1, 2.0, float(np.median(m[np.isfinite(m)]))):
        big = np.where(np.isfinite(m), m, np.finfo(np.float64).max)
        want = int(rankdata(np.concatenate([[e], big]), method="min")[0]) - 1
        assert reciprocal_member_rank(m, e) == want


def test_rank_hand_worked():
    m = np.array([0.5, 0.7, np.inf, 0.9, 0.7])
    assert reciprocal_member_rank(m, 0.7) == 1           # only 0.5 is below; the tie at 0.7 is not
    assert reciprocal_member_rank(m, 0.1) == 0
    assert reciprocal_member_rank(m, np.inf) == 5        # an example without a margin ranks after every object


def _cfg(r: int) -> dict:
    cfg = _members_cfg(2)
    cfg["mine"]["find_prototype"] = 1.0       # the label decision's route is never taken: only the member route can be
    cfg["mine"]["find_prototype_weak"] = 0.0
    cfg["mine"]["find_members_shortlist"] = 16
    cfg["mine"]["find_member_route"] = r
    return cfg


def test_member_route_takes_the_occluded_view_and_ranks_its_class_first():
    lib, store, kind = _world()
    lib = _with_members(lib, store, kind)
    off = find_similar(lib, store, "t/example", _cfg(0))
    on = find_similar(lib, store, "t/example", _cfg(16))
    assert not off.route.taken and off.route.member_rank == -1
    # the example's nearest cluster by its members is the target's (0), and with r above the shortlist's size the
    # reciprocal test always passes
    assert on.route.taken and on.route.cluster == 0 and 0 <= on.route.member_rank < 16, on.route
    n_target = int(np.sum(kind == "target"))
    # alone, the occluded view ranks twin views among the target's; by the members more target views come first
    n_off = int(np.sum(kind[off.order[:n_target]] == "target"))
    n_on = int(np.sum(kind[on.order[:n_target]] == "target"))
    assert n_off <= n_target - 3 and n_on > n_off, (kind[off.order], kind[on.order])
    # it ranks as the label decision's route to the target does when that is taken (find_prototype 0.3)
    routed_cfg = _cfg(0)
    routed_cfg["mine"]["find_prototype"] = 0.3
    routed = find_similar(lib, store, "t/example", routed_cfg)
    assert routed.route.taken and routed.route.cluster == 0
    np.testing.assert_array_equal(on.order, routed.order)
    np.testing.assert_array_equal(on.rank_key, routed.rank_key)
    np.testing.assert_array_equal(on.route.score, routed.route.score)
    np.testing.assert_array_equal(on.distance, off.distance)
    np.testing.assert_array_equal(on.score, off.score)
    assert all(r["prototype"] == 0 for r in on.rows(3))
    # the rule itself: taken exactly when fewer than r shortlisted objects have a lower margin than the example
    rank = on.route.member_rank
    below = find_similar(lib, store, "t/example", _cfg(rank))
    assert not below.route.taken and below.route.member_rank == rank
    np.testing.assert_array_equal(below.order, off.order)
    at = find_similar(lib, store, "t/example", _cfg(rank + 1))
    assert at.route.taken
    np.testing.assert_array_equal(at.order, on.order)


def test_member_route_leaves_a_view_no_member_resembles():
    lib, store, kind = _world()
    lib = _with_members(lib, store, kind)
    off = find_similar(lib, store, "n/0", _cfg(0))
    on = find_similar(lib, store, "n/0", _cfg(8))
    # a never-mined view has a nearest cluster too, but it ranks after that cluster's own views (10 target or 3 other
    # views, members themselves), so it is no reciprocal neighbour and keeps its own ranking
    assert not on.route.taken and on.route.member_rank >= 8, on.route
    np.testing.assert_array_equal(on.order, off.order)


def test_without_the_members_volumes_nothing_changes():
    lib, store, kind = _world()
    lib = _with_members(lib, store, kind)
    lib.members["object"] = np.array([f"elsewhere/{i}" for i in range(len(lib.members["object"]))], dtype=object)
    for example in ("t/example", "n/0"):
        off, on = (find_similar(lib, store, example, _cfg(r)) for r in (0, 16))
        assert not on.route.taken and on.route.member_rank == -1
        np.testing.assert_array_equal(on.rank_key, off.rank_key)
