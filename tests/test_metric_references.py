"""Figures the project computes itself, checked against a source outside the project.

What the project only forwards is not an outside check and is listed here so nobody counts it as one:
NMI, ARI, Rand index, homogeneity / completeness / V-measure (``audit.metrics.clustering_scores`` returns
scikit-learn's values), average precision (``curate.oneshot.retrieval_scores`` returns
``sklearn.metrics.average_precision_score``), AUROC (``label.evaluate``, ``roc_auc_score``), the silhouette
of automatic K (``mine.choosek``) and the Wilson interval (``scipy.stats.binomtest``, kept in
``audit.uncertainty`` for comparison).  Tests of those check the wiring (argument order, sign of the
ranking), nothing more.

The project's own, and where each meets its outside source: purity and Hungarian accuracy
(tests/test_audit_metrics.py: Manning et al. 2008 worked example, scikit-learn's contingency matrix, brute
force over every one-to-one map); the audit's intervals, Neyman allocation and the conformal unknown cut
(tests/test_audit_intervals.py: Newcombe 1998, exact binomial coverage sums, Garwood 1936, Cochran 1977,
the split-conformal quantile); and below: precision at k, the robust log-distance fit, the calibrated
score and the per-cluster yaw offset.
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.stats import circmean, median_abs_deviation

from protomine.audit.metrics import yaw_offset_deg
from protomine.curate.oneshot import retrieval_scores
from protomine.mine.library import log_distance_fit, match_score


def _ranking(distance, relevant, ids=None):
    n = len(distance)
    matches = SimpleNamespace(distance=np.asarray(distance, float),
                              object=np.array(ids if ids is not None else [f"o{i:02d}" for i in range(n)]))
    return retrieval_scores(matches, np.arange(n), np.asarray(relevant, bool))


def test_precision_at_k_hand_worked():
    # ranking by distance: R N R N N R (hand-worked): 3 relevant, so k = 3 and P@3 = 2/3;
    # AP (Manning, Raghavan & Schutze 2008, sec. 8.4: mean of the precisions at each relevant rank)
    # = (1/1 + 2/3 + 3/6) / 3 = 13/18 -- this one is scikit-learn's figure, checked for the ranking's sign
    k, p, ap = _ranking([0.1, 0.2, 0.3, 0.4, 0.5, 0.6], [1, 0, 1, 0, 0, 1])
    assert (k, p) == (3, pytest.approx(2 / 3))
    assert ap == pytest.approx(13 / 18)
    # more than 10 relevant: k is capped at 10; the 11th relevant object ranks last
    rel = [1] * 10 + [0] * 5 + [1]
    k, p, _ = _ranking(np.arange(16.0), rel)
    assert (k, p) == (10, 1.0)
    # unmatched objects (inf distance) rank last; ties are broken by object id
    k, p, _ = _ranking([np.inf, 0.3, 0.3, 0.1], [1, 1, 0, 0], ids=["a", "c", "b", "d"])
    assert (k, p) == (2, 0.0)                  # order d (0.1), b (0.3, id b < c), c, a


def test_log_distance_fit_is_median_and_normal_scaled_mad():
    # reference: numpy median and scipy.stats.median_abs_deviation(scale="normal") (1 / Phi^-1(3/4) = 1.4826)
    rng = np.random.default_rng(0)
    d = np.exp(rng.normal(-1.0, 0.7, 301))
    mu, sigma = log_distance_fit(d)
    assert mu == pytest.approx(np.median(np.log(d)), abs=1e-12)
    assert sigma == pytest.approx(median_abs_deviation(np.log(d), scale="normal"), rel=1e-4)
    # the normal-consistent MAD estimates the log-normal's sigma (common practice), here within 10 %
    assert sigma == pytest.approx(0.7, rel=0.1)


def test_match_score_is_the_student_t4_tail():
    # closed form of the Student t CDF with 4 degrees of freedom (from memory; e.g. the table of closed forms
    # in the Wikipedia article "Student's t-distribution"): F(t) = 1/2 + 3/8 u (1 - u^2 / 12), u = t / sqrt(1 + t^2 / 4)
    mu, sigma = -2.0, 0.4
    z = np.linspace(-6, 6, 25)
    d = np.exp(mu + sigma * z)
    u = z / np.sqrt(1 + z**2 / 4)
    expected = 1 - (0.5 + 3 / 8 * u * (1 - u**2 / 12))
    np.testing.assert_allclose(match_score(d, np.full(25, mu), np.full(25, sigma)), expected, atol=1e-12)


@pytest.mark.parametrize("period", [360.0, 180.0, 90.0])
def test_yaw_offset_equals_circular_mean_on_unimodal_data(period):
    # with every difference within period/8 of the centre, the robust offset is the plain circular mean
    # of the differences (scipy.stats.circmean as the reference)
    rng = np.random.default_rng(int(period))
    for true in (3.0, period / 2, period - 2.0):
        pred = rng.uniform(0, 360, 40)
        truth = np.mod(pred + true + rng.normal(0, period / 60, 40), 360.0)
        ref = circmean(np.mod(truth - pred, period), high=period, low=0.0)
        off = yaw_offset_deg(truth, pred, period)
        assert abs(np.mod(off - ref + period / 2, period) - period / 2) < 1e-9
        assert abs(np.mod(off - true + period / 2, period) - period / 2) < period / 40
