"""Choosing the number of prototypes K, and merging prototypes that are one shape in two poses.

Conventions: as in :mod:`protomine.mine.posesearch` and :mod:`protomine.mine.engine`.

Criterion (``choose_k``)
------------------------
On a random subsample of at most ``sample_size`` objects:

1. the pose-minimised distance matrix between the subsampled objects, ``D[i, j]`` = best-pose distance
   of object i to object j taken as a prototype (``pose_distances``), symmetrised as
   ``(D + D.T) / 2`` with a zero diagonal (pairs with no common observed cell get the largest finite
   distance).  It is computed once and serves every candidate K;
2. objects beyond Tukey's fence on nearest-neighbour distances (``seeding.outlying``: poorly observed or
   broken-up objects, far from every other one) leave the matrix (unless fewer than min_k + 2 would
   remain).  Each would be a singleton cluster of silhouette 0 that lifts the others' silhouettes: on
   four peg-post classes with two such objects, the scan chose K = 2 (43 objects against one outlier,
   silhouette 0.446) over the four classes (0.403 without the outliers);
3. for every K in ``min_k..max_k`` a k-medoids partition of that matrix, the lowest-cost of alternating
   k-medoids runs (Park & Jun 2009) from average-linkage clustering and from k-means++ medoid samplings
   (``seeding.best_kmedoids``; average linkage alone chained mirror-image classes together and found the
   four peg-post classes at NMI 0.64 where the lowest-cost run found them exactly), scored by the mean
   silhouette (Rousseeuw 1987) of its labels on the matrix (``sklearn.metrics.silhouette_samples`` with
   ``metric="precomputed"``).  A k-medoids fit needs only the matrix, so the scan costs milliseconds per
   K instead of a pose-aware fit per K;
4. the groups of the mutual 4-nearest-neighbour graph on the same matrix (``knn_components(mutual=True)``,
   von Luxburg 2007): its connected components of at least 5 objects.  The silhouette alone favours the
   coarser level when classes come in close pairs (a shape and its mirror image: K = 2 and K = 4 scored
   0.378 and 0.369 on four peg posts; a spectral eigengap with self-tuning affinities also chose 2 on a
   smaller scene), while the nearest-neighbour graph keeps the close pairs apart.  In the symmetric graph
   one object whose nearest neighbours lie in two classes joins them (2 and 3 groups counted on scenes
   of four peg-post classes); the mutual graph cuts such stragglers off;
5. K = the larger of the silhouette's choice and the group count (clipped to ``max_k``); on the stable-face
   matrix (``face_grid``, ``[mine] face_pairs``) the group count alone, whose groups then join each class's
   resting faces while the silhouette keeps rising with the faces' sub-groups (``climb``, ``[mine] k_climb``:
   the group count climbed by the silhouette, ``silhouette_climb``; ``group_min``, ``[mine] k_group_min``:
   the least size of a counted group, ``group_count``; ``count_outlying``, ``[mine] k_count_outlying``: the
   groups counted over every sampled object, the outlying ones of step 2 too, ``face_group_count``;
   ``raise_k``, ``[mine] k_raise``: the group count raised
   to the smallest K not significantly worse than the best K by a paired test of the objects' silhouettes,
   ``silhouette_raise``, for classes whose resting-face fragments are too small to form groups).  The silhouette's
   choice is its argmax (the smallest K on ties) or, with ``one_se``, the smallest K whose mean silhouette
   is within one standard error (of the per-object silhouettes at the argmax) of the best (the one-SE
   rule of Breiman et al. 1984): on small stores the silhouette is flat over a range of K and its argmax
   splits classes whose members vary continuously.  A K too large is meant to be undone by merging
   (below); a K too small is not undone by anything.  K = 1 is never proposed.  ``fit_auto`` then runs
   one full :class:`PoseKMeans` fit at that K.

Merging (``merge_close_prototypes`` / ``fit_auto``)
---------------------------------------------------
Two prototypes i, j are *the same shape* when their symmetrised pose-minimised distance is below
``merge_threshold`` x the mean of their members' median distances (``member_stats_['median']``): the
prototypes then differ by less than their members scatter around them.  The closest such pair is merged
by dropping the prototype with fewer members and refitting from the remaining prototypes (``init=``),
until no pair qualifies.

Public API
----------
- ``choose_k(source, *, max_k, scales=(1.0,), random_state=None, min_k=2, sample_size=600,
  chunk_size=2048, distance=None, one_se=False, face_grid=None, aspect=None, group_min=None, climb=False,
  raise_k=False) -> (k, table)``; table: list of dicts {k, silhouette,
  silhouette_se, knn_components, medoid_cost, outlying}; ``distance(X, W, P, V) -> (n, k)`` is the pose-minimised distance (default: the yaw x
  scale search of :mod:`posesearch`).
- ``knn_components(S, neighbours=3, *, mutual=False, min_size=None) -> int``; ``group_count(S, group_min=None) -> int``;
  ``face_group_count(S, keep, group_min=None, count_outlying=False) -> int``;
  ``silhouette_climb(table, start) -> k``; ``silhouette_raise(silhouettes, start, z=RAISE_Z) -> k``
- ``merge_close_prototypes(model, source, *, merge_threshold=0.5) -> (model, merges)``
- ``fit_auto(source, *, max_k, scales=(1.0,), random_state=None, merge_threshold=0.5, one_se=False, group_min=None,
  climb=False, raise_k=False, **engine_kwargs) -> (model, info)``; info: {"k_chosen", "table", "merges", "k_final"}.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components
from sklearn.metrics import silhouette_samples

from ..progress import bar
from .engine import PoseKMeans, Source, _gather, _source_aspect
from .posesearch import _check_scales
from .seeding import DistanceFn, FaceDistance, best_kmedoids, outlying, pairwise_pose_distances, symmetric_distances
from .tilts import tilt_pose_distances

KNN_NEIGHBOURS = 3             # neighbours per object in the symmetric kNN graph (knn_components' default)
MUTUAL_NEIGHBOURS = 4          # neighbours per object in the mutual kNN graph whose components count groups in choose_k


def choose_k(source: Source, *, max_k: int, scales: Sequence[float] = (1.0,), random_state: int | None = None,
             min_k: int = 2, sample_size: int = 600, chunk_size: int = 2048, progress=None,
             distance: DistanceFn | None = None, one_se: bool = False, face_grid=None,
             aspect: np.ndarray | None = None, group_min: int | None = None,
             climb: bool = False, raise_k: bool = False, count_outlying: bool = False) -> tuple[int, list[dict]]:
    """Number of prototypes by mean silhouette of k-medoids partitions of pose-minimised distances
    (module docstring).  ``progress`` (:mod:`protomine.progress`) gets a bar over the distance matrix's rows.
    ``face_grid`` (a ``tilts.TiltGrid``) with the objects' ``aspect`` (N,) and no ``distance``: the matrix searches
    each object's stable resting faces besides yaw and scale (``seeding.FaceDistance``).  ``group_min``: the
    least objects of a counted mutual-kNN group on the stable-face matrix (None: ``MUTUAL_NEIGHBOURS`` + 1; see
    :func:`group_count`).
    ``climb``: on the stable-face matrix, K climbs from the group count by the silhouette
    (:func:`silhouette_climb`) instead of being the group count; ``raise_k`` (without ``climb``): K rises from the
    group count to the smallest K not significantly worse than the best (:func:`silhouette_raise`)."""
    scales = _check_scales(scales)
    N = len(source)
    if min_k < 2 or max_k < min_k:
        raise ValueError(f"need 2 <= min_k <= max_k, got min_k={min_k}, max_k={max_k}")
    if N < min_k + 1:
        raise ValueError(f"n_objects={N} must be > min_k={min_k} to compare clusterings")
    rng = np.random.default_rng(random_state)
    return _choose_k(source, max_k=max_k, scales=scales, rng=rng, min_k=min_k, sample_size=sample_size,
                     chunk_size=chunk_size, progress=progress, distance=distance, one_se=one_se, face_grid=face_grid,
                     aspect=aspect, group_min=group_min, climb=climb, raise_k=raise_k, count_outlying=count_outlying)


def knn_components(S: np.ndarray, neighbours: int = KNN_NEIGHBOURS, *, mutual: bool = False,
                   min_size: int | None = None) -> int:
    """Connected components of the k-nearest-neighbour graph of a distance matrix S (n, n) (von Luxburg
    2007, "A tutorial on spectral clustering", sec. 2.2).  Symmetric graph (``mutual`` False): i and j are
    linked when either is among the other's ``neighbours`` nearest objects; every component holds at least
    neighbours + 1 objects, so a lone outlier joins its nearest group instead of counting as one.  Mutual
    graph: linked when each is among the other's nearest; an object whose nearest objects lie in two groups
    then no longer bridges them, and only components of at least neighbours + 1 objects are counted (the
    smaller ones are the stragglers the mutual graph cuts off); ``min_size`` (mutual graph only) counts
    components of at least that many objects instead."""
    n = len(S)
    k = min(neighbours, n - 1)
    nb = np.argsort(S + np.diag(np.full(n, np.inf)), axis=1, kind="stable")[:, :k]
    rows = np.repeat(np.arange(n), k)
    graph = csr_matrix((np.ones(n * k), (rows, nb.ravel())), shape=(n, n))
    if not mutual:
        return int(connected_components(graph, directed=False)[0])
    graph = graph.multiply(graph.T)
    _, comp = connected_components(graph, directed=False)
    return int(max(1, np.sum(np.bincount(comp) >= (k + 1 if min_size is None else min_size))))


def group_count(S: np.ndarray, group_min: int | None = None) -> int:
    """The groups of the mutual ``MUTUAL_NEIGHBOURS``-nearest-neighbour graph of the (n, n) matrix S that
    ``choose_k`` counts: its connected components of at least ``group_min`` objects (None:
    ``MUTUAL_NEIGHBOURS`` + 1, every member of such a group can have all its neighbours inside it).

    ``[mine] k_group_min`` = ``MUTUAL_NEIGHBOURS`` counts groups of 4 too.  On small stores (5-6 objects per
    class) an object whose 4 nearest objects are not all of its own class (or not mutual) leaves its class's
    group with 4 members, and that class went uncounted: on three stores of the tools family with touching
    objects, half tumbled (7 captures, 43-46 objects, 8 classes), the groups of at least 5 were 6, 6, 6 and
    the chosen K 6 (classes merged, mined purity 0.72 / 0.65 / 0.73); groups of at least 4: 8, 6, 6.  On the
    default demo's stores (78 objects, tumbled and upright) and on mirror-pair scenes the count is the same
    either way."""
    return knn_components(S, MUTUAL_NEIGHBOURS, mutual=True, min_size=group_min)


def face_group_count(S: np.ndarray, keep: np.ndarray, group_min: int | None = None, count_outlying: bool = False) -> int:
    """The K scan's group count on the stable-face matrix S (n, n) of the sampled objects: :func:`group_count` over the
    objects ``keep`` (n,) (those not outlying, ``seeding.outlying``), or with ``count_outlying`` (``[mine]
    k_count_outlying``) over all of them.

    Why count the outlying ones: the fence is for the silhouettes (an outlier would be a singleton cluster of
    silhouette 0 that lifts the others'); a group needs mutual nearest neighbours, which a lone far object does not
    have, but a class whose objects fit one another loosely loses most of its objects to the fence and keeps too few
    for a group: the upright demo seed 0's jugs, 6 of 10 outlying, 4 left (README "Choosing K on other classes")."""
    return group_count(S if count_outlying else S[np.ix_(keep, keep)], group_min)


def silhouette_climb(table: list[dict], start: int) -> int:
    """K from ``start`` (the group count) upwards: one more prototype while the next K's mean silhouette
    exceeds the current one by more than the current one's standard error, and the current one lies more
    than one standard error below the best of the K >= start (the one-SE rule of Breiman et al. 1984, as
    ``one_se``).  ``table``: ``choose_k``'s rows.

    Why: two classes whose objects are close (a box and a jug resting on their sides) can share one
    mutual-kNN group, and the group count alone then merges them; the silhouette alone keeps rising with the
    resting faces' sub-groups on the stable-face matrix.  The climb adds prototypes only while the silhouette
    rises by more than its noise.  Off by default (``[mine] k_climb``).  Measured offline (k-medoids on the
    stable-face matrices) on three touching, half-tumbled tools-family stores (43-46 objects, 8 classes;
    groups 8, 6, 6): K 8, 7, 7 (k-medoids purity 1.00, 0.88, 0.89; at the group count 1.00, 0.76, 0.77); on
    the default demo's stores and three mirror-pair stores the K of the group count.  Mined (``mine_store``,
    its own subsample and K scan): the touching stores' K 8, 6, 7 (the second did not climb); the default
    demo seed 0 climbed to K 9 (silhouette 0.498 -> 0.516, SE 0.016), purity 0.962 either way but NMI
    0.949 -> 0.933, so it stays off.  Without the rise's margin (any rise) two invented box classes on crisp
    resting faces split into 4 (``tests/test_stable_faces.py``)."""
    by_k = {int(r["k"]): r for r in table}
    if start not in by_k:
        return start
    top = max((r for r in table if r["k"] >= start), key=lambda r: (r["silhouette"], -r["k"]))
    bar_ = top["silhouette"] - top["silhouette_se"]
    k = start
    while (k + 1 in by_k and by_k[k + 1]["silhouette"] - by_k[k]["silhouette"] > by_k[k]["silhouette_se"]
           and by_k[k]["silhouette"] < bar_):
        k += 1
    return k


RAISE_Z = 1.96  # two-sided 5% level of the paired test in silhouette_raise


def silhouette_raise(silhouettes: dict[int, np.ndarray], start: int, z: float = RAISE_Z) -> int:
    """K from ``start`` (the group count) upwards: the smallest K >= start whose objects' silhouettes are not
    significantly below those of the best K >= start (highest mean silhouette, the smallest K on ties).
    ``silhouettes``: per candidate K, the (n,) per-object silhouettes (Rousseeuw 1987) of its partition of the
    same n objects.  Significance: the paired t statistic of the per-object differences, mean(s_best - s_K) /
    (sd / sqrt(n)) (sd with n - 1 degrees of freedom; as ``scipy.stats.ttest_rel``), above ``z`` (1.96: the
    two-sided 5% level).  The one-SE rule of Breiman et al. (1984) in the form of a paired comparison: both
    partitions score the same objects, so the noise of the difference, not of each mean, decides.

    Why: the mutual-kNN group count needs every class to hold a group of at least ``group_min`` objects whose
    nearest objects are mutual.  On small stores (5-6 objects per class, half tumbled) a class spreads over 2-3
    resting faces in fragments of 2-3 objects, fragments that no group count sees, and one mutual edge
    bridges two classes: on three touching tools-family stores (43-46 objects, 8 classes) the count was 6 on
    four of six (with and without masks), and the best K's silhouette lay 2.2-3.7 paired SE above the count's
    on three of those four (offline, k-medoids on the stable-face matrices; mined K 6 -> 8, 8, 7).  On the
    default demo stores (78-79 objects, 9-10 per class) the silhouette rises past the classes too (a class's
    minority face splits off: seed 0, best K 10-11, +0.024 over K 8), but by 1.6-1.8 paired SE, so K stays at
    the count (8) there, where the step rule (``silhouette_climb``) took K 9 (NMI 0.949 -> 0.933).  Off by
    default (``[mine] k_raise``): on two invented box classes resting on crisp faces (``tests/test_stable_faces.py``,
    9 objects each on 3 faces) the faces' sub-groups are significantly better (K 4 over K 2: paired t 2.04), and
    K rose to 3."""
    if start not in silhouettes:
        return start
    cand = sorted(k for k in silhouettes if k >= start)
    best = max(cand, key=lambda k: (float(np.mean(silhouettes[k])), -k))
    for k in cand:
        if k == best:
            return k
        d = np.asarray(silhouettes[best], np.float64) - np.asarray(silhouettes[k], np.float64)
        sd = d.std(ddof=1) if d.size > 1 else 0.0
        if sd == 0.0 and d.mean() <= 0.0 or sd > 0.0 and d.mean() / (sd / np.sqrt(d.size)) <= z:
            return k
    return best


def _choose_k(source: Source, *, max_k, scales, rng, min_k, sample_size, chunk_size, progress=None, distance=None,
              one_se=False, face_grid=None, aspect=None, group_min=None, climb=False, raise_k=False,
              count_outlying=False):
    N = len(source)
    idx = np.sort(rng.choice(N, size=min(N, sample_size), replace=False))
    distance_is_faces = face_grid is not None and distance is None
    if distance_is_faces:
        distance = FaceDistance(np.asarray(aspect)[idx], scales, face_grid)
    Xs, Ws = _gather(source, idx, chunk_size)
    S = pairwise_pose_distances(Xs, Ws, distance, scales=scales, progress=progress, what="choose K")
    out = outlying(S)
    keep = ~out if len(S) - out.sum() >= min_k + 2 else np.ones(len(S), bool)
    kept = S[np.ix_(keep, keep)]
    # group_min and count_outlying: measured on the stable-face matrix only
    components = face_group_count(S, keep, group_min, count_outlying) if distance_is_faces else group_count(kept)
    S = kept
    table, silhouettes = [], {}
    for k in range(min_k, min(max_k, len(S) - 1) + 1):
        labels, cost = best_kmedoids(S, k, rng)
        n_lab = np.unique(labels).size
        s = silhouette_samples(S, labels, metric="precomputed") if 1 < n_lab < len(S) else np.full(len(S), -1.0)
        silhouettes[k] = s
        table.append({"k": k, "silhouette": float(s.mean()), "silhouette_se": float(s.std() / np.sqrt(len(s))),
                      "knn_components": components, "medoid_cost": cost, "outlying": int(len(idx) - len(S))})
    top = max(table, key=lambda r: (r["silhouette"], -r["k"]))
    by_silhouette = (min(r["k"] for r in table if r["silhouette"] >= top["silhouette"] - top["silhouette_se"])
                     if one_se else top["k"])
    if distance_is_faces and components >= min_k:
        # stable-face matrix: the mutual kNN groups join a class's faces, while the silhouette still rises with
        # the faces' sub-groups (tumbled demo seed 0: silhouette K 15, groups 8 = the classes)
        start = int(min(components, table[-1]["k"]))
        if climb:
            return silhouette_climb(table, start), table
        return (silhouette_raise(silhouettes, start) if raise_k else start), table
    return int(max(by_silhouette, min(components, table[-1]["k"]))), table


def prototype_distances(model: PoseKMeans) -> np.ndarray:
    """(K, K) symmetric pose-minimised distances between a fitted model's prototypes."""
    P, V = model.prototypes_, model.prototype_weights_
    return symmetric_distances(tilt_pose_distances(P, V, P, V, aspect=model.aspect_, scales=model.scales_,
                                                   grid=model.tilts).D)


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
                           sample_size=model.sample_size, symmetry_factor=model.symmetry_factor, symmetry_tol=model.symmetry_tol,
                           tilts=model.tilts, face_pairs=model.face_pairs, face_assign=model.face_assign,
                           face_updates=model.face_updates, face_hold_unmoved=model.face_hold_unmoved,
                           symmetry_break_effect=model.symmetry_break_effect, pose_sync=model.pose_sync,
                           pose_polish=model.pose_polish, polish_own_out=model.polish_own_out,
                           init=(model.prototypes_[rest], model.prototype_weights_[rest],
                                 None if model.aspect_ is None else model.aspect_[rest]),
                           progress=model.progress).fit(source)
    return model, merges


