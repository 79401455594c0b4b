"""Seeding the pose-aware clustering from pose-searched distances between objects.

Conventions: as in :mod:`protomine.mine.posesearch` (X (n, C, R, A, H), W (n, R, A, H)).

Why
---
Descriptors that forget the pose (azimuthal spectrum magnitudes, or anything else invariant to yaw per
ring and layer) also forget the angles *between* parts: a shape and its mirror image, or the same pegs at
the same heights pointing different ways, get the same descriptor, and k-means on it is at chance.  The
pose-minimised distance between two objects keeps those angles (one yaw for the whole object), so the
seeds come from it.

How
---
1. ``pairwise_pose_distances``: the (m, m) pose-minimised distances among at most ``size`` objects of the
   engine's subsample, symmetrised ((D + D.T) / 2, zero diagonal, pairs with no common observed cell at
   twice the largest finite distance).  The distance is a function argument ``distance(X, W, P, V) ->
   (n, k)`` (default: ``posesearch.pose_distances(...).D`` over the engine's scales), so a pose search over
   more than yaw and scale slots in unchanged.
2. ``PoseSeeder.partition(K, restart, rng)``: K medoids on that matrix: restart 0 from average-linkage
   clustering (``sklearn.cluster.AgglomerativeClustering``, precomputed distances), every other restart
   from k-means++-style D^2 sampling of medoids (Arthur & Vassilvitskii 2007, with distances to medoids in
   place of distances to centroids), each refined by alternating k-medoids (Park & Jun 2009).  The other
   subsample objects join their pose-nearest medoid.  The engine turns the medoids and labels into
   prototypes (one aligned update).

Public API
----------
- ``symmetric_distances(D) -> S``; ``kmedoids(S, labels, max_iter=30) -> (labels, cost)``
- ``pairwise_pose_distances(X, W, distance=None, *, scales=(1.0,), progress=None) -> S``
- ``kmedoids_plusplus(S, K, rng) -> medoids (K,)``
- ``PoseSeeder(X, W, *, scales, rng, size=SEED_SIZE, distance=None)``; ``.partition(K, restart, rng) ->
  (labels (n,), refs (K,))``; ``.S`` (m, m), ``.index`` (m,) rows of X in the matrix.
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from sklearn.cluster import AgglomerativeClustering

from ..progress import bar
from .posesearch import PoseBank, pose_distances

DistanceFn = Callable[[np.ndarray, np.ndarray, np.ndarray, np.ndarray], np.ndarray]

SEED_SIZE = 200      # objects in the seeding matrix: 40k pose searches (~12 per class at K = 16)


def symmetric_distances(D: np.ndarray) -> np.ndarray:
    """(n, n) pose-minimised distances -> symmetric, zero diagonal, finite (float64)."""
    finite = np.isfinite(D)
    big = 2.0 * float(D[finite].max()) if finite.any() else 1.0
    D = np.where(finite, D, big).astype(np.float64)
    S = 0.5 * (D + D.T)
    np.fill_diagonal(S, 0.0)
    return S


def kmedoids(S: np.ndarray, labels: np.ndarray, max_iter: int = 30) -> tuple[np.ndarray, float]:
    """Alternating k-medoids (Park & Jun 2009) on a (n, n) distance matrix from labels (n,) in 0..K-1
    (every label used): (labels, cost = summed distance to the medoids)."""
    K = int(labels.max()) + 1
    medoids = np.empty(K, np.int64)
    for _ in range(max_iter):
        for k in range(K):
            members = np.flatnonzero(labels == k)
            medoids[k] = members[np.argmin(S[np.ix_(members, members)].sum(axis=1))]
        new = np.argmin(S[:, medoids], axis=1)
        new[medoids] = np.arange(K)  # a medoid stays in its own cluster, so no cluster empties
        if np.array_equal(new, labels):
            break
        labels = new
    return labels, float(S[np.arange(len(S)), medoids[labels]].sum())


def default_distance(scales: Sequence[float]) -> DistanceFn:
    """The yaw x scale pose search of :mod:`posesearch` as a distance function."""
    return lambda X, W, P, V: pose_distances(X, W, P, V, scales=scales, chunk_size=256).D


def pairwise_pose_distances(X: np.ndarray, W: np.ndarray, distance: DistanceFn | None = None, *,
                            scales: Sequence[float] = (1.0,), progress=None, what: str = "seeding") -> np.ndarray:
    """(n, n) symmetrised pose-minimised distances among the objects X (n, C, R, A, H), W (n, R, A, H), in
    blocks of 256 rows with a progress bar (:mod:`protomine.progress`).  ``distance`` None: the yaw x scale
    search over ``scales``, with the objects' prototype factors computed once (``posesearch.PoseBank``)."""
    X, W = (np.asarray(a, dtype=np.float32) for a in (X, W))
    n, rows = len(X), []
    bank = PoseBank(X, W, scales) if distance is None else None
    with bar(progress, f"{what}: pose distances of {n} sampled objects", total=n, unit="objects") as b:
        for i0 in range(0, n, 256):
            x, w = X[i0:i0 + 256], W[i0:i0 + 256]
            rows.append(bank.match(x, w).D if bank is not None else np.asarray(distance(x, w, X, W)))
            b.advance(len(x))
    return symmetric_distances(np.concatenate(rows))


