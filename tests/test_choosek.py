from __future__ import annotations

import numpy as np
from scipy import ndimage
from sklearn.metrics import normalized_mutual_info_score

from protomine.mine.choosek import choose_k, fit_auto, merge_close_prototypes
from protomine.mine.seeding import kmedoids
from protomine.mine.engine import ArraySource, PoseKMeans

A = 36


def _prototypes(rng, k, C=2, R=4, H=3):
    """k smooth random (C, R, A, H) prototypes, unit standard deviation."""
    P = ndimage.gaussian_filter(rng.normal(size=(k, C, R, A, H)), sigma=(0, 0, 0.5, 2, 0.5), mode="wrap")
    return (P / P.std(axis=(1, 2, 3, 4), keepdims=True)).astype(np.float32)


def _objects(rng, P, n, noise=0.2):
    """n noisy members of prototypes P at random yaws (half of them seen over half the azimuth)."""
    labels = rng.integers(0, len(P), n)
    X = np.stack([np.roll(P[k], s, axis=2) for k, s in zip(labels, rng.integers(0, A, n))])
    X = (X + noise * rng.normal(size=X.shape)).astype(np.float32)
    W = np.ones((n,) + X.shape[2:], np.float32)
    half = rng.random(n) < 0.5
    seen = (np.arange(A)[None, :] - rng.integers(0, A, n)[:, None]) % A < A // 2
    W[half] *= seen[half][:, None, :, None]
    return X, W, labels


def test_fit_auto_recovers_true_k():
    rng = np.random.default_rng(11)
    X, W, labels = _objects(rng, _prototypes(rng, 5), 200)
    model, info = fit_auto(ArraySource(X, W), max_k=9, random_state=0, n_init=2)
    assert info["k_chosen"] == 5, info["table"]
    assert info["k_final"] == model.n_clusters == 5
    # NMI: scikit-learn reference implementation
    assert normalized_mutual_info_score(labels, model.labels_) > 0.98


def test_duplicated_prototype_is_merged():
    rng = np.random.default_rng(12)
    P = _prototypes(rng, 3)
    X, W, labels = _objects(rng, P, 150)
    V = np.ones((4,) + P.shape[2:], np.float32)
    # four starting prototypes, the last one the first shape in another pose: one class ends up split
    init = (np.concatenate([P, np.roll(P[:1], 7, axis=3)]), V)
    model = PoseKMeans(n_clusters=4, init=init, random_state=0).fit(ArraySource(X, W))
    assert model.n_clusters == 4 and np.unique(model.labels_).size == 4
    merged, merges = merge_close_prototypes(model, ArraySource(X, W), merge_threshold=0.5)
    assert merged.n_clusters == 3 and len(merges) == 1
    assert normalized_mutual_info_score(labels, merged.labels_) > 0.98


def test_distinct_prototypes_are_not_merged():
    rng = np.random.default_rng(13)
    X, W, _ = _objects(rng, _prototypes(rng, 3), 120)
    model = PoseKMeans(n_clusters=3, n_init=2, random_state=0).fit(ArraySource(X, W))
    merged, merges = merge_close_prototypes(model, ArraySource(X, W), merge_threshold=0.5)
    assert merges == [] and merged.n_clusters == 3


def test_kmedoids_by_hand():
    # two tight pairs on a line: 0, 1 | 10, 11; a bad start (0 | 1, 10, 11) is repaired in one swap
    pts = np.array([0.0, 1.0, 10.0, 11.0])
    S = np.abs(pts[:, None] - pts[None, :])
    labels, cost = kmedoids(S, np.array([0, 1, 1, 1]))
    assert labels[0] == labels[1] != labels[2] == labels[3]
    assert cost == 2.0  # each pair's non-medoid is 1 from its medoid


def test_choose_k_table_covers_the_range():
    rng = np.random.default_rng(14)
    X, W, _ = _objects(rng, _prototypes(rng, 3), 60)
    k, table = choose_k(ArraySource(X, W), max_k=6, random_state=0)
    assert [r["k"] for r in table] == [2, 3, 4, 5, 6] and k == 3


def test_choose_k_is_not_taken_by_far_outliers():
    # four classes plus two objects of pure noise, far from every other object: the silhouette (Rousseeuw
    # 1987) of 4 classes + 2 singletons beats the 4-class partition's, and the K scan chose 6 (measured
    # 0.92 at K = 6 vs 0.48 at K = 4 before objects beyond Tukey's fence (Tukey 1977) left the scan)
    for seed in range(3):
        rng = np.random.default_rng(20 + seed)
        X, W, _ = _objects(rng, _prototypes(rng, 4), 60)
        Xo = (3.0 * rng.normal(size=(2,) + X.shape[1:])).astype(np.float32)
        src = ArraySource(np.concatenate([X, Xo]), np.concatenate([W, np.ones((2,) + W.shape[1:], np.float32)]))
        k, table = choose_k(src, max_k=8, random_state=0)
        assert k == 4, table
        assert table[0]["outlying"] >= 2


