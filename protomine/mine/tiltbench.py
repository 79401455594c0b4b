"""Bench row [``tilts``]: the pose search over tilts x yaw x scale against the yaw-only search, same volumes.

Synthetic volumes (invented): K smooth random prototypes and N partially observed objects of
``protomine.bench`` (grid (5, 8, 36, 12), the default 5 scales), aspect 1 for every prototype; the full row
is one pass's chunk of the default config (``[mine] chunk_size`` 2,048 objects against ``max_clusters`` 16
prototypes).  Both searches run on the same object spectra, twice, interleaved (the yaw-only time is the
better of its two runs).  The tilt search's time includes building its bank (the tilted copies of the first
level and their spectra, built once per pass) and the refinement's copies (built when first needed, then kept
for the pass); its first run computes every copy's geometry (a first pass: ``tilt_s``, ``ratio``), its second
finds them kept from the first (a later pass whose prototypes' solid cells did not change: ``tilt_warm_s``,
``ratio_per_tilt_warm``).

Figures: ``yaw_s``, ``tilt_s`` (seconds per search of N objects against K prototypes); ``tilt_build_s``,
``tilt_search_s`` (its two parts); ``coarse_tilts`` (first-level directions, searched for every prototype at
every scale); ``candidates_per_level`` (directions searched per refined pair at each later level, one
scale); ``tilts_per_pair`` = T, the tilted copies actually searched per (object, prototype) pair counted in
yaw-only searches: T0 at all S scales, plus ``refine_top`` x the candidates of the later levels at one scale
spread over the K x S (prototype, scale) pairs of a yaw-only search; ``ratio`` = tilt_s / yaw_s and
``ratio_per_tilt`` = ratio / T (target <= 1.3: the cost grows linearly with the tilts and building the
copies does not dominate); ``yaw_cpu_s``, ``tilt_cpu_s``, ``ratio_per_tilt_cpu``: the same in CPU seconds of the
process (first run of the tilt search; on a shared machine the wall clock also counts waits for a core);
``tilt_margin_cpu_s``: the CPU seconds of the same search, cold, refining only the pairs within ``BENCH_MARGIN`` of
each object's best so far (``[mine] tilt_refine_margin``; the mining passes' switch, off by default);
``tilt_screen_cpu_s``, ``ratio_per_tilt_screen_cpu``: the same search, cold, with its first level a screen on the
azimuth frequencies 0 .. ``BENCH_BINS`` (``[mine] tilt_coarse_bins``, ``tilts.band_limited``; off by default); ``flat12_cpu_s``, ``flat48_cpu_s`` and ``ratio_per_tilt_flat12_cpu``,
``ratio_per_tilt_flat48_cpu``: flat searches, every direction of one HEALPix level (N_side 1: 12, N_side 2: 48)
for every (object, prototype) pair at every scale, cold, so T is exactly 12 N_side^2 (the issue's "pose search with T
tilts"); ``flat_growth``: the 48-tilt search's CPU over 4 x the 12-tilt one's (1 = linear in T); and
``tilt_vs_flat48_cpu``: the default coarse-to-fine search's CPU over the flat 48-tilt search's (it reaches the 15
degree spacing of N_side 4's 192 directions).  The
tilt search runs its many small operations (copies, column factors, the refinement's products) and the coarse
level's row blocks on ``searchpool.spectra_pool``'s threads, one torch thread each (``searchpool.pooled``).

The mining row's invented prototypes fill their whole grid (no empty margin around the object, unlike a lifted
volume), so a tilted copy's cells beyond its prototype's cylinder stay unknown (``tilts.empty_margin``).

The mining row (``bench_tilt_mining``) reports ``seconds`` and ``cpu_s`` (wall and CPU seconds of the fit),
``main_thread_cpu_s`` (the CPU seconds of the fit's own thread, work the pool's threads do not share),
``ready_threads`` (``cores.ready_threads`` over the fit: the mean number of its threads running or waiting only
for a core, which the load barely moves), ``peak_rss_mb``, ``n_iter`` and ``nmi``.

Where the CPU goes (cProfile with a CPU-time clock, one torch thread so the pool's work is seen, machine at load 6-9)
----------------------------------------------------------------------------------------------------------------
- The row's search, 2,048 objects x 16 prototypes, cold: yaw-only 0.32 s; tilt search 6.9 s = the first level's
  products 3.3 s (12 tilts x 5 scales, 0.87 yaw-only searches a tilt) + its copies and factors 0.24 s + the
  refinement 3.35 s.  The refinement is counted as 0.64 of the T = 12.6 tilts but costs ~10 yaw-only searches: it
  builds almost every copy of the later levels (48 + 192 a prototype: the pairs' candidates cover them), each
  resampled (0.85 s, half of it ``grid_sample``'s scalar 3-D kernel, half the coordinates' numpy work; geometries
  0.2 s) and factored at every scale a pair needs it (0.84 s, ~2.2 scales a copy), and runs 1,098 small products
  (1.24 s for 123 k (object, copy) pairs, 105 k of them needed; ~1 ms of fixed cost each).
- Mining 600 tumbled objects (this row's settings, 311 s CPU on one core): refinement 61% (resampling 22%,
  column factors 20%, products 15%, geometries 4%), the first level 14%, aligned sums and their untilt 11%, the fit's
  finish (3-D symmetry, faces) 7%, seeding 5%.  The copies are a fixed cost per chunk and pass (the same whatever
  the chunk's objects), so a pass of two chunks builds them twice.
- Two threads, 300 tumbled objects: the pool's threads used 80.6 and 80.3 s CPU, the main thread 19.8 s (11% of
  184 s), so the wall clock can come down to about 0.55 x the CPU seconds on 2 free cores.  3,000 tumbled objects
  (this row, seed 0, load 7-9): 883 s CPU, 2,627 s wall, peak 1,618 MB, NMI 0.952.
- Kept exact, little is left to cut: no prototype was identical to the bank's before it in 35 passes (300
  objects; copies kept across passes would never be used), the geometries were recomputed for nearly every
  prototype and level in every pass (each pass's aspects move the hull; 1,929 batches in 35 passes of 600 objects),
  a ``grid_sample`` twin by gathers gave the same bits but ran 1.05-1.6x slower (blocks of 3,456-50,000 points),
  and regrouping the refinement's products (``SPLIT_OVERHEAD`` 100, 500, 1,000) changed the last bits of their
  distances (the batched products' sums depend on the shapes) without a measurable gain.
- Later (cProfile, process-time clock, one torch thread, load ~5): the row's search 8.6 s CPU = the first level 3.8 s
  + the refinement 4.7 s: its products 1.8 s (1,098 of them; the products proper 1.3 s, gathering the objects'
  spectra 0.4 s), its copies 1.5 s (resampling; geometries 0.26 s), their column factors 1.2 s.  The copies are
  what a smaller search cannot shed: a full search of 600 tumbled objects against their 16 true prototypes built
  3,564 of the 3,840 finer copies; refining only the pairs within 1.25 x the object's best (``refine_margin``
  0.25) built 3,271 and cut its CPU 6.0 -> 4.2 s (same labels, 97.7% the same tilts).  Fewer copies need fewer
  directions per pass: ``pass_levels``.
- Mining 600 tumbled objects (``_mine_tumbled_once(600, 16, 0)``, n_iter 15 in every run, load 6-7): before
  233 s CPU, NMI 0.989, peak 1,137 MB; with the passes' ``focus`` (a pass with labels held fixed refines only the
  held prototype's pairs: one such pass of 900 objects 11.9 -> 9.0 s CPU, 2 of 900 tilts differing by float
  rounding) and the finer copies kept across a pass's chunks (3 chunks of 300: 14.2 -> 13.7 s, identical): 212 s,
  NMI 0.981 (a different trajectory from the rounding), 1,046 MB.  Switches: ``pass_levels`` 2: 137 s, NMI
  0.975, 1,011 MB; ``refine_margin`` 0.25: 191 s, NMI 0.984.  The row itself (2 threads, load 5.3):
  ``ratio_per_tilt_cpu`` 1.97 (target 1.3, not met: the refinement builds ~20 x the copies the first level does).
- 3,000 tumbled objects (this row, seed 0): defaults 668 s CPU, 412 s wall at load 1.7, peak 1,841 MB (the finer
  copies kept across the full passes' two chunks: +~220 MB), NMI 0.951 (before: 883 s CPU, 1,618 MB, NMI 0.952);
  with ``pass_levels`` 2 and ``refine_margin`` 0.25: 443 s CPU, 448 s wall at load 4, 1,772 MB, NMI 0.940.
- Again (cProfile, process-time clock, one torch thread, load 8-11): the row's search 8.2 s CPU against 0.33 s yaw-only
  (ratio per tilt 1.97) = the first level 3.7 s (0.94 yaw-only searches a tilt: at its floor) + the refinement 4.2 s:
  products 1.5 s, copies 1.4 s (2,729 resampled, geometries 0.26 s of it), column factors 1.1 s (7,178 (copy, scale)
  columns, 2.6 scales a copy, 0.11 ms a column of which the two half-size DFT products are 37 us).  The products are
  small (1,098 of them, median 5 objects x 8 copies, 123 k (object, copy) pairs): 12 us a pair against the first
  level's 1.9.  For the 1.3 target the refinement would have to cost ~1.3 s.
- Tried, not kept: (1) the products of fewer than 32 objects padded to their batch's largest and run ~25 at a time
  (one batched product per spectrum row, the objects and columns gathered once per batch): the refinement's products
  1.58 -> 1.67 s, no gain (the gathers and the products of small matrices cost as much batched as one by one).
  (2) The last level's candidates within 0.6 x the previous spacing (5.0 instead of 8.75 a pair): the row 7.4 ->
  6.3 s CPU (ratio per tilt 1.58 -> 1.40 in that run), 95% of the row's labels and 81% of its best tilts kept;
  mining 600 tumbled objects (``_mine_tumbled_once(600, 16, 0)``, back to back, load 10-11): 225 -> 180 s CPU, NMI
  0.981 -> 0.954, peak 1,045 -> 1,057 MB: a worse trade than ``pass_levels`` 2, so no switch was added.
  (3) Fewer pairs refined (``refine_top`` 2 / 1): the row 6.9 / 7.1 s CPU against 7.4 (noise of the same order),
  79% / 53% of its labels kept: at 2,048 objects the pairs' candidates cover nearly every finer copy whatever their
  number, so the copies and their factors (~2.5 s) stay and only the products shrink.
- Mining 1,000 tumbled objects (``_mine_tumbled_once(1000, 16, 0)``, the pool's threads on, 323 s CPU, NMI 0.892;
  the process's CPU clock charged to the main thread's calls, so work the pool did meanwhile counts there too): the
  refinement 176 s (its copies ~66 s with their geometries, column factors 50 s; all geometries 27 s, of which
  enclosing circles 15 s), the first level 62 s, the aligned sums' transform and untilt 45 s, the fit's finish 18 s,
  the seeding 12 s.
- Again (issue 13; cProfile with a process-time clock, one torch thread, load 6-10): the row's refinement 3.5-4.6 s,
  of which products ~1.45 s, copies ~1.0 s (resampling 0.26 ms a copy: ``grid_sample`` 46%, the inside points'
  numpy 27%), column factors ~1.0 s (0.06 ms a column at scale 1, 0.09-0.12 at the others: the radial and height
  scaling products are ~45% of a scaled column).  The products by kind: level 1, 273 products per previous
  direction (median 8 copies x 9 objects) and 22 against a group's union (24.5 x 21.5); level 2, 785 (9 x 4) and
  18 (35 x 20.5).  A product costs ~0.15 ms + ~40 us a copy (its factors, 97 KB, gathered from the block's and
  stacked) + ~20 us an object (gathered) + ~4 us a (copy, object) pair: moving data, not arithmetic (the
  refinement's 13 GFLOP of products would take ~0.25 s at the first level's rate).  Mining 400 tumbled objects
  (process-time cProfile, the pool on; the clock counts the pool's work under the main thread's calls): 160 s CPU,
  the search 117 s (the refinement 92 s: copies 41 s with their geometries 17 s, column factors 34 s; the first
  level 36 s), aligned sums 15 s, the fit's finish 11.5 s, seeding 5 s.  Mining 300 (2 threads, load 8): 144 s
  CPU, the main thread 25 s of it (the refinement's bookkeeping 17 s, of which the copies' geometries 8.8 s:
  enclosing circles 5.3 s, hulls 1.2 s), ``ready_threads`` 2.0.
- Tried, not kept: (4) the column factors' azimuthal transform by ``torch.fft.rfft`` (and its real and imaginary
  rows copied into place) instead of the two half-size DFT products: 790-970 us a block of 10 copies against 330.
  (5) The complex products with the objects' real and imaginary parts stacked, [o_re; o_im] ((M, 2 n) products),
  not the copies' ((2 M, n)): no per-product stacking of the copies' factors, but ``bmm`` sums small shapes in
  another order (the same dot products differ in the last bits at (M, n) = (8, 5), (48, 5), (9, 7); equal at
  (8, 20), (48, 30)), so not the same values.  (6) One stacked layout of a block's factors for all its products:
  the stacking it saves copies a product's gathered columns, already in cache (0.16 s of the row's refinement).
  At the row's settings the 1.3 target needs the refinement at ~1.3-1.6 s: below what the copies and their factors
  alone cost (~2 s, a fixed cost of ~3,500 finer copies a pass whatever the number of objects).
- 3,000 tumbled objects (this row, seed 0, this code, load 4-7): 590.7 s CPU, 1,077 s wall, the main thread 32 s,
  ``ready_threads`` 1.99, peak 1,848 MB, n_iter 15, NMI 0.9485.
- Issues 13 / 16 (this row and the mining row before -> after, run back to back in one ``protomine bench`` each,
  load 6-9): Gauss's three real products per complex bin (``posesearch._cross_spectra``: k1 = p_re (o_re + o_im),
  k2 = (p_re + p_im) o_re, k3 = (p_re - p_im) o_im, Re = k1 - k3, Im = k1 - k2, the combination on the inverse
  transform's matrix; 53 (M, f) @ (f, n) products instead of 70 for A = 36), torch's large tensors on transparent
  huge pages (``THP_MEM_ALLOC_ENABLE``, ``protomine/__init__.py``) and one reused buffer for the spectra of a chunk
  the spectra cache does not keep (``engine._SpectraCache.spare``).  This row: ``tilt_cpu_s`` 8.36 -> 6.45 s,
  ``ratio_per_tilt_cpu`` 2.18 -> 1.47 (yaw-only 0.30 -> 0.35 s, noise); a coarse row block (960 copies x 128
  objects, one thread) 200.7 -> 158.3 ms, of which the numerator's products 106 ms, the denominator's 18 ms, the
  two inverse transforms 10 ms each and the distance's elementwise steps ~21 ms.  The mining row at 3,000: 559.5 ->
  554.5 s CPU, NMI 0.9485 -> 0.9533 (another trajectory from the last bits), peak 1,859 -> 1,824 MB, the bench
  process's minor faults 12.0 -> 3.5 million but system time 53 -> 51 s (the kernel still zeroes every page mapped
  afresh, 2 MB at a time).  Short fits of 3,000 (``_mine_tumbled_once(3000, 16, 0, 1, 3)``, base and this code
  alternating, load 6-8): 133.5 / 131.8 s CPU before, 133.1 / 115.6 s after.  One core, 1,500 objects, 6 passes:
  79.6 s before, 70.4 s with huge pages alone (the same fit), 66.4 s with all three (the coarse level's distances
  15.1 -> 11.6 s).  The products alone at small M gain nothing (32 x 256: 15.8 vs 16.0 ms; 8 x 8: 0.30 ms both), so
  the assignment row's FFT search (32 prototypes, one scale) costs what it did; its products by the thread's CPU
  clock run at 53 GFLOP/s, 0.58 of one thread's matmul peak (91 GFLOP/s).  Still to cut for 1.3: the refinement's
  copies (``grid_sample`` 46% of a copy) and column factors (~0.1 ms a column, ~4x its memory traffic).
- Issues 13 / 16 again (load 7-8 throughout; main and this code's rows back to back, twice): the first level as a
  screen on the azimuth frequencies 0 .. 6 (``[mine] tilt_coarse_bins``, ``tilts.band_limited``): ``tilt_cpu_s``
  7.68 / 7.84 (main) and 7.17 / 7.65 (this code, the same search to the bit) -> ``tilt_screen_cpu_s`` 4.93 / 5.20,
  ``ratio_per_tilt_screen_cpu`` 1.32 / 1.42 (``ratio_per_tilt_cpu`` 1.64 / 1.70 main, 1.91 / 2.09 here: the yaw-only
  search 0.37 / 0.37 vs 0.30 / 0.29 s, noise).  Profile of the screened search (one thread, load 7): the first level
  3.2 -> 1.05 s, the refinement then ~80% of the search (products ~2.1 s, column factors ~1.5 s, copies ~1.2 s under
  that load).  Mining 3,000 (this row, seed 0): main 595.2 s CPU, 1,169 s wall, 1,820 MB, NMI 0.9533; the screen
  550 s, 1,055 s wall, 1,820 MB, NMI 0.9349 (a worse trade than ``pass_levels``); ``refine_margin`` 0.25: 600.1 s,
  1,304 s wall, 1,811 MB, NMI 0.9493.  Tried, not kept: a trilinear
  reading by gathers in torch (8 ``index_select`` of a channels-last volume, or one gather of every channel plane)
  or by a 2-D ``grid_sample`` over (azimuth, height) with the radial bins as channels then a radial lerp, against
  the 3-D ``grid_sample`` on 50,000 points of 6 channels: 11.9 / 13.1 / 9.2 ms against 5.6 ms.
- Issues 13 / 16, where a fit of 3,000 goes (cProfile, process-time clock, one core by affinity so every stage is
  seen, ``_mine_tumbled_once(3000, 16, 0, 1, 3)``: 134 s CPU, load 5-6): the refinement 59 s (its products 23.6 s,
  of which the objects' and columns' gathers 4.9 s; the copies 16.6 s; column factors 15.9 s), the first level
  32.5 s, the aligned sums 19.1 s (untilt 10.5 s, of which ``grid_sample`` in float64 ~6 s; the per-group scale
  resampling 2.3 s; the inverse transform 1.7 s), the fit's finish 17.7 s (face symmetries 13.6 s: Fourier rolls
  5.2 s, ``np.roll`` 2.7 s), the seeding pass 6.7 s.  ``torch.bmm`` 28.4 s, ``grid_sampler`` 13.4 s, ``torch.mm``
  10.8 s: kernels, not Python.  Two threads, 600 objects: 198 s CPU, the main thread 24.6 s, ``ready_threads`` 1.90
  (both cores busy).  Cut without changing any output (every fitted array equal to the bit, the default demo's
  library and assignments identical): the sums of the w |x|^2 block, which nothing reads (``_AlignedSums(first=)``,
  1/7 of the sums' work), the scale resampling of a piece's groups of one scale in one call (``SCALE_BLOCK``), and
  the symmetry test's rolled copies made once for both ratios with one azimuth transform per array
  (``symmetry._ratios``; 21.8 -> 17.4 ms a prototype).  Measured (main and this code back to back): the mining
  row at 3,000, 538.5 s CPU, 788 s wall, 1,866 MB, NMI 0.9533 (load 6.6) -> 566.3 s, 742 s, 1,831 MB, NMI 0.9533
  (load 2.9-5.4): no gain beyond the noise of a shared machine (~10% on CPU seconds between runs of the same code);
  at 1,000 (two pairs, this code first, load 1.3-3.8): 196.4 / 193.9 s CPU against 233.7 / 201.6 s (206.4 s at
  load 8), wall 171.5 / 165.1 s against 169.4 / 202.7 s, 1,194 / 1,113 MB against 1,190 / 1,184 MB, NMI 0.8921 and
  15 passes in every run; the tilts row 6.16 -> 5.82 s CPU, ratio per tilt 1.23 -> 1.24 (the search's code is unchanged); 600 objects,
  one restart of 4 passes, one core, alternating: 40.5 / 36.3 s -> 36.9 / 34.6 s; the default demo's mining
  84.5 -> 68.2-77.7 s CPU.  A gather from a narrowed (not contiguous) view of the chunk's spectra copied the
  whole chunk each time (118 ms against 15 ms for 256 of 2,048 objects): with it the row at 3,000 took 633.7 s,
  system time 118 s against 43 s, 2,108 MB.  Tried, not kept: the column factors' numerator written straight
  into the azimuth-first layout their transform reads (a strided ``out``): other bits and 1.25x slower.  The 2x
  of issue 13 is not within reach of exact changes: what is left is ``bmm``, ``grid_sample`` and ``mm`` at
  their kernels' rates.
"""
from __future__ import annotations

