"""The library's members as neighbours: their fused volumes from the mined store, pose-searched distances to them, and
the k-nearest-neighbour distance per cluster (Cover & Hart 1967, "Nearest neighbor pattern classification").

A prototype is the mean of its members.  A class the library never mined, or a neighbouring class, can fit that blurred
mean about as well as the class's own views while fitting no single member well, so the distance to a cluster's
nearest members tells apart what the distance to its prototype does not.  Used by find's known-class route (``[mine]
find_members``, ``curate.knownclass``) and by the label stage (``[mine] label_members``, ``label.matcher``: the class of
a view with close prototypes decided by their members, and the view's member distance as a conformal p-value).

Conventions: distances are the pose search's (``mine.tilts.tilt_pose_distances``: tilts x yaw x scale, the weighted
mean squared difference over the cells both observe); Dm (n, M) holds n views' distances to the M members in the
library's member order, inf where not searched.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ..ingest.volume import matching_features
from .tilts import TiltGrid, grid_aspect, tilt_pose_distances

# Members searched as one bank at most: a bank's tilted copies and their spectra take ~15 MB a member with the default
# grid and tilts (48 views against 32 / 128 synthetic members: peak +0.5 / +1.9 GB), so a cluster of a large library,
# or find's search of every other cluster's members at once, is searched block by block (each block refines each
# view's best pairs among its own members).  The demos' clusters hold fewer members than this.
MEMBER_BLOCK = 32
# Members of one cluster searched at most: the searches grow with views x members, so without a bound a library mined
# from N objects would make the calibration's held-out views (3 a member) and every find cost O(N^2).  A larger cluster
# is searched through this many of its members, evenly spaced in the library's member order (``cluster_members``).
# The demos' clusters hold fewer (up to ~16), so nothing there changes.
MEMBER_CAP = 32


def cluster_members(member_cluster: np.ndarray, c: int, cap: int | None = None) -> np.ndarray:
    """Indices of cluster c's members that are searched: every one when the cluster holds at most ``cap`` (default
    ``MEMBER_CAP``; 0 = no bound), else ``cap`` of them evenly spaced in the library's member order."""
    cap = MEMBER_CAP if cap is None else int(cap)
    idx = np.flatnonzero(np.asarray(member_cluster) == c)
    if cap <= 0 or len(idx) <= cap:
        return idx
    return idx[np.unique(np.round(np.linspace(0, len(idx) - 1, cap)).astype(np.int64))]


@dataclass
class Members:
    """The library's members ready to search: P (M, C, R, A, H) features, V (M, R, A, H) weights, aspect (M,) grid
    aspects, cluster (M,) and ids (M,) their object ids, in the library's member order."""
    P: np.ndarray
    V: np.ndarray
    aspect: np.ndarray
    cluster: np.ndarray
    ids: np.ndarray


def member_rows(library, store=None):
    """(store, rows (M,)) holding the library's members' fused volumes: ``store`` when it holds every member (by
    object id, on the same grid), else the library's recorded store (as recorded, or beside the library) when it does;
    None when none does or the library has no members."""
    from ..ingest.sharded import open_store
    if not len(library.members.get("object", ())):   # a library without members (an in-memory one of the bench)
        return None
    ids = [str(o) for o in library.members["object"]]
    cands = [] if store is None else [store]
    if library.store_path:
        rec = Path(library.store_path)
        for c in (rec, Path(library.path).parent / rec.name if getattr(library, "path", None) else None):
            if c is not None and c.is_file():
                try:
                    cands.append(open_store(c))
                except Exception:   # an unreadable file where the store was: as if not found
                    continue
    want = tuple(store.grid_shape) if store is not None else tuple(int(x) for x in library.attrs.get("grid", ()))
    for st in cands:
        index = {str(o): i for i, o in enumerate(st.ids)}
        if ids and all(o in index for o in ids) and (not want or tuple(st.grid_shape) == want):
            return st, np.array([index[o] for o in ids], np.int64)
    return None


