"""find's known-class route (``[mine] find_prototype`` = t > 0; 0 = off): an example of a class the library already
knows ranks the store by that class's mined prototype instead of by its own one view.

A single example is one partial view: cut by the image border, hidden behind a nearer object or tumbled onto a face
that shows little.  A mined prototype is a fused mean of many members seen from many sides.  When the example is a
view of a mined class, the prototype is the better query; when it is not, the prototype is the wrong one.  So:

1. Decision.  The example's store volume is labelled as the label stage labels a single view (``label.matcher``: the
   library's matcher and its score; the example's camera direction from the store's ``single/camera`` when the store
   has one for it): best prototype b and its score s.  The route is taken when s >= max(t, the library's unknown cut),
   t = ``find_prototype`` (sure), or when s >= max(t_weak, the cut), t_weak = ``find_prototype_weak``, and the two
   rankings agree: at least ``AGREE_MIN`` of the first ``AGREE_TOP`` objects by the key below are among the first
   ``AGREE_TOP`` of the one-shot ranking (the example left out of both).  The unknown cut alone lets through the
   never-mined views that the label stage takes for a known class (unknown AUROC is below 1; on the default demo 44%
   of them): their score is mostly low (the three demo stores, every new scan as the example, never-mined views
   above the cut: median s 0.02-0.08, 1 of 94 above 0.3; views of mined classes: median 0.55-0.65, 10th percentile
   0.10-0.18), and such an example loses its own class to b's members.  Between t_weak and t the agreement tells
   the two apart on the demo stores (README "Find"): a never-mined example (or one the label stage names wrongly)
   finds its own class by itself and b's members by the key, so the lists share 0-2 objects; a view of b finds
   mostly b both ways (4-9 shared; one upright mallet view shares 2 and is left out).  Below t_weak it does not (an L bracket view at s 0.04 shares 4 and loses).
2. Ranking by b.  Every store object is pose-searched against every prototype (tilts x yaw x scale, as mining assigns
   its members: ``tilts.tilt_pose_distances``); the key is the assignment margin

       key_i = d_ib / min_{j != b} d_ij

   (below 1: mining's rule would assign object i to b; the lower, the more clearly).  Ties by object id.  The margin
   ranks better than d_ib alone: an object near every prototype (a small, plain view) is not a member of b.

3. Overrule (``[mine] find_overrule`` = z > 0; 0 = off, the default).  A taken route whose ranking shares at most
   ``OVERRULE_AGREE_MAX`` of its first ``AGREE_TOP`` with the one-shot ranking may have been named wrongly (an example
   half hidden behind a nearer object, named for another class with a high score).  A third, independent ranking is
   then asked: the example's *dissimilarity profile*, its distances to the K prototypes as a point of the
   dissimilarity space (Pekalska & Duin, "The Dissimilarity Representation for Pattern Recognition", 2005), here the
   log distances standardised over the prototypes (so the profile's shape, not its level, counts: a partial view is
   farther from every prototype but in the same order as its class's views), and the store ranked by the Euclidean
   distance of each object's profile to the example's (``profile_key``).  Every prototype c's margin ranking is
   compared with it (objects in common among the first ``AGREE_TOP``, the example left out); the prototype sharing
   the most (ties: the lower index) replaces b when it shares at least z and more than b does.  Measured on the demo
   stores (README "Find"), z = 3, every new scan as the example: it rescues seed 0's tripod stand behind a jug (named
   hand plane at 0.56: 0.0 -> 0.9) and a seed 1 tile box (named L bracket at 0.30: 0.0 -> 1.0), but also moves two
   rightly named seed 1 views (funnel at 0.61, tripod stand at 0.62: 1.0 -> 0.0); held out, on the touching demos, it
   moves 6 views and 5 of them, rightly named, lose 0.8-1.0.  It stays off.  The prototype
   that ranks is then the overruling one (``KnownRoute.cluster``, matches' ``prototype``); ``named`` keeps the label
   decision's, ``example_score`` and ``agree`` stay its.

4. Fusion (``[mine] find_prototype_fuse`` = p > 0; default 0.5).  A prototype's margin ranks a class the library never
   mined that lies next to b as b's own: on the seed-1 demo store the L-bracket prototype's first 10 by margin hold
   5 trowels (margins 0.64-0.79, among the L brackets' 0.61-0.85), so every L-bracket example taking the route found
   0.3.  The example itself tells them apart (its one-shot ranking puts L brackets first: 0.7-0.9).  So a taken
   route ranks the objects b claims, margin below ``CLAIM_MARGIN``, by margin x d1 ** p, d1 the example's one-shot
   distance to the object (both ways on the ``find_symmetric`` shortlist, one-way beyond; the product of the two
   ratio-scale distances, the sum of their logs: CombSUM score fusion, Fox & Shaw, TREC-2 1994), and every other
   object after them by its margin (``fused_key``).  What b does not claim keeps its place behind, so an example
   whose own view is poor (a tumbled jug whose one-shot list is mostly tile boxes) cannot pull other classes in
   front of b's members; it can only reorder what b claims.  Measured in README "Find".

5. Soft route (``[mine] find_route_soft`` = k > 0; 0 = off, the default).  A taken route whose ranking shares at most
   ``OVERRULE_AGREE_MAX`` of its first ``AGREE_TOP`` with the one-shot ranking (b's agreement) may have been named
   wrongly, and nothing in the route's signals says which (README "Find").  Such a route does not choose: the store
   is ranked by reciprocal-rank fusion (Cormack, Clarke & Buettcher, "Reciprocal Rank Fusion outperforms Condorcet
   and individual Rank Learning Methods", SIGIR 2009) of the route's ranking and the one the example falls back to
   when the route is not taken (the k-reciprocal re-ranking of ``[mine] find_rerank``, else the one-shot ranking):
   score_i = sum over the two rankings of 1 / (k + rank_i), rank from 1, the example left out (``rank_fusion``).  A
   wrong prototype's members then share the first places with the example's own neighbours instead of taking them
   all; a right one's keep about half.  Measured in README "Find"; it stays off.

6. Members (``[mine] find_members`` = k > 0; default 3).  A prototype is the mean of its members, and a class the
   library never mined can fit that blurred mean about as well as b's own members do while fitting no single member
   well (seed 1: trowels among the L-bracket prototype's first 10, tape dispensers among the tile box's).  So a taken
   route's first ``find_members_shortlist`` objects by its key above are ranked again by the same key (the margin, with
   the fusion of 4.) computed on the members instead of the prototypes: each of them is pose-searched against every
   member of the library (its fused store volume, from the store the library was mined from: b's members each as the
   one prototype, as find searches the example; the other clusters' members in one search of them all, which refines
   the tilts of each object's 3 best pairs only, as mining's assignment does), and the margin is ``knn_margin``: d_k(i, b) / min_{c != b} d_k(i, c), d_k(i, c) the
   mean of object i's k smallest distances to the members of cluster c (a nearest-neighbour rule, Cover & Hart 1967,
   against mining's nearest-prototype rule).  An object is not its own neighbour (a member found by its object id is
   left out of its own row), so a find on the mined store ranks by the other members.  The rest follow in the
   route's order.  Without the mined store (the library's ``store_path`` not found, or not holding every member) the
   route ranks as before.  Measured in README "Find".

7. Member route (``[mine] find_member_route`` = r > 0; 0 = off).  An example the route does not take (scored under
   t, or in the weak band without agreement; a view of a mined class seen poorly, one the label decision names
   wrongly, or a never-mined view) ranks by its own one view (or ``find_rerank``'s re-ranking of it).  The library's
   members are a second opinion on its class: c, the cluster whose k nearest members (``find_members``'s k) are the
   nearest on average (``class_knn``; the example pose-searched against every member, one bank per cluster).  A
   never-mined view also has a nearest cluster, so c alone does not decide; the example must also be a reciprocal
   neighbour of c (Zhong et al., CVPR 2017, the k-reciprocal test of ``find_rerank`` between an object and a cluster):
   among c's first r objects of the store by the members' margin, ``member_rank`` below r
   (``reciprocal_member_rank``), counted over the shortlist 6. ranks (c's first ``find_members_shortlist`` by the
   prototype's key, the example searched with them).  A view of c is then about as clear a member as c's other views
   and ranks among them; a never-mined view (on the demo stores) comes after the views of the class it resembles
   (its rank at least 11 against a cluster holding ~15 of the 150-160 views).  Taken, the example ranks as a taken
   route to c does (4. and 6.; ``KnownRoute.cluster`` c, ``named`` and ``example_score`` stay the label decision's).

What the route changes: only the ranking (``Matches.rank_key`` = the key; ``both_ways`` is then empty).  ``distance``,
``score``, pose and faces stay the one-shot search's (its calibration, ``--add`` unchanged).  ``prototype`` (b) and
``prototype_score`` are added: the library's calibrated score of d_ib (``Library.score``: single-view calibration for
objects seen in one frame, on the canonical or another face by the search's tilt; the fused one otherwise), the
fraction of prototype b's own members expected to fit it worse, as in ``assignments.csv`` and the label stage.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mine.library import Library
from ..mine.memberknn import class_knn
from ..mine.tilts import TiltGrid

AGREE_TOP = 10
AGREE_MIN = 4
OVERRULE_AGREE_MAX = 1
CLAIM_MARGIN = 0.9      # ``[mine] find_prototype_fuse``: the objects prototype b claims, margin below this


@dataclass
class KnownRoute:
    """The route's decision and ranking for one example: arrays (N,) in store order."""
    cluster: int            # b: the example's label decision (-1: none)
    example_score: float    # its score
    cut: float              # the matcher's unknown cut
    agree: int              # objects in common among the first AGREE_TOP of the key's and the one-shot ranking
    taken: bool
    key: np.ndarray         # d_ib / min_{j != b} d_ij (inf where unmatched); taken with ``[mine] find_prototype_fuse``: fused_key
    distance: np.ndarray    # d_ib
    score: np.ndarray       # the library's calibrated score of d_ib
    named: int = -1         # the label decision's prototype; differs from ``cluster`` when ``[mine] find_overrule``
                            # replaced it (``cluster`` is then the prototype that ranks)
    profile_agree: tuple = ()  # with the overrule asked: objects in common among the first AGREE_TOP of each
                               # prototype's margin ranking and the profile ranking (K,)
    member_rank: int = -1   # ``[mine] find_member_route``: asked for an example the route did not take, the shortlisted
                            # objects of ``cluster`` (its nearest by the members) with a lower margin on the members
                            # than the example's (-1: not asked); taken when below r (module docstring, 7.)


