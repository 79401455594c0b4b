"""find's known-class route ([mine] find_prototype): an example of a mined class ranks the store by its prototype.

The scene is built so that the answer is known by construction (the checks are against the constructed truth, not
against our own figures): the library knows two classes, each prototype a full 360-degree view of an irregular
outline.  The example is a heavily occluded view of the target class (only the azimuths within 20 degrees of its
viewing direction seen, as a view mostly hidden behind a nearer object), and the store also holds views of a
never-mined "twin" class whose outline equals the target's on exactly those azimuths and differs elsewhere.  Seen
alone, the example cannot tell its class from the twin: the one-shot ranking puts the twin views (which show the
same strip) ahead of target views seen from the far side.  The target's prototype has seen every side, so the route
ranks every target view first (an assignment margin below 1 is mining's own rule for "member of the target").
"""
from __future__ import annotations

import copy

import numpy as np

from protomine.config import load_config
from protomine.curate.knownclass import AGREE_MIN, agreement, margin_key
from protomine.curate.oneshot import find_similar, ranking_key
from protomine.ingest.volume import matching_features
from protomine.mine.library import Library
from test_find_expansion import A, H, R, _Store, _view

STRIP_DEG = 20.0


def _cfg(t: float, weak: float = 0.0) -> dict:
    cfg = load_config(None)
    cfg["mine"]["find_prototype"] = t
    cfg["mine"]["find_prototype_weak"] = weak
    cfg["mine"]["find_expand"] = 0
    cfg["mine"]["find_symmetric"] = 16
    cfg["mine"]["find_rerank"] = 0                # the fallback is the one-shot ranking itself (tests/test_find_rerank.py)
    return cfg


def _world():
    rng = np.random.default_rng(3)
    target, other = rng.integers(1, 6, (A, H)), rng.integers(1, 6, (A, H))
    phi = (np.arange(A) + 0.5) * 360.0 / A
    strip = np.abs((phi + 180.0) % 360.0 - 180.0) <= STRIP_DEG + 10.0       # the example's azimuths (and a margin)
    twin = np.where(strip[:, None], target, rng.integers(1, 6, (A, H)))
    cfg = _cfg(0.0)
    fw, cw = cfg["mine"]["free_weight"], cfg["mine"]["colour_weight"]
    # the library: each class's prototype a full view (every azimuth observed), its single-view calibration fitted on
    # partial views of the class (median and scaled MAD of log distances, as mining fits it)
    full = np.stack([_view(p, 0.0, 0, rng, 180.0) for p in (target, other)])
    P, V = matching_features(full, free_weight=fw, colour_weight=cw)
    lib_cfg = copy.deepcopy(cfg)
    lib_cfg["volume"].update(radial_bins=R, azimuth_bins=A, height_bins=H)
    lib_cfg["mine"].update(view_normalise_top=0, view_normalise_score=False, face_pairs=False, label_refine_top=0,
                           tolerant_residual=False, label_symmetric=0)
    import json
    protos = {"features": P, "weights": V, "aspect": np.full(2, 1.10 / 1.15), "count": np.array([20, 20]),
              "symmetry": np.array([1, 1]), "face_up": np.array([[[0.0, 0.0, 1.0]]] * 2),
              "face_count": np.array([[20], [20]]), "face_symmetry": np.array([[1], [1]]),
              "single_mu": np.full(2, np.log(0.02)), "single_sigma": np.full(2, 0.5),
              "fused_mu": np.full(2, np.log(0.01)), "fused_sigma": np.full(2, 0.5),
              "name": np.array(["", ""], dtype=object)}
    members = {"object": np.zeros(0, dtype=object), "cluster": np.zeros(0, np.int64), "distance": np.zeros(0)}
    lib = Library(protos, members, {"scales": "[1.0]", "tilts": json.dumps({"nsides": [0]}), "unknown_cut": 0.05,
                                    "grid": [R, A, H], "config": json.dumps(lib_cfg)})
    ids, vols, kind = ["t/example"], [_view(target, 0.0, int(rng.integers(A)), rng, STRIP_DEG)], ["example"]
    for i, a in enumerate(np.linspace(0.0, 360.0, 10, endpoint=False) + 18.0):      # target views from every side
        ids.append(f"t/{i}")
        vols.append(_view(target, float(a), int(rng.integers(A)), rng, 70.0))
        kind.append("target")
    for i, a in enumerate((-15.0, -5.0, 0.0, 5.0, 15.0, 10.0)):                      # the twin's strip side
        ids.append(f"w/{i}")
        vols.append(_view(twin, a, int(rng.integers(A)), rng, 45.0))
        kind.append("twin")
    for i, a in enumerate((0.0, 120.0, 240.0)):                                      # the other mined class
        ids.append(f"o/{i}")
        vols.append(_view(other, a, int(rng.integers(A)), rng, 70.0))
        kind.append("other")
    # a view of a never-mined class with nothing in common with either prototype
    ids.append("n/0")
    vols.append(_view(rng.integers(1, 6, (A, H)), 0.0, 0, rng, 70.0))
    kind.append("new")
    return lib, _Store(ids, np.stack(vols)), np.array(kind)


