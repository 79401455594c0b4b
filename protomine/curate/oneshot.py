"""A new item class from one example: one-shot prototype, store-wide pose search, adding it to a library.

Conventions (see DEVELOPERS.md and :mod:`protomine.mine.posesearch`):

- The one-shot prototype is the example object's own matching features X (C, R, A, H) and observation
  weights W (R, A, H) from the store: fused over its frames when it was seen in several (multi-view), a
  partial volume (W = 0 where unseen) when it was seen in one.  A new scan is brought in with
  ``protomine ingest NEW_CAPTURE --store objects.h5`` first; its object id is then the example.
  Features use the library's channel weights (its recorded ``mine.free_weight`` / ``mine.colour_weight``)
  and the search uses the library's scales, so distances are those of the library.
- Every store object is matched against it over the library's tilts, all yaws and scales
  (``tilts.tilt_pose_distances``): distance d, yaw_deg (object ~= example rolled by yaw, i.e. the object's
  yaw relative to the example, modulo the one-shot symmetry period of its face; 0 for continuous
  symmetry), ``rotation`` [qx, qy, qz, qw] (x_world = R x_example + t, the example's frame taken as the
  prototype frame), ``face`` (the one-shot prototype's faces are the resting faces of the objects that
  match it with a score above the library's unknown cut, grouped by ``faces.group_faces``; face 0 = the
  example's own) and ``scale`` = metric size sqrt(r h) of the object over that of the example
  (``fit_scale`` is the pose search's residual scale).

One-shot score (label-free calibration; documented once, used by ``find`` and ``--add``)
------------------------------------------------------------------------------------------
A single example is a noisier reference than a mined prototype (a mean of many members), so its member
distances are larger.  How much larger is measured on the library itself, with no labels: for every
mined cluster with at least ``MIN_CAL_MEMBERS`` members in the store, its *typical* member (the one at
the median distance to its prototype) serves as a one-shot exemplar and the other members (at most
``MAX_CAL_MEMBERS``, evenly spread) are matched against it.  A robust fit (median, MAD) of those log distances
per cluster (median, 1.4826 MAD of ln d) is pooled over clusters by the median:

    mu_1 = median_k mu_k,   sigma_1 = median_k sigma_k,   score = 1 - T_4((ln d - mu_1) / sigma_1)

i.e. the fraction of a class's instances expected to fit a single exemplar of that class worse than
this object does, the same meaning as ``library.match_score`` of mined prototypes.  It is therefore
comparable with member scores (``--add`` moves a member when its one-shot score beats its current
score) and with the library's unknown cut (``mine.openset``).  When no cluster has enough members the fit falls back to the
bulk of the store: (m, s) = median and 1.4826 MAD of ln d of every other object, mu_1 = m - 2 s,
sigma_1 = s (objects two robust standard deviations closer than the bulk score 0.5).
Single-view calibration of an added prototype: single_mu = mu_1 + median_k(single_mu_k - fused_mu_k),
single_sigma = max(sigma_1, median_k single_sigma_k); on other faces (``single_tilt_mu``, ``single_tilt_sigma``,
when the library has them) the same with the library's median shift single_tilt_mu_k - single_mu_k and
max(single_sigma, median_k single_tilt_sigma_k); the view-normalised calibration (``single_view_mu`` ... ``[mine]
view_normalise_calibrate``, when the library has it) likewise, each field shifted by its median from single_mu_k.
Symmetry of the one-shot prototype: ``symmetry.detect_symmetry`` with the instance noise level
exp(mu_1) / 2 per cell (a distance is a mean squared difference of two noisy instances).

Query expansion (``[mine] find_expand`` = k > 0; default 0 = off)
-----------------------------------------------------------------
A single view shows one side, so its nearest matches are the views of a similar side.  Average query expansion
(Chum et al., "Total Recall", ICCV 2007): the example's k nearest matches (ties by object id) are aligned into its
frame with the poses the search found (yaw and scale undone by ``engine.align_to_prototype``, the tilt by
``TiltBank.untilt_many``, as mining aligns members into their prototype) and fused with the example by
``engine.weighted_means`` (observation-weighted mean; the example weighs 1, a match its one-shot score, so a poor
top match does little), and every object is searched again against the fused prototype, which has seen more
sides.  With ``[mine] find_reciprocal`` = r > 0 a match joins only when it is a k-reciprocal neighbour (Zhong et
al., CVPR 2017): its 2k nearest are each searched against the store as prototypes, and a match passes when fewer
than r other objects are nearer to it than the example.  No match passing: no expansion.  The score of the
expanded search is calibrated the same way with expanded exemplars: a calibration exemplar's other members
alternate (in the order of their mined distance) between two halves; the exemplar is fused with its k nearest of the
first half (weighted by their single-exemplar scores) and the fit uses the second half (near and far members alike;
fitting on the members left after taking the k nearest read the distances as larger than before expansion).
Clusters need ``MIN_CAL_MEMBERS`` + max(k, ``MIN_CAL_MEMBERS``) members in the store.  The prototype returned (and added by ``--add``) is the fused
one; its picture volume fuses the store volumes the same way.

Symmetric re-ranking (``[mine] find_symmetric`` = M > 0; default 64, 0 = off)
-----------------------------------------------------------------------------
The search is one-way: the example is the prototype, so only its side is tilted, scaled and resampled, while each
object stays as gridded about its own visible footprint.  The M nearest objects by distance (ties by object id) are
also searched the other way, each as the one prototype against the example (after expansion: the fused prototype)
as the object (``Matches.reverse``), and ranked by the mean of the two directions; the rest follow by distance
(``ranking_key``, ``Matches.rank_key``).  ``distance`` and ``score`` stay the one-way search's, which the score's
calibration measures.  With ``find_expand`` as well, the expansion takes its k nearest by the symmetric ranking of
the first search, and the expanded search's shortlist is searched both ways again.

k-reciprocal re-ranking (``[mine] find_rerank`` = k > 0; default 13, 0 = off)
------------------------------------------------------------------------------
When the known-class route does not rank, the first ``find_rerank_shortlist`` objects of the ranking above are
re-ranked by their k-reciprocal neighbourhoods among themselves and the example (``curate.rerank``: each is searched
as the one prototype against the others; Zhong et al., CVPR 2017).  ``Matches.rerank`` holds the key; ``distance``,
``score`` and ``both_ways`` stay as above.
With ``[mine] find_member_route`` = r > 0 (default 8) an example the route does not take is first asked by the
library's members: it ranks as a taken route to its nearest cluster by its k nearest members when it is among that
cluster's first r by the margin on the members (``knownclass`` module docstring, 7.; ``_member_route``); only when it
is not does the re-ranking above run.
With ``[mine] find_route_soft`` = k > 0 (off by default) a taken route that shares at most one of its first 10 with
the one-shot ranking is re-ranked too, and ranks by the reciprocal-rank fusion of the route's key and the re-ranked
one (``knownclass.rank_fusion``; ``Matches.route.key`` then holds the fused key, ``prototype`` stays b).
"""
from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from ..atomic import write_text
from ..errors import InputError
from ..ingest.store import ObjectStore
from ..ingest.volume import matching_features
from ..mine.library import Library, log_distance_fit, match_score, read_library, write_library
from ..mine.memberknn import class_knn, cluster_members, load_members, searched_distances, subset, sure_members
from ..mine.engine import align_to_prototype, weighted_means
from ..mine.faces import face_pose, group_faces
from ..mine.openset import library_cut
from ..mine.pipeline import period_of, store_aspect, world_quaternions, write_assignments
from ..mine.symmetry import detect_symmetry
from ..mine.searchpool import pooled
from ..mine.tilts import TiltBank, TiltGrid, rotation_of, tilt_pose_distances
from .cutexample import WithExample, cut_example, find_cut_direction, find_cut_offsets
from .knownclass import (OVERRULE_AGREE_MAX, KnownRoute, example_decision, fused_key, knn_margin, known_route, margin_key, members_key,
                         prototype_scores, rank_fusion, reciprocal_member_rank)
