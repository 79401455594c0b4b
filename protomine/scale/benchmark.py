"""``protomine bench --scale``: mining-pass throughput in this process vs a 2-worker Dask LocalCluster on this
machine, and a projection to a large cluster from the measured figures.

Data (demo data, invented): the bench's synthetic volumes (``protomine.mine.synthetic.synthetic_objects``: K random
smooth prototypes, objects rolled, scaled, noisy, partly observed) on the default grid, written to two
``.npy`` files that the workers memory-map (as they would open a store on a shared file system).

What is timed: one full assignment-and-accumulation pass (the unit of a Lloyd iteration) against K fixed
prototypes with the default five scales, without the spectra cache (every pass reads and transforms its
objects, as when the objects do not fit the workers' caches):

- ``local_s``: ``engine._assign_pass`` in this process (torch's default threads);
- ``cluster_s``: the same pass through :class:`protomine.mine.distributed.ExecutorSource` on
  ``LocalCluster(n_workers=2, threads_per_worker=1)`` bound to 127.0.0.1, median of a few passes after a
  warm-up; ``speedup`` = local_s / cluster_s, and the results are checked equal (same labels).

Projection model (one pass, N objects, W workers, chunks of c objects, n = ceil(N / c) chunks)::

    T_pass = t_obj * N / W  +  t_task * n / W  +  t_fold * n  +  b_part * n / bandwidth

- ``t_obj``: a worker's seconds per object (read, transform, pose search over all shifts and scales, aligned
  sums), measured as the workers' own chunk times / N;
- ``t_task``: scheduling overhead per task = (cluster wall time - max worker busy time) / (n / W);
- ``t_fold``: the caller's seconds to fold one chunk's sums (measured, total reduce time / n);
- ``b_part``: bytes of one chunk's result (K (C + 2) R A H float64 sums + 16 bytes per object);
- ``bandwidth``: 1.25e9 B/s (10 Gbit/s Ethernet, common practice for a compute cluster; an assumption, not
  measured here).
A mine is about (n_iter + 1) passes (n_iter <= mine.max_iter = 30; the restarts run on a subsample of
4096 objects on the caller when N > 4096, a fixed cost measured by ``protomine bench``'s mining row).
``t_obj`` grows linearly with K (the pose search compares every object with every prototype).
Memory per worker: one chunk's volumes and spectra (``chunk_mb``) plus its sums, whatever N is.
"""
from __future__ import annotations

import math
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

BANDWIDTH_BPS = 1.25e9  # 10 Gbit/s Ethernet (common practice; assumed)


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _rss_mb() -> float:
    import psutil  # a dependency of distributed
    return psutil.Process().memory_info().rss / 2**20


