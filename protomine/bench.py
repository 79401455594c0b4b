"""``protomine bench``: speed and memory of the clustering engine, measured side by side in one run.

Synthetic volumes (demo data, invented): K random smooth prototypes on a (C, R, A, H) = (5, 8, 36, 12)
grid, each object a prototype rolled by a random yaw, scaled by a random factor in [0.9, 1.1], with
Gaussian noise and a random partial-observation mask (a view sees a random half of the azimuth and a
random fraction of the height).

Rows (JSON keys in brackets):

(a) assignment of the same N objects to K = 32 prototypes [``assignment``]:
    ``fft_s`` (all 36 yaw shifts by FFT correlation), ``dense_s`` (one pose-unaware dense pass),
    ``naive_s`` (explicitly rolling every prototype for every shift), ``ratio_fft_dense`` (target <= 4),
    ``ratio_naive_fft``; ``n_objects``, ``n_prototypes``, ``n_shifts``, ``load_1m`` (1-minute load average).
(b) mining with fixed K = 32 and the default 5 scales (``SCALES``) [``mining``]: ``sizes``, a list of
    {``n_objects``, ``seconds``, ``peak_rss_mb``, ``n_iter``, ``load_1m``}, each size run in its own
    subprocess so its peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``, which includes
    the 0.83 GB of synthetic volumes at 10,000 objects) is its own; ``load_1m`` is the machine's 1-minute
    load average when the size finished (timings on a shared machine grow with it);
    ``growth_exponent`` = slope of log(seconds) against log(n_objects) (1 = linear).  Engine settings:
    n_init = 2, max_iter = 15, chunk_size = 256, sample_size = 2048, cache_mb = 128.  Targets (full run:
    1,000 / 3,000 / 10,000 objects): 10,000 objects under 300 s, under 2 GB.

Other stages add rows by appending a ``(name, function(quick, seed) -> dict)`` pair to ``BENCH_ROWS``;
each dict is printed as one table section and stored under its name in the JSON.
"""
from __future__ import annotations

import json as _json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Annotated, Callable, Optional

import numpy as np
import typer

from . import atomic
from .mine.synthetic import GRID, synthetic_objects, synthetic_prototypes

SCALES = (0.87, 0.93, 1.0, 1.07, 1.15)  # configs/default.toml mine.scales


