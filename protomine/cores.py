"""How many cores a run uses, and how torch's threads are set: one policy for every stage.

Policy: **processes across independent work, one torch thread in each; all cores as threads when one
process works alone.**

- Ingest, label and the demo's scene rendering spread captures over worker processes (``--workers auto`` =
  :func:`usable_cores`).  Each worker process runs torch, and numpy's and scipy's BLAS, with a single thread
  (:func:`enter_worker`, called by every executor before it runs an item), so N workers on N cores never run
  N x N threads.
- A process that does the work itself (mining in the command's process, a ``--workers 1`` run) gives
  torch every usable core (:func:`threads_for_this_process`), set by the engine when a fit starts.

Why processes first: a capture (plane fit, proposals, lifting) is mostly single-threaded numpy/scipy
code that threads cannot speed up, while captures are independent, so processes scale with the cores;
mining's passes are large batched matrix products that torch's threads do spread over the cores, and one
process keeps a single spectra cache.  Threads inside processes would oversubscribe the cores: two
workers with two threads each on two cores run four threads that evict each other's caches.

Threads wait passively (``OMP_WAIT_POLICY=PASSIVE``, set in ``protomine/__init__.py`` unless the
environment says otherwise): by default OpenMP threads spin between parallel regions, and on a machine
whose cores are shared (other workers, other users) a spinning thread burns the time slice another thread
needs.  Measured on 2 cores at load 20, matching 60 objects: 2 threads took 0.50-0.75 s wall and
0.12-0.19 s CPU spinning, 0.16-0.20 s wall and 0.035 s CPU waiting passively (1 thread: 0.21-0.33 s).
The pose search's parallel regions are coarse (batched products, transforms of whole chunks), so the
wake-up latency of passive waiting costs little.

Large tensors on huge pages (``THP_MEM_ALLOC_ENABLE=1``, set in ``protomine/__init__.py`` unless the environment
says otherwise): torch then asks the kernel for transparent huge pages (``madvise``) for its CPU tensors of 2 MB
and more, as numpy already does for its large arrays.  The tilt search maps its blocks of tens of megabytes afresh
(:func:`large_blocks_mapped`), and each 4 KB page of them was a page fault; on a kernel whose huge pages are
``madvise`` (or ``always``) one fault maps 2 MB, and the search's products and gathers miss the TLB less.
Measured on mining 1,500 tumbled objects (K 16, 6 passes, one core, load 8-9; ``tiltbench._mine_tumbled_once``):
1.69 -> 0.42 million minor faults, user + sys CPU 79.6 -> 70.4 s, peak RSS 1,125 MB both, the same fit to the bit.
On two threads the system time does not fall (the kernel still zeroes each page mapped afresh): the tilt bench
rows' process 12.0 -> 3.5 million faults, 53 -> 51 s system time (with ``posesearch``'s Gauss products; README
"Running on a cluster").  Where the kernel offers no huge pages (``never``) nothing changes.

"Usable" cores are the ones this process may run on (``os.sched_getaffinity``: a container or
``taskset`` limit counts), not the machine's total.
"""
from __future__ import annotations

import contextlib
import ctypes
import os
import threading

_WORKER = False  # True in a worker process of an executor (set by enter_worker)


def usable_cores() -> int:
    """Cores this process may run on (affinity mask; ``os.cpu_count()`` where that is unknown)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def resolve_workers(workers: int | str | None) -> int:
    """``"auto"`` (or 0) -> :func:`usable_cores`; a positive number as is."""
    if workers is None or workers == "auto" or workers == 0:
        return usable_cores()
    n = int(workers)
    if n < 1:
        raise ValueError(f"workers must be >= 1 or 'auto', got {workers!r}")
    return n


def threads_for_this_process() -> int:
    """Torch intra-op threads for this process: 1 in an executor's worker, else every usable core."""
    return 1 if _WORKER else usable_cores()


def set_torch_threads(n: int) -> None:
    """Set torch's intra-op threads (a no-op when already ``n``: changing them rebuilds the thread pool)."""
    import torch
    if torch.get_num_threads() != n:
        torch.set_num_threads(n)