def test_one_restart_only_when_the_seeding_searches_resting_faces():
    # [mine] face_one_start (README "Small tumbled stores"): one restart with face_pairs and a tilt grid,
    # n_init restarts otherwise (yaw-only grid, face_pairs off, or the key off)
    from protomine.config import load_config
    from protomine.mine.pipeline import fit_restarts, tilt_grid
    cfg = load_config("default")
    grid = tilt_grid(cfg)
    n = cfg["mine"]["n_init"]
    assert n > 1 and fit_restarts(cfg, grid) == 1
    assert fit_restarts(cfg, None) == n
    assert fit_restarts(load_config("default", {"mine": {"face_pairs": False}}), grid) == n
    assert fit_restarts(load_config("default", {"mine": {"face_one_start": False}}), grid) == n


def test_silhouette_raise_is_the_paired_one_se_rule():
    # reference twin from the definition: the smallest K >= start whose per-object silhouettes are not
    # significantly below the best K's, significance by scipy.stats.ttest_rel's t statistic (paired t test)
    # above 1.96 (the two-sided 5% level of the normal distribution; from memory)
    from scipy.stats import ttest_rel
    from protomine.mine.choosek import silhouette_raise
    seen = set()
    for seed in range(40):
        rng = np.random.default_rng(seed)
        n, start = 40, int(rng.integers(2, 5))
        base = rng.uniform(-0.2, 0.8, n)
        sil = {k: np.clip(base + rng.normal(0.03 * (k - 2) * rng.uniform(-1, 2), 0.08, n), -1, 1) for k in range(2, 9)}
        cand = [k for k in sil if k >= start]
        best = max(cand, key=lambda k: (sil[k].mean(), -k))
        ref = next(k for k in cand if k == best or ttest_rel(sil[best], sil[k]).statistic <= 1.96)
        got = silhouette_raise(sil, start)
        assert got == ref, (seed, got, ref)
        seen.add("start" if ref == start else "best" if ref == best else "between")
    assert seen == {"start", "best", "between"}  # the cases exercise every branch


def test_silhouette_raise_finds_classes_too_small_for_the_group_count():
    # eight classes of 3 points (scikit-learn make_blobs, well apart): no mutual 4-nearest-neighbour group of
    # 4 exists, so the group count sees none, while the silhouettes (scikit-learn silhouette_samples) of the
    # k-medoids partitions pick the eight classes (the generating labels: adjusted Rand index 1)
    from sklearn.datasets import make_blobs
    from sklearn.metrics import adjusted_rand_score, pairwise_distances, silhouette_samples
    from protomine.mine.choosek import group_count, silhouette_raise
    from protomine.mine.seeding import best_kmedoids
    X, y = make_blobs(n_samples=[3] * 8, centers=None, n_features=4, cluster_std=0.3, center_box=(-10, 10),
                      random_state=3)
    S = pairwise_distances(X)
    start = max(2, group_count(S, 4))
    assert start < 8
    rng = np.random.default_rng(0)
    parts = {k: best_kmedoids(S, k, rng)[0] for k in range(2, 13)}
    sil = {k: silhouette_samples(S, lab, metric="precomputed") for k, lab in parts.items()}
    k = silhouette_raise(sil, start)
    assert k == 8 and adjusted_rand_score(y, parts[k]) == 1.0


def test_face_group_count_keeps_a_loose_class_the_outlier_fence_takes():
    # Points in the plane, Euclidean distances written out (scipy cdist as the reference metric): three tight
    # classes of 8 and one loose class of 7 whose nearest-neighbour distances lie beyond Tukey's fence (Tukey 1977,
    # from memory: Q3 + 1.5 IQR) for most of its objects.  Counted without the outlying objects the loose class keeps
    # too few for a mutual 4-NN group of 5 and K comes out 3; counted over every object it is one more group.
    from scipy.spatial.distance import cdist
    from protomine.mine.choosek import face_group_count
    from protomine.mine.seeding import outlying
    rng = np.random.default_rng(0)
    centres = np.array([[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [10.0, 10.0]])
    pts = [c + rng.normal(0, 0.1, (8, 2)) for c in centres[:3]] + [centres[3] + rng.normal(0, 1.0, (7, 2))]
    S = cdist(np.concatenate(pts), np.concatenate(pts))
    out = outlying(S)
    assert out[24:].sum() >= 3 and not out[:24].any()
    assert face_group_count(S, ~out, None, False) == 3
    assert face_group_count(S, ~out, None, True) == 4
    # the fence still rules the objects kept for the silhouettes; a lone far object is never a group of its own
    lone = np.concatenate([np.concatenate(pts[:3]), [[50.0, 50.0]]])
    S2 = cdist(lone, lone)
    assert face_group_count(S2, ~outlying(S2), None, True) == 3
