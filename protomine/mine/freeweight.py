"""The free-space weight chosen by the held-out single views (``[mine] free_weight_factors``).

The distance weighs the free-space channel by ``[mine] free_weight`` (``ingest.volume.matching_features``: the
feature is sqrt(free_weight) x free, so the squared distance weighs it by free_weight).  How much free space can be
trusted depends on the sensor: active-stereo depth leaves stray readings and uncarved cells beside silhouettes
(README "Score"), a clean sensor carves it well.  The held-out single views of the mined objects (the store's
``single/`` volumes) carry the user's own sensor and are labelled by mining itself (their object's cluster), so at
mining time, without labels, each candidate weight w is judged by how often those views name their own prototype
in the label decision (:func:`heldout_own_rates`): the library is re-weighted to w (:func:`reweighted_library`),
the views are matched with their cameras by the label stage's own matcher (pose search and view normalisation,
``label.matcher``), and the own prototype's decision distance is carried to leave-one-out by the factor the
library's calibration measured for it (own_d / the scored distance to the whole prototype, at the configured
weight: the same object's leave-one-out bias assumed for every weight, as ``pipeline.view_calibration`` assumes it
for the view-normalised distance).  Mining keeps the weight of the highest rate (the configured weight first, so it
wins ties) and builds the library with it: prototypes, members' distances, calibrations and cuts, so label and find
use it as if it had been configured.

Shapes: D (Q, K) decision distances, own (Q,) prototype indices, own_d / dr (Q,) distances.
"""
from __future__ import annotations

import json
from typing import Callable

import numpy as np

from ..cores import one_blas_thread
from ..progress import bar
from .library import Library

__all__ = ["free_rescaled", "free_weight_choices", "reweighted_library", "own_prototype_rate", "with_cameras",
           "heldout_own_rates"]


def free_weight_choices(cfg: dict) -> list[float]:
    """The candidate weights of ``[mine] free_weight_factors``: ``free_weight`` x each factor, the configured weight
    (factor 1) first, each once; [] when off (no factor but 1)."""
    base = float(cfg["mine"]["free_weight"])
    out = [base]
    for f in cfg["mine"].get("free_weight_factors", [1.0]) or [1.0]:
        if base * float(f) not in out:
            out.append(base * float(f))
    return out if len(out) > 1 else []


def free_rescaled(P: np.ndarray, new: float, old: float) -> np.ndarray:
    """A float32 copy of prototypes P (K, C, R, A, H) fitted at free-space weight ``old`` (> 0) as at ``new``: the free
    channel (feature 1, sqrt(weight) x free; prototypes are weighted means of their members) times sqrt(new / old)."""
    P = np.array(P, np.float32, copy=True)
    P[:, 1] *= np.float32(np.sqrt(new / old))
    return P


def reweighted_library(lib: Library, free_weight: float) -> Library:
    """``lib`` with its distance's free-space weight set to ``free_weight``: the prototypes' free channel (feature 1,
    sqrt(weight) x free) rescaled by sqrt(free_weight / the library's weight), the recorded config's ``free_weight``
    replaced; the other fields shared (not copied).  A library at weight 0 cannot be rescaled up (its free channel is
    gone): ValueError."""
    conf = lib.config
    old = float(conf["mine"]["free_weight"])
    if old <= 0 and free_weight != old:
        raise ValueError(f"free_weight={old} of the library must be > 0 to rescale its free channel to {free_weight}")
    P = free_rescaled(lib.prototypes["features"], free_weight, old) if old > 0 else \
        np.array(lib.prototypes["features"], np.float32, copy=True)
    conf["mine"]["free_weight"] = float(free_weight)
    return Library({**lib.prototypes, "features": P}, lib.members, {**lib.attrs, "config": json.dumps(conf)}, lib.path)


def own_prototype_rate(D: np.ndarray, own: np.ndarray, loo: np.ndarray) -> float:
    """The share of views whose least decision distance is their own prototype's, that distance first multiplied by
    ``loo`` (Q,) (its leave-one-out factor; 1 = none); views with no finite distance count as misses."""
    D = np.array(D, np.float64, copy=True)
    j = np.arange(len(D))
    D[j, own] = D[j, own] * np.asarray(loo, np.float64)
    D = np.where(np.isfinite(D), D, np.inf)
    ok = np.isfinite(D).any(axis=1)
    return float(np.mean(ok & (np.argmin(D, axis=1) == own))) if len(D) else 0.0


def with_cameras(store, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Which of the store's single views ``rows`` (Q,) keep a camera direction (``single/camera``; a store ingested
    before they were kept has none): (Q,) bool and those views' directions (q, 3), or None when none does."""
    cams = getattr(store, "single_camera", None)
    if cams is None or len(rows) == 0:
        return None
    cams = np.asarray(cams, np.float64)[rows]
    has = np.all(np.isfinite(cams), axis=1)
    return (has, cams[has]) if has.any() else None


def heldout_own_rates(lib: Library, store, rows: np.ndarray, own: np.ndarray, own_d: np.ndarray, weights: list[float],
                      *, chunk: int = 64, progress: Callable[[str], None] | None = None) -> np.ndarray | None:
    """(len(weights),) the held-out single views' own-prototype rates in the label decision at each weight (module
    docstring); ``weights[0]`` must be the library's own.  Views: store rows ``rows`` with their prototypes ``own`` and
    leave-one-out scored distances ``own_d`` (``pipeline.single_view_calibration``), those with a camera direction
    (``single/camera``).  None when the store keeps no cameras."""
    from ..label.matcher import make_matcher   # the label stage's decision (imported here: label imports mine)
    got = with_cameras(store, rows)
    if got is None:
        return None
    has, cams = got
    rows, own, own_d = rows[has], np.asarray(own, np.int64)[has], np.asarray(own_d, np.float64)[has]
    views = [store.read_single_views(rows[i0:i0 + chunk]) for i0 in range(0, len(rows), chunk)]
    j = np.arange(len(rows))
    rates, loo = [], None
    with bar(progress, "free-space weight choice", total=len(weights) * len(rows), unit="views") as b, one_blas_thread():
        for w in weights:
            lw = reweighted_library(lib, w)
            matcher = make_matcher(lw, lw.config)
            D, Dr = [], []
            for i, v in enumerate(views):
                m = matcher.match(v, cams[i * chunk:(i + 1) * chunk])
                D.append(m["distance"])
                Dr.append(m["scored_distance"])
                b.advance(len(v))
            D, Dr = np.concatenate(D), np.concatenate(Dr)
            if loo is None:   # the configured weight's leave-one-out factor, kept for every weight
                dr = Dr[j, own]
                good = np.isfinite(dr) & (dr > 0) & np.isfinite(own_d)
                loo = np.where(good, own_d / np.where(good, dr, 1.0), 1.0)
            rates.append(own_prototype_rate(D, own, loo))
    return np.asarray(rates)
