"""``protomine bench --scale``: mining-pass throughput in this process vs a local Dask cluster of 1 and 2 workers
on this machine, and a projection to a large cluster from the measured figures.

Data (demo data, invented): the bench's synthetic volumes (:mod:`protomine.mine.synthetic`: K random smooth
prototypes, objects rolled, scaled, noisy, partly observed) on the default grid, written to two ``.npy``
files that the workers read chunk by chunk (:class:`protomine.mine.distributed.NpyFileSource`, as they
would read a store on a shared file system).  Size: 8,192 objects in 16 chunks of 512 (K = 16): a pass of
a few seconds per worker, as mining passes worth a cluster are (the default mining chunk is 2,048); the
earlier 3,072 objects in chunks of 256 made a pass ~0.6 s per worker, so that fixed per-pass costs that
do not grow with the objects (the pose bank, scheduling, start-up of each task) weighed several times more
than on any pass a cluster would be used for.

What is timed: one full assignment-and-accumulation pass (the unit of a Lloyd iteration) against K
prototypes with the default five scales, without the spectra cache (every pass reads and transforms its
objects, as when the objects do not fit the workers' caches).  Every measured pass gets new prototypes (P
scaled by 1 + 1e-6 i), so that, as in mining, each pass builds its pose bank in this process and once on
every worker.

- ``local_s``: ``engine._assign_pass`` in this process with every usable core as torch threads (min of 2);
- ``cluster_1worker_s``, ``cluster_s``: the same pass through :class:`protomine.mine.distributed.ExecutorSource`
  on a ``LocalCluster(threads_per_worker=1)`` bound to 127.0.0.1 with 1 and with 2 workers, both clusters up
  side by side after a warm-up pass each, their passes alternating in ``ROUNDS`` rounds (a 1-worker pass,
  then a 2-worker pass), medians; ``speedup_2_vs_1_worker`` (target >= 1.6 on 2 cores): the median over the
  rounds of the round's 1-worker wall time / its 2-worker wall time (``..._rounds``: each round's; a
  machine shared with other sessions changes its load over minutes, and a ratio of two passes run seconds
  apart follows it less than one of two phases run minutes apart, ``..._of_medians``), ``speedup`` =
  local_s / cluster_s, and the results are checked equal to the in-process pass's (same labels).  The
  clusters run with ``DASK_CONFIG_FOR_MINING`` (no statistical profiler in the workers, a 1 s event-loop
  tick, slower periodic monitors; measured costs beside it; the idle cluster costs under 1% of a core);
- ``speedup_2_vs_1_worker_cpu_model``: what the speedup would be on 2 free cores if the CPU seconds stayed
  as measured (median over the rounds): a pass lasts at least its busiest worker's task CPU seconds and at
  least the CPU seconds of everything that ran on the 2 cores (tasks, the caller's threads, the workers' own
  threads) / 2; for 1 worker its task CPU seconds (the rest runs on the other core).  A CPU-time model that
  holds whatever the load, not a wall-time measurement: it leaves out the waits between tasks and counts
  the two workers' cache sharing only as far as they ran at the same time during the bench;
- ``local_1thread_s``: the in-process pass with 1 torch thread (one core: what a worker has), run just
  before each cluster pass with the same prototypes (min over all), so that each cluster pass has an
  in-process twin measured under the same load; every ``ratio_*`` below is the median over the rounds
  of the 2-worker cluster (``..._1worker``: of the 1-worker cluster) of the pass's ratio to its twin;
- ``tasks_per_worker_2workers`` (each 2-worker pass), ``tail_idle_s`` (median over those passes: how long the
  first worker to finish waited for the last), ``idle_fraction`` (the share of the two workers' time between
  the first task's start and the last one's end with no task of theirs running): a pass's runs of chunks are
  handed out as the workers free up (guided self-scheduling, :meth:`protomine.scale.executor.DaskExecutor.map`
  with ``balanced``), so a worker slowed by other processes (or by the caller's own threads: client,
  scheduler, folding, which share the 2 cores) does fewer chunks instead of holding up the pass;
- ``caller_cpu_s_per_pass`` (2 workers): CPU seconds of this process (client, scheduler, folding) per pass,
  which compete with the workers for the cores of a local cluster; ``worker_overhead_cpu_fraction``: the
  worker processes' CPU beyond the task threads' (Dask's own threads: communication, monitors) / the tasks';
- ``worker_cpu_s_per_object`` (2 workers, least disturbed pass: fewest CPU seconds; ``..._1worker``),
  ``local_1thread_cpu_s_per_object``, ``ratio_worker_local_cpu_per_object`` (target <= 1.2): CPU seconds of
  the threads that did the work (the task threads, this thread), whatever the load;
- ``worker_s_per_object``: the workers' own task wall times / N (read, transform, search, sums), against
  ``local_1thread_s_per_object`` (``ratio_worker_local_per_object``): on a machine whose cores other
  sessions also use, these count the time the thread waited for a core, ``worker_wait_s_per_object`` and
  ``local_1thread_wait_s_per_object`` (the kernel's run-queue wait, :func:`protomine.cores.thread_clock`);
  ``ratio_worker_local_on_core_per_object`` (target <= 1.2) compares the wall times less that wait: a
  thread's time per object on a core of its own, CPU plus any time it blocked (I/O, locks, the GIL).

Why the raw wall figures measure the machine's load rather than the workers: Linux shares the cores fairly
between sessions (autogroup scheduling, ``/proc/sys/kernel/sched_autogroup_enabled`` = 1 on the bench
machine), and a LocalCluster's workers belong to the caller's session.  When other sessions keep the cores
busy, the session's share is what it gets, whatever its number of threads: measured on 2 cores at load
7.8 (8,192 objects, K = 16), a 1-worker pass got 2.4 CPU seconds in 6.3 s (0.38 of a core) and a 2-worker
pass 2.4-2.6 in 6.8-7.1 s (0.36), each task waiting for a core 60-80% of its wall time; the wall time the
tasks spent neither on a CPU nor waiting for one was 0.001-0.02 s per pass (no blocking on I/O, locks or
the GIL).  So ``speedup_2_vs_1_worker`` reaches its target only where the second core is free, and a
worker's raw wall time per object grows with the other sessions' load (ratio ~2 at load 8-10) while its
CPU and on-core times stay at the in-process ones.

What made a worker slower per object (found with these figures, fixed in :mod:`protomine.cores`): Dask
runs tasks in a thread other than the main one, which glibc's malloc serves from a secondary arena whose
64 MB heaps it hands back to the kernel whenever they empty, so each chunk's 50 MB of spectra was
zero-filled page by page again: +20-24% CPU per object (194,000 page faults and 0.5 s of system time per
pass of 8,192 objects), until ``cores.reuse_freed_memory`` set a 64 MB top pad.

What two workers on 2 cores cost beyond one (measured at load 8-10 on the bench machine, 2 cores of an AMD
EPYC under KVM, 2 MB L2 each, 32 MB shared L3; chunks of 512, K = 16, 5 scales, 1 thread per process):
- the cores' shared cache and memory: two processes running the same chunks pinned to two cores took 3-7%
  more CPU per chunk than pinned to one core (time-sharing it), 139-157 vs 135-147 ms (medians, 2 rounds);
  running the chunk in sub-blocks of 128 or 64 objects (spectra, search and sums of a block while they sit
  in the cache; results identical to the bit) cost more CPU than the whole chunk on one core or two
  (151-173 / 176-223 vs 135-169 ms), as did the search alone in row blocks;
- page faults: glibc 2.36's ``posix_memalign`` (torch aligns every tensor to 64 bytes) cannot reuse a freed
  block of exactly the size asked for when a small allocation took the bytes after it, so part of a chunk's
  tensors land on fresh pages: ~2,800 minor faults per chunk of 512 (~3% of its CPU), in one worker as in two;
- the caller's threads (client, scheduler, folding: 0.12-0.15 s of CPU per pass) and each worker's event
  loop (~0.05 s) share the 2 cores with the tasks; fetching results straight from the workers
  (``DaskExecutor.direct`` on a local cluster) saved ~20% of both;
- a worker that other processes slow holds up the pass when each worker has a fixed share: the end of a
  pass waited 0.07-0.41 s (median 0.22 s, 6 passes) for the last worker with 2 fixed tasks per worker,
  0.05-0.55 s (median 0.12 s, 3 passes) with the runs handed out as workers free up (``tail_idle_s``; at
  that load the last chunk's own wait for a core is most of it);
- no extra threads: each worker process runs 4 threads, torch with 1 intra-op thread in the task thread,
  which is the same thread for every task.

Each worker process runs torch with one thread (:mod:`protomine.cores`); it builds the pose bank (the
scaled prototypes' spectra) once per pass, not once per chunk.

Projection model (one pass, N objects, W workers, chunks of c objects, n = ceil(N / c) chunks)::

    T_pass = t_obj * N / W  +  t_task * m / W  +  t_fold * n  +  b_part * n / bandwidth    (m tasks)

- ``t_obj``: a worker's seconds per object (read, transform, pose search over all shifts and scales, aligned
  sums) on a core of its own, measured as the workers' CPU seconds for their chunks / N (their wall times,
  ``t_obj_wall_s``, also count the time other processes of a shared machine held the core);
- ``t_task``: scheduling overhead per task = (cluster wall time - max worker busy time) / (tasks / W) (a task
  is a run of chunks handed out as the workers free up, ``scale.executor.DaskExecutor._map_runs``; the
  projection counts one task per chunk, an upper bound);
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
import os
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

BANDWIDTH_BPS = 1.25e9  # 10 Gbit/s Ethernet (common practice; assumed)
ROUNDS = 5  # rounds of (1-worker pass, 2-worker pass), each pass with its in-process twin just before it

# Dask settings of the bench's cluster (README: the same for a mining cluster).  Measured on 2 cores at load
# ~5: the statistical profiler (every worker thread's stack sampled each 10 ms) cost 12-17% of the workers'
# CPU on top of a pass; the 20 ms event-loop tick (a diagnostic of blocked loops) kept an idle cluster's
# scheduler thread (in the caller's process) at 4-5% of a core and each worker at ~2%, 1 s halves both.  Three
# more periodic callbacks run every 100-500 ms by default: the scheduler's work-stealing check (in the caller's
# process), every process's system monitor (psutil samples) and each worker's memory monitor.  At 1-2 s instead
# (tasks last seconds, so stealing checked each second still moves a slow worker's queued task), measured on 2
# cores at load 7-9, 2 workers, 4,096 objects, K = 16, 5 scales, three runs each: the caller's CPU per pass
# 0.12-0.17 -> 0.075-0.078 s, the workers' CPU beyond their tasks 0.09-0.13 -> 0.06 s (tasks 1.3-1.7 s), idle
# 2.0-2.2% -> 0.8% of a core (caller) and 1.5-1.6% -> 0.6% (workers): CPU that a local cluster's workers
# otherwise lose on the same cores, half of what the cluster spent beside its tasks.
DASK_CONFIG_FOR_MINING = {"distributed.worker.profile.enabled": False, "distributed.admin.tick.interval": "1s",
                          "distributed.scheduler.work-stealing-interval": "1s",
                          "distributed.admin.system-monitor.interval": "2s",
                          "distributed.worker.memory.monitor-interval": "1s"}


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _rss_mb() -> float:
    import psutil  # a dependency of distributed
    return psutil.Process().memory_info().rss / 2**20


def _process_cpu_s() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def _tail_idle(spans: list, workers: np.ndarray, n_workers: int) -> tuple[float, float, list]:
    """From a pass's task spans (start, end) on the wall clock and the worker of each task: the seconds the
    first worker to finish waited for the last (idle at the end of the pass), the fraction of the workers'
    time between the first start and the last end that no task of theirs ran, and the tasks' workers."""
    sp = np.array(spans, float).reshape(-1, 2)
    ends = [sp[workers == j, 1].max() for j in range(n_workers) if np.any(workers == j)]
    span = sp[:, 1].max() - sp[:, 0].min()
    idle = 1.0 - float(np.sum(sp[:, 1] - sp[:, 0])) / max(n_workers * span, 1e-12)
    return float(max(ends) - min(ends)), idle, workers.tolist()


