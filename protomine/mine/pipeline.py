"""Mine an object store into a prototype library: engine fit, calibration, statistics, outputs.

Steps
1. Pose-aware clustering of the store's matching features (``engine.PoseKMeans``; K chosen by
   ``choosek`` when not given).  Members' yaw is relative to their prototype's canonical frame, modulo
   its symmetry period.
2. Mean aligned store volumes per prototype (for pictures): each member volume is rolled back by its
   yaw (Fourier shift along azimuth) and averaged with its observation counts as weights.
3. Label-free calibration: robust fits (median, MAD) of the log distances of the members' distances (fused objects) and of the
   leave-one-out distances of the store's one-frame volumes to their object's prototype rebuilt without
   that object (single views; see ``single_view_calibration``), so that
   ``library.match_score`` is comparable across clusters and usable for single views.  With tilts and
   ``[mine] calibrate_searched`` each held-out view's face is the one the label search finds for it
   (:func:`calibration_search`), so the score sees the search's pick among many tilted copies.
4. Metric size statistics (footprint radius, height) and member scale = sqrt(r h) / median over the
   cluster of sqrt(r h).
"""
from __future__ import annotations

import csv
import io
import json
import threading
from dataclasses import asdict
from pathlib import Path
from typing import Callable

import numpy as np

from ..atomic import pause_point, write_text
from ..cores import one_blas_thread
from ..errors import InputError
from ..ingest.sharded import open_store
from ..ingest.store import ObjectStore
from ..geometry import plane_basis
from ..ingest.volume import Grid, matching_features
from ..rotations import matrix_to_quat
from ..progress import bar, say
from ..provenance import provenance, provenance_of, record_outputs
from .aligned import aligned_mean_volumes
from .freeweight import free_rescaled, free_weight_choices, heldout_own_rates, with_cameras
from .library import Library, log_distance_fit, match_score, pad_quaternions, write_library
from .openset import conformal_cut
from .posesearch import pose_distances
from .reliability import cell_reliability
from .viewdistance import score_mass, score_rings
from .searchpool import ordered_map, pooled
from .tilts import IDENTITY_DEG, TiltBank, TiltGrid, grid_aspect, volume_on_face


def period_of(symmetry: np.ndarray) -> np.ndarray:
    """Yaw period in degrees per prototype: 0 for continuous symmetry (any yaw), 360/n otherwise."""
    s = np.asarray(symmetry)
    return np.where(s == 0, 0.0, 360.0 / np.maximum(s, 1))


def tilt_grid(cfg: dict, path=None) -> TiltGrid | None:
    """The up-direction grid of ``[mine] tilt_nsides`` (None for [0], the yaw-only search)."""
    m, v = cfg["mine"], cfg["volume"]
    nsides = tuple(int(n) for n in m["tilt_nsides"])
    if nsides == (0,):
        return None
    if 0 in nsides or list(nsides) != sorted(set(nsides)):
        raise InputError(path, "mine.tilt_nsides", f"expected [0] or increasing HEALPix N_side values, got {list(nsides)}")
    return TiltGrid(nsides=nsides, radial_margin=float(v["radial_margin"]), height_margin=float(v["height_margin"]),
                    refine_top=int(m["tilt_refine_top"]), refine_margin=float(m.get("tilt_refine_margin", 0.0)),
                    pass_levels=int(m.get("tilt_pass_levels", 0)), coarse_bins=int(m.get("tilt_coarse_bins", 0)))


def store_aspect(store: ObjectStore, cfg: dict) -> np.ndarray:
    """(N,) grid aspects z_max / rho_max of the store's objects (``tilts.grid_aspect``), with the margins the
    store was lifted with (its recorded config; ``cfg`` when it records none)."""
    v = store.config.get("volume") or cfg["volume"]
    return grid_aspect(store.objects["radius_m"], store.objects["height_m"], v["radial_margin"], v["height_margin"])


CLUSTER_FREE_FLOOR = 1e-4  # the least free-space weight a clustering runs with: its prototypes keep the channel


def clustering_config(cfg: dict) -> dict:
    """``cfg`` with ``mine.free_weight`` replaced by ``mine.cluster_free_weight`` (floored at
    :data:`CLUSTER_FREE_FLOOR`), the weight the clustering (seeding, choosing K, Lloyd passes, merging) runs
    with; ``cfg`` itself when the two are equal."""
    m = cfg["mine"]
    fw_c = max(float(m.get("cluster_free_weight", m["free_weight"])), CLUSTER_FREE_FLOOR)
    if fw_c == float(m["free_weight"]):
        return cfg
    return {**cfg, "mine": {**m, "free_weight": fw_c}}


def reweight_free(model, cfg: dict) -> bool:
    """Rescale a model fitted with :func:`clustering_config` to the library's ``mine.free_weight``: prototypes
    are weighted means of their members' features, so their free-space channel (``ingest.volume.FEATURES``
    index 1, sqrt(weight) x free) scales by sqrt(free_weight / cluster weight).  True when it changed."""
    fw, fw_c = float(cfg["mine"]["free_weight"]), float(clustering_config(cfg)["mine"]["free_weight"])
    if fw_c == fw:
        return False
    model.prototypes_ = free_rescaled(model.prototypes_, fw, fw_c)
    return True


def k_group_min(cfg: dict) -> int | None:
    """``[mine] k_group_min`` for ``choosek.group_count``: None (0 in the config) = the neighbours + 1 rule."""
    g = int(cfg["mine"].get("k_group_min", 0))
    return g or None


def fit_restarts(cfg: dict, grid: TiltGrid | None) -> int:
    """Restarts of the pose-aware fit: ``[mine] n_init``, or 1 with ``[mine] face_one_start`` when the seeding
    searches stable resting faces (``face_pairs`` with a tilt ``grid``).

    Why: restart 0 starts from the lowest-cost k-medoids partition of the stable-face matrix (itself the
    best of ``seeding.KMEDOIDS_STARTS`` + 1 starts), the others from one k-means++ draw each, and the
    restarts are compared by their summed distance over the tilt *grid*.  That cost is biased towards
    clusters of one resting face: a same-face member sits exactly on the grid's identity, a member on
    another face up to the grid's covering radius off its tilt, and the distance is sharp in tilt (README,
    "Why classes split by face").  A restart that groups faces of different classes then wins over one
    that groups the faces of each class.  Measured on the tools family with touching objects, half tumbled
    (7 captures x 8 frames, with masks, K = 8 given, seed 0): n_init 4 purity 0.804 / NMI 0.811, restart 0
    alone 0.935 / 0.914."""
    m = cfg["mine"]
    faces = bool(m.get("face_pairs", False)) and grid is not None and not grid.is_identity
    return 1 if faces and bool(m.get("face_one_start", False)) else int(m["n_init"])


def fit_engine(store: ObjectStore, cfg: dict, seed: int, n_clusters: int | None,
               progress: Callable[[str], None] | None = None, executor=None):
    """Fit the clustering; ``executor`` (``protomine.scale.executor``) runs its passes as a map-reduce
    (yaw-only: the tilt search runs in this process)."""
    from .engine import HELD_UPDATES, PoseKMeans
    cfg = clustering_config(cfg)
    m = cfg["mine"]
    grid = tilt_grid(cfg) if executor is None and not cfg.get("scale", {}).get("batch_size", 0) else None
    src = store.source(cfg) if executor is None else _executor_source(store, cfg, executor)
    src.aspect = store_aspect(store, cfg)
    k = n_clusters or m["clusters"] or None
    if k is not None and k > len(store):
        raise InputError(store.path, "objects", f"--clusters={k} must be <= the number of objects in the store ({len(store)})")
    if progress and grid is None and tilt_grid(cfg) is not None:
        progress("the tilt search runs in this process only: this run searches yaw about up and scale")
    common = dict(scales=tuple(m["scales"]), n_init=fit_restarts(cfg, grid), max_iter=m["max_iter"], tol=m["tol"],
                  chunk_size=m["chunk_size"], random_state=seed, progress=progress, tilts=grid,
                  face_pairs=bool(m.get("face_pairs", False)), seed_check=bool(m.get("seed_check", False)),
                  seed_hold_t=float(m.get("seed_hold_t", 0.0)), face_assign=bool(m.get("face_assign", False)),
                  face_updates=int(m.get("face_assign_updates", HELD_UPDATES)),
                  face_hold_unmoved=bool(m.get("face_assign_hold_unmoved", False)),
                  symmetry_break_effect=float(m.get("symmetry_break_effect", 0.0)),
                  pose_sync=bool(m.get("pose_sync", False)), seed_veto_k=int(m.get("seed_veto_k", 0)),
                  pose_polish=bool(m.get("pose_polish", False)),
                  polish_own_out=bool(m.get("pose_polish_own_out", False)))
    if cfg.get("scale", {}).get("batch_size", 0):
        from .minibatch import fit_minibatch  # yaw-only (grid is None in this mode)
        return fit_minibatch(src, cfg, seed, k, max_k=min(m["max_clusters"], len(store) - 1), progress=progress)
    if k is None:
        from .choosek import fit_auto
        if progress:
            progress(f"choosing K in 2..{min(m['max_clusters'], len(store) - 1)} on pose-minimised distances")
        model, table = fit_auto(src, max_k=min(m["max_clusters"], len(store) - 1), merge_threshold=m["merge_threshold"],
                                one_se=bool(m.get("k_one_se", False)), group_min=k_group_min(cfg),
                                count_outlying=bool(m.get("k_count_outlying", False)),
                                climb=bool(m.get("k_climb", False)), raise_k=bool(m.get("k_raise", False)),
                                symmetry_factor=m["symmetry_factor"], symmetry_tol=m["symmetry_tol"], **common)
        return model, table
    model = PoseKMeans(n_clusters=k, symmetry_factor=m["symmetry_factor"], symmetry_tol=m["symmetry_tol"], **common).fit(src)
    return model, None