_ONE_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def one_thread_per_library() -> None:
    """Every thread pool of this process down to one thread: the BLAS (OpenBLAS, MKL) and OpenMP libraries
    already loaded (numpy's and scipy's OpenBLAS, torch's OpenMP) through threadpoolctl, and those loaded
    later through their environment variables, which they read when they load.

    Setting torch's threads alone left numpy's and scipy's OpenBLAS with a pool of one thread per core in
    every worker process: 2 workers on 2 cores ran 4 busy threads, and OpenBLAS's idle threads spin while
    they wait for the next call.  Measured (same session, 2 cores at load 11-14): ingest of 3 demo captures
    in a worker took 6.8-8.1 s CPU and 26-30 s wall with numpy's default pool, 1.9-2.0 s CPU and 7.1-7.6 s
    wall with one thread; in the demo's ingest each worker's second thread had used 7.6 s of CPU against
    its main thread's 10 s.  The store was identical to the bit."""
    from threadpoolctl import threadpool_limits
    for var in _ONE_THREAD_VARS:
        os.environ[var] = "1"
    threadpool_limits(limits=1)


def enter_worker() -> None:
    """Mark this process as an executor's worker: torch, BLAS and OpenMP get one thread each (the module
    policy; :func:`one_thread_per_library`) and freed chunk-sized memory is reused
    (:func:`reuse_freed_memory`; again here, because Dask's nanny sets ``MALLOC_TRIM_THRESHOLD_`` in its
    workers' environment)."""
    global _WORKER
    if not _WORKER:
        _WORKER = True
        set_torch_threads(1)
        one_thread_per_library()
        reuse_freed_memory()


def thread_clock() -> tuple[float, float]:
    """(CPU seconds, seconds waiting for a core) of the calling thread so far, from the kernel's
    ``/proc/thread-self/schedstat`` (time on a CPU, time runnable in a run queue while other threads held
    the cores).  A stretch of wall time minus the wait is what the thread would have taken on a core of
    its own: its CPU plus any time it blocked (I/O, locks, the GIL).  Where the file is missing: the CPU
    from ``time.thread_time`` and NaN for the wait."""
    try:
        with open("/proc/thread-self/schedstat") as f:
            on_cpu, waiting = f.read().split()[:2]
        return int(on_cpu) / 1e9, int(waiting) / 1e9
    except (OSError, ValueError):
        import time
        return time.thread_time(), float("nan")


def ready_clock() -> dict[int, float]:
    """Per thread of this process (by thread id): seconds so far on a CPU or runnable in a run queue (waiting only
    for a core), from ``/proc/self/task/*/schedstat``; empty where that is missing.  Between two readings,
    :func:`ready_threads` is the mean number of the process's threads that could have run: what it would keep
    busy on idle cores, nearly whatever else the machine runs (CPU seconds / wall seconds falls with the load)."""
    out: dict[int, float] = {}
    try:
        tids = os.listdir("/proc/self/task")
    except OSError:
        return out
    for tid in tids:
        try:
            with open(f"/proc/self/task/{tid}/schedstat") as f:
                on_cpu, waiting = f.read().split()[:2]
            out[int(tid)] = (int(on_cpu) + int(waiting)) / 1e9
        except (OSError, ValueError):
            pass  # the thread ended
    return out


def ready_threads(start: dict[int, float], wall_s: float) -> float:
    """Mean number of this process's threads on a CPU or ready to run since ``start`` (a :func:`ready_clock`),
    over ``wall_s`` seconds; threads started since count from zero, threads ended since are not counted.  NaN
    where the kernel does not say."""
    now = ready_clock()
    if not now or wall_s <= 0:
        return float("nan")
    return sum(v - start.get(tid, 0.0) for tid, v in now.items()) / wall_s


# glibc mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_TOP_PAD, _M_MMAP_THRESHOLD, _M_ARENA_MAX = -1, -2, -3, -8