import os
import time

import numpy as np

from .. import cores
from ..cores import one_blas_thread
from . import tilts
from .posesearch import PoseBank
from .tilts import TiltBank, TiltGrid


BENCH_MARGIN = 0.25  # the row's search with [mine] tilt_refine_margin at this value (tilt_margin_cpu_s)
BENCH_BINS = 6       # the row's search with [mine] tilt_coarse_bins at this value (tilt_screen_cpu_s)
FLAT_NSIDES = (1, 2)  # one-level (flat) searches over all 12 N_side 1 / all 48 N_side 2 directions (flat12_*, flat48_*)


def bench_tilts(quick: bool, seed: int, n: int | None = None) -> dict:
    """The row's figures (module docstring); ``n`` overrides the number of objects."""
    from .synthetic import SCALES, synthetic_objects, synthetic_prototypes
    rng = np.random.default_rng(seed)
    K, n = (8, n or 256) if quick else (16, n or 2048)
    P = synthetic_prototypes(rng, K)
    X, W, *_ = synthetic_objects(rng, P, n)
    P = np.abs(P)  # surface-like evidence, so the tilted copies have solid cells
    V = np.ones((K,) + W.shape[1:], np.float32)
    grid = TiltGrid()
    yaw_bank = PoseBank(P, V, SCALES)
    o = yaw_bank.spectra(X, W)
    yaw_bank.match_spectra(o[:, :32])  # warm-up
    TiltBank(P[:1], V[:1], np.ones(1), SCALES, grid).match_spectra(o[:, :32])

    with one_blas_thread():  # numpy's BLAS on one thread, as mining runs the search (cores.one_blas_thread)
        return _bench_tilts_rows(P, V, o, yaw_bank, grid, n, K)