def example_decision(library: Library, store, ex: int, cfg: dict, cut_ex=None, matcher=None
                     ) -> tuple[int, float, float, int]:
    """(b, score, cut, candidate): the label stage's decision on store object ``ex``'s volume (``label.matcher``).
    ``cut_ex`` (``curate.cutexample.CutExample``, ``[mine] find_cut_offsets``): a cut example decided as the label
    stage decides a cut view: its candidates searched together (per prototype the nearest), with its ``ViewCut`` (the
    copies seen from its camera lose what it could not see; the cut views' unknown cut); ``candidate`` is the one its
    decided prototype chose (0 without ``cut_ex``: the store's volume).  ``matcher``: ``make_matcher(library, cfg,
    size=False)`` when the caller has built it."""
    from ..label.matcher import make_matcher
    # ``[mine] label_size`` stays out of the route's decision: measured on the default seed-0 demo, the size moved the
    # never-mined tape dispenser example onto a known class the route then took (P@10 0.70 -> 0.00)
    mt = make_matcher(library, cfg, size=False) if matcher is None else matcher
    cam = _camera(store, ex)
    cam = None if cam is None else cam[None]
    if cut_ex is None:
        vol = store.read_volume_at(np.array([ex]))
        sizes = np.array([[store.objects["radius_m"][ex], store.objects["height_m"][ex]]], np.float64)
        m = mt.match(vol, cam, sizes)
    else:
        several = len(cut_ex.volumes) > 1
        m = mt.match(cut_ex.volumes[None] if several else cut_ex.volumes[:1], cam, cut_ex.sizes[:1], [cut_ex.cut])
    b = int(m["best"][0])
    cut = float(m["unknown_cut"][0, b]) if b >= 0 and cut_ex is not None else float(mt.unknown_cut)
    c = int(m["centre"][0, b]) if b >= 0 and "centre" in m else 0
    return b, (float(m["score"][0, b]) if b >= 0 else 0.0), cut, c


