"""``[mine] label_size_score``: the single view's metric size mismatch at its decided prototype joins the unknown score as
a conformal p-value among the held-out views' (Vovk, Gammerman & Shafer 2005, "Algorithmic learning in a random world":
p = (1 + #{i: a_i >= a}) / (m + 1), larger mismatches less conforming; a Mondrian split by face kind, ch. 4), combined
with the other tail probabilities by Fisher's method (checked against scipy.stats.combine_pvalues)."""
from __future__ import annotations

import math
import shutil

import h5py
import numpy as np
from scipy import stats

from protomine.mine.library import Library
from protomine.mine.openset import best_second_ratio
from protomine.mine.pipeline import MIN_FACE_STRETCH_VIEWS, held_out_sizes, view_calibrated_fields, view_ratio_calibration


def _loo(v):   # each value's p-value among all, itself counted: #{j: v_j >= v_i} / m (written out)
    return np.array([np.mean(v >= w) for w in v])


def _fisher(*ps):   # scipy's Fisher combination, one view at a time
    return np.array([stats.combine_pvalues(list(p), method="fisher")[1] for p in zip(*ps)])


def _cut(values, alpha):   # split-conformal cut from its definition: the ceil((n + 1)(1 - alpha))-th largest value
    v = np.sort(np.asarray(values))[::-1]
    r = math.ceil((len(v) + 1) * (1 - alpha) - 1e-9)
    return 0.0 if r > len(v) else float(v[r - 1])


def _heldout(rng, n):
    own = rng.integers(0, 3, n)
    Dq = np.exp(rng.normal(-3.0, 0.3, (n, 3)))                 # the distances without the size factor
    Dq[np.arange(n), own] = Dq.min(axis=1) * np.exp(-np.abs(rng.normal(0.3, 0.3, n)))
    up = rng.random((n, 3)) < 0.6
    # squared log-size residuals: small at the own prototype, larger elsewhere and on other faces
    m = rng.gamma(1.0, np.where(up, 0.15, 0.3), (n, 3))
    m[np.arange(n), own] *= 0.3
    return own, Dq, Dq * np.exp(m), up, m


def test_size_p_values_per_face_kind_and_the_cut():
    """The held-out mismatches at the shape's nearest prototype (the least distance without the size factor) are kept
    sorted (pooled and per face kind there); the ratio is taken on the distances without the size factor too; the size cut is the split-conformal cut of Fisher's combination of the score, the ratio's
    leave-one-out p-value and the mismatch's among the views of its own face kind, and the ratio cut stays the one
    without the size.  A view at the 90th percentile of the other-face mismatches conforms more among them than among
    the canonical ones (the split matters)."""
    rng = np.random.default_rng(3)
    n = 300
    own, Dq, D, up, m = _heldout(rng, n)
    j = np.arange(n)
    b = np.argmin(D, axis=1)               # decided with the size factor, as the label stage decides
    d, own_up = Dq[j, own], up[j, own]
    fields, _ = view_calibrated_fields(d, np.ones(n), own, own_up, 3, [(0.0, 1.0)] * 3, 0.05)
    s = Library(fields, {}, {}).score(d, own, single_view=True, upright=own_up, view_normalised=True)
    bq = np.argmin(Dq, axis=1)             # the shape's nearest prototype (the distances without the size)
    r = best_second_ratio(Dq)[j, bq]
    assert (b != bq).any()
    z, kind = m[j, bq], up[j, bq]
    pz = np.empty(n)
    for k in (True, False):
        assert (kind == k).sum() >= MIN_FACE_STRETCH_VIEWS
        pz[kind == k] = _loo(z[kind == k])
    got = view_ratio_calibration(D, d, own, own_up, fields, 0.05, size=(m, Dq, up))
    assert np.array_equal(got["unknown_view_size"], np.sort(z))
    assert np.array_equal(got["unknown_view_size_canonical"], np.sort(z[kind]))
    assert np.array_equal(got["unknown_view_size_other"], np.sort(z[~kind]))
    assert got["unknown_view_size_members"] == 0
    assert np.isclose(got["unknown_view_size_cut"], _cut(_fisher(s, _loo(r), pz), 0.05), rtol=1e-9)
    assert np.isclose(got["unknown_view_ratio_cut"], _cut(_fisher(s, _loo(r)), 0.05), rtol=1e-9)
    q = np.quantile(z[~kind], 0.9)
    assert (1 + np.sum(z[~kind] >= q)) / ((~kind).sum() + 1) > (1 + np.sum(z[kind] >= q)) / (kind.sum() + 1)
    # off: no size attribute, and the ratio from D itself (the calibration as before the key)
    off = view_ratio_calibration(D, d, own, own_up, fields, 0.05)
    assert not any(k.startswith("unknown_view_size") for k in off)
    assert np.isclose(off["unknown_view_ratio_cut"], _cut(_fisher(s, _loo(best_second_ratio(D)[j, b])), 0.05), rtol=1e-9)