def _bench_tilts_rows(P, V, o, yaw_bank, grid, n: int, K: int) -> dict:
    """The timed part of :func:`bench_tilts`."""
    from .synthetic import SCALES
    yaw_s, yaw_cpu, runs, cpus = np.inf, np.inf, [], []
    for cold in (True, False):  # interleaved, so both searches see the same machine load
        c0, t0 = _cpu(), time.perf_counter()
        yaw_bank.match_spectra(o)
        c1, t1 = _cpu(), time.perf_counter()
        if cold:
            tilts._GEOMETRY_CACHE.clear()  # a first pass: every copy's geometry is computed
        bank = TiltBank(P, V, np.ones(K), SCALES, grid)
        t2 = time.perf_counter()
        bank.match_spectra(o)
        c3, t3 = _cpu(), time.perf_counter()
        runs.append((t2 - t1, t3 - t2))
        cpus.append(c3 - c1)
        yaw_s, yaw_cpu = min(yaw_s, t1 - t0), min(yaw_cpu, c1 - c0)
    def cold_cpu(search_grid=grid, **switch) -> float:
        """CPU seconds of the same search (or one over ``search_grid``), cold, with a mining pass's switch."""
        tilts._GEOMETRY_CACHE.clear()
        c0 = _cpu()
        TiltBank(P, V, np.ones(K), SCALES, search_grid, **switch).match_spectra(o)
        return _cpu() - c0

    # refining only the pairs within BENCH_MARGIN of each object's best ([mine] tilt_refine_margin), and screening
    # the first level on the azimuth frequencies 0 .. BENCH_BINS ([mine] tilt_coarse_bins)
    margin_cpu = cold_cpu(refine_margin=BENCH_MARGIN)
    screen_cpu = cold_cpu(coarse_bins=BENCH_BINS)
    # flat searches: every direction of one HEALPix level for every pair at every scale, T = 12 N_side^2 exactly
    flat = {}
    for ns in FLAT_NSIDES:
        T = 12 * ns * ns
        cpu = cold_cpu(TiltGrid(nsides=(ns,)))
        flat.update({f"flat{T}_cpu_s": cpu, f"ratio_per_tilt_flat{T}_cpu": cpu / max(yaw_cpu, 1e-9) / T})
    big = 12 * FLAT_NSIDES[-1] ** 2
    flat["flat_growth"] = (flat[f"flat{big}_cpu_s"] / flat[f"flat{12 * FLAT_NSIDES[0] ** 2}_cpu_s"]
                           / (FLAT_NSIDES[-1] / FLAT_NSIDES[0]) ** 2)
    flat[f"tilt_vs_flat{big}_cpu"] = cpus[0] / max(flat[f"flat{big}_cpu_s"], 1e-9)
    (build_s, search_s), warm = runs[0], sum(runs[1])
    tilt_s = build_s + search_s
    T0 = len(grid.level(0))
    per_level = [float(np.mean([len(grid.candidates(i, t)) for t in grid.level(i - 1)])) for i in range(1, len(grid.nsides))]
    per_pair = T0 + grid.refine_top * sum(per_level) / (K * len(SCALES))
    ratio = tilt_s / yaw_s
    return {"n_objects": n, "n_prototypes": K, "coarse_tilts": T0, "candidates_per_level": per_level,
            "tilts_per_pair": per_pair, "yaw_s": yaw_s, "tilt_s": tilt_s, "tilt_build_s": build_s,
            "tilt_search_s": search_s, "ratio": ratio, "ratio_per_tilt": ratio / per_pair,
            "tilt_warm_s": warm, "ratio_per_tilt_warm": warm / yaw_s / per_pair,
            "yaw_cpu_s": yaw_cpu, "tilt_cpu_s": cpus[0], "ratio_per_tilt_cpu": cpus[0] / max(yaw_cpu, 1e-9) / per_pair,
            "tilt_margin_cpu_s": margin_cpu, "tilt_screen_cpu_s": screen_cpu,
            "ratio_per_tilt_screen_cpu": screen_cpu / max(yaw_cpu, 1e-9) / per_pair, **flat,
            "load_1m": os.getloadavg()[0]}