def _camera(store, ex: int) -> np.ndarray | None:
    """The example's camera direction in its object frame (the store's single/camera row of its one-frame view), or
    None (a store without it, an object seen in several frames, a NaN row)."""
    cams = getattr(store, "single_camera", None)
    owner = getattr(store, "single_object", None)
    if cams is None or owner is None or int(np.asarray(store.objects.get("n_frames", [1] * len(store)))[ex]) != 1:
        return None
    rows = np.flatnonzero(np.asarray(owner) == ex)
    if not len(rows) or not np.all(np.isfinite(cams[rows[0]])):
        return None
    return np.asarray(cams[rows[0]], np.float64)


def margin_key(D: np.ndarray, b: int) -> np.ndarray:
    """d_ib / min_{j != b} d_ij (N,) of distances D (N, K); inf where d_ib is not finite, 0-divided guarded."""
    D = np.asarray(D, np.float64)
    d = D[:, b]
    if D.shape[1] < 2:
        return np.where(np.isfinite(d), d, np.inf)
    rest = np.delete(D, b, axis=1)
    other = np.where(np.isfinite(rest), rest, np.inf).min(axis=1)
    key = d / np.maximum(other, 1e-12)
    return np.where(np.isfinite(d), key, np.inf)


def profile_key(D: np.ndarray, ex: int) -> np.ndarray:
    """Distance (N,) of every object's dissimilarity profile to example ``ex``'s: the profile of row i of D (N, K) is
    ln D_i standardised over the K prototypes (mean 0, standard deviation 1; non-finite distances read as the row's
    largest finite one; a row with no spread or nothing finite stays at 0); inf for an object with no finite
    distance."""
    D = np.asarray(D, np.float64)
    ok = np.isfinite(D) & (D > 0)
    top = np.where(ok, D, -np.inf).max(axis=1, keepdims=True)
    L = np.log(np.where(ok, D, np.where(np.isfinite(top), top, 1.0)).clip(1e-300))
    F = L - L.mean(axis=1, keepdims=True)
    sd = F.std(axis=1, keepdims=True)
    F = np.where(sd > 0, F / np.where(sd > 0, sd, 1.0), 0.0)
    out = np.sqrt(((F - F[ex]) ** 2).sum(axis=1))
    return np.where(ok.any(axis=1), out, np.inf)


