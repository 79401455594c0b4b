"""k-reciprocal re-ranking of find's one-shot shortlist (``[mine] find_rerank`` = k > 0; 0 = off).

A single view is a poor query: its nearest matches are the views of a similar side, and a never-mined class beside a
mined one, or a thin class seen through sparse stereo depth, puts other classes among its first 10.  The views of the
example's class are near *each other* as well, from more sides than the example shows.  k-reciprocal re-ranking
(Zhong, Zheng, Cao & Li, "Re-ranking Person Re-identification with k-reciprocal Encoding", CVPR 2017) reads that:

1. The shortlist S: the example's first ``n`` matches by find's one-shot ranking (``oneshot.ranking_key``: the
   symmetric distance on the ``find_symmetric`` shortlist, the one-way distance beyond), the example left out.
2. Pairwise distances over {example} + S: every member j of S is searched as the one prototype (tilts x yaw x scale,
   as find searches the example) against the example and S as objects; D[j, i] is object i against prototype j, the
   example's row is find's own search, and the pair's distance is the mean of the two directions (``symmetrised``).
3. k-reciprocal neighbours R(i, k): the j among i's k nearest (i itself counted) with i among j's k nearest.  Each
   set is expanded by the sets R(q, k/2) of its members q that share at least two thirds of theirs with it
   (the paper's R*).  Each row's distances are divided by its largest; object i is the vector V_i with
   exp(-d_ij) on R*(i, k), normalised to sum 1, 0 elsewhere.
4. The Jaccard distance of the example to object i, 1 - sum_j min(V_ej, V_ij) / sum_j max(V_ej, V_ij), mixed with the
   example's own divided distance: d* = (1 - w) d_J + w d (the paper's final distance; w = ``find_rerank_weight``).
   S is ranked by d*; every object beyond S follows in its one-shot order.  The paper's local query expansion (k2)
   is not used (k2 = 3 lost the upright demo's draw: README "Find").

5. Anchors (``[mine] find_rerank_anchors``).  The library's K prototypes join the neighbourhood graph as K more
   nodes: the distance of the example or a shortlisted object to prototype c is its pose search against c (find's
   route already searches every store object against every prototype: no search more), and two prototypes are never
   each other's neighbours (inf).  The reciprocal sets, their expansion and the Jaccard distance (3., 4.) run over the
   n + 1 + K nodes, but the example's own vector holds no anchor: the route did not take it, so the library claims it
   for no class.  Only the example and the shortlist are ranked, and the mixed-in own distance stays the example's
   divided distance over the shortlist (4.).  Why: the views that crowd a poor example's first places are views of
   the classes the library has mined, and each lies next to its class's prototype, which then sits in its reciprocal
   set and takes a share of its vector that the example's cannot match; a view of a never-mined class, like the
   example, holds few.  The library's knowledge enters as neighbours, not as a decision (the label decision on a poor
   view is where the route fails).  An example of a never-mined class that the view shows among a mined class's views
   (in their reciprocal sets, as seed 0's trowel among the L brackets) would otherwise hold that class's anchor too
   and pull its views up.

Used only when the known-class route (``curate.knownclass``) does not rank: an example the route takes ranks by its
prototype.  ``distance``, ``score``, ``both_ways`` and ``--add`` stay the one-shot search's.  Cost: n one-prototype
searches of n + 1 objects (``rerank_pairwise``).
"""
from __future__ import annotations

import numpy as np

from ..mine.tilts import TiltGrid, tilt_pose_distances


def rerank_pairwise(X: np.ndarray, W: np.ndarray, aspects: np.ndarray, scales: tuple[float, ...],
                    grid: TiltGrid | None, example_row: np.ndarray) -> np.ndarray:
    """Symmetrised distances (n + 1, n + 1) over the example (row / column 0) and the shortlist: X (n + 1, C, R, A, H),
    W (n + 1, R, A, H) their matching features, the example first; aspects (n + 1,); ``example_row`` (n + 1,) the
    example's own search (the objects against the example as the prototype).  Member j (>= 1) is searched as the one
    prototype against all n + 1 objects."""
    n1 = len(X)
    D = np.empty((n1, n1), np.float64)
    D[0] = example_row
    for j in range(1, n1):
        D[j] = tilt_pose_distances(X, W, X[j:j + 1], W[j:j + 1], aspect=aspects[j:j + 1], scales=scales, grid=grid).D[:, 0]
    return symmetrised(D)


def symmetrised(D: np.ndarray) -> np.ndarray:
    """(D + D^T) / 2 with a zero diagonal; a pair with one direction not finite takes the other, neither: inf."""
    D = np.asarray(D, np.float64)
    a, b = np.where(np.isfinite(D), D, np.nan), np.where(np.isfinite(D.T), D.T, np.nan)
    with np.errstate(invalid="ignore"):
        S = np.where(np.isnan(a), b, np.where(np.isnan(b), a, 0.5 * (a + b)))
    S = np.where(np.isnan(S), np.inf, S)
    np.fill_diagonal(S, 0.0)
    return S