def test_store_keeps_single_view_sizes_and_an_older_store_opens(tiny_world, tmp_path):
    """Ingest keeps each single view's metric footprint radius and height (single/size): the tiny world's objects are
    5-7 cm tall, 3-4 cm in footprint radius, and a view sees its object's whole height and at most its fused footprint
    (5% slack; from the scene's own dimensions, tests/conftest.py).  A store written before the sizes were kept (the
    dataset removed) still opens: single_size None, and the size term has no held-out sizes (None)."""
    from protomine.ingest.sharded import open_store
    st = open_store(tiny_world["store"])
    size = np.asarray(st.single_size)
    assert size.shape == (len(st.single_object), 2) and np.isfinite(size).all()
    fused_r = np.asarray(st.objects["radius_m"])[st.single_object]
    fused_h = np.asarray(st.objects["height_m"])[st.single_object]
    assert np.all(size[:, 0] <= 1.05 * fused_r) and np.all(size[:, 0] >= 0.5 * fused_r)
    assert np.allclose(size[:, 1], fused_h, rtol=0.15)
    assert held_out_sizes(st, np.arange(len(size))) is not None
    old = tmp_path / "old.h5"
    shutil.copy(tiny_world["store"], old)
    with h5py.File(old, "a") as f:
        del f["single/size"]
    ost = open_store(old)
    assert ost.single_size is None and held_out_sizes(ost, np.arange(len(size))) is None
    assert np.array_equal(ost.read_single_views(np.arange(2)), st.read_single_views(np.arange(2)))


def test_matcher_joins_the_size_p_value_by_face_kind(tiny_world, tmp_path):
    """The matcher's last score part is the size mismatch's p-value (1 + #{m_i >= m}) / (len + 1) among the canonical
    or the other kind's held-out mismatches by the match's face kind (written out here; the kinds' arrays set by hand,
    two different ones), 1 for a view without a size; the score is scipy's Fisher combination of the parts; and the
    cut is the library's size cut.  A view given three times its size scores lower at its best prototype (most views; the others the same)."""
    from protomine.config import load_config
    from protomine.ingest.sharded import open_store
    from protomine.label.matcher import make_matcher
    from protomine.mine.pipeline import mine_store
    cfg = load_config(tiny_world["config"], {"mine": {"view_normalise_calibrate": True, "view_normalise_ratio": True,
                                                      "view_normalise_unseen": False, "view_normalise_stretch": False,
                                                      "label_size_score": True, "tilt_nsides": [1]}})
    lib, _ = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    assert "unknown_view_size_cut" in lib.attrs and len(lib.attrs["unknown_view_size"]) > 0
    st = open_store(tiny_world["store"])
    rows = np.arange(len(st.single_object))
    views, cams, sizes = st.read_single_views(rows), np.asarray(st.single_camera), np.asarray(st.single_size)
    canon, other = np.array([0.0, 0.001, 0.004, 0.01, 0.03]), np.array([0.01, 0.05, 0.2, 0.5])
    attrs = {k: v for k, v in lib.attrs.items() if not k.startswith("unknown_view_size")}
    hand = Library(lib.prototypes, lib.members, {**attrs, "unknown_view_size": np.sort(np.r_[canon, other]),
                                                 "unknown_view_size_canonical": canon, "unknown_view_size_other": other,
                                                 "unknown_view_size_cut": 0.123, "unknown_view_size_members": 0}, lib.path)
    mt = make_matcher(hand, cfg)
    assert mt.unknown_cut == 0.123
    got = mt.match(views, cams, sizes=sizes)
    z = np.asarray(got["size_mismatch"], np.float64)
    assert np.isfinite(z).all() and (z > 0).any()
    pc = np.array([(1 + np.sum(canon >= v)) / (len(canon) + 1) for v in z.ravel()]).reshape(z.shape)
    po = np.array([(1 + np.sum(other >= v)) / (len(other) + 1) for v in z.ravel()]).reshape(z.shape)
    up = np.asarray(got["upright"], bool)
    parts = np.asarray(got["score_parts"])
    assert parts.shape[-1] == 3
    assert np.allclose(parts[..., -1], np.where(up, pc, po))
    fin = np.all(parts > 0, axis=-1)
    want = np.array([stats.combine_pvalues(list(p), method="fisher")[1] for p in parts[fin]])
    assert np.allclose(got["score"][fin], want, atol=1e-9)
    nosize = mt.match(views, cams)   # no sizes given: the size's p-value is 1
    assert np.allclose(np.asarray(nosize["score_parts"])[..., -1], 1.0)
    big = mt.match(views, cams, sizes=3.0 * sizes)
    i, k = np.arange(len(rows)), got["best"]
    lower = big["score"][i, k] < got["score"][i, k]   # equal where the size's p-value was already the least, 1 / 5
    assert np.all(lower | np.isclose(big["score"][i, k], got["score"][i, k])) and lower.mean() > 0.5
    # the library's own calibration (the key off in the label config: the library's config decides; a library without
    # the attributes: the ratio cut and two parts)
    plain = make_matcher(Library(lib.prototypes, lib.members, attrs, lib.path), cfg)
    assert plain.view_size is None and np.asarray(plain.match(views, cams, sizes=sizes)["score_parts"]).shape[-1] == 2
