"""Single-view labelling: every frame on its own, every object in it matched against the library.

Conventions (see DEVELOPERS.md and :mod:`protomine.mine.posesearch`):

- Each frame is treated as a capture of its own (no fusion across frames): ``ingest.find_objects`` with
  ``frame_ids=[frame]`` fits that frame's support plane and gives its objects (mask ids when the capture
  has masks and ``use_masks``, else geometry-only proposals), each with an object frame of its own
  (origin = base centre on the plane, z = up, x = the reference direction of that frame's plane).
- Each object is lifted from that one frame (``ingest.volume.lift``), turned into matching features with
  the library's own grid and channel weights, and matched against every prototype over all yaws and the
  library's scales (``mine.posesearch``: the FFT pose search of ``pose_distances``, with the scaled
  prototype spectra of ``PoseBank`` built once per run rather than once per call).  The volume is partial (unseen cells have
  observation weight 0), which the observation-weighted distance ignores.  ``weighted=False`` is the
  plain baseline: W = 1 on every cell of the object and of the prototypes.
- yaw_deg: object ~= prototype rolled by yaw, i.e. the prototype's canonical x axis turned by yaw about
  up from the object frame's x axis; reported modulo the prototype's period (0 for continuous symmetry).
  With a library mined with tilts the search also runs over the library's up directions
  (``mine.tilts.TiltBank``): the pose is R = Rz(yaw) tilt(u) (``rotations``), ``face`` the prototype's
  resting face nearest u, yaw modulo that face's period, and ``rotation`` the quaternion
  [qx, qy, qz, qw] of x_world = R_world x_prototype + t in the capture's world frame.

Score (documented once, used by the open-set decision):
    score_k = 1 - T_4((ln d_k - mu_k) / sigma_k)        (``library.match_score``: Student-t tail, 4 dof)
with (mu_k, sigma_k) the library's robust fit (median, scaled MAD) of the log of the distances of *one-frame* volumes of the mined
objects to their own prototype (``single_mu``, ``single_sigma``, learnt at mining time without labels):
the fraction of single views of prototype k's own members expected to fit worse than this one (a match on
another face than the canonical one, a tilted copy, takes the library's ``single_tilt_mu``,
``single_tilt_sigma`` when it has them, fitted on the views of members resting on other faces:
``pipeline.split_calibration``; with ``[mine] calibrate_searched`` each held-out view's face is the one this
search, :class:`ViewSearch`, finds for it, so canonical and tilted are told apart as here).  It is in
[0, 1], higher is more confident, and comparable across prototypes because each prototype's distances
are measured against its own spread.  The object's cluster is the prototype with the smallest distance,
the assignment rule of mining itself (an object with no observed cell in common with any prototype gets
cluster None and score 0); alternatives are the next nearest prototypes, with their scores.  It is
"unknown" when that score is below the library's ``unknown_cut`` (``mine.openset``: the split-conformal
cut at ``unknown_alpha`` on held-out single views of mined objects, so at most that share of known-class
views is flagged), i.e. the per-prototype distance threshold ``exp(mu_k + sigma_k * T_4^-1(1 - unknown_cut))``.
A library mined with ``[mine] unknown_ratio`` (attributes ``unknown_tilt_ratios``, ``unknown_rule_cut``) scores a
match on another face by the conformal p-value of its best/second-best distance ratio instead, and flags by
``unknown_rule_cut`` (``mine.openset``, the other-face rule).

A library mined with ``[mine] view_normalise_calibrate`` (fields ``single_view_mu`` ..., attribute ``unknown_view_cut``;
:func:`view_calibration`) scores instead the lesser of the scored distance and the view-normalised one by its own
calibration, fitted on the held-out views with their cameras (``pipeline.view_calibration``), and flags by
``unknown_view_cut``; with ``[mine] view_normalise_ratio`` (``unknown_view_ratios``, ``unknown_view_ratio_cut``) that
score is joined with the conformal p-value of the best/second-best decision-distance ratio by Fisher's combination
(``openset.fisher_combine``) and flagged by ``unknown_view_ratio_cut``; with ``[mine] view_normalise_unseen`` (attribute
``unknown_view_unseen``) the conformal p-value of the view's unseen share (``mine.unseen``) joins them (Fisher's
combination of three, ``openset.fisher_combine_many``), and ``match`` returns ``unseen_share`` (NaN where not
computed); with ``[mine] view_normalise_stretch`` (attribute ``unknown_view_stretch``) the conformal p-value of the
stretch |ln fit_scale| the pose search needed at each prototype (``openset.scale_stretch``) joins them too (with
``[mine] view_normalise_stretch_face``, attributes ``unknown_view_stretch_canonical`` / ``_other``: among the held-out
views decided on the same face kind as the match; with ``[mine] stretch_refine`` at the continuous scale of
``mine.stretchfit``, returned as ``stretch_scale``); with ``[mine] label_size_score`` (attributes ``unknown_view_size``,
``unknown_view_size_cut``) the conformal p-value of the view's metric size mismatch (``mine.metricsize``) at the
prototype its shape alone puts nearest (:func:`shape_nearest_size`), among the held-out views' at theirs (per face kind:
``unknown_view_size_canonical`` / ``_other``), joins them too, flagged by ``unknown_view_size_cut``; ``match`` returns
``size_mismatch`` (NaN where not computed) and ``ratio_distance`` (the distances of the best/second-best ratio).
``match`` also returns ``scored_distance`` (the distance the pose search's calibration scores) and
``view_distance`` (NaN where none) for that calibration, and ``score_parts`` (n, K, P): the tail probabilities the
score joins by Fisher's combination, in that order: the calibrated score, the ratio's p-value, then the p-values of the
unseen share, the stretch, the members' margin and the size where their keys are on (P = 1: no combination, the score itself;
``tools/unknown_views.py`` prints them per view).

Record (one dict per object and frame; JSON-ready): the label record of :mod:`protomine.records`, with
``source`` "single-view" and at most ``N_ALTERNATIVES`` alternatives (the next nearest prototypes, in
decision order, each with its distance and score); with ``rotation`` [qx, qy, qz, qw] and ``face`` (see above).
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from ..capture import Capture, read_capture
from ..cores import one_blas_thread
from ..errors import InputError
from ..ingest.pipeline import capture_rng, pixel_bbox, unique_capture_names, view_camera
from ..ingest.proposals import SceneObjects, centre_candidates, find_objects, shifted_frames
from ..ingest.truncation import centroid_cut_direction, cut_direction, cut_pixels, view_cut
from ..ingest.volume import Grid, lift_many, matching_features
from ..mine.library import VIEW_CALIBRATION_FIELDS, Library, reduce_yaw
from ..mine.memberknn import Members, class_knn, cluster_members, load_members, member_rows, searched_distances
from ..mine.metricsize import member_metres, size_mismatch
from ..geometry import plane_basis
from ..mine.faces import face_poses
from ..mine.openset import (best_second_ratio, fisher_combine_many, library_cut, member_pvalues, ratio_pvalue, rule_scores,
                             scale_stretch)
from ..mine.reliability import reliable_distances
from ..mine.viewdistance import score_mass, score_rings, tilted_distances
from ..progress import Bar, Recorder, bar, detail, replay
from ..records import pixels_to_rle
from ..mine.tilts import TiltBank, TiltGrid, grid_aspect
from .. import rotations as rot
from ..mine.stretchfit import refined_scales
from ..mine.unseen import unseen_shares
from ..mine.viewnorm import ViewNormaliser
from . import symmetric as sym
from ..mine.viewsearch import ExactFaces, ViewSearch  # noqa: F401  (ExactFaces: the label search's part, re-exported)
from ..rotations import matrix_to_quat

N_ALTERNATIVES = 3
MIN_PIXELS = 10          # fewer object pixels in a frame than this: too little to lift (as ingest's single views)


def symmetry_name(code: int) -> str:
    """Library symmetry code (0 continuous, 1 none, n) -> "continuous" | "none" | "n-fold:n"."""
    code = int(code)
    return "continuous" if code == 0 else "none" if code == 1 else f"n-fold:{code}"


@dataclass
class Matcher:
    """A library prepared for matching: prototypes, calibration and the lifting settings it was built with.

    P (K, C, R, A, H) features, V (K, R, A, H) weights (ones when ``weighted`` is False).  ``exact_faces``
    (the library's ``[mine] face_pairs``; with tilts only) also searches each prototype's exact resting
    directions (:class:`ExactFaces`).  ``tolerant`` (the library's ``[mine] tolerant_residual``): scores judge
    the tolerant distance of ``mine.viewdistance`` on every face, as the library's calibration did; ``rings``
    (the ring beyond the footprint and its weight, None = counted like the rest: the library's ``[mine]
    score_margin_ring``) likewise.  ``unseen`` (the library's ``[mine] unseen_charge``): every decision distance grows
    by it x the share of the view's surface the posed prototype has not observed (``mine.unseen``).
    """

    library: Library
    grid: Grid
    free_weight: float
    colour_weight: float
    scales: tuple[float, ...]
    unknown_cut: float
    weighted: bool = True
    exact_faces: bool = False
    tolerant: bool = False
    rings: tuple[int, float] | None = None
    mass: float = 0.0
    refine_top: int = 0
    centre_offsets: tuple[float, ...] = ()
    cut_offsets: tuple[float, ...] = ()
    view_top: int = 0
    view_within: float = 1.5
    view_score: bool = False
    view_calibrated: bool = False
    view_cut: bool = False
    view_cut_within: float | None = None
    view_cut_decide: float = 0.0
    view_cut_rest: bool = False
    chunk_size: int = 512
    symmetric_top: int = 0
    unseen: float = 0.0
    unseen_score: bool = False
    stretch_score: bool = False
    stretch_refine: bool = False
    member_k: int = 0
    member_within: float = 0.0
    member_top: int = 3
    member_weight: float = 0.5
    member_score: bool = False
    size_weight: float = 0.0
    size_score: bool = False
    cut_split: bool = False
    cut_shrink: float = 0.0
    cut_split_below: float = 1.0
    P: np.ndarray = field(init=False)
    V: np.ndarray = field(init=False)
    search: ViewSearch = field(init=False)
    groups: list[np.ndarray] = field(init=False)
    tilts: TiltGrid = field(init=False)
    tilt_ratios: np.ndarray | None = field(init=False)
    normaliser: ViewNormaliser | None = field(init=False)
    view_ratios: np.ndarray | None = field(init=False)
    view_unseen: np.ndarray | None = field(init=False)
    view_stretch: np.ndarray | None = field(init=False)
    view_stretch_kinds: tuple = field(init=False)
    members: Members | None = field(init=False)
    view_members: np.ndarray | None = field(init=False)
    view_member_classes: np.ndarray | None = field(init=False)
    view_size: np.ndarray | None = field(init=False)
    view_size_kinds: tuple = field(init=False)
    split_cuts: tuple | None = field(init=False)
    _metres: tuple | None = field(init=False, default=None)   # (metres,) once computed (:meth:`metres`)

    def __post_init__(self) -> None:
        rule = self.library.attrs.get("unknown_tilt_ratios")
        self.tilt_ratios = None if rule is None or not self.weighted else np.asarray(rule, np.float64)
        vr = self.library.attrs.get("unknown_view_ratios")
        self.view_ratios = (np.asarray(vr, np.float64) if self.view_calibrated and vr is not None
                            and "unknown_view_ratio_cut" in self.library.attrs else None)
        vu = self.library.attrs.get("unknown_view_unseen")
        self.view_unseen = (np.asarray(vu, np.float64) if self.view_ratios is not None and self.unseen_score
                            and vu is not None else None)
        vs = self.library.attrs.get("unknown_view_stretch")   # ``[mine] view_normalise_stretch``
        self.view_stretch = (np.asarray(vs, np.float64) if self.view_ratios is not None and self.stretch_score
                             and vs is not None else None)
        # ``[mine] view_normalise_stretch_face``: the stretches of the held-out views decided on each face kind
        self.view_stretch_kinds = tuple(np.asarray(self.library.attrs[a], np.float64)
                                        if self.view_stretch is not None and a in self.library.attrs else self.view_stretch
                                        for a in ("unknown_view_stretch_canonical", "unknown_view_stretch_other"))
        # ``[mine] label_members``: the library's members' fused volumes, from the store it was mined from (none found: off)
        self.members = (load_members(self.library, self.free_weight, self.colour_weight) if self.member_k > 0
                        and self.library.n_clusters > 1 else None)
        vm = self.library.attrs.get("unknown_view_members")   # ``[mine] label_members_score``: the held-out statistics
        self.view_members = (np.asarray(vm, np.float64) if self.members is not None and self.member_score
                             and self.view_ratios is not None and vm is not None
                             and "unknown_view_member_cut" in self.library.attrs else None)
        self.view_member_classes = (np.asarray(self.library.attrs.get("unknown_view_member_classes",
                                                                      np.full(len(vm), -1)), np.int64)
                                    if self.view_members is not None else None)
        if self.view_members is not None:
            self.unknown_cut = float(self.library.attrs["unknown_view_member_cut"])
        # ``[mine] label_size_score``: the held-out views' size mismatches at their decided prototype, and the cut on the
        # combination with them (taken only when the members' p-value is joined here as it was there)
        at = self.library.attrs
        vz = at.get("unknown_view_size")
        self.view_size = (np.asarray(vz, np.float64) if self.size_score and self.view_ratios is not None and vz is not None
                          and "unknown_view_size_cut" in at
                          and bool(int(at.get("unknown_view_size_members", 0))) == (self.view_members is not None)
                          else None)
        self.view_size_kinds = tuple(np.asarray(at[a], np.float64) if self.view_size is not None and a in at
                                     else self.view_size for a in ("unknown_view_size_canonical", "unknown_view_size_other"))
        if self.view_size is not None:
            self.unknown_cut = float(at["unknown_view_size_cut"])
        # ``[mine] unknown_cut_split``: the cut for views that cut their object off and for whole ones (the ratio's cut
        # taken apart by stratum; not with the members' or the size's p-value, whose cuts are pooled)
        self.split_cuts = ((float(at["unknown_view_ratio_cut_whole"]), float(at["unknown_view_ratio_cut_cut"]))
                           if self.cut_split and self.view_ratios is not None and self.view_members is None
                           and self.view_size is None and "unknown_view_ratio_cut_whole" in at
                           and "unknown_view_ratio_cut_cut" in at else None)
        # ``[mine] unknown_cut_split_below``: the split only where the views that cut their object off are the exception
        # (under this share of the held-out views; where objects touch, most views are cut off by a neighbour and the few
        # whole ones are not like the label stage's whole views): otherwise the pooled cut for all.
        # ``[mine] unknown_cut_shrink``: each stratum's cut drawn toward the pooled one by its number of held-out views.
        # Both need the strata's joined values (unknown_view_joined_whole / _cut; a library without them keeps the
        # strata's own cuts)
        if self.split_cuts is not None and "unknown_view_joined_whole" in at and "unknown_view_joined_cut" in at:
            n_whole, n_cut = (len(np.atleast_1d(at[a])) for a in ("unknown_view_joined_whole", "unknown_view_joined_cut"))
            if self.cut_split_below < 1.0 and n_cut >= self.cut_split_below * (n_cut + n_whole):
                self.split_cuts = None
            elif self.cut_shrink > 0:
                from ..mine.openset import shrunk_stratum_cut
                pooled = float(at["unknown_view_ratio_cut"])
                self.split_cuts = tuple(shrunk_stratum_cut(c, n, pooled, self.cut_shrink)
                                        for c, n in zip(self.split_cuts, (n_whole, n_cut)))
        self.P = np.asarray(self.library.prototypes["features"], np.float32)
        V = np.asarray(self.library.prototypes["weights"], np.float32)
        self.V = V if self.weighted else np.ones_like(V)
        self.tilts = TiltGrid.from_config(self.library.tilt_config)
        pr = self.library.prototypes
        self.search = ViewSearch(self.P, self.V, pr["aspect"], self.scales, self.tilts, pr["face_up"], pr["face_symmetry"],
                                 exact_faces=self.exact_faces, refine_top=self.refine_top, chunk_size=self.chunk_size)
        self.groups = [self.library.symmetry_group(k) for k in range(self.K)]   # once, not once per batch
        self.normaliser = (ViewNormaliser(self.P, self.V, pr["aspect"], self.scales, self.tilts,
                                          (pr["face_up"], pr["face_count"], pr["face_symmetry"]), top=self.view_top,
                                          within=self.view_within, cut_within=(self.view_cut_decide if self.view_cut_decide > 0
                                                      else self.view_cut_within), cut_rest=self.view_cut_rest)
                           if self.view_top > 0 else None)
        if "view_owner" in pr and len(pr["view_owner"]):
            vv = np.asarray(pr["view_weights"], np.float32)
            self.search.set_views(pr["view_owner"], pr["view_features"], vv if self.weighted else np.ones_like(vv), self.scales)

    def metres(self) -> np.ndarray | None:
        """``[mine] label_size``: (K,) metres per prototype unit (``mine.metricsize.member_metres``) from the members'
        fused objects' metric footprint radius and height in the store the library was mined from
        (``mine.memberknn.member_rows``), computed on the first match that carries sizes and kept; None when the
        size is off or that store is not found."""
        if self._metres is None:
            self._metres = (self._member_metres() if self.size_weight > 0 or self.size_score else None,)
        return self._metres[0]

    def _member_metres(self) -> np.ndarray | None:
        found = member_rows(self.library)
        if found is None:
            return None
        st, rows = found
        pr, mem = self.library.prototypes, self.library.members
        size = np.stack([np.asarray(st.objects["radius_m"], np.float64)[rows],
                         np.asarray(st.objects["height_m"], np.float64)[rows]], 1)
        return member_metres(self.P, self.V, pr["aspect"], self.tilts, pr["face_up"], mem["cluster"], mem["face"], size)

    @property
    def K(self) -> int:
        return int(self.P.shape[0])

    def features(self, volumes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Volumes (n, 6, R, A, H) -> X (n, C, R, A, H), W (n, R, A, H) (W = 1 when not weighted)."""
        X, W = matching_features(volumes, free_weight=self.free_weight, colour_weight=self.colour_weight)
        return X, (W if self.weighted else np.ones_like(W))

    def match(self, volumes: np.ndarray, cameras: np.ndarray | None = None,
              sizes: np.ndarray | None = None, cuts: list | None = None,
              own_members: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """Volumes (n, 6, R, A, H) -> distance, score, yaw_deg, fit_scale, face (n, K), rotation (n, K, 3, 3)
        (object frame <- prototype frame, modulo the face's symmetry) and best (n,) (-1 = none).
        ``cameras`` (n, 3): each view's camera direction in its object frame (:func:`lift_frame`); with the
        library's ``[mine] view_normalise_top`` the decision distances of each view's nearest prototypes also take
        the copies gridded as seen from that camera (``mine.viewnorm``; None: not), and with ``view_score`` (``[mine]
        view_normalise_score``) their scores the higher of the pose search's and that of the view-normalised distance
        (the same calibration, the face kind of the pose search's match).
        Volumes (n, C, 6, R, A, H): C candidate object frames of each object (:func:`lift_frame` with
        ``centre_offsets``); per object and prototype the candidate at the least distance gives every figure,
        and ``centre`` (n, K) says which.
        ``sizes`` (n, 2): each view's footprint radius and height (m); with ``symmetric_top`` (the library's
        ``[mine] label_symmetric``) the class is decided by the mean of the search both ways (``label.symmetric``).
        With ``size_weight`` (the library's ``[mine] label_size`` = c) every decision distance is multiplied by
        exp(c x ``mine.metricsize.size_mismatch``): the view's metric size against the prototype resting on the up
        direction found, at its members' metres per unit (:meth:`metres`; the store not found: none).
        ``cuts`` (n,): each view's ``ingest.truncation.ViewCut`` or None (``[mine] view_normalise_cut``: the copies
        seen from the camera also lose what the view could not see; None: none)."""
        if volumes.ndim == 6:
            n, C = volumes.shape[:2]
            # a candidate equal to the object's first (a view not cut, a camera above the centre) is searched once
            same = (volumes == volumes[:, :1]).all(axis=tuple(range(2, volumes.ndim)))
            same[:, 0] = False
            keep = np.flatnonzero(~same.reshape(-1))
            m = self.match(volumes.reshape((n * C,) + volumes.shape[2:])[keep],
                           None if cameras is None else np.repeat(np.asarray(cameras), C, axis=0)[keep],
                           None if sizes is None else np.repeat(np.asarray(sizes), C, axis=0)[keep],
                           None if cuts is None else [cuts[j // C] for j in keep],
                           None if own_members is None else np.repeat(np.asarray(own_members), C)[keep])
            if n == 0:
                return {**m, "centre": np.zeros((0, self.K), int)}
            src = np.searchsorted(keep, np.where(same, np.arange(n)[:, None] * C, np.arange(n * C).reshape(n, C)).reshape(-1))
            m = {key: v[src] for key, v in m.items()}
            D = m["distance"].reshape(n, C, self.K)
            c = np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1)          # (n, K)
            i, k = np.arange(n)[:, None], np.arange(self.K)[None, :]
            out = {key: m[key].reshape((n, C) + m[key].shape[1:])[i, c, k] for key in m if key != "best"}
            out["best"] = np.where(np.isfinite(out["distance"]).any(axis=1),
                                   np.argmin(np.where(np.isfinite(out["distance"]), out["distance"], np.inf), axis=1), -1)
            out["centre"] = c
            return out
        n = volumes.shape[0]
        if n == 0:
            z = np.zeros((0, self.K))
            return {"distance": z, "score": z, "yaw_deg": z, "fit_scale": z, "stretch_scale": z, "face": z.astype(int),
                    "score_parts": z[..., None],
                    "scored_distance": z, "view_distance": z, "unseen_share": z, "member_distance": z,
                    "size_mismatch": z, "ratio_distance": z, "unknown_cut": z, "upright": z.astype(bool), "rotation": np.zeros((0, self.K, 3, 3)), "best": np.zeros(0, int)}
        X, W = self.features(volumes)
        D, raw, fit_scale, up, upright = self.search.poses(X, W)
        # the score judges the distance at the found pose re-weighted by the per-cell reliability of single
        # views, as the library's single-view calibration did (``mine.reliability``; none: the plain distance);
        # the reliability lives in the canonical frame, so matches on another face keep the plain distance
        lam = self.library.prototypes.get("cell_reliability") if self.weighted else None
        Dr = D
        again = self.tolerant or self.rings is not None
        if lam is not None or again or self.mass > 0:
            Dr = np.where(upright, reliable_distances(X, W, self.P, self.V, lam, raw, fit_scale, tolerant=self.tolerant,
                                                      rings=self.rings, mass=self.mass), D)
        if again and isinstance(self.search.bank, TiltBank):  # other faces: the same distance against the copy
            tilted = ~upright & np.isfinite(D)
            Dr = np.where(tilted, tilted_distances(self.search.bank, X, W, up, raw, fit_scale, tilted, tolerant=self.tolerant,
                                                   rings=self.rings), Dr)
        S = self.library.score(Dr, np.arange(self.K)[None, :], single_view=True, upright=upright)
        S = np.where(np.isfinite(D) & np.isfinite(Dr), S, 0.0)
        # the assignment rule of mining (engine: argmin of the pose-minimised distance); the calibrated
        # score then judges that match (argmax of the score lets a loosely calibrated prototype win)
        # view prototypes (when the library has them) vote on the class; pose and score stay the 3-D prototype's
        D = self.search.vote(X, W, D)
        Dv = np.full(D.shape, np.nan)
        Dq = None   # the distances of the best/second-best ratio when not D (``[mine] view_normalise_cut_decide``)
        if self.normaliser is not None and cameras is not None:  # the prototypes gridded as seen from the camera
            # ``[mine] view_normalise_cut_rest``: a cut view's deciding distances take its copies on resting faces only
            # (Dd); the score keeps the least over every copy (Dv), as the library's calibration saw it
            Dd = np.full(D.shape, np.nan) if self.view_cut_rest and cuts is not None else None
            Dv = self.normaliser.distances(X, W, D, up, cameras, cuts, Dd)
            Dd = Dv if Dd is None else Dd
            if self.view_cut_decide > 0 and cuts is not None and any(c is not None for c in cuts):
                # a cut view's wider shortlist decides the class; the ratio keeps the shortlist of cut_within
                keep = self.normaliser.shortlist_mask(D, cuts, self.view_cut_within if self.view_cut_within is not None
                                                       else self.normaliser.within)
                Dq = np.fmin(D, np.where(keep, Dv, np.nan))
            elif Dd is not Dv:   # the best/second-best ratio, as the score, of the least over every copy
                Dq = np.fmin(D, Dv)
            D = np.fmin(D, Dd)
            if self.view_score and not self.view_calibrated:  # ``[mine] view_normalise_score``: the better of the two
                Sv = self.library.score(np.where(np.isfinite(Dv), Dv, 1.0), np.arange(self.K)[None, :], single_view=True, upright=upright)
                S = np.where(np.isfinite(Dv), np.maximum(S, Sv), S)
        share = np.full(D.shape, np.nan)
        if self.unseen > 0 or self.unseen_score:  # the share of the view's surface the posed prototype has not seen
            share = unseen_shares(self.V, self.search.bank, X, W, up, raw, fit_scale, upright)
        if self.unseen > 0:  # ``[mine] unseen_charge``
            charge = self.unseen * share
            D = D + charge
            Dq = None if Dq is None else Dq + charge
        metres = self.metres() if sizes is not None else None
        mis = np.full(D.shape, np.nan)
        if metres is not None:   # ``[mine] label_size``: the view's metric size at the pose found
            mis = size_mismatch(sizes, up, self.P, self.V, self.library.prototypes["aspect"], self.tilts, metres)
        if metres is not None and self.size_weight > 0:
            # the best/second-best ratio keeps the distances without it (as the library's calibration took it)
            Dq = D if Dq is None else Dq
            D = D * np.exp(self.size_weight * mis)
        Dq = D if Dq is None else Dq
        nearest = np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1)
        best = np.where(np.isfinite(D).any(axis=1), nearest, -1)
        dk = np.full(D.shape, np.nan)
        if self.members is not None:   # ``[mine] label_members``: the members decide among close prototypes
            best, dk = self.member_decision(X, W, D, Dr, best, own_members)
        # ``[mine] stretch_refine``: the stretch judged at a continuous scale (``mine.stretchfit``); the record's scale stays
        stretch_scale = (refined_scales(self.P, self.V, self.search.bank, X, W, D, up, fit_scale, upright, self.scales)
                         if self.stretch_refine else fit_scale)
        parts = None
        if self.view_calibrated:  # ``[mine] view_normalise_calibrate``: the lesser distance, by its own calibration
            Dm = np.fmin(Dr, Dv)
            S = self.library.score(np.where(np.isfinite(Dm), Dm, 1.0), np.arange(self.K)[None, :], single_view=True,
                                   upright=upright, view_normalised=True)
            S = np.where(np.isfinite(D) & np.isfinite(Dm), S, 0.0)
            if self.view_ratios is not None:  # ``[mine] view_normalise_ratio``: joined with the ratio's p-value
                r = decided_ratios(D, Dq)
                moved = np.flatnonzero((best >= 0) & (best != nearest))
                if len(moved):   # a class the members decided takes the ratio of the view's least distance
                    r[moved, best[moved]] = r[moved, nearest[moved]]
                pr = np.where(np.isfinite(r), ratio_pvalue(self.view_ratios, np.nan_to_num(r, nan=np.inf)), 0.0)
                # ``[mine] view_normalise_unseen``: and with the unseen share's p-value among the held-out views'
                pu = () if self.view_unseen is None else (ratio_pvalue(self.view_unseen, np.nan_to_num(share, nan=1.0)),)
                # ``[mine] view_normalise_stretch``: and with the p-value of the stretch the pose search needed
                if self.view_stretch is not None:   # (``view_normalise_stretch_face``: among the decided face kind's)
                    x = scale_stretch(stretch_scale)
                    pu += (np.where(upright, ratio_pvalue(self.view_stretch_kinds[0], x), ratio_pvalue(self.view_stretch_kinds[1], x)),)
                if self.view_members is not None:   # ``[mine] label_members_score``: and with the members' p-value
                    pu += (member_pvalues(self.view_members, self.view_member_classes, member_statistic(dk)),)
                if self.view_size is not None:   # ``[mine] label_size_score``: and with the size mismatch's p-value
                    z, zu = shape_nearest_size(mis, upright, Dq, best)
                    pu += (np.where(zu, ratio_pvalue(self.view_size_kinds[0], z), ratio_pvalue(self.view_size_kinds[1], z)),)
                parts = (S, pr) + pu   # the tail probabilities joined, returned as ``score_parts``
                S = fisher_combine_many(*parts)
        if self.tilt_ratios is not None and self.view_ratios is None:  # the other-face rule (``[mine] unknown_ratio``, ``mine.openset``)
            S = rule_scores(S, decided_ratios(D, Dq), upright, self.tilt_ratios)
        if self.symmetric_top > 0 and sizes is not None:   # the class by the search both ways (``label.symmetric``)
            sz = np.asarray(sizes, np.float64).reshape(-1, 2)
            rev = sym.reverse_distances(X, W, grid_aspect(sz[:, 0], sz[:, 1], self.tilts.radial_margin,
                                                          self.tilts.height_margin),
                                        self.P, self.V, sym.shortlist(D, self.symmetric_top, sym.RATIO), self.scales,
                                        None if self.tilts.is_identity else self.tilts)
            best = sym.symmetric_best(D, rev)
        pr = self.library.prototypes
        face, rotation, yaw = face_poses(rot.tilt_yaw_to_matrix(up, raw), pr["face_up"], pr["face_symmetry"],
                                         self.groups)
        parts = (S,) if parts is None else parts   # no combination: the score is its one part
        cut_row = np.broadcast_to(self.view_unknown_cuts(cuts, n)[:, None], D.shape).copy()
        return {"distance": D, "score": S, "yaw_deg": yaw, "fit_scale": fit_scale, "stretch_scale": stretch_scale,
                "score_parts": np.stack(np.broadcast_arrays(*parts), axis=-1), "face": face, "upright": upright,
                "scored_distance": Dr, "view_distance": Dv, "unseen_share": share, "member_distance": dk,
                "size_mismatch": mis, "ratio_distance": Dq, "unknown_cut": cut_row, "rotation": rotation, "best": best}

    def view_unknown_cuts(self, cuts: list | None, n: int) -> np.ndarray:
        """(n,) the unknown cut of each of n views: with ``[mine] unknown_cut_split`` (the library's per-stratum cuts) the
        cut of the views that cut their object off where ``cuts`` (n,) holds a ``ingest.truncation.ViewCut`` and the
        whole views' cut where it holds None; else (or ``cuts`` None) the library's one cut."""
        if self.split_cuts is None or cuts is None or len(cuts) != n:
            return np.full(n, float(self.unknown_cut))
        return np.where(np.array([c is not None for c in cuts], bool), self.split_cuts[1], self.split_cuts[0]).astype(np.float64)

    def member_decision(self, X: np.ndarray, W: np.ndarray, D: np.ndarray, Dr: np.ndarray, best: np.ndarray,
                        own_members: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """``[mine] label_members`` = k: (best (n,), d_k (n, K)), d_k the mean of a view's k smallest pose-searched
        distances to each prototype's members (``mine.memberknn``; the k-NN rule, Cover & Hart 1967), NaN where not
        searched.  Searched: each view's first ``member_top`` prototypes by decision distance D (n, K) when
        ``member_score`` (the statistic needs the decided one and its rivals), else only in the views with at least two
        of them within ``member_within`` x their least (the ones the members decide: ``members_decide``, with the
        scored distances Dr (n, K)).  ``own_members`` (n,): the member index of each view's own object, left out of its
        row (-1: none; the held-out views of the calibration)."""
        K = D.shape[1]
        need = (member_shortlist(D, np.inf, self.member_top) if self.member_score
                else member_shortlist(D, self.member_within, self.member_top))
        mem = self.members
        groups = [(np.flatnonzero(need[:, c]), cluster_members(mem.cluster, c)) for c in range(K)]
        Dm = searched_distances(X, W, mem.P, mem.V, mem.aspect, groups, self.scales,
                                None if self.tilts.is_identity else self.tilts)
        if own_members is not None:
            own = np.asarray(own_members, np.int64)
            Dm[np.flatnonzero(own >= 0), own[own >= 0]] = np.inf
        dk = class_knn(Dm, mem.cluster, K, self.member_k)
        dk = np.where(need & np.isfinite(dk), dk, np.nan)
        if self.member_within < 1:
            return best, dk
        return members_decide(D, dk, Dr, self.member_within, self.member_top, self.member_weight), dk


def member_shortlist(D: np.ndarray, within: float, top: int) -> np.ndarray:
    """(n, K) bool: each view's first ``top`` prototypes by decision distance D (n, K) (ties by index) within ``within``
    x its least, in rows where at least two are (``[mine] label_members_within``, ``label_members_top``); all False
    when ``within`` < 1."""
    D = np.where(np.isfinite(D), np.asarray(D, np.float64), np.inf)
    out = np.zeros(D.shape, bool)
    if within < 1 or D.shape[1] < 2 or not len(D):
        return out
    order = np.argsort(D, axis=1, kind="stable")[:, :max(int(top), 0)]
    i = np.arange(len(D))[:, None]
    least = D.min(axis=1, keepdims=True)
    out[i, order] = np.isfinite(D[i, order]) & ((D[i, order] <= within * least) if np.isfinite(within) else True)
    out[out.sum(axis=1) < 2] = False
    return out


def members_decide(D: np.ndarray, dk: np.ndarray, Dr: np.ndarray, within: float, top: int, weight: float) -> np.ndarray:
    """best (n,): each view's prototype of least decision distance D (n, K) (-1: none), except that a view with a
    ``member_shortlist`` takes, among its shortlisted prototypes with a d_k (n, K) (NaN: not searched), the least
    D x (d_k / Dr) ^ weight (ties: the nearer by D): the decision distance corrected by how much better or worse the
    prototype's nearest members fit the view than the prototype itself does (Dr (n, K): the scored distance, the pose
    search's against the prototype; d_k is the same search against members)."""
    Df = np.where(np.isfinite(D), np.asarray(D, np.float64), np.inf)
    best = np.where(np.isfinite(Df).any(axis=1), np.argmin(Df, axis=1), -1)
    short = member_shortlist(Df, within, top)
    Dr = np.asarray(Dr, np.float64)
    ok = short & np.isfinite(dk) & np.isfinite(Dr) & (Dr > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        key = np.where(ok, Df * (np.where(ok, dk, 1.0) / np.where(ok, Dr, 1.0)) ** weight, np.inf)
    amb = np.flatnonzero((short.sum(axis=1) > 1) & (ok.sum(axis=1) > 1))
    for i in amb:
        cand = np.flatnonzero(ok[i])
        best[i] = cand[np.lexsort((Df[i, cand], key[i, cand]))[0]]
    return best


def member_statistic(dk: np.ndarray) -> np.ndarray:
    """The members' novelty statistic (n, K) (``[mine] label_members_score``; larger: less like that class's views):
    d_k(c) / min over the other searched prototypes c' of d_k(c'), the k-NN margin of prototype c among the view's
    searched shortlist (dk (n, K), NaN where not searched); NaN where c has no d_k or no rival has one.  A never-mined
    shape fits a prototype, its members' blurred mean, about as well as the class's own views do, but not the class's
    single members better than a rival's."""
    dk = np.asarray(dk, np.float64)
    fin = np.isfinite(dk)
    big = np.where(fin, dk, np.inf)
    part = np.sort(big, axis=1)[:, :2] if dk.shape[1] > 1 else np.full((len(dk), 2), np.inf)
    other = np.where(big == part[:, :1], part[:, 1:2], part[:, :1])   # the least of the others
    ok = fin & np.isfinite(other) & (other > 0)
    return np.where(ok, big / np.where(ok, other, 1.0), np.nan)


def shape_nearest_size(mis: np.ndarray, upright: np.ndarray, Dq: np.ndarray, best: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``[mine] label_size_score``'s statistic (n, K) and its face kind (n, K): the size mismatch ``mis`` (n, K)
    (``mine.metricsize.size_mismatch``; NaN: none, taken as 0) at each prototype, but at the decided one ``best`` (n,)
    (-1: none) that at the prototype the shape alone puts nearest, the least of ``Dq`` (n, K) (the distances without
    the size factor, of the best/second-best ratio), with that prototype's face kind (``upright``).  A known view's
    shape finds its own class, whose size it has; a never-mined one's nearest shape is of any size, and the size then
    often moves the decision away from it."""
    z = np.nan_to_num(np.asarray(mis, np.float64), nan=0.0)
    zu = np.array(upright, bool)
    Dq = np.where(np.isfinite(Dq), Dq, np.inf)
    rows = np.flatnonzero((np.asarray(best) >= 0) & np.isfinite(Dq).any(axis=1))
    bq = np.argmin(Dq[rows], axis=1)
    z[rows, best[rows]], zu[rows, best[rows]] = z[rows, bq], zu[rows, bq]
    return z, zu


def decided_ratios(D: np.ndarray, Dq: np.ndarray) -> np.ndarray:
    """``best_second_ratio(Dq)`` (n, K), the ratios of the shortlist the score keeps (``[mine]
    view_normalise_cut_decide``; Dq is D when off), with, in each row whose least D (the decision) and least Dq fall
    on different prototypes, the decided prototype given the ratio of Dq's least: the view's best/second-best ratio
    is the one the narrower shortlist gives it, whichever class the wider one decides."""
    r = best_second_ratio(Dq)
    if Dq is D:
        return r
    fin = np.isfinite(D).any(axis=1) & np.isfinite(Dq).any(axis=1)
    bd = np.argmin(np.where(np.isfinite(D), D, np.inf), axis=1)
    bq = np.argmin(np.where(np.isfinite(Dq), Dq, np.inf), axis=1)
    rows = np.flatnonzero(fin & (bd != bq))
    r[rows, bd[rows]] = r[rows, bq[rows]]
    return r


def view_centre_offsets(cfg: dict) -> tuple[float, ...]:
    """``[mine] view_centre_offsets`` of a library's config: () when off ([0.0], or a library mined before the key)."""
    offs = tuple(float(o) for o in (cfg["mine"].get("view_centre_offsets") or [0.0]))
    return () if offs == (0.0,) else offs


def view_cut_offsets(cfg: dict) -> tuple[float, ...]:
    """``[mine] view_cut_offsets`` of a library's config, its non-zero entries: () when off ([0.0], or a library mined
    before the key)."""
    return tuple(float(o) for o in (cfg["mine"].get("view_cut_offsets") or [0.0]) if float(o) != 0.0)


def view_calibration(library: Library) -> bool:
    """Whether ``library`` scores single views by the calibration of the view-normalised distance (``[mine]
    view_normalise_calibrate``, ``mine.pipeline.view_calibration``): it has the fields and the cut, and the
    view-normalised decision with its score is on.  A library without them keeps the pose search's calibration."""
    m = library.config.get("mine", {})
    return (all(k in library.prototypes for k in VIEW_CALIBRATION_FIELDS) and "unknown_view_cut" in library.attrs
            and int(m.get("view_normalise_top", 0)) > 0 and bool(m.get("view_normalise_score", False)))


def make_matcher(library: Library, cfg: dict, *, weighted: bool = True, size: bool = True) -> Matcher:
    """Matcher for ``library``: the grid and channel weights come from the library's own config (the
    volumes must be lifted exactly as the mined ones were), the unknown cut from the library too.  ``size`` False:
    the decision leaves the view's metric size out whatever the library's ``[mine] label_size``, and the score too
    (``[mine] label_size_score``)."""
    a, kw = _matcher_args(library, cfg, weighted)
    if not size:
        kw["size_weight"], kw["size_score"] = 0.0, False
    return Matcher(*a, **kw)


def _matcher_args(library: Library, cfg: dict, weighted: bool) -> tuple[tuple, dict]:
    """The checked arguments of :func:`make_matcher`'s Matcher (InputError for a library it cannot match against)."""
    lib_cfg = library.config
    if "volume" not in lib_cfg or "mine" not in lib_cfg:
        raise InputError(library.path, "config", "library does not record the [volume] and [mine] config it was mined with")
    grid = Grid.from_config(lib_cfg)
    want = tuple(int(x) for x in library.attrs.get("grid", grid.shape))
    if grid.shape != want or library.prototypes["features"].shape[2:] != want:
        raise InputError(library.path, "grid", f"expected prototypes on the grid {want} of the recorded config, "
                         f"got {tuple(library.prototypes['features'].shape[2:])}")
    if library.n_clusters < 1:
        raise InputError(library.path, "prototypes", "library has no prototypes")
    m = lib_cfg["mine"]
    cut = library_cut(library)
    view_calibrated = bool(weighted and view_calibration(library))
    if view_calibrated:   # the cut on the score of the view-normalised calibration (``[mine] view_normalise_calibrate``)
        cut = float(library.attrs["unknown_view_cut"])
        if "unknown_view_ratios" in library.attrs and "unknown_view_ratio_cut" in library.attrs:  # ``view_normalise_ratio``
            cut = float(library.attrs["unknown_view_ratio_cut"])
    if weighted and "unknown_tilt_ratios" in library.attrs and not view_calibrated:   # the other-face rule's own cut (mine.openset)
        cut = float(library.attrs["unknown_rule_cut"])
    return ((library, grid, float(m["free_weight"]), float(m["colour_weight"]), tuple(library.scales),
             cut, weighted),
            dict(exact_faces=bool(m.get("face_pairs", False)), tolerant=bool(m.get("tolerant_residual", False)),
                 rings=score_rings(lib_cfg, grid.radial_bins), mass=score_mass(lib_cfg), refine_top=int(m.get("label_refine_top", 0)),
                 centre_offsets=view_centre_offsets(lib_cfg),
                 cut_offsets=view_cut_offsets(lib_cfg), view_top=int(m.get("view_normalise_top", 0)),
                 view_within=float(m.get("view_normalise_within", 1.5)),
                 view_score=bool(m.get("view_normalise_score", False)), view_calibrated=view_calibrated,
                 view_cut=bool(m.get("view_normalise_cut", False)), view_cut_within=m.get("view_normalise_cut_within"),
                 view_cut_decide=float(m.get("view_normalise_cut_decide", 0.0)),
                 view_cut_rest=bool(m.get("view_normalise_cut_rest", False)),
                 symmetric_top=int(m.get("label_symmetric", 0)), unseen=float(m.get("unseen_charge", 0.0)),
                 unseen_score=bool(weighted and m.get("view_normalise_unseen", False)),
                 stretch_score=bool(weighted and m.get("view_normalise_stretch", False)),
                 stretch_refine=bool(weighted and m.get("view_normalise_stretch", False) and m.get("stretch_refine", False)),
                 member_k=int(m.get("label_members", 0)) if weighted else 0,
                 member_within=float(m.get("label_members_within", 0.0)), member_top=int(m.get("label_members_top", 3)),
                 member_weight=float(m.get("label_members_weight", 0.5)),
                 member_score=bool(m.get("label_members_score", False)),
                 size_weight=float(m.get("label_size", 0.0)) if weighted else 0.0,
                 size_score=bool(weighted and m.get("label_size_score", False)),
                 cut_split=bool(weighted and m.get("unknown_cut_split", False)),
                 cut_shrink=float(m.get("unknown_cut_shrink", 0.0)),
                 cut_split_below=float(m.get("unknown_cut_split_below", 1.0))))


@dataclass
class FrameObjects:
    """The objects found in one frame, lifted: volumes (n, 6, R, A, H), their per-object facts and cameras (n, 3)
    (the direction from each object's centre to the frame's camera, in its object frame: ``plane_basis(up)``)."""
    frame: str
    volumes: np.ndarray
    facts: list[dict]
    cameras: np.ndarray | None = None
    cuts: list | None = None     # (n,) ``ingest.truncation.ViewCut`` or None per object (``[mine] view_normalise_cut``)


def lift_frame(scene: SceneObjects, frame_id: str, grid: Grid, width: int, *, geometry_ids: bool,
               centre_offsets: tuple[float, ...] = (), cut_offsets: tuple[float, ...] = (),
               view_cuts: bool = False) -> FrameObjects:
    """Lift every proposal of a one-frame scene into its own volume; facts are the record's geometric fields.
    With ``centre_offsets`` (``[mine] view_centre_offsets``) each object is lifted about each candidate base
    centre of ``ingest.proposals.centre_candidates`` (the visible footprint's circle moved away from the camera):
    volumes (n, C, 6, R, A, H), C = len(centre_offsets), which :meth:`Matcher.match` searches together.
    With ``cut_offsets`` (``[mine] view_cut_offsets``) an object the view cuts off (the image border, a nearer
    object: ``ingest.truncation``) is also lifted about its visible circle moved by each of them x its radius toward
    the cut (``proposals.shifted_frames``); an object not cut repeats its first candidate there (C grows by
    len(cut_offsets)).  With ``view_cuts`` each object's ``ingest.truncation.view_cut`` (None when not cut) goes with it.
    """
    height = scene.capture.intrinsics.height
    fd = next((f for f in scene.frames if f.id == frame_id), None)
    mask = None if geometry_ids or fd is None or fd.mask is None else fd.mask.reshape(-1)
    vols, facts, cams, cuts = [], [], [], []
    several = bool(centre_offsets or cut_offsets)
    for p in scene.proposals:
        pix = p.pixels.get(frame_id)
        if pix is None or len(pix) < MIN_PIXELS:
            continue
        views = scene.views(p, [frame_id], others=grid.reads_others)
        if several:
            sel = np.isin(fd.pixels, pix)
            pts = fd.points[sel]
            frames = [p.frame]
            if centre_offsets:
                frames = centre_candidates(pts, p.frame, fd.cam_to_world[:3, 3], centre_offsets)
                frames += [frames[0]] * (len(centre_offsets) - len(frames))   # camera above the centre: repeats
            if cut_offsets:
                frames += _cut_frames(scene, fd, p, pix, pts, fd.pixels[sel], cut_offsets)
            vols.append([(views, f) for f in frames])   # lifted together below
        else:
            vols.append((views, p.frame))              # lifted together below (lift_many: the same volumes)
        centre = np.asarray(p.frame.origin, np.float64) + 0.5 * float(p.frame.height) * np.asarray(p.frame.up, np.float64)
        cams.append(view_camera(p.frame.up, centre, fd.cam_to_world) if fd is not None else np.zeros(3))
        if view_cuts:
            cuts.append(view_cut(fd.depth, scene.capture.intrinsics.K, fd.cam_to_world, pix, scene.others_held(fd, pix),
                                 p.frame.origin, p.frame.up, p.frame.radius, p.frame.height))
        # geometry-only proposals are numbered per frame, so their ids name the frame too
        oid = f"{scene.capture.name}/{frame_id}/{p.key}" if geometry_ids else p.object_id
        # the picture's extent: the whole mask region when masks name the object (pixels without a depth
        # reading included, as export of a store reports it), else the pixels that were lifted
        region = np.flatnonzero(mask == int(p.key)) if mask is not None and p.key.isdigit() else pix
        facts.append({"object": oid, "source": "single-view", "bbox": list(pixel_bbox(region, width)),
                      "segmentation": pixels_to_rle(region, height, width),
                      "center_world": [float(x) for x in p.center_world],
                      "base_world": [float(x) for x in p.frame.origin], "up": [float(x) for x in p.frame.up],
                      "size_m": [float(p.frame.radius), float(p.frame.height)]})
    R, A, H = grid.shape
    C = max(len(centre_offsets), 1) + len(cut_offsets)
    if vols and not several:
        vols = lift_many(vols, grid)
    elif vols:   # every candidate of every object in one call, back to (C, 6, R, A, H) per object
        flat = lift_many([pair for cands in vols for pair in cands], grid)
        vols = [np.stack(flat[i * C:(i + 1) * C]) for i in range(len(vols))]
    stack = np.stack(vols) if vols else np.zeros((0,) + ((C,) if several else ()) + (6, R, A, H), np.float32)
    return FrameObjects(frame_id, stack, facts, np.asarray(cams, np.float64).reshape(-1, 3), cuts if view_cuts else None)


def _cut_frames(scene: SceneObjects, fd, p, pix: np.ndarray, points: np.ndarray, point_pixels: np.ndarray,
                offsets: tuple[float, ...], direction: str = "circle") -> list:
    """len(offsets) object frames of proposal ``p`` in frame ``fd``: its visible circle moved toward where the view
    cuts it off (``ingest.truncation``); ``p.frame`` repeated when the view does not cut it.  ``direction``: the move's
    direction taken from the visible circle's centre toward the points on a cut ("circle") or from the visible points'
    centroid to the cut points' centroid ("centroid", find's ``[mine] find_cut_direction``)."""
    cut = cut_pixels(pix, fd.depth, scene.others_held(fd, pix).reshape(fd.depth.shape))
    on_cut = np.zeros(fd.depth.size, bool)
    on_cut[pix[cut]] = True
    if direction == "circle":
        d = cut_direction(points, on_cut[point_pixels], p.frame.origin, p.frame.up)
    else:
        d = centroid_cut_direction(points, on_cut[point_pixels], p.frame.up)
    if d is None:
        return [p.frame] * len(offsets)
    return shifted_frames(points, p.frame, d, offsets)


def _records(matcher: Matcher, capture: str, fo: FrameObjects, m: dict[str, np.ndarray]) -> list[dict]:
    lib = matcher.library
    names = lib.prototypes["name"]
    face_sym = lib.prototypes["face_symmetry"]
    size_med = np.asarray(lib.prototypes["size_median"], np.float64)
    out = []
    for i, facts in enumerate(fo.facts):
        k = int(m["best"][i])
        # alternatives in decision order (nearest first), each with the distance that ranks it and its score
        order = np.argsort(m["distance"][i], kind="stable")
        alts = [{"cluster": int(j), "name": str(names[j]) or None,
                 "distance": float(m["distance"][i, j]) if np.isfinite(m["distance"][i, j]) else None,
                 "score": float(m["score"][i, j])} for j in order if j != k][:N_ALTERNATIVES]
        rec = {"capture": capture, "frame": fo.frame, **facts}
        if k < 0:
            rec.update(cluster=None, name=None, yaw_deg=0.0, rotation=None, face=None, symmetry=None, scale=None, fit_scale=None,
                       distance=None, score=0.0, unknown=True, alternatives=alts)
        else:
            r, h = facts["size_m"]
            score = float(m["score"][i, k])
            f = int(m["face"][i, k])
            R_world = plane_basis(np.asarray(facts["up"])).T @ m["rotation"][i, k]
            rec.update(cluster=k, name=str(names[k]) or None, yaw_deg=float(m["yaw_deg"][i, k]),
                       rotation=[round(float(v), 6) for v in matrix_to_quat(R_world)], face=f,
                       symmetry=symmetry_name(face_sym[k, f]),
                       scale=float(np.sqrt(r * h / max(size_med[k, 0] * size_med[k, 1], 1e-12))),
                       fit_scale=float(m["fit_scale"][i, k]), distance=float(m["distance"][i, k]),
                       score=score, unknown=bool(score < (float(m["unknown_cut"][i, k]) if "unknown_cut" in m
                                                         else matcher.unknown_cut)), alternatives=alts)
        out.append(rec)
    return out


def label_capture(library: Library, capture_path: str | Path, cfg: dict, *, seed: int = 0, use_masks: bool = True,
                  weighted: bool = True, progress: Callable[[str], None] | None = None) -> list[dict]:
    """Label every object in every frame of one capture, each frame on its own.  Returns the records
    (see the module docstring), in frame order then proposal order."""
    return label_captures(library, [capture_path], cfg, seed=seed, use_masks=use_masks, weighted=weighted,
                          progress=progress)


CAPTURES_PER_ITEM = 4  # captures labelled together (one executor item; their objects matched in batches)

_WORKER_MATCHER: dict = {}  # per worker process: the matcher of the current run, keyed by the run's token


def label_captures(library: Library, capture_paths: list[str | Path], cfg: dict, *, seed: int = 0,
                   use_masks: bool = True, weighted: bool = True, progress: Callable[[str], None] | None = None,
                   stats: dict | None = None, batch_objects: int = 256, executor=None) -> list[dict]:
    """Label several captures (records in the given capture order, then frame order).

    Captures go in groups of ``CAPTURES_PER_ITEM`` (fixed, so records do not depend on the number of
    workers); ``executor`` (``protomine.scale.executor``; None = this process) labels the groups in its
    worker processes, each building the matcher once.  Within a group, objects are lifted capture by
    capture and matched in batches of about ``batch_objects`` (one pose search call costs a fixed
    overhead, so single-frame captures are matched several at a time).
    stats: optional dict filled with ``objects``, ``frames``, ``lift_s``, ``match_s`` (seconds spent lifting
    and matching, summed over workers, without reading images or finding objects), ``objects_per_second``
    for those two (per worker), ``seconds`` (wall clock of the whole call), ``workers`` and ``scores``
    (n_records, K): every record's score against every prototype.
    """
    unique_capture_names(capture_paths)
    t0 = time.perf_counter()
    groups = [[str(p) for p in capture_paths[i:i + CAPTURES_PER_ITEM]]
              for i in range(0, len(capture_paths), CAPTURES_PER_ITEM)]
    st = {"objects": 0, "frames": 0, "lift_s": 0.0, "match_s": 0.0}
    out: list[dict] = []
    scores: list[np.ndarray] = []
    per_view: dict[str, list[np.ndarray]] = {}

    n_workers = 1 if executor is None else min(executor.n_workers, len(groups))
    # the matcher (its prototype spectra: ~1 s for 8 prototypes) is built here only when this process labels;
    # with workers, each builds its own, in parallel, and this process only checks the library
    args = _matcher_args(library, cfg, weighted)
    K = int(library.prototypes["features"].shape[0])
    total = sum(len(read_capture(p, check_images=False).frames) for p in capture_paths)
    with bar(progress, "label", total=total, unit="frames") as b:

        def add(res: tuple[list[dict], dict], advance: bool) -> None:
            out.extend(res[0])
            for k in st:
                st[k] += res[1][k]
            scores.extend(res[1].get("scores", []))
            for k in ("view_cut", "unknown_cuts"):
                per_view.setdefault(k, []).extend(res[1].get(k, []))
            if advance:  # a worker's group: its lines and its frames at once
                replay(progress, res[1]["lines"])
                b.advance(res[1]["frames"])

        if n_workers <= 1:
            matcher = Matcher(*args[0], **args[1])
            for g in groups:
                add(_label_group(matcher, g, cfg, seed, use_masks, batch_objects, progress, b), False)
        else:
            detail(progress, f"{len(capture_paths)} captures on {executor.describe()}")
            token = f"{id(args):x}-{time.time_ns():x}"
            executor.map(_label_item, groups, shared=(token, library, cfg, weighted, seed, use_masks, batch_objects),
                         fold=lambda _, res: add(res, True))
    st["objects_per_second"] = st["objects"] / max(st["lift_s"] + st["match_s"], 1e-9)
    st["seconds"] = time.perf_counter() - t0
    st["workers"] = n_workers
    # (n_records, K) score of every record against every prototype, in record order (decision-rule studies)
    st["scores"] = np.concatenate(scores or [np.zeros((0, K))])
    # (n_records,) whether each view cuts its object off (ingest.truncation; False when not looked for) and its unknown cut
    for k, v in per_view.items():
        st[k] = np.concatenate(v) if v else np.zeros(0)
    if stats is not None:
        stats.update(st)
    return out


def _label_item(shared: tuple, paths: list[str]) -> tuple[list[dict], dict]:
    """Executor item: one group of captures labelled in a worker process (matcher built once per run)."""
    token, library, cfg, weighted, seed, use_masks, batch_objects = shared
    if token not in _WORKER_MATCHER:
        _WORKER_MATCHER.clear()
        _WORKER_MATCHER[token] = make_matcher(library, cfg, weighted=weighted)
    rec = Recorder()
    out, st = _label_group(_WORKER_MATCHER[token], paths, cfg, seed, use_masks, batch_objects, rec,
                           Bar(None, "label", 0, "frames"))
    st["lines"] = rec.lines
    return out, st


def _label_group(matcher: Matcher, paths: list[str], cfg: dict, seed: int, use_masks: bool, batch_objects: int,
                 progress: Callable[[str], None] | None, b: Bar) -> tuple[list[dict], dict]:
    """Records of a group of captures and their stats (objects, frames, lift_s, match_s); ``b`` advances
    by one per frame."""
    st = {"objects": 0, "frames": 0, "lift_s": 0.0, "match_s": 0.0}
    out: list[dict] = []
    pending: list[tuple[str, FrameObjects]] = []
    with one_blas_thread():  # the planes' fits, the pose search's pool: many small numpy products (cores.one_blas_thread)
        for path in paths:
            pending += _lift_capture(matcher, read_capture(path, check_images=False), cfg, seed, use_masks, progress, st, b)
            if sum(len(fo.facts) for _, fo in pending) >= batch_objects:
                out += _match_batch(matcher, pending, st)
                pending = []
        out += _match_batch(matcher, pending, st)
    return out, st


def _lift_capture(matcher: Matcher, cap: Capture, cfg: dict, seed: int, use_masks: bool,
                  progress: Callable[[str], None] | None, st: dict, b: Bar) -> list[tuple[str, FrameObjects]]:
    rng = capture_rng(seed, cap.name)   # one generator per capture, consumed frame after frame
    masks = bool(use_masks and cap.has_masks)
    width = cap.intrinsics.width
    lifted = []
    for fr in cap.frames:
        scene = find_objects(cap, cfg, rng, frame_ids=[fr.id], use_masks=masks)
        t0 = time.perf_counter()
        fo = lift_frame(scene, fr.id, matcher.grid, width, geometry_ids=not masks, centre_offsets=matcher.centre_offsets,
                        cut_offsets=matcher.cut_offsets, view_cuts=matcher.view_cut and matcher.normaliser is not None)
        st["lift_s"] += time.perf_counter() - t0
        lifted.append((cap.name, fo))
        b.advance()
        detail(progress, f"{cap.name} frame {fr.id}: {len(fo.facts)} objects")
    st["frames"] += len(cap.frames)
    return lifted


def _match_batch(matcher: Matcher, lifted: list[tuple[str, FrameObjects]], st: dict) -> list[dict]:
    """Match the lifted objects of several frames in one pose search and build their records."""
    if not lifted:
        return []
    t0 = time.perf_counter()
    m = match_lifted(matcher, lifted)
    st["match_s"] += time.perf_counter() - t0
    out = lifted_records(matcher, lifted, m)
    st["objects"] += len(out)
    st.setdefault("scores", []).append(m["score"])
    st.setdefault("unknown_cuts", []).append(m["unknown_cut"][np.arange(len(m["best"])), np.maximum(m["best"], 0)]
                                             if len(m["best"]) else np.zeros(0))
    st.setdefault("view_cut", []).append(np.array([c is not None for _, fo in lifted for c in fo.cuts], bool)
                                         if all(fo.cuts is not None for _, fo in lifted) else
                                         np.zeros(sum(len(fo.facts) for _, fo in lifted), bool))
    return out


def match_lifted(matcher: Matcher, lifted: list[tuple[str, FrameObjects]]) -> dict:
    """The lifted objects of several frames in one pose search, each view with its camera, size and cut:
    :meth:`Matcher.match`'s output."""
    return matcher.match(np.concatenate([fo.volumes for _, fo in lifted]),
                         np.concatenate([fo.cameras for _, fo in lifted]),
                         np.array([f["size_m"] for _, fo in lifted for f in fo.facts], np.float64).reshape(-1, 2),
                         [c for _, fo in lifted for c in fo.cuts] if matcher.view_cut and matcher.normaliser is not None else None)


def lifted_records(matcher: Matcher, lifted: list[tuple[str, FrameObjects]], m: dict) -> list[dict]:
    """The records of the lifted objects (in order) from :func:`match_lifted`'s output ``m``."""
    out, i0 = [], 0
    for cap_name, fo in lifted:
        n = len(fo.facts)
        out += _records(matcher, cap_name, fo, {k: v[i0:i0 + n] for k, v in m.items()})
        i0 += n
    return out
