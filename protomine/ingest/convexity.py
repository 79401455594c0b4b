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
   Checked across views (``frame_segments``, ``view_votes``): in each depth image the readings are split
   along occluding edges and concave creases measured on the image grid (normals that never mix two
   surfaces); a pair of adjacent voxels is cut as well when the frames that see both mostly put them in
   different segments, or when one of them lies on such a boundary in every frame (where objects touch).
   In the fused cloud alone a few noisy convex connections at a contact join two objects; the frames agree
   on the boundary there.  With colours, a pair whose chromaticities differ by more than one object's own
   readings ever do is cut too (``colour_steps``): a voxel at a contact that mixes two objects' readings, seen
   by one frame only, is a bridge neither the creases nor the frames cut.
3. Parts back into objects: an object can stand on the support plane by itself (its centre of mass lies over
   its support polygon).  A part that cannot (a handle, a knob, pegs on a post, a lid, a tripod's slanted
   leg, a sliver cut from a wall) is a piece of the object it hangs on: it joins the neighbour part it shares
   the most close voxel pairs with (a lid meets its own walls all around, a neighbour it leans on at a few
   points).  Parts too small to be an object join their most connected neighbour too.  A part resting on
   several groups (a lid on walls split from one another) joins all it meets along a seam; with colours,
   neighbours of the part's own chromaticity are preferred (a touching neighbour mostly differs in colour).
   What stands on its own stays its own object (parts standing on another's footprint are joined later, by
   ``proposals._merge_overlapping_footprints``).
"""
from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import ConvexHull, QhullError, cKDTree

NORMAL_NEIGHBOURS = 16   # PCA neighbourhood size for voxel normals
SEAM_SHARE = 0.01        # share of a group's voxels along the seam with a neighbour of its colour to join it
SEAM_LONG = 0.05         # ... with any neighbour of its colour at this share, not only the one of its longest seam
                         # (measured, demo touching scenes: the blocks of one object 0.04-0.93, a post and the
                         # touching post of another 0.009-0.013)
SAME_CHROMA = 0.015      # chromaticity distance (``_chroma``) below which two groups have one colour (measured,
                         # tools demo touching scenes, two seeds, adjacent convex parts of >= 50 voxels: one object's
                         # parts 0.008 at most (226 pairs), touching objects of other colours 0.069 at least (112
                         # pairs); two touching posts of one palette's shades (angles family) 0.030: the geometric
                         # middle of 0.008 and 0.030)
ONE_COLOUR_SHARE = 0.9    # share of a group's colours near its median that make it one colour (an object's
                          # pixels: 98% within 0.03-0.04 of its median, see proposals.GROW_CHROMA; measured, demo
                          # touching scenes: a standing neighbour's voxels 0.96 within 0.08, a crumb mixing two
                          # objects' edges and shadow 0.30)
LEAN_SOLID_SHARE = 0.5   # a group with this share of its voxels in parts that stand by themselves leans on a
                         # neighbour of another colour rather than being a piece of it (a majority)
DARK_RGB = 60            # colours darker than this (sum of 8-bit r, g, b) have no usable chromaticity
REST_SEAM_SHARE = 0.25   # a part rests on every group under it whose seam with it is this share of the longest
UNDER_MIN = 10           # voxels under a part's footprint that make a neighbour its support


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
                 concave_deg: float, votes=None, colours: np.ndarray | None = None,
                 regroup: bool = False, grow: bool = False, mixed: np.ndarray | None = None,
                 handed: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Parts (V,) (-1 where ``labels`` is -1) and the adjacency pairs (E, 2) within a group.

    votes: optional per-frame segment shares of the voxels (``view_votes``); pairs the frames seeing both
    mostly put in different segments (``view_disagreement``) are cut as well.
    colours: optional (V, 3) RGB of the voxels; pairs farther apart in chromaticity than one object's own
    readings ever are (``colour_steps``) are cut as well.
    regroup (``[ingest] crumb_regroup``): the crumbs the view check leaves stay linked to one another where
    the fused cloud shows no cut (no concave crease, no colour step), and with colours each crumb still
    alone takes the part of its nearest voxel of its own colour (``_crumb_targets``).
    grow (``[ingest] crumb_grow``, implies regroup): first, each crumb takes the part that reaches it first
    along the surface the fused cloud shows unbroken, through crumbs of the part's colour (``_grow_crumbs``);
    then, with colours, the crumbs left are grown into the same way across the creases too (only the colour
    steps and the mixed voxels cut); only the crumbs no part reaches go on as with regroup.
    mixed: optional (V,) bool, voxels whose readings are of two colours (``contact_voxels``: where two objects
    touch); with grow, every pair of theirs is cut, in the fused cloud too (they end as crumbs).
    handed: optional (V,) bool, filled in place with grow: the crumbs handed to a part (by the growths or as
    leftovers; not those of a regrouped run, a part of its own).  In ``join_parts`` a long seam of the
    same-colour join made of two such crumbs only does not count (``_join_same_colour``)."""
    regroup = regroup or grow
    V = len(points)
    pairs = cKDTree(points).query_pairs(adjacency, output_type="ndarray") if V > 1 else np.zeros((0, 2), int)
    pairs = pairs[(labels[pairs[:, 0]] == labels[pairs[:, 1]]) & (labels[pairs[:, 0]] >= 0)]
    i, j = pairs[:, 0], pairs[:, 1]
    dn = normals[i] - normals[j]
    bend = np.einsum("ei,ei->e", dn, points[i] - points[j])                    # > 0 convex, < 0 concave
    cos = np.einsum("ei,ei->e", normals[i], normals[j])
    concave = (bend < 0) & (cos < np.cos(np.deg2rad(concave_deg)))
    stepped = colour_steps(colours, pairs) if colours is not None else np.zeros(len(pairs), bool)
    if grow and mixed is not None:
        stepped |= mixed[i] | mixed[j]
    concave |= stepped
    fused = concave.copy()                       # the cuts the fused cloud itself shows
    if votes is not None:
        concave |= view_disagreement(pairs, votes)
    comp = _components(pairs[~concave], V)
    if votes is not None or colours is not None:
        # the crease and edge bands leave single voxels: each takes the part of its nearest voxel in a part
        # of at least CRUMB_VOXELS within its group
        size = np.bincount(comp, minlength=V)
        small = (size[comp] < CRUMB_VOXELS) & (labels >= 0)
        crumbs = small.copy()
        if votes is not None and grow and small.any():
            comp, small = _grow_crumbs(points, pairs, fused, comp, small, colours)
            if colours is not None and small.any():
                # what no part reached along the unbroken surface: grown into across the creases too, by colour
                comp, small = _grow_crumbs(points, pairs, stepped, comp, small, colours)
        if votes is not None and regroup and small.any():
            left = small
            comp, small = _regroup_crumbs(pairs, concave, fused, comp, small, colours)
            crumbs &= ~(left & ~small)                       # a regrouped run is a part of its own
        if grow and handed is not None:
            handed[:] = crumbs
        big = np.flatnonzero(~small & (labels >= 0))
        if small.any() and len(big):
            for l in np.unique(labels[small]):
                sm, bg = np.flatnonzero(small & (labels == l)), big[labels[big] == l]
                if len(bg):
                    _, j = cKDTree(points[bg]).query(points[sm])
                    take = bg[j]
                    if colours is not None and regroup:
                        take = _crumb_targets(points, colours, sm, bg, take)
                    comp[sm] = comp[take]
    return np.where(labels >= 0, comp, -1), pairs


def _components(keep: np.ndarray, V: int) -> np.ndarray:
    """(V,) connected-component id of each voxel over the kept adjacency pairs ``keep`` (E, 2)."""
    g = coo_matrix((np.ones(len(keep)), (keep[:, 0], keep[:, 1])), shape=(V, V))
    return connected_components(g, directed=False)[1]


CRUMB_CHROMA = 0.03      # with crumb_grow, a crumb's chromaticity within this of a part's median lets the part grow
                         # into it (an object's pixels: 98% within 0.03-0.04 of its median, proposals.GROW_CHROMA;
                         # measured, touching demo seed 0, capture 0: an L bracket's crumbs next to a mallet whose
                         # median lies 0.058 away, 477 taken by the mallet without the test, 6 with it)