def reuse_freed_memory(mmap_threshold: int = 64 * 2**20, trim_threshold: int = 256 * 2**20,
                       top_pad: int = 64 * 2**20) -> bool:
    """Let glibc's malloc keep freed blocks up to ``mmap_threshold`` bytes for reuse, in every thread.

    Dask's nanny starts its workers with ``MALLOC_TRIM_THRESHOLD_=65536``; setting any malloc threshold
    also freezes glibc's mmap threshold at 128 KiB, so every temporary of a chunk (object spectra, the
    distances for every pose: megabytes to tens of megabytes) is a fresh ``mmap`` whose pages the kernel
    zeroes on first touch, and is unmapped again when freed.  That made a Dask worker about 2x slower per
    object than the same code in a pool worker or in-process (measured: 0.9 s vs 0.42 s per chunk of 128
    objects, K = 8, 5 scales).  Every protomine process calls it on import (``protomine/__init__.py``): glibc's
    own dynamic threshold stops at 32 MB, so chunks of 512 objects (spectra of 50 MB) were mapped afresh in
    every process, which made the bench's pose-unaware baseline 3x slower than its arithmetic (0.72 s vs
    2.5 s for 4,096 objects x 32 prototypes, 1 thread).

    ``top_pad`` is for threads other than the main one, where a Dask worker runs its tasks: glibc serves
    them from a secondary arena made of heaps of at most 64 MB, and frees a heap back to the kernel as soon
    as its memory is free, whatever the trim threshold (``heap_trim`` deletes a heap unless the free space
    left in the heap before it is below the top pad, default 128 KiB).  A chunk's spectra (50 MB for 512
    objects) then took a new heap, zero-filled page by page, on every chunk: measured on 2 cores, a pass
    over 8,192 objects (K = 16, 5 scales, chunks of 512) in a worker thread took 194,000 minor page faults
    and 0.50 s of system time (2.92 s CPU in all) against none and 0.07 s (2.35 s) on the main thread of the
    same process: a Dask worker's ~23% more CPU per object than in-process.  With a top pad of one heap
    (64 MB) no heap is deleted: 0 faults, 2.46 s CPU in the thread.  The pad is also what the main arena asks
    the kernel for beyond each growth; untouched address space, it costs no resident memory.  (The same
    could be had with ``MALLOC_ARENA_MAX=1`` in a worker's environment, but only when set before the
    process starts; ``mallopt`` here takes effect in every thread, also in workers someone else started.)
    Returns False where this is not glibc.
    """
    try:
        libc = ctypes.CDLL("libc.so.6")
        return (bool(libc.mallopt(_M_MMAP_THRESHOLD, mmap_threshold)) and bool(libc.mallopt(_M_TRIM_THRESHOLD, trim_threshold))
                and bool(libc.mallopt(_M_TOP_PAD, top_pad)))
    except (OSError, AttributeError):
        return False


def return_free_memory() -> bool:
    """glibc's ``malloc_trim(0)``: the free pages of every arena, also those between blocks still in use, go back
    to the kernel.  :func:`reuse_freed_memory` keeps freed memory for reuse, which also keeps the gaps a phase
    of different block sizes leaves resident; the tilt search calls this between chunks (a few faults per chunk
    against its seconds of work).  False where not glibc."""
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
        return True
    except (OSError, AttributeError):
        return False


def one_malloc_arena() -> bool:
    """glibc's ``mallopt(M_ARENA_MAX, 1)``: threads started later share the main arena, so memory one thread
    frees serves the others (the same as ``MALLOC_ARENA_MAX=1`` in the environment; the tilt search's thread
    pool, ``mine.searchpool.spectra_pool``).  False where not glibc."""
    try:
        return bool(ctypes.CDLL("libc.so.6").mallopt(_M_ARENA_MAX, 1))
    except (OSError, AttributeError):
        return False


TILT_MMAP_THRESHOLD = 8 * 2**20  # blocks from 8 MB up mapped on their own in the tilt search (large_blocks_mapped)


@contextlib.contextmanager
def large_blocks_mapped(threshold: int = TILT_MMAP_THRESHOLD):
    """Within the block: blocks of ``threshold`` bytes and more are mapped on their own and unmapped when freed
    (:func:`reuse_freed_memory` with a lower ``mmap_threshold``); the 64 MB default again afterwards.

    For the tilt search: its passes allocate and free, on two or more threads, blocks of tens of megabytes of
    ever different sizes (copies, column factors, products) among small long-lived ones (geometries, Python
    objects).  Served from the heap, the large blocks no longer fit the gaps the last pass left, so the heap grew
    by ~50 MB a pass, and the free pages a pass touched stayed resident until the next :func:`return_free_memory`
    (in use: a steady ~300 MB).  Measured on 600 tumbled objects (K = 16, the bench's tilt_mining settings, 2 threads,
    34 passes, same session): peak RSS crept 975 -> 1,705 MB over the passes with the 64 MB threshold, 898 -> 1,152 MB
    with 8 MB (the heap 1.75 GB -> 0.45 GB of address space), 332 s -> 245 s at load 2.5-6; on the row's 3,000
    objects (same session) peak RSS 2,052 -> 1,682 MB, CPU 565 s -> 542 s.  Fitted arrays identical to the bit.
    4 MB: 841 -> 1,052 MB on the 600, but 1,675 MB and 722 s CPU on the 3,000 (more blocks mapped and zeroed afresh)."""
    changed = reuse_freed_memory(mmap_threshold=threshold)
    try:
        yield changed
    finally:
        if changed:
            reuse_freed_memory()


