"""The free-space weight chosen by the held-out single views (``[mine] free_weight_factors``, ``mine.freeweight``).

References: the features' definition X = [surface, sqrt(w) free, sqrt(c) rgb surface] (README "Score", the weighted
squared distance weighs each channel by its weight), written out here from that definition; the own-prototype rate
and its leave-one-out factor worked by hand; the rebuilt library against mining at the chosen weight directly
(equivalence of two routes to the same library: the prototypes are weighted means of their members, so the free
channel scales exactly, common practice for a linear rescaling).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from protomine.mine.freeweight import free_weight_choices, own_prototype_rate, reweighted_library
from protomine.mine.library import Library


def _features_by_definition(vols: np.ndarray, w: float, c: float) -> np.ndarray:
    """(n, 5, R, A, H): surface, sqrt(w) x free, sqrt(c) x rgb x surface, from the channels (surface, free, observed,
    r, g, b), one channel at a time."""
    out = np.zeros((vols.shape[0], 5) + vols.shape[2:], np.float64)
    out[:, 0] = vols[:, 0]
    out[:, 1] = np.sqrt(w) * vols[:, 1]
    for i in range(3):
        out[:, 2 + i] = np.sqrt(c) * vols[:, 3 + i] * vols[:, 0]
    return out


def _library(P: np.ndarray, w: float) -> Library:
    conf = {"mine": {"free_weight": w, "colour_weight": 0.15}, "volume": {}}
    return Library({"features": P.astype(np.float32), "weights": np.ones((len(P),) + P.shape[2:], np.float32),
                    "count": np.ones(len(P), int)}, {}, {"config": json.dumps(conf)})


@pytest.mark.parametrize("new", [1.0, 0.25, 0.125, 0.0])
def test_reweighted_library_holds_the_features_of_the_new_weight(new):
    rng = np.random.default_rng(0)
    vols = rng.random((3, 6, 4, 6, 5))
    lib = _library(_features_by_definition(vols, 0.5, 0.15), 0.5)
    out = reweighted_library(lib, new)
    assert np.allclose(out.prototypes["features"], _features_by_definition(vols, new, 0.15), atol=1e-6)
    assert out.config["mine"]["free_weight"] == new and lib.config["mine"]["free_weight"] == 0.5   # lib untouched
    # the squared distance between two of them: the free term scales by new / 0.5, the others stay
    a, b = _features_by_definition(vols[:1], 0.5, 0.15), _features_by_definition(vols[1:2], 0.5, 0.15)
    a2, b2 = out.prototypes["features"][:1].astype(np.float64), out.prototypes["features"][1:2].astype(np.float64)
    free, rest = ((a - b)[:, 1] ** 2).sum(), ((a - b)[:, [0, 2, 3, 4]] ** 2).sum()
    assert np.isclose(((a2 - b2) ** 2).sum(), rest + free * new / 0.5, rtol=1e-5)


def test_reweighted_library_refuses_to_raise_a_weight_of_zero():
    lib = _library(np.zeros((1, 5, 2, 3, 2)), 0.0)
    with pytest.raises(ValueError, match="free_weight=0.0"):
        reweighted_library(lib, 0.5)
    assert reweighted_library(lib, 0.0).config["mine"]["free_weight"] == 0.0


def test_own_prototype_rate_worked_by_hand():
    D = np.array([[1.0, 2.0, 3.0],      # own 0, nearest 0: hit
                  [1.0, 1.2, 0.9],      # own 1 at 1.2; x 0.7 = 0.84 < 0.9: hit only with the factor
                  [np.inf, np.nan, 5.0],  # own 2 at 5: the only finite one: hit
                  [np.inf, np.inf, np.inf],   # nothing finite: a miss
                  [0.5, 0.6, 0.7]])     # own 2: a miss either way
    own = np.array([0, 1, 2, 0, 2])
    assert own_prototype_rate(D, own, np.ones(5)) == pytest.approx(2 / 5)
    assert own_prototype_rate(D, own, np.array([1.0, 0.7, 1.0, 1.0, 1.0])) == pytest.approx(3 / 5)
    assert np.isfinite(D[0]).all() and D[1, 1] == 1.2     # the caller's matrix is not changed


def test_free_weight_choices_put_the_configured_weight_first_once():
    assert free_weight_choices({"mine": {"free_weight": 0.5, "free_weight_factors": [1.0]}}) == []
    assert free_weight_choices({"mine": {"free_weight": 0.5}}) == []
    assert free_weight_choices({"mine": {"free_weight": 0.5, "free_weight_factors": [0.5, 1.0, 0.5, 0.0]}}) == [0.5, 0.25, 0.0]


def test_mining_chooses_by_the_rates_and_the_rebuilt_library_is_mining_at_that_weight(tiny_world, tmp_path, monkeypatch):
    """The tiny world's two objects are told apart at every weight (a tie: the configured weight is kept, the rates
    recorded); with rates that favour another weight (patched), the library is the one mined at that weight."""
    from protomine.config import load_config
    from protomine.mine import pipeline
    cfg = load_config(tiny_world["config"], {"mine": {"free_weight_factors": [1.0, 0.25]}})
    w0 = float(cfg["mine"]["free_weight"])
    lib, _ = pipeline.mine_store(tiny_world["store"], tmp_path / "a" / "library.h5", cfg, seed=0, n_clusters=2)
    rates = json.loads(lib.attrs["free_weight_own_rates"])
    assert json.loads(lib.attrs["free_weight_choices"]) == [w0, 0.25 * w0] and len(rates) == 2
    assert all(0.0 <= r <= 1.0 for r in rates) and rates[0] >= 0.8   # box and cylinder: their own prototype
    kept = [w0, 0.25 * w0][int(np.argmax(rates))]
    assert lib.config["mine"]["free_weight"] == kept
    monkeypatch.setattr(pipeline, "heldout_own_rates", lambda *a, **k: np.array([0.5, 0.75]))
    lib2, _ = pipeline.mine_store(tiny_world["store"], tmp_path / "b" / "library.h5", cfg, seed=0, n_clusters=2)
    assert lib2.config["mine"]["free_weight"] == 0.25 * w0
    direct = load_config(tiny_world["config"], {"mine": {"free_weight": 0.25 * w0, "cluster_free_weight": w0}})
    lib3, _ = pipeline.mine_store(tiny_world["store"], tmp_path / "c" / "library.h5", direct, seed=0, n_clusters=2)
    for key in ("features", "weights", "single_mu", "single_sigma", "single_view_mu"):
        if key in lib3.prototypes:
            assert np.allclose(lib2.prototypes[key], lib3.prototypes[key], atol=1e-5), key
    assert np.array_equal(lib2.members["cluster"], lib3.members["cluster"])
    assert np.allclose(lib2.members["distance"], lib3.members["distance"], rtol=1e-5)
    assert lib2.attrs["unknown_cut"] == pytest.approx(lib3.attrs["unknown_cut"])
