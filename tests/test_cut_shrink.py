"""``[mine] unknown_cut_shrink``: each stratum's split-conformal unknown cut (``[mine] unknown_cut_split``: views that cut
their object off and whole ones) drawn toward the pooled cut by its number of held-out views, the credibility-weighted
mean (n c_s + n0 c) / (n + n0) (Buhlmann 1967, "Experience rating and credibility", ASTIN Bulletin 4: weight
Z = n / (n + k) on a group's own estimate; the worked numbers below written out by hand); the strata's joined values
(Fisher's combination, checked against scipy.stats.combine_pvalues in test_size_score) recorded by mining."""
from __future__ import annotations

import json

import numpy as np

from protomine.mine.library import Library
from protomine.mine.openset import shrunk_stratum_cut
from protomine.mine.pipeline import view_ratio_calibration
from test_cut_split import _joined_heldout
from test_size_score import _cut


def test_shrunk_cut_worked_examples():
    """By hand: 60 views at 0.0004 with 60 pseudo-views at the pooled 0.0204 -> (0.024 + 1.224) / 120 = 0.0104; 170 whole
    views at 0.0651 with 80 at 0.0470 -> (11.067 + 3.76) / 250 = 0.059308; n0 = 0 keeps the stratum's cut; a huge stratum
    stays near its own, a tiny one goes near the pooled one."""
    assert np.isclose(shrunk_stratum_cut(0.0004, 60, 0.0204, 60), 0.0104, rtol=1e-12)
    assert np.isclose(shrunk_stratum_cut(0.0651, 170, 0.0470, 80), 0.059308, rtol=1e-12)
    assert shrunk_stratum_cut(0.013, 64, 0.047, 0) == 0.013
    assert abs(shrunk_stratum_cut(0.01, 10**6, 0.05, 80) - 0.01) < 1e-5
    assert abs(shrunk_stratum_cut(0.01, 1, 0.05, 80) - 0.05) < 1e-3


def test_mining_records_each_strata_joined_values():
    """The strata's joined values the label stage shrinks with are the Fisher combination (written out) of each view's
    calibrated score and its ratio's leave-one-out p-value, sorted, split by whether the view cuts its object off; the
    strata's cuts are their split-conformal cuts (the ceil((n + 1)(1 - alpha))-th smallest nonconformity, written out)."""
    n = 300
    own, cut, D, d, fields, joined = _joined_heldout(5, n)
    got = view_ratio_calibration(D, d, own, np.ones(n, bool), fields, 0.05, cut=cut)
    assert np.allclose(got["unknown_view_joined_cut"], np.sort(joined[cut]), rtol=1e-9)
    assert np.allclose(got["unknown_view_joined_whole"], np.sort(joined[~cut]), rtol=1e-9)
    assert np.isclose(_cut(got["unknown_view_joined_cut"], 0.05), got["unknown_view_ratio_cut_cut"], rtol=1e-12)


def test_matcher_shrinks_each_strata_cut(tiny_world):
    """A library with the two cuts and 30 cut / 70 whole held-out values: with n0 = 30 the cut views take
    (30 x 0.02 + 30 x 0.04) / 60 = 0.03 and the whole ones (70 x 0.07 + 30 x 0.04) / 100 = 0.061 (by hand); n0 = 0, or a
    library without the strata's values, keeps 0.02 / 0.07."""
    from protomine.config import load_config
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    lib = read_library(tiny_world["library"])
    cfg = load_config(tiny_world["config"])
    mc = dict(lib.config)
    mc["mine"] = {**mc["mine"], "view_normalise_calibrate": True, "view_normalise_ratio": True, "view_normalise_top": 8,
                  "view_normalise_score": True, "unknown_cut_split": True, "unknown_cut_shrink": 30.0, "label_members": 0}
    protos = dict(lib.prototypes)
    K = lib.n_clusters
    for k in ("single_view_mu", "single_view_sigma", "single_view_tilt_mu", "single_view_tilt_sigma"):
        protos[k] = np.full(K, -3.0 if k.endswith("mu") else 0.3)
    attrs = {**lib.attrs, "config": json.dumps(mc), "unknown_view_cut": 0.01, "unknown_view_ratios": np.linspace(0.5, 1, 30),
             "unknown_view_ratio_cut": 0.04, "unknown_view_ratio_cut_whole": 0.07, "unknown_view_ratio_cut_cut": 0.02,
             "unknown_view_joined_cut": np.linspace(0.001, 1, 30), "unknown_view_joined_whole": np.linspace(0.001, 1, 70)}
    mt = make_matcher(Library(protos, lib.members, attrs, lib.path), cfg)
    assert np.allclose(mt.view_unknown_cuts([None, object()], 2), [0.061, 0.03], rtol=1e-12)
    older = {k: v for k, v in attrs.items() if not k.startswith("unknown_view_joined")}
    assert np.array_equal(make_matcher(Library(protos, lib.members, older, lib.path), cfg).view_unknown_cuts(
        [None, object()], 2), [0.07, 0.02])
    mc["mine"]["unknown_cut_shrink"] = 0.0
    off = make_matcher(Library(protos, lib.members, {**attrs, "config": json.dumps(mc)}, lib.path), cfg)
    assert np.array_equal(off.view_unknown_cuts([None, object()], 2), [0.07, 0.02])
    # ``[mine] unknown_cut_split_below`` 0.5: 30 of 100 held-out views cut off is the exception, so the split stays;
    # 70 of 100 (the touching demos' share, about 60%) is not, so every view takes the pooled cut 0.04
    mc["mine"].update(unknown_cut_shrink=30.0, unknown_cut_split_below=0.5)
    guarded = {**attrs, "config": json.dumps(mc)}
    mt = make_matcher(Library(protos, lib.members, guarded, lib.path), cfg)
    assert np.allclose(mt.view_unknown_cuts([None, object()], 2), [0.061, 0.03], rtol=1e-12)
    mostly_cut = {**guarded, "unknown_view_joined_cut": np.linspace(0.001, 1, 70),
                  "unknown_view_joined_whole": np.linspace(0.001, 1, 30)}
    mt = make_matcher(Library(protos, lib.members, mostly_cut, lib.path), cfg)
    assert mt.split_cuts is None
    assert np.array_equal(mt.view_unknown_cuts([None, object()], 2), [0.04, 0.04])
