"""Mining passes as a map-reduce over chunks of objects, on any executor (:mod:`protomine.scale.executor`).

Conventions: as in :mod:`protomine.mine.engine` (X (N, C, R, A, H), W (N, R, A, H), prototypes
P (K, C, R, A, H), V (K, R, A, H)).

Map (a worker, per task: a run of consecutive chunks of objects [i0, i1) or of explicit index lists)
    A pass has few tasks, so scheduling costs per task, not per chunk.  On a Dask cluster the caller hands
    each worker runs of consecutive chunks as it frees up (guided self-scheduling,
    :meth:`protomine.scale.executor.DaskExecutor.map` with ``balanced``: worker j owns the j-th share of the
    chunks, the same every pass, and takes half of what remains of it each time, e.g. runs of 4, 2, 1, 1
    chunks of a share of 8; a worker done with its share takes the last chunk of the longest other share),
    so that a worker slowed by other processes does fewer chunks instead of holding up the pass; other
    executors get ``TASKS_PER_WORKER`` runs per worker, each at most ``MAX_CHUNKS_PER_TASK`` chunks, which
    a pool's workers take as they free up.  The worker opens the source itself (:class:`StoreSpec`: the
    object store on a shared file system; :class:`NpySpec`: two ``.npy`` files read by
    :class:`NpyFileSource`), so volumes never cross the network.  It receives the prototypes (P, V, a few
    MB) and builds their pose bank (the K x S scaled spectra, 14x the bytes) itself, once per pass; then, chunk
    by chunk, it transforms the chunk (object spectra, kept in a per-process cache of ``cache_mb`` for the
    next passes; a worker's share of the chunks is the same every pass, so it mostly sees the same chunks), finds
    the best pose per (object, prototype), and sums the chunk's members aligned into their prototype's
    frame.  It returns, per chunk, 4 numbers per object (label, yaw, scale, distance) and the chunk's
    aligned sums (K, C + 1, R, A, H) float64 (and, on the last pass, the symmetry moments).
Reduce (the caller)
    Per-object arrays are concatenated and the sums added chunk by chunk in chunk order (fixed, never
    completion order, whatever the tasks), then the engine's own update turns them into prototypes.  Memory
    per worker: one chunk's volumes and spectra (about 0.25 MB per object on the default grid), the sums of
    the task's chunks, plus the spectra cache budget.
Cost per pass beyond the search itself (measured on a local cluster, 2 cores at load 6-7, 3,072 objects,
    K = 16, 5 scales): when the caller built the bank and sent it, that took 41 ms of its CPU and (17.8 MB)
    ~70 ms of wall time during which no worker could start; each task costs ~3 ms of the caller's CPU
    (client and scheduler).  Dask's own statistical profiler (on by default in every worker: it samples
    every thread's stack each 10 ms) cost 0.15-0.2 s of worker CPU per ~1.3 s pass (1 worker); a cluster
    for mining should run with ``distributed.worker.profile.enabled: false`` (the bench's does), and with Dask's
    periodic monitors and work-stealing check slowed to 1-2 s (``scale.benchmark.DASK_CONFIG_FOR_MINING``): they
    took half of what a local cluster spent beside its tasks (caller 0.12-0.17 s and workers 0.09-0.13 s of CPU
    per pass of 1.3-1.7 task-seconds, then 0.075 and 0.06 s), CPU that 2 workers on 2 cores lose.
    A Dask worker runs each task in a thread other than its main one; glibc's malloc gave that thread's freed
    chunk memory back to the kernel after every chunk (+20-24% CPU per object in page faults) until
    ``protomine.cores.reuse_freed_memory`` set a malloc top pad (on import, so in every worker as well).

:class:`ExecutorSource` is a source (``len``, ``read``) whose passes run this way: the engine hands a pass
to ``source.assign_pass`` when the source has one, so :class:`~protomine.mine.engine.PoseKMeans`, the
choice of K and the merging run unchanged.  The seeding subsample (at most ``sample_size`` objects) and
re-seeding objects (at most K) are read on the caller through ``gather``/``read``.
Summing per-chunk sums instead of one running sum changes prototypes only by float rounding (~1e-7
relative); assignments are the same.

Public API
----------
- ``StoreSpec.of(store, cfg)``, ``NpySpec(x_path, w_path)``: picklable descriptions of a source.
- ``ExecutorSource(spec, executor, *, chunk_size=None, cache_mb=256.0)``
- ``match_all(model, source) -> PoseMatch``: ``PoseKMeans.match`` as a map over chunks.
- ``aligned_mean_volumes(spec, executor, labels, yaw_deg, K, chunk=512)``: the pipeline's picture
  volumes as a map-reduce.
"""
from __future__ import annotations