def test_occluded_view_of_a_mined_class_finds_every_side():
    lib, store, kind = _world()
    off = find_similar(lib, store, "t/example", _cfg(0.0))
    on = find_similar(lib, store, "t/example", _cfg(0.3))
    n_target = int(np.sum(kind == "target"))
    # the example alone: twin views (showing the same strip) come before some target views seen from the far side
    assert np.sum(kind[off.order[:n_target]] == "target") <= n_target - 3, kind[off.order]
    assert off.route is None
    # the route: the label decision names the target's prototype (0), and every target view comes first
    assert on.route is not None and on.route.taken and on.route.cluster == 0, on.route
    assert set(kind[on.order[:n_target]]) == {"target"}, kind[on.order]
    # the ranking is the assignment margin d_0 / d_1 of the pose search against both prototypes; the distance and
    # score columns stay the one-shot search's
    np.testing.assert_array_equal(on.rank_key, on.route.key)
    np.testing.assert_allclose(on.distance, off.distance)
    np.testing.assert_allclose(on.score, off.score)
    rows = on.rows(3)
    assert all(r["prototype"] == 0 and r["both_ways"] is None and 0.0 <= r["prototype_score"] <= 1.0 for r in rows)


def test_falls_back_to_the_one_shot_ranking():
    lib, store, kind = _world()
    # an example no prototype fits: the label decision scores it under the cut, the one-shot ranking stands
    on = find_similar(lib, store, "n/0", _cfg(0.3))
    off = find_similar(lib, store, "n/0", _cfg(0.0))
    assert on.route is not None and not on.route.taken and on.route.example_score < 0.3
    np.testing.assert_array_equal(on.order, off.order)
    np.testing.assert_array_equal(on.rank_key, ranking_key(off.distance, off.reverse))
    assert all(r["prototype"] is None for r in on.rows(3))
    # a threshold above the example's own score turns the route off for a view of a mined class too
    hi = find_similar(lib, store, "t/example", _cfg(1.0))
    assert not hi.route.taken and hi.route.cluster == 0


def test_margin_key_definition():
    D = np.array([[1.0, 2.0, 4.0], [3.0, 1.5, np.inf], [np.inf, 1.0, 1.0], [2.0, np.nan, 8.0]])
    # d_ib / min over the other prototypes' finite distances; unmatched d_ib: inf
    np.testing.assert_allclose(margin_key(D, 0), [0.5, 2.0, np.inf, 0.25])


def test_weak_score_needs_the_rankings_to_agree():
    lib, store, kind = _world()
    off = find_similar(lib, store, "t/example", _cfg(0.0))
    # the sure threshold above the example's score: only the weak band can take it, when the two top-10s agree
    weak = find_similar(lib, store, "t/example", _cfg(1.0, 0.1))
    ex = off.example_index
    top_off = [i for i in off.order[:10]]
    key_top = [i for i in np.lexsort((np.asarray(store.ids), weak.route.key)) if i != ex][:10]
    assert weak.route.agree == len(set(top_off) & set(key_top))
    assert weak.route.taken == (weak.route.agree >= AGREE_MIN)
    assert weak.route.taken and set(kind[weak.order[:10]]) == {"target"}     # 5 target views shared: taken
    # the same band with fewer in common than AGREE_MIN: not taken (the agreement read from the route, the rule from
    # the module docstring)
    import protomine.curate.knownclass as kc
    old = kc.AGREE_MIN
    try:
        kc.AGREE_MIN = weak.route.agree + 1
        assert not find_similar(lib, store, "t/example", _cfg(1.0, 0.1)).route.taken
    finally:
        kc.AGREE_MIN = old


def test_agreement_hand_worked():
    ids = np.array(["a", "b", "c", "d", "e"])
    a = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    b = np.array([0.0, 4.0, 3.0, 1.0, np.inf])
    # the example (0) left out: first 2 of a are b, c; of b are d, c -> one in common
    assert agreement(a, b, ids, 0, top=2) == 1
    assert agreement(a, a, ids, 0, top=3) == 3