from .names import check_name, refresh_gallery
from .rerank import rerank_pairwise, reranked_key

MIN_CAL_MEMBERS = 3
MAX_CAL_MEMBERS = 64
MATCH_COLUMNS = ("object", "distance", "both_ways", "score", "yaw_deg", "scale", "cluster", "qx", "qy", "qz", "qw",
                 "face", "prototype", "prototype_score")


@dataclass
class OneShotPrototype:
    """features (C, R, A, H), weights (R, A, H), volume (6, R, A, H) store channels; calibration (mu, sigma)."""
    example: str
    features: np.ndarray
    weights: np.ndarray
    volume: np.ndarray
    symmetry: int
    mu: float
    sigma: float
    single_mu: float
    single_sigma: float
    calibration: str                     # "exemplars of N clusters" or "store bulk"
    aspect: float = 1.0                  # grid aspect z_max / rho_max (``tilts.grid_aspect``)
    faces: dict = field(default_factory=dict)  # face_up (F, 3), face_count (F,), face_symmetry (F,)


@dataclass
class Matches:
    """Every store object against the one-shot prototype, in store order; arrays (N,)."""
    prototype: OneShotPrototype
    object: np.ndarray
    distance: np.ndarray
    score: np.ndarray
    yaw_deg: np.ndarray
    scale: np.ndarray
    fit_scale: np.ndarray
    cluster: np.ndarray                 # the object's library cluster, -1 when it is not a member
    rotation: np.ndarray                # (N, 4) quaternions [qx, qy, qz, qw], world <- example frame
    face: np.ndarray                    # (N,) face of the one-shot prototype
    example_index: int = -1             # the example's own row: matched (distance 0) but left out of ``order``
    reverse: np.ndarray | None = None   # (N,) ``[mine] find_symmetric``: the example searched against the object as the
                                        # prototype; NaN beyond the shortlist; None when off
    route: KnownRoute | None = None     # ``[mine] find_prototype``: the known-class route (``curate.knownclass``); None
                                        # when off; when ``route.taken`` its key ranks
    rerank: np.ndarray | None = None    # (N,) ``[mine] find_rerank``: the k-reciprocal re-ranking's key
                                        # (``curate.rerank``), which ranks when the route does not; None when off
    order: np.ndarray = field(init=False)
    rank_key: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        # ascending distance; unmatched (inf) last; ties broken by object id for determinism; the example
        # itself is not a find.  With ``reverse``: the shortlist by its symmetric distance, then the rest by distance
        if self.route is not None and self.route.taken:
            self.rank_key = self.route.key
        elif self.rerank is not None:
            self.rank_key = self.rerank
        else:
            self.rank_key = ranking_key(self.distance, self.reverse)
        order = np.lexsort((self.object.astype(str), self.rank_key))
        self.order = order[order != self.example_index]

    def rows(self, top: int | None = None) -> list[dict]:
        idx = self.order if top is None else self.order[:top]
        # both_ways: the shortlist's symmetric distance (None beyond it or without it; it ranks unless the route or
        # ``[mine] find_rerank`` does)
        taken = self.route is not None and self.route.taken
        bw = None if self.reverse is None else both_ways(self.distance, self.reverse)
        return [{"object": str(self.object[i]), "distance": float(self.distance[i]),
                 "both_ways": (None if taken or bw is None or not np.isfinite(self.reverse[i]) else float(bw[i])),
                 "score": float(self.score[i]),
                 "prototype": int(self.route.cluster) if taken else None,
                 "prototype_score": float(self.route.score[i]) if taken else None,
                 "yaw_deg": float(self.yaw_deg[i]), "scale": float(self.scale[i]), "cluster": int(self.cluster[i]),
                 "rotation": [float(v) for v in self.rotation[i]], "face": int(self.face[i])}
                for i in idx]


def _feature_weights(library: Library, cfg: dict) -> tuple[float, float]:
    m = library.config.get("mine") or cfg["mine"]
    return float(m["free_weight"]), float(m["colour_weight"])


def _check_pair(library: Library, store: ObjectStore) -> None:
    grid = tuple(int(x) for x in np.asarray(library.attrs.get("grid", store.grid_shape)))
    if grid != tuple(store.grid_shape):
        raise InputError(store.path, "grid", f"store grid {tuple(store.grid_shape)} differs from the library's {grid} "
                         f"({library.path}); use the store the library was mined from")


