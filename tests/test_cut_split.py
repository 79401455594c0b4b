"""``[mine] unknown_cut_split``: the split-conformal unknown cut taken apart for single views that cut their object off
and for whole ones (a Mondrian split: Vovk, Gammerman & Shafer 2005, "Algorithmic learning in a random world", ch. 4;
the finite-sample quantile of Angelopoulos & Bates 2021, "A gentle introduction to conformal prediction", sec. 1: the
ceil((n + 1)(1 - alpha))-th smallest nonconformity), the joined value being Fisher's combination (checked against
scipy.stats.combine_pvalues); ingest keeps whether each held-out view cuts its object off (the store's single/cut)."""
from __future__ import annotations

import shutil

import h5py
import numpy as np
from scipy import stats

from protomine.mine.library import Library
from protomine.mine.openset import best_second_ratio
from protomine.mine.pipeline import MIN_FACE_STRETCH_VIEWS, view_calibrated_fields, view_ratio_calibration
from test_size_score import _cut, _fisher, _loo   # the split-conformal cut, Fisher's combination, the p-values, written out


def _heldout(rng, n, cut_share=0.3):
    """Invented held-out views of 3 prototypes: the views that cut their object off fit their own prototype worse and
    are more often nearer another one (as measured on the all-stereo demo: misdecided 17% against 6%)."""
    own = rng.integers(0, 3, n)
    cut = rng.random(n) < cut_share
    D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
    gap = np.where(cut, rng.normal(-0.1, 0.4, n), rng.normal(0.4, 0.3, n))   # ln(second / own): below 0 misdecided
    others = np.where(own[:, None] == np.arange(3), np.inf, D).min(axis=1)
    D[np.arange(n), own] = others * np.exp(-gap)
    return own, cut, D


def _joined_heldout(seed: int, n: int):
    """``_heldout``'s n views drawn with default_rng(seed), their calibrated fields and their joined values written out
    (Fisher's combination of the calibrated score and the ratio's leave-one-out p-value): (own, cut, D, d, fields,
    joined)."""
    own, cut, D = _heldout(np.random.default_rng(seed), n)
    j = np.arange(n)
    d = D[j, own]
    fields, _ = view_calibrated_fields(d, np.ones(n), own, np.ones(n, bool), 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=np.ones(n, bool), view_normalised=True)
    return own, cut, D, d, fields, _fisher(s, _loo(best_second_ratio(D)[j, np.argmin(D, axis=1)]))


def test_cut_per_stratum_from_its_definition():
    """With the strata given, the cut of each is the split-conformal cut of the joined values (Fisher's combination of
    the calibrated score and the ratio's leave-one-out p-value) of its own views, the pooled cut unchanged; the whole
    views' cut lies above the pooled one and the cut views' below it (the cut views conform worse); a stratum with fewer
    than MIN_FACE_STRETCH_VIEWS views gives no split."""
    n = 400
    own, cut, D, d, fields, joined = _joined_heldout(7, n)
    got = view_ratio_calibration(D, d, own, np.ones(n, bool), fields, 0.05, cut=cut)
    assert np.isclose(got["unknown_view_ratio_cut"], _cut(joined, 0.05), rtol=1e-9)
    assert np.isclose(got["unknown_view_ratio_cut_cut"], _cut(joined[cut], 0.05), rtol=1e-9)
    assert np.isclose(got["unknown_view_ratio_cut_whole"], _cut(joined[~cut], 0.05), rtol=1e-9)
    assert got["unknown_view_ratio_cut_whole"] > got["unknown_view_ratio_cut"] > got["unknown_view_ratio_cut_cut"]
    off = view_ratio_calibration(D, d, own, np.ones(n, bool), fields, 0.05)
    assert off["unknown_view_ratio_cut"] == got["unknown_view_ratio_cut"] and "unknown_view_ratio_cut_cut" not in off
    few = np.zeros(n, bool)
    few[np.flatnonzero(cut)[:MIN_FACE_STRETCH_VIEWS - 1]] = True
    assert "unknown_view_ratio_cut_cut" not in view_ratio_calibration(D, d, own, np.ones(n, bool), fields, 0.05, cut=few)