import hashlib
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..cores import thread_clock
from . import symmetry as sym
from .aligned import aligned_volume_sums, mean_from_volume_sums
from .engine import ArraySource, _AlignedSums, _chunk_step, _chunks, _SpectraCache
from .posesearch import PoseBank, PoseMatch

TASKS_PER_WORKER = 2   # map items per worker and pass (ExecutorSource._tasks): few, so that the fixed cost per
                       # task (scheduling: ~3 ms of the caller's CPU each, measured) stays small, but more than
                       # one, so that a worker slowed by other load can hand work to the others
MAX_CHUNKS_PER_TASK = 8
# per worker process: opened sources and spectra caches, keyed by what they were built from
_OPEN: dict = {}
_CACHES: dict = {}
_BANKS: dict = {}


@dataclass(frozen=True)
class StoreSpec:
    """An object store on a shared file system; ``stamp`` (mtime_ns, size) invalidates worker caches."""

    path: str
    free_weight: float
    colour_weight: float
    stamp: tuple[int, int]

    @classmethod
    def of(cls, store, cfg: dict) -> "StoreSpec":
        p = Path(store.path).resolve()
        st = p.stat()
        m = cfg["mine"]
        return cls(str(p), float(m["free_weight"]), float(m["colour_weight"]), (st.st_mtime_ns, st.st_size))

    def open(self):
        from ..ingest.sharded import open_store
        return open_store(self.path).source({"mine": {"free_weight": self.free_weight,
                                                       "colour_weight": self.colour_weight}})


@dataclass(frozen=True)
class NpySpec:
    """Features in two ``.npy`` files: X (N, C, R, A, H), W (N, R, A, H) float32, read chunk by chunk."""

    x_path: str
    w_path: str

    def open(self) -> "NpyFileSource":
        return NpyFileSource(self.x_path, self.w_path)


