"""Single-view score calibration with the canonical face and the other faces apart (``pipeline.split_calibration``,
``Library.score(..., upright=...)``).

References: the robust fit is the median and the normal-consistent MAD, computed here with
``scipy.stats.median_abs_deviation(scale="normal")`` (scipy as the reference); the score is the Student-t
tail with 4 degrees of freedom, ``scipy.stats.t.sf`` (the formula in ``mine/library.py``).
"""
from __future__ import annotations

import numpy as np
from scipy.stats import median_abs_deviation, t as student_t

from protomine.mine.library import Library
from protomine.mine.pipeline import MIN_CALIBRATION_VIEWS, split_calibration


def _fit(ld):
    return float(np.median(ld)), max(float(median_abs_deviation(ld, scale="normal")), 0.05)


def test_split_calibration_fits_each_face_kind_from_its_own_views():
    rng = np.random.default_rng(0)
    # prototype 0: 60 canonical views and 40 on other faces (worse fits); prototype 1: 50 canonical, 2 tilted
    ld = np.concatenate([rng.normal(-4.0, 0.3, 60), rng.normal(-3.4, 0.45, 40), rng.normal(-4.6, 0.25, 50),
                         rng.normal(-4.0, 0.3, 2)])
    k = np.repeat([0, 0, 1, 1], [60, 40, 50, 2])
    up = np.repeat([True, False, True, False], [60, 40, 50, 2])
    mu, sigma, tmu, tsig = split_calibration(np.exp(ld), k, up, 2, [(0.0, 1.0)] * 2)
    for j in range(2):  # canonical: each prototype's own canonical views only
        m, s = _fit(ld[(k == j) & up])
        assert np.isclose(mu[j], m) and np.isclose(sigma[j], s)
    m0, s0 = _fit(ld[(k == 0) & ~up])
    assert np.isclose(tmu[0], m0) and np.isclose(tsig[0], s0)   # enough tilted views: its own fit
    assert 2 < MIN_CALIBRATION_VIEWS
    # too few: canonical fit shifted by the median offset of all tilted views, sigma at least the tilted one's
    off = np.median(ld[~up] - mu[k[~up]])
    assert np.isclose(tmu[1], mu[1] + off) and np.isclose(tsig[1], max(sigma[1], s0))
    assert tmu[0] > mu[0] + 0.4   # the tilted views fit worse (drawn 0.6 higher in log distance)


def test_split_calibration_without_tilted_views_is_one_fit():
    rng = np.random.default_rng(1)
    ld = rng.normal(-4.0, 0.3, 30)
    mu, sigma, tmu, tsig = split_calibration(np.exp(ld), np.zeros(30, int), np.ones(30, bool), 1, [(0.0, 1.0)])
    assert np.isclose(mu[0], _fit(ld)[0]) and np.isclose(sigma[0], _fit(ld)[1])
    np.testing.assert_array_equal(tmu, mu) and np.testing.assert_array_equal(tsig, sigma)


def test_library_score_uses_the_other_faces_calibration_where_not_upright():
    protos = {"single_mu": np.array([-4.0, -3.0]), "single_sigma": np.array([0.3, 0.5]),
              "fused_mu": np.zeros(2), "fused_sigma": np.ones(2)}
    d = np.array([[0.02, 0.05], [0.02, 0.05]])
    up = np.array([[True, True], [False, False]])
    old = Library(dict(protos), {}).score(d, np.arange(2)[None], single_view=True, upright=up)
    ref = student_t.sf((np.log(d) - protos["single_mu"]) / protos["single_sigma"], 4)
    np.testing.assert_allclose(old, ref)   # a library without the tilted calibration: one fit for both
    lib = Library({**protos, "single_tilt_mu": np.array([-3.5, -2.5]), "single_tilt_sigma": np.array([0.4, 0.6])}, {})
    s = lib.score(d, np.arange(2)[None], single_view=True, upright=up)
    np.testing.assert_allclose(s[0], ref[0])
    np.testing.assert_allclose(s[1], student_t.sf((np.log(d[1]) - [-3.5, -2.5]) / [0.4, 0.6], 4))
