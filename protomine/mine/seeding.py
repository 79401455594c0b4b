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
2. ``PoseSeeder.partition(K, restart, rng)``: K medoids on that matrix without its outlying objects
   (``outlying``: poorly observed or broken-up objects, far from every other one, would otherwise each take a
   medoid of their own at average linkage, and K true groups get K minus the outliers medoids): restart 0 from average-linkage
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
- ``best_kmedoids(S, K, rng, starts=KMEDOIDS_STARTS) -> (labels, cost)``
- ``medoid_cost(S, labels) -> float``: the k-medoids cost of any partition (each cluster's best medoid)
- ``medoid_distances(S, labels) -> (n,)``, ``paired_worse_t(S, labels, reference) -> t``: per object, and the paired t
  of one partition against another (``[mine] seed_hold_t``)
- ``neighbour_vetoed(S, labels, reference, k) -> labels``: the moves away from ``reference`` that the moved object's k
  nearest staying objects contradict, undone (``[mine] seed_veto_k``)
- ``outlying(S) -> (n,) bool``: objects far from every other one (Tukey's fence on nearest-neighbour distances)
- ``FaceDistance(aspect, scales, grid)``: a ``distance`` over yaw x scale x each prototype's stable resting
  directions (``faces.stable_ups``, exact directions instead of a tilt grid; ``[mine] face_pairs``)
- ``PoseSeeder(X, W, *, scales, rng, size=SEED_SIZE, distance=None)``; ``.partition(K, restart, rng) ->
  (labels (n,), refs (K,))``; ``.S`` (m, m), ``.index`` (m,) rows of X in the matrix.
"""
from __future__ import annotations

import hashlib
from typing import Callable, Sequence

import numpy as np
import torch
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


class FaceDistance:
    """``distance(X, W, P, V) -> (n, k)``: the pose-minimised distance over yaw x scale x the stable resting
    directions of each prototype (``faces.stable_ups``), the prototypes being objects with grid aspects
    ``aspect`` (k,) (z_max / rho_max); each resting copy is re-normalised by its own footprint and height as
    in the tilt search (``tilts.copy_geometries``).  The copies are built once per P (the matrix objects of
    ``pairwise_pose_distances``, passed unchanged for every block of rows)."""

    BLOCK = 512  # copies per PoseBank (bounds the spectra's memory)

    def __init__(self, aspect: np.ndarray, scales: Sequence[float], grid):
        self.aspect = np.asarray(aspect, np.float64)
        self.scales, self.grid = tuple(scales), grid
        self._P = None

    def _build(self, P: np.ndarray, V: np.ndarray) -> None:
        from .faces import stable_ups
        from .searchpool import pooled
        from .tilts import _resample_copies, copy_geometries, solid_points
        P, V = np.asarray(P, np.float32), np.asarray(V, np.float32)
        if len(self.aspect) != len(P):
            raise ValueError(f"FaceDistance: {len(self.aspect)} aspects for {len(P)} prototypes")

        def copies(k: int) -> tuple[np.ndarray, np.ndarray]:
            a = float(self.aspect[k])
            ups = stable_ups(P[k, 0], V[k], a)
            gs = copy_geometries(P.shape[2:], a, ups, self.grid, solid_points(P[k, 0], V[k], a, self.grid))
            pc, vc = _resample_copies(np.broadcast_to(P[k], (len(gs),) + P.shape[1:]),
                                      np.broadcast_to(V[k], (len(gs),) + V.shape[1:]), gs, np.full(len(gs), a))
            pc[0], vc[0] = P[k], V[k]  # +z: the prototype as it is, not resampled
            return pc, vc

        # each object's copies on its own: on the spectra pool's threads (searchpool.pooled), in object order
        Pc, Vc = zip(*pooled(copies, range(len(P))))
        owner = np.concatenate([np.full(len(pc), k, np.int64) for k, pc in enumerate(Pc)])
        Pc, Vc = np.concatenate(Pc), np.concatenate(Vc)
        # each bank's scales and blocks of spectra on the pool's threads too (PoseBank's run: the same arithmetic)
        self._banks = [(owner[b:b + self.BLOCK], PoseBank(Pc[b:b + self.BLOCK], Vc[b:b + self.BLOCK], self.scales,
                                                          run=pooled))
                       for b in range(0, len(owner), self.BLOCK)]
        self._k = len(P)
        self._P = P

    def __call__(self, X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray) -> np.ndarray:
        if self._P is None or P is not self._P and not np.array_equal(P, self._P):
            self._build(P, V)
        D = np.full((len(X), self._k), np.inf, np.float32)
        for owner, bank in self._banks:
            d = bank.match(X, W).D
            d = np.where(np.isfinite(d), d, np.inf)
            np.minimum.at(D.T, owner, d.T)
        return D


_LAST_MATRIX: dict = {}  # pairwise_pose_distances: the last matrix of the yaw x scale or stable-face search


def _matrix_key(X: np.ndarray, W: np.ndarray, distance, scales: Sequence[float]) -> tuple | None:
    """What a :func:`pairwise_pose_distances` matrix is a function of: the objects' contents, the search and its
    settings, and torch's threads (the last float digits may depend on them; None: a distance function of unknown
    settings, never reused)."""
    if distance is None:
        kind = ("yaw-scale", tuple(float(s) for s in scales))
    elif type(distance) is FaceDistance:
        g = distance.grid
        kind = ("faces", distance.aspect.tobytes(), tuple(float(s) for s in distance.scales),
                float(g.radial_margin), float(g.height_margin))
    else:
        return None
    h = hashlib.blake2b(digest_size=20)
    for a in (X, W):
        h.update(np.ascontiguousarray(a).data)
    return X.shape, W.shape, h.hexdigest(), kind, torch.get_num_threads()


def pairwise_pose_distances(X: np.ndarray, W: np.ndarray, distance: DistanceFn | None = None, *,
                            scales: Sequence[float] = (1.0,), progress=None, what: str = "seeding") -> np.ndarray:
    """(n, n) symmetrised pose-minimised distances among the objects X (n, C, R, A, H), W (n, R, A, H), in
    blocks of 256 rows with a progress bar (:mod:`protomine.progress`).  ``distance`` None: the yaw x scale
    search over ``scales``, with the objects' prototype factors computed once (``posesearch.PoseBank``).

    The last matrix of the yaw x scale or the stable-face search (:class:`FaceDistance`) is kept with what it is
    a function of (the objects' contents, the search's settings) and handed out again for the same: automatic K
    scans all objects of a store of up to ``choosek`` sample_size objects, and the fit's seeder then asks for the
    same matrix (seed-0 demo: the same 78 x 78 stable-face matrix twice, ~2.5 s of CPU each)."""
    X, W = (np.asarray(a, dtype=np.float32) for a in (X, W))
    key = _matrix_key(X, W, distance, scales)
    if key is not None and _LAST_MATRIX.get("key") == key:
        return _LAST_MATRIX["S"].copy()
    S = _pairwise(X, W, distance, scales, progress, what)
    _LAST_MATRIX.clear()
    if key is not None:
        _LAST_MATRIX.update(key=key, S=S.copy())
    return S


def _pairwise(X: np.ndarray, W: np.ndarray, distance, scales: Sequence[float], progress, what: str) -> np.ndarray:
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


KMEDOIDS_STARTS = 24  # D^2-sampled starts besides average linkage in best_kmedoids


def best_kmedoids(S: np.ndarray, K: int, rng: np.random.Generator, starts: int = KMEDOIDS_STARTS
                  ) -> tuple[np.ndarray, float]:
    """The lowest-cost alternating k-medoids partition (labels (n,), cost) of the (n, n) matrix S among runs
    from average-linkage clustering and from ``starts`` k-means++ medoid samplings (module docstring)."""
    start = AgglomerativeClustering(n_clusters=K, metric="precomputed", linkage="average").fit_predict(S)
    best = kmedoids(S, start)
    for _ in range(starts):
        med = kmedoids_plusplus(S, K, rng)
        start = np.argmin(S[:, med], axis=1)
        start[med] = np.arange(K)
        run = kmedoids(S, start)
        if run[1] < best[1] - 1e-12:
            best = run
    return best


def medoid_cost(S: np.ndarray, labels: np.ndarray) -> float:
    """The k-medoids cost of a partition labels (n,) of the (n, n) distance matrix S: per cluster, the least summed
    distance of one member (its medoid) to the others, summed over the clusters (Kaufman & Rousseeuw 1990, the
    objective :func:`kmedoids` lowers; any labels, empty clusters cost nothing)."""
    labels = np.asarray(labels)
    return float(sum(S[np.ix_(m, m)].sum(axis=1).min() for k in np.unique(labels)
                     for m in (np.flatnonzero(labels == k),)))


def medoid_distances(S: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """(n,) each object's distance in the (n, n) matrix S to the medoid of its cluster under labels (n,) (the
    member of least summed distance to the others, as :func:`medoid_cost`; their sum is that cost)."""
    labels = np.asarray(labels)
    out = np.empty(len(S), np.float64)
    for k in np.unique(labels):
        m = np.flatnonzero(labels == k)
        out[m] = S[m, m[np.argmin(S[np.ix_(m, m)].sum(axis=1))]]
    return out


def paired_worse_t(S: np.ndarray, labels: np.ndarray, reference: np.ndarray) -> float:
    """The paired t statistic over the objects of (distance to its medoid under ``labels`` minus that under
    ``reference``) on the (n, n) matrix S (:func:`medoid_distances`): mean difference / its standard error
    (Student's paired t; positive when ``labels`` is the costlier partition).  0 when no object's distance
    differs; +inf when every difference is equal and positive."""
    d = medoid_distances(S, labels) - medoid_distances(S, reference)
    if len(d) < 2 or not np.any(d):
        return 0.0
    se = float(np.std(d, ddof=1)) / np.sqrt(len(d))
    m = float(d.mean())
    if se == 0.0:
        return float(np.sign(m) * np.inf)
    return m / se


def neighbour_vetoed(S: np.ndarray, labels: np.ndarray, reference: np.ndarray, k: int) -> np.ndarray:
    """Labels (n,): ``labels`` with every object that left its ``reference`` cluster sent back to it when its
    neighbours on the (n, n) distance matrix S say so: the mean of its k smallest distances to the objects both
    partitions keep in its reference cluster is below the mean of its k smallest distances to the objects both keep
    in the cluster it went to (fewer than k such objects: all of them; none: an infinite mean, so a move out of a
    cluster none stayed in stands).  Only the objects
    that stayed are the evidence, so objects that moved together do not vouch for one another.  k < 1 returns
    ``labels`` unchanged.

    Why (``[mine] seed_veto_k``): the pose-aware fit assigns by the distance to a cluster's mean prototype, and a
    class's mean of members on several faces, turned onto a face few of them rest on, can fit such a member worse
    than another class's mean at a tilt on which that class cannot rest; the seeding's matrix compares the objects
    themselves, on their own stable resting faces.  All-stereo demo seed 0: the seed partition's purity 1.000, the
    fit's 0.936 (three tile boxes on their side to the jugs, an L bracket to the tripod stands, a hand plane to the
    mallets), each of the five with its five nearest objects on S in its own class."""
    out = np.array(labels, np.int64, copy=True)
    if k < 1:
        return out
    reference = np.asarray(reference, np.int64)
    stay = out == reference
    for i in np.flatnonzero(~stay):
        near = []
        for c in (reference[i], out[i]):
            d = np.sort(S[i, stay & (reference == c)])
            near.append(float(d[:k].mean()) if d.size else np.inf)
        if near[0] < near[1]:
            out[i] = reference[i]
    return out


OUTLIER_FENCE = 1.5  # Tukey's inner fence: Q3 + 1.5 IQR


def outlying(S: np.ndarray, fence: float = OUTLIER_FENCE) -> np.ndarray:
    """(n,) True for objects whose nearest-neighbour distance in the (n, n) distance matrix S lies above
    Tukey's upper fence Q3 + fence x IQR of all objects' nearest-neighbour distances (Tukey 1977,
    "Exploratory Data Analysis", from memory).  Such an object is farther from every other object than
    the members of any group are from their nearest fellow: it is not a good medoid, and a clustering
    criterion that sees it spends a cluster on it.  No object is outlying among fewer than 4."""
    n = len(S)
    if n < 4:
        return np.zeros(n, bool)
    nn = np.min(S + np.diag(np.full(n, np.inf)), axis=1)
    q1, q3 = np.quantile(nn, [0.25, 0.75])
    return nn > q3 + fence * (q3 - q1)


class PoseSeeder:
    """Seeds for the engine's restarts from pose-searched distances (module docstring).

    X (n, C, R, A, H), W (n, R, A, H): the engine's subsample; ``size`` caps the objects in the matrix;
    ``distance`` (default: :func:`default_distance` over ``scales``) is the pose-minimised distance;
    ``face_grid`` (a ``tilts.TiltGrid``, for its margins) with the objects' ``aspect`` (n,) and no ``distance``:
    :class:`FaceDistance`.
    """

    def __init__(self, X: np.ndarray, W: np.ndarray, *, scales: Sequence[float], rng: np.random.Generator,
                 size: int = SEED_SIZE, distance: DistanceFn | None = None, face_grid=None,
                 aspect: np.ndarray | None = None):
        self.X, self.W = X, W
        n = len(X)
        self.index = np.sort(rng.choice(n, size=min(n, size), replace=False))
        if face_grid is not None and distance is None:  # stable resting faces of the matrix objects (FaceDistance)
            distance = FaceDistance(np.asarray(aspect)[self.index], scales, face_grid)
        self.distance = distance or default_distance(scales)
        self.S = pairwise_pose_distances(X[self.index], W[self.index], distance, scales=scales)

    def medoid_labels(self, K: int, restart: int, rng: np.random.Generator) -> np.ndarray:
        """Labels (m,) of the matrix objects: ``best_kmedoids`` on restart 0, one k-means++ start refined
        by alternating k-medoids otherwise, on the objects that are not ``outlying`` (all when fewer than
        K + 1 remain); the outlying ones join their nearest medoid."""
        core = ~outlying(self.S)
        if core.sum() < K + 1:
            core[:] = True
        S = self.S[np.ix_(core, core)]
        if restart == 0:
            lab_core = best_kmedoids(S, K, rng)[0]
        else:
            med = kmedoids_plusplus(S, K, rng)
            start = np.argmin(S[:, med], axis=1)
            start[med] = np.arange(K)
            lab_core = kmedoids(S, start)[0]
        if core.all():
            return lab_core
        medoids = np.flatnonzero(core)[[np.flatnonzero(lab_core == k)[np.argmin(S[np.ix_(lab_core == k, lab_core == k)].sum(axis=1))]
                                        for k in range(K)]]
        labels = np.argmin(self.S[:, medoids], axis=1)
        labels[core] = lab_core
        return labels

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