def overrule(D: np.ndarray, b: int, ids: np.ndarray, ex: int, z: int) -> tuple[int, np.ndarray]:
    """(c, shares (K,)): the prototype whose margin ranking shares the most of its first AGREE_TOP with the profile
    ranking (``profile_key``; ties: the lower index) when it shares at least ``z`` and more than b does; else b."""
    prof = profile_key(D, ex)
    shares = np.array([agreement(margin_key(D, c), prof, ids, ex) for c in range(D.shape[1])], np.int64)
    c = int(np.argmax(shares))
    return (c if shares[c] >= z and shares[c] > shares[b] else b), shares


def agreement(a: np.ndarray, b: np.ndarray, ids: np.ndarray, ex: int, top: int = AGREE_TOP) -> int:
    """Objects in common among the first ``top`` of two rankings by keys a, b (N,) (ascending, ties by id, ``ex`` left
    out)."""
    return len(set(_first(a, ids, ex, top).tolist()) & set(_first(b, ids, ex, top).tolist()))


def _first(key: np.ndarray, ids: np.ndarray, ex: int, top: int) -> np.ndarray:
    k = np.where(np.isfinite(key), key, np.finfo(np.float64).max)
    order = np.lexsort((ids, k))
    return order[order != ex][:top]


def fused_key(margin: np.ndarray, one_shot: np.ndarray, power: float, claim: float = CLAIM_MARGIN) -> np.ndarray:
    """The route's key with the example's own distance (``[mine] find_prototype_fuse`` = power > 0; module docstring,
    4.): the objects prototype b claims (margin (N,) below ``claim``, one-shot distance (N,) finite) ranked by
    margin x one_shot ** power, then every other object by its margin, after them (their order kept); inf stays inf."""
    m = np.asarray(margin, np.float64)
    d = np.asarray(one_shot, np.float64)
    claimed = np.isfinite(m) & np.isfinite(d) & (d >= 0) & (m < claim)
    prod = m * np.where(claimed, d, 1.0) ** power
    top = float(prod[claimed].max()) if claimed.any() else 0.0
    return np.where(claimed, prod, np.where(np.isfinite(m), top + 1.0 + m, np.inf))