def bench_scale(quick: bool, seed: int, *, project_objects: int = 1_000_000, project_workers: int = 50) -> dict:
    """Measured local vs 2-worker LocalCluster pass times and the projection (module docstring)."""
    import dask
    from distributed import Client, LocalCluster

    from .. import cores
    from ..config import load_config
    from ..mine.distributed import ExecutorSource, NpySpec
    from ..mine.engine import ArraySource, _assign_pass
    from .executor import DaskExecutor
    from .streamed import write_synthetic

    n, K, chunk = (768, 8, 128) if quick else (8192, 16, 512)
    scales = tuple(load_config(None)["mine"]["scales"])
    load0 = os.getloadavg()[0]
    with tempfile.TemporaryDirectory(prefix="protomine-scale-") as tmp:
        (xp, wp, _), P = write_synthetic(Path(tmp), n, K, seed)
        V = np.ones((K,) + P.shape[2:], np.float32)
        spec = NpySpec(str(xp), str(wp))
        src = spec.open()
        _assign_pass(ArraySource(*src.read(0, chunk)), P, V, scales, chunk, True, 0)  # warm-up
        cores.set_torch_threads(cores.usable_cores())  # every core (the one-thread passes run beside the cluster's)
        times = []
        for _ in range(2):
            t0 = time.perf_counter()
            _assign_pass(src, P, V, scales, chunk, True, 0)
            times.append(time.perf_counter() - t0)
        local_s = min(times)
        print(f"[bench] local pass over {n} objects, {cores.usable_cores()} thread(s): {local_s:.2f} s",
              file=sys.stderr, flush=True)
        cores.set_torch_threads(1)  # one core: what a worker has

        def local_pass(Pr):
            """One in-process pass with 1 thread: its result and (wall, CPU, wait for a core) seconds."""
            t0, (c0, q0) = time.perf_counter(), cores.thread_clock()
            out = _assign_pass(src, Pr, V, scales, chunk, True, 0)
            c1, q1 = cores.thread_clock()
            return out, (time.perf_counter() - t0, c1 - c0, q1 - q0)

        # the cluster's config (each nanny passes it on to its worker): DASK_CONFIG_FOR_MINING.  A 1-worker and a
        # 2-worker cluster are up side by side and their passes alternate, round by round, so that both see the
        # same load (a machine shared with other sessions drifts over minutes)
        with dask.config.set(DASK_CONFIG_FOR_MINING):
            clusters, clients, srcs = {}, {}, {}
            runs, cpu_best, rounds, tails, walls, busy, bound = {}, {}, {}, {}, {}, {}, {}
            same, max_rel, n_pass = True, 0.0, 0
            try:
                for n_workers in (1, 2):
                    clusters[n_workers] = LocalCluster(n_workers=n_workers, processes=True, threads_per_worker=1,
                                                       host="127.0.0.1", dashboard_address=None)
                    clients[n_workers] = Client(clusters[n_workers], set_as_default=False)
                    ex = DaskExecutor(client=clients[n_workers], min_workers=n_workers)
                    srcs[n_workers] = ExecutorSource(spec, ex, cache_mb=0.0)
                    srcs[n_workers].assign_pass(P, V, scales, chunk, True, 0)  # warm-up: imports, first reads
                    walls[n_workers], busy[n_workers], rounds[n_workers], tails[n_workers] = [], [], [], []
                    bound[n_workers] = []
                for _ in range(2 if quick else ROUNDS):
                    for n_workers in (1, 2):
                        client, dsrc = clients[n_workers], srcs[n_workers]
                        # new prototypes every pass, as in a Lloyd iteration: each pass builds its pose bank, in
                        # this process and on every worker; the in-process pass runs just before the cluster's
                        n_pass += 1
                        Pr = P * np.float32(1.0 + 1e-6 * n_pass)
                        ref, loc = local_pass(Pr)
                        w0 = client.run(_process_cpu_s)
                        t0, c0 = time.perf_counter(), time.process_time()
                        got = dsrc.assign_pass(Pr, V, scales, chunk, True, 0)
                        walls[n_workers].append(time.perf_counter() - t0)
                        caller_cpu = time.process_time() - c0
                        w1 = client.run(_process_cpu_s)
                        secs = np.array(dsrc.last_seconds)
                        task_cpu = float(np.sum(dsrc.last_cpu_seconds))
                        task_wait = float(np.sum(dsrc.last_wait_seconds))
                        # the busiest worker bounds the wall time (tasks are handed out as workers free up)
                        tw = np.array(dsrc.last_task_workers)
                        busy[n_workers].append((secs.sum(), max(secs[tw == j].sum() for j in range(n_workers)),
                                                task_cpu, caller_cpu, sum(w1[a] - w0[a] for a in w0) - task_cpu,
                                                len(secs)))
                        tails[n_workers].append(_tail_idle(dsrc.last_spans, tw, n_workers))
                        tcpu = np.array(dsrc.last_cpu_seconds)
                        bound[n_workers].append(max(max(tcpu[tw == j].sum() for j in range(n_workers)),
                                                    (task_cpu + caller_cpu + busy[n_workers][-1][4]) / n_workers))
                        rounds[n_workers].append((loc, (secs.sum(), task_cpu, task_wait)))
                        same &= bool(np.array_equal(got[0], ref[0]))
                        max_rel = max(max_rel, float(np.max(np.abs(got[4] - ref[4])) / max(np.max(np.abs(ref[4])), 1e-12)))
                for n_workers in (1, 2):
                    w = walls[n_workers]
                    k = int(np.argsort(w)[len(w) // 2])
                    runs[n_workers] = (statistics.median(w), *busy[n_workers][k])
                    # CPU seconds from the least disturbed pass (fewest task CPU seconds)
                    cpu_best[n_workers] = min(b[2] for b in busy[n_workers])
                    print(f"[bench] {n_workers}-worker pass: {runs[n_workers][0]:.2f} s", file=sys.stderr, flush=True)
                worker_rss = clients[2].run(_rss_mb)
            finally:
                for c in clients.values():
                    c.close()
                for c in clusters.values():
                    c.close()
        # the caller's fold cost per chunk: add one chunk's sums into an accumulator, as the reduce does
        part = np.zeros_like(ref[4], shape=(K, P.shape[1] + 2) + P.shape[2:])
        acc = np.zeros_like(part)
        n_chunks = math.ceil(n / chunk)
        t0 = time.perf_counter()
        for _ in range(n_chunks):
            acc += part
        fold_s = (time.perf_counter() - t0) / n_chunks
    locs = [loc for nw in rounds for loc, _ in rounds[nw]]
    local_1t, local_1t_cpu = min(x[0] for x in locs), min(x[1] for x in locs)

    def paired(nw: int, f) -> float:
        """Median over the interleaved rounds of f(worker tasks' (wall, cpu, wait), in-process (wall, cpu, wait))."""
        return float(statistics.median(f(c, loc) for loc, c in rounds[nw]))

    on_core = lambda c, loc: (c[0] - c[2]) / (loc[0] - loc[2])  # noqa: E731  wall less the wait for a core
    cluster_s, worker_total, worker_max, _, caller_cpu, overhead_cpu, n_tasks = runs[2]
    worker_cpu = cpu_best[2]
    t_obj = worker_cpu / n  # a core of its own (module docstring); worker_total / n on this machine's load
    t_task = max(0.0, (cluster_s - worker_max) / (n_tasks / 2))
    b_part = part.nbytes + 16 * chunk
    # projection at the default mining chunk size and the same K
    proj_chunk = int(load_config(None)["mine"]["chunk_size"])
    N, Wk = project_objects, project_workers
    nc = math.ceil(N / proj_chunk)
    n_proj_tasks = nc  # a Dask cluster runs one chunk per task (mine.distributed.ExecutorSource._tasks)
    b_proj = part.nbytes + 16 * proj_chunk
    terms = {"compute_s": t_obj * N / Wk, "scheduling_s": t_task * n_proj_tasks / Wk, "fold_s": fold_s * nc,
             "transfer_s": b_proj * nc / BANDWIDTH_BPS}
    t_pass = sum(terms.values())
    C, R, A, H = P.shape[1:]
    chunk_mb = proj_chunk * ((C + 1) * R * A * H * 4 + A * (C + 2) * R * H * 4) / 2**20
    return {
        "n_objects": n, "n_prototypes": K, "n_scales": len(scales), "chunk_size": chunk, "n_chunks": n_chunks,
        "n_tasks": n_tasks,
        "local_s": local_s, "local_threads": cores.usable_cores(), "local_1thread_s": local_1t,
        "cluster_1worker_s": runs[1][0], "cluster_workers": 2, "cluster_s": cluster_s,
        "speedup_2_vs_1_worker": float(statistics.median(a / b for a, b in zip(walls[1], walls[2]))),
        "speedup_2_vs_1_worker_rounds": [a / b for a, b in zip(walls[1], walls[2])],
        "speedup_2_vs_1_worker_of_medians": runs[1][0] / cluster_s, "speedup": local_s / cluster_s,
        "speedup_2_vs_1_worker_cpu_model": float(statistics.median(a / b for a, b in zip(bound[1], bound[2]))),
        "worker_s_per_object": worker_total / n, "local_1thread_s_per_object": local_1t / n,
        "ratio_worker_local_per_object": paired(2, lambda c, loc: c[0] / loc[0]),
        "ratio_worker_local_per_object_1worker": paired(1, lambda c, loc: c[0] / loc[0]),
        "worker_wait_s_per_object": paired(2, lambda c, loc: c[2]) / n,
        "local_1thread_wait_s_per_object": paired(2, lambda c, loc: loc[2]) / n,
        "ratio_worker_local_on_core_per_object": paired(2, on_core),
        "ratio_worker_local_on_core_per_object_1worker": paired(1, on_core),
        "worker_cpu_s_per_object": worker_cpu / n, "worker_cpu_s_per_object_1worker": cpu_best[1] / n,
        "local_1thread_cpu_s_per_object": local_1t_cpu / n,
        "ratio_worker_local_cpu_per_object": paired(2, lambda c, loc: c[1] / loc[1]),
        "ratio_worker_local_cpu_per_object_1worker": paired(1, lambda c, loc: c[1] / loc[1]),
        "caller_cpu_s_per_pass": caller_cpu, "caller_cpu_s_per_pass_1worker": runs[1][4],
        "worker_overhead_cpu_fraction": overhead_cpu / max(runs[2][3], 1e-9),
        "tasks_per_worker_2workers": [[int(np.sum(np.array(t[2]) == j)) for j in range(2)] for t in tails[2]],
        "tail_idle_s": float(statistics.median(t[0] for t in tails[2])),
        "idle_fraction": float(statistics.median(t[1] for t in tails[2])),
        "local_objects_per_s": n / local_s, "cluster_objects_per_s": n / cluster_s,
        "cluster_equal_labels": same, "cluster_max_rel_sum_diff": max_rel,
        "worker_rss_mb_after": float(max(worker_rss.values())), "caller_peak_rss_mb": _peak_rss_mb(),
        "t_obj_s": t_obj, "t_obj_wall_s": worker_total / n, "t_task_s": t_task, "t_fold_s": fold_s, "b_part_bytes": int(b_part),
        "bandwidth_Bps": BANDWIDTH_BPS, "load_1m_start": load0, "load_1m": os.getloadavg()[0],
        "projection": [{"objects": N, "workers": Wk, "chunk_size": proj_chunk, "chunks": nc, "tasks": n_proj_tasks,
                        **terms, "pass_s": t_pass, "mine_30_passes_min": 31 * t_pass / 60.0,
                        "worker_chunk_mb": chunk_mb}],
    }