class NpyFileSource:
    """A source over two ``.npy`` files read from disk chunk by chunk (plain file reads, no memory map, so
    a pass over more objects than fit in memory holds one chunk at a time, not the file's pages).

    ``indices`` (sorted) restricts it to those rows (mini-batches): ``read`` then reads just those rows.
    Rows are read straight into the arrays returned (``os.preadv``), each run of consecutive rows in one call and
    each file opened once per ``read``/``gather``: a mini-batch's or a seeding subsample's rows are mostly runs of
    one row, which had cost an open, a read into a new array and a copy each.  Measured on 20,000 bench objects at
    load 8, median of 12: ``gather`` of 2,048 random rows 0.185 -> 0.036 CPU seconds, a mini-batch chunk (256 random
    rows of a ``subset``) 0.020 -> 0.004 s; the same arrays.
    """

    def __init__(self, x_path: str, w_path: str, indices: np.ndarray | None = None):
        self.x_path, self.w_path = str(x_path), str(w_path)
        self._x = _npy_layout(self.x_path)
        self._w = _npy_layout(self.w_path)
        if self._x[1][0] != self._w[1][0]:
            raise ValueError(f"X has {self._x[1][0]} rows but W has {self._w[1][0]}")
        self.indices = None if indices is None else np.asarray(indices, np.int64)

    def __len__(self) -> int:
        return self._x[1][0] if self.indices is None else len(self.indices)

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        if self.indices is None:
            n = max(0, min(i1, self._x[1][0]) - i0)
            return self._rows([(i0, i0 + n)])
        return self.gather(np.arange(i0, i1))

    def gather(self, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rows at sorted ``idx`` (of this source), read run by run of consecutive rows."""
        rows = np.asarray(idx, np.int64) if self.indices is None else self.indices[np.asarray(idx, np.int64)]
        if len(rows) == 0:
            return self._rows([])
        cuts = np.flatnonzero(np.diff(rows) != 1) + 1
        return self._rows([(int(rows[r0]), int(rows[r1 - 1]) + 1) for r0, r1 in zip(np.r_[0, cuts], np.r_[cuts, len(rows)])])

    def _rows(self, runs: list[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
        """The file rows of ``runs`` [(a, b), ...], one after the other: X (n, ...), W (n, ...)."""
        n = sum(b - a for a, b in runs)
        x = np.empty((n,) + self._x[1][1:], np.float32)
        w = np.empty((n,) + self._w[1][1:], np.float32)
        _npy_read_into(self.x_path, self._x, runs, x)
        _npy_read_into(self.w_path, self._w, runs, w)
        return x, w

    def subset(self, idx: np.ndarray) -> "NpyFileSource":
        idx = np.sort(np.asarray(idx, np.int64))
        return NpyFileSource(self.x_path, self.w_path, idx if self.indices is None else self.indices[idx])


def _npy_layout(path: str) -> tuple[int, tuple[int, ...]]:
    """(data offset in bytes, shape) of a C-ordered float32 ``.npy`` file."""
    with open(path, "rb") as f:
        major, _ = np.lib.format.read_magic(f)
        read_header = np.lib.format.read_array_header_1_0 if major == 1 else np.lib.format.read_array_header_2_0
        shape, fortran, dtype = read_header(f)
        if fortran or dtype != np.float32:
            raise ValueError(f"{path}: expected a C-ordered float32 array, got fortran={fortran}, dtype={dtype}")
        return f.tell(), tuple(shape)


def _npy_read_into(path: str, layout: tuple[int, tuple[int, ...]], runs: list[tuple[int, int]], out: np.ndarray) -> None:
    """Rows a..b-1 of each run of the ``.npy`` file, read from disk into consecutive rows of ``out``."""
    offset, shape = layout
    row = 4 * int(np.prod(shape[1:]))
    buf = memoryview(out.reshape(-1).view(np.uint8))
    pos = 0
    with open(path, "rb", buffering=0) as f:
        fd = f.fileno()
        for a, b in runs:
            want, at = (b - a) * row, offset + a * row
            while want:
                got = os.preadv(fd, [buf[pos:pos + want]], at)
                if got == 0:
                    raise ValueError(f"{path}: rows {a}..{b - 1} lie beyond the end of the file")
                pos, at, want = pos + got, at + got, want - got


def _open(spec) -> object:
    if spec not in _OPEN:
        _OPEN.clear()  # one source per worker at a time: a new store replaces the old one
        _OPEN[spec] = spec.open()
    return _OPEN[spec]


def _read(src, i0: int, i1: int, idx: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Objects i0..i1-1 of the source, or the objects at sorted ``idx``."""
    if idx is None:
        x, w = src.read(i0, i1)
    elif isinstance(src, ArraySource):
        x, w = src.X[idx], src.W[idx]
    elif isinstance(src, NpyFileSource):
        x, w = src.gather(idx)
    else:  # a StoreSource: read just those rows
        x, w = type(src)(src.store, src.cfg, src.indices[idx]).read(0, len(idx))
    return np.asarray(x, np.float32), np.asarray(w, np.float32)


@dataclass
class _Part:
    """One chunk's map result."""

    labels: np.ndarray
    yaw: np.ndarray
    scale: np.ndarray
    dist: np.ndarray
    tot: np.ndarray | None = None      # (K, C + 1, R, A, H) aligned sums [w, w x_1 .. w x_C]
    extra: np.ndarray | None = None    # (K, C + 1, R, A, H) moments [w x_1^2 .. w x_C^2, w^2]


def _bank(P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], key: bytes) -> PoseBank:
    """The pose bank of (P, V, scales), built once per worker and pass (``key``: a digest of them)."""
    if key not in _BANKS:
        _BANKS.clear()  # one bank per worker: the next pass's prototypes replace the last ones
        _BANKS[key] = PoseBank(np.asarray(P, np.float32), np.asarray(V, np.float32), tuple(scales))
    return _BANKS[key]


def _bank_key(P: np.ndarray, V: np.ndarray, scales: tuple[float, ...]) -> bytes:
    h = hashlib.blake2b(digest_size=16)
    for a in (np.ascontiguousarray(P, np.float32), np.ascontiguousarray(V, np.float32)):
        h.update(repr(a.shape).encode())
        h.update(a.data)
    h.update(repr(tuple(float(s) for s in scales)).encode())
    return h.digest()


