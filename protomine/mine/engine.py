"""Pose-aware k-means: prototypes of gridded objects that may be yawed, scaled and partly observed.

Conventions: see :mod:`protomine.mine.posesearch` (X (N, C, R, A, H), W (N, R, A, H), prototypes
P (K, C, R, A, H), V (K, R, A, H); object ~= prototype rolled by yaw_deg and scaled by scale).

Sources
-------
The engine reads objects through a *source*: ``len(source)`` and ``source.read(i0, i1) -> (X, W)``
(numpy float32, objects i0..i1-1).  :class:`ArraySource` wraps in-memory arrays; the object store can
provide the same two methods.  Objects are processed in chunks of ``chunk_size``; besides the per-object
result arrays (labels, yaw, scale, distance) memory stays bounded by one chunk, a seeding subsample and
the prototypes.

Algorithm
---------
1. Seeding: yaw-invariant descriptors (magnitudes of the azimuthal Fourier coefficients of w * x,
   flattened) of a random subsample of at most ``sample_size`` objects; k-means++ (Arthur &
   Vassilvitskii 2007, ``sklearn.cluster.kmeans_plusplus``) picks K seed objects, which become the
   initial prototypes (P = x, V = w).
2. Lloyd iterations: assign every object to the prototype with the smallest pose-minimised distance
   (``posesearch``), and in the same pass accumulate each object aligned into its prototype's frame
   (rolled by -yaw with linear interpolation between neighbouring bins, resampled by 1 / scale):
   ``P_k = sum w_al x_al / sum w_al`` and ``V_k = mean w_al`` over the members.  Stop when no label
   changes or the relative change of the cost (sum of member distances) is below ``tol``, at most
   ``max_iter`` passes; a final pass assigns against the final prototypes.
   Empty clusters are re-seeded from the worst-fitting objects of the pass.
3. ``n_init`` restarts, the lowest final cost wins.  When N > ``sample_size`` the restarts run on the
   subsample and only the winner is iterated on all objects (restarts on everything would multiply the
   cost of a large fit by n_init).
4. Symmetry (``symmetry.detect_symmetry``) and the canonical yaw rule: prototypes are rolled into their
   canonical frame and member yaws are reported in it, modulo the symmetry period (0 if continuous).

Public API
----------
- ``ArraySource(X, W)``
- ``PoseKMeans(*, n_clusters, scales=(1.0,), n_init=4, max_iter=30, tol=1e-4, chunk_size=2048,
  random_state=None, sample_size=4096, symmetry_tol=0.12, init=None)``
  ``.fit(source) -> self``, ``.predict(source) -> labels (N,)``, ``.match(source) -> PoseMatch``;
  fitted: ``prototypes_`` (K, C, R, A, H), ``prototype_weights_`` (K, R, A, H), ``labels_`` (N,),
  ``yaw_deg_`` (N,), ``scale_`` (N,), ``distance_`` (N,), ``inertia_``, ``n_iter_``, ``symmetry_`` (K,),
  ``canonical_shift_deg_`` (K,), ``member_stats_`` (dict of (K,) arrays: count, median, mad, q05, q25,
  q75, q95).
"""
from __future__ import annotations

from typing import Protocol, Sequence

import numpy as np
from sklearn.cluster import kmeans_plusplus

from . import symmetry as sym
from .posesearch import PoseBank, PoseMatch, _check_scales, _resample_axis, shift_volume

QUANTILES = (0.05, 0.25, 0.75, 0.95)


class Source(Protocol):
    def __len__(self) -> int: ...

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]: ...


class ArraySource:
    """In-memory source: X (N, C, R, A, H), W (N, R, A, H)."""

    def __init__(self, X: np.ndarray, W: np.ndarray):
        X = np.asarray(X, dtype=np.float32)
        W = np.asarray(W, dtype=np.float32)
        if X.ndim != 5:
            raise ValueError(f"X must have shape (N, C, R, A, H), got {X.shape}")
        if W.shape != X.shape[:1] + X.shape[2:]:
            raise ValueError(f"W must have shape {X.shape[:1] + X.shape[2:]}, got {W.shape}")
        self.X, self.W = X, W

    def __len__(self) -> int:
        return self.X.shape[0]

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        return self.X[i0:i1], self.W[i0:i1]


def _chunks(n: int, size: int):
    for i0 in range(0, n, size):
        yield i0, min(n, i0 + size)


def _gather(source: Source, idx: np.ndarray, chunk_size: int) -> tuple[np.ndarray, np.ndarray]:
    """Objects at sorted indices ``idx``, read chunk by chunk."""
    xs, ws = [], []
    for i0, i1 in _chunks(len(source), chunk_size):
        sel = idx[(idx >= i0) & (idx < i1)]
        if sel.size:
            x, w = source.read(i0, i1)
            xs.append(np.asarray(x, np.float32)[sel - i0])
            ws.append(np.asarray(w, np.float32)[sel - i0])
    return np.concatenate(xs), np.concatenate(ws)