def fit_auto(source: Source, *, max_k: int, scales: Sequence[float] = (1.0,), random_state: int | None = None,
             merge_threshold: float = 0.5, sample_size: int = 600, one_se: bool = False,
             group_min: int | None = None, climb: bool = False, raise_k: bool = False, count_outlying: bool = False,
             **engine_kwargs) -> tuple[PoseKMeans, dict]:
    """Choose K (``one_se``: see ``choose_k``), fit on all objects, merge same-shape prototypes.  Returns (model, info)."""
    rng = np.random.default_rng(random_state)
    grid = engine_kwargs.get("tilts")
    faces = engine_kwargs.get("face_pairs") and grid is not None and not grid.is_identity
    k, table = choose_k(source, max_k=max_k, scales=scales, random_state=int(rng.integers(2**31 - 1)),
                        sample_size=sample_size, progress=engine_kwargs.get("progress"), one_se=one_se,
                        face_grid=grid if faces else None, aspect=_source_aspect(source) if faces else None,
                        group_min=group_min, climb=climb, raise_k=raise_k, count_outlying=count_outlying)
    model = PoseKMeans(n_clusters=k, scales=scales, random_state=int(rng.integers(2**31 - 1)),
                       **engine_kwargs).fit(source)
    model, merges = merge_close_prototypes(model, source, merge_threshold=merge_threshold)
    return model, {"k_chosen": k, "table": table, "merges": merges, "k_final": model.n_clusters}
