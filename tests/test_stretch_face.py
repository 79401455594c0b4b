"""``[mine] view_normalise_stretch_face``: the stretch's conformal p-value among the held-out views decided on the same
face kind (canonical or another), a Mondrian split (Vovk, Gammerman & Shafer 2005, "Algorithmic learning in a random
world", ch. 4: conformal p-values computed within each category)."""
from __future__ import annotations

import numpy as np
from scipy import stats

from conftest import score_without_stretch
from protomine.mine.library import Library
from protomine.mine.openset import best_second_ratio, conformal_cut
from protomine.mine.pipeline import MIN_FACE_STRETCH_VIEWS, view_calibrated_fields, view_ratio_calibration


def _heldout(rng, n, p_canon):
    own = rng.integers(0, 3, n)
    D = np.exp(rng.normal(-3.0, 0.3, (n, 3)))
    D[np.arange(n), own] = D.min(axis=1) * np.exp(-np.abs(rng.normal(0.3, 0.3, n)))
    up = rng.random((n, 3)) < p_canon
    # views on another face take the ends of the scale set more often (as the demos' held-out views do)
    scales = np.where(up, rng.choice([0.87, 0.93, 1.0, 1.07, 1.15], (n, 3), p=[0.03, 0.1, 0.74, 0.1, 0.03]),
                      rng.choice([0.87, 0.93, 1.0, 1.07, 1.15], (n, 3), p=[0.25, 0.1, 0.3, 0.1, 0.25]))
    return own, D, up, scales


def _loo(v):   # each value's p-value among all, itself counted: #{j: v_j >= v_i} / m (written out)
    return np.array([np.mean(v >= w) for w in v])


def _fisher(*ps):   # scipy's Fisher combination, one view at a time
    return np.array([stats.combine_pvalues(list(p), method="fisher")[1] for p in zip(*ps)])


def test_stretch_p_values_within_each_face_kind():
    """The held-out stretches are kept sorted per decided face kind, and the cut is the split-conformal cut of Fisher's
    combination of the score, the ratio's leave-one-out p-value among all views and the stretch's among the views of
    its own face kind; with the split off (no face kinds) it is the pooled cut of view_normalise_stretch, and the two
    differ.  A canonical-face view at an end of the scale set conforms less among canonical views than among all."""
    rng = np.random.default_rng(11)
    n = 240
    own, D, up, scales = _heldout(rng, n, 0.65)
    j = np.arange(n)
    d, own_up = D[j, own], up[j, own]
    fields, _ = view_calibrated_fields(d, np.ones(n), own, own_up, 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=own_up, view_normalised=True)
    r, x, kind = best_second_ratio(D)[j, own], np.abs(np.log(scales[j, own])), up[j, own]   # own is the nearest
    px = np.empty(n)
    for k in (True, False):
        px[kind == k] = _loo(x[kind == k])
    got = view_ratio_calibration(D, d, own, own_up, fields, 0.05, fit_scale=scales, upright=up)
    assert np.array_equal(got["unknown_view_stretch_canonical"], np.sort(x[kind]))
    assert np.array_equal(got["unknown_view_stretch_other"], np.sort(x[~kind]))
    assert np.array_equal(got["unknown_view_stretch"], np.sort(x))
    want = conformal_cut(_fisher(s, _loo(r), px), 0.05)
    assert np.isclose(got["unknown_view_ratio_cut"], want, rtol=1e-9)
    pooled = view_ratio_calibration(D, d, own, own_up, fields, 0.05, fit_scale=scales)
    assert "unknown_view_stretch_canonical" not in pooled
    assert np.isclose(pooled["unknown_view_ratio_cut"], conformal_cut(_fisher(s, _loo(r), _loo(x)), 0.05), rtol=1e-9)
    assert not np.isclose(pooled["unknown_view_ratio_cut"], got["unknown_view_ratio_cut"])
    end = np.log(1.15)
    canon_p = (1 + np.sum(x[kind] >= end - 1e-12)) / (kind.sum() + 1)
    all_p = (1 + np.sum(x >= end - 1e-12)) / (n + 1)
    assert canon_p < all_p


def test_a_thin_face_kind_keeps_the_pooled_p_values():
    """With fewer than MIN_FACE_STRETCH_VIEWS held-out views decided on another face, those views keep their pooled
    p-values (no attribute for that kind) and the canonical ones take theirs among the canonical views."""
    rng = np.random.default_rng(5)
    n = 200
    own, D, up, scales = _heldout(rng, n, 0.97)
    j = np.arange(n)
    kind = up[j, own]
    assert 0 < (~kind).sum() < MIN_FACE_STRETCH_VIEWS
    d, own_up = D[j, own], up[j, own]
    fields, _ = view_calibrated_fields(d, np.ones(n), own, own_up, 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=own_up, view_normalised=True)
    r, x = best_second_ratio(D)[j, own], np.abs(np.log(scales[j, own]))
    got = view_ratio_calibration(D, d, own, own_up, fields, 0.05, fit_scale=scales, upright=up)
    assert "unknown_view_stretch_other" not in got and "unknown_view_stretch_canonical" in got
    px = _loo(x)
    px[kind] = _loo(x[kind])
    assert np.isclose(got["unknown_view_ratio_cut"], conformal_cut(_fisher(s, _loo(r), px), 0.05), rtol=1e-9)


def test_matcher_takes_each_face_kinds_stretches(tiny_world, tmp_path):
    """The matcher joins the stretch's p-value among the stretches of the match's own face kind: the two-way score
    (the library without stretches, as with view_normalise_stretch off) joined by Fisher's combination with
    (1 + #{x_i >= x}) / (m + 1) among the canonical or the other kind's stretches by the match's face kind, written
    out here; the kinds' arrays are set by hand (two different ones), so each must be read for its own matches."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.openset import fisher_combine_many
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "view_normalise_unseen": False, "view_normalise_stretch": True,
                                                      "view_normalise_stretch_face": True, "tilt_nsides": [1]}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    st = open_store(tiny_world["store"])
    views, cams = st.read_single_views(np.arange(len(st.single_object))), np.asarray(st.single_camera)
    canon, other = np.array([0.0, 0.0, 0.0, 0.07, 0.14]), np.array([0.07, 0.14, 0.14, 0.14])
    attrs = {k: v for k, v in lib.attrs.items() if not k.startswith("unknown_view_stretch")}
    both = Library(lib.prototypes, lib.members, {**attrs, "unknown_view_stretch": np.sort(np.r_[canon, other]),
                                                 "unknown_view_stretch_canonical": canon,
                                                 "unknown_view_stretch_other": other}, lib.path)
    got = make_matcher(both, cfg).match(views, cams)
    two = make_matcher(Library(lib.prototypes, lib.members, attrs, lib.path), cfg).match(views, cams)["score"]
    xs = score_without_stretch(two)   # fisher_combine(s, p) = x (1 - ln x): recover x = s p by bisection
    x = np.abs(np.log(np.asarray(got["fit_scale"], np.float64)))
    pc = np.array([(1 + np.sum(canon >= v - 1e-12)) / (len(canon) + 1) for v in x.ravel()]).reshape(x.shape)
    po = np.array([(1 + np.sum(other >= v - 1e-12)) / (len(other) + 1) for v in x.ravel()]).reshape(x.shape)
    up = np.asarray(got["upright"], bool)
    assert up.any() and (~up).any()
    assert np.allclose(got["score"], fisher_combine_many(xs, np.ones_like(xs), np.where(up, pc, po)), atol=1e-6)