def _time(fn: Callable[[], object]) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def bench_assignment(quick: bool, seed: int) -> dict:
    """(a) FFT over all shifts vs one dense pass vs naive explicit rotation, same volumes."""
    from .mine.posesearch import dense_distances, pose_distances, pose_distances_naive
    rng = np.random.default_rng(seed)
    K = 8 if quick else 32
    n = 256 if quick else 2048
    P = synthetic_prototypes(rng, K)
    X, W, *_ = synthetic_objects(rng, P, n)
    V = np.ones((K,) + W.shape[1:], np.float32)
    pose_distances(X[:64], W[:64], P, V)  # warm-up (thread pools, allocator)
    fft_s = min(_time(lambda: pose_distances(X, W, P, V, chunk_size=512)) for _ in range(2))
    dense_s = min(_time(lambda: dense_distances(X, W, P, V, chunk_size=512)) for _ in range(2))
    m = max(32, n // 8)  # the naive way is slow: time a slice and scale up
    naive_s = _time(lambda: pose_distances_naive(X[:m], W[:m], P, V, chunk_size=512)) * n / m
    return {"n_objects": n, "n_prototypes": K, "n_shifts": GRID[2], "fft_s": fft_s, "dense_s": dense_s,
            "naive_s": naive_s, "naive_timed_objects": m, "ratio_fft_dense": fft_s / dense_s,
            "ratio_naive_fft": naive_s / fft_s, "load_1m": os.getloadavg()[0]}


def _mine_once(n: int, k: int, seed: int) -> dict:
    """Run in a subprocess: generate n objects, fit PoseKMeans(K=k), report time and peak RSS."""
    from .mine.engine import ArraySource, PoseKMeans
    rng = np.random.default_rng(seed)
    P = synthetic_prototypes(rng, k)
    # generated in blocks written into preallocated arrays, so that neither the generator's temporaries
    # nor a concatenated copy (X alone is 0.7 GB at 10,000 objects) dominate the peak memory
    X = np.empty((n,) + P.shape[1:], np.float32)
    W = np.empty((n,) + P.shape[2:], np.float32)
    for i in range(0, n, 1000):
        X[i:i + 1000], W[i:i + 1000] = synthetic_objects(rng, P, min(1000, n - i))[:2]
    t0 = time.perf_counter()
    # chunks of 256 objects keep the per-chunk transients near 0.1 GB; 128 MB of cached object spectra
    # (about 1,250 objects) leave room for the 0.8 GB of volumes at 10,000 objects
    model = PoseKMeans(n_clusters=k, scales=SCALES, n_init=2, max_iter=15, chunk_size=256, random_state=seed,
                       sample_size=2048, cache_mb=128).fit(ArraySource(X, W))
    secs = time.perf_counter() - t0
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux reports KiB
    return {"n_objects": n, "seconds": secs, "peak_rss_mb": rss_mb, "n_iter": int(model.n_iter_),
            "load_1m": os.getloadavg()[0]}


def bench_mining(quick: bool, seed: int) -> dict:
    """(b) mining time and peak memory per size, each size in its own subprocess."""
    sizes, k = ((200, 400), 8) if quick else ((1000, 3000, 10000), 32)
    rows = []
    for n in sizes:
        code = f"import json; from protomine.bench import _mine_once; print(json.dumps(_mine_once({n}, {k}, {seed})))"
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        rows.append(_json.loads(out.stdout.strip().splitlines()[-1]))
        print(f"[bench] mined {n} objects in {rows[-1]['seconds']:.1f} s, peak {rows[-1]['peak_rss_mb']:.0f} MB, "
              f"load {rows[-1]['load_1m']:.1f}",
              file=sys.stderr, flush=True)
    ln, lt = np.log([r["n_objects"] for r in rows]), np.log([r["seconds"] for r in rows])
    growth = float(np.polyfit(ln, lt, 1)[0]) if len(rows) > 1 else float("nan")
    return {"n_prototypes": k, "sizes": rows, "growth_exponent": growth}


# The label stage appends its throughput row here: (name, fn(quick, seed) -> dict of figures).
BENCH_ROWS: list[tuple[str, Callable[[bool, int], dict]]] = [
    ("assignment", bench_assignment),
    ("mining", bench_mining),
]


def _bench_label(quick: bool, seed: int) -> dict:
    """(c) single-view lifting + matching against K = 32 prototypes [``label``] (protomine/label/throughput.py)."""
    from .label.throughput import bench_label
    return bench_label(quick, seed)


BENCH_ROWS.append(("label", _bench_label))


def _bench_scale(quick: bool, seed: int) -> dict:
    """(d) scale-out [``scale``], only with ``--scale`` (it starts a Dask LocalCluster)."""
    from .scale.benchmark import bench_scale
    return bench_scale(quick, seed)


def _bench_tilts(quick: bool, seed: int) -> dict:
    """(e) pose search over tilts x yaw x scale vs the yaw-only search [``tilts``] (protomine/mine/tiltbench.py)."""
    from .mine.tiltbench import bench_tilts
    return bench_tilts(quick, seed)


BENCH_ROWS.append(("tilts", _bench_tilts))


SCALE_ROWS: list[tuple[str, Callable[[bool, int], dict]]] = [("scale", _bench_scale)]


def _print_section(name: str, figures: dict) -> None:
    print(f"== {name}")
    for key, val in figures.items():
        if isinstance(val, list) and val and all(isinstance(row, dict) for row in val):
            for row in val:
                print("   " + "  ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in row.items()))
        else:
            print(f"   {key:<22} {val:.4g}" if isinstance(val, float) else f"   {key:<22} {val}")


def bench(json: Annotated[Optional[Path], typer.Option("--json", help="Also write the figures as JSON here.")] = None,
          quick: Annotated[bool, typer.Option("--quick", help="Small sizes: a smoke test of the benchmark.")] = False,
          seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed of the synthetic volumes.")] = 0,
          scale: Annotated[bool, typer.Option("--scale", help="Only the scale-out row: this process vs a 2-worker "
                                              "Dask LocalCluster, and a 1M-object / 50-worker projection "
                                              "(protomine/scale/benchmark.py).")] = False) -> None:
    """Measure pose-search and mining speed and memory on synthetic volumes (see protomine/bench.py)."""
    results = {"quick": quick, "seed": seed, "grid_CRAH": list(GRID)}
    for name, fn in (SCALE_ROWS if scale else BENCH_ROWS):
        results[name] = fn(quick, seed)
        _print_section(name, results[name])
    if json is not None:
        atomic.write_text(json, _json.dumps(results, indent=2))