def reciprocal_sets(D: np.ndarray, k: int) -> np.ndarray:
    """R (n, n) bool: R[i, j] when j is among the k + 1 nearest of i (i itself included, ties by index) and i among
    j's (k-reciprocal neighbours)."""
    n = len(D)
    nn = np.argsort(D, axis=1, kind="stable")[:, :min(n, k + 1)]
    near = np.zeros((n, n), bool)
    near[np.arange(n)[:, None], nn] = True
    return near & near.T


def expanded_sets(D: np.ndarray, k: int) -> np.ndarray:
    """R* (n, n) bool: each R(i, k) joined by the R(q, k // 2) of its members q that have at least two thirds of their
    own set inside R(i, k) (Zhong et al. 2017, eq. 6)."""
    R = reciprocal_sets(D, k)
    half = reciprocal_sets(D, max(1, k // 2))
    out = R.copy()
    for i in range(len(D)):
        for q in np.flatnonzero(R[i]):
            if (half[q] & R[i]).sum() * 3 >= 2 * half[q].sum():
                out[i] |= half[q]
    return out


def jaccard_distance(D: np.ndarray, k: int, example_nodes: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(d_J (n,), d (n,)): the Jaccard distance of row 0 (the example) to every row of D (n, n) by their k-reciprocal
    vectors (module docstring, 3. and 4.), and row 0's distances divided by its largest finite one.  ``example_nodes``
    = m: the example's vector holds the first m nodes only (the anchors of 5. after them left out of it)."""
    D = np.asarray(D, np.float64)
    big = np.where(np.isfinite(D), D, -np.inf).max(axis=1, keepdims=True)
    Dn = np.where(np.isfinite(D), D / np.maximum(big, 1e-12), np.inf)
    R = expanded_sets(np.where(np.isfinite(D), D, np.finfo(np.float64).max), k)
    if example_nodes is not None:
        R[0, int(example_nodes):] = False
    V = np.where(R, np.exp(-np.where(np.isfinite(Dn), Dn, 0.0)), 0.0)
    V /= np.maximum(V.sum(axis=1, keepdims=True), 1e-12)
    lo = np.minimum(V[0][None], V).sum(axis=1)
    hi = np.maximum(V[0][None], V).sum(axis=1)
    return 1.0 - lo / np.maximum(hi, 1e-12), Dn[0]


def anchored(D: np.ndarray, anchors: np.ndarray) -> np.ndarray:
    """Distances (n + 1 + K, n + 1 + K) over the example and shortlist of D (n + 1, n + 1) and K prototypes as anchor
    nodes (module docstring, 5.): ``anchors`` (n + 1, K) the nodes' distances to the prototypes; prototype to
    prototype inf (never neighbours), a zero diagonal."""
    D = np.asarray(D, np.float64)
    a = np.asarray(anchors, np.float64)
    n1, K = a.shape
    if len(D) != n1:
        raise ValueError(f"anchors hold {n1} rows for {len(D)} nodes")
    out = np.full((n1 + K, n1 + K), np.inf)
    out[:n1, :n1] = D
    out[:n1, n1:] = a
    out[n1:, :n1] = a.T
    np.fill_diagonal(out, 0.0)
    return out


def reranked_key(one_shot_key: np.ndarray, shortlist: np.ndarray, D: np.ndarray, k: int, weight: float,
                 anchors: np.ndarray | None = None) -> np.ndarray:
    """The ranking key (N,) (ascending): the shortlist (n,) store rows ranked by (1 - weight) d_J + weight d over the
    pairwise distances D (n + 1, n + 1) (example first, then ``shortlist`` in order), then every other object by
    ``one_shot_key`` offset past them (unmatched objects stay inf).  ``anchors`` (n + 1, K): the prototypes as anchor
    nodes of the Jaccard distance (module docstring, 5.); d stays row 0 of D divided by its largest."""
    base = np.asarray(one_shot_key, np.float64)
    if anchors is None:
        dj, dn = jaccard_distance(D, k)
    else:
        n1 = len(D)
        dj = jaccard_distance(anchored(D, anchors), k, example_nodes=n1)[0][:n1]
        row = np.asarray(D, np.float64)[0]
        big = float(np.where(np.isfinite(row), row, -np.inf).max())
        dn = np.where(np.isfinite(row), row / max(big, 1e-12), np.inf)
    fin = (1.0 - weight) * dj[1:] + weight * np.where(np.isfinite(dn[1:]), dn[1:], 1.0)
    lowest = float(base[np.isfinite(base)].min()) if np.isfinite(base).any() else 0.0
    key = np.where(np.isfinite(base), base - lowest + 2.0, np.inf)
    key[np.asarray(shortlist, np.int64)] = fin          # fin in [0, 2): every shortlisted object before the rest
    return key