def _chunk_pass(shared: tuple, item: list[tuple]) -> tuple[list[_Part], float, float, float, tuple[float, float]]:
    """Worker: one task of one assignment pass, a run of consecutive chunks (module docstring).  Returns each
    chunk's part (the caller folds them in chunk order, as one process sums its chunks), the task's wall
    seconds, CPU seconds and seconds waiting for a core (:func:`protomine.cores.thread_clock`), and its start
    and end on the wall clock (``time.time``: a timeline of the pass on a machine whose processes share it)."""
    spec, protos, shape, accumulate, moments, chunk_size, cache_bytes = shared
    t0, (c0, q0), start = time.perf_counter(), thread_clock(), time.time()
    bank = _bank(*protos)
    parts = [_one_chunk(spec, bank, shape, accumulate, moments, chunk_size, cache_bytes, c) for c in item]
    c1, q1 = thread_clock()
    return parts, time.perf_counter() - t0, c1 - c0, q1 - q0, (start, time.time())


def _one_chunk(spec, bank: PoseBank, shape: tuple, accumulate: bool, moments: bool, chunk_size: int,
               cache_bytes: int, chunk: tuple) -> _Part:
    """One chunk of objects [i0, i1) (or the explicit index list idx): read, transform, match, aligned sums."""
    i0, i1, idx, forced, window = chunk
    src = _open(spec)
    K, C, R, A, H = shape
    scales = bank.scales
    S = len(scales)
    cache = None
    if idx is None and cache_bytes > 0:
        key = (spec, A, chunk_size)
        if key not in _CACHES:
            _CACHES.clear()  # one cache per worker: a new source or chunking replaces the old one
            _CACHES[key] = _SpectraCache(cache_bytes)
        cache = _CACHES[key]
    o = cache.get(i0) if cache is not None else None
    if o is None or moments:
        x, w = _read(src, i0, i1, idx)
    if o is None:
        o = bank.spectra(x, w)
        if cache is not None:
            cache.put(i0, o)
    sums = _AlignedSums(K, S, A, (C + 1) * R * H, first=R * H) if accumulate else None
    msums = _AlignedSums(K, S, A, (C + 1) * R * H) if moments else None
    part = _Part(*_chunk_step(bank, o, x if moments else None, w if moments else None, forced, window, scales,
                              sums, msums))
    if sums is not None:
        part.tot = sums.result(scales, (C + 1, R, H))
    if msums is not None:
        part.extra = msums.result(scales, (C + 1, R, H))
    return part


def _chunk_match(shared: tuple, item: tuple) -> PoseMatch:
    """Worker: best pose of one chunk against every prototype, (n, K) arrays."""
    spec, protos = shared
    i0, i1 = item
    x, w = _read(_open(spec), i0, i1, None)
    return _bank(*protos).match(x, w)


@dataclass
class _Reduced:
    """Running reduction of chunk parts: per-object pieces kept in chunk order, sums added in chunk order."""

    labels: list
    yaw: list
    scale: list
    dist: list
    seconds: list
    cpu_seconds: list
    wait_seconds: list
    spans: list
    tot: np.ndarray | None
    extra: np.ndarray | None


def _fold_parts(acc: _Reduced | None, p: _Part) -> _Reduced:
    """Fold one chunk's part into the reduction (called in chunk order, so sums never depend on which
    worker finished first)."""
    if acc is None:
        return _Reduced([p.labels], [p.yaw], [p.scale], [p.dist], [], [], [], [],
                        None if p.tot is None else p.tot.copy(), None if p.extra is None else p.extra.copy())
    for name in ("labels", "yaw", "scale", "dist"):
        getattr(acc, name).append(getattr(p, name))
    if p.tot is not None:
        acc.tot += p.tot
    if p.extra is not None:
        acc.extra += p.extra
    return acc


