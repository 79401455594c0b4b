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
1. Seeding (:mod:`protomine.mine.seeding`): pose-minimised distances among a random subsample of at
   most max(``seeding.SEED_SIZE``, 2 K) objects (yaw-invariant descriptors would forget the angles between parts,
   so mirror images and differently pointing parts would look alike); K medoids on that matrix
   (average linkage on the first restart, k-means++-style sampling on the others, refined by
   alternating k-medoids); every object of the subsample joins its pose-nearest medoid.  The groups'
   members, posed against their medoid and aligned, are averaged into the initial prototypes (one
   Lloyd update with the labels held fixed).
2. Lloyd iterations: assign every object to the prototype with the smallest pose-minimised distance
   (``posesearch``), and in the same pass accumulate each object aligned into its prototype's frame
   (rolled by -yaw with linear interpolation between neighbouring bins, resampled by 1 / scale):
   ``P_k = sum w_al x_al / sum w_al`` and ``V_k = mean w_al`` over the members.  The sums are kept as
   azimuthal spectra: the object spectra the pose search computed anyway are multiplied by each
   member's roll phase and added per (prototype, scale) with ``index_add_``; one inverse transform and
   one resampling per scale at the end of the pass (resampling is linear, so resampling the sum of the
   products w x equals summing the resampled products).  Stop when no label changes or the relative
   change of the cost (sum of member distances) is below ``tol``, at most ``max_iter`` passes; a final
   pass assigns against the final prototypes and accumulates the members' aligned moments for the
   symmetry test.  Empty clusters are re-seeded from the worst-fitting objects of the pass.
   The first and final passes search every scale; the passes in between search each object's previous
   best scale +-1 only (3 of the default 5 scales).
3. ``n_init`` restarts, the lowest final cost wins.  When N > ``sample_size`` the restarts run on the
   subsample and only the winner is iterated on all objects (restarts on everything would multiply the
   cost of a large fit by n_init).  With ``seed_check`` (and ``face_pairs``) each restart's partition is judged by
   its k-medoids cost on the stable-face seeding matrix instead, and the seed partition itself, its labels held
   (:func:`_held_fit`; members far from their prototype join it turned onto one of their own resting faces,
   :func:`_own_faces`), is kept when the passes did not lower that cost.  With ``seed_hold_t`` instead, the seed
   partition is held so only when the fit's is significantly costlier on that matrix (a paired t over its objects,
   ``seeding.paired_worse_t``); every other fit stands.
4. Symmetry (``symmetry.detect_symmetry``: each prototype's asymmetry under candidate rotations against
   the variance of its mean from the members' aligned moments) and the canonical yaw rule: prototypes
   are rolled into their canonical frame and member yaws are reported in it, modulo the symmetry period
   (0 if continuous).

Memory: object spectra (about 0.1 MB per object on the 5 x 8 x 36 x 12 grid) are cached between passes
up to ``cache_mb``; later chunks are re-read and re-transformed each pass.  A chunk's aligned sums are summed a
piece of groups at a time from the chunk's spectra (:class:`_AlignedSums`), not held per group beside them.  Besides the per-object result
arrays, the rest is bounded by one chunk, the seeding subsample and the prototypes.  A source that is not in
memory (not an :class:`ArraySource`) has its next chunk read ahead on a thread of its own while the current one is
matched: one more chunk of volumes.

Threads: with torch on T > 1 threads, the phases of a fit that ran on one core while the other idled run on the
search's pool (``searchpool.spectra_pool``, one torch thread each, as ``searchpool.pooled``): a chunk's aligned sums
piece by piece (sums, inverse transform, scaling, untilt; the parts are added in piece order, so the same values to
the bit), the 3-D symmetry and face tests prototype by prototype, and the tilted copies' geometries overlap their
resampling (``tilts._overlapped``).  Measured per phase (wall and process CPU, main-thread CPU by
``time.thread_time``) on 600 tumbled objects, K = 16, n_init 2, max_iter 4 (``tiltbench._mine_tumbled_once``), the
main thread's own CPU, which the other core cannot share, fell from 28 s of 102 s CPU to 10 s of 92 s (most of what
is left overlaps the pool: the copies' geometries); same result.

Public API
----------
- ``ArraySource(X, W)``
- ``PoseKMeans(*, n_clusters, scales=(1.0,), n_init=4, max_iter=30, tol=1e-4, chunk_size=2048,
  random_state=None, sample_size=4096, symmetry_factor=3.5, init=None, cache_mb=384)``
  ``.fit(source) -> self``, ``.predict(source) -> labels (N,)``, ``.match(source) -> PoseMatch``;
  fitted: ``prototypes_`` (K, C, R, A, H), ``prototype_weights_`` (K, R, A, H), ``labels_`` (N,),
  ``yaw_deg_`` (N,), ``scale_`` (N,), ``distance_`` (N,), ``inertia_``, ``n_iter_``, ``symmetry_`` (K,),
  ``canonical_shift_deg_`` (K,), ``member_stats_`` (dict of (K,) arrays: count, median, mad, q05, q25,
  q75, q95).
"""
from __future__ import annotations

import functools
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Protocol, Sequence

import numpy as np
import torch

from .. import cores
from .. import rotations as rot
from . import faces
from ..progress import Bar, bar
from . import symmetry as sym
from .posesearch import PoseMatch, _check_scales, _resample_axis, shift_volume
from .posesearch import PoseBank, complex_spectra
from .seeding import SEED_SIZE, PoseSeeder, medoid_cost, neighbour_vetoed, paired_worse_t
from .searchpool import ordered_map, pooled
from .tilts import TiltBank, TiltGrid, make_bank

QUANTILES = (0.05, 0.25, 0.75, 0.95)


def use_cores() -> None:
    """Torch intra-op threads for the passes, set once per fit (:mod:`protomine.cores` policy): every usable
    core when this process works alone, one in an executor's worker process (never both)."""
    cores.set_torch_threads(cores.threads_for_this_process())


class Source(Protocol):
    def __len__(self) -> int: ...

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]: ...


class ArraySource:
    """In-memory source: X (N, C, R, A, H), W (N, R, A, H); optional ``aspect`` (N,) grid aspects
    z_max / rho_max (``tilts.grid_aspect``), needed by the tilt search."""

    def __init__(self, X: np.ndarray, W: np.ndarray, aspect: np.ndarray | None = None):
        X = np.asarray(X, dtype=np.float32)
        W = np.asarray(W, dtype=np.float32)
        if X.ndim != 5:
            raise ValueError(f"X must have shape (N, C, R, A, H), got {X.shape}")
        if W.shape != X.shape[:1] + X.shape[2:]:
            raise ValueError(f"W must have shape {X.shape[:1] + X.shape[2:]}, got {W.shape}")
        if aspect is not None and np.shape(aspect) != (X.shape[0],):
            raise ValueError(f"aspect must have shape ({X.shape[0]},), got {np.shape(aspect)}")
        self.X, self.W = X, W
        self.aspect = None if aspect is None else np.asarray(aspect, np.float64)

    def __len__(self) -> int:
        return self.X.shape[0]

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        return self.X[i0:i1], self.W[i0:i1]


def _chunks(n: int, size: int):
    for i0 in range(0, n, size):
        yield i0, min(n, i0 + size)


def _gather(source: Source, idx: np.ndarray, chunk_size: int) -> tuple[np.ndarray, np.ndarray]:
    """Objects at sorted indices ``idx``, read chunk by chunk (or by the source's own ``gather``)."""
    if hasattr(source, "gather"):  # a source that reads just those rows (mine.distributed.ExecutorSource)
        return source.gather(idx)
    xs, ws = [], []
    for i0, i1 in _chunks(len(source), chunk_size):
        sel = idx[(idx >= i0) & (idx < i1)]
        if sel.size:
            x, w = source.read(i0, i1)
            xs.append(np.asarray(x, np.float32)[sel - i0])
            ws.append(np.asarray(w, np.float32)[sel - i0])
    return np.concatenate(xs), np.concatenate(ws)


def _partition_seeds(sub: "ArraySource", labels: np.ndarray, refs: np.ndarray, scales: tuple[float, ...],
                     chunk_size: int, cache: "_SpectraCache | None" = None, grid: TiltGrid | None = None
                     ) -> tuple[np.ndarray, np.ndarray] | tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Initial prototypes (K, C, R, A, H), (K, R, A, H) from a partition of the subsample ``sub``: labels (n,)
    and each group's reference object refs (K,) (``seeding.PoseSeeder.partition``).  The group's members,
    posed against their reference and aligned, are averaged (one Lloyd update with the labels held fixed):
    a group mean is a much steadier start than a single object.  With a tilt ``grid`` the members are posed
    over tilts too, and the prototypes' aspects (K,) are returned as a third value."""
    P_ref, V_ref = sub.X[refs].copy(), sub.W[refs].copy()
    ts = None if grid is None else TiltState(grid, sub.aspect[refs])
    lab, *_, num, den, count, worst, _ = _assign_pass(sub, P_ref, V_ref, scales, chunk_size, True, len(refs),
                                                      forced=labels, cache=cache, tilts=ts)
    P, V = _update(num, den, count, worst, P_ref, V_ref)
    if ts is None:
        return P, V
    return P, V, _update_aspect(ts, lab, sub.aspect)


def _update_aspect(ts: "TiltState", labels: np.ndarray, obj_aspect: np.ndarray) -> np.ndarray:
    """Prototype aspects (K,): the median aspect of each prototype's upright members (tilt = identity: they
    rest on the canonical face, so their grid's shape is the prototype's); unchanged without such members."""
    up = ts.grid.is_upright(ts.tilt)
    out = ts.aspect.copy()
    for k in range(len(out)):
        sel = (labels == k) & up
        if sel.any():
            out[k] = float(np.median(obj_aspect[sel]))
    return out


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

    def __init__(self, P, V, labels, yaw, scale, dist, cost, n_iter, moments=None, tilt=None, aspect=None, pre=None):
        self.P, self.V, self.labels, self.yaw, self.scale, self.dist = P, V, labels, yaw, scale, dist
        self.cost, self.n_iter = cost, n_iter
        self.moments = moments  # (s0, s1, s2, sw2) of the aligned members, or None
        self.tilt, self.aspect = tilt, aspect  # (N,) tilt indices and (K,) prototype aspects, or None
        # (N, 3, 3) or None: each object's rotation onto the own resting face it was matched on (_own_faces;
        # identity for the objects matched as they lie): the pose (tilt, yaw, scale) is that of the copy
        self.pre = pre
        self.src = None  # the source with those members turned (_held_fit), when pre is not None
        self.member_order = None  # (K,) with pose_sync: the order about up each cluster's members show (-1: none)