def _grow_crumbs(points: np.ndarray, pairs: np.ndarray, fused: np.ndarray, comp: np.ndarray, small: np.ndarray,
                 colours: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """``[ingest] crumb_grow``: (comp, small) with every crumb a part reaches taken by it.  Each part grows into
    the crumbs along the adjacency pairs (E, 2) that the fused cloud does not cut (``fused`` (E,): no concave
    crease, no colour step) and, with ``colours`` (V, 3) RGB, only through crumbs of its own colour (within
    CRUMB_CHROMA of its median chromaticity; a crumb too dark to have one, DARK_RGB, lets any part through);
    a crumb takes the part whose path to it (metres along the pairs, Dijkstra) is the shortest.

    A thin part on an occluding edge or a crease in every frame (a tripod's leg, a handle, a mallet's rim)
    is all crumbs; its surface runs on unbroken into its own object's body, while a touching neighbour
    meets it across a crease or a colour step.  Taken by the nearest voxel in space, it goes to whichever
    body is nearer; taken as a run of its own (``_regroup_crumbs``), a piece that stands by itself becomes
    an object, and a run along the contact of two objects of one colour joins their two rims into one
    part.  Grown along the surface, each crumb goes to the body its surface comes from, and the two rims
    part where the growth fronts meet.  The colour test is tighter than the colour step (one reading against
    a whole object's colour, not two neighbouring readings): a neighbour of a close colour does not grow
    along an object's rim."""
    from scipy.sparse.csgraph import dijkstra
    i, j = pairs[:, 0], pairs[:, 1]
    link = ~fused & (small[i] | small[j])
    e = pairs[link]
    src = np.unique(e[~small[e]]) if len(e) else np.zeros(0, int)          # part voxels next to a crumb
    if not len(src):
        return comp, small
    V = len(comp)
    # csgraph drops explicit zeros: two voxel centroids never coincide, but keep every weight positive
    w = np.maximum(np.linalg.norm(points[e[:, 0]] - points[e[:, 1]], axis=1), 1e-9)
    if colours is not None:
        s, ch = _chromaticities(colours)
    best, take = np.full(V, np.inf), comp.copy()
    for p in np.unique(comp[src]):                         # ascending: ties go to the lower part id
        own = (comp == p) & ~small
        open_ = own | small
        if colours is not None:
            open_ &= own | (s < DARK_RGB) | (np.linalg.norm(ch - _chroma(colours[own]), axis=1) <= CRUMB_CHROMA)
        ok = open_[e[:, 0]] & open_[e[:, 1]] & ~(own[e[:, 0]] & own[e[:, 1]])
        g = coo_matrix((w[ok], (e[ok, 0], e[ok, 1])), shape=(V, V)).tocsr()
        d = dijkstra(g, directed=False, indices=src[comp[src] == p], min_only=True)
        nearer = small & (d < best)
        best[nearer], take[nearer] = d[nearer], p
    reached = small & np.isfinite(best)
    return np.where(reached, take, comp), small & ~reached


def _regroup_crumbs(pairs: np.ndarray, cut: np.ndarray, fused: np.ndarray, comp: np.ndarray, small: np.ndarray,
                    colours: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """``[ingest] crumb_regroup``: (comp, small) with runs of crumbs made parts of their own.  A thin part (a
    tripod's legs, a handle) lies on an edge in every frame and the view check leaves all of it in crumbs, so
    crumbs stay linked to one another where the fused cloud shows no cut (``fused`` (E,), of the ``cut`` (E,)
    pairs); a run becomes a part only when it is large (REGROUP_VOXELS: a leg, a foot; a patch of the table's
    noise over the margin or a sliver of an edge stays crumbs) and, with ``colours``, of one colour (a run
    through the mixed readings where two objects touch is not)."""
    back = small[pairs[:, 0]] & small[pairs[:, 1]] & ~fused
    if not back.any():
        return comp, small
    V = len(comp)
    again = _components(pairs[~cut | back], V)
    grown = small & (np.bincount(again, minlength=V)[again] >= REGROUP_VOXELS)
    if colours is not None:
        for r in np.unique(again[grown]):
            run = grown & (again == r)
            if not one_colour(colours[run], COLOUR_STEP):
                grown &= ~run
    return np.where(grown, V + again, comp), small & ~grown


REGROUP_VOXELS = 50        # with regroup, a run of crumbs of at least this many voxels, of one colour (one_colour within
                           # COLOUR_STEP), becomes a part of its own
CRUMB_REACH_M = 0.03      # with regroup, a crumb takes the part of its nearest voxel of its own colour within this
                          # distance (``_crumb_targets``); none there: its nearest voxel, as without colours


def _crumb_targets(points: np.ndarray, colours: np.ndarray, crumbs: np.ndarray, big: np.ndarray,
                   nearest: np.ndarray) -> np.ndarray:
    """(C,) voxel whose part each crumb voxel (``crumbs`` (C,), indices into points (V, 3) / colours (V, 3) RGB)
    takes: the nearest voxel of ``big`` (indices) within CRUMB_REACH_M whose chromaticity lies within
    COLOUR_STEP of the crumb's own (both bright enough to have one, DARK_RGB); a crumb too dark, or with no
    such voxel near, keeps ``nearest`` (C,) (its nearest big voxel).

    Where a thin part (a tripod's legs and feet, a handle) lies on an occluding edge or a crease in every
    frame, the view check leaves all of it in crumbs; taken by the nearest big voxel, a whole foot goes to
    the touching neighbour whose body is nearer than the object's own (measured, tools demo touching scenes:
    a tripod stand's feet absorbed into a hand plane's part, the stand's legs then joined the plane)."""
    s, ch = _chromaticities(colours)
    out = nearest.copy()
    lit = s[crumbs] >= DARK_RGB
    if not lit.any():
        return out
    c = crumbs[lit]
    near = cKDTree(points[c]).sparse_distance_matrix(cKDTree(points[big]), CRUMB_REACH_M, output_type="coo_matrix")
    r, b, d = near.row, big[near.col], near.data
    ok = (s[b] >= DARK_RGB) & (np.linalg.norm(ch[b] - ch[c[r]], axis=1) <= COLOUR_STEP)
    r, b, d = r[ok], b[ok], d[ok]
    if len(r):
        order = np.lexsort((b, d, r))                    # per crumb the nearest such voxel (ties: lowest index)
        r, b = r[order], b[order]
        first = np.r_[True, r[1:] != r[:-1]]
        out[np.flatnonzero(lit)[r[first]]] = b[first]
    return out


def contact_voxels(inv: np.ndarray, colours: np.ndarray, n_voxels: int) -> np.ndarray:
    """(V,) bool: voxels whose readings are of two colours.  inv: (M,) voxel of each reading; colours: (M, 3)
    RGB of the readings.  Each voxel's bright readings (DARK_RGB) are split by their chromaticity: those
    within COLOUR_STEP / 2 of the reading farthest from the voxel's mean, and the rest; the voxel is mixed
    when both sides hold a reading and their means lie farther apart than COLOUR_STEP.

    Where two objects touch, a voxel (a third of the grouping radius) holds readings of both; its mean
    colour lies between theirs, within the colour step of either, so two such voxels bridge two objects of
    different colours that meet flush (measured, thin-handle family draw of seed 9: two posts' tops, 0.16
    apart in chromaticity, joined through two voxels each holding readings of both, means 0.07 from either).
    One object's readings lie 98% within 0.03-0.04 of its median (proposals.GROW_CHROMA), so its own voxels
    are not split."""
    s, ch = _chromaticities(colours)
    ok = s >= DARK_RGB
    inv, ch = inv[ok], ch[ok]
    out = np.zeros(n_voxels, bool)
    if not len(inv):
        return out
    cnt = np.bincount(inv, minlength=n_voxels).astype(np.float64)
    mean = np.stack([np.bincount(inv, weights=ch[:, k], minlength=n_voxels) for k in range(3)], 1)
    mean /= np.maximum(cnt, 1.0)[:, None]
    d = np.linalg.norm(ch - mean[inv], axis=1)
    order = np.lexsort((-d, inv))                        # per voxel, its farthest reading first
    first = order[np.r_[True, inv[order][1:] != inv[order][:-1]]]
    far = np.zeros((n_voxels, 3))
    far[inv[first]] = ch[first]
    side = np.linalg.norm(ch - far[inv], axis=1) <= COLOUR_STEP / 2
    na = np.bincount(inv, weights=side.astype(np.float64), minlength=n_voxels)
    nb = cnt - na
    ma = np.stack([np.bincount(inv, weights=ch[:, k] * side, minlength=n_voxels) for k in range(3)], 1)
    mb = mean * cnt[:, None] - ma
    ma /= np.maximum(na, 1.0)[:, None]
    mb /= np.maximum(nb, 1.0)[:, None]
    return (na > 0) & (nb > 0) & (np.linalg.norm(ma - mb, axis=1) > COLOUR_STEP)


COLOUR_STEP = 0.08       # chromaticity distance between adjacent voxels that cuts them apart: twice the spread of
                         # one object's readings (98% within 0.03-0.04 of its median; proposals.GROW_CHROMA)


def _chromaticities(colours: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Brightness (V,) (r + g + b) and chromaticity (V, 3) (r, g, b) / (r + g + b) of RGB ``colours`` (V, 3)."""
    rgb = np.asarray(colours, dtype=np.float64)
    s = rgb.sum(axis=1)
    return s, rgb / np.maximum(s, 1e-9)[:, None]


def colour_steps(colours: np.ndarray, pairs: np.ndarray) -> np.ndarray:
    """(E,) bool: adjacent voxel pairs (E, 2) whose chromaticities (r, g, b) / (r + g + b) of their RGB
    ``colours`` (V, 3) lie farther apart than COLOUR_STEP (pairs with a voxel too dark to have one, DARK_RGB,
    are not judged).

    Where two objects touch, a voxel at the contact can mix readings of both; seen by one frame only, no
    crease and no frame's boundary cuts its connections, and it links the two objects' convex parts into one
    (measured, tools demo touching scenes: a spool's top flange joined to a tripod's leg through one such
    voxel pair).  Shading changes brightness across an object's surface, not its chromaticity, so the step
    from one object's colour to the other's, or to the mixed voxel between them, is a boundary too.  Two
    touching objects of one colour are not cut (no colour cue); an object of several colours is cut into
    pieces of one colour, which ``join_parts`` puts back together by support like any other parts."""
    s, ch = _chromaticities(colours)
    i, j = pairs[:, 0], pairs[:, 1]
    lit = (s[i] >= DARK_RGB) & (s[j] >= DARK_RGB)
    return lit & (np.linalg.norm(ch[i] - ch[j], axis=1) > COLOUR_STEP)


def stands_alone(xy: np.ndarray, heights: np.ndarray, *, support_band: float, inset: float,
                 extra: np.ndarray | None = None, cell: float | None = None) -> bool:
    """Whether a part could stand on the plane by itself: its centre of mass (with ``cell``, that of the solid
    under its surface, ``column_centre``; without, the mean of its points (M, 2) in plane coordinates) lies
    inside the convex hull of its points lower than ``support_band`` (its support polygon), at least
    ``inset`` from the hull's edge.  Legs, handles, lids and slivers cut from a wall do
    not; an object does.  extra: more support points (K, 2) (its base seen only below the grouping margin)."""
    foot = xy[heights < support_band]
    if extra is not None and len(extra):
        foot = np.concatenate([foot, extra])
    if len(foot) < 3:
        return False
    try:
        hull = ConvexHull(foot)
    except QhullError:
        return False
    com = xy.mean(axis=0) if cell is None else column_centre(xy, heights, cell)
    # hull.equations: rows (a, b, c) with a x + b y + c <= 0 inside, (a, b) a unit outward normal
    depth = -(hull.equations[:, :2] @ com + hull.equations[:, 2])
    return bool(depth.min() >= inset)


def column_centre(xy: np.ndarray, heights: np.ndarray, cell: float) -> np.ndarray:
    """In-plane centre of mass (2,) of the solid under a surface seen from above: points (M, 2) in plane
    coordinates with heights (M,) over the plane are binned into ``cell`` x ``cell`` columns, each filled
    from the plane up to its highest point (uniform density).  The mean of surface points weighs a part
    by its area: a thin handle or a leg, all surface, would outweigh a solid head or body; a column
    weighs by volume (it over-counts the space under an overhang, which still errs towards the bulk)."""
    keys, inv = np.unique(np.floor(xy / cell).astype(np.int64), axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    top = np.zeros(len(keys))
    np.maximum.at(top, inv, np.maximum(heights, 0.0))
    cnt = np.bincount(inv, minlength=len(keys)).astype(np.float64)
    centre = np.stack([np.bincount(inv, weights=xy[:, k], minlength=len(keys)) for k in range(2)], 1) / cnt[:, None]
    w = top.sum()
    return centre.mean(axis=0) if w <= 0 else (top[:, None] * centre).sum(axis=0) / w


def join_parts(points: np.ndarray, parts: np.ndarray, xy: np.ndarray, heights: np.ndarray, *, link_radius: float,
               reach: float, support_band: float, inset: float, min_voxels: int,
               low: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
               colours: np.ndarray | None = None, cell: float | None = None,
               handed: np.ndarray | None = None, readings=None, step_share: float = 0.0,
               neck_cut: bool = False, spread_ratio: float = 0.0, neck_twin_share: float = 0.0,
               cannot_link: bool = False, normals: np.ndarray | None = None,
               concave_deg: float = 15.0, side_normals: np.ndarray | None = None) -> np.ndarray:
    """Objects (V,) relabelled 0..n-1 from convex parts (V,) of voxels (V, 3) with in-plane coordinates
    (V, 2) and heights above the support plane (V,).

    A part that cannot stand alone (``stands_alone``) or is a crumb (< min_voxels) joins the part it shares
    the most voxel pairs closer than ``link_radius`` with (none: the nearest part within ``reach``); parts
    are visited from the smallest up, so a
    tripod's legs and top, or a jug's handle, end up in one object while two objects that each stand on
    their own stay apart however they touch.

    low: voxels of the band under the grouping margin (points (L, 3), in-plane coordinates (L, 2), connected
    component (L,)): a thin base disc is only seen there.  The components a group touches (within
    link_radius / 2) add to its support polygon.  colours: (V, 3) RGB of the voxels; with them, groups of
    one colour meeting along a seam are joined at the end (``_join_same_colour``); handed: (V,) bool, the crumbs
    ``convex_parts`` handed to a part: a long seam of two of them only does not count there.
    readings: per frame ((h, w), pixels, voxels, depth) of the readings (``seam_steps``); with them and
    ``step_share`` > 0 (``[ingest] seam_step_share``) twins whose seam the frames see stepped are not joined
    (``twins_apart``), and with ``neck_cut`` (``[ingest] twin_neck_cut``) parts that are two twins joined by a
    neck are cut first (``split_twins``; a cut into two twins needs the seam stepped in ``neck_twin_share`` only
    when > 0, ``[ingest] twin_neck_step_share``); with ``spread_ratio`` > 0 (``[ingest] twin_spread_ratio``) the
    join's twins must also be alike in their footprints' spreads (``_alike_spread``); with ``cannot_link``
    (``[ingest] twin_cannot_link``) the join never puts two groups kept apart into one object through others.
    normals: (V, 3) voxel normals (``voxel_normals``, ``[ingest] piece_convex_seam``); with them a part that does
    not stand, hanging on neighbours, joins one it meets along a convex seam (PIECE_CONVEX_SHARE) before one it
    meets in a concave crease (``concave_deg`` as in ``convex_parts``; ``_seam_concavity``).
    side_normals: (V, 3) voxel normals for the neck cut's sides (``[ingest] neck_side_pieces``, ``split_twins``).
    """
    halves = set()
    if neck_cut:
        parts, halves = split_twins(points, parts, xy, heights, adjacency=link_radius / 2, support_band=support_band,
                                    inset=inset, cell=cell, readings=readings,
                                    step_share=step_share if readings is not None else 0.0, radius=link_radius,
                                    twin_share=neck_twin_share, spread_ratio=spread_ratio,
                                    normals=side_normals, concave_deg=concave_deg)
    ids = np.unique(parts[parts >= 0])
    if len(ids) < 2:
        return _relabel(parts)
    ok = parts >= 0
    idx = np.flatnonzero(ok)
    pairs = cKDTree(points[idx]).query_pairs(link_radius, output_type="ndarray")
    a, b = parts[idx[pairs[:, 0]]], parts[idx[pairs[:, 1]]]
    cross = a != b
    n = int(ids.max()) + 1
    links = coo_matrix((np.ones(int(cross.sum())), (a[cross], b[cross])), shape=(n, n)).tocsr()
    links = (links + links.T).tocsr()                                            # (n, n) shared pairs
    concave_links = None
    if normals is not None:                                                      # (n, n) of them concave
        ci, cj = idx[pairs[cross, 0]], idx[pairs[cross, 1]]
        cc = _seam_concavity(points, normals, ci, cj, concave_deg).astype(np.float64)
        concave_links = coo_matrix((cc, (a[cross], b[cross])), shape=(n, n)).tocsr()
        concave_links = (concave_links + concave_links.T).tocsr()
    size = np.bincount(parts[ok], minlength=n)
    group = np.arange(n)                                  # part -> group id (a part id)
    voxels = {int(p): np.flatnonzero(parts == p) for p in ids}
    # parts that stand by themselves (a mallet's head, a tripod's foot): a group mostly made of them that
    # no longer stands once its own pieces joined it (the handle raised, leaning on a neighbour) leans on
    # that neighbour; it joins it only when their colours agree (a tripod's legs and feet)
    solid = np.zeros(n)
    if colours is not None:
        for p in ids:
            v = voxels[int(p)]
            if len(v) >= min_voxels and stands_alone(xy[v], heights[v], support_band=support_band, inset=inset,
                                                     cell=cell):
                solid[p] = len(v)
    for _ in range(20):                                   # until every group stands alone or has no neighbour
        changed = False
        for g in sorted(set(group[ids].tolist()), key=lambda q: (size[group == q].sum(), q)):
            mem = np.flatnonzero(group == g)
            if not len(mem):
                continue
            sel = np.concatenate([voxels[int(p)] for p in mem if int(p) in voxels])
            if len(sel) >= min_voxels and stands_alone(xy[sel], heights[sel], support_band=support_band, inset=inset,
                                                       extra=_low_support(points[sel], low, link_radius / 2),
                                                       cell=cell):
                continue
            w = np.asarray(links[mem].sum(axis=0)).ravel()                 # (n,) pairs to every part
            per_group = np.bincount(group, weights=w, minlength=n)
            per_group[g] = 0
            under = _support_under(xy, heights, sel, group[np.maximum(parts, 0)], ok, g, n)
            if colours is not None and (under.max() > 0 or per_group.max() > 0):
                # a part hangs on or rests on its own object, mostly of its own colour (chromaticity as in
                # _join_same_colour): when some neighbour has its colour, only those are candidates
                cand = np.flatnonzero((under > 0) | (per_group > 0))
                mine = _chroma(colours[sel])
                same = np.zeros(n, bool)
                for q in cand:
                    qv = np.concatenate([voxels[int(p)] for p in np.flatnonzero(group == q) if int(p) in voxels])
                    same[q] = np.linalg.norm(_chroma(colours[qv]) - mine) < SAME_CHROMA
                if (same & (under > 0)).any():
                    under, per_group = np.where(same, under, 0.0), np.where(same, per_group, 0.0)
                elif (same & (per_group > 0)).any():
                    under, per_group = np.zeros(n), np.where(same, per_group, 0.0)
                elif solid[mem].sum() >= LEAN_SOLID_SHARE * len(sel):
                    continue
            if under.max() > 0:            # what it rests on: a lid on its walls, a flange on its core
                # among the groups under it, the one it meets along the longest seam (a lid meets its own
                # walls all around, a touching neighbour that reaches under its rim at a few points)
                seam = np.where(under > 0, per_group, 0.0)
                target = int(seam.argmax()) if seam.max() > 0 else int(under.argmax())
                # it rests on all of them: a lid on each of the walls it meets (walls split from one another
                # by a crease), so they join it together rather than one wall at a time
                for other_g in np.flatnonzero((seam >= REST_SEAM_SHARE * seam.max()) & (seam > 0)):
                    group[group == other_g] = target
            elif per_group.max() > 0:
                if concave_links is not None and len(sel) >= TWIN_VOXELS:
                    # a piece cut from its own object meets it along a convex edge or a surface running on; a
                    # touching neighbour meets it in a concave crease (two solids in contact, Stein et al. 2014).
                    # Pieces of a twin's size only: along a small piece's short seams (a handle's, a rim's) the
                    # normals mix surfaces (a handled mug's pieces of 55-171 voxels: 0.09-0.66 concave with
                    # their own mug, 0.07-1.00 with a neighbour)
                    wc = np.bincount(group, weights=np.asarray(concave_links[mem].sum(axis=0)).ravel(), minlength=n)
                    convex = (per_group >= REST_SEAM_SHARE * per_group.max()) & (wc < PIECE_CONVEX_SHARE * per_group)
                    convex[g] = False
                    if convex.any():
                        per_group = np.where(convex, per_group, 0.0)
                target = int(per_group.argmax())
            else:                 # nothing within link_radius (a thin leg's sparse middle): nearest within reach
                others = np.flatnonzero(ok & (group[np.maximum(parts, 0)] != g))
                if not len(others):
                    continue
                d, j = cKDTree(points[others]).query(points[sel], distance_upper_bound=reach)
                if not np.isfinite(d).any():
                    continue
                target = int(group[parts[others[j[np.argmin(d)]]]])
            group[group == g] = target
            changed = True
        if not changed:
            break
    lab = _join_bases(points, np.where(ok, group[np.maximum(parts, 0)], -1), heights, low, link_radius / 2,
                      support_band, colours)
    if colours is not None:
        apart = twins_apart(points, heights, lab, link_radius, readings, step_share, xy=xy,
                            spread_ratio=spread_ratio) if (
            step_share > 0 and readings is not None) else set()
        for p, q in halves:                       # the halves of a twin cut, in the groups they ended in
            apart.add((int(lab[parts == p][0]), int(lab[parts == q][0])))
        lab = _join_same_colour(points, colours, lab, link_radius, handed, apart, cannot_link=cannot_link)
    return _relabel(lab)


PIECE_CONVEX_SHARE = 0.1  # with ``[ingest] piece_convex_seam``: a part that does not stand (of TWIN_VOXELS at least)
                          # joins, among its neighbours met along REST_SEAM_SHARE of its longest seam, those whose
                          # seam with it has under this share of its voxel pairs concave, when there are any
                          # (measured, tests/same_colour_rows.py: the middle can's wall piece of rows of three
                          # draws 0 and 4, with its own other piece 0.004 and 0.000 concave, with the neighbouring
                          # cans 0.55-0.79; a lying spool's pieces in pairs of spools, draw 3, 0.39-0.85 with every
                          # neighbour, none acted on)


def _seam_concavity(points: np.ndarray, normals: np.ndarray, i: np.ndarray, j: np.ndarray,
                    concave_deg: float) -> np.ndarray:
    """(E,) whether the voxel pairs (i, j) are concave connections: (n_i - n_j) . (x_i - x_j) < 0 with normals
    more than ``concave_deg`` apart (the test of ``convex_parts``, Stein et al. 2014)."""
    bend = np.einsum("ei,ei->e", normals[i] - normals[j], points[i] - points[j])
    cos = np.einsum("ei,ei->e", normals[i], normals[j])
    return (bend < 0) & (cos < np.cos(np.deg2rad(concave_deg)))


def _join_bases(points: np.ndarray, lab: np.ndarray, heights: np.ndarray, low, radius: float, support_band: float,
                colours: np.ndarray | None) -> np.ndarray:
    """Flat groups that are the base of a taller neighbour join it (V,).

    A base disc or a flange whose top wavers around the grouping margin shows above it only in patches
    (its rim, noise peaks); each patch stands on its own and would become an object of its own, while the
    rest of the base lies in the low band (``low``: voxels (L, 3), in-plane coordinates, components (L,)).
    A group lying wholly within ``support_band`` (its 99th height percentile) that touches (within ``radius``)
    a low-band component a taller group touches too joins the nearest such group (with ``colours``: only one
    of its own chromaticity, SAME_CHROMA; a flat object of another colour next to a tall one stays apart)."""
    ids = [int(l) for l in np.unique(lab[lab >= 0])]
    if low is None or not len(low[0]) or len(ids) < 2:
        return lab
    lp, _, comp = low
    d, j = cKDTree(lp).query(points, distance_upper_bound=radius)
    vcomp = np.where(np.isfinite(d), comp[np.minimum(j, len(lp) - 1)], -1)            # (V,) low component touched
    top = {l: float(np.percentile(heights[lab == l], 99)) for l in ids}
    touched = {l: set(np.unique(vcomp[(lab == l) & (vcomp >= 0)]).tolist()) for l in ids}
    chroma = {l: _chroma(colours[lab == l]) for l in ids} if colours is not None else None
    tall = [l for l in ids if top[l] >= support_band]
    out = lab.copy()
    for l in ids:
        if top[l] >= support_band or not touched[l]:
            continue
        cand = [q for q in tall if touched[q] & touched[l]
                and (chroma is None or np.linalg.norm(chroma[q] - chroma[l]) < SAME_CHROMA)]
        if not cand:
            continue
        mine = points[lab == l]
        dist = [float(cKDTree(points[lab == q]).query(mine)[0].min()) for q in cand]
        out[lab == l] = cand[int(np.argmin(dist))]
    return out


def _chroma(rgb: np.ndarray) -> np.ndarray:
    """Median chromaticity (3,) of colours (M, 3): each colour's own (r, g, b) / (r + g + b) first, then the
    per-component median over the colours bright enough to have one (DARK_RGB; all when none is).  A
    median of the raw channels would mix channels of different colours (a piece half in shadow, half lit,
    with a rim of the table's colour) before normalising."""
    rgb = np.asarray(rgb, dtype=np.float64)
    s = rgb.sum(axis=1)
    bright = s >= DARK_RGB
    if bright.any():
        rgb, s = rgb[bright], s[bright]
    return np.median(rgb / np.maximum(s, 1e-9)[:, None], axis=0)


def one_colour(rgb: np.ndarray, radius: float) -> bool:
    """Whether colours (M, 3) are of one colour: at least ONE_COLOUR_SHARE of those bright enough to have a
    chromaticity (DARK_RGB) lie within ``radius`` of their median chromaticity (``_chroma``)."""
    rgb = np.asarray(rgb, dtype=np.float64)
    s = rgb.sum(axis=1)
    bright = s >= DARK_RGB
    if not bright.any():
        return False
    c = rgb[bright] / s[bright, None]
    return bool(np.mean(np.linalg.norm(c - _chroma(rgb), axis=1) <= radius) >= ONE_COLOUR_SHARE)


SEAM_STEP_PAIRS = 20      # image pixel pairs across a seam that ``seam_steps`` needs to judge it
TWIN_VOXELS = 400         # with ``[ingest] seam_step_share``: groups this large (each) ...
TWIN_VOXEL_RATIO = 0.7    # ... whose voxel counts (smaller / larger) ...
TWIN_HEIGHT_RATIO = 0.95  # ... and heights (99th percentile over the plane, lower / higher) agree this closely
                          # are twins: two copies of one item (measured in README "Touching objects of one colour")


def _stepped(stepped: int, flat: int, share: float) -> bool:
    """Whether a seam's pixel pairs (``seam_steps``) are enough to judge it (SEAM_STEP_PAIRS) and at least ``share``
    of them stepped."""
    return stepped + flat >= SEAM_STEP_PAIRS and stepped >= share * (stepped + flat)


def _alike(x: float, y: float, ratio: float) -> bool:
    """Whether the smaller of two sizes is at least ``ratio`` x the larger (twins: voxel counts, heights)."""
    return min(x, y) >= ratio * max(x, y)


def footprint_spreads(xy: np.ndarray) -> np.ndarray:
    """The footprint's spreads (2,) (metres, ascending): across its long axis and along it, the square roots of the
    eigenvalues of the covariance (n - 1) of in-plane coordinates (M, 2) (M >= 2)."""
    d = xy - xy.mean(axis=0)
    c = d.T @ d / max(len(xy) - 1, 1)                                       # (2, 2)
    return np.sqrt(np.maximum(np.linalg.eigvalsh(c), 0.0))


def _alike_spread(xy_a: np.ndarray, xy_b: np.ndarray, ratio: float) -> bool:
    """``[ingest] twin_spread_ratio``: whether two groups' footprints (M, 2), (N, 2) in-plane coordinates spread
    alike (``footprint_spreads``: across and along, each within ``ratio``; 0: not judged, True).

    Two copies of one item side by side are moved copies: their footprints are as wide and as long.  An object
    with two alike ends joined by a narrower part (a spool or a dumbbell lying on its side, a double-ended block)
    falls into two groups of one height and about one voxel count when the joining part goes with one end: that
    group reaches along the axis, the other end alone does not (measured: default demo seed 1, mine_009, a spool's
    flange alone, a disc seen edge on, 0.4 x 1.9 cm against 1.5 x 1.9 with the core; tests/same_colour_rows.py, a
    dumbbell lying 1.3 x 2.2 against 2.0 x 2.8, a double-ended block 1.8 x 1.8 against 1.6 x 2.9)."""
    if ratio <= 0:
        return True
    sa, sb = footprint_spreads(xy_a), footprint_spreads(xy_b)
    return all(_alike(float(x), float(y), ratio) for x, y in zip(sa, sb))


def occlusion_tolerance(z: np.ndarray) -> np.ndarray:
    """The depth step (metres) between nearby readings at depth z beyond which they straddle an occluding edge:
    VIEW_JUMP_M, or VIEW_JUMP_REL x z when larger."""
    return np.maximum(VIEW_JUMP_M, VIEW_JUMP_REL * z)


def seam_steps(points: np.ndarray, lab: np.ndarray, radius: float, readings) -> dict:
    """Per pair of groups (a, b), a < b, that meet in 3-D, the pixel pairs across their seam in the frames:
    {(a, b): (stepped, flat)}.

    points: voxels (V, 3); lab: their groups (V,) (-1 none); readings: per frame ((h, w), pixels (m,) flat
    indices, voxels (m,) of the readings, depth (m,) metres).  In each frame the readings are labelled with their
    voxel's group; pixels 1-3 apart along a row or a column, of two groups, count when one of the two voxels lies
    within ``radius`` of the other group (the seam itself, not an occlusion elsewhere); such a pair is stepped
    when their depths differ by more than VIEW_JUMP_M or VIEW_JUMP_REL x depth (an occluding edge, as in
    ``frame_segments``), else flat.

    Where two solids touch, their surfaces leave the contact in different directions, and a camera on either
    side sees one in front of the other there: the seam is an occluding edge in most frames.  The crease
    between two pieces of one object cut apart by local convexity (the two arms of an L bracket) is a concave
    fold, and a concave fold never makes an occluding contour (a silhouette needs the surface to turn away from
    the camera): where the frames see the two pieces side by side, their depths meet.  Near the seam a piece's own
    silhouette can still hide its body (a jug's handle, a plane's tote), so the share alone does not decide
    (``twins_apart`` asks for two copies of one item as well)."""
    ok = np.flatnonzero(lab >= 0)
    out: dict = {}
    if len(ok) < 2 or readings is None:
        return out
    ids, c = np.unique(lab[ok], return_inverse=True)
    lab = np.full(len(lab), -1)
    lab[ok] = c.reshape(-1)                                # groups 0..G-1 here, ids[g] outside
    G = len(ids)
    pr = cKDTree(points[ok]).query_pairs(radius, output_type="ndarray")
    i, j = ok[pr[:, 0]], ok[pr[:, 1]]
    x = lab[i] != lab[j]
    near = np.unique(np.r_[i[x] * G + lab[j[x]], j[x] * G + lab[i[x]]])    # (voxel, other group) keys
    if not len(near):
        return out
    keys, jumps = [], []
    for (h, w), pix, vox, z in readings:
        L = np.full(h * w, -1)
        L[pix] = lab[vox]
        Vx = np.full(h * w, -1)
        Vx[pix] = vox
        Z = np.zeros(h * w)
        Z[pix] = z
        L, Vx, Z = L.reshape(h, w), Vx.reshape(h, w), Z.reshape(h, w)
        for d in (1, 2, 3):
            for dy, dx in ((0, d), (d, 0)):
                la, lb = L[:h - dy, :w - dx], L[dy:, dx:]
                m = (la >= 0) & (lb >= 0) & (la != lb)
                if not m.any():
                    continue
                la, lb = la[m], lb[m]
                va, vb = Vx[:h - dy, :w - dx][m], Vx[dy:, dx:][m]
                seam = np.isin(va * G + lb, near) | np.isin(vb * G + la, near)
                if not seam.any():
                    continue
                za, zb = Z[:h - dy, :w - dx][m][seam], Z[dy:, dx:][m][seam]
                jump = np.abs(za - zb) > occlusion_tolerance(np.minimum(za, zb))
                keys.append(np.minimum(la, lb)[seam] * G + np.maximum(la, lb)[seam])
                jumps.append(jump)
    if not keys:
        return out
    k, inv = np.unique(np.concatenate(keys), return_inverse=True)
    stepped = np.bincount(inv.reshape(-1), weights=np.concatenate(jumps).astype(np.float64), minlength=len(k))
    total = np.bincount(inv.reshape(-1), minlength=len(k))
    for key, st, n in zip(k, stepped, total):
        out[(int(ids[key // G]), int(ids[key % G]))] = (int(st), int(n - st))
    return out


def twins_apart(points: np.ndarray, heights: np.ndarray, lab: np.ndarray, radius: float, readings,
                step_share: float, *, xy: np.ndarray | None = None, spread_ratio: float = 0.0) -> set:
    """``[ingest] seam_step_share``: the pairs of groups (a, b) (both orders) that are two copies of one item
    standing side by side: twins (each at least TWIN_VOXELS voxels, voxel counts within TWIN_VOXEL_RATIO, heights
    over the plane (V,) within TWIN_HEIGHT_RATIO) whose seam the frames see as an occluding edge in at least
    ``step_share`` of the pixel pairs across it (``seam_steps``, at least SEAM_STEP_PAIRS pairs).  With in-plane
    coordinates ``xy`` (V, 2) and ``spread_ratio`` > 0 their footprints are alike too (``_alike_spread``)."""
    out: set = set()
    steps = seam_steps(points, lab, radius, readings)
    size = {int(l): int(n) for l, n in zip(*np.unique(lab[lab >= 0], return_counts=True))}
    top = {}
    for (a, b), (st, fl) in steps.items():
        if not _stepped(st, fl, step_share):
            continue
        if min(size[a], size[b]) < TWIN_VOXELS or not _alike(size[a], size[b], TWIN_VOXEL_RATIO):
            continue
        for g in (a, b):
            if g not in top:
                top[g] = float(np.percentile(heights[lab == g], 99))
        if not _alike(top[a], top[b], TWIN_HEIGHT_RATIO):
            continue
        if xy is not None and not _alike_spread(xy[lab == a], xy[lab == b], spread_ratio):
            continue
        out |= {(a, b), (b, a)}
    return out


NECK_CONDUCTANCE = 0.008  # with ``[ingest] twin_neck_cut``: a part splits into twins only across a cut this narrow
                          # (adjacency pairs cut / those of the smaller side; measured: two cans or boxes joined at
                          # their tops 0.003-0.006, one can or mug cut through its own body 0.012-0.036)
NECK_SIDE_SHARE = 0.25    # ... leaving at least this share of the part's voxels on either side (a row of three: 1/3)
NECK_ELONGATION = 1.8     # ... of a part whose footprint is this elongated (variance along / across; two discs side by
                          # side 5, two 7 x 5 cm boxes at least 2; a round part, one item, is not bisected at all)


def split_twins(points: np.ndarray, parts: np.ndarray, xy: np.ndarray, heights: np.ndarray, *, adjacency: float,
                support_band: float, inset: float, cell: float | None, readings=None, step_share: float = 0.0,
                radius: float = 0.0, twin_share: float = 0.0, spread_ratio: float = 0.0,
                normals: np.ndarray | None = None, concave_deg: float = 15.0) -> tuple[np.ndarray, set]:
    """``[ingest] twin_neck_cut``: parts (V,) with every part that is two copies of one item joined by a narrow neck
    cut in two, and the pairs (a, b) (both orders) of the two halves.  Only parts of at least 2 x TWIN_VOXELS
    voxels whose footprint is elongated (NECK_ELONGATION) are tried.

    Two identical items of one height standing side by side meet where their tops touch: coplanar faces, no
    crease, no occluding edge, so local convexity and the frames leave them one part joined through a neck a few
    voxels wide.  The part's adjacency graph (pairs within ``adjacency``) is cut by spectral bisection (Shi &
    Malik 2000, normalized cuts: the second eigenvector of the normalized adjacency D^-1/2 A D^-1/2), at the
    sweep position of least conductance among those leaving NECK_SIDE_SHARE of the voxels on either side; the cut
    stands when its conductance is under NECK_CONDUCTANCE, both sides hold TWIN_VOXELS, stand as high (within
    TWIN_HEIGHT_RATIO) and could each stand on the plane by itself (``stands_alone``), and, with ``step_share`` > 0,
    the frames see the seam between them stepped in that share of its pixel pairs (``seam_steps`` of ``readings``
    within ``radius``; without that check two hand planes and an L bracket of the touching demo were cut at a
    neck); the sides are tried again (a row of three or four).
    twin_share (``[ingest] twin_neck_step_share``, > 0): when the two sides are twins by the join's own test as
    well (voxel counts within TWIN_VOXEL_RATIO, footprints spread alike within ``spread_ratio``, ``_alike_spread``),
    their seam needs only this share stepped.  The neck is where the tops of the two items touch, coplanar, and
    its pixel pairs are flat in every frame; two handled mugs or cans joined there have seams stepped in 0.29-0.37
    of their pairs (tests/same_colour_rows.py), under ``step_share``.  A part of one object cut at a neck into two
    sides of unlike voxel counts (touching demo seed 0: 594 against 908 voxels, seam 0.26) is still held to
    ``step_share``.
    normals (``[ingest] neck_side_pieces``): (V, 3) voxel normals; with them each side counts the pieces of its own
    item lying in other parts (``_side_pieces``; a piece both sides meet counts with the one it shares more voxel
    pairs with) in the stand test (a side that does not stand by itself may stand with them) and in the twin test of
    ``twin_share`` (voxel counts and spreads with them).
    points (V, 3), xy (V, 2) in-plane coordinates, heights (V,) over the plane."""
    from scipy.sparse.linalg import ArpackNoConvergence, eigsh
    out, apart = parts.copy(), set()
    ids, size = np.unique(parts[parts >= 0], return_counts=True)
    nxt = int(parts.max()) + 1 if len(ids) else 0
    queue = [int(p) for p in ids[size >= 2 * TWIN_VOXELS]]
    while queue:                                      # a row of three: one cut, then the pair left
        p = queue.pop(0)
        v = np.flatnonzero(out == p)
        n = len(v)
        ev = np.linalg.eigvalsh(np.cov(xy[v].T))                  # footprint variances, ascending
        if ev[1] < NECK_ELONGATION * max(ev[0], 1e-12):
            continue
        pr = cKDTree(points[v]).query_pairs(adjacency, output_type="ndarray")
        if not len(pr):
            continue
        ends = (np.r_[pr[:, 0], pr[:, 1]], np.r_[pr[:, 1], pr[:, 0]])
        A = coo_matrix((np.ones(2 * len(pr)), ends), shape=(n, n)).tocsr()                # (n, n) symmetric
        deg = np.asarray(A.sum(axis=1)).ravel()
        dinv = 1.0 / np.sqrt(np.maximum(deg, 1.0))
        M = A.multiply(dinv[:, None]).multiply(dinv[None, :]).tocsr()
        try:
            vals, vecs = eigsh(M, k=2, which="LA", v0=np.linspace(1.0, 2.0, n), tol=1e-6, maxiter=5000)
        except ArpackNoConvergence:
            continue
        f = vecs[:, int(np.argmin(vals))] * dinv
        order = np.argsort(f, kind="stable")
        rank = np.empty(n, int)
        rank[order] = np.arange(n)
        ra, rb = np.minimum(rank[pr[:, 0]], rank[pr[:, 1]]), np.maximum(rank[pr[:, 0]], rank[pr[:, 1]])
        diff = np.zeros(n + 1)
        np.add.at(diff, ra + 1, 1.0)                  # an edge crosses the prefixes k with ra < k <= rb
        np.add.at(diff, rb + 1, -1.0)
        cut = np.cumsum(diff)[:n]                     # cut[k]: the first k voxels in order against the rest
        vol = np.cumsum(deg[order])
        k = np.arange(n)
        side = np.minimum(vol[np.maximum(k - 1, 0)], vol[-1] - vol[np.maximum(k - 1, 0)])
        ok = (k >= NECK_SIDE_SHARE * n) & (k <= (1 - NECK_SIDE_SHARE) * n) & (side > 0)
        if not ok.any():
            continue
        cond = np.where(ok, cut / np.maximum(side, 1.0), np.inf)
        kb = int(np.argmin(cond))
        if cond[kb] >= NECK_CONDUCTANCE:
            continue
        a, b = v[order[:kb]], v[order[kb:]]
        ha, hb = np.percentile(heights[a], 99), np.percentile(heights[b], 99)
        if not _alike(ha, hb, TWIN_HEIGHT_RATIO) or min(len(a), len(b)) < TWIN_VOXELS:
            continue
        whole = (a, b)                                # each side with the pieces of its own item (neck_side_pieces)
        if normals is not None:
            pa, pb = (_side_pieces(points, normals, out, p, s, radius, concave_deg) for s in (a, b))
            whole = tuple(np.concatenate([s, np.flatnonzero(np.isin(out, [q for q, m in mine.items()
                                                                          if m > other.get(q, 0)]))])
                          for s, mine, other in ((a, pa, pb), (b, pb, pa)))
        if not all(stands_alone(xy[s], heights[s], support_band=support_band, inset=inset, cell=cell) or (
                len(w) > len(s) and stands_alone(xy[w], heights[w], support_band=support_band, inset=inset, cell=cell))
                   for s, w in zip((a, b), whole)):
            continue
        if step_share > 0:                            # the frames see the seam between the halves as an edge too
            two = np.full(len(parts), -1)
            two[a], two[b] = 0, 1
            st, fl = seam_steps(points, two, radius, readings).get((0, 1), (0, 0))
            share = step_share
            wa, wb = whole
            if twin_share > 0 and _alike(len(wa), len(wb), TWIN_VOXEL_RATIO) and _alike_spread(xy[wa], xy[wb],
                                                                                                 spread_ratio):
                share = min(step_share, twin_share)
            if not _stepped(st, fl, share):
                continue
        out[b] = nxt
        apart |= {(int(p), nxt), (nxt, int(p))}
        queue += [q for q, s in ((int(p), a), (nxt, b)) if len(s) >= 2 * TWIN_VOXELS]
        nxt += 1
    return out, apart


def _side_pieces(points: np.ndarray, normals: np.ndarray, parts: np.ndarray, p: int, side: np.ndarray, radius: float,
                 concave_deg: float) -> dict:
    """``[ingest] neck_side_pieces``: the pieces of a neck cut's side's own item lying in other parts, {part: voxel
    pairs of its seam with the side}: the parts of ``parts`` (V,) other than the cut part ``p``, smaller than the side
    (voxel indices), that meet it (voxel pairs within ``radius``) along a seam under PIECE_CONVEX_SHARE concave
    (``_seam_concavity`` of ``normals`` (V, 3) at ``concave_deg``).

    Local convexity leaves an item whose walls its neighbours hide next to the contacts in pieces, and the neck cut
    gets only the piece holding its top: alone its centre of mass lies outside the walls it shows, or it holds too few
    voxels to be the twin of the other side (tests/same_colour_rows.py, rows of three cans draws 1 and 7: the end
    can's side of 1044 and 1142 voxels, its own other piece of 125 and 174 voxels apart; a pair of cans, draw 5, 694
    voxels against 1354, 1353 with its pieces).  A piece cut from its own item meets it along a convex edge or a
    surface running on; a touching neighbour meets it in a concave crease (Stein et al. 2014), and a neighbour's
    part as large as the side is not a piece of it.  A piece both sides meet so counts with the one it shares the
    more pairs with (``split_twins``).  The pieces count in the cut's tests only; where they go is the join's."""
    rest = np.flatnonzero((parts >= 0) & (parts != p))
    if not len(rest):
        return {}
    near = cKDTree(points[rest]).query_ball_point(points[side], radius)
    counts = np.fromiter((len(x) for x in near), int, len(near))
    if not counts.sum():
        return {}
    i = np.repeat(side, counts)
    j = rest[np.concatenate([np.asarray(x, int) for x in near if len(x)])]
    ids, inv = np.unique(parts[j], return_inverse=True)
    inv = inv.reshape(-1)
    pairs = np.bincount(inv, minlength=len(ids))
    concave = np.bincount(inv, weights=_seam_concavity(points, normals, i, j, concave_deg).astype(np.float64),
                          minlength=len(ids))
    size = np.bincount(parts[rest])
    return {int(q): int(n) for q, n, c in zip(ids, pairs, concave)
            if c < PIECE_CONVEX_SHARE * n and size[q] < len(side)}


def _join_same_colour(points: np.ndarray, colours: np.ndarray, lab: np.ndarray, radius: float,
                      handed: np.ndarray | None = None, apart: set | None = None, *,
                      cannot_link: bool = False) -> np.ndarray:
    """Join neighbouring groups of one colour (an L-shaped object: two blocks that each stand): each group
    joins the one neighbour of its colour (median chromaticity (r, g, b) / (r + g + b) within SAME_CHROMA)
    along which most of its voxels lie (within ``radius``), when that is at least SEAM_SHARE of them, and
    every neighbour of its colour it meets along a long seam (SEAM_LONG of its voxels).
    Shading changes brightness across an object's faces, not its chromaticity.
    One neighbour per group, the one it shares the longest seam with: a post whose own pegs or base were
    cut off by creases meets them along far more of its voxels than a touching neighbour of the same colour
    it meets at a peg's tip, so the two posts are not glued together (two touching objects of one colour
    that meet each other along a longer seam than any of their own pieces stay joined: no cue tells them
    apart without masks).
    handed: optional (V,) bool, crumbs ``convex_parts`` handed to a part (``[ingest] crumb_grow``): a long seam
    (a join beyond the longest one) needs at least SEAM_SHARE of the group's voxels on it in pairs where one of
    the two voxels was not handed out.  Where two objects of one colour touch, the band of crumbs along their
    contact is shared out between them, and the crumbs handed to one lie next to those handed to the other: a
    seam of crumbs only, which the parts as they were before the growth do not have (measured, two pegged posts
    of one colour whose thin bases touch, tests/test_thin_parts.py: 15 crumbs given to one base made its seam
    with the other 0.098 of its voxels, over SEAM_LONG, none of it with a voxel of its own).  The crease band
    between one object's own pieces is crumbs too, so the seams themselves keep every voxel: counted without
    the crumbs, the touching demo of seed 0 gave 94 objects for 78 (the longest seams lost), and the long
    seams alone without them split a hand plane on the default demo of seed 0 (two of its pieces' seams with its
    body 0.099 and 0.254 of their voxels, 0.043 and 0.032 with a voxel of their own, 0.000 between own voxels
    only).
    apart: pairs of groups (both orders) not to be joined (``twins_apart``, the halves of ``split_twins``).  Alone
    it only keeps the two from joining each other directly; with ``cannot_link`` (``[ingest] twin_cannot_link``)
    it holds for the objects the join builds: two sets of groups are not merged when one holds a group kept apart
    from a group of the other (cannot-link constraints kept through the merges, as in constrained clustering,
    Wagstaff et al. 2001).  Two twins each meeting a third, smaller group of their colour (a piece holding a bit
    of both, a handle between them) otherwise both join it and so each other (tests/same_colour_rows.py, rows of
    two boxes and of three boxes and mugs)."""
    ids = [int(l) for l in np.unique(lab[lab >= 0])]
    if len(ids) < 2:
        return lab
    med = {l: _chroma(colours[lab == l]) for l in ids}
    apart = apart or set()
    trees = {l: cKDTree(points[lab == l]) for l in ids}
    if handed is not None:
        own_trees = {l: cKDTree(points[(lab == l) & ~handed]) for l in ids}
    parent = {l: l for l in ids}
    members = {l: {l} for l in ids}                       # a root's groups

    def root(x):
        while parent[x] != x:
            x = parent[x]
        return x

    def union(x, y):
        rx, ry = root(x), root(y)
        if rx == ry or (cannot_link and any((u, v) in apart for u in members[rx] for v in members[ry])):
            return
        parent[rx] = ry
        members[ry] |= members.pop(rx)

    for a in ids:
        best, best_share = -1, SEAM_SHARE
        mine = points[lab == a]
        mine_handed = handed[lab == a] if handed is not None else None
        for b in ids:
            if b == a or np.linalg.norm(med[a] - med[b]) >= SAME_CHROMA or (a, b) in apart:
                continue
            near = np.isfinite(trees[b].query(mine, distance_upper_bound=radius)[0])
            share = float(near.mean())
            long = share >= SEAM_LONG
            if long and handed is not None:       # not a seam of crumbs handed out only
                kept = near & ~mine_handed
                if own_trees[b].n:
                    kept |= np.isfinite(own_trees[b].query(mine, distance_upper_bound=radius)[0])
                long = kept.mean() >= SEAM_SHARE
            if long:
                union(a, b)
            if share > best_share or (share == best_share and best < 0):
                best, best_share = b, share
        if best >= 0:
            union(a, best)
    return np.array([root(int(l)) if l >= 0 else -1 for l in lab])


def _low_support(pts: np.ndarray, low, radius: float) -> np.ndarray | None:
    """In-plane coordinates (K, 2) of the low-band components touching points (M, 3)."""
    if low is None or not len(low[0]):
        return None
    lp, lxy, comp = low
    d, j = cKDTree(lp).query(pts, distance_upper_bound=radius)
    hit = np.unique(comp[j[np.isfinite(d)]])
    if not len(hit):
        return None
    # only as far out as 1.5 x the group's own reach: on a noisy table the band's components can run far
    sup = lp[np.isin(comp, hit)]
    c = pts.mean(axis=0)
    r = np.linalg.norm(pts - c, axis=1).max()
    return lxy[np.isin(comp, hit)][np.linalg.norm(sup - c, axis=1) <= 1.5 * r]


def _support_under(xy: np.ndarray, heights: np.ndarray, sel: np.ndarray, vox_group: np.ndarray, ok: np.ndarray,
                   g: int, n: int) -> np.ndarray:
    """(n,) per group: voxels lying under the footprint of the voxels ``sel`` (inside their 2-D convex hull
    in the plane, lower than their lowest point).  An object touching a part from the side has (almost) none
    there; the part it rests on has many."""
    from scipy.spatial import Delaunay
    foot = xy[sel]
    out = np.zeros(n)
    try:
        tri = Delaunay(foot[ConvexHull(foot).vertices]) if len(foot) >= 4 else None
    except QhullError:
        tri = None
    if tri is None:
        return out
    cand = np.flatnonzero(ok & (vox_group != g) & (heights < heights[sel].min()))
    if len(cand):
        inside = cand[tri.find_simplex(xy[cand]) >= 0]
        out += np.bincount(vox_group[inside], minlength=n)
    out[out < UNDER_MIN] = 0
    return out


def _relabel(lab: np.ndarray) -> np.ndarray:
    out = np.full(len(lab), -1)
    ok = lab >= 0
    if ok.any():
        _, out[ok] = np.unique(lab[ok], return_inverse=True)
    return out


# --- per-frame boundaries, checked for consistency across views -------------------------------------------

VIEW_STEP = 2            # pixels: normals and crease tests compare readings this far apart on either side
VIEW_JUMP_M = 0.01       # a depth step larger than this (or VIEW_JUMP_REL x depth) between readings VIEW_STEP
VIEW_JUMP_REL = 0.015    # ... apart along a row or column is an occluding edge
CRUMB_VOXELS = 5         # parts smaller than this after the view check are absorbed by their nearest part
VIEW_AGREE = 0.5         # adjacent voxels stay linked when the frames that see both put them in one segment
                         # at least this often


def frame_segments(depth: np.ndarray, region: np.ndarray, K: np.ndarray, concave_deg: float) -> np.ndarray:
    """(H, W) int segment ids (-1 = boundary or outside ``region``) of one depth image (H, W) metres.

    The readings of ``region`` (H, W) bool (above the support plane) are split along occluding edges (a
    depth step between readings 2 x VIEW_STEP pixels apart larger than VIEW_JUMP_M or VIEW_JUMP_REL x
    depth) and concave creases (Stein et al.'s test, (n_a - n_b) . (x_a - x_b) < 0 with the normals more
    than ``concave_deg`` apart, between the readings VIEW_STEP pixels on either side); the pixels on such a
    boundary belong to no segment, the 4-connected rest are the segments.  Normals come from the image
    grid (cross product of the central differences, only across continuous depth), so they never mix two
    surfaces the way a neighbourhood in the fused cloud does.
    """
    from scipy.ndimage import binary_erosion, label, uniform_filter
    h, w = depth.shape
    s = VIEW_STEP
    z = np.where(region, depth, 0.0).astype(np.float64)
    v, u = np.mgrid[0:h, 0:w]
    P = np.stack([(u - K[0, 2]) * z / K[0, 0], (v - K[1, 2]) * z / K[1, 1], z], -1)      # (H, W, 3)
    ok = z > 0
    tol = occlusion_tolerance(z)

    def shift(a, dy, dx, fill):
        out = np.full_like(a, fill)
        ys, yd = (slice(dy, None), slice(None, h - dy)) if dy >= 0 else (slice(None, h + dy), slice(-dy, None))
        xs, xd = (slice(dx, None), slice(None, w - dx)) if dx >= 0 else (slice(None, w + dx), slice(-dx, None))
        out[yd, xd] = a[ys, xs]                 # out[y, x] = a[y + dy, x + dx]
        return out

    boundary = np.zeros((h, w), bool)
    normal_ok = ok.copy()
    nb = {}
    for dy, dx in ((0, s), (0, -s), (s, 0), (-s, 0)):
        zq, okq = shift(z, dy, dx, 0.0), shift(ok, dy, dx, False)
        jump = ok & okq & (np.abs(zq - z) > tol)
        boundary |= jump & (z > zq)             # the far side of an occluding edge: a thin near part stays whole
        normal_ok &= okq & ~jump
        nb[(dy, dx)] = shift(P, dy, dx, 0.0)
    n = np.cross(nb[(0, s)] - nb[(0, -s)], nb[(s, 0)] - nb[(-s, 0)])
    n /= np.maximum(np.linalg.norm(n, axis=-1, keepdims=True), 1e-12)
    n *= np.where(np.einsum("hwi,hwi->hw", n, P) > 0, -1.0, 1.0)[..., None]           # face the camera
    # average over a (2s+1)^2 window of valid normals: sensor noise makes single-pixel normals scatter
    wgt = normal_ok.astype(np.float64)
    n = np.stack([uniform_filter(n[..., i] * wgt, 2 * s + 1) for i in range(3)], -1)
    n /= np.maximum(np.linalg.norm(n, axis=-1, keepdims=True), 1e-12)
    normal_ok &= uniform_filter(wgt, 2 * s + 1) > 0.5
    cos_thr = np.cos(np.deg2rad(concave_deg))
    for dy, dx in ((0, s), (s, 0)):
        Pa, Pb = shift(P, -dy, -dx, 0.0), shift(P, dy, dx, 0.0)
        na, nb_ = shift(n, -dy, -dx, 0.0), shift(n, dy, dx, 0.0)
        both = shift(normal_ok, -dy, -dx, False) & shift(normal_ok, dy, dx, False)
        bend = np.einsum("hwi,hwi->hw", na - nb_, Pa - Pb)
        cos = np.einsum("hwi,hwi->hw", na, nb_)
        boundary |= both & (bend < 0) & (cos < cos_thr)
    # one ring off every segment: a bridge of a pixel or two where a crease went unseen does not join two
    # surfaces (a thin part a few pixels wide keeps its core)
    seg, _ = label(binary_erosion(ok & ~boundary, np.ones((3, 3), bool)))
    return seg.reshape(h, w) - 1


def view_votes(inv: np.ndarray, segment: np.ndarray, frame: np.ndarray, n_voxels: int):
    """Per voxel, the share of its readings in each frame's segments: a sparse (V, S) matrix and the frame
    (S,) of each of the S segments.  inv: (M,) voxel of each reading; segment: (M,) its segment id within
    its frame (-1 none); frame: (M,) its frame index."""
    from scipy.sparse import csr_matrix
    ok = segment >= 0
    keys, col = np.unique(np.c_[frame[ok], segment[ok]], axis=0, return_inverse=True)
    col = col.reshape(-1)
    M = csr_matrix((np.ones(int(ok.sum())), (inv[ok], col)), shape=(n_voxels, len(keys)))
    seg_frame = keys[:, 0]
    nf = int(seg_frame.max()) + 1 if len(keys) else 1
    per_frame = (M @ csr_matrix((np.ones(len(keys)), (np.arange(len(keys)), seg_frame)), shape=(len(keys), nf))).tocsr()
    M = M.tocoo()
    denom = np.asarray(per_frame[M.row, seg_frame[M.col]]).ravel()
    return csr_matrix((M.data / denom, (M.row, M.col)), shape=M.shape), seg_frame


def view_disagreement(pairs: np.ndarray, votes) -> np.ndarray:
    """(E,) bool: adjacent voxel pairs (E, 2) that the frames seeing both put in one segment less often than
    VIEW_AGREE, or with a voxel that lies on a boundary in every frame that sees it (where objects touch, the
    readings sit on an occluding edge or a crease in every view).  Pairs no frame sees both of, with
    voxels voted elsewhere, are not judged (False)."""
    M, seg_frame = votes
    if not len(pairs):
        return np.zeros(0, bool)
    from scipy.sparse import csr_matrix
    A, B = M[pairs[:, 0]], M[pairs[:, 1]]
    same = np.asarray(A.multiply(B).sum(axis=1)).ravel()
    nf = int(seg_frame.max()) + 1
    F = csr_matrix((np.ones(len(seg_frame)), (np.arange(len(seg_frame)), seg_frame)), shape=(len(seg_frame), nf))
    fa, fb = (A @ F), (B @ F)
    both = np.asarray((fa > 0).multiply(fb > 0).sum(axis=1)).ravel()
    voted = np.asarray(M.sum(axis=1)).ravel() > 0
    unvoted = ~voted[pairs[:, 0]] | ~voted[pairs[:, 1]]
    return ((both > 0) & (same < VIEW_AGREE * np.maximum(both, 1))) | unvoted