def knn_margin(Dm: np.ndarray, member_cluster: np.ndarray, n_clusters: int, b: int, k: int) -> np.ndarray:
    """The route's margin on the members (module docstring, 6.): d_k(i, b) / min_{c != b} d_k(i, c) (n,)."""
    return margin_key(class_knn(Dm, member_cluster, n_clusters, k), b)


def reciprocal_member_rank(short_margin: np.ndarray, example_margin: float) -> int:
    """``[mine] find_member_route`` (module docstring, 7.): how many of the shortlisted objects' margins on the
    members (n,) are below the example's (non-finite ones never are); the example is a reciprocal neighbour of the
    cluster when this is below r.  An example with no finite margin ranks after all of them (n)."""
    m = np.asarray(short_margin, np.float64)
    if not np.isfinite(example_margin):
        return int(len(m))
    return int(np.sum(np.isfinite(m) & (m < example_margin)))


def members_key(route_key: np.ndarray, shortlist: np.ndarray, short_key: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """The route's key (N,) with its ``shortlist`` (n,) store rows ranked by ``short_key`` (n,) (ascending, ties by id)
    ahead of every other object, which keeps its order by ``route_key`` (inf stays inf)."""
    base = np.asarray(route_key, np.float64)
    shortlist = np.asarray(shortlist, np.int64)
    fin = np.isfinite(base)
    low = float(base[fin].min()) if fin.any() else 0.0
    key = np.where(fin, base - low + len(shortlist) + 1.0, np.inf)
    sk = np.asarray(short_key, np.float64)
    order = np.lexsort((np.asarray(ids).astype(str)[shortlist], np.where(np.isfinite(sk), sk, np.finfo(np.float64).max)))
    key[shortlist[order]] = np.arange(len(shortlist), dtype=np.float64)
    return key


def rank_fusion(keys: list[np.ndarray], ids: np.ndarray, ex: int, k: float) -> np.ndarray:
    """Reciprocal-rank fusion (module docstring, 5.) of rankings by ascending keys (each (N,); ties by ``ids``, the
    example ``ex`` left out, rank 1 first): the key (N,) -sum_r 1 / (k + rank_r(i)), ascending; an object no ranking
    can place (every key non-finite) stays inf, the example gets -inf (it is not a find)."""
    ids = np.asarray(ids).astype(str)
    N = len(ids)
    total = np.zeros(N)
    placed = np.zeros(N, bool)
    for key in keys:
        key = np.asarray(key, np.float64)
        order = np.lexsort((ids, np.where(np.isfinite(key), key, np.finfo(np.float64).max)))
        order = order[order != ex]
        rank = np.empty(N)
        rank[order] = np.arange(1, len(order) + 1)
        total[order] += 1.0 / (k + rank[order])
        placed |= np.isfinite(key)
    out = np.where(placed, -total, np.inf)
    out[ex] = -np.inf
    return out


def decide(D: np.ndarray, b: int, s: float, cut: float, one_shot_key: np.ndarray, ids: np.ndarray, ex: int,
           sure: float, weak: float = 0.0, overrule_at: int = 0) -> tuple[int, int, bool, tuple]:
    """(prototype that ranks, agree, taken, profile shares) for example ``ex`` named b with score s: the rules of the
    module docstring (1. and 3.) on D (N, K) and the one-shot ranking's key (N,); ``agree`` is b's."""
    agree = agreement(margin_key(D, b), np.asarray(one_shot_key, np.float64), ids, ex)
    taken = s >= max(sure, cut) or (weak > 0 and s >= max(weak, cut) and agree >= AGREE_MIN)
    shares = ()
    if taken and overrule_at > 0 and agree <= OVERRULE_AGREE_MAX and D.shape[1] > 1:
        c, sh = overrule(D, b, ids, ex, int(overrule_at))
        b, shares = c, tuple(int(v) for v in sh)
    return b, agree, bool(taken), shares


def known_route(library: Library, store, ex: int, cfg: dict, D: np.ndarray, tilt: np.ndarray, grid: TiltGrid | None,
                one_shot_key: np.ndarray, sure: float, weak: float = 0.0, overrule_at: int = 0,
                one_shot_distance: np.ndarray | None = None, fuse: float = 0.0, decision: tuple | None = None) -> KnownRoute:
    """The route for example ``ex``: D (N, K), tilt (N, K) every store object's pose search against every prototype;
    ``one_shot_key`` (N,) the one-shot ranking's key.  Taken when the example's label decision b scores >= max(``sure``,
    the unknown cut), or >= max(``weak``, the cut) (``weak`` > 0) with >= ``AGREE_MIN`` objects agreeing.
    ``overrule_at`` > 0 (``[mine] find_overrule``): a taken route sharing at most ``OVERRULE_AGREE_MAX`` with the
    one-shot ranking ranks by the prototype ``overrule`` picks (module docstring, 3.).  ``fuse`` > 0 (``[mine]
    find_prototype_fuse``) with ``one_shot_distance`` (N,): the key is ``fused_key`` (module docstring, 4.).
    ``decision``: the example's ``example_decision`` when already made (a cut example, ``[mine] find_cut_offsets``)."""
    b, s, cut = (decision or example_decision(library, store, ex, cfg))[:3]
    N = len(store)
    if b < 0:
        z = np.full(N, np.inf)
        return KnownRoute(-1, 0.0, cut, 0, False, z, z, np.zeros(N))
    named = b
    b, agree, taken, shares = decide(D, b, s, cut, one_shot_key, np.asarray(store.ids).astype(str), ex, sure, weak,
                                     overrule_at)
    key = margin_key(D, b)
    if taken and fuse > 0 and one_shot_distance is not None:
        key = fused_key(key, one_shot_distance, fuse)
    d, sc = prototype_scores(library, store, D, tilt, grid, b)
    return KnownRoute(b, s, cut, agree, bool(taken), key, d, sc, named, shares)


def prototype_scores(library: Library, store, D: np.ndarray, tilt: np.ndarray, grid: TiltGrid | None,
                     b: int) -> tuple[np.ndarray, np.ndarray]:
    """(d_ib (N,), the library's calibrated score of it (N,), 0 where unmatched): single-view calibration for objects
    seen in one frame (on the canonical or another face by the search's tilt), the fused one otherwise."""
    N = len(D)
    d = np.asarray(D[:, b], np.float64)
    single = np.asarray(store.objects.get("n_frames", np.ones(N)))[:N] == 1
    upright = (grid or TiltGrid.identity()).is_upright(np.asarray(tilt[:, b]))
    ok = np.isfinite(d)
    dd = np.where(ok, d, 1.0)
    sc = np.where(single, library.score(dd, b, single_view=True, upright=upright), library.score(dd, b, single_view=False))
    return d, np.where(ok, sc, 0.0)