def _cpu() -> float:
    """CPU seconds of this process so far (all threads)."""
    import resource
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def tumbled_objects(rng: np.random.Generator, P: np.ndarray, n: int, grid: TiltGrid, *, noise: float = 0.3
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """n objects (invented data) from surface-like prototypes P (K, C, R, A, H) (aspect 1, weights 1), each lying
    on a random up direction (uniform on the sphere), turned by a random yaw, re-normalised by its own footprint
    and height (the tilted copies of :class:`TiltBank`), with Gaussian noise and the partial view of
    ``synthetic.synthetic_objects`` (half the azimuth, a random fraction of the height).  Returns X (n, C, R, A,
    H), W (n, R, A, H), aspect (n,) (each object's z_max / rho_max) and labels (n,)."""
    from .posesearch import shift_volume
    from .tilts import _resample_copies, copy_geometries, solid_points
    K, C, R, A, H = P.shape
    V = np.ones((K, R, A, H), np.float32)
    labels = rng.integers(0, K, n)
    ups = rng.normal(size=(n, 3))
    ups /= np.linalg.norm(ups, axis=1, keepdims=True)
    X = np.empty((n, C, R, A, H), np.float32)
    W = np.empty((n, R, A, H), np.float32)
    aspect = np.empty(n)
    for k in range(K):
        sel = np.flatnonzero(labels == k)
        if not sel.size:
            continue
        gs = copy_geometries((R, A, H), 1.0, ups[sel], grid, solid_points(P[k, 0], V[k], 1.0, grid))
        aspect[sel] = [g.z_max / g.rho_max for g in gs]
        for b0 in range(0, sel.size, 256):
            s = sel[b0:b0 + 256]
            pc, vc = _resample_copies(P[[k] * len(s)], V[[k] * len(s)], gs[b0:b0 + 256], np.ones(len(s)))
            X[s], W[s] = pc, vc
    yaw_bins = rng.uniform(0, A, n)
    for b0 in range(0, n, 1000):  # blocks bound the roll's temporaries
        sl = slice(b0, min(n, b0 + 1000))
        X[sl] = shift_volume(X[sl], yaw_bins[sl], axis=3)
        W[sl] = shift_volume(W[sl], yaw_bins[sl], axis=2)
        X[sl] += noise * rng.standard_normal(size=X[sl].shape, dtype=np.float32)
    start = rng.integers(0, A, n)
    arc = (np.arange(A)[None, :] - start[:, None]) % A < A // 2
    top = rng.integers(H // 2, H + 1, n)
    W *= (arc[:, None, :, None] & (np.arange(H)[None, :] < top[:, None])[:, None, None, :]).astype(np.float32)
    return X, W, aspect, labels


def _mine_tumbled_once(n: int, k: int, seed: int, n_init: int = 2, max_iter: int = 15, refine_margin: float = 0.0,
                       pass_levels: int = 0, coarse_bins: int = 0) -> dict:
    """Run in a subprocess: n tumbled objects of k prototypes, mined with the default tilt grid; time, peak RSS.
    ``refine_margin``, ``pass_levels``, ``coarse_bins``: the mining's ``TiltGrid`` switches (``[mine]
    tilt_refine_margin``, ``tilt_pass_levels``, ``tilt_coarse_bins``)."""
    import resource

    from sklearn.metrics import normalized_mutual_info_score

    from .engine import ArraySource, PoseKMeans
    from .synthetic import SCALES, synthetic_prototypes
    rng = np.random.default_rng(seed)
    grid = TiltGrid()
    P = np.abs(synthetic_prototypes(rng, k))
    X, W, aspect, labels = tumbled_objects(rng, P, n, grid)
    grid = TiltGrid(refine_margin=refine_margin, pass_levels=pass_levels, coarse_bins=coarse_bins)
    usage = resource.getrusage(resource.RUSAGE_SELF)
    c0 = usage.ru_utime + usage.ru_stime
    r0, m0 = cores.ready_clock(), time.thread_time()
    t0 = time.perf_counter()
    # the mining row's engine settings (protomine/bench.py), the default config's chunk and tilt grid
    model = PoseKMeans(n_clusters=k, scales=SCALES, n_init=n_init, max_iter=max_iter, chunk_size=2048, random_state=seed,
                       sample_size=2048, cache_mb=128, tilts=grid).fit(ArraySource(X, W, aspect))
    secs = time.perf_counter() - t0
    main_cpu = time.thread_time() - m0
    usage = resource.getrusage(resource.RUSAGE_SELF)
    # CPU seconds beside the wall clock: on a shared machine the wall clock also counts the waits for a core;
    # the main thread's own CPU seconds (the part the pool's threads cannot share) and the mean number of threads
    # ready to run (cores.ready_threads) say what the wall clock would be on idle cores, whatever the load
    return {"n_objects": n, "seconds": secs, "cpu_s": usage.ru_utime + usage.ru_stime - c0,
            "main_thread_cpu_s": main_cpu, "ready_threads": cores.ready_threads(r0, secs),
            "peak_rss_mb": usage.ru_maxrss / 1024.0,
            "n_iter": int(model.n_iter_), "nmi": float(normalized_mutual_info_score(labels, model.labels_)),
            "load_1m": os.getloadavg()[0]}


def bench_tilt_mining(quick: bool, seed: int, size: int | None = None) -> dict:
    """Mining ``size`` tumbled objects (default 3,000) with the default tilts, K = 16, n_init = 2, max_iter = 15, in
    its own subprocess so its peak resident memory is its own.  Targets at 3,000: under 5 minutes and 2 GB on 2
    cores.  ``quick`` is a smoke test of the row: 30 objects (or ``size``), K = 3, one restart of 2 passes."""
    import json
    import subprocess
    import sys
    n = size or (30 if quick else 3000)
    k, n_init, max_iter = (3, 1, 2) if quick else (16, 2, 15)
    code = ("import json; from protomine.mine.tiltbench import _mine_tumbled_once; "
            f"print(json.dumps(_mine_tumbled_once({n}, {k}, {seed}, {n_init}, {max_iter})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    row = json.loads(out.stdout.strip().splitlines()[-1])
    row.update(n_prototypes=k, n_init=n_init, max_iter=max_iter)
    return row
