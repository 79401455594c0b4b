"""The search's thread pool: T Python threads whose torch ops run on one thread each.

The pose search builds object spectra, the tilt search's copies, column factors and small products, and mining's
serial phases (aligned sums, symmetry tests, calibration's leave-one-out prototypes) as many small, independent
operations.  Waking torch's other threads for each of them costs more than the operation on a shared machine
(measured at load 7-13: a (36, 77, 672) x (36, 100, 672) product of ``posesearch._distances_from_spectra`` took
256-315 ms on 2 threads, 38-56 ms on one), and single-threaded kernels give the same result for any number of
threads.  So with torch at T > 1 threads such work runs on T Python threads whose torch ops run on one thread
each, and results come back in the order of the items (the same bits as one after another on this thread).

Public API
----------
- ``spectra_pool(threads) -> ThreadPoolExecutor``: the pool (one per thread count; a forked child starts its own).
- ``pool_here() -> ThreadPoolExecutor | None``: the pool when torch runs T > 1 threads and the caller is not one
  of the pool's own threads; None: run here.
- ``pooled(fn, items) -> list``: ``[fn(i) for i in items]`` on the pool.
- ``ordered_map(fn, items)``: ``fn`` over ``items`` on the pool, results yielded in order as they are ready, with
  about T + 1 of them held.
"""
from __future__ import annotations

import functools
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Sequence

import torch

THREAD_PREFIX = "spectra"  # the pool threads' names start with it (pool_here recognises its own threads by it)


@functools.lru_cache(maxsize=4)
def spectra_pool(threads: int) -> ThreadPoolExecutor:
    """``threads`` Python threads whose torch ops run on one thread each.

    torch's thread count is per thread for its ops (OpenMP's and MKL's settings of the calling thread);
    ``torch.set_num_threads(1)`` in a pool thread also sets the count that threads started later begin with, so
    the pool's threads are all started here (a barrier holds each until all have set theirs) and the caller's
    count is set back afterwards (which leaves the caller's own ops as they were).

    Threads started from here on allocate from the main malloc arena (``cores.one_malloc_arena``): the tilt search runs
    blocks of tens of megabytes on these threads, and each thread's own arena would keep its largest blocks for
    good (``cores.reuse_freed_memory``'s top pad), on top of the main arena's (measured on 500 tumbled objects,
    K = 16: peak RSS 1.57 GB with an arena per thread, 1.30 GB with one, same time)."""
    from ..cores import one_malloc_arena
    one_malloc_arena()
    pool = ThreadPoolExecutor(threads, thread_name_prefix=THREAD_PREFIX)
    barrier = threading.Barrier(threads)

    def init(_):
        # torch initialises a thread's intra-op count on its first parallel op from the process-wide count, which
        # the caller sets back below: without this first query (which runs that initialisation now) the pool's
        # elementwise ops would run on the caller's threads count again (measured: 2 OpenMP threads each)
        torch.get_num_threads()
        torch.set_num_threads(1)
        barrier.wait()

    list(pool.map(init, range(threads)))
    torch.set_num_threads(threads)
    return pool


# a forked child has none of the parent's pool threads: it starts its own pool when it needs one
os.register_at_fork(after_in_child=spectra_pool.cache_clear)


def pool_here() -> ThreadPoolExecutor | None:
    """The search's pool (:func:`spectra_pool`) when torch runs T > 1 threads and this is not one of the pool's
    own threads; None: run here, one item after another."""
    threads = torch.get_num_threads()
    if threads == 1 or threading.current_thread().name.startswith(THREAD_PREFIX):
        return None
    return spectra_pool(threads)


def pooled(fn, items: Sequence) -> list:
    """``[fn(i) for i in items]`` on the search's pool (module docstring); results in the order of ``items``."""
    pool = pool_here()
    return [fn(i) for i in items] if pool is None else list(pool.map(fn, items))


def ordered_map(fn, items: list):
    """``fn`` over ``items`` as :func:`pooled`, but results yielded in the order of ``items`` as they are ready,
    with at most about T + 1 of them held (T pool threads): for results too large to hold all at once."""
    pool = pool_here()
    if pool is None or len(items) < 2:
        yield from (fn(i) for i in items)
        return
    ahead = torch.get_num_threads() + 1
    pending = [pool.submit(fn, i) for i in items[:ahead]]
    for j in range(len(items)):
        res = pending[j].result()
        pending[j] = None  # the caller holds the result from here on
        if j + ahead < len(items):
            pending.append(pool.submit(fn, items[j + ahead]))
        yield res