def _executor_source(store: ObjectStore, cfg: dict, executor):
    from .distributed import ExecutorSource, StoreSpec
    return ExecutorSource(StoreSpec.of(store, cfg), executor)


def spread_pick(items: np.ndarray, n: int) -> np.ndarray:
    """At most n of ``items`` (1-D), evenly spaced over it (all when n >= len)."""
    if len(items) <= n:
        return np.asarray(items)
    return np.asarray(items)[np.unique(np.round(np.linspace(0, len(items) - 1, n)).astype(int))]


def _calibration_objects(store: ObjectStore, labels: np.ndarray, K: int, max_objects_per_cluster: int) -> np.ndarray:
    """Sorted store rows of the objects whose single views calibrate the score: a location-scale fit needs
    tens of samples, not thousands, so at most max_objects_per_cluster per prototype (evenly spread over its
    members, deterministic) keep the cost bounded on large stores."""
    have = np.unique(store.single_object)
    objs = np.concatenate([spread_pick(have[labels[have] == k], max_objects_per_cluster) for k in range(K)]).astype(int)
    return np.sort(objs)


def _loo_single_views(store: ObjectStore, cfg: dict, P: np.ndarray, V: np.ndarray, labels: np.ndarray,
                      scales: tuple[float, ...], objs: np.ndarray, up: np.ndarray | None, bank: TiltBank | None,
                      search=None):
    """Yield (k, rows, xs, ws, Pk, Vk, upright) per calibration object: its cluster, its single views' row
    indices (m,) and features xs (m, C, R, A, H), ws (m, R, A, H), its prototype rebuilt without it, Pk (1, C,
    R, A, H), Vk (1, R, A, H) (on the object's resting face), and whether that face is the canonical one
    (see :func:`single_view_calibration`).  With ``search`` (views xs, ws and their prototype k -> up
    directions (m, 3) in the prototype frame and upright (m,): each view's tilt as the label search finds it
    against prototype k), the face is each view's searched one instead of the object's mined face: one tuple
    per object and distinct searched direction."""
    if search is not None:
        yield from _loo_searched(store, cfg, P, V, labels, scales, objs, bank, search)
        return
    n = np.bincount(labels, minlength=P.shape[0])
    for chunk, xo, wo, rows_all, xs, ws in _calibration_chunks(store, cfg, objs):
        for j, obj in enumerate(chunk):
            k = int(labels[obj])
            P1, V1 = P[k:k + 1], V[k:k + 1]
            upright = not (up is not None and bank is not None and up[obj, 2] < np.cos(np.deg2rad(IDENTITY_DEG)))
            if not upright:
                Pc, Vc = bank.copy_at(k, up[obj])
                P1, V1 = Pc[None], Vc[None]
            Pk, Vk = _without_object(xo[j:j + 1], wo[j:j + 1], P1, V1, int(n[k]), scales)
            sel = np.flatnonzero(store.single_object[rows_all] == obj)
            yield k, rows_all[sel], xs[sel], ws[sel], Pk, Vk, upright


def _calibration_chunks(store: ObjectStore, cfg: dict, objs: np.ndarray, size: int = 256):
    """Yield (chunk, xo, wo, rows, xs, ws) per run of ``size`` calibration objects: their fused volumes' matching
    features, their single views' store rows and those views' features."""
    m = cfg["mine"]
    feats = lambda vols: matching_features(vols, free_weight=m["free_weight"], colour_weight=m["colour_weight"])  # noqa: E731
    for i0 in range(0, len(objs), size):
        chunk = objs[i0:i0 + size]
        xo, wo = feats(store.read_volume_at(chunk))
        rows = np.flatnonzero(np.isin(store.single_object, chunk))
        xs, ws = feats(store.read_single_views(rows))
        yield chunk, xo, wo, rows, xs, ws


def _without_object(xo: np.ndarray, wo: np.ndarray, P1: np.ndarray, V1: np.ndarray, n: int,
                    scales: tuple[float, ...]) -> tuple[np.ndarray, np.ndarray]:
    """The prototype P1 (1, C, R, A, H), V1 (1, R, A, H) of n members rebuilt without one of them, xo (1, C, R,
    A, H), wo (1, R, A, H) (aligned to it by the pose search first), as float32; unchanged when n is 1."""
    from .engine import align_to_prototype
    Pk, Vk = P1.astype(np.float64), V1.astype(np.float64)
    if n > 1:
        pm = pose_distances(xo, wo, P1, V1, scales=scales)
        xa, wa = align_to_prototype(xo, wo, pm.yaw_deg[:, 0], pm.scale[:, 0])
        den = n * Vk - wa
        ok = den > 1e-6
        # (1, C, R, A, H): the weighted sum without the object, over the weight left
        Pk = np.where(ok[:, None], (n * Vk[:, None] * Pk - wa[:, None] * xa) / np.where(ok, den, 1.0)[:, None], 0.0)
        Vk = np.where(ok, den, 0.0) / (n - 1)
    return Pk.astype(np.float32), Vk.astype(np.float32)


def _loo_searched(store: ObjectStore, cfg: dict, P: np.ndarray, V: np.ndarray, labels: np.ndarray,
                  scales: tuple[float, ...], objs: np.ndarray, bank: TiltBank | None, search):
    """:func:`_loo_single_views` with each view's face from ``search``: the object's views grouped by the
    direction the search found, each group against the prototype rebuilt without the object on that face."""
    n = np.bincount(labels, minlength=P.shape[0])
    for chunk, xo, wo, rows_all, xs, ws in _calibration_chunks(store, cfg, objs):
        # every view of the chunk searched against its own prototype, one call per prototype
        view_k = labels[store.single_object[rows_all]]
        ups_all, upr_all = np.zeros((len(rows_all), 3)), np.ones(len(rows_all), bool)
        ks = np.unique(view_k)
        sel_k = [np.flatnonzero(view_k == k) for k in ks]
        # the prototypes' searches are independent: one per thread of the spectra pool (searchpool.pooled), each
        # with one torch thread, results taken in prototype order
        found = pooled(lambda i: search(xs[sel_k[i]], ws[sel_k[i]], int(ks[i])), range(len(ks)))
        for sk, (u, r) in zip(sel_k, found):
            ups_all[sk], upr_all[sk] = u, r
        groups = []  # (j, k, u, upright, the group's views): one per object and searched direction
        for j, obj in enumerate(chunk):
            k = int(labels[obj])
            sel = np.flatnonzero(store.single_object[rows_all] == obj)
            if not len(sel):
                continue
            ups = np.where(upr_all[sel][:, None], [0.0, 0.0, 1.0], ups_all[sel])
            dirs, inv = np.unique(np.round(ups, 9), axis=0, return_inverse=True)
            for g, u in enumerate(dirs):
                upright = bool(bank is None or u[2] >= np.cos(np.deg2rad(IDENTITY_DEG)))
                groups.append((j, k, u, upright, sel[np.asarray(inv).reshape(-1) == g]))

        def rebuilt(group):  # the group's prototype (its copy on the searched face) without the group's object
            j, k, u, upright, _ = group
            P1, V1 = (P[k:k + 1], V[k:k + 1]) if upright else (a[None] for a in bank.copy_at(k, u))
            return _without_object(xo[j:j + 1], wo[j:j + 1], P1, V1, int(n[k]), scales)

        # the groups are independent: on the spectra pool's threads as the search above (one torch thread each),
        # results in group order (copy_at's one write, a prototype's solid cells, is the same from any thread)
        for (j, k, u, upright, gs), (Pk, Vk) in zip(groups, pooled(rebuilt, groups)):
            yield k, rows_all[gs], xs[gs], ws[gs], Pk, Vk, upright