def _fold_task(acc: _Reduced | None, task: tuple[list[_Part], float, float, float, tuple[float, float]]) -> _Reduced:
    """Fold one task's chunk parts in chunk order (tasks arrive in task order), and keep its seconds."""
    parts, seconds, cpu_seconds, wait_seconds, span = task
    for p in parts:
        acc = _fold_parts(acc, p)
    acc.seconds.append(seconds)        # the worker's time for the task (read, transform, match, sums)
    acc.cpu_seconds.append(cpu_seconds)  # the CPU time of the worker thread that ran it (the same work)
    acc.wait_seconds.append(wait_seconds)  # and its time runnable but waiting for a core (other threads')
    acc.spans.append(span)  # (start, end) on the wall clock
    return acc


def _sum_in_order(acc: np.ndarray | None, part: tuple) -> tuple:
    """Fold for tuples of arrays: element-wise sums in chunk order."""
    return tuple(a.copy() for a in part) if acc is None else tuple(a + b for a, b in zip(acc, part))


class ExecutorSource:
    """A source whose assignment passes run as a map-reduce on ``executor`` (module docstring).

    ``indices`` (sorted) restricts it to those objects of the spec's source (mini-batches).
    ``chunk_size`` overrides the engine's chunk size for the map items (None: the engine's).
    """

    def __init__(self, spec, executor, *, chunk_size: int | None = None, cache_mb: float = 256.0,
                 indices: np.ndarray | None = None, tasks_per_worker: int = TASKS_PER_WORKER):
        self.spec, self.executor, self.chunk_size, self.cache_mb = spec, executor, chunk_size, cache_mb
        self.indices = None if indices is None else np.asarray(indices, np.int64)
        self.tasks_per_worker = tasks_per_worker
        self._local = None

    def _src(self):
        if self._local is None:
            self._local = self.spec.open()
        return self._local

    def __len__(self) -> int:
        return len(self._src()) if self.indices is None else len(self.indices)

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        """Objects i0..i1-1, read on the caller (the engine does so only for seeding and re-seeding)."""
        return _read(self._src(), i0, i1, None if self.indices is None else self.indices[i0:i1])

    def gather(self, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Objects at sorted ``idx``, reading only those rows."""
        idx = np.asarray(idx, np.int64)
        return _read(self._src(), 0, 0, idx if self.indices is None else self.indices[idx])

    def subset(self, idx: np.ndarray) -> "ExecutorSource":
        idx = np.sort(np.asarray(idx, np.int64))
        return ExecutorSource(self.spec, self.executor, chunk_size=self.chunk_size, cache_mb=self.cache_mb,
                              indices=idx if self.indices is None else self.indices[idx],
                              tasks_per_worker=self.tasks_per_worker)

    def _items(self, chunk_size: int, forced: np.ndarray | None = None, window: np.ndarray | None = None
               ) -> list[tuple]:
        cs = self.chunk_size or chunk_size
        cut = lambda a, i0, i1: None if a is None else a[i0:i1]  # noqa: E731
        return [(i0, i1, cut(self.indices, i0, i1), cut(forced, i0, i1), cut(window, i0, i1))
                for i0, i1 in _chunks(len(self), cs)]

    def _balanced(self) -> bool:
        """Whether passes hand out runs of chunks as the workers free up (a Dask cluster: ``DaskExecutor.map``
        with ``balanced``) rather than a fixed share per worker (a pool's workers take the next task
        themselves; one process takes all)."""
        return getattr(self.executor, "kind", None) == "dask"

    def _tasks(self, chunks: list) -> list[list]:
        """The chunks in runs of consecutive ones: ``tasks_per_worker`` runs per worker, more when a run
        would exceed MAX_CHUNKS_PER_TASK chunks (its parts wait on the worker until the task ends), fewer
        when there are fewer chunks (a Dask cluster chooses the runs as its workers free up instead:
        :meth:`_balanced`).  Results do not depend on the runs (the caller folds chunk by chunk)."""
        n = max(self.tasks_per_worker * int(getattr(self.executor, "n_workers", 1)),
                -(-len(chunks) // MAX_CHUNKS_PER_TASK))
        n = min(len(chunks), max(1, n))
        bounds = np.linspace(0, len(chunks), n + 1).round().astype(int)
        return [chunks[a:b] for a, b in zip(bounds[:-1], bounds[1:])]

    def assign_pass(self, P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], chunk_size: int,
                    accumulate: bool, n_worst: int, moments: bool = False, forced: np.ndarray | None = None,
                    scale_index: np.ndarray | None = None):
        """The engine's ``_assign_pass`` (same arguments and results) as a map-reduce over chunks."""
        from .engine import _pass_outputs
        cs = self.chunk_size or chunk_size
        # the prototypes, not their pose bank, are sent with the pass (1/14 of the bytes: the bank holds
        # K x S scaled spectra); each worker builds the bank once per pass (_bank), in parallel, while the
        # caller stays idle instead of building and serialising it before any worker can start
        P, V = np.asarray(P, np.float32), np.asarray(V, np.float32)
        shared = (self.spec, (P, V, tuple(scales), _bank_key(P, V, scales)), P.shape, accumulate,
                  moments, cs, int(self.cache_mb * 2**20))
        chunks = self._items(chunk_size, forced, scale_index)
        if self._balanced():  # runs of chunks handed out as the workers free up
            red = self.executor.map(_chunk_pass, chunks, shared=shared, fold=_fold_task, balanced=True)
            self.last_task_workers = [j for *_, j in self.executor.last_runs]
        else:
            tasks = self._tasks(chunks)
            red = self.executor.map(_chunk_pass, tasks, shared=shared, fold=_fold_task)
            nw = max(1, int(getattr(self.executor, "n_workers", 1)))
            self.last_task_workers = [i % nw for i in range(len(tasks))]  # the worker each task was sent to
        self.last_spans = red.spans  # each task's (start, end) on the wall clock
        self.last_seconds = red.seconds  # the workers' seconds per task, for the scale benchmark
        self.last_cpu_seconds = red.cpu_seconds  # and their CPU seconds (a shared machine's load aside)
        self.last_wait_seconds = red.wait_seconds  # and their seconds waiting for a core held by other threads
        labels = np.concatenate(red.labels).astype(np.int64)
        yaw, scale, dist = (np.concatenate(a).astype(np.float32) for a in (red.yaw, red.scale, red.dist))
        if not accumulate:
            return labels, yaw, scale, dist, None, None, None, None, None
        tot, extra = red.tot, red.extra
        return _pass_outputs(self, labels, yaw, scale, dist, tot, extra, P, V, n_worst, cs)


def match_all(model, source) -> PoseMatch:
    """``model.match(source)`` (best pose against every fitted prototype, (N, K) arrays), distributed when
    ``source`` is an :class:`ExecutorSource`; yaw in each prototype's canonical frame, modulo its symmetry."""
    if not isinstance(source, ExecutorSource) or source.indices is not None:
        return model.match(source)
    P, V = np.asarray(model.prototypes_, np.float32), np.asarray(model.prototype_weights_, np.float32)
    shared = (source.spec, (P, V, tuple(model.scales_), _bank_key(P, V, model.scales_)))
    items = [(i0, i1) for i0, i1, *_ in source._items(model.chunk_size)]
    parts = source.executor.map(_chunk_match, items, shared=shared)
    D = np.concatenate([p.D for p in parts])
    yaw = sym.wrap_yaw(np.concatenate([p.yaw_deg for p in parts]), model.symmetry_)
    return PoseMatch(D, yaw, np.concatenate([p.scale for p in parts]), None)


def _chunk_volume_sums(shared: tuple, item: tuple) -> tuple[np.ndarray, np.ndarray]:
    """Worker: one chunk's aligned store-volume sums for the pipeline's picture volumes."""
    spec, K = shared
    i0, i1, labels, yaw = item
    return aligned_volume_sums(_open(spec).store.read_volumes(i0, i1), labels, yaw, K)


def aligned_mean_volumes(spec: StoreSpec, executor, labels: np.ndarray, yaw_deg: np.ndarray, K: int,
                         chunk: int = 512) -> np.ndarray:
    """(K, 6, R, A, H) mean store volume of each cluster's members rolled into the prototype frame
    (``aligned.aligned_mean_volumes`` as a map-reduce; sums added in chunk order)."""
    items = [(i0, i1, labels[i0:i1], yaw_deg[i0:i1]) for i0, i1 in _chunks(len(labels), chunk)]
    acc, wsum = executor.map(_chunk_volume_sums, items, shared=(spec, K), fold=_sum_in_order)
    return mean_from_volume_sums(acc, wsum, labels, K)
