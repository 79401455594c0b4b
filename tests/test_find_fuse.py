"""find's fused known-class ranking ([mine] find_prototype_fuse, curate.knownclass.fused_key).

A small store constructed as a table whose answer is known by construction: a mined prototype A whose assignment
margin (d_A / nearest other prototype) cannot tell A's views from those of a never-mined class T that lies next to A
(both drawn from the same margin range, as trowels beside an L-bracket prototype), and the example's own one-shot
distances, which can (A's views near it, T's far: the example has seen what T lacks).  Ranking by the margin alone
mixes the two classes in the first 10; ranking the claimed objects by margin x one-shot distance (the product of
two ratio-scale distances, i.e. the sum of their logs: CombSUM score fusion, Fox & Shaw, TREC-2 1994) puts A's views
first.  Precision at 10 by its definition and average precision by scikit-learn
(``sklearn.metrics.average_precision_score``) check the outcome.
"""
from __future__ import annotations

import numpy as np
from ranking_measures import p10_ap

from protomine.curate.knownclass import CLAIM_MARGIN, decide, fused_key, margin_key


def _store(seed: int = 0):
    """D (N, 3) distances to prototypes A, B, C; one-shot distances (N,); classes (N,): 0 = A, 1 = T (never mined),
    2 = B; the example (an A view) last."""
    rng = np.random.default_rng(seed)
    n_a, n_t, n_b = 12, 8, 10
    margin = np.concatenate([rng.uniform(0.4, 0.8, n_a), rng.uniform(0.4, 0.8, n_t), rng.uniform(1.3, 2.0, n_b)])
    other = rng.uniform(0.02, 0.03, len(margin))
    D = np.stack([margin * other, other, other * 1.2], axis=1)      # prototype B nearest of the others
    D[n_a + n_t:, 1] = margin[n_a + n_t:] ** -1 * D[n_a + n_t:, 0]  # B's views: nearest to B
    one = np.concatenate([rng.uniform(0.010, 0.016, n_a), rng.uniform(0.020, 0.030, n_t), rng.uniform(0.02, 0.04, n_b)])
    cls = np.array([0] * n_a + [1] * n_t + [2] * n_b)
    D = np.vstack([D, [0.4 * 0.025, 0.025, 0.03]]); one = np.append(one, 0.0); cls = np.append(cls, 0)
    ids = np.array([f"o{i:03d}" for i in range(len(D))])
    return D, one, cls, ids, len(D) - 1


def test_fused_key_puts_the_examples_class_before_a_never_mined_neighbour():
    D, one, cls, ids, ex = _store()
    b, agree, taken, _ = decide(D, 0, 0.9, 0.05, one, ids, ex, sure=0.5)
    assert (b, taken) == (0, True)
    m = margin_key(D, 0)
    assert np.all(m[cls == 1] < CLAIM_MARGIN) and np.all(m[cls == 2] > 1.0)   # A claims T's views too
    p_m, ap_m = p10_ap(m, cls, ids, ex, 0)
    p_f, ap_f = p10_ap(fused_key(m, one, 1.0), cls, ids, ex, 0)
    assert p_m <= 0.8, p_m                                                     # the margin mixes A and T
    assert p_f == 1.0 and ap_f > ap_m + 0.1, (p_f, ap_f, ap_m)


def test_fused_key_definition():
    margin = np.array([0.5, 0.8, 0.3, 1.2, 0.95, np.inf, 0.6])
    one = np.array([0.02, 0.01, 0.05, 0.001, 0.001, 0.01, np.nan])
    key = fused_key(margin, one, 1.0)
    # claimed (margin < 0.9, one-shot finite): 0.010, 0.008, 0.015 -> order 1, 0, 2; then by margin 6 (0.6: its
    # one-shot distance unknown), 4 (0.95), 3 (1.2), whatever their one-shot distance; inf last
    np.testing.assert_allclose(key[[0, 1, 2]], [0.010, 0.008, 0.015])
    assert list(np.argsort(key, kind="stable")) == [1, 0, 2, 6, 4, 3, 5]
    assert key[5] == np.inf
    # power 0: the claimed keep their margin order, the rest follow it (the margin ranking unchanged)
    k0 = fused_key(margin, one, 0.0)
    assert list(np.argsort(k0, kind="stable")[:3]) == [2, 0, 1]
    # power 2 squares the one-shot factor
    np.testing.assert_allclose(fused_key(margin, one, 2.0)[0], 0.5 * 0.02 ** 2)
