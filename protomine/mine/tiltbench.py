"""Bench row [``tilts``]: the pose search over tilts x yaw x scale against the yaw-only search, same volumes.

Synthetic volumes (invented): K smooth random prototypes and N partially observed objects of
``protomine.bench`` (grid (5, 8, 36, 12), the default 5 scales), aspect 1 for every prototype; the full row
is one pass's chunk of the default config (``[mine] chunk_size`` 2,048 objects against ``max_clusters`` 16
prototypes).  Both searches run on the same object spectra, each timed as the best of two runs; the tilt
search's time includes building its bank (the tilted copies of the first level and their spectra, built
once per pass) and the refinement's copies (built when first needed, then kept for the pass).

Figures: ``yaw_s``, ``tilt_s`` (seconds per search of N objects against K prototypes); ``tilt_build_s``,
``tilt_search_s`` (its two parts); ``coarse_tilts`` (first-level directions, searched for every prototype at
every scale); ``candidates_per_level`` (directions searched per refined pair at each later level, one
scale); ``tilts_per_pair`` = T, the tilted copies actually searched per (object, prototype) pair counted in
yaw-only searches: T0 at all S scales, plus ``refine_top`` x the candidates of the later levels at one scale
spread over the K x S (prototype, scale) pairs of a yaw-only search; ``ratio`` = tilt_s / yaw_s and
``ratio_per_tilt`` = ratio / T (target <= 1.3: the cost grows linearly with the tilts and building the
copies does not dominate).
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
    K, n = (8, 256) if quick else (16, 2048)
    P = synthetic_prototypes(rng, K)
    X, W, *_ = synthetic_objects(rng, P, n)
    P = np.abs(P)  # surface-like evidence, so the tilted copies have solid cells
    V = np.ones((K,) + W.shape[1:], np.float32)
    grid = TiltGrid()
    yaw_bank = PoseBank(P, V, SCALES)
    o = yaw_bank.spectra(X, W)
    yaw_bank.match_spectra(o[:, :32])  # warm-up
    TiltBank(P[:1], V[:1], np.ones(1), SCALES, grid).match_spectra(o[:, :32])
    yaw_s = build_s = search_s = np.inf
    for _ in range(2):  # interleaved, so both see the same machine load
        t0 = time.perf_counter()
        yaw_bank.match_spectra(o)
        t1 = time.perf_counter()
        bank = TiltBank(P, V, np.ones(K), SCALES, grid)
        t2 = time.perf_counter()
        bank.match_spectra(o)
        t3 = time.perf_counter()
        if t3 - t1 < build_s + search_s:
            build_s, search_s = t2 - t1, t3 - t2
        yaw_s = min(yaw_s, t1 - t0)
    tilt_s = build_s + search_s
    T0 = len(grid.level(0))
    per_level = [float(np.mean([len(grid.candidates(i, t)) for t in grid.level(i - 1)])) for i in range(1, len(grid.nsides))]
    per_pair = T0 + grid.refine_top * sum(per_level) / (K * len(SCALES))
    ratio = tilt_s / yaw_s
    return {"n_objects": n, "n_prototypes": K, "coarse_tilts": T0, "candidates_per_level": per_level,
            "tilts_per_pair": per_pair, "yaw_s": yaw_s, "tilt_s": tilt_s, "tilt_build_s": build_s,
            "tilt_search_s": search_s, "ratio": ratio, "ratio_per_tilt": ratio / per_pair,
            "load_1m": os.getloadavg()[0]}