def test_each_stratum_keeps_its_rate_where_the_pooled_cut_does_not():
    """The guarantee the split buys (Mondrian conformal: P(flagged) <= alpha within each stratum): calibrated on held-out
    views with 30% cut views and applied to new views of the same two kinds, the whole views are flagged at about alpha
    with their own cut but far below it with the pooled one, whatever share of cut views the new set holds (2,000 new
    views of each kind; 20 repetitions; measured 0.053 split, 0.027 pooled)."""
    rng = np.random.default_rng(11)
    alpha = 0.05
    rates = {"pooled": [], "split": []}
    for rep in range(20):
        own, cut, D = _heldout(rng, 500)
        j = np.arange(500)
        d = D[j, own]
        fields, _ = view_calibrated_fields(d, np.ones(500), own, np.ones(500, bool), 3, [(0.0, 1.0)] * 3, alpha)
        got = view_ratio_calibration(D, d, own, np.ones(500, bool), fields, alpha, cut=cut)
        o2, c2, D2 = _heldout(rng, 4000, cut_share=0.5)
        j2 = np.arange(4000)
        s2 = Library(fields, {}, {}).score(D2[j2, o2], o2, single_view=True, upright=np.ones(4000, bool),
                                           view_normalised=True)
        r2 = best_second_ratio(D2)[j2, np.argmin(D2, axis=1)]
        ref = np.sort(got["unknown_view_ratios"])
        p2 = (1 + (len(ref) - np.searchsorted(ref, r2, side="left"))) / (len(ref) + 1)
        with np.errstate(divide="ignore"):   # Fisher's statistic -2 ln(s p) against chi-squared with 4 dof (scipy)
            v2 = stats.chi2.sf(-2.0 * np.log(s2 * p2), 4)
        rates["pooled"].append(np.mean(v2[~c2] < got["unknown_view_ratio_cut"]))
        rates["split"].append(np.mean(v2[~c2] < got["unknown_view_ratio_cut_whole"]))
    assert abs(np.mean(rates["split"]) - alpha) < 0.015   # measured 0.053
    assert np.mean(rates["pooled"]) < 0.7 * alpha          # measured 0.027


def test_store_keeps_whether_a_single_view_cuts_its_object_and_an_older_store_opens(tiny_world, tmp_path):
    """Ingest keeps, per single view, whether it cuts its object off (single/cut, 0 / 1), as the label stage's lifting
    finds it (ingest.truncation.cut_pixels on the frame's depth and the other objects' pixels); a store written before
    (the dataset removed) opens with single_cut None, and the calibration then makes no split, which mining says in
    one notice naming the store and the key (none for the store that keeps it)."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.mine.pipeline import mine_store, older_store_notices
    st = open_store(tiny_world["store"])
    cut = np.asarray(st.single_cut)
    assert cut.shape == (len(st.single_object),) and set(np.unique(cut)) <= {0, 1}
    old = tmp_path / "old.h5"
    shutil.copy(tiny_world["store"], old)
    with h5py.File(old, "a") as f:
        del f["single/cut"]
    ost = open_store(old)
    assert ost.single_cut is None
    assert np.array_equal(ost.read_single_views(np.arange(2)), st.read_single_views(np.arange(2)))
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "unknown_cut_split": True}})
    lib, info = mine_store(old, tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    assert "unknown_view_ratio_cut" in lib.attrs and "unknown_view_ratio_cut_whole" not in lib.attrs
    said = [n for n in info["notices"] if "unknown_cut_split" in n]
    assert len(said) == 1 and str(old) in said[0]
    assert older_store_notices(st, cfg) == []


def test_matcher_takes_each_views_stratum_cut(tiny_world):
    """A library with the two cuts: a view with a ViewCut takes the cut views' cut, one without the whole views'; without
    the key (or without the attributes) every view takes the library's one cut."""
    from protomine.config import load_config
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    lib = read_library(tiny_world["library"])
    cfg = load_config(tiny_world["config"])
    mc = dict(lib.config)
    mc["mine"] = {**mc["mine"], "view_normalise_calibrate": True, "view_normalise_ratio": True, "view_normalise_top": 8,
                  "view_normalise_score": True, "unknown_cut_split": True, "label_members": 0}
    protos = dict(lib.prototypes)
    K = lib.n_clusters
    for k in ("single_view_mu", "single_view_sigma", "single_view_tilt_mu", "single_view_tilt_sigma"):
        protos[k] = np.full(K, -3.0 if k.endswith("mu") else 0.3)
    import json
    attrs = {**lib.attrs, "config": json.dumps(mc), "unknown_view_cut": 0.01, "unknown_view_ratios": np.linspace(0.5, 1, 30),
             "unknown_view_ratio_cut": 0.04, "unknown_view_ratio_cut_whole": 0.07, "unknown_view_ratio_cut_cut": 0.02}
    mt = make_matcher(Library(protos, lib.members, attrs, lib.path), cfg)
    assert mt.unknown_cut == 0.04
    assert np.array_equal(mt.view_unknown_cuts([None, object(), None], 3), [0.07, 0.02, 0.07])
    assert np.array_equal(mt.view_unknown_cuts(None, 2), [0.04, 0.04])
    mc["mine"]["unknown_cut_split"] = False
    off = make_matcher(Library(protos, lib.members, {**attrs, "config": json.dumps(mc)}, lib.path), cfg)
    assert np.array_equal(off.view_unknown_cuts([None, object()], 2), [0.04, 0.04])
