"""find's overrule of a wrongly named example ([mine] find_overrule, curate.knownclass.decide / overrule).

A small store constructed as a table of pose-searched distances D (objects x 4 prototypes) whose answer is known by
construction: every view of a class has the same profile of log distances over the prototypes (its class's shape)
plus its own level (a partial view is farther from every prototype) and a little noise.  The example is a view of
class A whose distances put prototype B a hair nearer than A (as a view half hidden behind another object can), and
the label decision names B with a high score: the naming is wrong by construction.  The route by B then ranks B's
views first; the example's profile keeps A's shape, so the overrule hands the ranking to A.  Precision at 10 by its
definition and average precision by scikit-learn (``sklearn.metrics.average_precision_score``) check the outcome.
"""
from __future__ import annotations

import numpy as np
from ranking_measures import p10_ap

from protomine.curate.knownclass import AGREE_TOP, decide, margin_key, overrule, profile_key

# each class's log-distance shape over the prototypes A, B, C, D (its own prototype nearest)
SHAPES = np.array([[0.0, 0.3, 0.6, 1.2],
                   [0.3, 0.0, 1.2, 0.6],
                   [0.8, 1.0, 0.0, 0.4],
                   [1.0, 0.8, 0.4, 0.0]])
PER_CLASS = 12


def _store(seed: int = 0):
    rng = np.random.default_rng(seed)
    rows, cls = [], []
    for k, shape in enumerate(SHAPES):
        for _ in range(PER_CLASS):
            rows.append(np.exp(rng.uniform(-4.0, -3.0) + shape + rng.normal(0.0, 0.03, 4)))
            cls.append(k)
    # the example: a partial view of A, B a hair nearer than A, the rest of A's shape kept
    rows.append(np.exp(-2.5 + np.array([0.05, 0.0, 0.65, 1.25])))
    cls.append(0)
    D, cls = np.array(rows), np.array(cls)
    ids = np.array([f"o{i:03d}" for i in range(len(D))])
    return D, cls, ids, len(D) - 1


def _one_shot(cls):
    """The one-shot ranking of a half-hidden view: what it shows also fits C's and D's views, which come first."""
    return np.where(cls >= 2, 0.0, 1.0) + np.arange(len(cls)) * 1e-3


def test_wrong_name_is_overruled_by_the_profile():
    D, cls, ids, ex = _store()
    assert int(np.argmin(D[ex])) == 1                        # by construction the example is nearest to B
    one_shot = _one_shot(cls)
    # named B with a sure score: without the overrule the route ranks B's views first
    b0, agree, taken, shares = decide(D, 1, 0.9, 0.05, one_shot, ids, ex, sure=0.3)
    assert (b0, taken, shares) == (1, True, ())
    p_named, ap_named = p10_ap(margin_key(D, 1), cls, ids, ex, 0)
    assert p_named == 0.0 and agree == 0
    b1, agree1, taken1, shares1 = decide(D, 1, 0.9, 0.05, one_shot, ids, ex, sure=0.3, overrule_at=3)
    assert (b1, agree1, taken1) == (0, agree, True)
    assert len(shares1) == 4 and shares1[0] == max(shares1) >= 3 and shares1[0] > shares1[1]
    p_over, ap_over = p10_ap(margin_key(D, b1), cls, ids, ex, 0)
    assert p_over == 1.0 and ap_over > 0.95 > ap_named + 0.5, (p_over, ap_over, ap_named)


def test_overrule_leaves_a_supported_or_right_name_alone():
    D, cls, ids, ex = _store()
    # the one-shot ranking agreeing with B's ranking (B's views first): the named route stands
    agreeing = margin_key(D, 1)
    b, agree, taken, shares = decide(D, 1, 0.9, 0.05, agreeing, ids, ex, sure=0.3, overrule_at=3)
    assert agree >= 2 and (b, shares) == (1, ())
    # the example named A (right): the profile's best is A itself, nothing moves
    one_shot = _one_shot(cls)
    b, _, _, shares = decide(D, 0, 0.9, 0.05, one_shot, ids, ex, sure=0.3, overrule_at=3)
    assert b == 0 and shares[0] == max(shares)
    # a threshold above what any prototype shares: no switch
    c, sh = overrule(D, 1, ids, ex, AGREE_TOP + 1)
    assert c == 1 and len(sh) == 4
    # a route not taken is never overruled (the one-shot ranking stands)
    b, _, taken, shares = decide(D, 1, 0.2, 0.05, one_shot, ids, ex, sure=0.3, overrule_at=3)
    assert not taken and (b, shares) == (1, ())


def test_profile_key_definition():
    D = np.array([[1.0, 2.0, 4.0], [2.0, 4.0, 8.0], [4.0, 2.0, 1.0], [np.inf, np.inf, np.inf], [1.0, np.inf, 4.0]])
    key = profile_key(D, 0)
    # row 1 is row 0 scaled by 2: the same standardised log profile (distance 0); row 2 reversed: (-z) vs z with
    # z = (-1, 0, 1) * sqrt(3/2) (ln 1, ln 2, ln 4 standardised by the population standard deviation), distance
    # |2z| = 2 sqrt(3); nothing finite: inf; an inf read as the row's largest finite distance (4): (1, 4, 4)
    assert key[0] == 0.0 and abs(key[1]) < 1e-12
    np.testing.assert_allclose(key[2], 2.0 * np.sqrt(3.0))
    assert key[3] == np.inf
    l4 = np.log([1.0, 4.0, 4.0])
    z4 = (l4 - l4.mean()) / l4.std()
    z0 = (np.log([1.0, 2.0, 4.0]) - np.log(2.0)) / np.log([1.0, 2.0, 4.0]).std()
    np.testing.assert_allclose(key[4], np.linalg.norm(z4 - z0))