@contextlib.contextmanager
def one_blas_thread():
    """Within the block, numpy's and scipy's BLAS (OpenBLAS) run their products on the calling thread alone
    (threadpoolctl, ``user_api="blas"``; torch's own BLAS and OpenMP are not touched); their previous thread counts
    again afterwards.

    For the tilt search: its copies' geometry runs many tiny numpy products (``tilts._forward_xyz``: a (96, 3) x
    (3, 3,456) product per block of 32 copies; ``copy_geometries``, ``inverse_points``) on the search pool's threads,
    and OpenBLAS's default pool of one thread per core woke its threads for each and left them spinning, on the
    cores the pool's threads needed.  Measured (2 cores, load ~7): ``_forward_xyz`` of 32 copies 20-36 ms wall /
    4.5-7.8 ms CPU of the calling thread with 2 BLAS threads, 1.0-1.4 ms / 0.5 ms with one.  Each output of a product
    is computed by one thread in either case, so the values are the same to the bit (checked on the fitted arrays of
    tumbled mining and the demo)."""
    from threadpoolctl import threadpool_limits
    with threadpool_limits(limits=1, user_api="blas"):
        yield


# --- reusable scratch buffers ------------------------------------------------------------------

_SCRATCH: dict[tuple[int, str, object], object] = {}  # (thread, name, dtype) -> flat torch tensor
_SCRATCH_DEPTH = 0  # open reused_scratch() scopes
_SCRATCH_LOCK = threading.Lock()  # guards _SCRATCH_DEPTH and the registration of new buffers


@contextlib.contextmanager
def reused_scratch():
    """Within the block, :func:`scratch` hands each thread the same buffer for the same name again (grown when a
    larger one is asked for), instead of a fresh allocation; all buffers are freed when the outermost block ends.

    For the tilt search's per-block temporaries (a coarse row block's partial sums and distances, an untilt's
    padded volumes and samples): blocks from 8 MB up are mapped afresh on every allocation while the search runs
    (:func:`large_blocks_mapped`), so each of them was page-faulted and zero-filled by the kernel again, block
    after block, chunk after chunk.  Users: ``posesearch._distances_in_scratch`` and the gathered rows and stacked
    factors of ``PoseBank.match_spectra(reuse=True)`` (the coarse level), ``tilts._block_factors`` (a refinement
    block's column factors), ``tilts._taken_in_scratch`` / ``_sample_in_scratch`` and the engine's float64 transform
    of an aligned-sums piece (the untilt).  Measured on 600 tumbled objects (the tilt_mining row's settings, seed 0,
    back to back at load 2-3): 7.25 -> 4.15 million minor page faults, system time 21.2 -> 14.9 s, CPU 166 -> 160 s,
    wall 118 -> 98 s, peak RSS 1,127 -> 1,138 MB; every fitted array identical to the bit.  User time is unchanged
    (146 s): the faults cost system time only.  A scope ends with its call (a coarse level, a refinement, an
    aligned-sums result), so the buffers add nothing to the memory between them."""
    global _SCRATCH_DEPTH
    with _SCRATCH_LOCK:
        _SCRATCH_DEPTH += 1
    try:
        yield
    finally:
        with _SCRATCH_LOCK:
            _SCRATCH_DEPTH -= 1
            if _SCRATCH_DEPTH == 0:
                _SCRATCH.clear()


def scratch(name: str, shape: tuple[int, ...], dtype=None):
    """An uninitialised torch tensor of ``shape`` (``dtype``, float32 by default): inside :func:`reused_scratch`, a
    view of the calling thread's buffer ``name`` (valid until this thread asks for ``name`` again: only for
    temporaries that do not outlive their block), else a fresh ``torch.empty``."""
    import torch
    dtype = torch.float32 if dtype is None else dtype
    n = 1
    for s in shape:
        n *= int(s)
    if not _SCRATCH_DEPTH:
        return torch.empty(shape, dtype=dtype)
    key = (threading.get_ident(), name, dtype)
    buf = _SCRATCH.get(key)
    if buf is None or buf.numel() < n:
        buf = torch.empty(n, dtype=dtype)
        with _SCRATCH_LOCK:
            if _SCRATCH_DEPTH:
                _SCRATCH[key] = buf
    return buf[:n].view(shape)
