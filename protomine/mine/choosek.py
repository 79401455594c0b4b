"""Choosing the number of prototypes K, and merging prototypes that are one shape in two poses.

Conventions: as in :mod:`protomine.mine.posesearch` and :mod:`protomine.mine.engine`.

Criterion (``choose_k``)
------------------------
On a random subsample of at most ``sample_size`` objects:

1. the pose-minimised distance matrix between the subsampled objects, ``D[i, j]`` = best-pose distance
   of object i to object j taken as a prototype (``pose_distances``), symmetrised as
   ``(D + D.T) / 2`` with a zero diagonal (pairs with no common observed cell get the largest finite
   distance);
2. for every K in ``min_k..max_k`` a :class:`PoseKMeans` fit on the subsample, scored by the mean
   silhouette (Rousseeuw 1987) of its labels on that matrix (``sklearn.metrics.silhouette_score`` with
   ``metric="precomputed"``);
3. K = the argmax of the silhouette (the smallest K on ties).  K = 1 is never proposed (the silhouette
   is undefined for one cluster).

Merging (``merge_close_prototypes`` / ``fit_auto``)
---------------------------------------------------
Two prototypes i, j are *the same shape* when their symmetrised pose-minimised distance is below
``merge_threshold`` x the mean of their members' median distances (``member_stats_['median']``): the
prototypes then differ by less than their members scatter around them.  The closest such pair is merged
by dropping the prototype with fewer members and refitting from the remaining prototypes (``init=``),
until no pair qualifies.

Public API
----------
- ``choose_k(source, *, max_k, scales=(1.0,), random_state=None, min_k=2, sample_size=600, n_init=2,
  max_iter=20, chunk_size=2048) -> (k, table)``; table: list of dicts {k, silhouette, inertia}.
- ``merge_close_prototypes(model, source, *, merge_threshold=0.5) -> (model, merges)``
- ``fit_auto(source, *, max_k, scales=(1.0,), random_state=None, merge_threshold=0.5, **engine_kwargs)
  -> (model, info)``; info: {"k_chosen", "table", "merges", "k_final"}.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from sklearn.metrics import silhouette_score

from .engine import ArraySource, PoseKMeans, Source, _gather
from .posesearch import _check_scales, pose_distances


def _symmetric(D: np.ndarray) -> np.ndarray:
    """(n, n) pose-minimised distances -> symmetric, zero diagonal, finite."""
    finite = np.isfinite(D)
    big = 2.0 * float(D[finite].max()) if finite.any() else 1.0
    D = np.where(finite, D, big).astype(np.float64)
    S = 0.5 * (D + D.T)
    np.fill_diagonal(S, 0.0)
    return S


def choose_k(source: Source, *, max_k: int, scales: Sequence[float] = (1.0,), random_state: int | None = None,
             min_k: int = 2, sample_size: int = 600, n_init: int = 2, max_iter: int = 20,
             chunk_size: int = 2048) -> tuple[int, list[dict]]:
    """Number of prototypes by mean silhouette on pose-minimised distances (module docstring)."""
    scales = _check_scales(scales)
    N = len(source)
    if min_k < 2 or max_k < min_k:
        raise ValueError(f"need 2 <= min_k <= max_k, got min_k={min_k}, max_k={max_k}")
    if N < min_k + 1:
        raise ValueError(f"n_objects={N} must be > min_k={min_k} to compare clusterings")
    rng = np.random.default_rng(random_state)
    return _choose_k(source, max_k=max_k, scales=scales, rng=rng, min_k=min_k, sample_size=sample_size,
                     n_init=n_init, max_iter=max_iter, chunk_size=chunk_size)


def _choose_k(source: Source, *, max_k, scales, rng, min_k, sample_size, n_init, max_iter, chunk_size):
    N = len(source)
    idx = np.sort(rng.choice(N, size=min(N, sample_size), replace=False))
    Xs, Ws = _gather(source, idx, chunk_size)
    S = _symmetric(pose_distances(Xs, Ws, Xs, Ws, scales=scales, chunk_size=256).D)
    sub = ArraySource(Xs, Ws)
    table = []
    for k in range(min_k, min(max_k, len(idx) - 1) + 1):
        model = PoseKMeans(n_clusters=k, scales=scales, n_init=n_init, max_iter=max_iter, chunk_size=chunk_size,
                           random_state=int(rng.integers(2**31 - 1))).fit(sub)
        n_lab = np.unique(model.labels_).size
        score = float(silhouette_score(S, model.labels_, metric="precomputed")) if 1 < n_lab < len(idx) else -1.0
        table.append({"k": k, "silhouette": score, "inertia": float(model.inertia_)})
    best = max(table, key=lambda r: (r["silhouette"], -r["k"]))
    return int(best["k"]), table


def prototype_distances(model: PoseKMeans) -> np.ndarray:
    """(K, K) symmetric pose-minimised distances between a fitted model's prototypes."""
    P, V = model.prototypes_, model.prototype_weights_
    return _symmetric(pose_distances(P, V, P, V, scales=model.scales_).D)


def merge_close_prototypes(model: PoseKMeans, source: Source, *, merge_threshold: float = 0.5
                           ) -> tuple[PoseKMeans, list[tuple[int, int]]]:
    """Merge prototypes closer than ``merge_threshold`` x their members' spread (module docstring).

    Returns the (re)fitted model and the merges as (kept, dropped) prototype indices of each step.
    """
    if merge_threshold < 0:
        raise ValueError(f"merge_threshold must be >= 0, got {merge_threshold}")
    merges: list[tuple[int, int]] = []
    while model.n_clusters > 1:
        S = prototype_distances(model)
        spread = np.nan_to_num(model.member_stats_["median"], nan=0.0)
        limit = merge_threshold * 0.5 * (spread[:, None] + spread[None, :])
        ratio = np.where(np.eye(len(S), dtype=bool), np.inf, S / np.maximum(limit, 1e-12))
        i, j = np.unravel_index(np.argmin(ratio), ratio.shape)
        if ratio[i, j] >= 1.0:
            break
        count = model.member_stats_["count"]
        keep, drop = (i, j) if count[i] >= count[j] else (j, i)
        merges.append((int(keep), int(drop)))
        rest = np.array([k for k in range(model.n_clusters) if k != drop])
        model = PoseKMeans(n_clusters=len(rest), scales=model.scales, n_init=1, max_iter=model.max_iter,
                           tol=model.tol, chunk_size=model.chunk_size, random_state=model.random_state,
                           sample_size=model.sample_size, symmetry_factor=model.symmetry_factor,
                           init=(model.prototypes_[rest], model.prototype_weights_[rest])).fit(source)
    return model, merges


def fit_auto(source: Source, *, max_k: int, scales: Sequence[float] = (1.0,), random_state: int | None = None,
             merge_threshold: float = 0.5, sample_size: int = 600, **engine_kwargs) -> tuple[PoseKMeans, dict]:
    """Choose K, fit on all objects, merge same-shape prototypes.  Returns (model, info)."""
    rng = np.random.default_rng(random_state)
    k, table = choose_k(source, max_k=max_k, scales=scales, random_state=int(rng.integers(2**31 - 1)),
                        sample_size=sample_size)
    model = PoseKMeans(n_clusters=k, scales=scales, random_state=int(rng.integers(2**31 - 1)),
                       **engine_kwargs).fit(source)
    model, merges = merge_close_prototypes(model, source, merge_threshold=merge_threshold)
    return model, {"k_chosen": k, "table": table, "merges": merges, "k_final": model.n_clusters}
