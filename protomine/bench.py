"""``protomine bench``: speed and memory of the clustering engine, measured side by side in one run.

Synthetic volumes (demo data, invented): K random smooth prototypes on a (C, R, A, H) = (5, 8, 36, 12)
grid, each object a prototype rolled by a random yaw, scaled by a random factor in [0.9, 1.1], with
Gaussian noise and a random partial-observation mask (a view sees a random half of the azimuth and a
random fraction of the height).

Rows (JSON keys in brackets); every row records the 1-minute load average (``load_1m``): on a shared machine
absolute times grow with it, so the targets are ratios measured side by side in one run.

CPU beside wall time: every row also reports ``row_s`` and ``row_cpu_s``, the whole row's wall and CPU seconds (its
data generation, warm-ups and subprocesses included: ``getrusage`` of this process and of its finished children),
and every timed figure with CPU seconds beside it (``cpu_s`` beside ``seconds``, ``<x>_cpu_s`` beside ``<x>_s``)
gets ``<x>_cpu_pct`` = 100 CPU / wall: 100% is one core busy all along, ``usable_cores`` x 100% every core.  At
a low load it shows which rows leave a core idle; at a high load the wall time grows and the percentage falls
while the CPU seconds barely move.  What does not fall with the load is ``ready_threads`` (``row_ready_threads`` for a
row run in this process, ``ready_threads`` of each fit run in a subprocess of its own): the mean number of the
process's threads on a CPU or ready to run, waiting only for a core (``protomine.cores.ready_clock``, the kernel's
``schedstat``); near 2 a row would keep both of 2 idle cores busy, near 1 it leaves one idle whatever the load.
The label row is one process with one thread by definition (a label worker; more cores label more captures at once,
in more processes) and says so (``single_process``).

(a) assignment of the same N = 4,096 objects to K = 32 prototypes [``assignment``]:
    ``fft_s`` (all 36 yaw shifts by FFT correlation), ``dense_s`` (one pose-unaware dense pass),
    ``naive_s`` (explicitly rolling every prototype for every shift, timed on N / 16 objects and scaled),
    ``ratio_fft_dense`` (target <= 2), ``ratio_naive_fft``; ``fft_cpu_s``, ``dense_cpu_s``,
    ``ratio_fft_dense_cpu``: the same in CPU seconds of this process (less sensitive to a shared machine's load); ``matmul_peak_gflops`` (best of 3 float32
    4096 x 4096 torch products, 2 n^3 operations each, same process and threads), ``products_gflop``,
    ``products_s``, ``products_gflops`` (the search's per-frequency batched products, ``bmm``/``baddbmm``(``_``),
    timed by torch's profiler with their shapes), ``products_fraction_of_peak`` (target >= 0.5),
    ``products_share_of_search``.  Both searches run a chunk's objects in blocks on the search pool's threads, one
    torch thread each (``PoseBank.match_spectra``, ``dense_distances``), where torch's profiler does not see their
    ops: the products are profiled in a search run on this thread with torch at one thread, as a pool thread runs
    them, against one thread's matmul peak (``matmul_peak_1thread_gflops``; the share is of the search's time at one thread).
    The profiler's times are wall times, so on a shared machine the products and the peak each count the waits for a
    core at their own moments; ``products_cpu_s``, ``products_cpu_gflops``, ``matmul_peak_1thread_cpu_gflops`` and
    ``products_fraction_of_peak_cpu`` are the same figures by the thread's CPU clock (``torch.bmm`` timed around each
    product, ``_product_cpu_and_flops``), which the load barely moves.  Since Gauss's three real products per complex
    bin replaced the four of the complex product written out (``posesearch._cross_spectra``), the products do three
    quarters of the operations they did: the GFLOP count and time both fell, the rate did not.
    Both sides run with freed chunk-sized temporaries kept in the heap
    (``protomine/__init__.py``); before that the 50 MB temporaries of a 512-object chunk were mapped and
    zero-filled afresh on every chunk, which cost the dense pass more than its arithmetic.
(b) mining with fixed K = 32 and the default 5 scales (``SCALES``) [``mining``]: ``sizes``, a list of
    {``n_objects``, ``seconds``, ``cpu_s``, ``peak_rss_mb``, ``n_iter``, ``load_1m``}, each size run in its own
    subprocess so its peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``, which includes
    the 0.83 GB of synthetic volumes at 10,000 objects) is its own; ``load_1m`` is the machine's 1-minute
    load average when the size finished (timings on a shared machine grow with it);
    ``growth_exponent`` = slope of log(seconds) against log(n_objects) (1 = linear).  Engine settings:
    n_init = 2, max_iter = 15, chunk_size = 256, sample_size = 2048, cache_mb = 128.  Targets (full run:
    1,000 / 3,000 / 10,000 objects): 10,000 objects under 300 s, under 2 GB.
(c) peer [``peer``]: scikit-learn ``KMeans`` (k-means++, pose-unaware, the same n_init = 2) on the same 2,000
    objects flattened (w x), against our mining (K = 32, 5 scales): ``ours_s``, ``ours_cpu_s``, ``kmeans_s``,
    ``kmeans_cpu_s``, ``ratio_ours_kmeans`` (time), ``ours_nmi``,
    ``kmeans_nmi`` against the synthetic labels: what pose-awareness costs and what it buys.
(d) label [``label``]: lifting + matching single views in one process with one thread in torch and in BLAS, as
    a label worker runs (``protomine/label/throughput.py``; target >= 500 objects per second).
(e) large [``large``]: mini-batch mining of ``--size`` objects streamed from disk, and its quality against
    full batches on 10,000 (``protomine/scale/streamed.py``; targets at 100,000: < 10 minutes, < 4 GB).
(e') tilt mining [``tilt_mining``]: mining ``--tilt-size`` tumbled objects (default 3,000) with the default tilt
    grid, K = 16, in its own subprocess: ``seconds``, ``cpu_s``, ``main_thread_cpu_s`` (the fit's own thread),
    ``ready_threads``, ``peak_rss_mb``, ``n_iter``, ``nmi`` (targets at 3,000: under
    5 minutes and 2 GB on 2 cores; ``protomine/mine/tiltbench.py``).
(f) ``--scale`` only: this process against a local Dask cluster of 1 and 2 workers
    (``protomine/scale/benchmark.py``).

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

from . import atomic, cores
from .mine.synthetic import GRID, SCALES, synthetic_objects, synthetic_prototypes


def _time(fn: Callable[[], object], clock: Callable[[], float] = time.perf_counter) -> float:
    t0 = clock()
    fn()
    return clock() - t0


def _times(fn: Callable[[], object], repeats: int) -> tuple[float, float]:
    """Best wall seconds and best CPU seconds (this process, all threads) of ``repeats`` calls."""
    wall, cpu = [], []
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return min(wall), min(cpu)


def matmul_peak_gflops(n: int, repeats: int = 3, clock: Callable[[], float] = time.perf_counter) -> float:
    """The machine's float32 matrix-multiply rate in this process: best of ``repeats`` (n, n) @ (n, n)
    torch products, 2 n^3 floating-point operations each (the usual count of a multiply-add as 2).  ``clock``:
    wall time by default; ``time.thread_time`` (torch at one thread) gives the rate while the product runs,
    whatever the waits for a core on a shared machine."""
    import torch
    g = torch.Generator().manual_seed(0)
    a, b = torch.randn(n, n, generator=g), torch.randn(n, n, generator=g)
    a @ b  # warm-up
    return 2.0 * n ** 3 / min(_time(lambda: a @ b, clock) for _ in range(repeats)) / 1e9


def _product_cpu_and_flops(run: Callable[[], object]) -> tuple[float, float]:
    """CPU seconds (the calling thread's clock, ``time.thread_time``) and floating-point operations of the batched
    matrix products (``torch.bmm``: the pose search's per-frequency products) while ``run`` executes on this thread
    (torch at one thread): ``torch.bmm`` is wrapped for the call, its CPU time taken around each product and its
    operations from the operands' shapes ((b, n, k) @ (b, k, m) is 2 b n k m)."""
    import torch
    bmm, secs, flops = torch.bmm, [0.0], [0.0]

    def timed(a, b, *args, **kwargs):
        c0 = time.thread_time()
        out = bmm(a, b, *args, **kwargs)
        secs[0] += time.thread_time() - c0
        flops[0] += 2.0 * a.shape[0] * a.shape[1] * a.shape[2] * b.shape[2]
        return out

    torch.bmm = timed
    try:
        run()
    finally:
        torch.bmm = bmm
    return secs[0], flops[0]


def _product_time_and_flops(run: Callable[[], object]) -> tuple[float, float]:
    """Seconds and floating-point operations of the batched matrix products (``bmm``, ``baddbmm``, ``baddbmm_``:
    the pose search's per-frequency complex products in real arithmetic) while ``run`` executes, from torch's
    profiler (op wall times on the calling thread, shapes of the operands: (b, n, k) @ (b, k, m) is 2 b n k m)."""
    from torch.profiler import ProfilerActivity, profile
    with profile(activities=[ProfilerActivity.CPU], record_shapes=True) as prof:
        run()
    secs = flops = 0.0
    for e in prof.events():
        if e.name in ("aten::bmm", "aten::baddbmm", "aten::baddbmm_"):  # the in-place form accumulates
            a, b = e.input_shapes[:2] if e.name == "aten::bmm" else e.input_shapes[1:3]
            flops += 2.0 * a[0] * a[1] * a[2] * b[2]
            secs += e.cpu_time_total / 1e6
    return secs, flops


def bench_assignment(quick: bool, seed: int) -> dict:
    """(a) FFT over all shifts vs one dense pass vs naive explicit rotation, same volumes; the machine's
    matmul peak and the pose search's products against it."""
    from .mine.posesearch import dense_distances, pose_distances, pose_distances_naive
    cores.set_torch_threads(cores.usable_cores())
    rng = np.random.default_rng(seed)
    K = 8 if quick else 32
    n = 512 if quick else 4096
    P = synthetic_prototypes(rng, K)
    X, W, *_ = synthetic_objects(rng, P, n)
    V = np.ones((K,) + W.shape[1:], np.float32)
    pose_distances(X[:64], W[:64], P, V)  # warm-up (thread pools, allocator)
    load0 = os.getloadavg()[0]
    peak = matmul_peak_gflops(1024 if quick else 4096)
    fft_s, fft_cpu = _times(lambda: pose_distances(X, W, P, V, chunk_size=512), 2)
    dense_s, dense_cpu = _times(lambda: dense_distances(X, W, P, V, chunk_size=512), 2)
    # the products run on the search pool's threads, one torch thread each, where the profiler does not see them:
    # they are timed on this thread with torch at one thread, as a pool thread runs them, against one thread's peak
    cores.set_torch_threads(1)
    peak1 = matmul_peak_gflops(1024 if quick else 4096)
    search1_s, _ = _times(lambda: pose_distances(X, W, P, V, chunk_size=512), 1)
    prod_s, prod_flops = _product_time_and_flops(lambda: pose_distances(X, W, P, V, chunk_size=512))
    peak1_cpu = matmul_peak_gflops(1024 if quick else 4096, clock=time.thread_time)
    prod_cpu, prod_cpu_flops = _product_cpu_and_flops(lambda: pose_distances(X, W, P, V, chunk_size=512))
    cores.set_torch_threads(cores.usable_cores())
    m = max(32, n // 16)  # the naive way is slow: time a slice and scale up
    naive_s = _time(lambda: pose_distances_naive(X[:m], W[:m], P, V, chunk_size=512)) * n / m
    prod_gflops = prod_flops / max(prod_s, 1e-12) / 1e9
    return {"n_objects": n, "n_prototypes": K, "n_shifts": GRID[2], "fft_s": fft_s, "dense_s": dense_s,
            "naive_s": naive_s, "naive_timed_objects": m, "ratio_fft_dense": fft_s / dense_s,
            "fft_cpu_s": fft_cpu, "dense_cpu_s": dense_cpu, "ratio_fft_dense_cpu": fft_cpu / dense_cpu,
            "ratio_naive_fft": naive_s / fft_s, "matmul_peak_gflops": peak, "matmul_peak_1thread_gflops": peak1,
            "products_gflop": prod_flops / 1e9, "products_s": prod_s, "products_gflops": prod_gflops,
            "products_fraction_of_peak": prod_gflops / peak1, "products_share_of_search": prod_s / search1_s,
            "matmul_peak_1thread_cpu_gflops": peak1_cpu, "products_cpu_s": prod_cpu,
            "products_cpu_gflops": prod_cpu_flops / max(prod_cpu, 1e-12) / 1e9,
            "products_fraction_of_peak_cpu": prod_cpu_flops / max(prod_cpu, 1e-12) / 1e9 / peak1_cpu,
            "torch_threads": cores.usable_cores(),
            "load_1m_start": load0, "load_1m": os.getloadavg()[0]}


def bench_peer(quick: bool, seed: int) -> dict:
    """(c) scikit-learn ``KMeans`` (pose-unaware, k-means++, same n_init) on the same objects flattened
    (w x, (N, C R A H)) against our pose-aware mining, both in this process; NMI against the synthetic labels."""
    from sklearn.cluster import KMeans
    from sklearn.metrics import normalized_mutual_info_score

    from .mine.engine import ArraySource, PoseKMeans
    cores.set_torch_threads(cores.usable_cores())
    rng = np.random.default_rng(seed)
    n, k = (240, 4) if quick else (2000, 32)
    P = synthetic_prototypes(rng, k)
    X, W, labels, *_ = synthetic_objects(rng, P, n)
    n_init = 2
    load0 = os.getloadavg()[0]
    t0, c0 = time.perf_counter(), time.process_time()
    ours = PoseKMeans(n_clusters=k, scales=SCALES, n_init=n_init, max_iter=15, chunk_size=256, random_state=seed,
                      sample_size=2048).fit(ArraySource(X, W))
    ours_s, ours_cpu = time.perf_counter() - t0, time.process_time() - c0
    flat = (W[:, None] * X).reshape(n, -1)
    t0, c0 = time.perf_counter(), time.process_time()
    peer = KMeans(n_clusters=k, n_init=n_init, max_iter=300, random_state=seed).fit(flat)
    peer_s, peer_cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"n_objects": n, "n_prototypes": k, "n_init": n_init, "ours_s": ours_s, "ours_cpu_s": ours_cpu,
            "kmeans_s": peer_s, "kmeans_cpu_s": peer_cpu, "ratio_ours_kmeans": ours_s / peer_s,
            "ours_nmi": float(normalized_mutual_info_score(labels, ours.labels_)),
            "kmeans_nmi": float(normalized_mutual_info_score(labels, peer.labels_)),
            "load_1m_start": load0, "load_1m": os.getloadavg()[0]}


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
    t0, c0, r0 = time.perf_counter(), time.process_time(), cores.ready_clock()
    # chunks of 256 objects keep the per-chunk transients near 0.1 GB; 128 MB of cached object spectra
    # (about 1,250 objects) leave room for the 0.8 GB of volumes at 10,000 objects
    model = PoseKMeans(n_clusters=k, scales=SCALES, n_init=2, max_iter=15, chunk_size=256, random_state=seed,
                       sample_size=2048, cache_mb=128).fit(ArraySource(X, W))
    secs, cpu = time.perf_counter() - t0, time.process_time() - c0
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux reports KiB
    return {"n_objects": n, "seconds": secs, "cpu_s": cpu, "ready_threads": cores.ready_threads(r0, secs),
            "peak_rss_mb": rss_mb, "n_iter": int(model.n_iter_), "load_1m": os.getloadavg()[0]}


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
    ("peer", bench_peer),
]


def _bench_label(quick: bool, seed: int) -> dict:
    """(c) single-view lifting + matching against K = 32 prototypes [``label``] (protomine/label/throughput.py):
    one label worker, a single process with one thread by definition (more cores label more captures at once in
    more worker processes, not one capture faster), so its CPU is at most 100% of one core."""
    from .label.throughput import bench_label
    row = bench_label(quick, seed)
    row["seconds"] = row["lift_s"] + row["match_s"] + row["frame_flags_s"]  # the wall time cpu_s was taken over
    row["single_process"] = True
    return row


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


def _cpu_clock() -> float:
    """CPU seconds so far of this process (all its threads) and of its finished children (the rows that fit
    in a subprocess of their own)."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _run_row(fn: Callable[[bool, int], dict], quick: bool, seed: int) -> dict:
    """A row's figures with the whole row's wall and CPU seconds (its data generation, warm-ups and subprocesses
    included: ``row_s``, ``row_cpu_s``) and every CPU figure's share of its wall time (:func:`_with_cpu_pct`)."""
    t0, c0, k0, r0 = time.perf_counter(), _cpu_clock(), _children_cpu(), cores.ready_clock()
    figures = fn(quick, seed)
    wall = time.perf_counter() - t0
    figures.update(row_s=wall, row_cpu_s=_cpu_clock() - c0)
    if _children_cpu() - k0 < 0.01 * figures["row_cpu_s"]:  # the row ran in this process (else its subprocesses report)
        figures["row_ready_threads"] = cores.ready_threads(r0, wall)
    return _with_cpu_pct(figures)


def _children_cpu() -> float:
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return kids.ru_utime + kids.ru_stime


def _with_cpu_pct(figures: dict) -> dict:
    """``figures`` with ``<x>cpu_pct`` = 100 ``<x>cpu_s`` / its wall time (``<x>s``; ``seconds`` beside ``cpu_s``)
    after each CPU figure, also in lists of rows: 100% is one core busy all along, ``usable_cores`` x 100% every
    core.  Under load the wall time grows, so the percentage falls; the thread structure does not."""
    out: dict = {}
    for key, val in figures.items():
        out[key] = [_with_cpu_pct(r) if isinstance(r, dict) else r for r in val] if isinstance(val, list) else val
        if key.endswith("cpu_s") and not isinstance(val, bool) and isinstance(val, (int, float)):
            wall = figures.get("seconds" if key == "cpu_s" else key[:-len("cpu_s")] + "s")
            if isinstance(wall, (int, float)) and wall > 0:
                out[key[:-2] + "_pct"] = 100.0 * val / wall
    return out


def _print_section(name: str, figures: dict) -> None:
    print(f"== {name}" + ("  (a single process with one thread by definition: at most 100% CPU)"
                          if figures.get("single_process") else ""))
    for key, val in figures.items():
        if isinstance(val, list) and not all(isinstance(row, dict) for row in val):
            print(f"   {key:<22} {val}")
        elif isinstance(val, list):
            for row in val:
                print("   " + "  ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in row.items()))
        else:
            print(f"   {key:<22} {val:.4g}" if isinstance(val, float) else f"   {key:<22} {val}")


def bench(json: Annotated[Optional[Path], typer.Option("--json", help="Also write the figures as JSON here.")] = None,
          quick: Annotated[bool, typer.Option("--quick", help="Small sizes: a smoke test of the benchmark.")] = False,
          seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed of the synthetic volumes.")] = 0,
          scale: Annotated[bool, typer.Option("--scale", help="Only the scale-out row: this process vs a 2-worker "
                                              "Dask LocalCluster, and a 1M-object / 50-worker projection "
                                              "(protomine/scale/benchmark.py).")] = False,
          size: Annotated[Optional[int], typer.Option("--size", min=100, max=10_000_000, help="Objects of the "
                                                      "streamed-mining row [large] (default 100,000; 600 with "
                                                      "--quick).")] = None,
          tilt_size: Annotated[Optional[int], typer.Option("--tilt-size", min=20, max=1_000_000, help="Tumbled "
                                                           "objects of the tilt mining row [tilt_mining] (default "
                                                           "3,000; 30 with --quick).")] = None,
          only: Annotated[Optional[str], typer.Option("--only", help="Comma-separated rows to run (e.g. "
                                                      "'assignment,peer'); default: all.")] = None) -> None:
    """Measure pose-search and mining speed and memory on synthetic volumes (see protomine/bench.py)."""
    from .mine.tiltbench import bench_tilt_mining
    from .scale.streamed import bench_large
    rows = SCALE_ROWS if scale else BENCH_ROWS + [
        ("tilt_mining", lambda q, s: bench_tilt_mining(q, s, tilt_size)),
        ("large", lambda q, s: bench_large(size or (600 if q else 100_000), s))]
    names = {r for r in only.split(",")} if only else {name for name, _ in rows}
    unknown = names - {name for name, _ in rows}
    if unknown:
        raise typer.BadParameter(f"unknown rows {sorted(unknown)}; expected some of {[n for n, _ in rows]}",
                                 param_hint="--only")
    results = {"quick": quick, "seed": seed, "grid_CRAH": list(GRID), "usable_cores": cores.usable_cores(),
               "load_1m_start": os.getloadavg()[0]}
    for name, fn in rows:
        if name in names:
            results[name] = _run_row(fn, quick, seed)
            _print_section(name, results[name])
    results["load_1m_end"] = os.getloadavg()[0]
    if json is not None:
        atomic.write_text(json, _json.dumps(results, indent=2))
