"""Mini-batch pose-aware k-means (Sculley 2010, "Web-scale k-means clustering") for stores too large for
full Lloyd passes.

Conventions: as in :mod:`protomine.mine.engine`.

Algorithm
---------
1. Seeding as the full-batch engine does for a large store: on a subsample of min(``sample_size``,
   3 ``batch_size``) objects (3 batches: scikit-learn's ``MiniBatchKMeans`` default ``init_size``), ``n_init`` restarts of pose-distance seeding (``seeding.PoseSeeder``) and full Lloyd
   iterations (``engine._lloyd``, in memory), the lowest cost wins.  Good seeds matter more here than for
   full batches: a running sum never forgets members assigned against a poor seed.
2. ``n_steps`` mini-batches of ``batch_size`` objects drawn uniformly without replacement (sorted, so a
   store reads them in file order).  Each batch is assigned by the pose search against the current
   prototypes, and its members, aligned into their prototype's frame, are added to per-prototype running
   sums num_k, den_k, n_k; then P_k = num_k / den_k and V_k = den_k / n_k.  This is Sculley's update
   c <- (1 - eta) c + eta x with the per-centre rate eta = 1 / v_k (v_k = samples assigned so far), which
   keeps every centre equal to the mean of all samples ever assigned to it, in running-sum form and
   weighted by observation.  A prototype that has received no member keeps its seed.
3. One full assignment pass (with the symmetry moments) gives every object's label, pose and distance;
   symmetry and canonical frames as in the engine.

Cost: seeding + ``n_steps x batch_size`` pose searches + one full pass, where the full-batch engine
makes ``n_iter`` full passes (times ``n_init`` restarts when N <= ``sample_size``).  Each batch pass is an
ordinary ``engine._assign_pass``, so on an :class:`protomine.mine.distributed.ExecutorSource` it runs as a
map-reduce over the batch's chunks.

Public API
----------
- ``MiniBatchPoseKMeans(*, batch_size=1024, n_steps=100, **PoseKMeans parameters)``: fitted attributes as
  :class:`~protomine.mine.engine.PoseKMeans` (``n_iter_`` = mini-batches).
- ``fit_minibatch(source, cfg, seed, n_clusters, *, max_k, progress=None) -> (model, k_table)``: the mine
  pipeline's mini-batch mode (``[scale] batch_size > 0``).
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from ..ingest.store import StoreSource
from .engine import (ArraySource, PoseKMeans, Source, _assign_pass, _gather, _lloyd, _partition_seeds, _Result,
                     _update)
from .seeding import SEED_SIZE, PoseSeeder


def subset_source(source: Source, idx: np.ndarray, chunk_size: int) -> Source:
    """The objects at sorted ``idx`` of ``source`` as a source, reading only those objects when it can."""
    if hasattr(source, "subset"):
        return source.subset(idx)
    if isinstance(source, ArraySource):
        return ArraySource(source.X[idx], source.W[idx])
    if isinstance(source, StoreSource):
        return StoreSource(source.store, source.cfg, source.indices[idx])
    return ArraySource(*_gather(source, idx, chunk_size))


class MiniBatchPoseKMeans(PoseKMeans):
    """Pose-aware k-means with mini-batch updates (module docstring).

    batch_size : objects per mini-batch (capped at N).
    n_steps : number of mini-batches.
    Other parameters as :class:`PoseKMeans` (``max_iter`` and ``tol`` apply to the subsample's Lloyd runs).
    """

    def __init__(self, *, batch_size: int = 1024, n_steps: int = 100, **kwargs):
        super().__init__(**kwargs)
        self.batch_size = batch_size
        self.n_steps = n_steps

    def fit(self, source: Source) -> "MiniBatchPoseKMeans":
        """Fit prototypes by mini-batches, then assign every object of ``source``; returns self."""
        scales = self._validate(source)
        for name in ("batch_size", "n_steps"):
            v = getattr(self, name)
            if not isinstance(v, (int, np.integer)) or v < 1:
                raise ValueError(f"{name} must be a positive integer, got {v!r}")
        self._fit_minibatch(source, scales, np.random.default_rng(self.random_state))
        return self

    def _fit_minibatch(self, source: Source, scales: tuple[float, ...], rng: np.random.Generator) -> None:
        N, K, cs = len(source), self.n_clusters, self.chunk_size
        # seeding subsample: 3 batches' worth (scikit-learn's MiniBatchKMeans init_size), at most sample_size
        idx = np.sort(rng.choice(N, size=min(N, self.sample_size, 3 * self.batch_size), replace=False))
        Xs, Ws = _gather(source, idx, cs) if not hasattr(source, "gather") else source.gather(idx)
        seeder = PoseSeeder(Xs, Ws, scales=scales, rng=rng, size=max(SEED_SIZE, 2 * K))
        sub = ArraySource(Xs, Ws)
        b = min(self.batch_size, N)
        batches = [np.sort(rng.choice(N, size=b, replace=False)) for _ in range(self.n_steps)]
        best = None
        for restart in range(self.n_init):
            labels, refs = seeder.partition(K, restart, rng)
            P0, V0 = _partition_seeds(sub, labels, refs, scales, cs)
            res = _lloyd(sub, P0, V0, scales=scales, max_iter=self.max_iter, tol=self.tol, chunk_size=cs)
            if best is None or res.cost < best.cost:
                best = res
        P, V = best.P, best.V
        del sub, Xs, Ws, seeder, best
        num = np.zeros(P.shape)
        den = np.zeros(V.shape)
        count = np.zeros(K, np.int64)
        no_worst = (np.empty((0,) + P.shape[1:], np.float32), np.empty((0,) + V.shape[1:], np.float32))
        for bidx in batches:
            *_, nb, db, cb, _, _ = _assign_pass(subset_source(source, bidx, cs), P, V, scales, cs, True, 0)
            num += nb
            den += db
            count += cb
            P, V = _update(num, den, count, no_worst, P, V)
        labels, yaw, scale, dist, *rest = _assign_pass(source, P, V, scales, cs, True, 0, moments=True)
        cost = float(dist[np.isfinite(dist)].sum())
        self._finish(_Result(P, V, labels, yaw, scale, dist, cost, self.n_steps, rest[-1]), source, scales)


def fit_minibatch(source: Source, cfg: dict, seed: int, n_clusters: int | None, *, max_k: int,
                  progress: Callable[[str], None] | None = None) -> tuple[MiniBatchPoseKMeans, dict | None]:
    """The mine pipeline's mini-batch mode: K given, or chosen by ``choosek.choose_k`` on a subsample (no
    merging, which would need full refits).  Returns (model, k table or None)."""
    m, s = cfg["mine"], cfg["scale"]
    rng = np.random.default_rng(seed)
    table = None
    k = n_clusters
    if k is None:
        from .choosek import choose_k
        if progress:
            progress(f"choosing K in 2..{max_k} on a subsample (mini-batch mode)")
        k, rows = choose_k(source, max_k=max_k, scales=tuple(m["scales"]), random_state=int(rng.integers(2**31 - 1)))
        table = {"k_chosen": k, "table": rows, "merges": [], "k_final": k}
    if progress:
        progress(f"mini-batch fit: K={k}, {s['batch_steps']} batches of {s['batch_size']} objects")
    model = MiniBatchPoseKMeans(n_clusters=k, batch_size=int(s["batch_size"]), n_steps=int(s["batch_steps"]),
                                scales=tuple(m["scales"]), n_init=m["n_init"], max_iter=m["max_iter"], tol=m["tol"],
                                chunk_size=m["chunk_size"],
                                random_state=seed if table is None else int(rng.integers(2**31 - 1)),
                                symmetry_factor=m["symmetry_factor"], symmetry_tol=m["symmetry_tol"],
                                symmetry_break_effect=float(m.get("symmetry_break_effect", 0.0))).fit(source)
    return model, table
