"""Label throughput row of ``protomine bench``: objects per second for single-view lifting + matching.

Demo data: a few single-frame captures of the built-in scenario are rendered into a temporary folder and
their objects found (not timed); then every object is lifted from its frame (``matcher.lift_frame``) and
matched (``Matcher.match``: features, FFT pose search over all yaws and the scale set, calibrated scores)
against K = 32 prototypes, timed.  Lifting reads each frame's flying-pixel flags, which finding the objects
computed once a frame; that work moved out of lifting, so it is timed here too (``frame_flags_s``) and counted in
``objects_per_second`` and the CPU time, while the rest of finding the objects is not timed.
The prototypes are random smooth volumes (``mine.synthetic.synthetic_prototypes``,
invented): the cost of the pose search does not depend on what the prototypes look like.
"""
from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

import numpy as np

from .. import cores
from ..config import load_config
from ..ingest.depthedges import flying_pixels
from ..mine.library import Library
from ..mine.synthetic import synthetic_prototypes

N_PROTOTYPES = 32


def synthetic_library(rng: np.random.Generator, k: int, grid: tuple[int, int, int], cfg: dict) -> Library:
    """An in-memory library of k random prototypes on ``grid`` (R, A, H), with a neutral calibration."""
    from ..ingest.volume import FEATURES
    R, A, H = grid
    P = np.clip(synthetic_prototypes(rng, k, (len(FEATURES), R, A, H)) * 0.2 + 0.3, 0, 1)
    protos = {"features": P.astype(np.float32), "weights": np.full((k, R, A, H), 0.8, np.float32),
              "symmetry": np.ones(k, np.int64), "period_deg": np.full(k, 360.0), "count": np.full(k, 10),
              "size_median": np.full((k, 2), 0.05), "single_mu": np.full(k, -4.0), "single_sigma": np.full(k, 0.3),
              "aspect": np.ones(k), "face_up": np.tile([[[0.0, 0.0, 1.0]]], (k, 1, 1)),
              "face_count": np.full((k, 1), 10), "face_symmetry": np.ones((k, 1), np.int64),
              "name": [""] * k}
    import json
    return Library(protos, {}, {"config": json.dumps(cfg), "grid": np.array(grid), "scales": json.dumps(cfg["mine"]["scales"]),
                                "unknown_cut": 0.0})          # speed only: no view is called unknown


def bench_label(quick: bool, seed: int) -> dict:
    """Objects per second of lifting + matching against 32 prototypes in one process with one torch thread
    (a label worker; target >= 500), wall clock and per CPU second (the latter barely depends on the load
    of a shared machine)."""
    from ..capture import read_capture
    from ..ingest.proposals import find_objects
    from ..scenes.scenario import generate_scenario
    from .matcher import lift_frame, make_matcher
    cfg = load_config()
    rng = np.random.default_rng(seed)
    n_caps, passes = (2, 2) if quick else (8, 4)
    with tempfile.TemporaryDirectory() as tmp:
        generate_scenario(Path(tmp) / "s", n_mining=1, n_single=n_caps, frames=1, seed=seed)
        scenes = []
        for c in sorted((Path(tmp) / "s").glob("single_*")):
            cap = read_capture(c, check_images=False)
            fid = cap.frames[0].id
            scenes.append((find_objects(cap, cfg, rng, frame_ids=[fid]), fid, cap.intrinsics.width))
    from ..ingest.volume import Grid
    grid = Grid.from_config(cfg)
    matcher = make_matcher(synthetic_library(rng, N_PROTOTYPES, grid.shape, cfg), cfg)
    # one label worker: one thread in torch and in numpy's and scipy's BLAS, as a worker process runs
    # (protomine.cores.enter_worker); a warm-up pass first (thread pools, allocator)
    from threadpoolctl import threadpool_limits
    cores.set_torch_threads(1)
    with threadpool_limits(limits=1):
        matcher.match(np.concatenate([lift_frame(sc, fid, matcher.grid, w, geometry_ids=False).volumes
                                      for sc, fid, w in scenes[:1]]))
        n_obj, lift_s, match_s, cpu_s, flags_s = 0, 0.0, 0.0, 0.0, 0.0
        load0 = os.getloadavg()[0]
        for _ in range(passes):
            c0 = time.process_time()
            t0 = time.perf_counter()
            lifted = [lift_frame(sc, fid, matcher.grid, w, geometry_ids=False) for sc, fid, w in scenes]
            t1 = time.perf_counter()
            matcher.match(np.concatenate([fo.volumes for fo in lifted]))   # one batch, as label_captures does
            t2 = time.perf_counter()
            for sc, fid, _ in scenes:
                flying_pixels(next(f for f in sc.frames if f.id == fid).depth)
            t3 = time.perf_counter()
            cpu_s += time.process_time() - c0
            lift_s += t1 - t0
            match_s += t2 - t1
            flags_s += t3 - t2
            n_obj += sum(len(fo.facts) for fo in lifted)
    cores.set_torch_threads(cores.usable_cores())
    return {"n_objects": n_obj, "n_prototypes": N_PROTOTYPES, "n_scales": len(matcher.scales), "torch_threads": 1,
            "blas_threads": 1, "lift_s": lift_s, "match_s": match_s, "frame_flags_s": flags_s,
            "objects_per_second": n_obj / max(lift_s + match_s + flags_s, 1e-9),
            "cpu_s": cpu_s, "objects_per_cpu_second": n_obj / max(cpu_s, 1e-9),
            "load_1m_start": load0, "load_1m": os.getloadavg()[0]}
