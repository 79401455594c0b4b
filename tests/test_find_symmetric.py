"""find with the symmetric distance ([mine] find_symmetric): the shortlist re-ranked by the mean of the search both ways.

Checks against definitions, not against our own figures: the reverse distance is the pose search with the roles
swapped (the example as the object, the match as the prototype), computed here directly; with a yaw-only search at
scale 1 the distance is symmetric in its two arguments (the posesearch docstring's formula: swapping object and
prototype turns a roll by s into a roll by -s of the same sum); the ranking is the shortlist sorted by the mean of
the two directions, then the rest by distance; average precision is scikit-learn's average_precision_score of that
ranking.
"""
from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import average_precision_score

from protomine.curate.oneshot import find_similar, ranking_key, retrieval_scores
from protomine.ingest.volume import matching_features
from protomine.mine.tilts import TiltGrid, tilt_pose_distances
from test_find_expansion import A, H, R, _cfg as _both, _library, _scene, _Store, _view


def _cfg(n: int) -> dict:
    return _both(symmetric=n)


def test_off_leaves_the_ranking_to_the_distance():
    store, _ = _scene()
    mt = find_similar(_library(), store, "t/0", _cfg(0))
    assert mt.reverse is None
    np.testing.assert_array_equal(mt.rank_key, mt.distance)


def test_yaw_only_reverse_equals_forward_on_the_shortlist():
    store, _ = _scene()
    mt = find_similar(_library(), store, "t/0", _cfg(6))
    short = mt.order[:6]
    # the shortlist: the 6 nearest by distance (example left out), each with a reverse distance; nobody else has one
    assert set(np.flatnonzero(np.isfinite(mt.reverse))) == set(short)
    # float32 sums in another order: on an AVX-512 machine one of six differed by 1.3e-4 of its value (1.6e-7)
    np.testing.assert_allclose(mt.reverse[short], mt.distance[short], rtol=1e-3)


def _tilted_store():
    """Views of two irregular classes, some of them tipped onto another face (the store volume of the view
    resampled on a tilted copy), so that the search's resampled side matters."""
    from protomine.mine.tilts import TiltBank
    rng = np.random.default_rng(11)
    grid = TiltGrid(nsides=(1, 2))
    profiles = [rng.integers(1, 6, (A, H)), rng.integers(1, 6, (A, H))]
    ids, vols = [], []
    for c, prof in enumerate(profiles):
        for i in range(6):
            v = _view(prof, float(rng.uniform(0, 360)), int(rng.integers(A)), rng)
            if i % 2:
                X, W = matching_features(v[None])
                xc, wc = TiltBank(X, W, [1.0], (1.0,), grid).copy_at(0, grid.dirs[int(rng.integers(1, 12))])
                v = v.copy()
                v[0], v[1], v[2] = xc[0], xc[1], 2.0 * wc      # surface, free, observed of the tipped view
            ids.append(f"c{c}/{i}")
            vols.append(v)
    return _Store(ids, np.stack(vols)), grid


def test_reverse_is_the_swapped_search_and_ranks_the_shortlist():
    import json
    store, grid = _tilted_store()
    lib = _library()
    lib.attrs["tilts"] = json.dumps(grid.to_config())
    cfg = _cfg(5)
    mt = find_similar(lib, store, "c0/0", cfg)
    ex = mt.example_index
    fwd = np.where(np.isfinite(mt.distance), mt.distance, np.inf)
    cand = [i for i in np.lexsort((np.array(store.ids), fwd)) if i != ex][:5]
    X, W = matching_features(store.volumes, free_weight=cfg["mine"]["free_weight"],
                             colour_weight=cfg["mine"]["colour_weight"])
    from protomine.curate.oneshot import _aspects
    asp = _aspects(store, np.arange(len(store)))
    for j in cand:
        ref = tilt_pose_distances(X[[ex]], W[[ex]], X[[j]], W[[j]], aspect=asp[[j]], scales=(1.0,), grid=grid).D[0, 0]
        assert mt.reverse[j] == ref
    assert np.all(np.isnan(np.delete(mt.reverse, cand)))
    # the tipped views make the two directions differ (the resampled side is the prototype's): not a copy of distance
    assert np.max(np.abs(mt.reverse[cand] - mt.distance[cand]) / mt.distance[cand]) > 0.1
    # the ranking: the shortlist by the mean of both directions, then the others by distance (ties by object id)
    sym = {j: 0.5 * (mt.distance[j] + mt.reverse[j]) for j in cand}
    rest = [i for i in np.lexsort((np.array(store.ids), fwd)) if i != ex and i not in sym]
    expected = sorted(cand, key=lambda j: (sym[j], store.ids[j])) + rest
    assert list(mt.order) == expected
    # matches.csv: best first, the shortlist's symmetric distance in both_ways, empty for the rest
    import csv
    import tempfile
    from pathlib import Path
    from protomine.curate.oneshot import write_matches
    with tempfile.TemporaryDirectory() as tmp:
        rows = list(csv.DictReader(write_matches(Path(tmp) / "m.csv", mt).open()))
    assert [r["object"] for r in rows] == [store.ids[j] for j in expected]
    for r, j in zip(rows, expected):
        assert (r["both_ways"] == "") == (j not in sym)
        if j in sym:
            assert float(r["both_ways"]) == pytest.approx(sym[j], rel=1e-5)
    # average precision of that ranking (scikit-learn, scored by the negated position)
    others = np.array([i for i in range(len(store)) if i != ex])
    rel = np.array([store.ids[i].startswith("c0/") for i in others])
    k, p, ap = retrieval_scores(mt, others, rel)
    pos = {int(j): r for r, j in enumerate(expected)}
    assert ap == average_precision_score(rel, -np.array([pos[int(i)] for i in others], float))
    assert k == 5 and p == np.mean(rel[np.searchsorted(others, expected[:5])])


def test_ranking_key_orders_shortlist_first():
    d = np.array([0.1, 0.2, 0.3, 0.4, np.inf])
    r = np.array([0.9, 0.1, np.nan, np.nan, np.nan])
    key = ranking_key(d, r)
    # hand-worked: shortlist keys 0.5 and 0.15 (object 1 first), then 2 and 3 by distance, the unmatched last
    assert list(np.argsort(key, kind="stable")) == [1, 0, 2, 3, 4]
    assert key[1] == 0.5 * (0.2 + 0.1) and np.isinf(key[4])


def test_expansion_takes_the_symmetric_ranking(monkeypatch):
    """With find_expand, the matches the example is fused with are taken in the symmetric ranking of the first search
    (the key handed to the expansion is the shortlist's mean of both directions, then the rest)."""
    import json
    from protomine.curate import oneshot
    store, grid = _tilted_store()
    lib = _library()
    lib.attrs["tilts"] = json.dumps(grid.to_config())
    first = find_similar(lib, store, "c0/0", _cfg(5))
    seen = {}
    real = oneshot._expansion_set

    def spy(src, st, ex, key, *args):
        seen["key"] = np.array(key)
        return real(src, st, ex, key, *args)
    monkeypatch.setattr(oneshot, "_expansion_set", spy)
    cfg = _cfg(5)
    cfg["mine"]["find_expand"], cfg["mine"]["find_reciprocal"] = 2, 0
    mt = find_similar(lib, store, "c0/0", cfg)
    np.testing.assert_array_equal(seen["key"], first.rank_key)
    # the expanded search ranks its own shortlist both ways again
    assert np.sum(np.isfinite(mt.reverse)) == 5
