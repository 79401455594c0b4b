"""The calibration of the view-normalised distance (``[mine] view_normalise_calibrate``): ``pipeline.view_calibrated_fields``,
``Library.score(view_normalised=True)`` and the matcher's choice of calibration (``label.matcher.view_calibration``).

References: the score is 1 - T_4(z) against ``scipy.stats.t.sf``; the location of each fit is the median of the log
distances (numpy, by definition of the robust fit); the split-conformal cut flags at most alpha (and, with continuous
scores, at least alpha - 1 / (n + 1)) of fresh views exchangeable with the calibration views (Angelopoulos & Bates
2021, "A gentle introduction to conformal prediction", sec. 1 and appendix D), checked on fresh draws within a
binomial tolerance.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from conftest import score_without_stretch
from protomine.label.matcher import view_calibration
from protomine.mine.library import VIEW_CALIBRATION_FIELDS, Library
from protomine.mine.openset import fisher_combine
from protomine.mine.pipeline import view_calibrated_fields, view_ratio_calibration

MU = np.array([-4.5, -3.9, -4.2])
TILT_SHIFT = 0.6


def _views(rng, n):
    """n held-out views per prototype: leave-one-out distances (log-normal, other faces farther), the factor
    min(1, Dv / Dr) view normalisation takes off, prototypes and face kinds."""
    own = np.repeat(np.arange(len(MU)), n)
    up = rng.random(len(own)) < 0.6
    d = np.exp(MU[own] + np.where(up, 0.0, TILT_SHIFT) + rng.normal(0, 0.35, len(own)))
    factor = np.minimum(1.0, np.exp(rng.normal(-0.2, 0.3, len(own))))
    return d, factor, own, up


def test_fit_locates_the_scored_distance_and_the_cut_flags_about_alpha_of_fresh_known_views():
    rng = np.random.default_rng(0)
    d, f, own, up = _views(rng, 150)
    fields, attrs = view_calibrated_fields(d, f, own, up, len(MU), [(0.0, 1.0)] * len(MU), 0.05)
    assert set(fields) == set(VIEW_CALIBRATION_FIELDS)
    ld = np.log(d * f)
    for k in range(len(MU)):   # the robust fit's location: the median of the log of the distance scored
        assert np.isclose(fields["single_view_mu"][k], np.median(ld[(own == k) & up]))
        assert np.isclose(fields["single_view_tilt_mu"][k], np.median(ld[(own == k) & ~up]))
    # the fit is of d x factor, not of d: its location lies below the plain distances' by about the factor's median
    assert np.all(fields["single_view_mu"] < np.array([np.median(np.log(d)[(own == k) & up]) for k in range(3)]) - 0.1)
    assert attrs["unknown_view_calibration_views"] == len(d)
    # the cut flags about alpha of fresh known views: averaged over calibration draws (the realised rate of one draw
    # spreads by about sqrt(alpha (1 - alpha) / n) = 0.01 here; the fit is made on the same views as the cut, which
    # measured +0.007 on average over 30 draws: the tolerance above alpha allows for it)
    rates, plain = [], []
    for seed in range(12):
        d, f, own, up = _views(np.random.default_rng(100 + seed), 150)
        fields, attrs = view_calibrated_fields(d, f, own, up, len(MU), [(0.0, 1.0)] * len(MU), 0.05)
        lib = Library({**fields}, {}, {})
        d2, f2, own2, up2 = _views(np.random.default_rng(1000 + seed), 2000)
        s = lib.score(d2 * f2, own2, single_view=True, upright=up2, view_normalised=True)
        rates.append(float(np.mean(s < attrs["unknown_view_cut"])))
        # a trivial baseline: the plain distances under the same fit (the factor left out) flag far more
        plain.append(float(np.mean(lib.score(d2, own2, single_view=True, upright=up2, view_normalised=True)
                                   < attrs["unknown_view_cut"])))
    assert 0.04 <= np.mean(rates) <= 0.07, rates
    assert all(0.02 <= r <= 0.10 for r in rates), rates
    assert np.mean(plain) > 2 * np.mean(rates)

def test_view_normalised_score_is_the_student_t_tail_of_its_own_fields():
    rng = np.random.default_rng(2)
    p = {"single_view_mu": np.array([-4.0, -3.0]), "single_view_sigma": np.array([0.3, 0.5]),
         "single_view_tilt_mu": np.array([-3.5, -2.0]), "single_view_tilt_sigma": np.array([0.4, 0.6]),
         "single_mu": np.array([9.0, 9.0]), "single_sigma": np.array([1.0, 1.0])}
    lib = Library(p, {}, {})
    d = np.exp(rng.normal(-3.5, 1.0, 200))
    k = rng.integers(0, 2, 200)
    up = rng.random(200) < 0.5
    mu = np.where(up, p["single_view_mu"][k], p["single_view_tilt_mu"][k])
    sg = np.where(up, p["single_view_sigma"][k], p["single_view_tilt_sigma"][k])
    ref = stats.t.sf((np.log(d) - mu) / sg, 4)
    assert np.allclose(lib.score(d, k, single_view=True, upright=up, view_normalised=True), ref)
    # the other calibration (single_mu) is not read
    assert not np.allclose(lib.score(d, k, single_view=True, upright=up), ref)


def test_matcher_uses_the_view_calibration_only_when_the_library_has_it_and_the_keys_are_on():
    fields = {f: np.zeros(2) for f in VIEW_CALIBRATION_FIELDS}
    on = {"mine": {"view_normalise_top": 4, "view_normalise_score": True}}
    assert view_calibration(Library(dict(fields), {}, {"config": json.dumps(on), "unknown_view_cut": 0.01}))
    # a library mined before it (or with the key off): the pose search's calibration
    assert not view_calibration(Library({}, {}, {"config": json.dumps(on), "unknown_cut": 0.01}))
    assert not view_calibration(Library(dict(fields), {}, {"config": json.dumps(on)}))
    off = {"mine": {"view_normalise_top": 4, "view_normalise_score": False}}
    assert not view_calibration(Library(dict(fields), {}, {"config": json.dumps(off), "unknown_view_cut": 0.01}))
    off = {"mine": {"view_normalise_top": 0, "view_normalise_score": True}}
    assert not view_calibration(Library(dict(fields), {}, {"config": json.dumps(off), "unknown_view_cut": 0.01}))


def test_fisher_combination_matches_scipy():
    rng = np.random.default_rng(3)
    s, p = rng.uniform(1e-6, 1, 300), rng.uniform(1e-6, 1, 300)
    ref = np.array([stats.combine_pvalues([a, b], method="fisher")[1] for a, b in zip(s, p)])
    assert np.allclose(fisher_combine(s, p), ref, rtol=1e-9, atol=1e-12)
    assert fisher_combine(0.0, 0.5) == 0.0 and np.isclose(fisher_combine(1.0, 1.0), 1.0)
    # monotone in each argument: a worse ratio never raises the score
    assert np.all(np.diff(fisher_combine(0.3, np.linspace(0.01, 1, 50))) > 0)


def test_view_ratio_calibration_cut_flags_about_alpha_of_fresh_views():
    """Held-out views' decision distances: the own prototype nearest by a log-normal margin; the cut on the Fisher
    combination flags about alpha of fresh views drawn the same way (split-conformal, as above)."""
    from protomine.mine.openset import best_second_ratio, ratio_pvalue

    def draw(rng, n):
        own = rng.integers(0, 3, n)
        D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
        D[np.arange(n), own] = D.min(axis=1) * np.exp(-np.abs(rng.normal(0.3, 0.3, n)))
        up = rng.random(n) < 0.7
        return D, D[np.arange(n), own], own, up
    rates = []
    for seed in range(10):
        D, d, own, up = draw(np.random.default_rng(seed), 450)
        fields, attrs = view_calibrated_fields(d, np.ones(len(d)), own, up, 3, [(0.0, 1.0)] * 3, 0.05)
        attrs = view_ratio_calibration(D, d, own, up, fields, 0.05)
        assert np.all(np.diff(attrs["unknown_view_ratios"]) >= 0)
        D2, d2, own2, up2 = draw(np.random.default_rng(100 + seed), 2000)
        s = Library(fields, {}, {}).score(d2, own2, single_view=True, upright=up2, view_normalised=True)
        r = best_second_ratio(D2)[np.arange(len(own2)), own2]
        v = fisher_combine(s, ratio_pvalue(attrs["unknown_view_ratios"], r))
        rates.append(float(np.mean(v < attrs["unknown_view_ratio_cut"])))
    assert 0.035 <= np.mean(rates) <= 0.07, rates


def test_mining_with_the_view_calibration_fits_it_from_the_stores_cameras_and_labels_by_it(tiny_world, tmp_path):
    """End to end with the keys on (the defaults): the store keeps every single view's camera, mining fits the
    view-normalised calibration and its ratio cut from them, and the matcher scores and flags by them.  Reference:
    the tiny world's two shapes are far apart (a box with a side block, a cylinder: common practice, any matcher
    names them apart), so nearly every held-out view's best match is its own object's cluster (17 of 18 measured; a
    constant answer gets half) and, the cut being a
    split-conformal one at alpha on these very views, at most about alpha of them (and at least half) are flagged."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    assert all(k in lib.prototypes for k in VIEW_CALIBRATION_FIELDS)
    assert "unknown_view_ratio_cut" in lib.attrs and view_calibration(lib)
    st = open_store(tiny_world["store"])
    cams = np.asarray(st.single_camera)
    assert cams.shape == (len(st.single_object), 3) and np.isfinite(cams).all()
    m = make_matcher(lib, cfg)
    assert m.view_calibrated and m.unknown_cut == float(lib.attrs["unknown_view_ratio_cut"])
    rows = np.arange(len(st.single_object))
    got = m.match(st.read_single_views(rows), cams)
    own = np.asarray(lib.members["cluster"])[np.asarray(st.single_object)]
    assert np.mean(got["best"] == own) >= 0.85
    s = got["score"][rows, own]
    assert np.all((s >= 0) & (s <= 1))
    flagged = float(np.mean(s < m.unknown_cut))
    assert flagged <= 0.5, flagged