def yaw_invariant_descriptors(X: np.ndarray, W: np.ndarray) -> np.ndarray:
    """(N, C * R * F * H) magnitudes of the azimuthal rfft of w * x (invariant to yaw rolls)."""
    f = np.abs(np.fft.rfft(W[:, None] * X, axis=3))
    return f.reshape(X.shape[0], -1).astype(np.float32)


def align_to_prototype(x: np.ndarray, w: np.ndarray, yaw_deg: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Undo each object's pose: x (n, C, R, A, H), w (n, R, A, H) rolled by -yaw, resampled by 1/scale.

    Returns (x_al, w_al) in the prototype's frame; cells the object does not cover get weight 0.
    """
    A = x.shape[3]
    shift = -np.asarray(yaw_deg, np.float64) / (360.0 / A)
    x = shift_volume(x, shift, axis=3)
    w = shift_volume(w, shift, axis=2)
    scale = np.asarray(scale, np.float64)
    for s in np.unique(scale):
        if s == 1.0:
            continue
        sel = scale == s
        m = np.ones((1, x.shape[2], 1, x.shape[4]), bool)
        xs, ws = x[sel], w[sel]
        xs, _ = _resample_axis(xs, m, 1.0 / s, 2)
        ws, m = _resample_axis(ws, m, 1.0 / s, 1)
        xs, _ = _resample_axis(xs, m, 1.0 / s, 4)
        ws, m = _resample_axis(ws, m, 1.0 / s, 3)
        x[sel], w[sel] = xs, ws * m
    return x, w


class _Result:
    """One Lloyd run's output."""

    def __init__(self, P, V, labels, yaw, scale, dist, cost, n_iter):
        self.P, self.V, self.labels, self.yaw, self.scale, self.dist = P, V, labels, yaw, scale, dist
        self.cost, self.n_iter = cost, n_iter


def _assign_pass(source: Source, P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], chunk_size: int,
                 accumulate: bool, n_worst: int):
    """One pass over the source: assignment against (P, V) and, optionally, the aligned sums.

    Returns labels, yaw, scale, dist (N,), and when accumulating num (K, C, R, A, H), den (K, R, A, H),
    count (K,), plus the ``n_worst`` worst-fitting objects (x, w) for re-seeding empty clusters.
    """
    N = len(source)
    K = P.shape[0]
    bank = PoseBank(P, V, scales)
    labels = np.empty(N, np.int64)
    yaw = np.empty(N, np.float32)
    scale = np.empty(N, np.float32)
    dist = np.empty(N, np.float32)
    num = np.zeros((K,) + P.shape[1:], np.float64)
    den = np.zeros((K,) + V.shape[1:], np.float64)
    worst_d = np.empty(0, np.float32)
    worst_x = np.empty((0,) + P.shape[1:], np.float32)
    worst_w = np.empty((0,) + V.shape[1:], np.float32)
    for i0, i1 in _chunks(N, chunk_size):
        x, w = source.read(i0, i1)
        x = np.asarray(x, np.float32)
        w = np.asarray(w, np.float32)
        m = bank.match(x, w)
        lab = np.argmin(m.D, axis=1)
        r = np.arange(i1 - i0)
        labels[i0:i1] = lab
        yaw[i0:i1] = m.yaw_deg[r, lab]
        scale[i0:i1] = m.scale[r, lab]
        d = m.D[r, lab]
        dist[i0:i1] = d
        if not accumulate:
            continue
        ok = np.isfinite(d)
        xa, wa = align_to_prototype(x[ok], w[ok], yaw[i0:i1][ok], scale[i0:i1][ok])
        # per-cluster sums as one-hot matrix products (much faster than scattered adds)
        onehot = np.zeros((K, xa.shape[0]), np.float32)
        onehot[lab[ok], np.arange(xa.shape[0])] = 1.0
        num += (onehot @ (wa[:, None] * xa).reshape(xa.shape[0], -1)).reshape(num.shape)
        den += (onehot @ wa.reshape(wa.shape[0], -1)).reshape(den.shape)
        if n_worst:
            # keep the n_worst largest distances seen so far (unmatchable objects count as worst)
            dd = np.where(np.isfinite(d), d, np.float32(np.finfo(np.float32).max))
            cand = np.concatenate([worst_d, dd])
            keep = np.argsort(-cand, kind="stable")[:n_worst]
            worst_x = np.concatenate([worst_x, x])[keep]
            worst_w = np.concatenate([worst_w, w])[keep]
            worst_d = cand[keep]
    count = np.bincount(labels[np.isfinite(dist)], minlength=K) if accumulate else None
    return labels, yaw, scale, dist, num, den, count, (worst_x, worst_w)


