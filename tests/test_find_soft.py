"""find's soft route ([mine] find_route_soft, curate.knownclass.rank_fusion): reciprocal-rank fusion of two rankings.

Reference: Cormack, Clarke & Buettcher, "Reciprocal Rank Fusion outperforms Condorcet and individual Rank Learning
Methods", SIGIR 2009: RRFscore(d) = sum over the rankings r of 1 / (k + r(d)), r(d) the 1-based rank, higher first.
The reference twin below computes it from that definition with plain Python loops (dictionaries of ranks), sharing
nothing with ``rank_fusion``.  The outcome check: a route to a wrong prototype puts no view of the example's class in
the first 10; fused with a ranking that holds 6 of them in its first 10, the first 10 hold some (precision at 10 by
its definition), and a right route keeps at least half of its first 10.
"""
from __future__ import annotations

import numpy as np
import pytest

from protomine.curate.knownclass import rank_fusion


def _rrf_reference(keys, ids, ex, k):
    """{id: fused score} from the paper's definition: each ranking sorted by (key, id), the example dropped."""
    out = {}
    for key in keys:
        items = sorted((float(key[i]) if np.isfinite(key[i]) else float("inf"), str(ids[i]), i)
                       for i in range(len(ids)) if i != ex)
        for r, (_, _, i) in enumerate(items, start=1):
            out[i] = out.get(i, 0.0) + 1.0 / (k + r)
    return out


@pytest.mark.parametrize("k", [1, 10, 60])
def test_rank_fusion_matches_the_papers_definition(k):
    rng = np.random.default_rng(k)
    N, ex = 40, 7
    ids = np.array([f"o{i:03d}" for i in range(N)])
    a = rng.random(N)
    b = rng.random(N)
    b[[3, 11]] = a[[3, 11]] = np.round(a[3], 2)              # ties: broken by object id in both rankings
    fused = rank_fusion([a, b], ids, ex, k)
    ref = _rrf_reference([a, b], ids, ex, k)
    assert fused[ex] == -np.inf                               # the example is not a find
    for i, s in ref.items():
        assert fused[i] == pytest.approx(-s, rel=1e-12)
    # the fused order is the reference's order (higher score first, ties by id)
    got = [i for i in np.lexsort((ids, fused)) if i != ex]
    want = sorted(ref, key=lambda i: (-ref[i], ids[i]))
    assert got == want


def test_unplaceable_objects_stay_last():
    ids = np.array(["a", "b", "c", "d"])
    a = np.array([0.1, np.inf, 0.3, 0.2])
    b = np.array([0.2, np.inf, np.inf, 0.1])
    fused = rank_fusion([a, b], ids, 0, 10)
    assert np.isinf(fused[1]) and fused[1] > 0                # no ranking places b: last
    assert np.isfinite(fused[2]) and np.isfinite(fused[3])   # placed by at least one ranking
    assert fused[3] < fused[2]                                # d: ranks 1 and 1; c: ranks 2 and 3 (the example left out)


def test_wrong_route_shares_the_first_places():
    N, ex = 61, 60
    ids = np.array([f"o{i:03d}" for i in range(N)])
    cls = np.repeat([0, 1, 2], 20).tolist() + [0]             # the example is of class 0
    cls = np.array(cls)
    rng = np.random.default_rng(0)
    # the route to a wrong prototype: class 1 first, then 2, then 0
    wrong = np.array([{1: 0.0, 2: 1.0, 0: 2.0}[c] for c in cls]) + rng.random(N) * 0.1
    # the example's own ranking: 6 of its class in the first 10 (mixed with class 2), the rest of class 0 later
    own = np.where(cls == 0, np.where(np.arange(N) < 6, 0.0, 2.0), np.where(cls == 2, 0.05, 1.0)) + rng.random(N) * 0.01
    right = np.where(cls == 0, 0.0, 1.0) + rng.random(N) * 0.1

    def p10(key):
        order = [i for i in np.lexsort((ids, key)) if i != ex][:10]
        return float(np.mean(cls[order] == 0))

    assert p10(wrong) == 0.0 and p10(own) == 0.6 and p10(right) == 1.0
    assert p10(rank_fusion([wrong, own], ids, ex, 10)) >= 0.3     # wrong route: the example's own views come back
    assert p10(rank_fusion([right, own], ids, ex, 10)) >= 0.5     # right route: keeps at least half
