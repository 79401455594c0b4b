"""find's k-reciprocal re-ranking ([mine] find_rerank, curate.rerank).

Source: Zhong, Zheng, Cao & Li, "Re-ranking Person Re-identification with k-reciprocal Encoding", CVPR 2017: the
k-reciprocal neighbours R(p, k) (eq. 3-4), their expansion R* by the R(q, k/2) of members sharing at least 2/3
(eq. 6), the weighted vectors V (eq. 7: exp(-d) on R*), the Jaccard distance 1 - sum min / sum max (eq. 10) and
the final distance (1 - lambda) d_J + lambda d (eq. 12).  The reference twin below computes those from the
definitions with Python sets and loops (sharing no helper with curate.rerank).  The outcome test is a table built
so that the answer is known: the example's own distances put a neighbouring class's views among its first 10
(a poor partial view), while the views of its class are mutual near neighbours of each other.  Precision at 10
by its definition and average precision by scikit-learn (tests/ranking_measures.py) check the ranking.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from ranking_measures import p10_ap

from protomine.curate.oneshot import find_similar, ranking_key
from protomine.curate.rerank import jaccard_distance, reranked_key, symmetrised
from test_find_expansion import _cfg as _base_cfg, _library, _scene


def _naive_jaccard(D: np.ndarray, k: int, big: float = math.inf, m: int | None = None) -> list[float]:
    """Zhong et al.'s Jaccard distance of row 0 to every row, from the definitions (eq. 3-10), loops and sets.
    tests/test_find_anchors.py's use: a pair at ``big`` (non-finite, read as ``big`` for the nearest-neighbour order)
    weighs exp(0), and the example's (row 0's) set is cut to the first ``m`` nodes (the objects)."""
    n = len(D)

    def nearest(i, kk):              # i's kk + 1 nearest, itself included, ties by index
        return set(sorted(range(n), key=lambda j: (D[i][j], j))[:kk + 1])

    def recip(i, kk):
        return {j for j in nearest(i, kk) if i in nearest(j, kk)}

    star = []
    for i in range(n):
        r = recip(i, k)
        s = set(r)
        for q in r:
            h = recip(q, max(1, k // 2))
            if 3 * len(h & r) >= 2 * len(h):
                s |= h
        star.append(s if i or m is None else {j for j in s if j < m})
    vecs = []
    for i in range(n):
        top = max(v for v in D[i] if v < big)
        w = {j: (math.exp(-D[i][j] / top) if D[i][j] < big else 1.0) for j in star[i]}
        tot = sum(w.values())
        vecs.append({j: v / tot for j, v in w.items()})
    out = []
    for i in range(n):
        keys = set(vecs[0]) | set(vecs[i])
        lo = sum(min(vecs[0].get(j, 0.0), vecs[i].get(j, 0.0)) for j in keys)
        hi = sum(max(vecs[0].get(j, 0.0), vecs[i].get(j, 0.0)) for j in keys)
        out.append(1.0 - lo / hi)
    return out


def _table(seed: int = 0):
    """Symmetric distances (n, n) over the example (row 0) and 24 views: 12 of its class (0), 12 of a neighbouring
    class (1).  Views of one class are near each other (0.1-0.3), the two classes far apart (0.8-1.0); the example,
    a poor view, is nearer to 5 views of class 1 (0.20-0.30) than to 7 of its own (0.35-0.60)."""
    rng = np.random.default_rng(seed)
    cls = np.array([0] + [0] * 12 + [1] * 12)
    n = len(cls)
    D = np.where(cls[:, None] == cls[None, :], rng.uniform(0.1, 0.3, (n, n)), rng.uniform(0.8, 1.0, (n, n)))
    D = np.triu(D, 1) + np.triu(D, 1).T
    ex_row = np.concatenate([[0.0], rng.uniform(0.10, 0.20, 5), rng.uniform(0.35, 0.60, 7),
                             rng.uniform(0.20, 0.30, 5), rng.uniform(0.70, 0.90, 7)])
    D[0], D[:, 0] = ex_row, ex_row
    return D, cls


def test_jaccard_distance_matches_the_definition():
    for seed in range(3):
        D, _ = _table(seed)
        for k in (3, 6, 10):
            dj, dn = jaccard_distance(D, k)
            np.testing.assert_allclose(dj, _naive_jaccard(D.tolist(), k), atol=1e-12)
            np.testing.assert_allclose(dn, D[0] / D[0].max())


def test_rerank_puts_the_examples_mutual_neighbours_first():
    D, cls = _table()
    ids = np.array([f"o{i:02d}" for i in range(len(cls))])
    p0, ap0 = p10_ap(D[0], cls, ids, 0, 0)
    key = reranked_key(D[0], np.arange(1, len(cls)), D, 10, 0.1)
    p1, ap1 = p10_ap(key, cls, ids, 0, 0)
    assert p0 <= 0.6, p0                                      # the example's own distances mix the two classes
    assert p1 == 1.0 and ap1 > ap0 + 0.2, (p1, ap1, ap0)
    # weight 1: the final distance is the example's own (divided by its largest), the one-shot order comes back
    k1 = reranked_key(D[0], np.arange(1, len(cls)), D, 10, 1.0)
    assert list(np.argsort(k1[1:], kind="stable")) == list(np.argsort(D[0, 1:], kind="stable"))


def test_reranked_key_keeps_the_rest_after_the_shortlist():
    D, _ = _table()
    base = np.array([5.0, 0.1, 0.2, 9.0, 0.3, np.inf, 7.0])     # store rows; the shortlist is rows 1, 2, 4 (+ example 0)
    pair = D[np.ix_([0, 1, 2, 3], [0, 1, 2, 3])]
    key = reranked_key(base, np.array([1, 2, 4]), pair, 2, 0.1)
    assert np.all(key[[1, 2, 4]] <= 1.0)
    assert key[5] == np.inf
    # the rest (rows 0, 3, 6) after the shortlist, in their one-shot order
    assert np.all(key[[0, 3, 6]] > 1.0) and key[0] < key[6] < key[3]


def test_symmetrised_mean_and_one_sided_pairs():
    D = np.array([[0.5, 1.0, np.inf], [3.0, 0.2, np.inf], [2.0, np.inf, 0.1]])
    S = symmetrised(D)
    np.testing.assert_allclose(S, [[0.0, 2.0, 2.0], [2.0, 0.0, np.inf], [2.0, np.inf, 0.0]])


def test_find_ranks_by_the_rerank_only_when_on():
    store, _ = _scene()
    lib = _library()
    off = find_similar(lib, store, "t/0", _cfg(0))
    assert off.rerank is None
    np.testing.assert_array_equal(off.rank_key, ranking_key(off.distance, off.reverse))
    on = find_similar(lib, store, "t/0", _cfg(4))
    # the distances, the score and the shortlist's reverse search do not change; the first 8 are the first 8 of the
    # one-shot ranking, re-ordered; the rest keep their one-shot order after them
    np.testing.assert_array_equal(on.distance, off.distance)
    np.testing.assert_array_equal(on.score, off.score)
    assert set(on.order[:8]) == set(off.order[:8])
    assert list(on.order[8:]) == list(off.order[8:])
    np.testing.assert_array_equal(on.rank_key, on.rerank)
    # matches.csv's both_ways stays the symmetric distance (the mean of the two directions), not the re-ranking's key
    bw = {r["object"]: r["both_ways"] for r in off.rows()}
    for r in on.rows():
        assert r["both_ways"] == bw[r["object"]]
        if r["both_ways"] is not None:
            j = list(on.object).index(r["object"])
            assert r["both_ways"] == pytest.approx(0.5 * (on.distance[j] + on.reverse[j]))


def _cfg(k: int) -> dict:
    cfg = _base_cfg(symmetric=8)
    cfg["mine"]["find_prototype"] = 0.0          # the synthetic library's route is not under test
    cfg["mine"]["find_rerank"] = k
    cfg["mine"]["find_rerank_shortlist"] = 8
    return cfg