def _update(num: np.ndarray, den: np.ndarray, count: np.ndarray, worst, P_old: np.ndarray, V_old: np.ndarray):
    """New prototypes from the aligned sums; empty clusters take the worst-fitting objects."""
    P = np.where(den[:, None] > 1e-9, num / np.maximum(den[:, None], 1e-9), 0.0).astype(np.float32)
    V = (den / np.maximum(count, 1)[:, None, None, None]).astype(np.float32)
    wx, ww = worst
    empty = np.flatnonzero(count == 0)
    for j, k in enumerate(empty):
        if j < wx.shape[0]:
            P[k], V[k] = wx[j], ww[j]
        else:
            P[k], V[k] = P_old[k], V_old[k]
    return P, V


def _lloyd(source: Source, P: np.ndarray, V: np.ndarray, *, scales, max_iter: int, tol: float,
           chunk_size: int) -> _Result:
    K = P.shape[0]
    prev_labels, prev_cost = None, np.inf
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        labels, yaw, scale, dist, num, den, count, worst = _assign_pass(source, P, V, scales, chunk_size, True, K)
        cost = float(dist[np.isfinite(dist)].sum())
        stable = prev_labels is not None and np.array_equal(labels, prev_labels)
        small = np.isfinite(prev_cost) and abs(prev_cost - cost) <= tol * max(abs(cost), 1e-12)
        if stable and count.min() > 0:
            break  # prototypes already reflect these assignments
        P, V = _update(num, den, count, worst, P, V)
        if small and count.min() > 0:
            break
        prev_labels, prev_cost = labels, cost
    labels, yaw, scale, dist, *_ = _assign_pass(source, P, V, scales, chunk_size, False, 0)
    cost = float(dist[np.isfinite(dist)].sum())
    return _Result(P, V, labels, yaw, scale, dist, cost, n_iter)


