"""How many cores a run uses, and how torch's threads are set: one policy for every stage.

Policy: **processes across independent work, one torch thread in each; all cores as threads when one
process works alone.**

- Ingest and label spread captures over worker processes (``--workers auto`` = :func:`usable_cores`).
  Each worker process runs torch with a single intra-op thread (:func:`enter_worker`, called by every
  executor before it runs an item), so N workers on N cores never run N x N threads.
- A process that does the work itself (mining in the command's process, a ``--workers 1`` run) gives
  torch every usable core (:func:`threads_for_this_process`), set by the engine when a fit starts.

Why processes first: a capture (plane fit, proposals, lifting) is mostly single-threaded numpy/scipy
code that threads cannot speed up, while captures are independent, so processes scale with the cores;
mining's passes are large batched matrix products that torch's threads do spread over the cores, and one
process keeps a single spectra cache.  Threads inside processes would oversubscribe the cores: two
workers with two threads each on two cores run four threads that evict each other's caches.

"Usable" cores are the ones this process may run on (``os.sched_getaffinity``: a container or
``taskset`` limit counts), not the machine's total.
"""
from __future__ import annotations

import os

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


def enter_worker() -> None:
    """Mark this process as an executor's worker and give torch one thread (see the module policy)."""
    global _WORKER
    if not _WORKER:
        _WORKER = True
        set_torch_threads(1)
