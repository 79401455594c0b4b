"""Split point groups where objects touch: local convexity (Stein, Schoeler, Papon & Woergoetter, "Object
partitioning using local convexity", CVPR 2014), then parts are put back together by support.

Conventions: points are voxel centroids (V, 3) in the world frame, metres; ``views`` (V, 3) are unit vectors
from each voxel towards the cameras that saw it (used to orient normals outwards); ``labels`` (V,) are the
Euclidean groups (DBSCAN, -1 = noise).  Nothing here assumes a world axis is up: heights come from the plane.

1. Normals: principal component analysis of each voxel's neighbours (within ``radius`` in its own group),
   oriented to face the cameras.
2. Adjacent voxels i, j (within ``adjacency`` metres) are joined unless their connection is *concave*:
   with d = x_i - x_j, the connection is convex when (n_i - n_j) . d > 0 (the surface bends away from the
   viewer) and concave otherwise; connections whose normals differ by less than ``concave_deg`` count as
   convex (Stein et al.'s threshold beta against sensor noise).  Connected components of the remaining graph
   are the convex parts.  Two objects that touch meet in a concave crease all around their contact, so they
   fall apart; a part is only cut off when a closed ring of concave connections surrounds it.
3. Parts back into objects: an object stands on the support plane.  A part that does not reach the plane (a
   handle, a knob, pegs on a post, a lid) is a piece of the object it hangs on: it joins the neighbour part it
   shares the most connections with (a lid meets its own walls all around, a neighbour it leans on at a few
   points).  Parts too small to be an object join their most connected neighbour too.  What stands on the
   plane on its own stays its own object (parts standing on each other's footprint are joined later, by
   ``proposals._merge_overlapping_footprints``).
"""
from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

NORMAL_NEIGHBOURS = 16   # PCA neighbourhood size for voxel normals


def voxel_normals(points: np.ndarray, views: np.ndarray, labels: np.ndarray, radius: float) -> np.ndarray:
    """(V, 3) unit normals of voxel centroids (V, 3), facing ``views`` (V, 3), from their group's neighbours."""
    V = len(points)
    if V == 0:
        return np.zeros((0, 3))
    k = min(NORMAL_NEIGHBOURS, V)
    d, j = cKDTree(points).query(points, k=k)
    d, j = d.reshape(V, k), j.reshape(V, k)
    w = ((d <= radius) & (labels[j] == labels[:, None])).astype(np.float64)      # (V, k)
    q = points[j]                                                               # (V, k, 3)
    mu = (w[..., None] * q).sum(1) / np.maximum(w.sum(1), 1e-12)[:, None]
    r = (q - mu[:, None]) * w[..., None]
    cov = np.einsum("vki,vkj->vij", r, r)                                       # (V, 3, 3)
    _, vec = np.linalg.eigh(cov)
    n = vec[:, :, 0]                                                            # smallest eigenvalue
    return n * np.where(np.einsum("vi,vi->v", n, views) < 0, -1.0, 1.0)[:, None]


def convex_parts(points: np.ndarray, normals: np.ndarray, labels: np.ndarray, *, adjacency: float,
                 concave_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Parts (V,) (-1 where ``labels`` is -1) and the adjacency pairs (E, 2) within a group."""
    V = len(points)
    pairs = cKDTree(points).query_pairs(adjacency, output_type="ndarray") if V > 1 else np.zeros((0, 2), int)
    pairs = pairs[(labels[pairs[:, 0]] == labels[pairs[:, 1]]) & (labels[pairs[:, 0]] >= 0)]
    i, j = pairs[:, 0], pairs[:, 1]
    dn = normals[i] - normals[j]
    bend = np.einsum("ei,ei->e", dn, points[i] - points[j])                    # > 0 convex, < 0 concave
    cos = np.einsum("ei,ei->e", normals[i], normals[j])
    concave = (bend < 0) & (cos < np.cos(np.deg2rad(concave_deg)))
    keep = pairs[~concave]
    g = coo_matrix((np.ones(len(keep)), (keep[:, 0], keep[:, 1])), shape=(V, V))
    _, comp = connected_components(g, directed=False)
    return np.where(labels >= 0, comp, -1), pairs


def join_parts(parts: np.ndarray, pairs: np.ndarray, heights: np.ndarray, *, rest_tol: float,
               min_voxels: int) -> np.ndarray:
    """Objects (V,) relabelled 0..n-1 from convex parts (V,), their voxel adjacency (E, 2) and the voxels'
    heights above the support plane (V,)."""
    ids = np.unique(parts[parts >= 0])
    if len(ids) < 2:
        return _relabel(parts)
    a, b = parts[pairs[:, 0]], parts[pairs[:, 1]]
    cross = a != b
    n = int(ids.max()) + 1
    links = coo_matrix((np.ones(int(cross.sum())), (a[cross], b[cross])), shape=(n, n)).toarray()
    links = links + links.T                                                      # (n, n) shared connections
    size = np.bincount(parts[parts >= 0], minlength=n)
    low = np.full(n, np.inf)
    for p in ids:
        low[p] = np.percentile(heights[parts == p], 2)
    parent = np.arange(n)

    def root(x: int) -> int:
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for p in ids:
        if not links[p].any():
            continue
        if size[p] < min_voxels or low[p] > rest_tol:     # a crumb, or a part hanging on a neighbour
            parent[root(p)] = root(int(links[p].argmax()))
    roots = np.array([root(int(p)) if p >= 0 else -1 for p in range(n)])
    return _relabel(np.where(parts >= 0, roots[np.maximum(parts, 0)], -1))


def _relabel(lab: np.ndarray) -> np.ndarray:
    out = np.full(len(lab), -1)
    ok = lab >= 0
    if ok.any():
        _, out[ok] = np.unique(lab[ok], return_inverse=True)
    return out