def _features(store: ObjectStore, idx: np.ndarray, weights: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    return matching_features(store.read_volume_at(np.asarray(idx, dtype=np.int64)), free_weight=weights[0], colour_weight=weights[1])


def _calibrate(library: Library, store: ObjectStore, weights: tuple[float, float], scales: tuple[float, ...],
               example_idx: int, d_all: np.ndarray, grid: TiltGrid | None, *, expand: int = 0,
               single: tuple[float, float] | None = None) -> tuple[float, float, str]:
    """(mu_1, sigma_1, how) of the one-shot score (module docstring).  ``expand`` > 0: of an expanded one-shot
    prototype; each exemplar is expanded with its ``expand`` nearest fellow members (weighted by their scores
    under the single-exemplar calibration ``single``) taken from every other member (in the order of their mined
    distance) and the fit uses the rest."""
    m = library.members
    store_index = {oid: i for i, oid in enumerate(store.ids)}
    in_store = np.array([str(o) in store_index for o in m["object"]], dtype=bool)
    exemplars, groups = [], []
    for k in range(library.n_clusters):
        rows = np.flatnonzero((m["cluster"] == k) & in_store & np.isfinite(m["distance"]))
        if len(rows) < MIN_CAL_MEMBERS + (expand and max(expand, MIN_CAL_MEMBERS)):
            continue
        by_d = rows[np.argsort(m["distance"][rows], kind="stable")]
        ex = by_d[len(by_d) // 2]
        others = by_d[by_d != ex]
        others = others[np.unique(np.linspace(0, len(others) - 1, min(len(others), MAX_CAL_MEMBERS + expand)).round().astype(int))]
        exemplars.append(store_index[str(m["object"][ex])])
        groups.append([store_index[str(m["object"][r])] for r in others])
    if exemplars:
        ex_idx = np.array(exemplars)
        Pe, Ve = _features(store, ex_idx, weights)
        flat = np.array(sorted({i for g in groups for i in g}))
        Xo, Wo = _features(store, flat, weights)
        aspects = _aspects(store, ex_idx)
        pm = tilt_pose_distances(Xo, Wo, Pe, Ve, aspect=aspects, scales=scales, grid=grid)
        D = pm.D
        pos = {int(i): j for j, i in enumerate(flat)}
        rows = [np.array([pos[i] for i in g]) for g in groups]
        if expand:
            mu1, sigma1 = single
            P2, V2 = np.empty_like(Pe), np.empty_like(Ve)
            for j, r in enumerate(rows):
                # members alternate (in the order of their mined distance) between the half the exemplar is expanded
                # from and the half the fit measures: the fit sees near and far members alike
                r = r[0::2][np.isfinite(D[r[0::2], j])]
                near = r[np.argsort(D[r, j], kind="stable")[:expand]]
                P2[j], V2[j] = expanded_prototype(Pe[j], Ve[j], Xo[near], Wo[near], pm.yaw_deg[near, j], pm.scale[near, j],
                                                  pm.tilt[near, j], match_score(D[near, j], mu1, sigma1), float(aspects[j]),
                                                  scales, grid)
                rows[j] = rows[j][1::2]
            D = tilt_pose_distances(Xo, Wo, P2, V2, aspect=aspects, scales=scales, grid=grid).D
        fits = [log_distance_fit(D[r, j][np.isfinite(D[r, j])]) for j, r in enumerate(rows)]
        fits = [f for f in fits if np.isfinite(f[0])]
        if fits:
            return float(np.median([f[0] for f in fits])), float(np.median([f[1] for f in fits])), f"exemplars of {len(fits)} clusters"
    others = np.delete(d_all, example_idx)
    ld = np.log(np.maximum(others[np.isfinite(others)], 1e-12))
    if len(ld) < 2:
        raise InputError(store.path, "objects", "one-shot calibration needs a library cluster with >= 3 members "
                         f"or >= 2 other objects in the store, got {len(ld)}")
    med = float(np.median(ld))
    s = max(1.4826 * float(np.median(np.abs(ld - med))), 0.05)
    return med - 2 * s, s, "store bulk"


def find_similar(library: Library, store: ObjectStore, example_id: str, cfg: dict, *, top: int | None = None) -> Matches:
    """Match every store object against a one-shot prototype built from ``example_id``.

    Returns :class:`Matches` (all objects; ``rows(top)`` gives the best ``top``).  See the module docstring.
    """
    _check_pair(library, store)
    ex = store.index_of(str(example_id))
    if top is not None and top < 1:
        raise InputError(None, "--top", f"expected >= 1, got {top}")
    return _find(library, store, ex, cfg)


def _find(library: Library, store: ObjectStore, ex: int, cfg: dict) -> Matches:
    weights = _feature_weights(library, cfg)
    decision = None
    if cfg["mine"].get("find_cut", False) and library.n_clusters >= 1:
        # ``[mine] find_cut``: a cut example decided as the label stage decides a cut view, and searched as the candidate
        # its decided prototype chose (``curate.cutexample``)
        from ..label.matcher import make_matcher
        mt = make_matcher(library, cfg, size=False)    # the route's matcher: the library's grid, checked
        cut_ex = cut_example(store, ex, mt.grid, find_cut_offsets(cfg), find_cut_direction(cfg))
        if cut_ex is not None:
            decision = example_decision(library, store, ex, cfg, cut_ex, matcher=mt)
            c = decision[3]
            if not cfg["mine"].get("find_cut_decide", True):   # the route decides on the store's volume, as without
                decision = example_decision(library, store, ex, cfg, matcher=mt)
            if c > 0 and cfg["mine"].get("find_cut_search", True):
                store = WithExample(store, ex, cut_ex.volumes[c], cut_ex.sizes[c])
    scales = tuple(library.scales)
    X1, W1 = _features(store, np.array([ex]), weights)
    if not np.any(W1 > 0):
        raise InputError(store.path, f"objects[{store.ids[ex]}]", "the example has no observed cell; choose another example")
    chunk = int(cfg["mine"]["chunk_size"])
    grid, aspect = _grid(library), float(_aspects(store, np.array([ex]))[0])
    src = store.source({"mine": {"free_weight": weights[0], "colour_weight": weights[1]}})
    D, yaw, fit, tilt = _search(src, X1, W1, aspect, scales, grid, chunk)
    mu, sigma, how = _calibrate(library, store, weights, scales, ex, D, grid)
    vol1 = store.read_volume_at(np.array([ex]))[0]
    k_exp, r_rec = int(cfg["mine"]["find_expand"]), int(cfg["mine"]["find_reciprocal"])
    n_sym = int(cfg["mine"].get("find_symmetric", 0))
    key, reverse = D, None
    if k_exp and n_sym:   # the expansion takes the nearest by the symmetric ranking
        reverse = _reverse_distances(store, ex, D, X1[0], W1[0], weights, scales, grid, n_sym)
        key = ranking_key(D, reverse)
    nb = _expansion_set(src, store, ex, key, weights, scales, grid, chunk, k_exp, r_rec) if k_exp else np.zeros(0, np.int64)
    if len(nb):
        # average query expansion: the example fused with its nearest matches (their found poses undone),
        # weighted by their one-shot scores; then every object is searched again against the fused prototype
        a = match_score(D[nb], mu, sigma)
        Xn, Wn = _features(store, nb, weights)
        P2, V2 = expanded_prototype(X1[0], W1[0], Xn, Wn, yaw[nb], fit[nb], tilt[nb], a, aspect, scales, grid)
        vols = store.read_volume_at(nb)
        obs = np.clip(vols[:, 2], 0.0, 1.0)
        vol1, v_obs = expanded_prototype(vol1, np.clip(vol1[2], 0.0, 1.0), vols, obs, yaw[nb], fit[nb], tilt[nb], a,
                                         aspect, scales, grid)
        vol1[2] = v_obs                       # the picture's observed channel: the mean observation (mine.aligned)
        X1, W1 = P2[None], V2[None]
        D, yaw, fit, tilt = _search(src, X1, W1, aspect, scales, grid, chunk)
        mu, sigma, how = _calibrate(library, store, weights, scales, ex, D, grid, expand=k_exp, single=(mu, sigma))
        how += f", expanded with {len(nb)} matches"
        reverse = None                        # the expanded search's shortlist is searched both ways again
    if n_sym and reverse is None:
        reverse = _reverse_distances(store, ex, D, X1[0], W1[0], weights, scales, grid, n_sym)
    p = library.prototypes
    off = float(np.median(np.asarray(p["single_mu"]) - np.asarray(p["fused_mu"]))) if library.n_clusters else 0.0
    s_sigma = max(sigma, float(np.median(p["single_sigma"]))) if library.n_clusters else sigma
    symmetry = int(detect_symmetry(X1, W1, np.exp(mu) / 2.0)[0])
    score = np.where(np.isfinite(D), match_score(D, mu, sigma), 0.0)
    # the one-shot prototype's faces: where the objects that fit it rest (face 0 = the example's own)
    R_obj = rotation_of(grid or TiltGrid.identity(), tilt, yaw)
    fit_ok = score >= library_cut(library)
    ups, counts, _ = group_faces(R_obj[fit_ok, 2, :], np.zeros(int(fit_ok.sum()), np.int64), 1)
    bank = TiltBank(X1, W1, [aspect], scales, grid) if grid is not None and len(ups[0]) > 1 else None
    # each other face's symmetry on its own: on the tilt search's thread pool (searchpool.pooled), in face order (copy_at's
    # one write, the prototype's solid cells, is the same from any thread)
    fsym = [symmetry] + pooled(lambda u: int(detect_symmetry(*(a[None] for a in bank.copy_at(0, u)),
                                                              np.exp(mu) / 2.0)[0]),
                                list(ups[0][1:])) if bank is not None else [symmetry] * len(ups[0])
    face, R_obj, yaw = face_pose(R_obj, ups[0], np.array(fsym))
    faces = {"face_up": ups[0], "face_count": np.bincount(face[fit_ok], minlength=len(ups[0])),
             "face_symmetry": np.array(fsym, np.int64)}
    proto = OneShotPrototype(str(store.ids[ex]), X1[0], W1[0], vol1, symmetry,
                             mu, sigma, mu + off, s_sigma, how, aspect, faces)
    gsize = np.sqrt(store.objects["radius_m"] * store.objects["height_m"])
    cl = {str(o): int(k) for o, k in zip(library.members["object"], library.members["cluster"])}
    route = None
    t_route = float(cfg["mine"].get("find_prototype", 0.0))
    if t_route > 0 and library.n_clusters >= 1:   # the known-class route (``curate.knownclass``)
        p = library.prototypes
        Dk, _, _, tk = _search_many(src, np.asarray(p["features"], np.float32), np.asarray(p["weights"], np.float32),
                                    np.asarray(p["aspect"], np.float64), scales, grid, chunk, poses=True)
        # the example's own distance for ``find_prototype_fuse``: both ways on the symmetric shortlist, one-way beyond
        d1 = both_ways(D, reverse)
        route = known_route(library, store, ex, cfg, Dk, tk, grid, ranking_key(D, reverse), t_route,
                            float(cfg["mine"].get("find_prototype_weak", 0.0)), int(cfg["mine"].get("find_overrule", 0)),
                            d1, float(cfg["mine"].get("find_prototype_fuse", 0.0)), decision)
    k_mem = int(cfg["mine"].get("find_members", 0))
    m_max = float(cfg["mine"].get("find_members_margin", 0.0))
    if k_mem > 0 and route is not None and route.taken:   # the taken route's shortlist by its members (``curate.knownclass``)
        route = _by_members(library, store, ex, route, both_ways(D, reverse), weights, scales, grid, k_mem,
                            int(cfg["mine"].get("find_members_shortlist", 48)),
                            float(cfg["mine"].get("find_prototype_fuse", 0.0)), m_max)
    r_mr = int(cfg["mine"].get("find_member_route", 0))
    if r_mr > 0 and k_mem > 0 and route is not None and not route.taken:   # the member route (``curate.knownclass``, 7.)
        route = _member_route(library, store, ex, route, Dk, tk, X1[0], W1[0], both_ways(D, reverse), weights, scales,
                              grid, k_mem, int(cfg["mine"].get("find_members_shortlist", 48)),
                              float(cfg["mine"].get("find_prototype_fuse", 0.0)), r_mr, m_max)
    rerank = None
    k_rr = int(cfg["mine"].get("find_rerank", 0))
    k_soft = int(cfg["mine"].get("find_route_soft", 0))
    # ``[mine] find_route_soft``: a taken route that shares at most OVERRULE_AGREE_MAX with the one-shot ranking is
    # fused with the ranking the example would fall back to (``knownclass.rank_fusion``)
    soft = k_soft > 0 and route is not None and route.taken and route.agree <= OVERRULE_AGREE_MAX
    if k_rr > 0 and (route is None or not route.taken or soft):   # k-reciprocal re-ranking of the shortlist (``curate.rerank``)
        # ``[mine] find_rerank_anchors``: the prototypes as anchor nodes, by the route's search of every object (``Dk``)
        anchor_d = Dk if route is not None and bool(cfg["mine"].get("find_rerank_anchors", False)) else None
        rerank = _reranked(store, ex, D, ranking_key(D, reverse), X1[0], W1[0], aspect, weights, scales, grid, k_rr,
                           int(cfg["mine"].get("find_rerank_shortlist", 48)),
                           float(cfg["mine"].get("find_rerank_weight", 0.3)), anchor_d)
    if soft:
        own = rerank if rerank is not None else ranking_key(D, reverse)
        route = replace(route, key=rank_fusion([route.key, own], np.asarray(store.ids).astype(str), ex, k_soft))
    return Matches(proto, np.asarray(store.ids, dtype=object), D, score, yaw,
                   gsize / gsize[ex], fit, np.array([cl.get(str(o), -1) for o in store.ids], dtype=np.int64),
                   world_quaternions(R_obj, store.objects["up"]), face, ex, reverse, route, rerank)


def _by_members(library: Library, store: ObjectStore, ex: int, route: KnownRoute, d1: np.ndarray,
                weights: tuple[float, float], scales: tuple[float, ...], grid: TiltGrid | None, k: int, n: int,
                fuse: float, margin_max: float = 0.0) -> KnownRoute:
    """``[mine] find_members``: the taken route with its first ``n`` objects (by its key; the example left out) ranked
    by the margin on the library's members (``knownclass.knn_margin``, k nearest per cluster; fused with the example's
    own distance d1 (N,) as the route is with ``fuse`` > 0), the rest after them in the route's order.  Unchanged
    when the members' volumes cannot be found (``mine.memberknn.load_members``)."""
    short = _nearest(store, ex, route.key)[:n]
    mem = _find_members(library, weights, store, margin_max) if len(short) >= 2 else None
    if mem is None:
        return route
    km = _member_margins(store, short, mem, route.cluster, library.n_clusters, weights, scales, grid, k)
    sk = fused_key(km, np.asarray(d1, np.float64)[short], fuse) if fuse > 0 else km
    return replace(route, key=members_key(route.key, short, sk, np.asarray(store.ids).astype(str)))


def _find_members(library: Library, weights: tuple[float, float], store: ObjectStore, margin_max: float):
    """The members find searches (``mine.memberknn.load_members``), those mining assigned with a margin of at least
    ``margin_max`` left out (``[mine] find_members_margin``, ``memberknn.sure_members``); None when not found."""
    mem = load_members(library, weights[0], weights[1], store)
    if mem is None or margin_max <= 0:
        return mem
    return subset(mem, sure_members(library, margin_max))


def _member_margins(store: ObjectStore, rows: np.ndarray, mem, c: int, K: int, weights: tuple[float, float],
                    scales: tuple[float, ...], grid: TiltGrid | None, k: int) -> np.ndarray:
    """The margins (n,) on the members ``mem`` (``memberknn.load_members``) of the store's ``rows`` (n,) for cluster
    c (``knownclass.knn_margin``, k nearest per cluster; at most MEMBER_CAP members of each cluster searched), an
    object never its own neighbour."""
    Xs, Ws = _features(store, rows, weights)
    mcl = mem.cluster
    own = cluster_members(mcl, c)
    rest = np.sort(np.concatenate([cluster_members(mcl, j) for j in range(K) if j != c] + [np.zeros(0, np.int64)]))
    # c's members each as the one prototype, as find searches its example (every tilt refined); the other members in
    # one search, as mining assigns to its prototypes (a quarter of the CPU)
    every = np.arange(len(rows))
    Dm = searched_distances(Xs, Ws, mem.P, mem.V, mem.aspect, [(every, [j]) for j in own] + [(every, rest)], scales, grid)
    ids = np.asarray(store.ids).astype(str)
    Dm[ids[rows][:, None] == mem.ids[None, :]] = np.inf   # not its own neighbour
    return knn_margin(Dm, mcl, K, c, k)


def _member_route(library: Library, store: ObjectStore, ex: int, route: KnownRoute, Dk: np.ndarray, tk: np.ndarray,
                  x: np.ndarray, w: np.ndarray, d1: np.ndarray, weights: tuple[float, float], scales: tuple[float, ...],
                  grid: TiltGrid | None, k: int, n: int, fuse: float, r: int, margin_max: float = 0.0) -> KnownRoute:
    """``[mine] find_member_route``: an untaken route asked again by the members (``knownclass`` module docstring, 7.).
    c = the example's nearest cluster by its k nearest members (x (C, R, A, H), w (R, A, H) searched against every
    member, one bank per cluster); c's first ``n`` objects by the prototype's key (fused with the example's own distance
    d1 (N,) when ``fuse`` > 0) and the example are searched against the members as the taken route's are
    (``_by_members``); the route to c is taken when fewer than r of them have a lower margin than the example, and
    ranks as a taken route to c.  Else the route comes back untaken with its ``member_rank``.  Unchanged when the
    members' volumes cannot be found."""
    mem = _find_members(library, weights, store, margin_max)
    if mem is None:
        return route
    K, mcl = library.n_clusters, mem.cluster
    ids = np.asarray(store.ids).astype(str)
    De = searched_distances(x[None], w[None], mem.P, mem.V, mem.aspect,
                            [(np.zeros(1, np.int64), cluster_members(mcl, c)) for c in range(K)], scales, grid)
    De[0, mem.ids == ids[ex]] = np.inf                       # not its own neighbour (an example from the mined store)
    kd = class_knn(De, mcl, K, k)[0]
    if not np.isfinite(kd).any():
        return route
    c = int(np.argmin(kd))
    base = margin_key(Dk, c)
    if fuse > 0:
        base = fused_key(base, d1, fuse)
    short = _nearest(store, ex, base)[:n]
    if len(short) < 2:                                        # nothing to be a reciprocal neighbour among
        return route
    km = _member_margins(store, np.concatenate([short, [ex]]), mem, c, K, weights, scales, grid, k)
    rank = reciprocal_member_rank(km[:-1], float(km[-1]))
    if rank >= r:
        return replace(route, member_rank=rank)
    sk = fused_key(km[:-1], np.asarray(d1, np.float64)[short], fuse) if fuse > 0 else km[:-1]
    d, sc = prototype_scores(library, store, Dk, tk, grid, c)
    return replace(route, cluster=c, taken=True, key=members_key(base, short, sk, ids), distance=d, score=sc,
                   member_rank=rank)


def _reranked(store: ObjectStore, ex: int, D: np.ndarray, key: np.ndarray, x: np.ndarray, w: np.ndarray, aspect: float,
              weights: tuple[float, float], scales: tuple[float, ...], grid: TiltGrid | None, k: int, n: int,
              weight: float, anchor_d: np.ndarray | None = None) -> np.ndarray | None:
    """``[mine] find_rerank``: the k-reciprocal key (N,) of the first ``n`` objects by ``key`` (ties by object id; the
    example and unmatched objects left out), the rest after them (``curate.rerank``); None with fewer than 2 to
    re-rank.  x (C, R, A, H), w (R, A, H): the one-shot prototype, the example's row of the pairwise search is D.
    ``anchor_d`` (N, K): every store object's distance to the library's prototypes (the route's search), the
    prototypes then anchor nodes of the re-ranking (``[mine] find_rerank_anchors``; ``curate.rerank``, 5.)."""
    short = _nearest(store, ex, key)[:n]
    if len(short) < 2:
        return None
    Xs, Ws = _features(store, short, weights)
    X = np.concatenate([x[None], Xs]); W = np.concatenate([w[None], Ws])
    aspects = np.concatenate([[aspect], _aspects(store, short)])
    pair = rerank_pairwise(X, W, aspects, scales, grid, np.concatenate([[0.0], D[short]]))
    anchors = None if anchor_d is None or not np.asarray(anchor_d).shape[1] else np.asarray(anchor_d)[np.concatenate([[ex], short])]
    return reranked_key(key, short, pair, k, weight, anchors)


def _search(src, P: np.ndarray, V: np.ndarray, aspect: float, scales: tuple[float, ...], grid: TiltGrid | None,
            chunk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(D, yaw_deg, fit_scale, tilt) (N,) of every object of ``src`` against the one prototype P (1, C, R, A, H)."""
    D, yaw, fit, tilt = _search_many(src, P, V, [aspect], scales, grid, chunk, poses=True)
    return D[:, 0], yaw[:, 0], fit[:, 0], tilt[:, 0]


def _search_many(src, P: np.ndarray, V: np.ndarray, aspect, scales: tuple[float, ...], grid: TiltGrid | None,
                 chunk: int, *, poses: bool = False):
    """Distances (N, M) of every object of ``src`` to M prototypes P (M, C, R, A, H) with aspects (M,); with
    ``poses`` also their yaw_deg, fit scale and tilt (N, M): (D, yaw, fit, tilt)."""
    N, M = len(src), len(P)
    D, yaw, fit = (np.empty((N, M), np.float64) for _ in range(3))
    tilt = np.zeros((N, M), np.int64)
    for i0 in range(0, N, chunk):
        X, W = src.read(i0, min(N, i0 + chunk))
        pm = tilt_pose_distances(X, W, P, V, aspect=aspect, scales=scales, grid=grid)
        D[i0:i0 + len(X)] = pm.D
        if poses:
            yaw[i0:i0 + len(X)], fit[i0:i0 + len(X)], tilt[i0:i0 + len(X)] = pm.yaw_deg, pm.scale, pm.tilt
    return (D, yaw, fit, tilt) if poses else D


def _reverse_distances(store: ObjectStore, ex: int, D: np.ndarray, x: np.ndarray, w: np.ndarray,
                       weights: tuple[float, float], scales: tuple[float, ...], grid: TiltGrid | None, n: int) -> np.ndarray:
    """Reverse distances (N,) of the ``n`` nearest objects by D (ties by object id; the example and unmatched objects
    left out): the one-shot prototype x (C, R, A, H), w (R, A, H) searched as the object against each of them as the
    prototype (tilts x yaw x scale, one search per object, so each gets the tilt refinement a find gives its
    prototype); NaN elsewhere."""
    short = _nearest(store, ex, D)[:n]
    rev = np.full(len(D), np.nan)
    if len(short):
        Xs, Ws = _features(store, short, weights)
        aspects = _aspects(store, short)
        for i, j in enumerate(short):
            rev[j] = tilt_pose_distances(x[None], w[None], Xs[i:i + 1], Ws[i:i + 1], aspect=aspects[i:i + 1],
                                         scales=scales, grid=grid).D[0, 0]
    return rev


def _nearest(store: ObjectStore, ex: int, key: np.ndarray) -> np.ndarray:
    """Store rows by ascending ``key`` (ties by object id), the example and unmatched (not finite) objects left out:
    the order the symmetric shortlist, the expansion and the re-ranking take their first matches in."""
    order = np.lexsort((np.asarray(store.ids).astype(str), key))
    return order[(order != ex) & np.isfinite(key[order])]


def ranking_key(distance: np.ndarray, reverse: np.ndarray | None) -> np.ndarray:
    """The key ``find`` ranks by (ascending): the distance; with reverse distances (``[mine] find_symmetric``) the
    objects that have one (the shortlist) by the mean of the two directions, then every other object by its distance,
    offset past the shortlist's keys (so a key's order is the ranking; unmatched objects stay inf, last)."""
    d = np.asarray(distance, np.float64)
    if reverse is None:
        return d
    key = both_ways(d, reverse)
    has = np.isfinite(np.asarray(reverse, np.float64)) & np.isfinite(d)
    if has.any():
        rest = ~has & np.isfinite(d)
        key[rest] = d[rest] + key[has].max() + 1.0
    return key


def both_ways(distance: np.ndarray, reverse: np.ndarray | None) -> np.ndarray:
    """The example's distance to each object (N,): the mean of the two directions where the reverse search ran (the
    ``find_symmetric`` shortlist), the one-way distance elsewhere (a new array)."""
    d = np.array(distance, np.float64)
    if reverse is None:
        return d
    r = np.asarray(reverse, np.float64)
    has = np.isfinite(r) & np.isfinite(d)
    d[has] = 0.5 * (d[has] + r[has])
    return d


def _expansion_set(src, store: ObjectStore, ex: int, D: np.ndarray, weights: tuple[float, float],
                   scales: tuple[float, ...], grid: TiltGrid | None, chunk: int, k: int, r: int) -> np.ndarray:
    """Store rows (<= k,) of the matches the example is expanded with: its k nearest by D (the distance, or the
    symmetric ranking key with ``[mine] find_symmetric``; ties by object id) that
    pass the reciprocal check, best first.  Check (r > 0): the 2k nearest are each searched against the
    whole store as prototypes; a match passes when fewer than r other objects are nearer to it than the
    example (the example is among its r nearest: k-reciprocal neighbours, Zhong et al., CVPR 2017)."""
    nb = _nearest(store, ex, D)
    if r > 0:
        pool = nb[:2 * k]
        Dp = _search_many(src, *_features(store, pool, weights), _aspects(store, pool), scales, grid, chunk)
        Dp[pool, np.arange(len(pool))] = np.inf                 # a match is not its own neighbour
        nb = pool[np.sum(Dp < Dp[ex][None, :], axis=0) < r]
    return nb[:k]


def expanded_prototype(x: np.ndarray, w: np.ndarray, Xn: np.ndarray, Wn: np.ndarray, yaw_deg: np.ndarray,
                       fit_scale: np.ndarray, tilt: np.ndarray, a: np.ndarray, aspect: float,
                       scales: tuple[float, ...], grid: TiltGrid | None) -> tuple[np.ndarray, np.ndarray]:
    """The example x (C, R, A, H), w (R, A, H) fused with matches Xn (n, C, R, A, H), Wn (n, R, A, H) aligned into
    its frame by their found poses (yaw, fit scale, tilt), each weighted by a (n,): (P (C, R, A, H), V (R, A, H))."""
    wx = np.concatenate([Wn[:, None] * Xn, Wn[:, None]], axis=1)          # (n, C + 1, R, A, H)
    al, alw = align_to_prototype(wx, Wn, yaw_deg, fit_scale)                # undo yaw and scale: the copy's frame
    al[:, :-1] *= alw[:, None] > 0                                          # cells scaled in from outside the grid: unknown
    al[:, -1] = alw
    if grid is not None and len(Xn):
        al = TiltBank(x[None], w[None], [aspect], scales, grid).untilt_many(np.zeros(len(Xn), np.int64), tilt, al)
    a = np.asarray(a, np.float64)
    num = x * w[None] + np.tensordot(a, al[:, :-1], axes=1)
    den = w + np.tensordot(a, al[:, -1], axes=1)
    P, V = weighted_means(num[None], den[None], np.array([1.0 + a.sum()]))
    return P[0], V[0]


def _grid(library: Library) -> TiltGrid | None:
    grid = TiltGrid.from_config(library.tilt_config)
    return None if grid.is_identity else grid


def _aspects(store: ObjectStore, idx: np.ndarray) -> np.ndarray:
    """Grid aspects (n,) of store objects ``idx`` under the store's lifting margins."""
    return store_aspect(store, {})[np.asarray(idx)]


def write_matches(path: str | Path, matches: Matches, top: int | None = None) -> Path:
    """matches.csv (atomic), best first: object, distance (the one-way search's), both_ways (``[mine]
    find_symmetric``: the mean of the search both ways, which ranks the shortlist; empty beyond it), score,
    yaw_deg, scale, cluster, rotation (qx, qy, qz, qw), face."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(MATCH_COLUMNS)
    for r in matches.rows(top):
        both = "" if r["both_ways"] is None else f"{r['both_ways']:.6g}"
        w.writerow([r["object"], f"{r['distance']:.6g}", both, f"{r['score']:.4f}", f"{r['yaw_deg']:.2f}",
                    f"{r['scale']:.4f}", r["cluster"], *(f"{v:.6f}" for v in r["rotation"]), r["face"],
                    "" if r["prototype"] is None else r["prototype"],
                    "" if r["prototype_score"] is None else f"{r['prototype_score']:.4f}"])
    write_text(path, buf.getvalue())
    return Path(path)


def add_oneshot(library_path: str | Path, store: ObjectStore, example_id: str, cfg: dict, *, name: str,
                matches: Matches | None = None) -> tuple[Library, dict]:
    """Add the one-shot prototype of ``example_id`` to the library as a new named cluster.

    Members whose one-shot score beats their current score move to it; store objects that are not yet
    members join it when its score beats their best mined score (others stay out).  Nothing else changes:
    other prototypes, their statistics and the other members are kept as they are (counts are updated).
    Rewrites the library atomically, and assignments.csv / gallery.png beside it when present.
    Returns (library, summary).
    """
    name = check_name(name)
    library_path = Path(library_path)
    lib = read_library(library_path)
    _check_pair(lib, store)
    ex = store.index_of(str(example_id))
    if matches is None or matches.prototype.example != str(example_id):
        matches = _find(lib, store, ex, cfg)
    return _add(lib, library_path, store, matches, name, cfg)


def _add(lib: Library, path: Path, store: ObjectStore, mt: Matches, name: str, cfg: dict) -> tuple[Library, dict]:
    K = lib.n_clusters
    m = {k: np.asarray(v).copy() for k, v in lib.members.items()}
    sidx = {oid: i for i, oid in enumerate(store.ids)}
    member_rows = np.array([sidx.get(str(o), -1) for o in m["object"]])
    present = member_rows >= 0
    s1 = np.full(len(member_rows), -1.0)
    s1[present] = mt.score[member_rows[present]]
    move = present & (s1 > m["score"])
    moved_from = {int(k): int(c) for k, c in zip(*np.unique(m["cluster"][move], return_counts=True))}
    # store objects the library does not know yet: join the new cluster when it beats every mined one
    known = set(str(o) for o in m["object"])
    new = np.array([i for i, o in enumerate(store.ids) if str(o) not in known], dtype=np.int64)
    join = np.zeros(0, np.int64)
    best_k = np.zeros(0, np.int64)
    best_d = np.zeros(0)
    if len(new):
        weights = _feature_weights(lib, cfg)
        X, W = _features(store, new, weights)
        pm = tilt_pose_distances(X, W, lib.prototypes["features"], lib.prototypes["weights"], aspect=lib.prototypes["aspect"],
                                 scales=tuple(lib.scales), grid=_grid(lib))
        sc = np.where(np.isfinite(pm.D), lib.score(pm.D, np.arange(K)[None, :], single_view=False), 0.0) if K else np.zeros((len(new), 0))
        best = sc.max(axis=1) if K else np.full(len(new), -1.0)
        ok = mt.score[new] > best
        join = new[ok]
        best_k = np.argmax(sc, axis=1)[ok] if K else np.full(ok.sum(), -1)
        best_d = pm.D[np.flatnonzero(ok), best_k] if K else np.full(ok.sum(), np.inf)
    rows_new = np.concatenate([member_rows[move], join])
    gsize = np.sqrt(store.objects["radius_m"] * store.objects["height_m"])
    med_g = float(np.median(gsize[rows_new]))
    period = float(period_of(np.array([mt.prototype.symmetry]))[0])
    upd = {"cluster": K, "yaw_deg": mt.yaw_deg, "scale": gsize / med_g, "fit_scale": mt.fit_scale,
           "distance": mt.distance, "score": mt.score, "face": mt.face, "rotation": mt.rotation}
    m["second_cluster"][move] = m["cluster"][move]
    m["second_distance"][move] = m["distance"][move]
    for f, v in upd.items():
        m[f][move] = v if np.isscalar(v) else np.asarray(v)[member_rows[move]]
    if len(join):
        extra = {"object": np.asarray(store.ids, dtype=object)[join], "cluster": np.full(len(join), K),
                 "second_cluster": best_k, "second_distance": best_d}
        extra.update({f: np.asarray(v)[join] for f, v in upd.items() if f != "cluster"})
        m = {f: np.concatenate([m[f], np.asarray(extra[f]).astype(m[f].dtype)]) for f in m}
    p = {k: np.asarray(v) for k, v in lib.prototypes.items()}
    op = mt.prototype
    size = np.stack([store.objects["radius_m"][rows_new], store.objects["height_m"][rows_new]], 1)
    new_proto = {
        "features": op.features[None].astype(p["features"].dtype), "weights": op.weights[None].astype(p["weights"].dtype),
        "volumes": op.volume[None].astype(p["volumes"].dtype), "symmetry": np.array([op.symmetry]),
        "period_deg": np.array([period]), "count": np.array([0]),
        "size_median": np.percentile(size, 50, axis=0)[None], "size_p10": np.percentile(size, 10, axis=0)[None],
        "size_p90": np.percentile(size, 90, axis=0)[None], "fused_mu": np.array([op.mu]), "fused_sigma": np.array([op.sigma]),
        "single_mu": np.array([op.single_mu]), "single_sigma": np.array([op.single_sigma]),
        "cell_reliability": np.ones((1, p["weights"].shape[1], p["weights"].shape[3]), np.float32),  # (1, R, H)
        "origin": np.array(["one-shot"], dtype=object), "name": np.array([name], dtype=object),
        "name_example": np.array([op.example], dtype=object), "aspect": np.array([op.aspect]),
        **{f: v[None] for f, v in _padded_faces(op.faces, p["face_up"].shape[1]).items()},
    }
    F = max(p["face_up"].shape[1], new_proto["face_up"].shape[1])
    for f, fill in (("face_up", 0.0), ("face_count", 0), ("face_symmetry", -1)):
        p[f] = _pad_axis1(p[f], F, fill)
        new_proto[f] = _pad_axis1(new_proto[f], F, fill)
    if "single_tilt_mu" in p:  # other faces: the library's median shift from the canonical calibration
        new_proto["single_tilt_mu"] = np.array([op.single_mu + float(np.median(p["single_tilt_mu"] - p["single_mu"]))])
        new_proto["single_tilt_sigma"] = np.array([max(op.single_sigma, float(np.median(p["single_tilt_sigma"])))])
    if "single_view_mu" in p:  # the view-normalised calibration ([mine] view_normalise_calibrate): the same shifts
        for kind, base in (("single_view_mu", op.single_mu), ("single_view_tilt_mu", op.single_mu)):
            new_proto[kind] = np.array([base + float(np.median(p[kind] - p["single_mu"]))])
        for kind in ("single_view_sigma", "single_view_tilt_sigma"):
            new_proto[kind] = np.array([max(op.single_sigma, float(np.median(p[kind])))])
    if "symmetry_rotations" in p:  # a one-shot prototype: no symmetry that moves up is tested (identity only)
        new_proto["symmetry_rotations"] = _pad_axis1(np.array([[[0.0, 0.0, 0.0, 1.0]]]), p["symmetry_rotations"].shape[1], 0.0)
    protos = {k: np.concatenate([p[k].astype(object) if p[k].dtype == object else p[k], new_proto[k].astype(p[k].dtype)])
              for k in p if k in new_proto}
    protos["count"] = np.bincount(m["cluster"].astype(np.int64), minlength=K + 1)
    out = Library(protos, m, dict(lib.attrs), path)
    write_library(path, out)
    assignments = path.parent / "assignments.csv"
    if assignments.is_file():
        write_assignments(assignments, out)
    refresh_gallery(out, path)
    return out, {"cluster": K, "name": name, "members": int(protos["count"][K]), "moved": int(move.sum()),
                 "moved_from": moved_from, "joined_new_objects": int(len(join)), "symmetry": op.symmetry,
                 "calibration": op.calibration, "mu": op.mu, "sigma": op.sigma}


def _padded_faces(faces: dict, F: int) -> dict[str, np.ndarray]:
    n = max(F, len(faces["face_up"]))
    return {"face_up": _pad_axis1(np.asarray(faces["face_up"])[None], n, 0.0)[0],
            "face_count": _pad_axis1(np.asarray(faces["face_count"])[None], n, 0)[0],
            "face_symmetry": _pad_axis1(np.asarray(faces["face_symmetry"])[None], n, -1)[0]}


def _pad_axis1(a: np.ndarray, n: int, fill) -> np.ndarray:
    """Pad axis 1 of a (K, F, ...) to n entries with ``fill``."""
    if a.shape[1] >= n:
        return a
    pad = np.full((a.shape[0], n - a.shape[1]) + a.shape[2:], fill, dtype=a.dtype)
    return np.concatenate([a, pad], axis=1)


def evaluate_oneshot(store: ObjectStore, truth_csv: str | Path, library: Library, cfg: dict,
                     rng: np.random.Generator) -> list[dict]:
    """Per truth class: one random example, its one-shot ranking of every *other* stored object.

    Returns rows {label, example, instances, k, p_at_10, ap}: ``p_at_10`` is the precision of the best
    k = min(10, instances - 1) other objects (a class with fewer than 11 instances cannot fill 10 places,
    so the cut-off shrinks to what a perfect ranking could reach); ``ap`` is
    ``sklearn.metrics.average_precision_score`` of "same class" against the negated distance.  Classes with a
    single instance have nothing to find and are skipped.
    """

    from ..audit.truth import match_truth, object_table, read_truth
    rows = read_truth(truth_csv)
    table = object_table(store)
    tm = match_truth(rows, table, radius_m=float(cfg["audit"]["match_radius_m"]), path=truth_csv)
    labelled = np.asarray(tm.object_index, dtype=np.int64)
    labels = np.array([r.label for r in tm.rows], dtype=object)
    _check_pair(library, store)
    out = []
    for lab in sorted(set(labels)):
        members = labelled[labels == lab]
        if len(members) < 2:
            continue
        ex = int(rng.choice(members))
        mt = _find(library, store, ex, cfg)
        others = np.array([i for i in labelled if i != ex])
        k, p10, ap = retrieval_scores(mt, others, np.isin(others, members))
        out.append({"label": str(lab), "example": str(store.ids[ex]), "instances": int(len(members)), "k": k,
                    "p_at_10": p10, "ap": ap})
    return out


def retrieval_scores(matches: Matches, others: np.ndarray, relevant: np.ndarray) -> tuple[int, float, float]:
    """(k, precision at k, average precision) of the ranking of objects ``others`` (indices) by distance.

    relevant: (len(others),) bool, same class as the example.  k = min(10, number relevant); ties in
    distance are broken by object id.  AP: ``sklearn.metrics.average_precision_score``.  The ranking is the matches'
    ``rank_key`` when they have one (the distance, or the symmetric one of ``[mine] find_symmetric``).
    """
    from sklearn.metrics import average_precision_score
    d = np.asarray(getattr(matches, "rank_key", matches.distance))[others]
    d = np.where(np.isfinite(d), d, np.finfo(np.float64).max)
    k = min(10, int(relevant.sum()))
    order = np.lexsort((matches.object[others].astype(str), d))
    return k, float(relevant[order[:k]].mean()), float(average_precision_score(relevant, -d))
