"""The search of single views against prototypes, shared by labelling (``label.matcher``) and mining's
single-view calibration (``mine.pipeline.single_view_calibration``), so the score judges distances found the
same way: the FFT pose search over the tilt grid x yaw x scale, each prototype's exact resting directions
(:class:`ExactFaces`), a finer search of each view's nearest prototypes (``mine.refine``), and view prototypes
(:meth:`ViewSearch.vote`).  It lives under ``mine`` so that mining's calibration imports it downward.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .posesearch import PoseBank
from .refine import PoseRefiner
from .tilts import TiltBank, TiltGrid, make_bank

EXACT_MERGE_DEG = 3.0    # exact resting directions this close to +z or to each other are searched once


@dataclass
class ExactFaces:
    """Copies of each prototype resting on its exact resting directions, searched over yaw x scale besides the
    tilt grid (``[mine] face_pairs``): the directions are the library's recorded faces and ``faces.stable_ups``
    of the prototype's solid cells (+z left out: the grid has it exactly).  A grid leaves a view resting on
    another face up to the grid's covering radius off its tilt, and the distance grows fast with that error
    (README, "Why tumbled classes split by face").  owner (M,) prototype of each copy, ups (M, 3)."""

    owner: np.ndarray
    ups: np.ndarray
    bank: PoseBank

    @classmethod
    def build(cls, bank: TiltBank, face_up: np.ndarray, face_symmetry: np.ndarray, scales: tuple[float, ...]
              ) -> "ExactFaces | None":
        """From a TiltBank's prototypes (its P, V, aspect) and the library's faces face_up (K, F, 3),
        face_symmetry (K, F) (-1 = padding); None when no prototype has a resting direction besides +z."""
        from .faces import stable_ups
        owner, ups, Pc, Vc = [], [], [], []
        cos_same = np.cos(np.deg2rad(EXACT_MERGE_DEG))
        for k in range(bank.K):
            rec = np.asarray(face_up[k], np.float64)[np.asarray(face_symmetry[k]) >= 0].reshape(-1, 3)
            cand = np.concatenate([rec, stable_ups(bank.P[k, 0], bank.V[k], float(bank.aspect[k]))])
            cand = cand / np.maximum(np.linalg.norm(cand, axis=1, keepdims=True), 1e-12)
            keep: list[np.ndarray] = []
            for u in cand:
                if u[2] < cos_same and all(float(u @ v) < cos_same for v in keep):
                    keep.append(u)
            if keep:
                pc, vc = bank.copies_at(k, np.asarray(keep))
                owner += [k] * len(keep)
                ups.append(np.asarray(keep))
                Pc.append(pc)
                Vc.append(vc)
        if not owner:
            return None
        return cls(np.asarray(owner), np.concatenate(ups), PoseBank(np.concatenate(Pc), np.concatenate(Vc), scales))

    def improve(self, X: np.ndarray, W: np.ndarray, D: np.ndarray, yaw: np.ndarray, scale: np.ndarray,
                up: np.ndarray, upright: np.ndarray) -> None:
        """In place, for objects X (n, C, R, A, H), W (n, R, A, H) and their grid poses D, yaw, scale (n, K),
        up (n, K, 3), upright (n, K): each (object, prototype) whose best exact resting copy fits better takes
        that copy's distance, yaw, scale and up (and is no longer upright)."""
        m = self.bank.match(X, W)
        Df = np.where(np.isfinite(m.D), m.D, np.inf).astype(np.float64)
        r = np.arange(len(X))
        for k in np.unique(self.owner):
            cols = np.flatnonzero(self.owner == k)
            j = cols[np.argmin(Df[:, cols], axis=1)]
            better = Df[r, j] < np.where(np.isfinite(D[:, k]), D[:, k], np.inf)
            jb = j[better]
            D[better, k], yaw[better, k], scale[better, k] = Df[better, jb], m.yaw_deg[better, jb], m.scale[better, jb]
            up[better, k] = self.ups[jb]
            upright[better, k] = False