def kmedoids_plusplus(S: np.ndarray, K: int, rng: np.random.Generator) -> np.ndarray:
    """K medoid indices by D^2 sampling: the first uniformly, each next with probability proportional to the
    squared distance to its nearest medoid so far (k-means++, Arthur & Vassilvitskii 2007)."""
    n = len(S)
    medoids = [int(rng.integers(n))]
    d2 = S[medoids[0]] ** 2
    for _ in range(1, K):
        tot = d2.sum()
        nxt = int(rng.choice(n, p=d2 / tot)) if tot > 0 else int(rng.choice(np.setdiff1d(np.arange(n), medoids)))
        medoids.append(nxt)
        d2 = np.minimum(d2, S[nxt] ** 2)
    return np.array(medoids)


class PoseSeeder:
    """Seeds for the engine's restarts from pose-searched distances (module docstring).

    X (n, C, R, A, H), W (n, R, A, H): the engine's subsample; ``size`` caps the objects in the matrix;
    ``distance`` (default: :func:`default_distance` over ``scales``) is the pose-minimised distance.
    """

    def __init__(self, X: np.ndarray, W: np.ndarray, *, scales: Sequence[float], rng: np.random.Generator,
                 size: int = SEED_SIZE, distance: DistanceFn | None = None):
        self.X, self.W = X, W
        self.distance = distance or default_distance(scales)
        n = len(X)
        self.index = np.sort(rng.choice(n, size=min(n, size), replace=False))
        self.S = pairwise_pose_distances(X[self.index], W[self.index], distance, scales=scales)

    def medoid_labels(self, K: int, restart: int, rng: np.random.Generator) -> np.ndarray:
        """Labels (m,) of the matrix objects: average linkage on restart 0, k-means++ medoids otherwise;
        refined by alternating k-medoids."""
        S = self.S
        if restart == 0:
            start = AgglomerativeClustering(n_clusters=K, metric="precomputed", linkage="average").fit_predict(S)
        else:
            med = kmedoids_plusplus(S, K, rng)
            start = np.argmin(S[:, med], axis=1)
            start[med] = np.arange(K)
        return kmedoids(S, start)[0]

    def partition(self, K: int, restart: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """(labels (n,), refs (K,)): every subsample object's cluster and each cluster's medoid (row of X)."""
        if K > len(self.index):
            raise ValueError(f"K={K} exceeds the {len(self.index)} objects of the seeding matrix")
        lab_m = self.medoid_labels(K, restart, rng)
        S = self.S
        refs_m = np.array([np.flatnonzero(lab_m == k)[np.argmin(S[np.ix_(lab_m == k, lab_m == k)].sum(axis=1))]
                           for k in range(K)])
        refs = self.index[refs_m]
        labels = np.empty(len(self.X), np.int64)
        labels[self.index] = lab_m
        rest = np.setdiff1d(np.arange(len(self.X)), self.index)
        if rest.size:
            D = np.asarray(self.distance(self.X[rest], self.W[rest], self.X[refs], self.W[refs]), np.float64)
            labels[rest] = np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1)
        return labels, refs