def bench_scale(quick: bool, seed: int, *, project_objects: int = 1_000_000, project_workers: int = 50) -> dict:
    """Measured local vs 2-worker LocalCluster pass times and the projection (module docstring)."""
    from distributed import Client, LocalCluster

    from ..mine.synthetic import synthetic_objects, synthetic_prototypes
    from ..config import load_config
    from ..mine.distributed import ExecutorSource, NpySpec
    from ..mine.engine import ArraySource, _assign_pass
    from .executor import DaskExecutor

    rng = np.random.default_rng(seed)
    n, K, chunk = (768, 8, 128) if quick else (3072, 16, 256)
    scales = tuple(load_config(None)["mine"]["scales"])
    P = synthetic_prototypes(rng, K)
    V = np.ones((K,) + P.shape[2:], np.float32)
    with tempfile.TemporaryDirectory(prefix="protomine-scale-") as tmp:
        xp, wp = Path(tmp) / "X.npy", Path(tmp) / "W.npy"
        X = np.lib.format.open_memmap(xp, mode="w+", dtype=np.float32, shape=(n,) + P.shape[1:])
        W = np.lib.format.open_memmap(wp, mode="w+", dtype=np.float32, shape=(n,) + P.shape[2:])
        for i in range(0, n, 512):
            X[i:i + 512], W[i:i + 512] = synthetic_objects(rng, P, min(512, n - i))[:2]
        X.flush(); W.flush()
        del X, W
        spec = NpySpec(str(xp), str(wp))
        src = spec.open()
        _assign_pass(ArraySource(src.X[:chunk], src.W[:chunk]), P, V, scales, chunk, True, 0)  # warm-up
        local = []
        for _ in range(2):
            t0 = time.perf_counter()
            ref = _assign_pass(src, P, V, scales, chunk, True, 0)
            local.append(time.perf_counter() - t0)
        local_s = min(local)
        print(f"[bench] local pass over {n} objects: {local_s:.2f} s", file=sys.stderr, flush=True)
        cluster = LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                               dashboard_address=None)
        client = Client(cluster, set_as_default=False)
        try:
            ex = DaskExecutor(client=client, min_workers=2)
            dsrc = ExecutorSource(spec, ex, cache_mb=0.0)
            dsrc.assign_pass(P, V, scales, chunk, True, 0)  # warm-up: imports, first reads
            walls, busy, folds = [], [], []
            for _ in range(3):
                t0 = time.perf_counter()
                got = dsrc.assign_pass(P, V, scales, chunk, True, 0)
                walls.append(time.perf_counter() - t0)
                secs = np.array(dsrc.last_seconds)
                # item i ran on worker i mod 2 (preferred); the busier worker bounds the wall time
                busy.append((secs.sum(), max(secs[0::2].sum(), secs[1::2].sum())))
            same = bool(np.array_equal(got[0], ref[0]))
            max_rel = float(np.max(np.abs(got[4] - ref[4])) / max(np.max(np.abs(ref[4])), 1e-12))
            worker_rss = client.run(_rss_mb)
            ex.close()
        finally:
            client.close()
            cluster.close()
        # the caller's fold cost per chunk: add one chunk's sums into an accumulator, as the reduce does
        part = np.zeros_like(ref[4], shape=(K, P.shape[1] + 2) + P.shape[2:])
        acc = np.zeros_like(part)
        n_chunks = math.ceil(n / chunk)
        t0 = time.perf_counter()
        for _ in range(n_chunks):
            acc += part
        fold_s = (time.perf_counter() - t0) / n_chunks
    cluster_s = statistics.median(walls)
    k = int(np.argsort(walls)[len(walls) // 2])
    worker_total, worker_max = busy[k]
    t_obj = worker_total / n
    t_task = max(0.0, (cluster_s - worker_max) / (n_chunks / 2))
    b_part = part.nbytes + 16 * chunk
    # projection at the default mining chunk size and the same K
    proj_chunk = int(load_config(None)["mine"]["chunk_size"])
    N, Wk = project_objects, project_workers
    nc = math.ceil(N / proj_chunk)
    b_proj = part.nbytes + 16 * proj_chunk
    terms = {"compute_s": t_obj * N / Wk, "scheduling_s": t_task * nc / Wk, "fold_s": fold_s * nc,
             "transfer_s": b_proj * nc / BANDWIDTH_BPS}
    t_pass = sum(terms.values())
    C, R, A, H = P.shape[1:]
    chunk_mb = proj_chunk * ((C + 1) * R * A * H * 4 + 2 * (A // 2 + 1) * (C + 2) * R * H * 4) / 2**20
    return {
        "n_objects": n, "n_prototypes": K, "n_scales": len(scales), "chunk_size": chunk, "n_chunks": n_chunks,
        "local_s": local_s, "cluster_workers": 2, "cluster_s": cluster_s, "speedup": local_s / cluster_s,
        "local_objects_per_s": n / local_s, "cluster_objects_per_s": n / cluster_s,
        "cluster_equal_labels": same, "cluster_max_rel_sum_diff": max_rel,
        "worker_rss_mb_after": float(max(worker_rss.values())), "caller_peak_rss_mb": _peak_rss_mb(),
        "t_obj_s": t_obj, "t_task_s": t_task, "t_fold_s": fold_s, "b_part_bytes": int(b_part),
        "bandwidth_Bps": BANDWIDTH_BPS,
        "projection": [{"objects": N, "workers": Wk, "chunk_size": proj_chunk, "chunks": nc, **terms,
                        "pass_s": t_pass, "mine_30_passes_min": 31 * t_pass / 60.0,
                        "worker_chunk_mb": chunk_mb}],
    }