def _align_phase(yaw_deg: np.ndarray, A: int) -> torch.Tensor:
    """(F, n) complex transfer function of rolling by -yaw bins with linear interpolation.

    roll by f + t (f integer, t in [0, 1)) = (1 - t) roll(a, f) + t roll(a, f + 1), and roll(a, f)
    multiplies rfft bin k by exp(-2 pi i k f / A); the result equals :func:`shift_volume` exactly.
    """
    shift = -np.asarray(yaw_deg, np.float64) / (360.0 / A)
    f = np.floor(shift)
    t = shift - f
    k = np.arange(A // 2 + 1)[:, None]
    e0 = np.exp(-2j * np.pi * k * f[None, :] / A)
    e1 = np.exp(-2j * np.pi * k * (f[None, :] + 1) / A)
    return torch.from_numpy(((1 - t)[None, :] * e0 + t[None, :] * e1).astype(np.complex64))


RESULT_BLOCK = 256  # (prototype, tilt, scale) groups transformed back at once by _AlignedSums.result
RESULT_PIECE = 64   # ... and untilted at once (bounds the float64 temporaries of the untilt)
ADD_BLOCK = 256     # members whose complex spectra _AlignedSums.add holds at once
SCALE_BLOCK = 8     # groups of a piece resampled by their scales together (temporaries ~1.3 MB on the default grid)


def _pieces(runs: np.ndarray, size: int) -> list[tuple[int, int]]:
    """[p0, p1) pieces covering ``runs`` (n,), cut only where its value changes, each as long as it can be
    up to ``size`` (a run longer than ``size`` is a piece of its own)."""
    starts = np.flatnonzero(np.r_[True, runs[1:] != runs[:-1]]).tolist() + [len(runs)]
    out, p0 = [], 0
    for a, b in zip(starts[1:-1], starts[2:]):  # a: the end of the piece so far if the run [a, b) is left out
        if b - p0 > size:
            out.append((p0, a))
            p0 = a
    return out + [(p0, len(runs))] if len(runs) else out


class _AlignedSums:
    """Per (prototype, tilt, scale) sums of members' quantities rolled into the prototype frame, kept as spectra.

    Members are added as real spectra (A, n, B R H) (the azimuthal rfft in ``posesearch``'s real layout,
    ``posesearch.spectrum_rows``); the roll by -yaw is a per-member phase, and members
    of the same group, key (k T + t) S + s for prototype k, tilt t (of T, 1 for a yaw-only search) and
    scale s, are summed with ``index_add_``, so the cost is linear in the number of members and
    independent of K.  :meth:`result` transforms back once, resamples each group's sum by 1 / scale and
    untilts it into the prototype frame (both are linear, so transforming the sum equals summing the
    transformed members).

    The adds are recorded and summed in :meth:`result`, a piece of groups at a time (the pieces the transforms
    work on): only one piece's accumulators exist at once.  With tilts nearly every member of a chunk is a
    group of its own, so accumulators for all groups held a chunk's spectra over again (209 MB for 2,048
    objects on the 5 x 8 x 36 x 12 grid, 179 MB more for the moments), beside the spectra the adds read from.
    Each group's members are summed in member order as before, and the pieces are the same: the same values
    to the bit.

    ``first``: the spectra's leading features left out (the passes leave out the w |x|^2 block of the object
    spectra, ``first`` = R H: the prototype update reads only the sums of w and w x).  Every feature is summed,
    transformed, resampled and untilted on its own, so the others' sums are the same values to the bit; the sums
    cost 6 / 7 of the work they did on the 5-channel grid.
    """

    def __init__(self, K: int, S: int, A: int, n_feat: int, T: int = 1, first: int = 0):
        self.K, self.S, self.A, self.T, self.n_feat, self.first = K, S, A, T, n_feat, first
        self.adds: list[tuple] = []

    def add(self, spec, yaw_deg: np.ndarray, group: np.ndarray, rows: np.ndarray | None = None) -> None:
        """Add members: real spectra ``spec`` (A, n, first + n_feat) (``posesearch.spectrum_rows`` layout; or its
        columns ``rows`` (m,) only), their yaws and groups (m,); only the features from ``first`` on are summed (the
        chunk's object spectra lead with the w |x|^2 block, whose aligned sums nothing reads).  ``spec`` may also be a
        function of member positions (p,) (indices into this add's members) returning their spectra (A, p, n_feat),
        computed when summed (all of whose features are summed).  Nothing is summed here; ``spec`` is kept until
        :meth:`result`."""
        group = np.asarray(group, np.int64)
        f0 = self.first
        if callable(spec):
            get = spec
        elif rows is None:  # gathered whole, then narrowed: a gather from the narrowed view (not contiguous) first
            # copied the whole chunk's spectra (118 ms instead of 15 ms for 256 of 2,048 objects, one thread)
            get = lambda pos: spec.index_select(1, torch.from_numpy(pos))[:, :, f0:]  # noqa: E731
        else:
            rows = np.asarray(rows, np.int64)
            get = lambda pos: spec.index_select(1, torch.from_numpy(rows[pos]))[:, :, f0:]  # noqa: E731
        self.adds.append((get, _align_phase(yaw_deg, self.A), group))

    def _piece_sums(self, keys: np.ndarray) -> torch.Tensor:
        """(F, len(keys), n_feat) complex sums of the groups ``keys`` (sorted), members in add and member order,
        ``ADD_BLOCK`` members' complex spectra at a time (``index_add_`` adds them in member order)."""
        acc = torch.zeros((self.A // 2 + 1, len(keys), self.n_feat), dtype=torch.complex64)
        for get, phase, group in self.adds:
            pos = np.flatnonzero(np.isin(group, keys))
            for b0 in range(0, pos.size, ADD_BLOCK):
                pb = pos[b0:b0 + ADD_BLOCK]
                c = complex_spectra(get(pb), self.A)
                c.mul_(phase[:, torch.from_numpy(pb), None])
                acc.index_add_(1, torch.from_numpy(np.searchsorted(keys, group[pb])), c)
        return acc

    def result(self, scales: tuple[float, ...], shape: tuple[int, int, int], tilts: TiltBank | None = None) -> np.ndarray:
        """(K, B, R, A, H) float64 sums in the prototype frame; shape = (B, R, H).  ``tilts.untilt_many(ks, ts, a)``
        rotates sums a (G, B, R, A, H) of tilts ts (G,) back into their prototypes ks' frames: a group's scales are
        summed first, then every (prototype, tilt) is untilted in one resampling."""
        B, R, H = shape
        out = np.zeros((self.K, B, R, self.A, H))
        if not self.adds:
            return out
        keys = np.unique(np.concatenate([g for _, _, g in self.adds]))
        # blocks of groups bound the float64 temporaries (a 3-D search fills up to one group per member); each
        # block of RESULT_BLOCK keys is cut further, between (prototype, tilt)s, into pieces of about
        # RESULT_PIECE groups: a (prototype, tilt)'s scales are still summed together before one untilt, in the
        # same order, so the pieces add exactly what their block would
        pieces = [blk[p0:p1] for g0 in range(0, len(keys), RESULT_BLOCK)
                  for blk in (keys[g0:g0 + RESULT_BLOCK],) for p0, p1 in _pieces(blk // self.S, RESULT_PIECE)]
        untilt = None if tilts is None else tilts.untilt_many
        if tilts is not None:  # every group's copy geometry now, on this thread (the pieces' untilts run on others)
            tilts.prepare_untilt(*np.divmod(np.unique(keys // self.S), self.T))

        def piece(keys_p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            return self._piece_parts(keys_p, self._piece_sums(keys_p), scales, shape, untilt)

        # the pieces (sums, transform, scaling, untilt) are independent: they run on the pool's threads
        # (``searchpool.pooled``, one torch thread each), and their parts are added here in piece order, as before
        with cores.reused_scratch():  # the pieces' temporaries in each pool thread's buffers (tilts._sample_in_scratch)
            for ks, parts in ordered_map(piece, pieces):
                for k, part in zip(ks.tolist(), parts):  # np.add.at's sums (in order), one vector add per group
                    out[k] += part
        return out

    def _piece_parts(self, keys: np.ndarray, acc: torch.Tensor, scales: tuple[float, ...],
                     shape: tuple[int, int, int], untilt) -> tuple[np.ndarray, np.ndarray]:
        """A piece's sums in their prototypes' frames: prototype indices ks (G',) and parts (G', B, R, A, H), one per
        (prototype, tilt) of the piece (its scales summed first, in key order)."""
        B, R, H = shape
        a = _as_float64_scratch(torch.fft.irfft(acc, n=self.A, dim=0))  # (A, G, B R H)
        a = a.reshape(self.A, len(keys), B, R, H).transpose(1, 2, 3, 0, 4)  # (G, B, R, A, H)
        kts, sis = np.divmod(keys, self.S)
        ukt, which = np.unique(kts, return_inverse=True)
        parts = np.zeros((len(ukt), B, R, self.A, H))
        for j0 in range(0, len(keys), SCALE_BLOCK):
            # each group's sum resampled by 1 / its scale, the block's groups of one scale in one call (elementwise
            # interpolation: the same values as one call per group, whose overhead was ~0.2 ms a group); blocks of a
            # few groups keep the temporaries below the mapped blocks' threshold (cores.large_blocks_mapped)
            j1 = min(len(keys), j0 + SCALE_BLOCK)
            scaled = {}
            for si in np.unique(sis[j0:j1]).tolist():
                s = scales[si]
                if s != 1.0:
                    js = j0 + np.flatnonzero(sis[j0:j1] == si)
                    m = np.ones((1, 1, R, 1, H), bool)
                    part, m = _resample_axis(a[js], m, 1.0 / s, 2)
                    part, m = _resample_axis(part, m, 1.0 / s, 4)
                    part *= m  # cells the scaled members do not cover stay unknown
                    scaled.update(zip(js.tolist(), part))
            for j in range(j0, j1):  # a (prototype, tilt)'s scales added in key order
                parts[which[j]] += scaled.get(j, a[j])
        ks, ts = np.divmod(ukt, self.T)
        if untilt is not None and np.any(ts):
            parts = untilt(ks, ts, parts, in_place=True)  # parts is this piece's own
        return ks, parts



def _as_float64_scratch(t: torch.Tensor) -> np.ndarray:
    """``t.numpy().astype(np.float64)`` (the same values) in this thread's reusable buffer (``cores.scratch``): valid
    until this thread asks for it again."""
    out = cores.scratch("float64", tuple(t.shape), torch.float64).numpy()
    np.copyto(out, t.numpy())
    return out


class _SpectraCache:
    """Object spectra (``posesearch`` layout, (A, n, (C + 2) R H) float32) kept across passes per chunk.

    The spectra depend on the objects only, not on the prototypes, so a pass that finds them here skips
    reading and transforming its chunk.  Chunks are kept in order until ``budget_bytes`` is used up;
    later chunks are recomputed every pass (streaming), so memory stays bounded for any N.
    """

    def __init__(self, budget_bytes: int):
        self.budget = budget_bytes
        self.used = 0
        self.store: dict[int, torch.Tensor] = {}
        self._spare: torch.Tensor | None = None

    def get(self, i0: int) -> torch.Tensor | None:
        return self.store.get(i0)

    def put(self, i0: int, o: torch.Tensor) -> None:
        size = o.numel() * o.element_size()
        if self.used + size <= self.budget:
            self.store[i0] = o
            self.used += size

    def fits(self, shape: tuple[int, ...]) -> bool:
        """Whether :meth:`put` would keep float32 spectra of ``shape``."""
        return self.used + 4 * int(np.prod(shape)) <= self.budget

    def spare(self, shape: tuple[int, ...]) -> torch.Tensor:
        """A float32 tensor of ``shape`` for the spectra of a chunk the cache does not keep: the same buffer every
        time (grown when a larger one is asked for), valid until the next call.  The spectra of the chunks past the
        budget were otherwise a fresh block of ~0.1 MB an object every pass, mapped and zero-filled page by page by
        the kernel (``cores.large_blocks_mapped``) as the transform wrote it."""
        n = int(np.prod(shape))
        if self._spare is None or self._spare.numel() < n:
            self._spare = None  # the old one goes first
            self._spare = torch.empty(n, dtype=torch.float32)
        return self._spare[:n].view(shape)


def _moment_spectra(x: np.ndarray, w: np.ndarray, dft: torch.Tensor) -> torch.Tensor:
    """Real spectra (A, n, (C + 1) R H) of [w x_1^2 .. w x_C^2, w^2] for the symmetry test's moments."""
    xt = torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32))
    wt = torch.from_numpy(np.ascontiguousarray(w, dtype=np.float32))
    stack = torch.cat([wt[:, None] * xt * xt, (wt * wt)[:, None]], dim=1)
    return torch.tensordot(dft, stack, dims=([1], [3])).reshape(dft.shape[0], x.shape[0], -1)


class TiltState:
    """The tilt part of a pass (3-D poses): the up-direction grid, the prototypes' aspects (K,) used to build
    their tilted copies, and, after a pass, each object's best tilt ``tilt`` (N,) (indices into grid.dirs)."""

    def __init__(self, grid: TiltGrid, aspect: np.ndarray):
        self.grid = grid
        self.aspect = np.asarray(aspect, np.float64)
        self.tilt: np.ndarray | None = None
        self.levels = 0  # > 0: the pass searches only the grid's first levels (grid.pass_levels, _lloyd_passes)


def _assign_pass(source: Source, P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], chunk_size: int,
                 accumulate: bool, n_worst: int, moments: bool = False, forced: np.ndarray | None = None,
                 cache: _SpectraCache | None = None, scale_index: np.ndarray | None = None, advance=None,
                 tilts: TiltState | None = None):
    """One pass over the source: assignment against (P, V) and, optionally, the aligned sums.

    Returns labels, yaw, scale, dist (N,), and when accumulating num (K, C, R, A, H), den (K, R, A, H),
    count (K,), plus the ``n_worst`` worst-fitting objects (x, w) for re-seeding empty clusters (only
    read when a cluster is empty), and with ``moments`` the symmetry test's (s0, s1, s2, sw2).
    ``forced`` (N,) fixes the labels (seeding): poses are then those against the forced prototype.
    ``cache`` keeps object spectra between passes (same source and chunk_size only).  ``scale_index``
    (N,) restricts each object's scale search to its previous best scale +-1 (intermediate passes).
    ``tilts`` adds the up-direction search (prototypes' tilted copies, members untilted into the sums) and
    receives each object's best tilt in ``tilts.tilt``.  A source with an ``assign_pass`` method runs the
    pass itself (``mine.distributed.ExecutorSource``: a map-reduce over chunks on an executor, with the same
    arguments and results; yaw only).  ``advance(n)``, when given, is told how many objects each chunk
    covered (progress).
    """
    if hasattr(source, "assign_pass"):
        if tilts is not None and not tilts.grid.is_identity:
            raise ValueError("the tilt search runs in this process only; use [mine] tilt_nsides = [0] with a scheduler")
        out = source.assign_pass(P, V, scales, chunk_size, accumulate, n_worst, moments=moments, forced=forced,
                                 scale_index=scale_index)
        if advance is not None:
            advance(len(source))
        return out
    N = len(source)
    K, C, R, A, H = P.shape
    S = len(scales)
    bank = make_bank(P, V, scales, None if tilts is None else tilts.grid, None if tilts is None else tilts.aspect,
                     0.0 if tilts is None else tilts.grid.refine_margin, 0 if tilts is None else tilts.grid.coarse_bins)
    T = 1 if tilts is None else len(tilts.grid.dirs)
    tilt_bank = bank if isinstance(bank, TiltBank) else None
    if tilt_bank is not None:
        tilt_bank.levels = tilts.levels
    labels = np.empty(N, np.int64)
    yaw = np.empty(N, np.float32)
    scale = np.empty(N, np.float32)
    dist = np.empty(N, np.float32)
    tilt = np.zeros(N, np.int64)
    # Each chunk's aligned sums are transformed back and added in float64 in chunk order, exactly as the
    # map-reduce pass of mine.distributed folds its chunk parts, so one process and a cluster sum alike.
    tot = np.zeros((K, C + 1, R, A, H)) if accumulate else None
    extra = np.zeros((K, C + 1, R, A, H)) if moments else None
    chunks = list(_chunks(N, chunk_size))
    # a source that reads from disk reads the next chunk it will need on a thread of its own while this one is
    # matched (one more chunk of volumes in memory); in-memory arrays are read at once
    ahead = None if isinstance(source, ArraySource) else _read_ahead_pool()
    pending: dict = {}
    for j, (i0, i1) in enumerate(chunks):
        if T > 1:  # the tilt search's blocks of many sizes leave gaps: give their pages back before each chunk
            cores.return_free_memory()
        sums = _AlignedSums(K, S, A, (C + 1) * R * H, T, first=R * H) if accumulate else None
        msums = _AlignedSums(K, S, A, (C + 1) * R * H, T) if moments else None
        o = cache.get(i0) if cache is not None else None
        if o is None or moments:
            got = pending.pop(i0, None)
            x, w = got.result() if got is not None else source.read(i0, i1)
        if ahead is not None and j + 1 < len(chunks):
            n0, n1 = chunks[j + 1]
            if moments or cache is None or cache.get(n0) is None:
                pending[n0] = ahead.submit(source.read, n0, n1)
        if o is None or moments:
            x = np.asarray(x, np.float32)
            w = np.asarray(w, np.float32)
        if o is None:
            shape = (A, i1 - i0, (C + 2) * R * H)
            if cache is not None and not cache.fits(shape):  # not kept: written into the cache's one spare buffer
                o = bank.spectra(x, w, out=cache.spare(shape))
            else:
                o = bank.spectra(x, w)
                if cache is not None:
                    cache.put(i0, o)
        if tilt_bank is not None:  # the refinement's copies are built once per pass, kept for the later chunks
            tilt_bank.more_chunks(j + 1 < len(chunks))
        labels[i0:i1], yaw[i0:i1], scale[i0:i1], dist[i0:i1] = _chunk_step(
            bank, o, x if moments else None, w if moments else None, None if forced is None else forced[i0:i1],
            None if scale_index is None else scale_index[i0:i1], scales, sums, msums, tilt[i0:i1])
        o = x = w = None  # the sums hold the chunk's spectra and volumes until they are summed
        if accumulate:
            tot += sums.result(scales, (C + 1, R, H), tilt_bank)  # blocks [w, w x_1 .. w x_C]
            sums = None  # frees the chunk's spectra (unless cached)
        if moments:
            extra += msums.result(scales, (C + 1, R, H), tilt_bank)
            msums = None
        if advance is not None:
            advance(i1 - i0)
    if tilts is not None:
        tilts.tilt = tilt
    if not accumulate:
        return labels, yaw, scale, dist, None, None, None, None, None
    return _pass_outputs(source, labels, yaw, scale, dist, tot, extra, P, V, n_worst, chunk_size)


@functools.lru_cache(maxsize=1)
def _read_ahead_pool() -> ThreadPoolExecutor:
    """The one thread that reads a pass's next chunk ahead (:func:`_assign_pass`); it allocates from the main malloc
    arena, as the search's pool threads do (``cores.one_malloc_arena``)."""
    cores.one_malloc_arena()
    return ThreadPoolExecutor(1, thread_name_prefix="readahead")


# a forked child has none of the parent's threads: it starts its own when it needs one
os.register_at_fork(after_in_child=_read_ahead_pool.cache_clear)


def _chunk_step(bank: PoseBank | TiltBank, o: torch.Tensor, x: np.ndarray | None, w: np.ndarray | None,
                forced: np.ndarray | None, scale_window: np.ndarray | None, scales: tuple[float, ...],
                sums: _AlignedSums | None, msums: _AlignedSums | None, tilt_out: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One chunk of a pass (the map step): best pose of each object, given its spectra o (A, n, (C + 2) R H),
    against the bank's prototypes; with ``sums`` the members are added aligned into their (prototype,
    scale) sums, with ``msums`` also their moments from x (n, C, R, A, H), w (n, R, A, H).  ``forced`` (n,)
    fixes the labels; ``scale_window`` (n,) limits the scale search (see :func:`_assign_pass`).
    Returns labels (n,) int64, yaw_deg, scale, dist (n,) float32; ``tilt_out`` (n,) receives the tilts.
    """
    if isinstance(bank, TiltBank):  # with labels held fixed only their prototype's pose is refined
        m = bank.match_spectra(o, scale_index=scale_window, focus=forced)
    else:
        m = bank.match_spectra(o, scale_index=scale_window)
    n = o.shape[1]
    lab = np.argmin(m.D, axis=1) if forced is None else np.asarray(forced)
    r = np.arange(n)
    yaw = m.yaw_deg[r, lab].astype(np.float32)
    scale = m.scale[r, lab].astype(np.float32)
    d = m.D[r, lab].astype(np.float32)
    tilt = m.tilt[r, lab] if m.tilt is not None else np.zeros(n, np.int64)
    if tilt_out is not None:
        tilt_out[:] = tilt
    if sums is not None:
        S = len(scales)
        scale_pos = {float(s): i for i, s in enumerate(np.asarray(scales, np.float32))}
        ok = np.flatnonzero(np.isfinite(d))
        group = (lab[ok] * sums.T + tilt[ok]) * S + np.array([scale_pos[float(s)] for s in scale[ok]], np.int64)
        # all members usually match; the sums read the matched members' columns a block at a time
        sums.add(o, yaw[ok], group, None if ok.size == n else ok)
        if msums is not None:  # the moments' spectra are computed when summed, a block of a piece's members at a time
            msums.add(lambda pos: _moment_spectra(x[ok[pos]], w[ok[pos]], bank.dft), yaw[ok], group)
    return lab.astype(np.int64), yaw, scale, d


def _pass_outputs(source: Source, labels: np.ndarray, yaw: np.ndarray, scale: np.ndarray, dist: np.ndarray,
                  tot: np.ndarray, extra: np.ndarray | None, P: np.ndarray, V: np.ndarray, n_worst: int,
                  chunk_size: int):
    """An accumulating pass's results (see :func:`_assign_pass`) from its per-object arrays (N,), the summed
    aligned sums tot (K, C + 1, R, A, H) (blocks [w, w x_1 .. w x_C]) and moments extra
    (K, C + 1, R, A, H) or None (the reduce step; ``mine.distributed`` sums them over workers' chunks)."""
    K, C = P.shape[:2]
    count = np.bincount(labels[np.isfinite(dist)], minlength=K)
    num, den = tot[:, 1:], tot[:, 0]
    worst = (np.empty((0,) + P.shape[1:], np.float32), np.empty((0,) + V.shape[1:], np.float32))
    if n_worst and (count == 0).any():
        # unmatchable objects count as worst
        dd = np.where(np.isfinite(dist), dist, np.float32(np.finfo(np.float32).max))
        top = np.sort(np.argsort(-dd, kind="stable")[:n_worst])
        wx, ww = _gather(source, top, chunk_size)
        order = np.argsort(-dd[top], kind="stable")  # worst first
        worst = (wx[order], ww[order])
    mom = None if extra is None else (den, num, extra[:, :C], extra[:, C])
    return labels, yaw, scale, dist, num, den, count, worst, mom


MIN_MEAN_WEIGHT = 1e-4


def weighted_means(num: np.ndarray, den: np.ndarray, count: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Prototypes P (K, C, R, A, H) and weights V (K, R, A, H) (float32) from aligned sums num = sum w x
    (K, C, R, A, H), den = sum w (K, R, A, H) of count (K,) members each."""
    # a cell counts as observed when its mean member weight exceeds MIN_MEAN_WEIGHT: far above the
    # rounding noise of the Fourier-domain sums (~1e-6), so never-seen cells stay exactly 0
    thr = MIN_MEAN_WEIGHT * np.maximum(count, 1)[:, None, None, None]
    P = np.where(den[:, None] > thr[:, None], num / np.maximum(den[:, None], thr[:, None]), 0.0).astype(np.float32)
    V = np.clip(den / np.maximum(count, 1)[:, None, None, None], 0.0, 1.0).astype(np.float32)
    return P, V


def _update(num: np.ndarray, den: np.ndarray, count: np.ndarray, worst, P_old: np.ndarray, V_old: np.ndarray):
    """New prototypes from the aligned sums; empty clusters take the worst-fitting objects."""
    P, V = weighted_means(num, den, count)
    wx, ww = worst
    empty = np.flatnonzero(count == 0)
    for j, k in enumerate(empty):
        if j < wx.shape[0]:
            P[k], V[k] = wx[j], ww[j]
        else:
            P[k], V[k] = P_old[k], V_old[k]
    return P, V


def _lloyd(source: Source, P: np.ndarray, V: np.ndarray, *, scales, max_iter: int, tol: float,
           chunk_size: int, moments: bool = False, cache: _SpectraCache | None = None, progress=None,
           what: str = "passes", grid: TiltGrid | None = None, aspect: np.ndarray | None = None) -> _Result:
    """Lloyd iterations from (P, V).  The first and the final pass search every scale; the passes in
    between only each object's previous best scale +-1 (scales move slowly once prototypes settle, and
    the search then costs 3 / S of the full one).  ``progress`` (:mod:`protomine.progress`) gets one bar
    over at most max_iter + 1 passes of the objects, cut to the passes run when the iterations converge.
    With a tilt ``grid``, ``aspect`` (K,) are the starting prototypes' aspects, updated after every pass
    from their upright members (``source.aspect``)."""
    with bar(progress, what, total=(max_iter + 1) * len(source), unit="objects") as b:
        return _lloyd_passes(source, P, V, scales, max_iter, tol, chunk_size, moments, cache, b, grid, aspect)


def _lloyd_passes(source: Source, P: np.ndarray, V: np.ndarray, scales, max_iter: int, tol: float, chunk_size: int,
                  moments: bool, cache: _SpectraCache | None, b: Bar, grid: TiltGrid | None = None,
                  aspect: np.ndarray | None = None) -> _Result:
    K = P.shape[0]
    ts = None if grid is None else TiltState(grid, aspect)
    obj_aspect = None if grid is None else _source_aspect(source)
    prev_labels, prev_cost = None, np.inf
    seen: set[bytes] = set()  # earlier assignments: one coming back is a cycle, which further passes only repeat
    n_iter = 0
    sidx = None
    scale_arr = np.asarray(scales, np.float32)
    coarse = ts is not None and grid.pass_levels > 0
    for n_iter in range(1, max_iter + 1):
        if ts is not None:  # with grid.pass_levels, the passes between the first and the last search the first levels
            ts.levels = grid.pass_levels if coarse and 1 < n_iter < max_iter else 0
        labels, yaw, scale, dist, num, den, count, worst, _ = _assign_pass(source, P, V, scales, chunk_size, True, K,
                                                                           cache=cache, scale_index=sidx,
                                                                           advance=b.advance, tilts=ts)
        # index of each object's best scale (the window runs over the scales in the given order)
        sidx = np.argmax(scale[:, None] == scale_arr[None, :], axis=1) if len(scales) > 3 else None
        cost = float(dist[np.isfinite(dist)].sum())
        stable = prev_labels is not None and np.array_equal(labels, prev_labels)
        small = np.isfinite(prev_cost) and abs(prev_cost - cost) <= tol * max(abs(cost), 1e-12)
        key = np.asarray(labels, np.int64).tobytes()
        if ts is not None and ts.levels and count.min() > 0 and (stable or key in seen or small):
            # converged on the first levels: the prototypes are updated from every level's poses before the end
            coarse, seen, switched = False, set(), True
            stable = small = False
            key = b""
        else:
            switched = False
        if stable and count.min() > 0:
            break  # prototypes already reflect these assignments
        if key in seen and count.min() > 0:
            break  # a cycle (the tilt and scale windows make passes not strictly descending): more passes repeat it
        seen.add(key)
        P, V = _update(num, den, count, worst, P, V)
        if ts is not None:
            ts.aspect = _update_aspect(ts, labels, obj_aspect)
        if small and count.min() > 0:
            break
        prev_labels, prev_cost = (None, np.inf) if switched else (labels, cost)
    b.set_total(b.done + len(source))
    if ts is not None:
        ts.levels = 0  # the final pass searches every level
    labels, yaw, scale, dist, *rest = _assign_pass(source, P, V, scales, chunk_size, moments, 0, moments=moments,
                                                 cache=cache, advance=b.advance, tilts=ts)
    cost = float(dist[np.isfinite(dist)].sum())
    return _Result(P, V, labels, yaw, scale, dist, cost, n_iter, rest[-1] if moments else None,
                   None if ts is None else ts.tilt, None if ts is None else ts.aspect)


VETO_UPDATES = 3  # seed_veto_k: prototype updates of the held partition (_held_fit).  0 (only the labels move) on the
# all-stereo seed-0 store: purity / NMI 1.000 both ways, mined yaw p90 / rotation p90 16.3 / 27.7 -> 20.5 / 54.6 (own faces
# off).  1 (own faces on): all-stereo seed 1 120.6 / 154.6 -> 55.4 / 133.7, the others within 3 deg, label AUROC all-stereo
# seed 0 0.969 -> 0.965, touching seed 0 0.911 -> 0.892 (README "What the all-stereo demo loses in mining")
VETO_OWN_FACES = True  # seed_veto_k: members far from their held prototype turned onto their own faces (_own_faces), as
# seed_check's held fit does.  Off -> on, yaw p90 / rotation p90 of all mined members: all-stereo seed 0 16.3 / 27.7 ->
# 13.7 / 22.2; default seed 0 55.6 / 47.2 -> 70.4 / 70.5 (its members right in both: 15.8 / 9.4 -> 10.5 / 9.4)
VETO_KEEP_UNMOVED = True  # seed_veto_k: the clusters no object joined or left stay as the fit left them (_kept_from)
FACE_BREAK_EFFECT = 0.3  # a turn of a face's copy (faces.face_symmetries) moving more than this share of its variance is
# no symmetry (0 = off; on by the lead's call: large gains on four demos, the one loss a jug wrong both ways).  Veto on, 0 -> 0.3, mined yaw / rotation p90: all-stereo seed 1 120.6 / 154.6 -> 10.0 / 104.1,
# seed 0 13.7 / 22.2 -> 9.2 / 22.2, default seed 0 70.4 / 70.5 -> 14.0 / 47.2, seed 1 11.4 / 158.9 -> 11.4 / 172.3 (one
# jug wrong both ways), touching seed 0 119.7 / 122.5 -> 13.7 / 35.3, upright the same; clusters and labels the same
# (README "Where the veto's pose tail came from")


HELD_UPDATES = 3  # prototype updates with the labels held fixed after the seeding's own (_held_fit); demo seed 0
# with seed_check, 1 -> 3: accuracy 0.844 -> 0.836, unknown AUROC 0.908 -> 0.934, symmetry right 6 -> 7 of 8; seed 1
# accuracy 0.908 -> 0.916, AUROC 0.881 -> 0.885 (the partition, and so purity, is the same)


def _held_fit(source: Source, labels: np.ndarray, P: np.ndarray, V: np.ndarray, *, scales, chunk_size: int,
              moments: bool, cache: _SpectraCache | None, grid: TiltGrid | None, aspect: np.ndarray | None,
              own_faces: bool = True, turned: tuple | None = None, updates: int = HELD_UPDATES,
              keep: np.ndarray | None = None) -> _Result:
    """A fit whose partition is given: labels (N,) held fixed, the prototypes (P, V) (the seeding's, members
    aligned to their medoid) updated ``HELD_UPDATES`` times from the members aligned to them (a Lloyd update
    without the assignment), then the final pass of :func:`_lloyd` with the labels still fixed.  With ``own_faces``
    and a tilt ``grid``, after the first assignment the members far from their prototype that fit it better turned
    onto one of their own resting faces are replaced by that copy for the rest of the fit (:func:`_own_faces`; the
    first update is made again): they are averaged in on the right face, their pose (``_Result.pre``) and face are
    reported through it.  ``turned`` (source, pre), as :func:`_own_faces` returns them: the members to fit turned are
    given (:func:`_face_assign`), and no other is turned.  ``updates``: the number of
    prototype updates; 0 keeps (P, V) as given and only runs the final pass (``[mine] face_assign_updates``).
    ``keep`` (K,) bool: these prototypes (and their aspects) stay as given through the updates (:meth:`PoseKMeans.
    _face_reassign`: the clusters whose members did not move).

    Why (``seed_check``): on small stores of touching objects, half tumbled (tools family, 43-46 objects, 8
    classes), the seeding's k-medoids partition of the stable-face matrix was purer than the pose-aware fit
    started from it on all six stores (3 seeds, with and without masks), and its k-medoids cost lower on all
    six: the fit's first assignment moved objects whose nearest objects are all of their own class (an upright
    spool, a tumbled L bracket) to the mean prototype of another class, which fits them a little better than
    their own class's mean of members on several faces."""
    K = P.shape[0]
    ts = None if grid is None else TiltState(grid, aspect)
    labels = np.asarray(labels, np.int64)
    src, pre = (source, None) if turned is None else turned
    for u in range(updates):
        _, _, _, d, num, den, count, worst, _ = _assign_pass(src, P, V, scales, chunk_size, True, K, forced=labels,
                                                             cache=cache, tilts=ts)
        if u == 0 and own_faces and ts is not None and turned is None:
            # objects that fit their held prototype better turned onto one of their own resting faces than by
            # the tilt search over the prototype's copies join it so (their pass is run again)
            src, pre = _own_faces(source, labels, P, V, d, scales, grid, chunk_size)
            if pre is not None:
                cache = None if cache is None else _SpectraCache(cache.budget)  # the turned objects' spectra differ
                _, _, _, _, num, den, count, worst, _ = _assign_pass(src, P, V, scales, chunk_size, True, K,
                                                                     forced=labels, cache=cache, tilts=ts)
        P_new, V_new = _update(num, den, count, worst, P, V)
        if keep is not None:  # (K,) bool: these stay as given
            P_new[keep], V_new[keep] = P[keep], V[keep]
        P, V = P_new, V_new
        if ts is not None:
            a = _update_aspect(ts, labels, _source_aspect(src))
            ts.aspect = a if keep is None else np.where(keep, ts.aspect, a)
    labels, yaw, scale, dist, *rest = _assign_pass(src, P, V, scales, chunk_size, moments, 0, moments=moments,
                                                 forced=labels, cache=cache, tilts=ts)
    cost = float(dist[np.isfinite(dist)].sum())
    out = _Result(P, V, labels, yaw, scale, dist, cost, updates, rest[-1] if moments else None,
                  None if ts is None else ts.tilt, None if ts is None else ts.aspect, pre)
    out.src = src if pre is not None else None
    return out


class _TurnedSource:
    """A source with some objects replaced by their copies resting on one of their own faces (:func:`_own_faces`):
    rows ``turned`` {index: (x (C, R, A, H), w (R, A, H))}, ``aspect`` (N,) with the copies' aspects."""

    def __init__(self, source: Source, turned: dict, aspect: np.ndarray):
        self.source, self.turned, self.aspect = source, turned, aspect

    def __len__(self) -> int:
        return len(self.source)

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        x, w = self.source.read(i0, i1)
        x, w = np.array(x, np.float32), np.array(w, np.float32)
        for i in range(i0, i1):
            if i in self.turned:
                x[i - i0], w[i - i0] = self.turned[i]
        return x, w


OWN_FACE_FACTOR = 3.0  # _own_faces: members this many times their held prototype's median distance (by the tilt
# search) are tried turned onto their own faces.  Demo with seed_check (off -> 1.5 / 2 / 3, unknown AUROC): seed 1
# 0.885 -> 0.878 / 0.894 / 0.900; seed 0 (2, 3) 0.934 -> 0.942 / 0.935, accuracy 0.836 -> 0.820 / 0.836; seed 2 (2, 3)
# 0.777 -> 0.804 / 0.863.  Every member whose own face fits better (no factor): seed 1 AUROC 0.871, accuracy 0.908


def _turned_copies(x: np.ndarray, w: np.ndarray, a: float, grid: TiltGrid):
    """One object x (C, R, A, H), w (R, A, H) of aspect ``a`` turned onto each of its own stable resting faces but the
    one it lies on (``faces.stable_ups``, the exact directions of the seeding's ``seeding.FaceDistance``), each copy
    re-normalised by its own footprint and height as the tilt search's copies are (``tilts.copy_geometries``):
    (geometries, copies (M, C, R, A, H), weights (M, R, A, H)), or None when it has no other face."""
    from .faces import stable_ups
    from .tilts import _resample_copies, copy_geometries, solid_points
    ups = stable_ups(x[0], w, a)[1:]  # the first is the face it lies on
    if not len(ups):
        return None
    gs = copy_geometries(x.shape[1:], a, ups, grid, solid_points(x[0], w, a, grid))
    pc, vc = _resample_copies(np.broadcast_to(x, (len(gs),) + x.shape), np.broadcast_to(w, (len(gs),) + w.shape), gs,
                              np.full(len(gs), a))
    return gs, pc, vc


def _own_faces(source: Source, labels: np.ndarray, P: np.ndarray, V: np.ndarray, dist: np.ndarray,
               scales: tuple[float, ...], grid: TiltGrid, chunk_size: int) -> tuple[Source, np.ndarray | None]:
    """Members far from their held prototype (``labels`` (N,); their distance ``dist`` (N,) by the tilt search over
    the prototype's copies above ``OWN_FACE_FACTOR`` x the prototype's median) turned onto each of their own stable
    resting faces (``faces.stable_ups``: the exact directions the seeding's stable-face matrix searches,
    ``seeding.FaceDistance``), each copy re-normalised by its own footprint and height as the tilt search does
    (``tilts.copy_geometries``), and matched against the prototype on its canonical face (yaw x scale).  A member
    whose best copy is nearer than ``dist`` is replaced by that copy.  Returns the source with those members
    replaced and each object's rotation onto its face, copy frame <- object frame (N, 3, 3) (identity when not
    replaced), or (source, None) when none is.

    Why: on the seed-1 demo with ``seed_check``, two L brackets lie on a face no other L bracket lies on.  The
    prototype's copies, at any tilt of the grid and at the exact direction the member's own face implies, fit them
    at ~3x its other members' distance (0.023-0.032 against 0.005-0.008), so the held labels averaged them into the
    prototype as they lay, blurring it (and its single-view calibration); turned onto their own face they fit it
    at 0.013 (0.0105 once the prototype is built with them so) and are recorded on that face."""
    N = len(source)
    med = np.array([np.median(dist[labels == k]) if np.any(labels == k) else np.inf for k in range(len(P))])
    far = dist > OWN_FACE_FACTOR * med[labels]
    if not far.any():
        return source, None
    bank = PoseBank(P, V, scales)
    turned, pre = {}, None
    aspect = _source_aspect(source).copy()
    for i0, i1 in _chunks(N, chunk_size):
        rows = np.flatnonzero(far[i0:i1])
        if not rows.size:
            continue
        x, w = source.read(i0, i1)
        x, w = np.asarray(x, np.float32), np.asarray(w, np.float32)

        def copies(j: int):
            return _turned_copies(x[j], w[j], float(aspect[i0 + j]), grid)

        for j, got in zip(rows, pooled(copies, rows.tolist())):
            if got is None:
                continue
            i = i0 + int(j)
            gs, pc, vc = got
            d = bank.match(pc, vc).D[:, labels[i]]
            d = np.where(np.isfinite(d), d, np.inf)
            b = int(np.argmin(d))
            if d[b] < dist[i]:
                if pre is None:
                    pre = np.broadcast_to(np.eye(3), (N, 3, 3)).copy()
                turned[i] = (pc[b], vc[b])
                aspect[i] = gs[b].z_max / gs[b].rho_max
                pre[i] = gs[b].M
    if pre is None:
        return source, None
    return _TurnedSource(source, turned, aspect), pre


def _face_assign(source: Source, res: _Result, *, scales: tuple[float, ...], chunk_size: int, grid: TiltGrid
                 ) -> tuple[np.ndarray, Source, np.ndarray | None]:
    """Each object's prototype by the lesser of two searches against the fit's prototypes ``res.P``, ``res.V``: the
    tilt search over the prototypes' tilted copies (the fit's own assignment), and the object's own copies turned
    onto each of its other stable resting faces (:func:`_turned_copies`) against the prototypes as they stand
    (yaw x scale).  Returns labels (N,) (the fit's where an object matches nothing), the source with every object
    whose label came from a turned copy replaced by that copy, and each object's rotation onto it, copy frame <-
    object frame (N, 3, 3), or None when no object is turned (as :func:`_own_faces`).

    Why (``[mine] face_assign``): a prototype is mostly its upright members' mean, so its tilted copy knows little of
    the faces those members stood on, and an object lying on a face few of its class lie on fits another class's
    blurred mean copy a little better than its own.  Seen the other way round, turned back upright, it is compared
    with what its class's members showed.  On the touching demo seed 1 (masks) the fit's 6 misplaced objects were
    such: 3 of them the only one of their class on their face, 2 one of 2, every one's nearest object on the
    stable-face matrix of its own class; the lesser distance placed 4 of the 6 right with the fit's prototypes."""
    N, K = len(source), res.P.shape[0]
    bank = make_bank(res.P, res.V, scales, grid, res.aspect, grid.refine_margin, grid.coarse_bins)
    upright = PoseBank(res.P, res.V, scales)
    aspect = _source_aspect(source)
    labels = np.asarray(res.labels, np.int64).copy()
    turned, pre, aspect_t = {}, None, aspect.copy()
    for i0, i1 in _chunks(N, chunk_size):
        x, w = source.read(i0, i1)
        x, w = np.asarray(x, np.float32), np.asarray(w, np.float32)
        d = np.asarray(bank.match(x, w).D, np.float64)
        d = np.where(np.isfinite(d), d, np.inf)
        # each object's copies one at a time (ordered_map holds a few): only the one it is turned to is kept
        for j, got in enumerate(ordered_map(lambda j: _turned_copies(x[j], w[j], float(aspect[i0 + j]), grid),
                                            list(range(i1 - i0)))):
            i = i0 + j
            du = np.full(K, np.inf)
            if got is not None:
                gs, pc, vc = got
                m = np.asarray(upright.match(pc, vc).D, np.float64)
                m = np.where(np.isfinite(m), m, np.inf)
                du, b = m.min(axis=0), m.argmin(axis=0)
            both = np.minimum(d[j], du)
            if not np.isfinite(both).any():
                continue  # matches nothing: the fit's label stands
            labels[i] = k = int(np.argmin(both))
            if du[k] < d[j, k]:
                c = int(b[k])
                turned[i] = (pc[c].copy(), vc[c].copy())
                aspect_t[i] = gs[c].z_max / gs[c].rho_max
                if pre is None:
                    pre = np.broadcast_to(np.eye(3), (N, 3, 3)).copy()
                pre[i] = gs[c].M
    if pre is None:
        return labels, source, None
    return labels, _TurnedSource(source, turned, aspect_t), pre


def unmoved_clusters(before: np.ndarray, after: np.ndarray, n_clusters: int) -> np.ndarray:
    """(K,) bool: the clusters no object joined or left between two partitions ``before``, ``after`` (N,)."""
    moved = np.asarray(before) != np.asarray(after)
    keep = np.ones(n_clusters, bool)
    keep[np.asarray(before)[moved]] = False
    keep[np.asarray(after)[moved]] = False
    return keep


def _kept_from(held: _Result, fit: _Result, keep: np.ndarray) -> _Result:
    """The held fit ``held`` (made with ``keep``: those prototypes and aspects already the fit's) with the clusters
    ``keep`` (K,) bool (their members the same in both) exactly as the fit ``fit`` left them: their members' poses, distances and rotations onto a face (none:
    they lie as they are), and the moments of the symmetry test.

    Why (``[mine] face_assign_hold_unmoved``): the held fit updates every prototype again, the clusters nothing moved
    too, from members of which some now lie turned onto their own faces (``_face_assign`` turns every object whose
    turned copy beats the tilt search, moved or not), and re-estimates their aspects; its final pass holds every
    label, so its tilt refinement searches each member's own prototype only (``TiltBank.match_spectra(focus=...)``).
    So those clusters' prototypes and single-view calibration moved (the default demo seed 0, one update: the hand
    plane's, none left or joined, single-view sigma 0.210 -> 0.301; all-stereo seed 1 the L bracket's 0.086 -> 0.366,
    unknown AUROC 0.811 -> 0.690).  Kept, they do not (all-stereo seed 1 0.810), but three other demos lose a little
    (README "Touching against apart")."""
    m = keep[fit.labels]  # (N,) the kept clusters' members; their prototypes and aspects _held_fit(keep=) kept
    out = []
    for a, b in ((held.yaw, fit.yaw), (held.scale, fit.scale), (held.dist, fit.dist), (held.tilt, fit.tilt)):
        if a is None or b is None:
            out.append(a)
            continue
        a = np.array(a, copy=True)
        a[m] = b[m]
        out.append(a)
    yaw, scale, dist, tilt = out
    moments = held.moments
    if moments is not None and fit.moments is not None:
        moments = tuple(np.where(keep.reshape((-1,) + (1,) * (np.ndim(h) - 1)), f, h)
                        for h, f in zip(held.moments, fit.moments))
    pre = held.pre
    if pre is not None:
        pre = pre.copy()
        pre[m] = np.eye(3) if fit.pre is None else fit.pre[m]
    cost = float(dist[np.isfinite(dist)].sum())
    out = _Result(held.P, held.V, held.labels, yaw, scale, dist, cost, held.n_iter, moments, tilt, held.aspect, pre)
    out.src = held.src
    return out


SYNC_MIN_MEMBERS = 3   # _synced_prototypes: clusters with fewer upright members keep the fit's prototype
SYNC_WEIGHT_POWER = 4.0  # the pairs' weights raised to this in the synchronisation (the sharp pairs lead)
SYNC_ROUNDS = 3        # leave-one-out rounds after the synchronisation
SYNC_SHARP = 0.1       # posesync.member_order: the mean pair weight from which the members show a preferred yaw
SYNC_CONSISTENT = 0.95  # ... and the consistency at which their pairs agree modulo 360 / n
SYNC_AGREE_DEG = 15.0  # the fit's upright members within this of the synchronised yaws (one common turn removed): kept
SYNC_MAX_MEMBERS = 32  # at most this many upright members of a cluster synchronised (evenly spaced in member order; the
                       # pairs' searches and their (n, n, scales, A) distances grow as n^2); the rest join as the others


def _loo_yaws(x: np.ndarray, w: np.ndarray, yaw: np.ndarray, scale: np.ndarray, scales: tuple[float, ...],
              rounds: int) -> tuple[np.ndarray, np.ndarray]:
    """Each member x (n, C, R, A, H), w (n, R, A, H) searched (yaw x scale) against the mean of the others aligned at
    their current poses, ``rounds`` times (all members at once each round): yaw, scale (n,)."""
    n = len(x)
    for _ in range(rounds):
        xa, wa = align_to_prototype(x.copy(), w.copy(), yaw, scale)
        num, den = (wa[:, None] * xa).sum(axis=0), wa.sum(axis=0)
        new_yaw, new_scale = yaw.copy(), scale.copy()
        for i in range(n):
            P, V = weighted_means((num - wa[i][None] * xa[i])[None], (den - wa[i])[None], np.array([n - 1]))
            m = PoseBank(P, V, scales).match(x[i:i + 1], w[i:i + 1])
            if np.isfinite(m.D[0, 0]):
                new_yaw[i], new_scale[i] = m.yaw_deg[0, 0], m.scale[0, 0]
        if np.allclose(new_yaw, yaw) and np.array_equal(new_scale, scale):
            break
        yaw, scale = new_yaw, new_scale
    return yaw, scale


def _synced_prototypes(source: Source, res: _Result, scales: tuple[float, ...], chunk_size: int,
                       grid: TiltGrid | None) -> tuple[np.ndarray, np.ndarray, dict, np.ndarray]:
    """``[mine] pose_sync``: each cluster's prototype rebuilt from its upright members (the identity tilt, not turned
    onto a face of their own) aligned to one another rather than to the fit's prototype: their yaws synchronised
    from every pair's search (``posesync``), refined leave-one-out (:func:`_loo_yaws`), both on the features without
    their first azimuthal harmonic (``posesync.without_first_harmonic``); the prototype is their weighted mean at those
    poses.  A cluster is rebuilt only when its members show a preferred yaw (``posesync.member_order`` >= 1) and the
    fit's yaws of those members disagree with the synchronised ones by more than ``SYNC_AGREE_DEG`` once one common turn
    is removed (modulo 360 / that order): a fit that aligned them already keeps its prototype, built with every face's
    members.  Returns P (K, C, R, A, H), V (K, R, A, H) (the fit's where not rebuilt), per rebuilt cluster k (member
    rows (n,; at most ``SYNC_MAX_MEMBERS``, evenly spaced: the others are searched as the tilted ones), yaw (n,), scale (n,), their aligned moments (s0, s1, s2, sw2) as the symmetry test reads them, the
    order), and the order about up each cluster's members show (K,) (-1: none shown, or too few upright members).

    Why the members keep these yaws (the search is not run again for them): a prototype of n members keeps about
    1 / sqrt(n) of their off-centre patterns, and each member's own pattern lines up with that remnant before the
    thin part does (a synthetic handled body, tests/test_posesync.py: synchronised within 1 degree, searched again
    against the synchronised prototype 5-163 degrees out)."""
    from .memberknn import cluster_members
    from .posesync import member_order, pairwise_yaws, synchronize_yaws, without_first_harmonic
    K = res.P.shape[0]
    P, V = res.P.copy(), res.V.copy()
    done: dict = {}
    upright = np.ones(len(res.labels), bool) if grid is None or res.tilt is None else grid.is_upright(res.tilt)
    if res.pre is not None:
        upright &= np.all(np.abs(res.pre - np.eye(3)) < 1e-9, axis=(1, 2))
    upright &= np.isfinite(res.dist)
    orders = np.full(K, -1, np.int64)
    members = np.where(upright, res.labels, -1)
    for k in range(K):
        idx = cluster_members(members, k, SYNC_MAX_MEMBERS)
        if len(idx) < SYNC_MIN_MEMBERS:
            continue
        x, w = _gather(source, idx, chunk_size)
        xh = without_first_harmonic(x)
        theta, weight = pairwise_yaws(xh, w, scales)
        if not np.any(weight > 0):
            continue
        orders[k] = order = member_order(theta, weight, sharp=SYNC_SHARP, consistent=SYNC_CONSISTENT,
                                         power=SYNC_WEIGHT_POWER)
        if order < 1:
            continue  # no preferred yaw: nothing to align
        yaw, _ = synchronize_yaws(theta, weight ** SYNC_WEIGHT_POWER)
        yaw, scale = _loo_yaws(xh, w, yaw, np.ones(len(idx)), scales, SYNC_ROUNDS)
        # the fit's yaws agree with the synchronised ones up to one common turn (modulo the members' order): the fit
        # aligned these members already, and its prototype (with every member's face) stays
        d = np.deg2rad(order * (np.asarray(res.yaw, np.float64)[idx] - yaw))
        if np.max(np.abs(np.angle(np.exp(1j * d) * np.conj(np.mean(np.exp(1j * d)))))) <= np.deg2rad(order * SYNC_AGREE_DEG):
            continue
        xa, wa = align_to_prototype(x, w, yaw, scale)
        s0, s1 = wa.sum(axis=0), (wa[:, None] * xa).sum(axis=0)
        Pk, Vk = weighted_means(s1[None], s0[None], np.array([len(idx)]))
        P[k], V[k] = Pk[0], Vk[0]
        done[k] = (idx, yaw, scale, (s0, s1, (wa[:, None] * xa * xa).sum(axis=0), (wa * wa).sum(axis=0)), order)
    return P, V, done, orders


POLISH_MARGIN = 0.02      # pose_polish: a member takes the polished pose only when its distance is below this share under
                          # the fit's (0.02 measured best of 0 / 0.02 / 0.05 / 0.1 on four demo libraries: README "Members' poses
                          # polished against the final prototypes")
POLISH_MIN_TURN_DEG = 20.0  # pose_polish: a member takes the polished pose only when it turns it by more than this many
                          # degrees (geodesic) from the fit's: the polish corrects basins the search missed, not its fine
                          # step (0 / 10 / 20 measured: README "Members' poses polished"; 0 lost on the upright demo)
POLISH_NSIDES = (8, 16)   # pose_polish: the local levels around a tilted member's best finest-level direction (7.3 and
                          # 3.7 degrees apart)


def _polish_dirs(grid: TiltGrid) -> np.ndarray:
    """The polish's candidate ups (M, 3) in the prototype frame: +z (the prototype itself), then every direction of the
    grid's finest level."""
    return np.concatenate([np.array([[0.0, 0.0, 1.0]]), grid.dirs[grid.level(len(grid.nsides) - 1)]])


def _polished_rotations(source: Source, labels: np.ndarray, dist: np.ndarray, rotation: np.ndarray, P: np.ndarray,
                        V: np.ndarray, aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid, chunk_size: int,
                        bank: TiltBank | None = None, own_out: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """``[mine] pose_polish``: each member searched once more (yaw x scale) against its own final prototype P[k]
    (canonical frame) on every direction of the grid's finest level and on the prototype itself (+z, as the tilt
    search takes the identity), then, when the best is tilted, on the HEALPix levels ``POLISH_NSIDES`` within 1.5 of
    their spacings of the best so far (``rotations.up_grid``).  A member takes the pose so found, Rz(yaw) tilt(up)
    (object frame <- canonical prototype frame), when its distance is below (1 - ``POLISH_MARGIN``) x ``dist``, the fit's
    distance at the pose it has (N,); ``rotation`` (N, 3, 3) the fit's.  Labels, prototypes, distances and scales stay
    the fit's: only the reported poses move.  Returns the rotations (N, 3, 3) and which members moved (N,).

    Why: the fit's search refines only each object's 3 best (prototype, coarse tilt) pairs of the 12-direction level
    over every prototype, so a member whose true tilt lies between the coarse directions of its own prototype is left
    where a coarse basin led (an L bracket on a rare face 37 degrees out, its true up's copy 27% nearer), and members
    turned onto their own faces or synchronised by ``pose_sync`` keep poses no search against the final prototype
    chose.

    ``own_out`` (``[mine] pose_polish_own_out``): the member's own pose is judged on the candidates' footing and without
    its own share of the prototype: every member carried into the prototype's frame at its pose
    (:func:`member_in_frame`), the cluster's aligned sums taken from them, and each member searched (yaw x scale)
    against the prototype of the others (:func:`left_out`) resampled at its own up and at every candidate up (+z too:
    one footing); the best candidate whose up is more than ``POLISH_MIN_TURN_DEG`` from the member's is taken when its
    distance is below (1 - ``OWN_OUT_MARGIN``) x its own up's; ``OWN_OUT_ROUNDS`` rounds, the sums rebuilt from the
    members' poses before each (:func:`_polished_own_out`).  Without it the fit's ``dist``
    is the reference, which for a member matched turned onto its own face (``face_assign``) or at the identity tilt
    is on another footing (the prototype itself: L brackets 0.008 against 0.026-0.029 at their pose resampled), and
    which counts the member's own pull on its prototype (a tenth of a cluster of ten: its distance 15-25% lower)."""
    from .posesearch import pose_distances
    if own_out:
        return _polished_own_out(source, labels, rotation, P, V, aspect, scales, grid, chunk_size, bank)
    R = np.array(rotation, np.float64, copy=True)
    moved = np.zeros(len(labels), bool)
    bank = bank if bank is not None else TiltBank(P, V, aspect, scales, grid)
    dirs = _polish_dirs(grid)
    local = [(rot.up_grid(n), 1.5 * rot.grid_spacing_deg(n)) for n in POLISH_NSIDES]
    for k in range(P.shape[0]):
        rows = np.flatnonzero((labels == k) & np.isfinite(dist))
        if not rows.size:
            continue
        Pc, Vc = bank.copies_at(k, dirs)
        Pc[0], Vc[0] = P[k], V[k]  # the identity: the prototype itself, not a resampled copy (the tilt search's rule)
        for r0 in range(0, rows.size, chunk_size):
            part = rows[r0:r0 + chunk_size]
            x, w = _gather(source, part, chunk_size)
            x, w = np.asarray(x, np.float32), np.asarray(w, np.float32)
            pm = pose_distances(x, w, Pc, Vc, scales=scales)
            best = np.argmin(pm.D, axis=1)
            for i, r in enumerate(part):
                b = int(best[i])
                u, d, y = dirs[b], float(pm.D[i, b]), float(pm.yaw_deg[i, b])
                if not np.isfinite(d):
                    continue
                if b != 0:
                    for cand_all, radius in local:
                        cand = cand_all[rot.angle_between_deg(cand_all, u[None]) <= radius]
                        pc, vc = bank.copies_at(k, cand)
                        q = pose_distances(x[i:i + 1], w[i:i + 1], pc, vc, scales=scales)
                        j = int(np.argmin(q.D[0]))
                        if q.D[0, j] < d:
                            u, d, y = cand[j], float(q.D[0, j]), float(q.yaw_deg[0, j])
                if d < (1.0 - POLISH_MARGIN) * float(dist[r]):
                    Rn = rot.tilt_yaw_to_matrix(u, y)
                    if float(rot.geodesic_deg(Rn, rotation[r])) > POLISH_MIN_TURN_DEG:
                        R[r] = Rn
                        moved[r] = True
    return R, moved


def member_in_frame(x: np.ndarray, w: np.ndarray, a: float, R: np.ndarray, P: np.ndarray, V: np.ndarray,
                    scales: tuple[float, ...], grid: TiltGrid) -> tuple[np.ndarray, np.ndarray]:
    """A member x (C, R, A, H), w (R, A, H) of aspect ``a`` at rotation R (object frame <- prototype frame) carried into
    its prototype's frame: turned so that the prototype's up, R e_z in the object frame, points up and re-normalised by
    that pose's footprint and height (``tilts.copy_geometries``, as ``_turned_copies`` turns a member onto its own
    faces), then its yaw and scale against the prototype P (C, R, A, H), V (R, A, H) itself undone
    (``align_to_prototype``): (C, R, A, H), (R, A, H) float64 as it enters the prototype's weighted mean."""
    from .posesearch import pose_distances
    from .tilts import _resample_copies, copy_geometries, solid_points
    up = np.asarray(R, np.float64)[:, 2]
    if np.allclose(up, [0.0, 0.0, 1.0], atol=1e-9):
        xt, wt = np.asarray(x, np.float32), np.asarray(w, np.float32)
    else:
        gs = copy_geometries(x.shape[1:], a, up[None], grid, solid_points(x[0], w, a, grid))
        xt, wt = _resample_copies(x[None], w[None], gs, np.array([a]))
        xt, wt = xt[0], wt[0]
    m = pose_distances(xt[None], wt[None], P[None], V[None], scales=scales)
    xa, wa = align_to_prototype(np.asarray(xt, np.float64)[None], np.asarray(wt, np.float64)[None],
                                m.yaw_deg[:, 0].astype(np.float64), m.scale[:, 0].astype(np.float64))
    return xa[0], wa[0]


def left_out(num: np.ndarray, den: np.ndarray, n: int, xa: np.ndarray, wa: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The weighted mean of ``n`` members (``weighted_means`` of their aligned sums num = sum w x (C, R, A, H), den = sum
    w (R, A, H)) without one of them, xa (C, R, A, H), wa (R, A, H) (one of the summed members): P' = (num - wa xa) /
    (den - wa), V' = (den - wa) / (n - 1), a cell whose remaining mean weight is at most ``MIN_MEAN_WEIGHT`` unseen
    (0, 0), as ``weighted_means`` leaves it."""
    if n < 2:
        raise ValueError(f"a member can be left out of a prototype of at least 2 members, got {n}")
    P2, V2 = weighted_means((num - wa[None] * xa)[None], np.maximum(den - wa, 0.0)[None], np.array([n - 1]))
    return P2[0], V2[0]


def _turned_away(ups: np.ndarray, R0: np.ndarray) -> np.ndarray:
    """Which candidate ups (M, 3) (prototype frame) lie more than ``POLISH_MIN_TURN_DEG`` from R0's (3, 3): another
    face (a yaw about the member's own up is pose_sync's)."""
    return rot.angle_between_deg(np.asarray(ups, np.float64), np.asarray(R0, np.float64)[2][None]) > POLISH_MIN_TURN_DEG


def own_out_choice(x: np.ndarray, w: np.ndarray, R0: np.ndarray, aligned: tuple[np.ndarray, np.ndarray],
                   sums: tuple[np.ndarray, np.ndarray, int], aspect: float, scales: tuple[float, ...], grid: TiltGrid
                   ) -> tuple[float, float, np.ndarray, float]:
    """One member x (C, R, A, H), w (R, A, H) at rotation R0 of its prototype (aspect ``aspect``; ``aligned`` = the
    member carried into the prototype's frame, :func:`member_in_frame`; ``sums`` = (num, den, n): its members' aligned
    sums, this member's among them) searched against that prototype without it (:func:`left_out`), its own
    pose and every candidate on one footing (resampled copies, +z too): the distance at its own up (yaw x scale),
    and the best pose turning away from R0 (:func:`_turned_away`) over the grid's finest level (and +z),
    refined on ``POLISH_NSIDES`` around it: (d_own, d, up, yaw); d = inf when no such pose."""
    from .posesearch import pose_distances
    dirs = _polish_dirs(grid)
    p2, v2 = left_out(sums[0], sums[1], sums[2], *aligned)
    own = TiltBank(p2[None], v2[None], np.array([aspect]), scales, grid)
    x1, w1 = x[None], w[None]
    pc, vc = own.copies_at(0, np.concatenate([np.asarray(R0)[2][None], dirs]))
    pm = pose_distances(x1, w1, pc, vc, scales=scales)
    d_own, D, Y = float(pm.D[0, 0]), pm.D[0, 1:], pm.yaw_deg[0, 1:]
    far = _turned_away(dirs, R0) & np.isfinite(D)
    if not far.any():
        return d_own, np.inf, np.array([0.0, 0.0, 1.0]), 0.0
    b = int(np.flatnonzero(far)[np.argmin(D[far])])
    u, d, y = dirs[b], float(D[b]), float(Y[b])
    for cand_all, radius in [(rot.up_grid(m), 1.5 * rot.grid_spacing_deg(m)) for m in POLISH_NSIDES]:
        cu = cand_all[rot.angle_between_deg(cand_all, u[None]) <= radius]
        pcl, vcl = own.copies_at(0, cu)
        ql = pose_distances(x1, w1, pcl, vcl, scales=scales)
        ok = _turned_away(cu, R0) & np.isfinite(ql.D[0])
        if ok.any():
            j = int(np.flatnonzero(ok)[np.argmin(ql.D[0][ok])])
            if ql.D[0, j] < d:
                u, d, y = cu[j], float(ql.D[0, j]), float(ql.yaw_deg[0, j])
    return d_own, d, u, y


def own_out_screen(x: np.ndarray, w: np.ndarray, R: np.ndarray, bank: TiltBank, scales: tuple[float, ...],
                   grid: TiltGrid) -> np.ndarray:
    """Which members x (n, C, R, A, H), w (n, R, A, H) at rotations R (n, 3, 3) :func:`own_out_choice` should search
    (n,) bool: against the whole prototype (``bank``, its one prototype), each member's best pose onto another up
    (:func:`_turned_away`) over the grid's finest level and +z is within ``OWN_OUT_SCREEN`` x its distance at its own up
    (both resampled copies: one footing).  A member with no other pose there is not searched."""
    from .posesearch import pose_distances
    dirs = _polish_dirs(grid)
    pc, vc = bank.copies_at(0, dirs)
    D = pose_distances(x, w, pc, vc, scales=scales).D
    po, vo = bank.copies_at(0, np.asarray(R, np.float64)[:, 2])   # each member's own up, in one resampling
    out = np.zeros(len(x), bool)
    for i in range(len(x)):
        far = _turned_away(dirs, R[i]) & np.isfinite(D[i])
        if not far.any():
            continue
        d_own = float(pose_distances(x[i:i + 1], w[i:i + 1], po[i:i + 1], vo[i:i + 1], scales=scales).D[0, 0])
        out[i] = not np.isfinite(d_own) or float(np.min(D[i][far])) < OWN_OUT_SCREEN * d_own
    return out


OWN_OUT_MARGIN = 0.05  # pose_polish_own_out: a member moves when the best pose onto another up is this share below its
# own pose's distance (both against its prototype without it).  Run post hoc from the circle_support libraries' final
# poses (all-stereo seed 1, default seed 1, touching seed 1; members above / below 20 deg of rotation error): 0.02 moved
# 11 right and turned 8 right ones wrong (upright jugs, an L bracket, tile boxes), 0.05 9 right and 6 wrong; mined again
# with 0.05 (the polish starting from the fit's poses) the three lose 5, 5 and 3 turned-over members (README)
OWN_OUT_ROUNDS = 3  # pose_polish_own_out: rounds of (the prototype rebuilt from its members at their poses, every member
# decided against it without itself, the moves made together); stops early when none moves
OWN_OUT_SCREEN = 1.5  # pose_polish_own_out: a member of a cluster of at least OWN_OUT_SCREEN_MIN is searched without its own
# share only when, against the whole prototype (on the same footing: resampled copies at its own up and at the finest
# level), its best pose onto another up is within this many times its own pose's distance.  Leaving one member of n out
# raises its own pose's distance by its pull on the prototype (15-25% measured in clusters of ten, README "Members' poses
# decided without their own pull") and the move needs the other pose 5% below that: a member screened out would need a
# pull above 1.5 x 0.95 - 1 = 43%.  Its cost is then one batched search of the cluster against the shared copies
# instead of one left-out prototype's copies per member.  inf: every member searched (the unscreened rule)
OWN_OUT_SCREEN_MIN = 8  # pose_polish_own_out: clusters with fewer members are not screened (one member's pull on a small
# cluster is large: half of a cluster of two)


def _polished_own_out(source: Source, labels: np.ndarray, rotation: np.ndarray, P: np.ndarray, V: np.ndarray,
                      aspect: np.ndarray, scales: tuple[float, ...], grid: TiltGrid, chunk_size: int,
                      bank: TiltBank | None) -> tuple[np.ndarray, np.ndarray]:
    """``_polished_rotations(own_out=True)``: per cluster of two or more, ``OWN_OUT_ROUNDS`` rounds: the members'
    aligned sums at their poses (:func:`member_in_frame`, aligned against the fit's prototype in the first round and
    against the rebuilt one after), then every member by :func:`own_out_choice` against those sums without it, moved
    when the best pose onto another up is below (1 - ``OWN_OUT_MARGIN``) x its own pose's distance."""
    R = np.array(rotation, np.float64, copy=True)
    moved = np.zeros(len(labels), bool)
    obj_aspect = _source_aspect(source)
    for k in range(P.shape[0]):
        rows = np.flatnonzero(labels == k)
        if rows.size < 2:
            continue
        ref = (P[k], V[k])
        for _ in range(OWN_OUT_ROUNDS):
            num, den, aligned = 0.0, 0.0, {}
            for r0 in range(0, rows.size, chunk_size):
                part = rows[r0:r0 + chunk_size]
                x, w = _gather(source, part, chunk_size)
                for i, r in enumerate(part):
                    xa, wa = member_in_frame(np.asarray(x[i], np.float32), np.asarray(w[i], np.float32),
                                             float(obj_aspect[r]), R[r], ref[0], ref[1], scales, grid)
                    aligned[r] = (xa, wa)   # each member's share, left out again below
                    num, den = num + wa[None] * xa, den + wa
            Pk, Vk = weighted_means(num[None], den[None], np.array([rows.size]))
            ref = (Pk[0], Vk[0])
            new = {}
            screened = rows.size >= OWN_OUT_SCREEN_MIN and np.isfinite(OWN_OUT_SCREEN)
            shared = TiltBank(ref[0][None], ref[1][None], np.array([float(aspect[k])]), scales, grid) if screened else None
            for r0 in range(0, rows.size, chunk_size):
                part = rows[r0:r0 + chunk_size]
                x, w = _gather(source, part, chunk_size)
                near = (own_out_screen(np.asarray(x, np.float32), np.asarray(w, np.float32), R[part], shared, scales, grid)
                        if screened else np.ones(len(part), bool))
                for i, r in enumerate(part):
                    if not near[i]:
                        continue
                    d_own, d, u, y = own_out_choice(np.asarray(x[i], np.float32), np.asarray(w[i], np.float32), R[r],
                                                    aligned[r], (num, den, rows.size), float(aspect[k]), scales, grid)
                    if np.isfinite(d_own) and d < (1.0 - OWN_OUT_MARGIN) * d_own:
                        new[r] = rot.tilt_yaw_to_matrix(u, y)
            if not new:
                break
            for r, Rn in new.items():
                R[r] = Rn
                moved[r] = True
    return R, moved


def _source_aspect(source: Source) -> np.ndarray:
    """The source's per-object aspects (N,) (needed by the tilt search)."""
    a = getattr(source, "aspect", None)
    if a is None:
        raise ValueError("a tilt search needs the objects' aspects: give the source an ``aspect`` (N,) array")
    return np.asarray(a, np.float64)


class PoseKMeans:
    """Pose-aware k-means over gridded objects read from a source (see the module docstring).

    Parameters
    ----------
    n_clusters : K, number of prototypes.
    scales : scale factors searched per pose (1.0 = no scale search).
    n_init : restarts with different seeds (``seeding.PoseSeeder``); the lowest final cost is kept.
    max_iter, tol : Lloyd iteration cap and relative cost-change tolerance.
    chunk_size : objects read and matched at once (bounds memory).
    random_state : int or None; the only source of randomness.
    sample_size : objects used for seeding and, for large N, for the restarts.
    symmetry_factor : how far a rotation may exceed the members' scatter and still count as a symmetry
        (``factor`` of :func:`protomine.mine.symmetry.detect_symmetry`).
    symmetry_tol : the smallest fraction of a prototype's variance a rotation must move to break a symmetry
        (``tol`` of :func:`protomine.mine.symmetry.detect_symmetry`).
    symmetry_break_effect : a rotation moving more than this fraction of the prototype's variance is no symmetry
        whatever symmetry_factor says (``break_effect`` of :func:`protomine.mine.symmetry.detect_symmetry`; 0 = off).
    init : optional (P (K, C, R, A, H), V (K, R, A, H)) starting prototypes (skips seeding and restarts).
    cache_mb : memory budget for object spectra kept between passes (about 0.1 MB per object on an
        8 x 36 x 12 grid with 5 channels); objects beyond it are re-read and re-transformed every pass.
    progress : optional progress reporter (:mod:`protomine.progress`): one bar per run of Lloyd passes.
    tilts : a :class:`protomine.mine.tilts.TiltGrid` of up directions to search besides yaw and scale (3-D
        poses; the source must then carry ``aspect`` (N,)), or None for the yaw-only search.  With tilts,
        ``init`` may hold a third array, the prototypes' aspects (K,).
    face_pairs : with tilts, the seeding matrix searches each object's stable resting directions
        (``seeding.FaceDistance``) instead of yaw and scale only.
    seed_check : with ``face_pairs``, each restart's fitted partition is compared with the partition it started
        from by their k-medoids cost on the stable-face matrix (``seeding.medoid_cost``, the objective the seeding
        lowered), and the seed partition is kept, its prototypes updated with the labels held fixed, unless the
        fit's cost is lower; the restarts are compared by that cost too (:meth:`_fit_restarts`).
    face_assign : with tilts, after the fit each object takes the prototype of the lesser distance of the tilt search
        and of its own copies turned onto its other stable faces against the prototypes as they stand; a partition
        so moved is held (:meth:`_face_reassign`, ``[mine] face_assign``).
    face_updates : with ``face_assign``, the held fit's prototype updates (:func:`_held_fit`; ``HELD_UPDATES``, 3);
        0 keeps the fit's prototypes, only the labels and poses move, each object's pose from the search that placed
        it (``[mine] face_assign_updates``).
    face_hold_unmoved : with ``face_assign``, the clusters no object joined or left keep the fit's prototypes,
        aspects, their members' poses and distances and the symmetry test's moments to the bit; only the others are
        updated (:func:`_kept_from`, ``[mine] face_assign_hold_unmoved``).
    seed_veto_k : > 0, with ``face_pairs``, when the seed partition is not held: every object of the seeding matrix
        the fit moved out of its seed cluster goes back when its k nearest objects on the stable-face matrix among
        those both partitions keep in its seed cluster are nearer (mean distance) than its k nearest among those both
        keep in its new cluster (``seeding.neighbour_vetoed``); a partition so changed is held (:func:`_held_fit`
        from the fit's prototypes, ``VETO_UPDATES`` updates, far members turned onto their own faces with
        ``VETO_OWN_FACES``, the clusters no object joined or left kept as the fit left them, :func:`_kept_from`;
        ``[mine] seed_veto_k``; 0 = off).
    pose_sync : after the fit, each prototype rebuilt from its upright members aligned to one another (yaw
        synchronisation of every pair's search on the features without their first azimuthal harmonic, refined leave
        one out; :func:`_synced_prototypes`, :meth:`_pose_sync`; ``[mine] pose_sync``).
    pose_polish : with tilts, at the end each member's pose searched once more against its own final prototype on
        every finest-level direction and locally finer, taken when clearly nearer (:func:`_polished_rotations`;
        ``[mine] pose_polish``); labels, prototypes and distances unchanged.  ``polished_`` (N,): the members moved.
    seed_hold_t : > 0, with ``face_pairs`` and without ``seed_check``: the seed partition is held as ``seed_check``
        holds it only when the fit's partition is significantly worse on the stable-face matrix: the paired t over
        the seeding matrix's objects of their distance to their cluster's medoid, fit minus seed
        (``seeding.paired_worse_t``), above this; otherwise the fit stands unchanged (0 = off).

    Fitted with tilts besides the above: ``tilt_`` (N,) indices into ``tilts.dirs`` (in the search frame),
    ``rotation_`` (N, 3, 3) object frame <- canonical prototype frame, ``up_`` (N, 3) each member's up
    direction in the canonical frame, ``aspect_`` (K,).  Without tilts ``rotation_`` is the yaw rotation
    and ``up_`` is +z.
    """

    def __init__(self, *, n_clusters: int, scales: Sequence[float] = (1.0,), n_init: int = 4, max_iter: int = 30,
                 tol: float = 1e-4, chunk_size: int = 2048, random_state: int | None = None,
                 sample_size: int = 4096, symmetry_factor: float = sym.DEFAULT_FACTOR, symmetry_tol: float = sym.DEFAULT_TOL,
                 init: tuple | None = None, cache_mb: float = 384.0, progress=None,
                 tilts: TiltGrid | None = None, face_pairs: bool = False, seed_check: bool = False,
                 seed_hold_t: float = 0.0, face_assign: bool = False,
                 face_updates: int = HELD_UPDATES, face_hold_unmoved: bool = False, symmetry_break_effect: float = 0.0,
                 pose_sync: bool = False, seed_veto_k: int = 0, pose_polish: bool = False, polish_own_out: bool = False):
        self.n_clusters = n_clusters
        self.pose_polish = pose_polish
        self.polish_own_out = polish_own_out
        self.seed_veto_k = seed_veto_k
        self.pose_sync = pose_sync
        self.symmetry_break_effect = symmetry_break_effect
        self.face_assign = face_assign
        self.face_updates = face_updates
        self.face_hold_unmoved = face_hold_unmoved
        self.face_pairs = face_pairs
        self.seed_check = seed_check
        self.seed_hold_t = seed_hold_t
        self.scales = scales
        self.n_init = n_init
        self.max_iter = max_iter
        self.tol = tol
        self.chunk_size = chunk_size
        self.random_state = random_state
        self.sample_size = sample_size
        self.symmetry_factor = symmetry_factor
        self.symmetry_tol = symmetry_tol
        self.init = init
        self.cache_mb = cache_mb
        self.tilts = tilts
        self.progress = progress

    # --- validation ------------------------------------------------------------------------

    def _validate(self, source: Source) -> tuple[float, ...]:
        if not self.cache_mb >= 0:
            raise ValueError(f"cache_mb must be >= 0, got {self.cache_mb!r}")
        for name in ("n_clusters", "n_init", "max_iter", "chunk_size", "sample_size"):
            v = getattr(self, name)
            if not isinstance(v, (int, np.integer)) or v < 1:
                raise ValueError(f"{name} must be a positive integer, got {v!r}")
        if not (0.0 <= self.tol < 1.0):
            raise ValueError(f"tol must be in [0, 1), got {self.tol}")
        n = len(source)
        if n < self.n_clusters:
            raise ValueError(f"n_objects={n} must be >= n_clusters={self.n_clusters}")
        if self._grid() is not None:
            _source_aspect(source)
        return _check_scales(self.scales)

    def _grid(self) -> TiltGrid | None:
        return None if self.tilts is None or self.tilts.is_identity else self.tilts

    # --- fitting ---------------------------------------------------------------------------

    def fit(self, source: Source) -> PoseKMeans:
        """Fit prototypes to every object of ``source``; returns self."""
        scales = self._validate(source)
        use_cores()
        if self._grid() is None:
            return self._fit(source, scales)
        # the tilt search's large blocks of many sizes would fragment the heap; its tiny numpy products on the pool's
        # threads ran on OpenBLAS's own thread pool as well (cores.one_blas_thread)
        with cores.large_blocks_mapped(), cores.one_blas_thread():
            return self._fit(source, scales)

    def _fit(self, source: Source, scales: tuple[float, ...]) -> PoseKMeans:
        rng = np.random.default_rng(self.random_state)
        N, K = len(source), self.n_clusters
        if self.init is not None:
            P0 = np.asarray(self.init[0], np.float32).copy()
            V0 = np.asarray(self.init[1], np.float32).copy()
            if P0.shape[0] != K or V0.shape[0] != K:
                raise ValueError(f"init must hold n_clusters={K} prototypes, got {P0.shape[0]}")
            grid = self._grid()
            given = self.init[2] if len(self.init) > 2 else None
            a0 = None if grid is None else (np.asarray(given, np.float64) if given is not None
                                            else np.full(K, float(np.median(_source_aspect(source)))))
            best = _lloyd(source, P0, V0, scales=scales, max_iter=self.max_iter, tol=self.tol,
                          chunk_size=self.chunk_size, moments=True, cache=self._new_cache(), grid=grid, aspect=a0,
                          progress=self.progress, what=f"K={K} passes")
        else:
            best = self._fit_restarts(source, scales, rng)
        if self.face_assign and self._grid() is not None:
            best = self._face_reassign(source, best, scales)
        if self.pose_sync:
            best = self._pose_sync(source, best, scales)
        self._finish(best, source, scales)
        return self

    def _face_reassign(self, source: Source, res: _Result, scales: tuple[float, ...]) -> _Result:
        """``face_assign``: the fit's partition moved to the lesser of the tilt search and the objects turned onto
        their own faces (:func:`_face_assign`); when that moves any object, the new partition is held as
        ``seed_check`` holds its seed partition (:func:`_held_fit`, from the fit's prototypes), with the members
        whose label came from a turned copy averaged in turned.  The fit stands unchanged when none moves.  The held
        fit makes ``face_updates`` prototype updates; with 0 the prototypes stay the fit's: the held fit's final pass
        only (labels fixed, the turned objects searched as their turned copy), so the poses are those of the search
        that placed each object.  With ``face_hold_unmoved`` the clusters no object joined or left stay as the fit
        left them (:func:`_kept_from`)."""
        grid = self._grid()
        labels, src, pre = _face_assign(source, res, scales=scales, chunk_size=self.chunk_size, grid=grid)
        if np.array_equal(labels, res.labels) or np.bincount(labels, minlength=self.n_clusters).min() == 0:
            return res
        keep = unmoved_clusters(res.labels, labels, self.n_clusters) if self.face_hold_unmoved else None
        held = _held_fit(source, labels, res.P, res.V, scales=scales, chunk_size=self.chunk_size, moments=True,
                         cache=None, grid=grid, aspect=res.aspect, turned=None if pre is None else (src, pre),
                         updates=self.face_updates, keep=keep)
        return held if keep is None else _kept_from(held, res, keep)

    def _pose_sync(self, source: Source, res: _Result, scales: tuple[float, ...]) -> _Result:
        """``pose_sync``: the prototypes rebuilt from their upright members aligned to one another
        (:func:`_synced_prototypes`), with the cluster's other members (tilted, or turned onto a face of their own)
        searched against that mean and averaged in; the upright members keep the synchronised poses, and the
        symmetry test reads their moments at those poses; every other member's pose is the search's against the
        rebuilt prototype (a held fit's final pass, labels fixed, the turned members as the fit turned them).  The
        clusters not rebuilt stay as the fit left them (:func:`_kept_from`)."""
        grid = self._grid()
        P, V, done, orders = _synced_prototypes(source, res, scales, self.chunk_size, grid)
        if not done:
            res.member_order = orders
            return res
        K, N = self.n_clusters, len(res.labels)
        keep = np.ones(K, bool)
        keep[list(done)] = False
        turned = (res.src, res.pre) if res.pre is not None and res.src is not None else None
        base = source if turned is None else turned[0]
        synced = np.zeros(N, bool)
        for idx, *_ in done.values():
            synced[idx] = True
        others = np.flatnonzero(~keep[res.labels] & ~synced)
        mom_t = None
        if others.size:
            # the rebuilt clusters' other members, searched against the upright members' mean and summed in
            x, w = _gather(base, others, self.chunk_size)
            sub = ArraySource(x, w, None if grid is None else _source_aspect(base)[others])
            ts = None if grid is None else TiltState(grid, res.aspect)
            *_, num, den, count, _, _ = _assign_pass(sub, P, V, scales, self.chunk_size, True, 0,
                                                     forced=res.labels[others], tilts=ts)
            for k, (idx, _, _, mom, _) in done.items():
                if count[k]:
                    Pk, Vk = weighted_means((mom[1] + num[k])[None], (mom[0] + den[k])[None],
                                            np.array([len(idx) + count[k]]))
                    P[k], V[k] = Pk[0], Vk[0]
            ts = None if grid is None else TiltState(grid, res.aspect)
            mom_t = _assign_pass(sub, P, V, scales, self.chunk_size, True, 0, moments=True,
                                 forced=res.labels[others], tilts=ts)[-1]
        held = _held_fit(source, res.labels, P, V, scales=scales, chunk_size=self.chunk_size, moments=True, cache=None,
                         grid=grid, aspect=res.aspect, own_faces=False, turned=turned, updates=0, keep=keep)
        out = _kept_from(held, res, keep)
        out.yaw, out.scale = np.array(out.yaw, copy=True), np.array(out.scale, copy=True)
        moments = [np.array(m, copy=True) for m in out.moments]
        out.member_order = orders
        for k, (idx, yaw, scale, mom, order) in done.items():
            out.yaw[idx] = np.mod(yaw, 360.0).astype(out.yaw.dtype)
            out.scale[idx] = scale.astype(out.scale.dtype)
            for j, (m, v) in enumerate(zip(moments, mom)):
                m[k] = v if mom_t is None else v + mom_t[j][k]
        out.moments = tuple(moments)
        return out

    def _fit_restarts(self, source: Source, scales: tuple[float, ...], rng: np.random.Generator) -> _Result:
        N, K = len(source), self.n_clusters
        idx = np.sort(rng.choice(N, size=min(N, self.sample_size), replace=False))
        Xs, Ws = _gather(source, idx, self.chunk_size)
        grid = self._grid()
        faces = self.face_pairs and grid is not None
        seeder = PoseSeeder(Xs, Ws, scales=scales, rng=rng, size=max(SEED_SIZE, 2 * K), face_grid=grid if faces else None,
                            aspect=_source_aspect(source)[idx] if faces else None)
        sub = ArraySource(Xs, Ws, None if grid is None else _source_aspect(source)[idx])
        fit_on = source if N <= self.sample_size else sub
        # the subsample's spectra serve every restart (and the seeding passes); when the subsample is
        # the whole source, the same spectra serve the whole fit
        cache = self._new_cache()
        best, best_cost = None, np.inf
        check = self.seed_check and faces
        hold_t = float(self.seed_hold_t) if faces and not check else 0.0
        for r in range(self.n_init):
            labels, refs = seeder.partition(K, r, rng)
            P0, V0, *a0 = _partition_seeds(sub, labels, refs, scales, self.chunk_size, cache, grid)
            res = _lloyd(fit_on, P0, V0, scales=scales, max_iter=self.max_iter, tol=self.tol,
                         chunk_size=self.chunk_size, moments=fit_on is source, cache=cache, grid=grid,
                         aspect=a0[0] if a0 else None,
                         progress=self.progress, what=f"K={K} restart {r + 1}/{self.n_init} passes")
            cost, hold = res.cost, False
            if check:  # one objective for the fit, its seed partition and the restarts: the stable-face matrix's
                cost = medoid_cost(seeder.S, res.labels[seeder.index])
                held = medoid_cost(seeder.S, labels[seeder.index])
                hold = held <= cost
            elif hold_t > 0:  # the seed partition only when the fit's is significantly worse on that matrix
                hold = paired_worse_t(seeder.S, res.labels[seeder.index], labels[seeder.index]) > hold_t
            if hold:
                res = _held_fit(fit_on, labels, P0, V0, scales=scales, chunk_size=self.chunk_size,
                                moments=fit_on is source, cache=cache, grid=grid, aspect=a0[0] if a0 else None)
                cost = held if check else res.cost
            elif faces and self.seed_veto_k > 0:
                res = self._vetoed(fit_on, res, labels, seeder, scales, cache, grid)
                cost = res.cost
            if best is None or cost < best_cost:
                best, best_cost = res, cost
        if fit_on is not source:
            del cache, sub, Xs, Ws, seeder  # free the subsample's memory (the seeder holds it too) before the full fit
            best = _lloyd(source, best.P, best.V, scales=scales, max_iter=self.max_iter, tol=self.tol,
                          chunk_size=self.chunk_size, moments=True, cache=self._new_cache(), grid=grid,
                          aspect=best.aspect, progress=self.progress, what=f"K={K} all objects passes")
        return best

    def _vetoed(self, source: Source, res: _Result, seed: np.ndarray, seeder: PoseSeeder, scales: tuple[float, ...],
                cache: _SpectraCache | None, grid: TiltGrid | None) -> _Result:
        """``seed_veto_k``: the fit ``res`` with the moves out of the ``seed`` partition (N,) that the stable-face matrix
        contradicts undone (``seeding.neighbour_vetoed`` on the matrix objects ``seeder.index``), the partition so
        changed held from the fit's prototypes (:func:`_held_fit`, ``VETO_UPDATES`` updates, with ``VETO_OWN_FACES`` the
        members far from their prototype turned onto their own faces, :func:`_own_faces`);
        the clusters no object joined or left stay as the fit left them (:func:`_kept_from`).  The fit unchanged when
        no move is undone."""
        idx = seeder.index
        back = neighbour_vetoed(seeder.S, res.labels[idx], seed[idx], int(self.seed_veto_k))
        if np.array_equal(back, res.labels[idx]):
            return res
        labels = np.array(res.labels, np.int64, copy=True)
        labels[idx] = back
        if np.bincount(labels, minlength=self.n_clusters).min() == 0:
            return res
        keep = unmoved_clusters(res.labels, labels, self.n_clusters) if VETO_KEEP_UNMOVED else None
        held = _held_fit(source, labels, res.P, res.V, scales=scales, chunk_size=self.chunk_size,
                         moments=res.moments is not None, cache=cache, grid=grid, aspect=res.aspect, own_faces=VETO_OWN_FACES,
                         updates=VETO_UPDATES, keep=keep)
        return held if keep is None else _kept_from(held, res, keep)

    def _new_cache(self) -> _SpectraCache:
        return _SpectraCache(int(self.cache_mb * 2**20))

    def _finish(self, res: _Result, source: Source, scales: tuple[float, ...]) -> None:
        A = res.P.shape[3]
        symm = sym.detect_symmetry(res.P, res.V, sym.mean_variance(*res.moments), factor=self.symmetry_factor,
                                   tol=self.symmetry_tol, break_effect=self.symmetry_break_effect)
        order = res.member_order
        if order is not None:  # pose_sync: members showing less symmetry than the test break it (posesync.member_order)
            symm = np.where((order >= 1) & ((symm == sym.CONTINUOUS) | (order < symm)), order, symm)
        t = sym.canonical_shift_bins(res.P, res.V, symm)
        self.prototypes_ = shift_volume(res.P, -t, axis=3).astype(np.float32)
        self.prototype_weights_ = shift_volume(res.V, -t, axis=2).astype(np.float32)
        self.symmetry_ = symm
        self.canonical_shift_deg_ = (t * 360.0 / A).astype(np.float32)
        self.labels_ = res.labels
        grid = self._grid()
        tilt = np.zeros(len(res.labels), np.int64) if res.tilt is None else res.tilt
        self.tilt_ = tilt
        self.aspect_ = res.aspect
        self.rotation_, self.up_ = canonical_rotations(TiltGrid.identity() if grid is None else grid, tilt, res.yaw,
                                                       self.canonical_shift_deg_[res.labels])
        if res.pre is not None:  # members matched turned onto their own face: object <- copy <- prototype
            self.rotation_ = np.swapaxes(res.pre, 1, 2) @ self.rotation_
            self.up_ = self.rotation_[:, 2, :]
        # the final prototypes' tilted copies: the polish and the 3-D symmetry tests read the same bank
        bank = None if grid is None else TiltBank(self.prototypes_, self.prototype_weights_, res.aspect, scales, grid)
        self.polished_ = np.zeros(len(res.labels), bool)
        fit_rotation = self.rotation_.copy()  # the faces' symmetry is read where the fit's members put the faces
        if grid is not None and self.pose_polish:  # every member's pose searched again against its final prototype
            self.rotation_, self.polished_ = _polished_rotations(
                source, res.labels, res.dist, self.rotation_, self.prototypes_, self.prototype_weights_, res.aspect,
                scales, grid, self.chunk_size, bank=bank, own_out=self.polish_own_out)
            self.up_ = self.rotation_[:, 2, :]
        if grid is None:
            self.symmetry_rotations_ = [np.eye(3)[None] for _ in range(self.n_clusters)]
            ups, counts, self.face_ = faces.group_faces(self.up_, res.labels, self.n_clusters)
            fsym = [np.full(len(u), symm[k], np.int64) for k, u in enumerate(ups)]
        else:
            noise = sym.mean_variance(*res.moments).mean(axis=(1, 2, 3, 4))
            # symmetries that move up (a box tipped onto an equal side): poses modulo them before the faces
            self.symmetry_rotations_ = []

            def tilt_symmetry(k: int) -> np.ndarray:
                return sym.tilt_symmetries(bank, k, float(noise[k]), int(symm[k]), factor=self.symmetry_factor,
                                           tol=self.symmetry_tol)

            # prototypes are independent: they run on the pool's threads (one torch thread each), in order
            with bar(self.progress, "symmetry in 3-D", total=self.n_clusters, unit="prototypes") as b:
                for reps in ordered_map(tilt_symmetry, list(range(self.n_clusters))):
                    self.symmetry_rotations_.append(reps)
                    b.advance()
            for k, reps in enumerate(self.symmetry_rotations_):
                sel = np.flatnonzero(res.labels == k)
                if len(reps) > 1 and len(sel):
                    self.rotation_[sel] = sym.reduce_modulo_group(self.rotation_[sel], sym.group_elements(reps, symm[k]))
                    if self.polished_.any():
                        fit_rotation[sel] = sym.reduce_modulo_group(fit_rotation[sel], sym.group_elements(reps, symm[k]))
            self.up_ = self.rotation_[:, 2, :]
            ups, counts, self.face_ = faces.group_faces(self.up_, res.labels, self.n_clusters)
            test_ups = ups
            if self.polished_.any():  # a face the fit's poses had too is tested at the fit's up (the polish leaves the
                # faces' symmetry as it was: a face copy's reading moves with a few degrees of its up)
                fit_ups = faces.group_faces(fit_rotation[:, 2, :], res.labels, self.n_clusters)[0]
                test_ups = [faces.nearest_faces(u, fu) for u, fu in zip(ups, fit_ups)]
            fsym = faces.face_symmetries(bank, test_ups, noise, symm, factor=self.symmetry_factor, tol=self.symmetry_tol,
                                         break_effect=float(FACE_BREAK_EFFECT),
                                         run=pooled)
        self.faces_ = {"up": ups, "count": counts, "symmetry": fsym}
        period = np.array([sym.period_deg(fsym[k][f]) for k, f in zip(res.labels, self.face_)], np.float64)
        self.rotation_, yaw = faces.reduce_rotation(self.rotation_, period)
        self.yaw_deg_ = yaw.astype(np.float32)
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
        bank = make_bank(self.prototypes_, self.prototype_weights_, self.scales_, self._grid(), self.aspect_)
        parts = []
        for i0, i1 in _chunks(len(source), self.chunk_size):
            x, w = source.read(i0, i1)
            parts.append(bank.match(np.asarray(x, np.float32), np.asarray(w, np.float32), return_all=return_all))
        D = np.concatenate([p.D for p in parts])
        yaw = sym.wrap_yaw(np.concatenate([p.yaw_deg for p in parts]), self.symmetry_)
        scale = np.concatenate([p.scale for p in parts])
        allD = np.concatenate([p.all_D for p in parts]) if return_all else None
        return PoseMatch(D, yaw, scale, allD, tilt=np.concatenate([p.tilt for p in parts]))

    def predict(self, source: Source) -> np.ndarray:
        """Index of the nearest prototype under the best pose, (N,)."""
        return np.argmin(self.match(source).D, axis=1)


def canonical_rotations(grid: TiltGrid, tilt: np.ndarray, yaw_deg: np.ndarray, shift_deg: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Members' rotations (N, 3, 3) object frame <- canonical prototype frame, and their up directions (N, 3)
    in the canonical frame.

    A member matched at tilt u and yaw psi in the search frame is Rz(psi) tilt_matrix(u) applied to the
    prototype; the canonical frame is the search frame turned by -shift about z (the prototype was rolled
    by -shift bins' worth of degrees), so the member's rotation from the canonical frame is
    Rz(psi) tilt_matrix(u) Rz(shift), and its up direction there is that rotation's transpose applied to +z.
    """
    Rm = rot.tilt_yaw_to_matrix(grid.dirs[np.asarray(tilt)], yaw_deg) @ rot.yaw_matrix(shift_deg)
    return Rm, Rm[..., 2, :]


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
