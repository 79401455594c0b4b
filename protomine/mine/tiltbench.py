"""Bench row [``tilts``]: the pose search over tilts x yaw x scale against the yaw-only search, same volumes.

Synthetic volumes (invented): K smooth random prototypes and N partially observed objects of
``protomine.bench`` (grid (5, 8, 36, 12), the default 5 scales), aspect 1 for every prototype.  Both searches
run on the same object spectra; the tilt search's time includes building its tilted copies (a pass
builds them once).  Figures: ``yaw_s``, ``tilt_s`` (seconds per search of N objects against K prototypes),
``coarse_tilts`` (first-level directions, searched for every prototype), ``tilts_per_pair`` (directions
evaluated per (object, prototype) on average at all scales, coarse plus refinement), ``ratio`` = tilt_s / yaw_s and
``ratio_per_tilt`` = ratio / tilts_per_pair (target <= 1.3: the cost grows linearly with the tilts and
resampling does not dominate).
"""
from __future__ import annotations

import os
import time

import numpy as np

from .posesearch import PoseBank
from .tilts import TiltBank, TiltGrid


def bench_tilts(quick: bool, seed: int) -> dict:
    from .synthetic import SCALES, synthetic_objects, synthetic_prototypes
    rng = np.random.default_rng(seed)
    K, n = (8, 256) if quick else (16, 1024)
    P = synthetic_prototypes(rng, K)
    X, W, *_ = synthetic_objects(rng, P, n)
    P = np.abs(P)  # surface-like evidence, so the tilted copies have solid cells
    V = np.ones((K,) + W.shape[1:], np.float32)
    grid = TiltGrid()
    yaw_bank = PoseBank(P, V, SCALES)
    o = yaw_bank.spectra(X, W)
    yaw_bank.match_spectra(o[:, :32])  # warm-up
    t0 = time.perf_counter()
    yaw_bank.match_spectra(o)
    yaw_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    bank = TiltBank(P, V, np.ones(K), SCALES, grid)
    bank.match_spectra(o)
    tilt_s = time.perf_counter() - t0
    T0 = len(grid.level(0))
    per_level = [float(np.mean([len(grid.candidates(i, t)) for t in grid.level(i - 1)])) for i in range(1, len(grid.nsides))]
    # refinement: refine_top pairs per object, each searching its candidates at one scale (the S-scale
    # coarse search counts as T0 directions per pair)
    per_pair = T0 + grid.refine_top * sum(per_level) / (K * len(SCALES))
    ratio = tilt_s / yaw_s
    return {"n_objects": n, "n_prototypes": K, "coarse_tilts": T0, "candidates_per_level": per_level,
            "tilts_per_pair": per_pair, "yaw_s": yaw_s, "tilt_s": tilt_s,
            "ratio": ratio, "ratio_per_tilt": ratio / per_pair, "load_1m": os.getloadavg()[0]}