class ViewSearch:
    """The label search of single views against prototypes P (K, C, R, A, H), V (K, R, A, H) (aspects (K,)):
    the FFT pose search over the tilt grid ``tilts`` x yaw x ``scales`` (``mine.tilts.TiltBank``; a yaw-only
    PoseBank for the identity grid), then each prototype's exact resting directions (:class:`ExactFaces`, with
    ``exact_faces``), then the finer search of each view's ``refine_top`` nearest prototypes
    (``mine.refine.PoseRefiner``; 0 = none).  Mining's single-view calibration searches its held-out views with
    the same object (``mine.pipeline.single_view_calibration``), so the score judges distances found the same way."""

    def __init__(self, P: np.ndarray, V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], tilts: TiltGrid,
                 face_up: np.ndarray, face_symmetry: np.ndarray, *, exact_faces: bool = False, refine_top: int = 0,
                 chunk_size: int = 512):
        self.tilts, self.chunk_size = tilts, chunk_size
        # the scaled (and tilted) prototypes' spectra cost more than matching a whole frame: build them once
        self.bank = make_bank(P, V, scales, tilts, aspect)
        tilted = isinstance(self.bank, TiltBank)
        self.face_bank = ExactFaces.build(self.bank, face_up, face_symmetry, scales) if exact_faces and tilted else None
        self.refiner = (PoseRefiner(P, V, scales, self.bank if tilted else None, top=refine_top)
                        if refine_top > 0 else None)
        self.views = None   # view prototypes (see :meth:`vote`), set by the Matcher of a library that has them
        self.K = int(P.shape[0])

    def set_views(self, owner: np.ndarray, P: np.ndarray, V: np.ndarray, scales: tuple[float, ...]) -> None:
        """View prototypes owner (M,) (their prototypes), P (M, C, R, A, H), V (M, R, A, H) (``mine.pipeline.view_prototypes``)."""
        owner = np.asarray(owner, np.int64)
        self.views = (owner, PoseBank(np.asarray(P, np.float32), np.asarray(V, np.float32), scales)) if len(owner) else None

    def vote(self, X: np.ndarray, W: np.ndarray, D: np.ndarray) -> np.ndarray:
        """The distances (n, K) that decide the class: per prototype the nearer of its pose-searched distance D
        (n, K) and its view prototypes' (searched over yaw x scale in their face's frame); D itself without
        view prototypes."""
        if self.views is None:
            return D
        owner, bank = self.views
        cs = self.chunk_size
        Dv = np.concatenate([bank.match(X[i:i + cs], W[i:i + cs]).D for i in range(0, len(X), cs)]).astype(np.float64)
        Dv = np.where(np.isfinite(Dv), Dv, np.inf)
        best = np.full((len(X), self.K), np.inf)
        np.minimum.at(best.T, owner, Dv.T)   # per prototype, its nearest view prototype
        return np.fmin(D, best)

    def poses(self, X: np.ndarray, W: np.ndarray):
        """Views X (n, C, R, A, H), W (n, R, A, H) -> D, yaw_deg (raw, in the matched copy's frame), scale (n, K),
        up (n, K, 3) (the matched copy's up direction in the prototype frame), upright (n, K)."""
        n, cs = len(X), self.chunk_size
        parts = [self.bank.match(X[i:i + cs], W[i:i + cs]) for i in range(0, n, cs)]
        D = np.concatenate([p.D for p in parts]).astype(np.float64)
        raw = np.concatenate([p.yaw_deg for p in parts]).astype(np.float64)
        tilt = np.concatenate([p.tilt for p in parts])
        fit_scale = np.concatenate([p.scale for p in parts]).astype(np.float64)
        up = self.tilts.dirs[tilt]
        upright = self.tilts.is_upright(tilt)
        if self.face_bank is not None:  # the exact resting directions, where they fit better than the grid's
            for i in range(0, n, cs):
                sl = slice(i, i + cs)
                self.face_bank.improve(X[sl], W[sl], D[sl], raw[sl], fit_scale[sl], up[sl], upright[sl])
        if self.refiner is not None:  # the nearest few prototypes: a finer tilt and scale search (mine.refine)
            for i in range(0, n, cs):
                sl = slice(i, i + cs)
                self.refiner.improve(X[sl], W[sl], D[sl], raw[sl], fit_scale[sl], up[sl], upright[sl])
        return D, raw, fit_scale, up, upright
