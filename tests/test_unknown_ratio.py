"""The other-face open-set rule (``[mine] unknown_ratio``; ``mine.openset``: best/second-best distance ratio,
its conformal p-value, the rule's split-conformal cut) and its calibration at mining (``pipeline.rule_calibration``).

References: the ratio is checked against its definition computed row by row (sorted distances, from memory: the
ratio test of Lowe, IJCV 2004, sec. 7.1, is the same quantity); the conformal p-value against
``scipy.stats.percentileofscore`` and its validity, P(p <= a) <= a for exchangeable draws, against the
statement in Angelopoulos & Bates 2021 ("A gentle introduction to conformal prediction", sec. 1 and
appendix D); every AUROC with ``sklearn.metrics.roc_auc_score``.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.stats import percentileofscore
from sklearn.metrics import roc_auc_score

from protomine.mine import openset
from protomine.mine.openset import (best_second_ratio, calibrate_rule, conformal_cut, loo_ratio_pvalues,
                                    ratio_pvalue, rule_scores)


def test_best_second_ratio_follows_its_definition_row_by_row():
    rng = np.random.default_rng(0)
    D = rng.uniform(0.1, 2.0, (50, 6))
    D[3, 2] = np.inf                 # no overlap with one prototype
    D[7, :] = np.inf
    D[7, 4] = 0.5                    # only one prototype overlaps: nothing competes
    D[9, 1] = D[9, 5] = D[9].min() - 0.01   # a tie for the least distance
    r = best_second_ratio(D)
    for i in range(len(D)):
        for j in range(D.shape[1]):
            others = [D[i, t] for t in range(D.shape[1]) if t != j and np.isfinite(D[i, t])]
            if not np.isfinite(D[i, j]):
                assert np.isnan(r[i, j])
            elif not others:
                assert r[i, j] == 0.0
            else:
                assert np.isclose(r[i, j], D[i, j] / min(others))
    b = np.argmin(D, axis=1)
    assert np.all(r[np.arange(len(D)), b][np.isfinite(D).sum(1) > 1] <= 1.0)
    assert np.isclose(r[9, 1], 1.0) and np.isclose(r[9, 5], 1.0)


def test_ratio_pvalue_counts_calibration_ratios_at_least_as_large():
    rng = np.random.default_rng(1)
    cal = np.round(rng.uniform(0.3, 1.0, 40), 2)        # rounded: ties with the test ratios happen
    r = np.round(rng.uniform(0.2, 1.1, 30), 2)
    # reference: #{cal >= r} = m - #{cal < r} = m (1 - percentileofscore(kind="strict") / 100)
    ge = len(cal) * (1 - np.array([percentileofscore(cal, x, kind="strict") for x in r]) / 100)
    assert np.allclose(ratio_pvalue(cal, r), (1 + ge) / (len(cal) + 1))
    # each calibration ratio among the others
    loo = loo_ratio_pvalues(cal)
    for i in range(len(cal)):
        rest = np.delete(cal, i)
        assert np.isclose(loo[i], (1 + np.sum(rest >= cal[i])) / (len(rest) + 1))


def test_ratio_pvalue_is_valid_for_exchangeable_views():
    # P(p <= a) <= a when the test ratio is drawn like the calibration ratios (conformal validity)
    rng = np.random.default_rng(2)
    a, m, trials = 0.1, 30, 4000
    cal = rng.beta(5, 2, (trials, m))
    test = rng.beta(5, 2, trials)
    p = np.array([ratio_pvalue(c, t) for c, t in zip(cal, test)])
    rate = np.mean(p <= a)
    # floor((m + 1) a) / (m + 1) = 3/31 = 0.097 exactly; 4000 trials: binomial sd 0.0047
    assert rate <= a + 0.015
    assert rate >= 3 / 31 - 0.02


def _synthetic(rng, n_known, n_unknown):
    """Views of known objects (canonical: typical scores; other face: one prototype stands out, ratio ~0.6) and
    of never-mined ones (canonical: low scores; other face: typical scores but ratio ~0.9)."""
    up = np.r_[rng.random(n_known) < 0.6, rng.random(n_unknown) < 0.6]
    known = np.r_[np.ones(n_known, bool), np.zeros(n_unknown, bool)]
    s = np.where(known, rng.uniform(0, 1, len(up)), np.where(up, rng.beta(1, 12, len(up)), rng.uniform(0, 1, len(up))))
    r = np.where(known, rng.beta(6, 4, len(up)), rng.beta(18, 2, len(up)))
    return s, r, up, known


def test_the_rule_separates_other_face_unknowns_the_score_cannot_and_keeps_the_known_rate():
    rng = np.random.default_rng(3)
    s_cal, r_cal, up_cal, _ = _synthetic(rng, 400, 0)
    tilt = np.sort(r_cal[~up_cal])
    value = np.r_[s_cal[up_cal], loo_ratio_pvalues(r_cal[~up_cal])]
    cut = conformal_cut(value, 0.05)
    s, r, up, known = _synthetic(rng, 2000, 500)
    v = rule_scores(s, r, up, tilt)
    assert np.allclose(v[up], s[up])                                     # canonical: the score itself
    assert roc_auc_score(known, v) > roc_auc_score(known, s) + 0.1       # other-face unknowns are now separable
    assert roc_auc_score(known[~up], v[~up]) > 0.9
    assert np.mean(v[known] < cut) <= 0.05 + 0.02                        # known views flagged at about alpha
    assert np.mean(v[~known & ~up] < cut) > 0.3


def test_calibrate_rule_mimics_the_label_decision_with_the_leave_one_out_distance():
    rng = np.random.default_rng(4)
    Q, K = 60, 3
    own = rng.integers(0, K, Q)
    D = rng.uniform(1.0, 2.0, (Q, K))
    D[np.arange(Q), own] = 0.1                   # the label search's distance to the full prototype: far nearer
    S = rng.uniform(0, 1, (Q, K))
    U = np.zeros((Q, K), bool)                   # every other-face match
    own_d = np.where(np.arange(Q) % 2 == 0, 0.5, 3.0)   # leave-one-out: half nearer than the rest, half not
    own_s = rng.uniform(0, 1, Q)
    # views whose own search stays canonical (the cut's canonical set); none of them is decided on its own
    # prototype here (odd views: another prototype is nearer), so every decision is on another face
    own_up = (np.arange(Q) % 2 == 1) & (np.arange(Q) % 3 == 0)
    rule = calibrate_rule(D, S, U, own, own_d, own_s, own_up, 0.05)
    # the reference: own distance replaced, then the nearest decides the ratio
    Dr = D.copy()
    Dr[np.arange(Q), own] = own_d
    srt = np.sort(Dr, axis=1)
    ref = np.sort(srt[:, 0] / srt[:, 1])
    assert np.allclose(rule["unknown_tilt_ratios"], ref)
    assert np.all(rule["unknown_tilt_ratios"][:Q // 2] < 0.5)      # the half that stayed nearest stands out
    want = conformal_cut(np.r_[own_s[own_up], loo_ratio_pvalues(ref)], 0.05)
    assert np.isclose(rule["unknown_rule_cut"], want)
    # too few other-face decisions: no rule
    U2 = np.ones((Q, K), bool)
    assert calibrate_rule(D, S, U2, own, own_d, own_s, np.ones(Q, bool), 0.05) is None


def test_rule_calibration_and_the_matcher_use_it(tiny_world, monkeypatch):
    """End to end on the tiny world: the calibration matches the held-out views with the label matcher, and a
    matcher built on a library carrying the rule judges other-face matches by the ratio's p-value and flags by
    the rule's cut."""
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    from protomine.mine.pipeline import rule_calibration, single_view_calibration
    from protomine.mine.tilts import TiltGrid
    cfg = tiny_world["cfg"]
    # the tiny world is mined without tilts; its library searched with a coarse tilt grid (12 up directions)
    # makes the matcher decide some views on another face
    tilts = json.dumps(TiltGrid(nsides=(1,), radial_margin=float(cfg["volume"]["radial_margin"]),
                                height_margin=float(cfg["volume"]["height_margin"])).to_config())
    lib = read_library(tiny_world["library"])
    lib.attrs["tilts"] = tilts
    st = open_store(tiny_world["store"])
    labels = np.asarray(lib.members["cluster"])
    P = np.asarray(lib.prototypes["features"], np.float32)
    V = np.asarray(lib.prototypes["weights"], np.float32)
    raw = np.full(len(st.single_object), np.inf)
    d, k, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), raw_out=raw)
    d_plain, _, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), reliable=False)
    fin = np.isfinite(d)
    assert np.allclose(raw[fin], d_plain[fin], rtol=1e-5)      # raw_out: the distance before re-weighting
    rows = np.flatnonzero(fin)
    s = lib.score(d[fin], k[fin], single_view=True)
    up = np.arange(len(rows)) % 2 == 0                          # half of them reported on another face
    monkeypatch.setattr(openset, "MIN_RATIO_VIEWS", 0)
    rule = rule_calibration(lib, st, rows, k[fin], raw[fin], s, up, 0.2)
    assert rule is not None and 0.0 < rule["unknown_rule_cut"] <= 1.0
    lib.attrs.update(rule)
    m = make_matcher(lib, cfg)
    assert m.unknown_cut == rule["unknown_rule_cut"]
    res = m.match(st.read_single_views(rows))
    lib0 = read_library(tiny_world["library"])
    lib0.attrs["tilts"] = tilts
    res0 = make_matcher(lib0, cfg).match(st.read_single_views(rows))
    want = np.where(res0["upright"], res0["score"], ratio_pvalue(rule["unknown_tilt_ratios"],
                                                                 best_second_ratio(res0["distance"])))
    want = np.where(np.isfinite(res0["distance"]), want, np.where(res0["upright"], res0["score"], 0.0))
    assert (~res0["upright"]).any() and res0["upright"].any()
    assert np.allclose(res["score"], want)
    assert np.array_equal(res["best"], res0["best"])           # the decision itself is unchanged
    # a library written with the rule reads back with it
    from protomine.mine.library import write_library
    path = tiny_world["root"] / "rule_lib.h5"
    write_library(path, lib)
    back = read_library(path)
    assert np.allclose(back.attrs["unknown_tilt_ratios"], rule["unknown_tilt_ratios"])
    assert make_matcher(back, cfg).unknown_cut == pytest.approx(rule["unknown_rule_cut"])
    assert json.loads(back.attrs["config"])["mine"].get("unknown_ratio", False) is False
