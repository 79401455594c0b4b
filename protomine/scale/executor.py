"""Executors: where ingest and mining run their map steps — this process, a local process pool, or Dask.

Contract (every executor)
-------------------------
``executor.map(fn, items, *, shared=None) -> list`` returns ``[fn(shared, item) for item in items]`` in the
order of ``items``, whatever order the workers finish in; callers reduce the results in that fixed order,
so a result never depends on scheduling.  With ``fold=f`` it returns ``f(...f(f(None, r_0), r_1)..., r_n)``
instead, taking each result in item order as soon as the earlier ones are folded and dropping it after,
so the caller holds one accumulator, not every result.  ``items`` may also be an iterator that prepares
each item as it is drawn: the pool submits each one at once, so its workers run the first items while the
caller prepares the next (a pipeline; Dask takes the whole list first).  ``fn`` is a module-level function
(pickled by reference).
``shared`` (prototypes, settings) is sent once per worker, not once per item (Dask: scattered with
``broadcast=True``).  Item i prefers worker ``i mod n_workers`` (Dask ``workers=`` with
``allow_other_workers=True``), so a worker sees the same chunks on every pass and its per-chunk caches hit.
A worker's :class:`protomine.errors.InputError` is re-raised as such on the caller's side.

Executors
---------
- :class:`InlineExecutor`: this process, items in order (the default; no start-up cost).
- :class:`PoolExecutor`: ``workers`` processes of this machine (``concurrent.futures``, spawn start method,
  because forking a process whose torch thread pool is running can deadlock).

In a worker process (pool or Dask) an item runs with one torch thread (:func:`protomine.cores.enter_worker`):
parallelism comes from the workers, never from threads inside them as well.
- :class:`DaskExecutor`: a ``dask.distributed`` cluster, by scheduler address or an existing ``Client``.

``make_executor(cfg, scheduler=None, workers=None, processes=False)`` picks one from the ``[scale]``
config and the ``--scheduler`` / ``--workers`` flags (flags win).
"""
from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Iterator, Sequence

from .. import cores
from ..errors import InputError


@dataclass
class _Failed:
    """An InputError raised on a worker, carried back as data (its constructor does not pickle)."""

    path: str | None
    field: str | None
    message: str


def _call(fn: Callable, shared: Any, item: Any) -> Any:
    try:
        return fn(shared, item)
    except InputError as e:
        return _Failed(e.path, e.field, e.message)


def _call_in_worker(fn: Callable, shared: Any, item: Any) -> Any:
    """:func:`_call` in a worker process: one torch thread there (:mod:`protomine.cores` policy).

    A cluster that runs its workers as threads of the caller (no parent process) keeps its threads.
    """
    if multiprocessing.parent_process() is not None:
        cores.enter_worker()
    return _call(fn, shared, item)


def _check(r: Any) -> Any:
    if isinstance(r, _Failed):
        raise InputError(r.path, r.field, r.message)
    return r


class Pending:
    """The result of :meth:`PoolExecutor.submit` to come: ``result()`` waits for it (a worker's InputError is
    raised as such)."""

    def __init__(self, future: cf.Future):
        self._future = future

    def result(self) -> Any:
        return _check(self._future.result())


def _collect(results: Iterable, fold: Callable | None) -> Any:
    """Results (an iterable in item order) as a list, or folded one by one."""
    if fold is None:
        return [_check(r) for r in results]
    acc = None
    for r in results:
        acc = fold(acc, _check(r))
    return acc


class InlineExecutor:
    """Runs every item in this process, in order."""

    kind = "inline"
    n_workers = 1

    def map(self, fn: Callable, items: Iterable, *, shared: Any = None, fold: Callable | None = None) -> Any:
        return _collect((_call(fn, shared, it) for it in items), fold)

    def submit(self, fn: Callable, shared: Any = None, item: Any = None) -> "Pending":
        """``fn(shared, item)`` run here and now (see :meth:`PoolExecutor.submit`)."""
        done: cf.Future = cf.Future()
        done.set_result(_call(fn, shared, item))
        return Pending(done)

    def close(self) -> None:
        pass

    def describe(self) -> str:
        return "this process"


class PoolExecutor:
    """``workers`` processes on this machine."""

    kind = "pool"

    def __init__(self, workers: int):
        if workers < 1:
            raise ValueError(f"workers must be >= 1, got {workers}")
        self.n_workers = workers
        self._pool = cf.ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))

    def map(self, fn: Callable, items: Iterable, *, shared: Any = None, fold: Callable | None = None) -> Any:
        """Items may come from an iterator (a generator that prepares each item): each is submitted as soon
        as it is drawn, so the workers start on the first ones while this process prepares the rest, and
        with ``fold`` the results already in (in item order) are folded between draws."""
        futs: list = []
        if fold is None:
            futs = [self._pool.submit(_call_in_worker, fn, shared, it) for it in items]
            return _collect(_in_order(futs, lambda f: f.result()), fold)  # submission order, not completion order
        acc, nxt = None, 0
        for it in items:
            futs.append(self._pool.submit(_call_in_worker, fn, shared, it))
            while nxt < len(futs) and futs[nxt].done():  # the one just submitted may already be done
                acc = fold(acc, _check(futs[nxt].result()))
                futs[nxt] = None
                nxt += 1
        for i in range(nxt, len(futs)):
            acc = fold(acc, _check(futs[i].result()))
            futs[i] = None
        return acc

    def submit(self, fn: Callable, shared: Any = None, item: Any = None) -> "Pending":
        """``fn(shared, item)`` on the next free worker, started now: a :class:`Pending` whose ``result()`` waits
        for it.  For independent work the caller does beside its own (the demo's baseline, export and audit),
        queued with the items of later ``map`` calls in submission order."""
        return Pending(self._pool.submit(_call_in_worker, fn, shared, item))

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)

    def describe(self) -> str:
        return f"a pool of {self.n_workers} processes"