class PoseKMeans:
    """Pose-aware k-means over gridded objects read from a source (see the module docstring).

    Parameters
    ----------
    n_clusters : K, number of prototypes.
    scales : scale factors searched per pose (1.0 = no scale search).
    n_init : restarts with different k-means++ seeds; the lowest final cost is kept.
    max_iter, tol : Lloyd iteration cap and relative cost-change tolerance.
    chunk_size : objects read and matched at once (bounds memory).
    random_state : int or None; the only source of randomness.
    sample_size : objects used for seeding descriptors and, for large N, for the restarts.
    symmetry_tol : tolerance of :func:`protomine.mine.symmetry.detect_symmetry`.
    init : optional (P (K, C, R, A, H), V (K, R, A, H)) starting prototypes (skips seeding and restarts).
    """

    def __init__(self, *, n_clusters: int, scales: Sequence[float] = (1.0,), n_init: int = 4, max_iter: int = 30,
                 tol: float = 1e-4, chunk_size: int = 2048, random_state: int | None = None,
                 sample_size: int = 4096, symmetry_tol: float = 0.12,
                 init: tuple[np.ndarray, np.ndarray] | None = None):
        self.n_clusters = n_clusters
        self.scales = scales
        self.n_init = n_init
        self.max_iter = max_iter
        self.tol = tol
        self.chunk_size = chunk_size
        self.random_state = random_state
        self.sample_size = sample_size
        self.symmetry_tol = symmetry_tol
        self.init = init

    # --- validation ------------------------------------------------------------------------

    def _validate(self, source: Source) -> tuple[float, ...]:
        for name in ("n_clusters", "n_init", "max_iter", "chunk_size", "sample_size"):
            v = getattr(self, name)
            if not isinstance(v, (int, np.integer)) or v < 1:
                raise ValueError(f"{name} must be a positive integer, got {v!r}")
        if not (0.0 <= self.tol < 1.0):
            raise ValueError(f"tol must be in [0, 1), got {self.tol}")
        n = len(source)
        if n < self.n_clusters:
            raise ValueError(f"n_objects={n} must be >= n_clusters={self.n_clusters}")
        return _check_scales(self.scales)

    # --- fitting ---------------------------------------------------------------------------

    def fit(self, source: Source) -> PoseKMeans:
        """Fit prototypes to every object of ``source``; returns self."""
        scales = self._validate(source)
        rng = np.random.default_rng(self.random_state)
        N, K = len(source), self.n_clusters
        if self.init is not None:
            P0 = np.asarray(self.init[0], np.float32).copy()
            V0 = np.asarray(self.init[1], np.float32).copy()
            if P0.shape[0] != K or V0.shape[0] != K:
                raise ValueError(f"init must hold n_clusters={K} prototypes, got {P0.shape[0]}")
            best = _lloyd(source, P0, V0, scales=scales, max_iter=self.max_iter, tol=self.tol,
                          chunk_size=self.chunk_size)
        else:
            best = self._fit_restarts(source, scales, rng)
        self._finish(best, source, scales)
        return self

    def _fit_restarts(self, source: Source, scales: tuple[float, ...], rng: np.random.Generator) -> _Result:
        N, K = len(source), self.n_clusters
        idx = np.sort(rng.choice(N, size=min(N, self.sample_size), replace=False))
        Xs, Ws = _gather(source, idx, self.chunk_size)
        desc = yaw_invariant_descriptors(Xs, Ws)
        sub = ArraySource(Xs, Ws)
        fit_on = source if N <= self.sample_size else sub
        best = None
        for _ in range(self.n_init):
            _, seeds = kmeans_plusplus(desc, K, random_state=int(rng.integers(2**31 - 1)))
            res = _lloyd(fit_on, Xs[seeds].copy(), Ws[seeds].copy(), scales=scales, max_iter=self.max_iter,
                         tol=self.tol, chunk_size=self.chunk_size)
            if best is None or res.cost < best.cost:
                best = res
        if fit_on is not source:
            best = _lloyd(source, best.P, best.V, scales=scales, max_iter=self.max_iter, tol=self.tol,
                          chunk_size=self.chunk_size)
        return best

    def _finish(self, res: _Result, source: Source, scales: tuple[float, ...]) -> None:
        A = res.P.shape[3]
        symm = sym.detect_symmetry(res.P, res.V, tol=self.symmetry_tol)
        t = sym.canonical_shift_bins(res.P, res.V, symm)
        self.prototypes_ = shift_volume(res.P, -t, axis=3).astype(np.float32)
        self.prototype_weights_ = shift_volume(res.V, -t, axis=2).astype(np.float32)
        self.symmetry_ = symm
        self.canonical_shift_deg_ = (t * 360.0 / A).astype(np.float32)
        self.labels_ = res.labels
        self.yaw_deg_ = sym.wrap_yaw(res.yaw + self.canonical_shift_deg_[res.labels], symm[res.labels])
        self.scale_ = res.scale
        self.distance_ = res.dist
        self.inertia_ = res.cost
        self.n_iter_ = res.n_iter
        self.scales_ = scales
        self.member_stats_ = member_stats(res.labels, res.dist, self.n_clusters)

    # --- use -------------------------------------------------------------------------------

    def _check_fitted(self) -> None:
        if not hasattr(self, "prototypes_"):
            raise RuntimeError("PoseKMeans is not fitted; call fit(source) first")

    def match(self, source: Source, *, return_all: bool = False) -> PoseMatch:
        """Best pose of every object against every fitted prototype: PoseMatch with (N, K) arrays.

        yaw_deg is in each prototype's canonical frame, modulo its symmetry period.
        """
        self._check_fitted()
        bank = PoseBank(self.prototypes_, self.prototype_weights_, self.scales_)
        parts = []
        for i0, i1 in _chunks(len(source), self.chunk_size):
            x, w = source.read(i0, i1)
            parts.append(bank.match(np.asarray(x, np.float32), np.asarray(w, np.float32), return_all=return_all))
        D = np.concatenate([p.D for p in parts])
        yaw = sym.wrap_yaw(np.concatenate([p.yaw_deg for p in parts]), self.symmetry_)
        scale = np.concatenate([p.scale for p in parts])
        allD = np.concatenate([p.all_D for p in parts]) if return_all else None
        return PoseMatch(D, yaw, scale, allD)

    def predict(self, source: Source) -> np.ndarray:
        """Index of the nearest prototype under the best pose, (N,)."""
        return np.argmin(self.match(source).D, axis=1)


def member_stats(labels: np.ndarray, dist: np.ndarray, n_clusters: int) -> dict[str, np.ndarray]:
    """Per-prototype statistics of member distances: count, median, mad (median absolute deviation,
    unscaled), q05, q25, q75, q95; (K,) arrays, NaN for empty clusters."""
    out = {k: np.full(n_clusters, np.nan) for k in ("median", "mad", "q05", "q25", "q75", "q95")}
    out["count"] = np.zeros(n_clusters, np.int64)
    for k in range(n_clusters):
        d = dist[(labels == k) & np.isfinite(dist)]
        out["count"][k] = d.size
        if d.size == 0:
            continue
        med = np.median(d)
        out["median"][k] = med
        out["mad"][k] = np.median(np.abs(d - med))
        for q in QUANTILES:
            out[f"q{int(round(q * 100)):02d}"][k] = np.quantile(d, q)
    return out
