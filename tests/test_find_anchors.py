"""find's re-ranking with the library's prototypes as anchor nodes ([mine] find_rerank_anchors, curate.rerank, 5.).

Source: Zhong, Zheng, Cao & Li, "Re-ranking Person Re-identification with k-reciprocal Encoding", CVPR 2017 (the
k-reciprocal sets, their expansion, the exp(-d) vectors and the Jaccard distance, eq. 3-10), here over a graph with
K more nodes.  The reference twin builds the augmented distance table with loops from its definition (object to
object: the pairwise table; object to prototype: the given distances; prototype to prototype: never neighbours) and
computes the Jaccard distance with the set-and-loop twin of tests/test_find_rerank.py (sharing no helper with
curate.rerank).  The outcome test is a table whose answer is known by construction: two views at the same distances
from the example and from every other view, one of which lies next to a prototype the example is far from.
"""
from __future__ import annotations

import math

import numpy as np

from protomine.curate.oneshot import find_similar
from protomine.curate.rerank import anchored, reranked_key
from test_find_known import _cfg as _known_cfg, _world
from test_find_rerank import _naive_jaccard, _table


def _augmented(D, A):
    """The (n + K, n + K) table of the definition, by loops: D (n, n) between objects, A (n, K) object to prototype,
    inf between two prototypes, 0 on the diagonal."""
    n, K = len(D), len(A[0])
    out = [[0.0] * (n + K) for _ in range(n + K)]
    for i in range(n + K):
        for j in range(n + K):
            if i == j:
                out[i][j] = 0.0
            elif i < n and j < n:
                out[i][j] = float(D[i][j])
            elif i < n:
                out[i][j] = float(A[i][j - n])
            elif j < n:
                out[i][j] = float(A[j][i - n])
            else:
                out[i][j] = math.inf
    return out


def _naive_key(D, A, k, w):
    """The shortlist's key by the definition: (1 - w) x the Jaccard distance over the augmented graph, the example's
    vector without the anchors, + w x the example's own distance divided by its largest (over the objects only)."""
    aug = _augmented(D, A)
    big = 1e300
    finite = [[v if math.isfinite(v) else big for v in row] for row in aug]
    dj = _naive_jaccard(finite, k, big, len(D))
    top = max(D[0])
    return [(1 - w) * dj[i] + w * D[0][i] / top for i in range(1, len(D))]


def test_anchored_table_is_the_definition():
    D, _ = _table(0)
    A = np.random.default_rng(1).uniform(0.05, 0.9, (len(D), 3))
    np.testing.assert_array_equal(anchored(D, A), np.array(_augmented(D.tolist(), A.tolist())))


def test_anchored_key_matches_the_definition():
    for seed in range(3):
        D, _ = _table(seed)
        A = np.random.default_rng(seed + 10).uniform(0.05, 0.9, (len(D), 2))
        for k in (3, 6, 10):
            key = reranked_key(D[0], np.arange(1, len(D)), D, k, 0.3, A)
            np.testing.assert_allclose(key[1:], _naive_key(D.tolist(), A.tolist(), k, 0.3), atol=1e-12)


def test_a_view_next_to_a_prototype_the_example_is_far_from_ranks_after_its_twin():
    """Views 1 and 2 are twins (the same distances to the example, its two nearest, and to every other view); view 1 lies next to
    prototype 0 (0.01, nearer than anything else), which the example and view 2 are far from (0.9).  Without anchors
    view 1 ranks first (ties between them broken by index, so it is in more of the others' sets); with them its
    reciprocal set holds the prototype the example's lacks, so its Jaccard distance is the larger and view 2 ranks
    first."""
    rng = np.random.default_rng(3)
    n = 12
    D = rng.uniform(0.2, 0.6, (n, n))
    D = np.triu(D, 1) + np.triu(D, 1).T
    D[2, :] = D[1, :]
    D[:, 2] = D[:, 1]
    D[1, 2] = D[2, 1] = 0.3
    D[0, 1] = D[1, 0] = D[0, 2] = D[2, 0] = 0.1     # the example's two nearest
    np.fill_diagonal(D, 0.0)
    A = np.full((n, 1), 0.9)
    A[1, 0] = 0.01
    plain = reranked_key(D[0], np.arange(1, n), D, 4, 0.3)
    assert plain[1] < plain[2]
    key = reranked_key(D[0], np.arange(1, n), D, 4, 0.3, A)
    assert key[1] > key[2], (key[1], key[2])
    np.testing.assert_allclose(key[1:], _naive_key(D.tolist(), A.tolist(), 4, 0.3), atol=1e-12)


def test_find_anchors_only_reorder_the_shortlist():
    # tests/test_find_known.py's world: two mined prototypes; a never-mined view the route does not take
    lib, store, _ = _world()
    off = find_similar(lib, store, "n/0", _cfg(False))
    on = find_similar(lib, store, "n/0", _cfg(True))
    assert on.route is not None and not on.route.taken and not off.route.taken
    assert on.rerank is not None and off.rerank is not None
    np.testing.assert_array_equal(on.distance, off.distance)
    np.testing.assert_array_equal(on.score, off.score)
    assert set(on.order[:8]) == set(off.order[:8])
    assert list(on.order[8:]) == list(off.order[8:])
    np.testing.assert_array_equal(on.rank_key, on.rerank)


def _cfg(anchors: bool) -> dict:
    cfg = _known_cfg(0.3)
    cfg["mine"]["find_rerank"] = 4
    cfg["mine"]["find_rerank_shortlist"] = 8
    cfg["mine"]["find_rerank_anchors"] = anchors
    return cfg