def test_fisher_combination_of_three_matches_scipy():
    """``openset.fisher_combine_many`` against scipy.stats.combine_pvalues (method "fisher": the chi-squared tail of
    -2 sum ln p_i with 2m degrees of freedom); with two it is ``fisher_combine``."""
    from protomine.mine.openset import fisher_combine_many
    rng = np.random.default_rng(5)
    a, b, c = rng.uniform(1e-6, 1, (3, 300))
    ref = np.array([stats.combine_pvalues([x, y, z], method="fisher")[1] for x, y, z in zip(a, b, c)])
    assert np.allclose(fisher_combine_many(a, b, c), ref, rtol=1e-9, atol=1e-12)
    assert np.allclose(fisher_combine_many(a, b), fisher_combine(a, b), rtol=1e-12, atol=0)
    assert fisher_combine_many(0.5, 0.0, 0.5) == 0.0 and np.isclose(fisher_combine_many(1.0, 1.0, 1.0), 1.0)
    assert np.all(np.diff(fisher_combine_many(0.3, 0.4, np.linspace(0.01, 1, 50))) > 0)


def test_view_ratio_calibration_with_unseen_shares_is_the_three_way_fisher_cut():
    """``[mine] view_normalise_unseen``: the held-out views' unseen shares at their nearest prototype are kept sorted,
    and the cut is the split-conformal cut (``conformal_cut``) of Fisher's combination of three, written out here: the
    calibrated score, the ratio's and the share's leave-one-out p-values, (#{j: x_j >= x_i}) / m counting the view
    itself (Vovk, Gammerman & Shafer 2005).  Fresh views drawn the same way are flagged about alpha (as above)."""
    from protomine.mine.openset import best_second_ratio, conformal_cut, ratio_pvalue

    def draw(rng, n):
        own = rng.integers(0, 3, n)
        D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
        D[np.arange(n), own] = D.min(axis=1) * np.exp(-np.abs(rng.normal(0.3, 0.3, n)))
        return D, D[np.arange(n), own], own, rng.random(n) < 0.7, rng.beta(1.0, 8.0, (n, 3))

    def loo(x):
        return np.array([np.mean(x >= v) for v in x])
    rates = []
    for seed in range(10):
        D, d, own, up, U = draw(np.random.default_rng(seed), 450)
        fields, _ = view_calibrated_fields(d, np.ones(len(d)), own, up, 3, [(0.0, 1.0)] * 3, 0.05)
        attrs = view_ratio_calibration(D, d, own, up, fields, 0.05, unseen=U)
        j = np.arange(len(d))
        s = Library(fields, {}, {}).score(d, own, single_view=True, upright=up, view_normalised=True)
        r, u = best_second_ratio(D)[j, own], U[j, own]        # own is the nearest by construction
        assert np.array_equal(attrs["unknown_view_unseen"], np.sort(u))
        x = s * loo(r) * loo(u)
        fisher3 = x * (1 - np.log(x) + np.log(x) ** 2 / 2)
        assert np.isclose(attrs["unknown_view_ratio_cut"], conformal_cut(fisher3, 0.05), rtol=1e-12)
        D2, d2, own2, up2, U2 = draw(np.random.default_rng(100 + seed), 2000)
        j2 = np.arange(len(d2))
        s2 = Library(fields, {}, {}).score(d2, own2, single_view=True, upright=up2, view_normalised=True)
        x2 = (s2 * ratio_pvalue(attrs["unknown_view_ratios"], best_second_ratio(D2)[j2, own2])
              * ratio_pvalue(attrs["unknown_view_unseen"], U2[j2, own2]))
        v2 = x2 * (1 - np.log(x2) + np.log(x2) ** 2 / 2)
        rates.append(float(np.mean(v2 < attrs["unknown_view_ratio_cut"])))
    assert 0.035 <= np.mean(rates) <= 0.07, rates