BALANCED_DEPTH = 2  # runs in flight per worker in DaskExecutor.map(balanced=True): one running, one queued


class DaskExecutor:
    """A ``dask.distributed`` cluster: ``DaskExecutor(address="tcp://host:8786")`` or ``DaskExecutor(client=c)``.

    ``min_workers``: wait (up to ``timeout`` s) until that many workers have joined.  Only a client is
    created here (it connects, it binds nothing); an executor built from an address closes its client.
    """

    kind = "dask"

    def __init__(self, address: str | None = None, *, client=None, min_workers: int = 1, timeout: float = 60.0):
        from distributed import Client
        if (address is None) == (client is None):
            raise ValueError("give exactly one of address and client")
        self._own = client is None
        if client is None:
            try:
                client = Client(address, timeout=timeout, set_as_default=False)
            except (OSError, TimeoutError, ValueError) as e:
                raise InputError(None, "--scheduler", f"cannot reach a Dask scheduler at {address!r} ({e})") from None
        self.client = client
        try:
            client.wait_for_workers(min_workers, timeout=timeout)
        except (OSError, TimeoutError) as e:
            self.close()
            raise InputError(None, "--workers", f"fewer than {min_workers} workers joined the scheduler at "
                             f"{client.scheduler.address} within {timeout:.0f} s ({e})") from None
        # results fetched straight from the workers when they all listen on this machine's loopback (a local
        # cluster: they are surely reachable), else through the scheduler (Dask's default for a client outside
        # the cluster, whose workers it may not reach).  Measured on a 2-worker local cluster, 8,192 objects,
        # chunks of 512 (16 chunk results of 3.1 MB per pass), median of 4 alternating passes at load 8-10: the
        # caller's CPU per pass 0.152 -> 0.121 s and the workers' CPU beside their tasks 0.134 -> 0.106 s, CPU
        # that the workers of a local cluster otherwise lose on the same cores
        self.direct = all(_loopback(a) for a in self.workers)

    @property
    def workers(self) -> list[str]:
        return sorted(self.client.scheduler_info(n_workers=-1)["workers"])

    @property
    def n_workers(self) -> int:
        return len(self.workers)

    def map(self, fn: Callable, items: Iterable, *, shared: Any = None, fold: Callable | None = None,
            balanced: bool = False) -> Any:
        """``fn(shared, item)`` for every item, results in item order (or folded in item order); every item
        submitted at once, item i to worker i mod n.

        ``balanced``: ``fn(shared, items[a:b])`` for runs of consecutive items handed out as the workers free
        up (:meth:`_map_runs`), one result per run, in run order; the runs depend on the workers' speeds, so
        ``fn`` and ``fold`` must give the same result whatever the runs (e.g. per-item results in a list).
        """
        items = items if isinstance(items, Sequence) else list(items)
        workers = self.workers
        shared_f = self.client.scatter([shared], broadcast=True, hash=False)[0]
        if balanced:
            try:
                return self._map_runs(fn, items, shared_f, fold, workers)
            finally:
                del shared_f
        self.last_runs = [(i, i + 1, i % len(workers)) for i in range(len(items))]
        futs = [self.client.submit(_call_in_worker, fn, shared_f, it, workers=[workers[i % len(workers)]],
                                   allow_other_workers=True, pure=False) for i, it in enumerate(items)]
        try:
            # taken in submission order; a result is released on the worker once fetched
            return _collect(_in_order(futs, self._result), fold)
        finally:
            futs.clear()  # dropping a Future releases its result on the cluster
            del shared_f

    def _result(self, fut) -> Any:
        """A future's result, fetched straight from the worker that holds it when ``direct``."""
        if self.direct:
            return self.client.gather(fut, direct=True)
        return fut.result()

    def _map_runs(self, fn: Callable, items: Sequence, shared_f, fold: Callable | None, workers: list[str]) -> Any:
        """Guided self-scheduling from the caller.  Worker j owns the j-th share of consecutive items (the same
        share on every call with the same items, so per-worker caches keep serving it).  Each time it needs
        work it gets the first half of what remains of its share (at least one item), so its runs shrink
        towards the end of the pass (e.g. 4, 2, 1, 1 items of a share of 8): few tasks, hence little
        scheduling, yet the last ones are short.  It keeps ``BALANCED_DEPTH`` runs in flight while its share
        keeps an item after it, so it rarely waits for the caller between runs; a worker whose share is done
        takes the last item of the longest remaining share, so no worker idles while another still has
        items that no worker has started.  Results are folded in run order as soon as the runs before them are in.
        ``last_runs``: (first item, end, worker index into the sorted workers) of every run, in item order."""
        from collections import deque

        from distributed import as_completed
        n, nw = len(items), len(workers)
        shares = [deque(range(j * n // nw, (j + 1) * n // nw)) for j in range(nw)]
        inflight = [0] * nw
        sent: dict[str, tuple[int, int, int, Any]] = {}  # future key -> (worker, first item, end, future)
        runs: list[tuple[int, int, int]] = []
        pending = as_completed(loop=self.client.loop)

        def submit(j: int) -> bool:
            own = shares[j]
            if own:
                take = [own.popleft() for _ in range(-(-len(own) // 2))]
            else:
                other = max(shares, key=len)
                if not other:
                    return False
                take = [other.pop()]  # the end of the longest share: its owner would reach it last
            a, b = take[0], take[-1] + 1
            fut = self.client.submit(_call_in_worker, fn, shared_f, list(items[a:b]), workers=[workers[j]],
                                     allow_other_workers=True, pure=False)
            sent[fut.key] = (j, a, b, fut)
            inflight[j] += 1
            runs.append((a, b, j))
            pending.add(fut)
            return True

        def top_up(j: int) -> None:
            # a run queued behind the running one only while the share keeps an item after it: the share's last
            # item waits in the caller, where an idle worker can still take it
            while (inflight[j] == 0 or (inflight[j] < BALANCED_DEPTH and len(shares[j]) >= 2)) and submit(j):
                pass

        results: dict[int, tuple[int, Any]] = {}  # first item -> (end, result)
        out, acc, nxt = [], None, 0
        try:
            for j in range(nw):  # every worker's first run first, then the others
                submit(j)
            for j in range(nw):
                top_up(j)
            for fut in pending:
                j, a, b, _f = sent.pop(fut.key)
                inflight[j] -= 1
                results[a] = (b, _check(self._result(fut)))
                fut.release()
                top_up(j)
                while nxt in results:
                    b, r = results.pop(nxt)
                    if fold is None:
                        out.append(r)
                    else:
                        acc = fold(acc, r)
                    nxt = b
        finally:
            if sent:  # a run failed: the others are not needed
                self.client.cancel([f for *_, f in sent.values()])
                sent.clear()
        self.last_runs = sorted(runs)
        return out if fold is None else acc

    def close(self) -> None:
        if self._own:
            self.client.close()

    def describe(self) -> str:
        return f"the Dask cluster at {self.client.scheduler.address} ({self.n_workers} workers)"


Executor = InlineExecutor | PoolExecutor | DaskExecutor


def _loopback(address: str) -> bool:
    """Whether a Dask address (``tcp://127.0.0.1:40000``, ``tcp://[::1]:40000``, ``inproc://...``) is on this
    machine's loopback."""
    import ipaddress
    from urllib.parse import urlsplit
    u = urlsplit(address)
    if u.scheme == "inproc":
        return True
    try:
        return ipaddress.ip_address(u.hostname or "").is_loopback
    except ValueError:
        return u.hostname == "localhost"


def _in_order(futs: list, get: Callable) -> Iterator:
    """Results of ``futs`` in list order; each future is dropped from the list once read."""
    for i in range(len(futs)):
        yield get(futs[i])
        futs[i] = None


def make_executor(cfg: dict, scheduler: str | None = None, workers: int | str | None = None, *,
                  processes: bool = False, items: int | None = None) -> Executor:
    """The executor named by ``[scale]`` scheduler/workers, overridden by the CLI flags when given.

    No scheduler and one worker: :class:`InlineExecutor`; no scheduler and N > 1 workers:
    :class:`PoolExecutor` (at most ``items`` processes); a scheduler: :class:`DaskExecutor` that waits
    for ``workers`` to join.  Workers ``"auto"`` (config: 0) are the usable cores as processes when
    ``processes`` (work made of independent items: captures), else this process, whose torch threads then
    use the cores (:mod:`protomine.cores`).
    """
    s = cfg.get("scale", {})
    scheduler = scheduler if scheduler is not None else s.get("scheduler", "")
    workers = workers if workers is not None else s.get("workers", 0)
    auto = workers in ("auto", 0)
    try:
        n = cores.resolve_workers(workers)
    except ValueError:
        raise InputError(None, "--workers", f"expected a positive number of workers or 'auto', got {workers!r}") from None
    if scheduler:
        if "://" not in scheduler and ":" not in scheduler:
            raise InputError(None, "--scheduler", f"expected a scheduler address such as tcp://10.0.0.5:8786, got {scheduler!r}")
        return DaskExecutor(scheduler, min_workers=1 if auto else n)
    if auto and not processes:
        return InlineExecutor()
    n = min(n, items) if items is not None else n
    return PoolExecutor(n) if n > 1 else InlineExecutor()