def load_members(library, free_weight: float, colour_weight: float, store=None) -> Members | None:
    """The library's members' matching features (``ingest.volume.matching_features`` at the given channel weights)
    from the store :func:`member_rows` finds, or None."""
    found = member_rows(library, store)
    if found is None:
        return None
    st, rows = found
    P, V = matching_features(st.read_volume_at(rows), free_weight=free_weight, colour_weight=colour_weight)
    v = st.config["volume"]
    aspect = grid_aspect(st.objects["radius_m"], st.objects["height_m"], v["radial_margin"], v["height_margin"])
    return Members(np.asarray(P, np.float32), np.asarray(V, np.float32), np.asarray(aspect, np.float64)[rows],
                   np.asarray(library.members["cluster"], np.int64), np.asarray(library.members["object"]).astype(str))


def sure_members(library, margin_max: float) -> np.ndarray:
    """Which of the library's members (M,) bool are kept as neighbours by ``[mine] find_members_margin`` = margin_max
    > 0: those mining assigned surely, distance / second_distance (its own prototype's over the next one's) below
    margin_max (a member with no second distance is sure).  A cluster that would keep none keeps all of its members.
    margin_max <= 0: every member.  Editing the reference set of a nearest-neighbour rule (Wilson, "Asymptotic
    properties of nearest neighbor rules using edited data", IEEE Trans. SMC 1972, removes the samples its own k-NN
    rule misclassifies); here mining's own margin says which members are in doubt."""
    m = library.members
    cl = np.asarray(m["cluster"], np.int64)
    keep = np.ones(len(cl), bool)
    if margin_max <= 0 or not len(cl) or "second_distance" not in m:
        return keep
    d, d2 = np.asarray(m["distance"], np.float64), np.asarray(m["second_distance"], np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(np.isfinite(d2) & (d2 > 0), d / d2, 0.0)
    keep = ~(ratio >= margin_max)
    for c in np.unique(cl):
        if not keep[cl == c].any():
            keep[cl == c] = True
    return keep


def subset(mem: Members, keep: np.ndarray) -> Members:
    """The members ``keep`` (M,) bool of ``mem``, in their order."""
    keep = np.asarray(keep, bool)
    return Members(mem.P[keep], mem.V[keep], mem.aspect[keep], mem.cluster[keep], mem.ids[keep])


def searched_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, aspect: np.ndarray,
                       groups: Sequence[tuple[np.ndarray, np.ndarray]], scales: Sequence[float],
                       grid: TiltGrid | None) -> np.ndarray:
    """Dm (n, M): views X (n, C, R, A, H), W (n, R, A, H) against members P (M, C, R, A, H), V (M, R, A, H) with
    aspects (M,), one pose search per group (views (v,), members (u,)) and per block of at most ``MEMBER_BLOCK`` of
    its members: those views against those members as one bank, whose search refines each view's best pairs among
    them (``tilts.tilt_pose_distances``); inf elsewhere."""
    Dm = np.full((len(X), len(P)), np.inf)
    for views, mem in groups:
        views, mem = np.asarray(views, np.int64), np.asarray(mem, np.int64)
        for i in range(0, len(mem) if len(views) else 0, MEMBER_BLOCK):
            b = mem[i:i + MEMBER_BLOCK]
            D = tilt_pose_distances(X[views], W[views], P[b], V[b], aspect=aspect[b], scales=scales, grid=grid).D
            Dm[np.ix_(views, b)] = D
    return Dm


def class_knn(Dm: np.ndarray, member_cluster: np.ndarray, n_clusters: int, k: int) -> np.ndarray:
    """d_k (n, K): the mean of each object's k smallest finite distances to the members of each cluster (fewer when the
    cluster has fewer finite ones; inf when it has none).  Dm (n, M): distances of n objects to M members;
    member_cluster (M,) their clusters."""
    Dm = np.asarray(Dm, np.float64)
    mc = np.asarray(member_cluster, np.int64)
    out = np.full((len(Dm), n_clusters), np.inf)
    for c in range(n_clusters):
        d = np.sort(np.where(np.isfinite(Dm[:, mc == c]), Dm[:, mc == c], np.inf), axis=1)[:, :k]
        n_fin = np.isfinite(d).sum(axis=1)
        tot = np.where(np.isfinite(d), d, 0.0).sum(axis=1)
        out[:, c] = np.where(n_fin > 0, tot / np.maximum(n_fin, 1), np.inf)
    return out