def test_mining_with_the_unseen_share_keeps_its_calibration_and_labels_by_three(tiny_world, tmp_path):
    """End to end with ``[mine] view_normalise_unseen`` on: the library keeps the held-out views' sorted shares, the
    matcher returns each view's share in [0, 1] and scores by the three-way combination, written out here from the
    matcher's own parts (the two-way score with the key off, the share's conformal p-value among the library's);
    the same references as the test above (17 of 18 held-out views to their own cluster, at most half flagged)."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.openset import fisher_combine_many, ratio_pvalue
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "view_normalise_unseen": True, "view_normalise_stretch": False}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    u = np.asarray(lib.attrs["unknown_view_unseen"])
    assert len(u) == len(lib.attrs["unknown_view_ratios"]) and np.all(np.diff(u) >= 0) and u.min() >= 0 and u.max() <= 1
    st = open_store(tiny_world["store"])
    rows = np.arange(len(st.single_object))
    views, cams = st.read_single_views(rows), np.asarray(st.single_camera)
    m = make_matcher(lib, cfg)
    assert m.view_unseen is not None
    got = m.match(views, cams)
    own = np.asarray(lib.members["cluster"])[np.asarray(st.single_object)]
    assert np.mean(got["best"] == own) >= 0.85
    share = got["unseen_share"]
    assert np.all((share >= 0) & (share <= 1))
    # the two-way score (the same library without its shares: scored as with the key off) joined by hand with the
    # share's p-value
    off = make_matcher(Library(lib.prototypes, lib.members, {k: v for k, v in lib.attrs.items()
                                                             if k != "unknown_view_unseen"}, lib.path), cfg)
    assert off.view_unseen is None
    two = off.match(views, cams)["score"]
    # fisher_combine(s, p) = x (1 - ln x) with x = s p; recover the product s p from it, then join the third
    x = np.empty_like(two)
    for idx, v in np.ndenumerate(two):
        lo, hi = 0.0, 1.0
        for _ in range(200):   # bisection: x (1 - ln x) rises from 0 to 1 on (0, 1]
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if mid * (1 - np.log(mid)) < v else (lo, mid)
        x[idx] = 0.5 * (lo + hi) if v > 0 else 0.0
    q = ratio_pvalue(u, share)
    want = fisher_combine_many(x, np.ones_like(x), q)
    assert np.allclose(got["score"], want, atol=1e-6)
    s = got["score"][rows, own]
    assert float(np.mean(s < m.unknown_cut)) <= 0.5


def test_scale_stretch_is_the_absolute_log_of_the_scale():
    """``openset.scale_stretch``: |ln sigma| by definition (math.log, element by element), 0 at sigma = 1, the same for
    sigma and 1 / sigma, inf where there is no scale (NaN, 0: no match)."""
    import math
    from protomine.mine.openset import scale_stretch
    s = np.array([[0.87, 0.93, 1.0], [1.07, 1.15, 1 / 1.15], [np.nan, 0.0, np.inf]])
    got = scale_stretch(s)
    for idx, v in np.ndenumerate(s):
        want = abs(math.log(v)) if math.isfinite(v) and v > 0 else math.inf
        assert got[idx] == pytest.approx(want, rel=1e-12) if math.isfinite(want) else got[idx] == math.inf
    assert got[0, 2] == 0.0 and got[1, 1] == pytest.approx(got[1, 2], rel=1e-12)


def test_view_ratio_calibration_with_the_stretch_is_the_fisher_cut():
    """``[mine] view_normalise_stretch``: the held-out views' stretches |ln scale| at their nearest prototype are kept
    sorted, and the cut is the split-conformal cut of Fisher's combination of the calibrated score, the ratio's and the
    stretch's leave-one-out p-values, #{j: x_j >= x_i} / m counting the view itself (Vovk, Gammerman & Shafer 2005),
    the combination taken from scipy.stats.combine_pvalues ("fisher"); with the unseen shares too it is the four-way
    one.  A view the search matched at a larger stretch scores lower, all else equal."""
    from protomine.mine.openset import best_second_ratio, conformal_cut, ratio_pvalue
    rng = np.random.default_rng(7)
    n = 300
    own = rng.integers(0, 3, n)
    D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
    D[np.arange(n), own] = D.min(axis=1) * np.exp(-np.abs(rng.normal(0.3, 0.3, n)))
    d, up = D[np.arange(n), own], rng.random(n) < 0.7
    scales = rng.choice([0.87, 0.93, 1.0, 1.07, 1.15], (n, 3), p=[0.1, 0.15, 0.5, 0.15, 0.1])
    U = rng.beta(1.0, 8.0, (n, 3))
    fields, _ = view_calibrated_fields(d, np.ones(n), own, up, 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=up, view_normalised=True)
    j = np.arange(n)
    r, x, u = best_second_ratio(D)[j, own], np.abs(np.log(scales[j, own])), U[j, own]   # own is the nearest

    def loo(v):
        return np.array([np.mean(v >= w) for w in v])

    def fisher(*ps):
        return np.array([stats.combine_pvalues(list(p), method="fisher")[1] for p in zip(*ps)])
    attrs = view_ratio_calibration(D, d, own, up, fields, 0.05, fit_scale=scales)
    assert np.allclose(attrs["unknown_view_stretch"], np.sort(x), rtol=1e-12) and "unknown_view_unseen" not in attrs
    assert np.isclose(attrs["unknown_view_ratio_cut"], conformal_cut(fisher(s, loo(r), loo(x)), 0.05), rtol=1e-9)
    both = view_ratio_calibration(D, d, own, up, fields, 0.05, unseen=U, fit_scale=scales)
    assert np.isclose(both["unknown_view_ratio_cut"], conformal_cut(fisher(s, loo(r), loo(u), loo(x)), 0.05), rtol=1e-9)
    # the p-value of a fresh view's stretch among the held-out ones falls as the stretch grows (scale 1 conforms most)
    p = ratio_pvalue(attrs["unknown_view_stretch"], np.abs(np.log([1.0, 1.07, 1.15])))
    assert p[0] == 1.0 and p[0] > p[1] > p[2]


def test_mining_with_the_stretch_keeps_its_calibration_and_labels_with_it(tiny_world, tmp_path):
    """End to end with ``[mine] view_normalise_stretch`` on: the library keeps the held-out views' sorted stretches,
    and the matcher's score is the two-way score (the same library without the stretches, as with the key off) joined
    by Fisher's combination with the conformal p-value of |ln fit_scale| among the library's, written out here from
    the matcher's own parts; the same references as the unseen-share test above."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.openset import fisher_combine_many, ratio_pvalue
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "view_normalise_unseen": False, "view_normalise_stretch": True}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    x = np.asarray(lib.attrs["unknown_view_stretch"])
    assert len(x) == len(lib.attrs["unknown_view_ratios"]) and np.all(np.diff(x) >= 0) and x.min() >= 0
    st = open_store(tiny_world["store"])
    rows = np.arange(len(st.single_object))
    views, cams = st.read_single_views(rows), np.asarray(st.single_camera)
    m = make_matcher(lib, cfg)
    assert m.view_stretch is not None and m.view_unseen is None
    got = m.match(views, cams)
    off = make_matcher(Library(lib.prototypes, lib.members, {k: v for k, v in lib.attrs.items()
                                                             if k != "unknown_view_stretch"}, lib.path), cfg)
    assert off.view_stretch is None
    two = off.match(views, cams)["score"]
    xs = score_without_stretch(two)   # fisher_combine(s, p) = x (1 - ln x): recover x = s p by bisection
    q = ratio_pvalue(x, np.abs(np.log(np.asarray(got["fit_scale"], np.float64))))
    assert np.allclose(got["score"], fisher_combine_many(xs, np.ones_like(xs), q), atol=1e-6)
    own = np.asarray(lib.members["cluster"])[np.asarray(st.single_object)]
    assert np.mean(got["best"] == own) >= 0.85
    assert float(np.mean(got["score"][rows, own] < m.unknown_cut)) <= 0.5
    # ``score_parts`` (tools/unknown_views.py prints them): the score's three tail probabilities, the last the stretch's
    # conformal p-value counted here from its definition, (1 + #{x_i >= x}) / (m + 1) (Angelopoulos & Bates 2021, sec.
    # 1), and the score their Fisher combination as scipy.stats.combine_pvalues computes it (Fisher 1925, sec. 21.1)
    parts = got["score_parts"]
    assert parts.shape == got["score"].shape + (3,)
    xv = np.abs(np.log(np.asarray(got["fit_scale"], np.float64)))
    counted = (1.0 + (x[None, None, :] >= xv[:, :, None]).sum(axis=2)) / (len(x) + 1.0)
    assert np.allclose(parts[..., 2], counted, rtol=0, atol=1e-12)
    fin = np.all(parts > 0, axis=2)
    ref = np.array([stats.combine_pvalues(p, method="fisher")[1] for p in parts[fin]])
    assert fin.any() and np.allclose(got["score"][fin], ref, rtol=1e-9, atol=1e-12)