def single_view_distances(store: ObjectStore, cfg: dict, P: np.ndarray, V: np.ndarray, labels: np.ndarray,
                          scales: tuple[float, ...], *, max_objects_per_cluster: int = 64,
                          progress: Callable[[str], None] | None = None,
                          up: np.ndarray | None = None, bank: TiltBank | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-out distances of the store's one-frame volumes to their object's prototype: (Q,) distances
    (inf for views left out of the calibration), (Q,) clusters (see :func:`single_view_calibration`)."""
    d, k, _ = single_view_calibration(store, cfg, P, V, labels, scales, max_objects_per_cluster=max_objects_per_cluster,
                                      progress=progress, up=up, bank=bank)
    return d, k


def single_view_calibration(store: ObjectStore, cfg: dict, P: np.ndarray, V: np.ndarray, labels: np.ndarray,
                            scales: tuple[float, ...], *, reliable: bool = True, max_objects_per_cluster: int = 64,
                            progress: Callable[[str], None] | None = None, up: np.ndarray | None = None,
                            bank: TiltBank | None = None, search=None, upright_out: np.ndarray | None = None,
                            raw_out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Leave-one-out distances of the store's one-frame volumes to their object's prototype: (Q,) distances
    (inf for views left out of the calibration), (Q,) clusters, and the per-cell reliability (K, R, H) of
    single views (``reliability``; ones when ``reliable`` is False).

    A single view is matched against its prototype *without its own object*: the prototype is the
    observation-weighted mean of its aligned members, P = sum w_al x_al / sum w_al with sum w_al = n V, so
    P_-i = (n V P - w_i x_i) / (n V - w_i) and V_-i = (n V - w_i) / (n - 1), where (x_i, w_i) is the object's
    fused volume aligned by its own best pose against P.  Without this, the calibration measures how well
    a prototype fits views of objects it was built from, which for small clusters (a prototype of 5
    members is one fifth each of them) is far tighter than for new objects, and the single-view score
    would call most new instances unknown.  Prototypes with one member keep the plain distance.
    With tilts, an object resting on another face (``up`` (N, 3), its up direction in the prototype frame)
    is compared with the prototype's copy resting on that face (``bank.copy_at``), the same formula applied
    in the copy's frame.
    The reliability is fitted on the residuals of the upright views at their best pose; each upright view's
    distance is then re-weighted (``reliability.reliable_distances``) by the reliability fitted *without its
    object's views*, for the same reason.  Views on another face keep the plain distance (the reliability
    lives in the canonical frame), as the matcher does for tilted matches.  With ``[mine] tolerant_residual``
    or ``[mine] score_margin_ring`` below 1 every view's distance is the one of ``viewdistance`` (views on
    another face against the copy resting on it, without reliability), the distance the matcher then scores.
    ``upright_out`` (Q,) and ``raw_out`` (Q,), when given, receive each calibrated view's face kind (canonical or
    not) and its plain pose-search distance (before the reliability or ``viewdistance`` re-weighting): the
    distance the label search ranks prototypes by (``mine.openset``'s ratio calibration uses it).
    """
    from .engine import align_to_prototype
    from .reliability import reliable_distances, residual_sums
    from .viewdistance import pair_distances
    K, _, R, _, H = P.shape
    tolerant = bool(cfg["mine"].get("tolerant_residual", False))
    rings = score_rings(cfg, R)
    mass = score_mass(cfg)
    again = tolerant or rings is not None   # views on another face are re-scored, not given the search distance
    out = np.full(len(store.single_object), np.inf)
    num, den = np.zeros((K, R, H)), np.zeros((K, R, H))
    if len(store.single_object) == 0:
        return out, np.zeros(0, int), np.ones((K, R, H))
    objs = _calibration_objects(store, labels, K, max_objects_per_cluster)
    loo = lambda: _loo_single_views(store, cfg, P, V, labels, scales, objs, up, bank, search)  # noqa: E731
    n_items = len(objs)
    if search is not None:  # the search runs once (its groups are read twice below)
        with bar(progress, "calibration face search", total=len(objs), unit="objects") as b:
            groups, last = [], -1
            for g in loo():
                groups.append(g)
                obj = int(store.single_object[g[1][0]])
                if obj != last:  # a group's views are one object's
                    b.advance(1)
                    last = obj
        loo = lambda: iter(groups)  # noqa: E731
        n_items = len(groups)

    def first(g):   # a group's distances and poses, and its residual sums for the reliability
        k, rows, xs, ws, Pk, Vk, upright = g
        pm = pose_distances(xs, ws, Pk, Vk, scales=scales)
        ok = np.isfinite(pm.D[:, 0])
        a, c = np.zeros((R, H)), np.zeros((R, H))
        if reliable and upright and ok.any():
            xa, wa = align_to_prototype(xs[ok], ws[ok], pm.yaw_deg[ok, 0], pm.scale[ok, 0])
            a, c = residual_sums(xa, wa, Pk[0], Vk[0])
        return pm, a, c

    def second(g, pose, sums):   # a group's distances re-weighted by the reliability without its object
        k, rows, xs, ws, Pk, Vk, upright = g
        (yaw, sc), (a, c) = pose, sums
        if upright:
            lam = cell_reliability((num[k] - a)[None], (den[k] - c)[None])
            return reliable_distances(xs, ws, Pk, Vk, lam, yaw, sc, tolerant=tolerant, rings=rings, mass=mass)[:, 0]
        if again and len(rows):  # another face: the same distance against the copy, no reliability
            return pair_distances(xs, ws, np.broadcast_to(Pk, (len(rows),) + Pk.shape[1:]),
                                  np.broadcast_to(Vk, (len(rows),) + Vk.shape[1:]), yaw[:, 0], sc[:, 0],
                                  tolerant=tolerant, rings=rings)
        return None

    # with the searched faces the groups are in memory: each pass runs them on the spectra pool's threads
    # (searchpool.pooled, one torch thread each) and takes their results in group order, so the sums below add up
    # in the same order as one after the other
    def each(fn, items):  # (item, fn(item)) in item order
        if search is None:
            return ((it, fn(it)) for it in items)
        items = list(items)
        return zip(items, pooled(fn, items))

    poses, own = [], []
    with bar(progress, "score calibration", total=n_items * (2 if reliable else 1), unit="groups" if search else "objects") as b:
        for (k, rows, xs, ws, Pk, Vk, upright), (pm, a, c) in each(first, loo()):
            out[rows] = pm.D[:, 0]
            if raw_out is not None:  # the pose search's own distance, before any re-weighting
                raw_out[rows] = pm.D[:, 0]
            if upright_out is not None:
                upright_out[rows] = upright
            poses.append((pm.yaw_deg, pm.scale))
            own.append((a, c))
            num[k] += a
            den[k] += c
            b.advance(1)
        if not reliable:
            return out, labels[store.single_object], np.ones((K, R, H))
        for (g, _, _), d in each(lambda t: second(*t), zip(loo(), poses, own)):
            if d is not None:
                out[g[1]] = np.where(np.isfinite(out[g[1]]), d, np.inf)
            b.advance(1)
    return out, labels[store.single_object], cell_reliability(num, den)


def rule_calibration(lib: Library, store: ObjectStore, rows: np.ndarray, own: np.ndarray, own_d: np.ndarray,
                     own_s: np.ndarray, own_up: np.ndarray, alpha: float, *, chunk: int = 256,
                     progress: Callable[[str], None] | None = None) -> dict | None:
    """The other-face rule's calibration (``[mine] unknown_ratio``; ``openset.calibrate_rule``): the held-out
    single views (store rows ``rows``, their prototypes ``own``, leave-one-out plain distances ``own_d``, scores
    ``own_s`` and face kinds ``own_up``, from :func:`single_view_calibration`) matched against every prototype by
    the label stage's own matcher, so the ratio of the best to the second-best distance is the label decision's.
    Returns the library attributes of ``openset.RATIO_ATTRS``, or None (too few other-face decisions)."""
    from ..label.matcher import make_matcher
    from .openset import calibrate_rule
    if len(rows) == 0 or lib.n_clusters < 2:
        return None
    matcher = make_matcher(lib, lib.config)
    parts = []
    with bar(progress, "unknown rule calibration", total=len(rows), unit="views") as b:
        for i0 in range(0, len(rows), chunk):
            m = matcher.match(store.read_single_views(rows[i0:i0 + chunk]), own_members=own_members(lib, store, rows[i0:i0 + chunk]))
            parts.append((m["distance"], m["score"], m["upright"]))
            b.advance(len(m["distance"]))
    D, S, U = (np.concatenate(a) for a in zip(*parts))
    return calibrate_rule(D, S, U, own, own_d, own_s, own_up, alpha)


def own_members(lib: Library, store: ObjectStore, rows: np.ndarray) -> np.ndarray:
    """(Q,) the library member index of the object of each of the store's single views ``rows`` (-1: not a member):
    with ``[mine] label_members`` a held-out view's own object is not its own neighbour (leave-one-object-out)."""
    mids = {str(o): j for j, o in enumerate(lib.members["object"])}
    ids = np.asarray(store.ids).astype(str)
    return np.array([mids.get(ids[o], -1) for o in np.asarray(store.single_object)[rows]], np.int64)


def view_calibration(lib: Library, store: ObjectStore, rows: np.ndarray, own: np.ndarray, own_d: np.ndarray,
                     own_up: np.ndarray, fallback: list[tuple[float, float]], alpha: float, *, chunk: int = 64,
                     progress: Callable[[str], None] | None = None) -> tuple[dict, dict] | None:
    """The calibration of the distance the label stage scores with ``[mine] view_normalise_calibrate``: the lesser
    of the pose search's scored distance Dr and the view-normalised distance Dv (``mine.viewnorm``), instead of Dr's.

    The held-out single views (store rows ``rows``, their prototypes ``own``, leave-one-out distances ``own_d`` and
    face kinds ``own_up`` from :func:`single_view_calibration`) are matched by the label stage's own matcher with
    their cameras (``single/camera`` of the store), which gives Dr and Dv against the whole prototype.  The
    prototype was built with the view's own object, so each view's leave-one-out distance is carried over by the
    factor view normalisation takes off: d = own_d x min(1, Dv / Dr) (the same object's leave-one-out bias assumed
    for both distances).  Then :func:`split_calibration` as for Dr, and the split-conformal cut (``mine.openset``)
    on the scores of the same views.  Returns (prototype fields ``library.VIEW_CALIBRATION_FIELDS``, {"unknown_view_cut",
    "unknown_view_calibration_views"}), or None when the store keeps no cameras of its single views (a store
    ingested before they were kept: the library keeps the pose search's calibration) or none is left."""
    from ..label.matcher import make_matcher
    got = with_cameras(store, rows)
    if got is None:
        return None
    has, cams = got
    rows, own, own_d, own_up = rows[has], own[has], own_d[has], own_up[has]
    factor = np.ones(len(rows))
    decide, shares, scales_found, kinds, members_dk, scored = [], [], [], [], [], []
    mc = lib.config["mine"]
    # ``[mine] label_size_score``: the held-out views matched with their metric sizes (the store's single/size), decided
    # with it as the label stage decides them (measured, all-stereo seed 0, AUROC / never-mined / known flagged: decided
    # without it, the other terms' calibration as with the key off, 0.941 / 59% / 5%; with it 0.944 / 72% / 5%);
    # a store ingested before the sizes were kept: the term off (None)
    sizes = held_out_sizes(store, rows) if bool(mc.get("label_size_score", False)) and bool(
        mc.get("view_normalise_ratio", False)) else None
    size_mis, ratio_d = [], []
    # ``[mine] unknown_cut_split``: whether each held-out view cuts its object off (the store's single/cut, as ingest
    # found it; -1 or a store written before it: no split)
    got_cut = getattr(store, "single_cut", None)
    cut_of = (np.asarray(got_cut, np.int64)[rows] if bool(mc.get("unknown_cut_split", False)) and got_cut is not None
              else None)
    cut_of = cut_of.astype(bool) if cut_of is not None and (cut_of >= 0).all() else None
    slices = [slice(i0, i0 + chunk) for i0 in range(0, len(rows), chunk)]
    views = [store.read_single_views(rows[sl]) for sl in slices]
    # the chunks are independent: one per thread of the search's pool (searchpool, one torch thread each), each
    # thread with a matcher of its own (a matcher's tilt bank fills a cache of copies as it goes: not to be shared
    # between threads), numpy's BLAS held to one thread around them all (the view normaliser's own hold inside each
    # then leaves nothing behind); results taken in chunk order: the same bits as one chunk after another
    local = threading.local()

    own_member = own_members(lib, store, rows)

    def match(i: int) -> dict:
        if getattr(local, "matcher", None) is None:
            local.matcher = make_matcher(lib, lib.config)
        return local.matcher.match(views[i], cams[slices[i]], sizes=None if sizes is None else sizes[slices[i]],
                                   own_members=own_member[slices[i]])

    with bar(progress, "view-normalised calibration", total=len(rows), unit="views") as b, one_blas_thread():
        for sl, m in zip(slices, ordered_map(match, range(len(slices)))):
            j = np.arange(len(m["distance"]))
            dr, dv = m["scored_distance"][j, own[sl]], m["view_distance"][j, own[sl]]
            good = np.isfinite(dr) & (dr > 0)
            den = np.where(good, dr, 1.0)
            ok = good & np.isfinite(dv)
            factor[sl] = np.where(ok, np.minimum(1.0, np.where(ok, dv, 1.0) / den), 1.0)
            # the decision distances, the own prototype's carried to leave-one-out by the scored distance's own factor
            Dd = np.array(m["distance"], np.float64)
            Dd[j, own[sl]] = Dd[j, own[sl]] * np.where(good, own_d[sl] / den, 1.0)
            decide.append(Dd)
            if sizes is not None:   # the ratio's distances (the decision's without the size), carried alike
                Dq = np.array(m["ratio_distance"], np.float64)
                Dq[j, own[sl]] = Dq[j, own[sl]] * np.where(good, own_d[sl] / den, 1.0)
                ratio_d.append(Dq)
                size_mis.append(m["size_mismatch"])
            members_dk.append(m["member_distance"])
            Dr = np.array(m["scored_distance"], np.float64)   # the scored distances, the own prototype's leave-one-out
            Dr[j, own[sl]] = np.where(good, own_d[sl], Dr[j, own[sl]])
            scored.append(Dr)
            shares.append(m["unseen_share"])
            scales_found.append(m.get("stretch_scale", m["fit_scale"]))   # ``[mine] stretch_refine``: the continuous scale
            kinds.append(m["upright"])
            b.advance(len(j))
    fields, attrs = view_calibrated_fields(own_d, factor, own, own_up, lib.n_clusters, fallback, alpha)
    if bool(mc.get("view_normalise_ratio", False)) and lib.n_clusters > 1:
        unseen = bool(mc.get("view_normalise_unseen", False))
        stretch = bool(mc.get("view_normalise_stretch", False))
        dk = np.concatenate(members_dk)
        with_members = int(mc.get("label_members", 0)) > 0 and np.isfinite(dk).any()
        attrs.update(view_ratio_calibration(np.concatenate(decide), own_d * factor, own, own_up, fields, alpha,
                                            unseen=np.concatenate(shares) if unseen else None,
                                            fit_scale=np.concatenate(scales_found) if stretch else None,
                                            upright=np.concatenate(kinds) if stretch and bool(
                                                mc.get("view_normalise_stretch_face", False)) else None,
                                            members=(dk, np.concatenate(scored), float(mc.get("label_members_within", 0.0)),
                                                     int(mc.get("label_members_top", 3)),
                                                     float(mc.get("label_members_weight", 0.5)),
                                                     bool(mc.get("label_members_score", False)))
                                            if with_members else None,
                                            size=(np.concatenate(size_mis), np.concatenate(ratio_d), np.concatenate(kinds))
                                            if sizes is not None else None,
                                            cut=cut_of))
    return fields, attrs


def held_out_sizes(store: ObjectStore, rows: np.ndarray) -> np.ndarray | None:
    """(Q, 2) the metric footprint radius and height of the store's single views ``rows`` (``single/size``, NaN rows
    for views ingested before the sizes were kept), or None when none of them has one (the size term off)."""
    got = getattr(store, "single_size", None)
    if got is None:
        return None
    got = np.asarray(got, np.float64)[np.asarray(rows, np.int64)]
    return got if np.isfinite(got).all(axis=1).any() else None


def face_kind_scores(d: np.ndarray, own: np.ndarray, own_up: np.ndarray, mu: np.ndarray, sigma: np.ndarray,
                     t_mu: np.ndarray, t_sigma: np.ndarray) -> np.ndarray:
    """``library.match_score`` of distances d (Q,) to prototypes ``own`` by the canonical-face fit (mu, sigma) where
    ``own_up`` and the other-face fit (t_mu, t_sigma) elsewhere (the split of :func:`split_calibration`)."""
    return match_score(d, np.where(own_up, mu[own], t_mu[own]), np.where(own_up, sigma[own], t_sigma[own]))


MIN_FACE_STRETCH_VIEWS = 19   # ``[mine] view_normalise_stretch_face``: a face kind with fewer held-out views keeps the pooled
                              # p-values (with m views a p-value is at least 1 / (m + 1): 19 can reach 0.05)


def view_ratio_calibration(D: np.ndarray, d: np.ndarray, own: np.ndarray, own_up: np.ndarray, fields: dict,
                           alpha: float, unseen: np.ndarray | None = None, fit_scale: np.ndarray | None = None,
                           upright: np.ndarray | None = None, members: tuple | None = None,
                           size: tuple | None = None, cut: np.ndarray | None = None) -> dict:
    """``[mine] view_normalise_ratio``: the held-out views' ratios of their best to their second-best decision distance
    (``openset.best_second_ratio`` of D (Q, K), at the nearest prototype) and the split-conformal cut on the Fisher
    combination (``openset.fisher_combine``) of each view's calibrated score (of d (Q,) at its own prototype) and its
    ratio's p-value among the other views' (``openset.loo_ratio_pvalues``).  Returns {"unknown_view_ratios" (sorted),
    "unknown_view_ratio_cut"}.
    ``unseen`` (Q, K) (``[mine] view_normalise_unseen``; None: off): each view's share of its surface cells the posed
    prototype has not observed (``mine.unseen``), as the matcher gives it; at the nearest prototype, its leave-one-out
    p-value among the other views' (larger shares less conforming) joins the two by Fisher's combination of three
    (``openset.fisher_combine_many``), and the sorted shares are returned too ("unknown_view_unseen").
    ``fit_scale`` (Q, K) (``[mine] view_normalise_stretch``; None: off): each view's scale of the pose search at every
    prototype, as the matcher gives it; the stretch |ln scale| at the nearest prototype (``openset.scale_stretch``) joins
    the combination by its leave-one-out p-value among the other views' (larger stretches less conforming), and the
    sorted stretches are returned too ("unknown_view_stretch").
    ``upright`` (Q, K) (``[mine] view_normalise_stretch_face``, with ``fit_scale``; None: off): each view's face kind at
    every prototype (the canonical face or another), as the matcher gives it; the stretch's p-value is then taken among
    the views decided on the same face kind (a Mondrian split, Vovk, Gammerman & Shafer 2005), and each kind's sorted
    stretches are returned too ("unknown_view_stretch_canonical", "unknown_view_stretch_other"), a kind with fewer than
    ``MIN_FACE_STRETCH_VIEWS`` views keeping the pooled p-values (and no attribute).
    ``members`` (``[mine] label_members``; None: off): (d_k (Q, K), Dr (Q, K), within, top, weight, score), each view's
    k-nearest-member distances as the matcher gives them (its own object left out; NaN where not searched), its scored
    distances (the own prototype's leave-one-out) and the keys label_members_within / _top / _weight / _score: each
    view is decided as the label stage decides it (``label.matcher.members_decide`` on D; within < 1: by D); with
    ``score`` its member statistic at the decided prototype
    (``label.matcher.member_statistic``) joins the combination by its leave-one-out p-value among the other views
    decided on the same prototype (``openset.mondrian_loo_pvalues``; larger less conforming; views without one left out), and
    the statistics with their decided prototypes ("unknown_view_members", "unknown_view_member_classes") and the cut
    on the joined values ("unknown_view_member_cut") are returned too; "unknown_view_ratio_cut" stays the one
    without them (a label stage that cannot find the members uses it).
    ``size`` (``[mine] label_size_score``; None: off): (m (Q, K), Dq (Q, K), upright (Q, K)), each view's metric size
    mismatch at every prototype (``mine.metricsize.size_mismatch``; NaN: none, taken as 0), the distances of its
    best/second-best ratio (the decision's D without the size factor, as the label stage takes the ratio) and its face
    kinds: the ratio is then Dq's, and m at the prototype the shape alone puts nearest (Dq's least;
    ``label.matcher.shape_nearest_size``) joins the combination by its leave-one-out p-value among the other views' of
    the same face kind there (``openset.mondrian_loo_pvalues``, fewer than ``MIN_FACE_STRETCH_VIEWS``: pooled; larger
    less conforming); returned: the sorted m ("unknown_view_size", per kind
    "unknown_view_size_canonical" / "_other"), the cut on the combination with it ("unknown_view_size_cut", with the
    members' p-value when that is joined, "unknown_view_size_members" 1) and the other cuts as without it.
    ``cut`` (Q,) bool (``[mine] unknown_cut_split``; None: off): whether each view cuts its object off (the image border,
    a nearer object); the split-conformal cut on the joined values is then also taken per stratum, the views that cut
    their object off and the whole ones apart (a Mondrian split, Vovk, Gammerman & Shafer 2005: for a new view
    exchangeable with its stratum's, P(flagged) <= alpha whatever the share of cut views among the views labelled),
    returned as "unknown_view_ratio_cut_cut" / "unknown_view_ratio_cut_whole" when each stratum holds at least
    ``MIN_FACE_STRETCH_VIEWS`` views ("unknown_view_ratio_cut" stays the pooled one)."""
    from .openset import (MIN_CLASS_MEMBER_VIEWS, best_second_ratio, fisher_combine_many, loo_ratio_pvalues,
                          mondrian_loo_pvalues, scale_stretch)
    D = np.where(np.isfinite(D), D, np.inf)
    ok = np.isfinite(D).any(axis=1)
    b = np.argmin(D[ok], axis=1)
    r = best_second_ratio(D[ok])[np.arange(len(b)), b]
    if size is not None:   # the ratio of the distances without the size factor, at their least (as the label stage)
        Dq = np.where(np.isfinite(size[1]), size[1], np.inf)[ok]
        bq = np.argmin(Dq, axis=1)
        r = best_second_ratio(Dq)[np.arange(len(bq)), bq]
    xm = None
    if members is not None:   # ``[mine] label_members``: the class as the label stage decides it; the ratio stays the least's
        from ..label.matcher import member_statistic, members_decide
        dk, Dr, within, top, weight, with_score = members
        dk = np.asarray(dk, np.float64)[ok]
        if within >= 1:
            b = members_decide(D[ok], dk, np.asarray(Dr, np.float64)[ok], within, top, weight)
        xm = member_statistic(dk)[np.arange(len(b)), b] if with_score else None
    up = np.asarray(own_up, bool)[ok]
    k = np.asarray(own)[ok]
    s = face_kind_scores(np.asarray(d)[ok], k, up, fields["single_view_mu"], fields["single_view_sigma"],
                         fields["single_view_tilt_mu"], fields["single_view_tilt_sigma"])
    out = {"unknown_view_ratios": np.sort(r)}
    pu = ()
    if unseen is not None:
        u = np.nan_to_num(np.asarray(unseen, np.float64)[ok][np.arange(len(b)), b], nan=1.0)
        out["unknown_view_unseen"], pu = np.sort(u), (loo_ratio_pvalues(u),)
    if fit_scale is not None:
        x = scale_stretch(np.asarray(fit_scale, np.float64)[ok][np.arange(len(b)), b])
        out["unknown_view_stretch"] = np.sort(x)
        if upright is None:
            px = loo_ratio_pvalues(x)
        else:   # ``[mine] view_normalise_stretch_face``: among the views decided on the same face kind
            canon = np.asarray(upright, bool)[ok][np.arange(len(b)), b]
            px = mondrian_loo_pvalues(x, canon, MIN_FACE_STRETCH_VIEWS)   # fewer: that kind keeps the pooled p-values
            for kind, sel in (("canonical", canon), ("other", ~canon)):
                if sel.sum() >= MIN_FACE_STRETCH_VIEWS:
                    out[f"unknown_view_stretch_{kind}"] = np.sort(x[sel])
        pu = pu + (px,)
    joined = fisher_combine_many(s, loo_ratio_pvalues(r), *pu)
    out["unknown_view_ratio_cut"] = conformal_cut(joined, alpha)
    if cut is not None:   # ``[mine] unknown_cut_split``: the cut per stratum, views cutting their object off and whole ones
        c = np.asarray(cut, bool)[ok]
        if min(c.sum(), (~c).sum()) >= MIN_FACE_STRETCH_VIEWS:
            out["unknown_view_ratio_cut_cut"] = conformal_cut(joined[c], alpha)
            out["unknown_view_ratio_cut_whole"] = conformal_cut(joined[~c], alpha)
            # the strata's joined values themselves (sorted): their counts set the label stage's ``[mine]
            # unknown_cut_split_below`` and ``unknown_cut_shrink``
            out["unknown_view_joined_cut"] = np.sort(joined[c])
            out["unknown_view_joined_whole"] = np.sort(joined[~c])
    if xm is not None and np.isfinite(xm).sum() > 1:
        has = np.isfinite(xm)
        order = np.lexsort((xm[has], b[has]))
        out["unknown_view_members"] = xm[has][order]                       # by decided prototype, then value
        out["unknown_view_member_classes"] = b[has][order].astype(np.int64)
        joined = fisher_combine_many(s[has], loo_ratio_pvalues(r)[has], *(p[has] for p in pu),
                                     mondrian_loo_pvalues(xm[has], b[has], MIN_CLASS_MEMBER_VIEWS))
        out["unknown_view_member_cut"] = conformal_cut(joined, alpha)
    if size is not None:   # ``[mine] label_size_score``: the size mismatch at the shape's nearest prototype, per face kind
        from ..label.matcher import shape_nearest_size
        i = np.arange(len(b))
        z, zu = shape_nearest_size(np.asarray(size[0], np.float64)[ok], np.asarray(size[2], bool)[ok], size[1][ok], b)
        z, canon = z[i, b], zu[i, b]
        out["unknown_view_size"] = np.sort(z)
        for kind, sel in (("canonical", canon), ("other", ~canon)):
            if sel.sum() >= MIN_FACE_STRETCH_VIEWS:
                out[f"unknown_view_size_{kind}"] = np.sort(z[sel])
        pz = mondrian_loo_pvalues(z, canon, MIN_FACE_STRETCH_VIEWS)
        with_m = "unknown_view_member_cut" in out
        has = np.isfinite(xm) if with_m else np.ones(len(b), bool)
        extra = (mondrian_loo_pvalues(xm[has], b[has], MIN_CLASS_MEMBER_VIEWS),) if with_m else ()
        joined = fisher_combine_many(s[has], loo_ratio_pvalues(r)[has], *(p[has] for p in pu), *extra, pz[has])
        out["unknown_view_size_cut"] = conformal_cut(joined, alpha)
        out["unknown_view_size_members"] = int(with_m)
    return out


def view_calibrated_fields(own_d: np.ndarray, factor: np.ndarray, own: np.ndarray, own_up: np.ndarray, K: int,
                           fallback: list[tuple[float, float]], alpha: float) -> tuple[dict, dict]:
    """:func:`view_calibration`'s fit from the held-out views' leave-one-out distances ``own_d`` (Q,), the factors
    min(1, Dv / Dr) (Q,), their prototypes ``own`` and face kinds ``own_up``: d = own_d x factor, split by face kind
    (:func:`split_calibration`), and the split-conformal cut at ``alpha`` on the scores of those same d."""
    d = np.asarray(own_d, np.float64) * np.asarray(factor, np.float64)
    own, own_up = np.asarray(own, np.int64), np.asarray(own_up, bool)
    mu, sigma, t_mu, t_sigma = split_calibration(d, own, own_up, K, fallback)
    s = face_kind_scores(d, own, own_up, mu, sigma, t_mu, t_sigma)
    return ({"single_view_mu": mu, "single_view_sigma": sigma, "single_view_tilt_mu": t_mu, "single_view_tilt_sigma": t_sigma},
            {"unknown_view_cut": conformal_cut(s, alpha), "unknown_view_calibration_views": int(len(d))})


def calibration_search(model, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid, cfg: dict):
    """The single-view calibration's face search (``[mine] calibrate_searched``; None when off): each held-out
    view's up direction and whether it is the canonical face, found against its own prototype by the label
    search itself (``mine.viewsearch.ViewSearch``: tilt grid, exact resting directions with ``face_pairs``, the
    finer search of ``label_refine_top``).  The label search picks, per view, the best of many tilted copies, so
    a view of any object, known or not, fits *some* copy better than its object's own face: a calibration on
    the mined face alone expects tilted matches to fit worse than the search makes them fit, and scores a
    never-mined object matched on another face as typical (seed-0 demo: trowels on a tipped L bracket scored
    0.86-0.92).  Searched the same way, the calibration sees the same selection."""
    m = cfg["mine"]
    if not bool(m.get("calibrate_searched", False)):
        return None
    from .viewsearch import ViewSearch
    faces = pad_faces(model.faces_["up"], model.faces_["count"], model.faces_["symmetry"])
    P, V = np.asarray(model.prototypes_, np.float32), np.asarray(model.prototype_weights_, np.float32)
    own: dict[int, ViewSearch] = {}  # one search per prototype: a view is searched against its own only

    def search(xs: np.ndarray, ws: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        if k not in own:
            own[k] = ViewSearch(P[k:k + 1], V[k:k + 1], np.asarray(aspect)[k:k + 1], scales, grid,
                                faces["face_up"][k:k + 1], faces["face_symmetry"][k:k + 1],
                                exact_faces=bool(m.get("face_pairs", False)), refine_top=int(m.get("label_refine_top", 0)))
        _, _, _, up, upright = own[k].poses(xs, ws)
        return up[:, 0], upright[:, 0]
    return search


def view_prototypes(store: ObjectStore, cfg: dict, P: np.ndarray, V: np.ndarray, labels: np.ndarray, face: np.ndarray,
                     face_up: np.ndarray, face_symmetry: np.ndarray, bank: TiltBank | None, scales: tuple[float, ...],
                     min_members: int, *, max_objects: int = 64) -> dict[str, np.ndarray]:
    """View prototypes (``[mine] view_prototype_members``): for every resting face f of prototype k with at least
    ``min_members`` members on it, the observation-weighted mean of the store's single views of those members
    (at most ``max_objects`` of them, evenly spread), each aligned by its own pose search (yaw, scale) to the
    face's reference: the prototype itself on the canonical face, its copy resting on f (``bank.copy_at``)
    otherwise.  So the mean lies in the frame of that face, and it is what one frame of an object resting so
    looks like (the parts a single view hides, the footprint and base centre it misplaces), where the 3-D
    prototype is fused over many views and, on other faces, resampled.  The label search lets them vote on the
    class only (``mine.viewsearch.ViewSearch``): pose and score still come from the 3-D prototype.

    P (K, C, R, A, H), V (K, R, A, H) the library's prototypes (its channel weights); labels, face (N,) the
    members' prototype and resting face; face_up (K, F, 3), face_symmetry (K, F) (-1 = padding).  Returns
    view_owner, view_face (M,), view_features (M, C, R, A, H), view_weights (M, R, A, H) (M = 0: none)."""
    from .engine import align_to_prototype, weighted_means
    m = cfg["mine"]
    K, C, R, A, H = P.shape
    owner, fidx, Ps, Vs = [], [], [], []
    have = set(np.unique(store.single_object).tolist())
    for k in range(K):
        for f in np.flatnonzero(np.asarray(face_symmetry[k]) >= 0):
            objs = np.array([i for i in np.flatnonzero((labels == k) & (face == f)) if int(i) in have], np.int64)
            if len(objs) < max(int(min_members), 1) or (f > 0 and bank is None):
                continue
            objs = spread_pick(objs, max_objects)
            rows = np.flatnonzero(np.isin(store.single_object, objs))
            xs, ws = matching_features(store.read_single_views(rows), free_weight=m["free_weight"],
                                       colour_weight=m["colour_weight"])
            Pr, Vr = (P[k:k + 1], V[k:k + 1]) if f == 0 else (a[None] for a in bank.copy_at(k, face_up[k, f]))
            pm = pose_distances(xs, ws, Pr, Vr, scales=scales)
            ok = np.isfinite(pm.D[:, 0])
            if not ok.any():
                continue
            xa, wa = align_to_prototype(xs[ok], ws[ok], pm.yaw_deg[ok, 0], pm.scale[ok, 0])
            num = np.einsum("nrah,ncrah->crah", wa.astype(np.float64), xa.astype(np.float64))
            pv, vv = weighted_means(num[None], wa.sum(axis=0, dtype=np.float64)[None], np.array([ok.sum()]))
            Ps.append(pv[0])   # as the engine's update: cells no view saw stay exactly 0
            Vs.append(vv[0])
            owner.append(k)
            fidx.append(int(f))
    return {"view_owner": np.asarray(owner, np.int64), "view_face": np.asarray(fidx, np.int64),
            "view_features": np.asarray(Ps, np.float32).reshape(-1, C, R, A, H),
            "view_weights": np.asarray(Vs, np.float32).reshape(-1, R, A, H)}


MIN_CALIBRATION_VIEWS = 5   # fewer views than this: a prototype borrows the pooled spread (or offset)


def split_calibration(d: np.ndarray, k: np.ndarray, upright: np.ndarray, K: int, fallback: list[tuple[float, float]]
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Single-view score calibration, canonical face and other faces apart: (single_mu, single_sigma,
    single_tilt_mu, single_tilt_sigma) (K,) from the held-out views' distances d (Q,) to their prototypes k (Q,),
    ``upright`` (Q,) where the view's object rests on the prototype's canonical face.

    A view of an object on another face is matched against a resampled (tilted) copy, which fits the same
    object worse than the canonical prototype does, so one fit over both kinds puts canonical views of known
    objects too high and tilted ones too low.  Canonical: a robust fit (``log_distance_fit``) of each
    prototype's canonical views (all its views when it has fewer than ``MIN_CALIBRATION_VIEWS`` of them;
    ``fallback`` (mu, sigma) when it has none), sigma at least the pooled median where the views are few.
    Other faces: the prototype's own fit of its tilted views when it has enough, else its canonical fit
    shifted by the median over all tilted views of (ln d - mu_canonical of their prototype), with sigma at least
    the median tilted sigma (no tilted view at all: the canonical fit, the old single calibration).
    """
    ld = np.log(np.maximum(np.asarray(d, np.float64), 1e-12))
    k, upright = np.asarray(k), np.asarray(upright, bool)
    fits, counts = [], []
    for j in range(K):
        own = upright & (k == j)
        sel = own if own.sum() >= MIN_CALIBRATION_VIEWS else k == j
        fits.append(log_distance_fit(d[sel]) if sel.any() else fallback[j])
        counts.append(int(sel.sum()))
    pooled = float(np.median([s for _, s in fits])) if K else 0.1
    mu = np.array([f[0] for f in fits])
    sigma = np.array([max(f[1], pooled) if c < MIN_CALIBRATION_VIEWS else f[1] for f, c in zip(fits, counts)])
    tilted = ~upright
    if not tilted.any():
        return mu, sigma, mu.copy(), sigma.copy()
    offset = float(np.median(ld[tilted] - mu[k[tilted]]))
    own_t = [log_distance_fit(d[tilted & (k == j)]) if (tilted & (k == j)).sum() >= MIN_CALIBRATION_VIEWS else None
             for j in range(K)]
    pooled_t = float(np.median([f[1] for f in own_t if f is not None] or [1.4826 * np.median(np.abs(
        ld[tilted] - mu[k[tilted]] - offset))]))
    t_mu = np.array([f[0] if f is not None else mu[j] + offset for j, f in enumerate(own_t)])
    t_sigma = np.array([f[1] if f is not None else max(sigma[j], pooled_t) for j, f in enumerate(own_t)])
    return mu, sigma, t_mu, t_sigma


def mine_store(store_path: str | Path, library_path: str | Path, cfg: dict, *, seed: int = 0,
               n_clusters: int | None = None, progress: Callable[[str], None] | None = None,
               executor=None, pictures=None) -> tuple[Library, dict]:
    """Mine the store and write the library, and beside it assignments.csv, gallery.png and members/
    (one sheet of member crops per cluster, :mod:`protomine.mine.members`).

    ``pictures`` (an executor with ``submit``, e.g. the demo's process pool): gallery.png and members/ are drawn
    on one of its workers while the caller goes on; ``info["pictures"]`` is then the pending drawing, whose
    ``result()`` (the progress lines, for ``progress.replay``) the caller waits for before anything else writes
    those files.  None: drawn here, before this returns.

    ``executor`` (``protomine.scale.executor``; None = this process, as before) runs the clustering passes,
    the final match and the picture volumes as map-reduces over chunks of objects.
    """
    store = open_store(store_path)
    if len(store) < 2:
        raise InputError(store.path, "objects", f"mining needs at least 2 objects, the store has {len(store)}")
    notices = []
    lifted = store.config.get("volume")
    if lifted is not None:  # a key added since the store was lifted: it was lifted as that key's default does
        lifted = {**{k: v for k, v in asdict(Grid()).items() if k in cfg["volume"]}, **lifted}
    if lifted is not None and lifted != cfg["volume"]:
        # the volumes were lifted with the store's [volume] settings; the library must record those, or
        # labelling would lift single views on another grid than its prototypes
        diff = ", ".join(f"volume.{k}={lifted[k]}" for k in sorted(lifted) if lifted[k] != cfg["volume"].get(k))
        notices.append(f"{store.path} was ingested with {diff}; the config asks for other [volume] settings, "
                       "so the store's are used and recorded in the library")
        cfg = {**cfg, "volume": dict(lifted)}
    notices += older_store_notices(store, cfg)
    say(progress, f"store {store.path.name}: {len(store)} objects, grid {store.grid_shape}")
    model, k_table = fit_engine(store, cfg, seed, n_clusters, progress, executor)
    fitted = np.array(model.prototypes_, copy=True)   # at the clustering's free-space weight
    lib, part = _library_of_fit(store, store_path, cfg, seed, model, k_table, executor, progress, notices)
    weights = free_weight_choices(cfg)
    rates = heldout_own_rates(lib, store, part["rows"], part["own"], part["own_d"], weights, progress=progress) \
        if weights else None
    if rates is not None:   # ``[mine] free_weight_factors``: the held-out views choose the library's free-space weight
        chosen = weights[int(np.argmax(rates))]   # the first of the best: the configured weight wins ties
        say(progress, "free-space weight, held-out views naming their own prototype: " +
            ", ".join(f"{w:g} {r:.3f}" for w, r in zip(weights, rates)) + f"; {chosen:g} kept")
        if chosen != float(cfg["mine"]["free_weight"]):
            model.prototypes_ = fitted
            cfg = {**cfg, "mine": {**cfg["mine"], "free_weight": chosen}}
            lib, part = _library_of_fit(store, store_path, cfg, seed, model, k_table, executor, progress, [])
        lib.attrs.update({"free_weight_choices": json.dumps(weights),
                          "free_weight_own_rates": json.dumps([round(float(r), 6) for r in rates])})
    elif weights:
        notices.append(f"{store.path} keeps no camera directions of its single views; [mine] free_weight_factors "
                       "needs them: the configured free_weight is kept")
    K, vols, protos, grid, prov = part["K"], part["vols"], part["protos"], part["grid"], part["prov"]
    pause_point("inputs_read")
    write_library(library_path, lib)
    out = Path(library_path).parent
    write_assignments(out / "assignments.csv", lib)
    item = (lib, store.path, out, gallery_faces(vols, protos, grid), prov)
    drawn = pictures.submit(draw_pictures, None, item) if pictures is not None else None
    if drawn is None:
        draw_pictures(None, item, progress)
    return lib, {"K": K, "iterations": int(model.n_iter_), "inertia": float(getattr(model, "inertia_", np.nan)),
                 "k_selection": k_table, "notices": notices, "pictures": drawn}


def older_store_notices(store: ObjectStore, cfg: dict) -> list[str]:
    """One notice per single-view field the config's [mine] keys read that ``store`` lacks, because older code wrote
    it: ``single/cut`` (``unknown_cut_split``: the library then has one unknown cut, not the split) and
    ``single/size`` (``label_size_score``: the term stays off).  Mining goes on without them."""
    m, out = cfg["mine"], []
    ratio = bool(m.get("view_normalise_ratio", False))
    if ratio and bool(m.get("unknown_cut_split", False)) and getattr(store, "single_cut", None) is None:
        out.append(f"{store.path} keeps no record of which single views cut their object off (ingested before it was "
                   "kept); [mine] unknown_cut_split needs it: the library gets one unknown cut, not the split. "
                   "Ingest again for the split")
    if ratio and bool(m.get("label_size_score", False)) and getattr(store, "single_size", None) is None:
        out.append(f"{store.path} keeps no metric sizes of its single views (ingested before they were kept); "
                   "[mine] label_size_score needs them: the term stays off. Ingest again for it")
    return out


def _library_of_fit(store: ObjectStore, store_path: str | Path, cfg: dict, seed: int, model, k_table, executor,
                    progress: Callable[[str], None] | None, notices: list[str]) -> tuple[Library, dict]:
    """The library of a fitted model (:func:`mine_store` from the fit on): prototypes at ``[mine] free_weight``, the
    members' alignment and distances, the score's calibrations and the unknown cuts.  Returns it and the parts
    mine_store goes on with: K, the picture volumes, the prototype fields, the tilt grid, the provenance, and the
    held-out single views' store rows, prototypes and leave-one-out scored distances ("rows", "own", "own_d")."""
    reweighted = reweight_free(model, cfg)  # from here on, distances weigh free space by mine.free_weight
    K = int(model.prototypes_.shape[0])
    labels = np.asarray(model.labels_)
    period = period_of(model.symmetry_)
    yaw = np.asarray(model.yaw_deg_, dtype=np.float64)  # modulo each member's face symmetry
    face = np.asarray(model.face_, np.int64)
    grid = getattr(model, "tilts", None)
    grid = None if grid is None or grid.is_identity else grid
    if progress:
        progress(f"{K} prototypes after {model.n_iter_} iterations; aligning members and calibrating scores")
    scales = tuple(cfg["mine"]["scales"])
    if executor is None:
        # pictures from the members on the canonical face (the others would need untilting)
        canon = np.where(face == 0, labels, -1)
        canon = np.where(np.bincount(labels[face == 0], minlength=K)[labels] > 0, canon, labels)
        vols = aligned_mean_volumes(store, canon, yaw, K)
    else:
        from .distributed import StoreSpec, aligned_mean_volumes as dist_mean_volumes, match_all
        vols = dist_mean_volumes(StoreSpec.of(store, cfg), executor, labels, np.asarray(model.yaw_deg_, dtype=np.float64), K)
    # full match table once more: second-best cluster for every member
    if executor is None:
        pm = model.match(store.source(cfg)) if hasattr(model, "match") else None
    else:
        pm = match_all(model, _executor_source(store, cfg, executor))
    dist = np.asarray(model.distance_, dtype=np.float64)
    if pm is not None and reweighted:  # the members' distances with the library's channel weights
        dist = np.asarray(pm.D, np.float64)[np.arange(len(labels)), labels]
    if pm is not None:
        D = np.array(pm.D, dtype=np.float64)
        D[np.arange(len(labels)), labels] = np.inf
        second = np.argmin(D, axis=1) if K > 1 else np.full(len(labels), -1)
        second_d = D[np.arange(len(labels)), second] if K > 1 else np.full(len(labels), np.inf)
    else:
        second, second_d = np.full(len(labels), -1), np.full(len(labels), np.inf)
    fused = [log_distance_fit(dist[labels == k]) for k in range(K)]
    aspect = (np.asarray(model.aspect_, np.float64) if grid is not None else
              np.array([np.median(store_aspect(store, cfg)[labels == k]) if counts_k else 1.0
                        for k, counts_k in enumerate(np.bincount(labels, minlength=K))]))
    bank = TiltBank(model.prototypes_, model.prototype_weights_, aspect, scales, grid) if grid is not None else None
    search = calibration_search(model, aspect, scales, grid, cfg) if bank is not None else None
    sv_up = np.ones(len(store.single_object), bool)  # views matched on the canonical face (the calibration's)
    sv_raw = np.full(len(store.single_object), np.inf)  # their plain pose-search distances (the rule's ratio)
    sv_d, sv_k, reliability = single_view_calibration(store, cfg, model.prototypes_, model.prototype_weights_, labels,
                                                      scales, progress=progress, up=np.asarray(model.up_), bank=bank,
                                                      search=search, upright_out=sv_up, raw_out=sv_raw)
    if bank is not None and search is None:  # each view on its object's mined face (_loo_single_views)
        sv_up = np.asarray(model.up_)[store.single_object, 2] >= np.cos(np.deg2rad(IDENTITY_DEG))
    fin = np.isfinite(sv_d)
    sv_rows = np.flatnonzero(fin)
    sv_k, sv_d, sv_up, sv_raw = sv_k[fin], sv_d[fin], sv_up[fin], sv_raw[fin]
    pooled_f = float(np.median([s for _, s in fused])) if K else 0.1
    fused_mu = np.array([f[0] for f in fused]); fused_sigma = np.array([max(f[1], pooled_f) if np.sum(labels == k) < 5 else f[1] for k, f in enumerate(fused)])
    single_mu, single_sigma, tilt_mu, tilt_sigma = split_calibration(sv_d, sv_k, sv_up, K, fused)
    score = match_score(dist, fused_mu[labels], fused_sigma[labels])
    radius, height = store.objects["radius_m"], store.objects["height_m"]
    gsize = np.sqrt(radius * height)
    counts = np.bincount(labels, minlength=K)
    med_g = np.array([np.median(gsize[labels == k]) if counts[k] else np.nan for k in range(K)])
    size = np.stack([radius, height], 1)
    pct = lambda q: np.array([np.percentile(size[labels == k], q, axis=0) if counts[k] else [np.nan, np.nan] for k in range(K)])
    fit_scale = np.asarray(getattr(model, "scale_", np.ones(len(labels))), dtype=np.float64)
    protos = {
        "features": np.asarray(model.prototypes_, np.float32), "weights": np.asarray(model.prototype_weights_, np.float32),
        "volumes": vols, "symmetry": np.asarray(model.symmetry_, np.int64), "period_deg": period,
        "count": counts, "size_median": pct(50), "size_p10": pct(10), "size_p90": pct(90),
        "fused_mu": fused_mu, "fused_sigma": fused_sigma, "single_mu": single_mu, "single_sigma": single_sigma,
        "cell_reliability": reliability.astype(np.float32),
        "single_tilt_mu": tilt_mu, "single_tilt_sigma": tilt_sigma,
        "origin": ["mined"] * K, "name": [""] * K, "name_example": [""] * K, "aspect": aspect,
        **pad_faces(model.faces_["up"], model.faces_["count"], model.faces_["symmetry"]),
        "symmetry_rotations": pad_quaternions(model.symmetry_rotations_),
    }
    n_view = int(cfg["mine"].get("view_prototype_members", 0))
    if n_view > 0:
        protos.update(view_prototypes(store, cfg, model.prototypes_, model.prototype_weights_, labels, face,
                                      protos["face_up"], protos["face_symmetry"], bank, scales, n_view))
    members = {
        "object": np.array(store.ids, dtype=object), "cluster": labels.astype(np.int64), "yaw_deg": yaw,
        "scale": gsize / med_g[labels], "fit_scale": fit_scale, "distance": dist, "score": score,
        "second_cluster": np.asarray(second, np.int64), "second_distance": np.asarray(second_d, np.float64),
        "face": face, "rotation": world_quaternions(np.asarray(model.rotation_), store.objects["up"]),
    }
    prov = provenance(cfg, seed, {"store": store.fingerprint()}, command="mine")
    attrs = dict(prov)
    attrs.update({"grid": np.array(store.grid_shape), "scales": json.dumps(list(scales)),
                  "store_path": str(Path(store_path).resolve()), "store_fingerprint": store.fingerprint(),
                  "conventions": store.attrs.get("conventions", ""),
                  "tilts": json.dumps((grid or TiltGrid.identity()).to_config()),
                  "k_selection": json.dumps(k_table if k_table is not None else {"given": K}, default=float)})
    # the unknown cut: split-conformal on the held-out single views' scores (mine.openset)
    alpha = float(cfg["mine"]["unknown_alpha"])
    sv_s = face_kind_scores(sv_d, sv_k, sv_up, single_mu, single_sigma, tilt_mu, tilt_sigma)
    attrs.update({"unknown_alpha": alpha, "unknown_calibration_views": int(sv_d.size),
                  "unknown_cut": conformal_cut(sv_s, alpha)})
    lib = Library(protos, members, attrs)
    if bool(cfg["mine"].get("view_normalise_calibrate", False)) and int(cfg["mine"].get("view_normalise_top", 0)) > 0 \
            and bool(cfg["mine"].get("view_normalise_score", False)):
        vc = view_calibration(lib, store, sv_rows, sv_k, sv_d, sv_up, fused, alpha, progress=progress)
        if vc is None:
            notices.append(f"{store.path} keeps no camera directions of its single views (ingested before they were "
                           "kept); [mine] view_normalise_calibrate needs them: re-ingest, meanwhile the library scores "
                           "with the pose search's calibration")
        else:
            lib.prototypes.update(vc[0])
            lib.attrs.update(vc[1])
    if bank is not None and bool(cfg["mine"].get("unknown_ratio", False)):
        rule = rule_calibration(lib, store, sv_rows, sv_k, sv_raw, sv_s, sv_up, alpha, progress=progress)
        if rule is not None:
            lib.attrs.update(rule)
    return lib, {"K": K, "vols": vols, "protos": protos, "grid": grid, "prov": prov, "rows": sv_rows, "own": sv_k,
                 "own_d": sv_d}


def draw_pictures(_, item: tuple, progress: Callable[[str], None] | None = None) -> list:
    """gallery.png and members/ beside a mined library: ``item`` = (library, store path, folder, the gallery's
    other-face pictures (:func:`gallery_faces`), provenance).  Module-level, so that a worker of an executor can
    draw them (``mine_store(pictures=...)``); returns the lines of its progress (``progress.Recorder``) there."""
    from ..progress import Recorder
    from .gallery import render_gallery
    from .members import write_member_sheets
    lib, store_path, out, faces, prov = item
    rec = Recorder() if progress is None else progress
    p = lib.prototypes
    render_gallery(out / "gallery.png", p["volumes"], counts=p["count"], symmetry=p["symmetry"], names=p["name"],
                   faces=faces)
    record_outputs([out / "gallery.png"], prov)
    write_member_sheets(out / "members", lib, open_store(store_path), progress=rec)
    return rec.lines if progress is None else []


def library_gallery_faces(lib: Library) -> list | None:
    """:func:`gallery_faces` of a library read back (the tilt grid it was mined with), for re-rendered galleries."""
    grid = TiltGrid.from_config(lib.tilt_config)
    return gallery_faces(np.asarray(lib.prototypes["volumes"]), lib.prototypes, None if grid.is_identity else grid)


def gallery_faces(vols: np.ndarray, protos: dict, grid: TiltGrid | None) -> list | None:
    """Per prototype the picture of its most common other resting face (``gallery.render_gallery``), or None."""
    if grid is None:
        return None
    out = []
    for k in range(len(vols)):
        cnt = np.asarray(protos["face_count"][k]).copy()
        cnt[0] = 0
        f = int(np.argmax(cnt))
        out.append((volume_on_face(vols[k], float(protos["aspect"][k]), protos["face_up"][k, f], grid), f, int(cnt[f]))
                   if cnt[f] > 0 else None)
    return out


def pad_faces(ups: list[np.ndarray], counts: list[np.ndarray], symmetry: list[np.ndarray]) -> dict[str, np.ndarray]:
    """Per-prototype face lists -> the library's padded arrays face_up (K, F, 3), face_count (K, F),
    face_symmetry (K, F) (-1 = padding)."""
    K, F = len(ups), max((len(u) for u in ups), default=1)
    up = np.zeros((K, F, 3))
    cnt = np.zeros((K, F), np.int64)
    code = np.full((K, F), -1, np.int64)
    for k in range(K):
        f = len(ups[k])
        up[k, :f], cnt[k, :f], code[k, :f] = ups[k], counts[k], symmetry[k]
    return {"face_up": up, "face_count": cnt, "face_symmetry": code}


def world_quaternions(R_obj: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Quaternions (N, 4) [qx, qy, qz, qw] of x_world = R x_prototype + t from rotations R_obj (N, 3, 3)
    object frame <- prototype frame and each object's world up (N, 3) (its frame: ``geometry.plane_basis``)."""
    B = np.stack([plane_basis(u) for u in np.asarray(up, np.float64)]) if len(up) else np.zeros((0, 3, 3))
    return matrix_to_quat(np.swapaxes(B, 1, 2) @ R_obj)


def write_assignments(path: str | Path, lib: Library) -> None:
    """assignments.csv: object,cluster,yaw_deg,scale,distance,score,qx,qy,qz,qw,face (one row per object;
    the quaternion as in README "Outputs"), listed in its folder's provenance manifest (the library's record)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["object", "cluster", "yaw_deg", "scale", "distance", "score", "qx", "qy", "qz", "qw", "face"])
    m = lib.members
    for i in range(len(m["object"])):
        k = int(m["cluster"][i])
        q = m["rotation"][i]
        w.writerow([m["object"][i], k, f"{m['yaw_deg'][i]:.2f}", f"{m['scale'][i]:.4f}",
                    f"{m['distance'][i]:.6g}", f"{m['score'][i]:.4f}", *(f"{v:.6f}" for v in q), int(m["face"][i])])
    write_text(path, buf.getvalue())
    record_outputs([path], provenance_of(lib.attrs))
