"""Pose search: observation-weighted distance between objects and posed prototypes, all yaws at once.

Conventions (shared by the whole ``mine`` stage)
------------------------------------------------
- Features ``X`` (N, C, R, A, H) float32: channels, radial, azimuth, height.  Observation weights
  ``W`` (N, R, A, H) float32 in [0, 1]; 0 = never seen.  Prototypes ``P`` (K, C, R, A, H) with
  prototype weights ``V`` (K, R, A, H).  A 2-D image is a one-layer polar grid (H = 1).
- ``roll(a, s)`` is ``numpy.roll`` along the azimuth axis: ``roll(a, s)[j] = a[j - s]``.  Yawing an
  object by +d degrees rolls its volume by +d / (360 / A) bins.
- A pose g = (s, sigma): a yaw shift of s bins and a scale sigma.  The posed prototype is
  ``g.mu = roll(P_sigma, s)`` with weights ``g.v = roll(V_sigma, s)``, so a match with yaw ``y`` degrees
  means *the object looks like the prototype rolled by y* (object yaw relative to the prototype).

Distance
--------
For one object (x, w) and one posed prototype (g.mu, g.v)::

    D(g) = sum_{c, cells} w * g.v * (x_c - g.mu_c)^2  /  (C * sum_{cells} w * g.v  +  eps)

i.e. the mean squared feature difference over channels, weighted by how well *both* sides observed
each cell.  Cells with w = 0 (unseen in the object) or g.v = 0 (unknown in the prototype) play no part.
When no cell is observed by both, the numerator and the denominator are 0 and D = 0 / eps = 0 is
meaningless, so such pairs get ``D = inf`` (``min_overlap`` controls the threshold on the denominator).

Expanding the square gives, for every shift s at once, four cross-correlations along azimuth
(``corr(f, g)(s) = sum_j f[j] g[j - s]``), each summed over R, H (and C)::

    num(s) = corr(w |x|^2, v)(s) + corr(w, v |mu|^2)(s) - 2 sum_c corr(w x_c, v mu_c)(s)
    den(s) = C * corr(w, v)(s)

By the correlation theorem ``corr(f, g) = irfft(rfft(f) * conj(rfft(g)))``, so per azimuthal frequency
the sums over (C, R, H) become one complex matrix product (prototypes x features) @ (features x
objects), run as three real ones by Gauss's method (p_re (o_re + o_im), (p_re + p_im) o_re, (p_re - p_im) o_im)
whose partial products the inverse transform combines (``_cross_spectra``); the denominator involves
w alone, so its product runs on the w block of the object factors only.  The data are real, so the rfft's
bin 0 (and the Nyquist bin when A is even) are real: spectra are stored as A real rows (the F real parts,
then the imaginary parts of the complex bins only, ``spectrum_rows``), and those bins need one real
product instead of a complex one (53 instead of 76 (M, f) @ (f, n) products for A = 36: 2 real bins, 17 complex
bins of 3).  Object and prototype factors share one layout (frequency, item, feature), and
the products' output (frequency, prototype, object) is what the inverse transform reads as one matrix,
so distances come out (shift, prototype, object) without a transposing copy anywhere.  Objects are
processed in chunks so memory is bounded by the chunk size.  The pose bank orders its scaled prototypes
scale-major, so searching only a window of neighbouring scales (the engine's intermediate passes) is a
slice of the prototype factors.

Scales
------
A prototype scaled by sigma is ``P_sigma(rho, z) = P(rho / sigma, z / sigma)``: for radial bin i (centre
(i + 0.5) / R of rho_max) the source position is index ``(i + 0.5) / sigma - 0.5``, sampled by linear
interpolation between the two neighbouring bins (likewise along height).  Source positions below the
first bin centre (near the axis / the base) take the first bin's value; source positions beyond the
grid's outer edge (index > n - 0.5, only when sigma < 1) are *unknown*: feature 0 and weight 0, so they
are ignored by the distance.  Axes of length 1 (H = 1 images) are not resampled.

Best pose
---------
Per (object, prototype): argmin of D over the shifts and scales; the yaw is then refined to sub-bin
precision by fitting a parabola through D at the best shift and its two circular neighbours (same
scale): offset = (D[-1] - D[+1]) / (2 (D[-1] - 2 D[0] + D[+1])), clipped to [-0.5, 0.5].  The reported
distance is D at the best integer shift (the evaluated value, not the parabola's vertex).

Public API
----------
- ``pose_distances(X, W, P, V, *, scales=(1.0,), return_all=False, chunk_size=1024) -> PoseMatch``
- ``pose_distances_naive(...)``: the same by explicitly rolling every prototype for every shift (tests only).
- ``dense_distances(X, W, P, V, *, chunk_size=1024) -> (N, K)``: single-pose distance (bench baseline).
- ``scale_prototypes(P, V, scales) -> (Ps, Vs)``, ``shift_volume(a, shift_bins, axis)``: helpers that the
  engine and symmetry modules reuse.
- ``spectrum_rows(A) -> (F, Fc)``, ``complex_spectra(spec, A)``: the real spectra layout (A rows) shared with the
  engine's aligned sums and the tilt search's column factors, and its complex bins.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import torch

from .searchpool import pool_here, pooled

EPS = 1e-6


@dataclass
class PoseMatch:
    """Best pose per (object, prototype).

    D : (N, K) float32 pose-minimised distance (inf where object and prototype share no observed cell).
    yaw_deg : (N, K) float32 in [0, 360): object ~= prototype rolled by yaw_deg.
    scale : (N, K) float32, the best scale factor (object ~= prototype scaled by it).
    all_D : (N, K, S, A) float32 distance for every scale and integer shift, only with return_all=True.
    tilt : (N, K) int64 index of the best up direction (``mine.tilts.TiltGrid.dirs``; 0 = upright, the
        only one of a yaw-only search), or None.
    """

    D: np.ndarray
    yaw_deg: np.ndarray
    scale: np.ndarray
    all_D: np.ndarray | None = None
    tilt: np.ndarray | None = None


# --- validation ----------------------------------------------------------------------------

def _check_arrays(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray) -> None:
    if X.ndim != 5:
        raise ValueError(f"X must have shape (N, C, R, A, H), got {X.shape}")
    if W.shape != X.shape[:1] + X.shape[2:]:
        raise ValueError(f"W must have shape {X.shape[:1] + X.shape[2:]} (N, R, A, H), got {W.shape}")
    if P.ndim != 5 or P.shape[1:] != X.shape[1:]:
        raise ValueError(f"P must have shape (K, {', '.join(map(str, X.shape[1:]))}), got {P.shape}")
    if V.shape != P.shape[:1] + P.shape[2:]:
        raise ValueError(f"V must have shape {P.shape[:1] + P.shape[2:]} (K, R, A, H), got {V.shape}")


def _check_scales(scales: Sequence[float]) -> tuple[float, ...]:
    scales = tuple(float(s) for s in scales)
    if not scales or any(not (0.0 < s < np.inf) for s in scales):
        raise ValueError(f"scales must be a non-empty sequence of positive numbers, got {scales}")
    return scales


# --- geometry helpers ----------------------------------------------------------------------

def _resample_axis(a: np.ndarray, mask: np.ndarray, sigma: float, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """Resample ``a`` along ``axis`` so that out(i) = a((i + 0.5) / sigma - 0.5); mask marks in-grid."""
    n = a.shape[axis]
    if n == 1 or sigma == 1.0:
        return a, mask
    pos = (np.arange(n) + 0.5) / sigma - 0.5
    inside = pos <= n - 0.5
    pos = np.clip(pos, 0.0, n - 1)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, n - 1)
    t = (pos - lo).astype(a.dtype)
    shape = [1] * a.ndim
    shape[axis] = n
    t = t.reshape(shape)
    out = np.take(a, lo, axis=axis) * (1 - t) + np.take(a, hi, axis=axis) * t
    mshape = [1] * mask.ndim
    mshape[axis if mask.ndim == a.ndim else axis - 1] = n
    return out, mask & inside.reshape(mshape)


def scale_prototypes(P: np.ndarray, V: np.ndarray, scales: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    """Prototypes scaled by every factor: Ps (K, S, C, R, A, H), Vs (K, S, R, A, H) float32.

    P_sigma(rho, z) = P(rho / sigma, z / sigma) with linear interpolation; cells that would sample
    outside the grid get feature 0 and weight 0 (see the module docstring).
    """
    P = np.asarray(P, dtype=np.float32)
    V = np.asarray(V, dtype=np.float32)
    K, C, R, A, H = P.shape
    Ps = np.empty((K, len(scales), C, R, A, H), np.float32)
    Vs = np.empty((K, len(scales), R, A, H), np.float32)
    for si, sigma in enumerate(scales):
        p, v = P, V
        m = np.ones((1, R, 1, H), bool)
        # radial axis is 2 in P (K, C, R, A, H) and 1 in V; height is 4 and 3
        p, _ = _resample_axis(p, m, sigma, 2)
        v, m = _resample_axis(v, m, sigma, 1)
        p, _ = _resample_axis(p, m, sigma, 4)
        v, m = _resample_axis(v, m, sigma, 3)
        Vs[:, si] = v * m
        Ps[:, si] = p * m[:, None]
    return Ps, Vs


def shift_volume(a: np.ndarray, shift_bins: np.ndarray | float, axis: int) -> np.ndarray:
    """Roll ``a`` along ``axis`` by a possibly fractional number of bins (linear interpolation).

    ``a`` (N, ...) with a per-item shift ``shift_bins`` (N,) (or a scalar); the result is
    ``(1 - t) roll(a, f) + t roll(a, f + 1)`` with f = floor(shift), t = shift - f.  Linear
    interpolation keeps weights inside [0, 1], which a Fourier shift would not.
    """
    a = np.asarray(a)
    n_ax = a.shape[axis]
    shifts = np.broadcast_to(np.asarray(shift_bins, dtype=np.float64), (a.shape[0],))
    f = np.floor(shifts)
    t = (shifts - f).astype(a.dtype)
    f = f.astype(np.int64)
    idx = np.arange(n_ax)
    # gather index for roll by f: out[j] = a[j - f]
    src0 = (idx[None, :] - f[:, None]) % n_ax  # (N, A)
    src1 = (src0 - 1) % n_ax
    shape = [a.shape[0]] + [1] * (a.ndim - 1)
    shape[axis] = n_ax
    g0 = np.take_along_axis(a, src0.reshape(shape), axis=axis)
    g1 = np.take_along_axis(a, src1.reshape(shape), axis=axis)
    tt = t.reshape([a.shape[0]] + [1] * (a.ndim - 1))
    return g0 * (1 - tt) + g1 * tt


def _parabolic_offset(dm: np.ndarray, d0: np.ndarray, dp: np.ndarray) -> np.ndarray:
    """Vertex offset in [-0.5, 0.5] of the parabola through (-1, dm), (0, d0), (1, dp)."""
    with np.errstate(divide="ignore", invalid="ignore"):  # no overlap: inf - inf, set to 0 below
        curv = dm - 2 * d0 + dp
        off = 0.5 * (dm - dp) / curv
    off = np.where(np.isfinite(off) & (curv > 0), off, 0.0)
    return np.clip(off, -0.5, 0.5)


def _best_pose(allD: np.ndarray, scales: tuple[float, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """allD (n, K, S, A) -> D (n, K), yaw_deg (n, K), scale (n, K)."""
    n, K, S, A = allD.shape
    flat = allD.reshape(n, K, S * A)
    best = np.argmin(flat, axis=2)
    D = np.take_along_axis(flat, best[..., None], axis=2)[..., 0]
    si, sh = np.divmod(best, A)
    row = np.take_along_axis(allD, si[..., None, None].repeat(A, axis=3), axis=2)[:, :, 0]  # (n, K, A)
    dm = np.take_along_axis(row, ((sh - 1) % A)[..., None], axis=2)[..., 0]
    dp = np.take_along_axis(row, ((sh + 1) % A)[..., None], axis=2)[..., 0]
    off = _parabolic_offset(dm.astype(np.float64), D.astype(np.float64), dp.astype(np.float64))
    off = np.where(np.isfinite(D), off, 0.0)
    yaw = np.mod((sh + off) * (360.0 / A), 360.0)
    return D.astype(np.float32), yaw.astype(np.float32), np.asarray(scales, np.float32)[si]


# --- fast kernel ---------------------------------------------------------------------------

def spectrum_rows(A: int) -> tuple[int, int]:
    """(F, Fc) of the real spectra layout for A azimuth bins: F = A // 2 + 1 rfft bins, of which bins 1..Fc
    (Fc = A - F) are complex and the others (bin 0, and the Nyquist bin F - 1 when A is even) real.

    Real spectra hold A rows: [Re_0 .. Re_{F-1}, Im_1 .. Im_Fc].  The imaginary parts of the real bins are 0
    for real data (conjugate symmetry), so they are not stored: A real numbers carry the spectrum of A real
    samples exactly, and the products and transforms skip the rows that would be zeros."""
    F = A // 2 + 1
    return F, A - F


def _real_bins(A: int) -> slice:
    """Rows of the real spectra (all real parts come first) holding the real-only bins: 0, and F - 1 if A is even."""
    F, Fc = spectrum_rows(A)
    return slice(0, F, F - 1) if F - 1 > Fc else slice(0, 1)


def _dft_matrix(A: int) -> torch.Tensor:
    """(A, A) real DFT matrix: rows cos(2 pi k a / A) for k = 0..F-1, then -sin(2 pi k a / A) for k = 1..Fc
    (:func:`spectrum_rows`), so that M @ f = [Re rfft(f); Im rfft(f)[1:Fc + 1]], the real spectra layout."""
    F, Fc = spectrum_rows(A)
    a = np.arange(A)[None, :]
    cos = np.cos(2.0 * np.pi * np.arange(F)[:, None] * a / A)
    sin = -np.sin(2.0 * np.pi * np.arange(1, Fc + 1)[:, None] * a / A)
    return torch.from_numpy(np.concatenate([cos, sin]).astype(np.float32))


def complex_spectra(spec: torch.Tensor, A: int) -> torch.Tensor:
    """Real spectra (A, ...) (:func:`spectrum_rows` layout) -> the complex rfft bins (F, ...), zero imaginary
    parts restored for the real bins."""
    F, Fc = spectrum_rows(A)
    im = torch.zeros_like(spec[:F])
    im[1:Fc + 1] = spec[F:]
    return torch.complex(spec[:F], im)


SPECTRA_BLOCK_BYTES = 1 << 21  # the object factors of one block of a chunk (stays in cache; 2 MB: 0.173 s instead of
# 0.19 s for 1 MB, spectra of 4,096 objects, 1 thread, best of 5 interleaved at load 3)
SPECTRA_SHARES = 4  # shares of a chunk's objects per thread when several threads build the object spectra
MATCH_SHARES = 1  # blocks of a chunk's objects per thread when several threads match them (PoseBank.match_spectra)
MATCH_MIN_BLOCK = 32  # ... of at least this many objects (fewer: one block on torch's threads, as before)
STACKED_KEEP_BYTES = 64 << 20  # a bank keeps its factors laid out for Gauss's products up to this size (_kept_stacked)




def _half_dfts(dft: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor] | None:
    """The real DFT matrix ``dft`` (A, A) split in two (A / 2, A / 2) halves (even rows, odd rows), or None.

    Radix-2 decimation in frequency: for even A, bin k of x equals bin k of the half-length sequence
    x[:A/2] + (-1)^k x[A/2:] (as cos and sin of 2 pi k (a + A/2) / A = (-1)^k those of 2 pi k a / A), so the even
    bins are a half-size product on x[:A/2] + x[A/2:] and the odd bins on x[:A/2] - x[A/2:]: half the
    arithmetic of the full product.  In the real layout (:func:`spectrum_rows`) row r holds a bin of r's parity
    when 4 divides A (the imaginary rows start at bin 1 in row A / 2 + 1), so each half is every other row of
    the result; for other A (no such layout) this returns None and the full product runs."""
    A = dft.shape[1]
    if A % 4 or dft.shape[0] != A:
        return None
    h = A // 2
    sign = torch.ones((A, 1))
    sign[1::2] = -1.0
    if not torch.allclose(dft[:, h:], dft[:, :h] * sign, rtol=0.0, atol=1e-6):
        return None
    return dft[0::2, :h].contiguous(), dft[1::2, :h].contiguous()


def _object_spectra_rows(x: torch.Tensor, w: torch.Tensor, dft: torch.Tensor, flat: torch.Tensor,
                         i0: int, i1: int) -> None:
    """Object factors of objects i0..i1 into their columns of ``flat`` (A, n (C + 2) R H), in cache-sized blocks
    (see :func:`_object_spectra`)."""
    n, C, R, A, H = x.shape
    feat = (C + 2) * R * H
    b = max(1, min(i1 - i0, SPECTRA_BLOCK_BYTES // (4 * A * feat)))
    stage = torch.empty((b, C + 2, R, A, H), dtype=torch.float32)  # the block's factors, object-major
    buf = torch.empty((A, b, C + 2, R, H), dtype=torch.float32)  # azimuth-first: factors, or their radix-2 folds
    square = torch.empty((b, R, A, H), dtype=torch.float32)
    halves = _half_dfts(dft)
    h = A // 2
    for j0 in range(i0, i1, b):
        j1 = min(i1, j0 + b)
        sg, st = stage[:j1 - j0], buf[:, :j1 - j0]
        xs, ws, sq, sq2 = sg[:, 2:], sg[:, 1], sg[:, 0], square[:j1 - j0]
        xs.copy_(x[j0:j1])  # read in memory order: a permuted read of x itself ran at a quarter of the rate
        ws.copy_(w[j0:j1])
        torch.mul(xs[:, 0], xs[:, 0], out=sq)
        for c in range(1, C):
            # a product then a sum, not addcmul: on contiguous data addcmul's vector loop fuses them (one
            # rounding) and its tail does not, so its bits would depend on how threads split the block
            sq.add_(torch.mul(xs[:, c], xs[:, c], out=sq2))
        sq.mul_(ws)
        xs.mul_(sg[:, 1:2])  # w x_c
        az = sg.permute(3, 0, 1, 2, 4)  # azimuth-first view of the staged factors (in cache)
        cols = flat[:, j0 * feat:j1 * feat]
        f = st.reshape(A, -1)
        if halves is None:
            st.copy_(az)
            torch.mm(dft, f, out=cols)
            continue
        torch.add(az[:h], az[h:], out=st[:h])  # folds for the even bins
        torch.sub(az[:h], az[h:], out=st[h:])  # and for the odd bins
        torch.mm(halves[0], f[:h], out=cols[0::2])
        torch.mm(halves[1], f[h:], out=cols[1::2])


def _object_spectra(x: torch.Tensor, w: torch.Tensor, dft: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
    """Object factors in the frequency domain: x (n, C, R, A, H), w (n, R, A, H) -> (A, n, (C + 2) R H).

    The azimuthal rfft of [w |x|^2, w, w x_1..w x_C] as real spectra (:func:`spectrum_rows`: A rows, the real
    parts of the F bins, then the imaginary parts of the complex bins).
    Built in blocks of a few objects (``SPECTRA_BLOCK_BYTES`` of factors): a block of x and w is copied in
    memory order into a reused staging buffer (b, C + 2, R, A, H) (a permuted read of x from main memory ran
    at 1.4 GB/s, a sequential one at 9.7 GB/s), the products [w |x|^2, w x_c] run there, the radix-2 folds
    (:func:`_half_dfts`) are written azimuth-first (A, b (C + 2) R H) from it, and the DFT is two half-size
    matrix products written straight into every other row of the block's columns of the result, the layout
    the batched products need (one (A, A) product when 4 does not divide A).  The buffers stay in cache, so
    main memory sees x and w read once and the spectra written once (measured before the staging and the
    folds on 512 objects, one thread: 37 ms instead of 53 ms for the same products on whole-chunk
    temporaries, which went through memory four times).  Column blocks do not change any column's
    arithmetic: the result is the same to the bit, whatever the blocks, shares and threads.

    When torch runs T > 1 threads, T Python threads (``searchpool.spectra_pool``) build the objects' blocks with
    single-threaded ops, ``SPECTRA_SHARES`` x T contiguous shares of the objects taken in turn: a block's ops
    are too small to pay for waking torch's other threads for every one of them (on a shared machine, 512
    objects took 290 ms wall at load 3 that way, whole-chunk ops on both threads 108 ms, this 76 ms; 23 / 34 /
    26 ms at load 2.3, best of 15).  Same result to the bit.

    ``out``: a contiguous float32 tensor (A, n, (C + 2) R H) to write into (every element is written).
    """
    n, C, R, A, H = x.shape
    feat = (C + 2) * R * H
    out = torch.empty((dft.shape[0], n, feat), dtype=torch.float32) if out is None else out
    flat = out.view(dft.shape[0], n * feat)
    threads = torch.get_num_threads()
    b = max(1, SPECTRA_BLOCK_BYTES // (4 * A * feat))
    pool = pool_here()
    if pool is None:
        _object_spectra_rows(x, w, dft, flat, 0, n)
        return out
    # a few shares per thread, taken in turn: a thread that the machine's other work slows takes fewer.  Even one
    # share runs in the pool: the transform's small products run on one thread in every case, as MKL's threaded
    # kernels round differently from its single-threaded ones for some shapes (measured: (6, 6) @ (6, 4,032) on 2
    # threads vs 1), and a chunk's spectra must not depend on the threads (worker processes run one)
    cuts = np.linspace(0, n, min(SPECTRA_SHARES * threads, -(-n // b)) + 1).round().astype(int)
    list(pool.map(lambda ij: _object_spectra_rows(x, w, dft, flat, *ij), zip(cuts[:-1], cuts[1:])))
    return out


def _prototype_spectra(Ps: torch.Tensor, Vs: torch.Tensor, dft: torch.Tensor | None = None) -> tuple[torch.Tensor, ...]:
    """Prototype factors: Ps (M, C, R, A, H), Vs (M, R, A, H) -> (Pn, Pd), Pn (A, M, (C + 2) R H) and
    Pd (A, M, R H): real spectra (:func:`spectrum_rows`) of the azimuthal rfft of the numerator factors
    [v, v |mu|^2, -2 v mu_1 .. -2 v mu_C] and of the denominator factor C v (module docstring), in the
    object spectra's layout (frequency, item, feature), so that a prototype is a row of each frequency's
    matrix and a window of prototypes a slice of rows.  The denominator, which only involves w, meets the w
    block of the object spectra alone (its factors elsewhere would be zeros).  The DFT is one matrix
    product with the real DFT matrix ``dft`` (A, A) (built here when not given)."""
    M, C, R, A, H = Ps.shape
    dft = _dft_matrix(A) if dft is None else dft
    rows = dft.shape[0]
    pn = torch.empty((rows, M, (C + 2) * R * H), dtype=torch.float32)
    pd = torch.empty((rows, M, R * H), dtype=torch.float32)
    # blocks of prototypes keep the transforms' temporaries small (one block is ~1/S of the bank)
    for m0 in range(0, M, 64):
        p, v = Ps[m0:m0 + 64], Vs[m0:m0 + 64]
        m1 = m0 + p.shape[0]
        vmu = v[:, None] * p
        num = torch.cat([v[:, None], (vmu * p).sum(1)[:, None], -2.0 * vmu], dim=1)  # (m, C + 2, R, A, H)
        for t, out in ((num, pn), (C * v[:, None], pd)):
            spec = torch.mm(dft, t.permute(3, 0, 1, 2, 4).reshape(A, -1))  # (A, m features)
            out[:, m0:m1] = spec.view(rows, m1 - m0, -1)
    return pn, pd


def _spectra_of(x: np.ndarray, w: np.ndarray, dft: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
    """Object spectra (A, n, (C + 2) R H) of numpy x (n, C, R, A, H), w (n, R, A, H) (``out``: written into it)."""
    xt = torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32))
    wt = torch.from_numpy(np.ascontiguousarray(w, dtype=np.float32))
    return _object_spectra(xt, wt, dft, out)


def _idft_coefficients(A: int) -> tuple[np.ndarray, np.ndarray]:
    """float64 (A, F) and (A, Fc): the inverse transform's coefficients of the real parts Re_0 .. Re_{F-1} and of the
    imaginary parts Im_1 .. Im_Fc of real spectra (:func:`spectrum_rows`), before the division by A."""
    F, Fc = spectrum_rows(A)
    s = np.arange(A)[:, None]
    c = np.full(F, 2.0)
    c[0] = 1.0
    if F - 1 > Fc:
        c[-1] = 1.0  # the Nyquist bin of an even A
    re = c * np.cos(2.0 * np.pi * s * np.arange(F)[None, :] / A)
    im = -2.0 * np.sin(2.0 * np.pi * s * np.arange(1, Fc + 1)[None, :] / A)
    return re, im


@functools.lru_cache(maxsize=8)
def _idft_matrix(A: int) -> torch.Tensor:
    """(A, A) inverse of :func:`_dft_matrix`: for real spectra Z (A, L) (rows [Re_0 .. Re_{F-1}, Im_1 .. Im_Fc]),
    ``M @ Z`` equals ``irfft(Z, n=A, dim=0)`` of the complex bins."""
    re, im = _idft_coefficients(A)
    return torch.from_numpy((np.concatenate([re, im], axis=1) / A).astype(np.float32))


@functools.lru_cache(maxsize=8)
def _idft_of_partials(A: int) -> torch.Tensor:
    """(A, nr + 3 Fc): the inverse transform of the cross spectra from the real partial products that
    :func:`_cross_spectra` leaves, columns in its row order: first the nr real-only bins (:func:`_real_bins`,
    where the cross spectrum is p o, real), then Gauss's three products of every complex bin k = 1..Fc, product
    j = 0, 1, 2 (j-major): k1 = p_re (o_re + o_im), k2 = (p_re + p_im) o_re, k3 = (p_re - p_im) o_im.  The cross
    spectrum conj(p) o has Re_k = p_re o_re + p_im o_im = k1 - k3 and Im_k = p_re o_im - p_im o_re = k1 - k2, so
    with :func:`_idft_matrix`'s coefficients re_k (of Re_k) and im_k (of Im_k) a shift's sum re_k Re_k + im_k Im_k
    is (re_k + im_k) k1 - im_k k2 - re_k k3: those three columns (computed in float64, then rounded)."""
    F, Fc = spectrum_rows(A)
    re_all, im = _idft_coefficients(A)
    real, re = re_all[:, range(*_real_bins(A).indices(F))], re_all[:, 1:Fc + 1]   # complex bins' c is 2
    return torch.from_numpy((np.concatenate([real, re + im, -im, -re], axis=1) / A).astype(np.float32))


def stack_complex(p: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
    """Real spectra p (A, M, f) (:func:`spectrum_rows`) -> (2, Fc, M, f): per complex bin, p_re + p_im and p_re - p_im,
    the prototype operands of Gauss's second and third products (:func:`_cross_spectra`; the first's, p_re, are p's
    own rows 1..Fc).  A bank lays its factors out this way once (:meth:`PoseBank.match_spectra`, once per scale window
    and call) instead of once per product.  ``out``: a contiguous tensor (2, Fc, M, f) to write into."""
    A, M = p.shape[:2]
    F, Fc = spectrum_rows(A)
    out = torch.empty((2, Fc) + tuple(p.shape[1:]), dtype=p.dtype) if out is None else out
    re, im = p[1:Fc + 1], p[F:]
    torch.add(re, im, out=out[0])
    torch.sub(re, im, out=out[1])
    return out


def object_sums(ob: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
    """Real spectra ob (A, n, f) -> (Fc, n, f): o_re + o_im of every complex bin, the object operand of Gauss's first
    product (:func:`_cross_spectra`).  ``out``: a tensor (Fc, n, f) to write into."""
    F, Fc = spectrum_rows(ob.shape[0])
    return torch.add(ob[1:Fc + 1], ob[F:], out=out)


def _cross_spectra(p: torch.Tensor, ob: torch.Tensor, ps: torch.Tensor | None = None, out: torch.Tensor | None = None,
                   osum: torch.Tensor | None = None) -> torch.Tensor:
    """Per-frequency partial sums over features of ob conj(p): p (A, M, f), ob (A, n, f) real spectra
    (:func:`spectrum_rows`) -> (nr + 3 Fc, M n) rows (see :func:`_idft_of_partials`) of prototype-major (M, n)
    blocks; :func:`_idft_of_partials` turns them into distances.  The real-only bins need one product each,
    p o^T; every complex bin three real (M, f) @ (f, n) products by Gauss's method instead of the four of the
    complex product written out: k1 = p_re (o_re + o_im), k2 = (p_re + p_im) o_re, k3 = (p_re - p_im) o_im, each
    one batched product over the bins, whose combination into real and imaginary parts rides on the inverse
    transform's product.  Three quarters of the arithmetic (measured on one thread, 160 prototypes x 512 objects,
    17 bins x 672 features: 89.5 -> 72.3 ms); the sums change the products' last bits (largest error against
    float64 3.6e-7 -> 6.6e-7 of the largest value).  The objects enter transposed (a view), so the result already
    has the (rows, prototype, object) layout that the inverse transform reads as one matrix, with no copy in
    between.  ``ps``: :func:`stack_complex` of p; ``osum``: :func:`object_sums` of ob (both built here when not
    given).  ``out``: a contiguous float32 tensor ((nr + 3 Fc) M, n) to write into (:func:`_distances_in_scratch`)."""
    A = p.shape[0]
    F, Fc = spectrum_rows(A)
    M, n = p.shape[1], ob.shape[1]
    rb = _real_bins(A)
    nr = len(range(*rb.indices(A)))
    t = torch.empty((nr + 3 * Fc) * M, n, dtype=torch.float32) if out is None else out
    torch.bmm(p[rb], ob[rb].transpose(1, 2), out=t[:nr * M].view(nr, M, n))
    if Fc:
        ps = stack_complex(p) if ps is None else ps  # (2, Fc, M, f), 1/n of the products' bytes
        osum = object_sums(ob) if osum is None else osum
        for j, (pp, part) in enumerate(((p[1:Fc + 1], osum), (ps[0], ob[1:Fc + 1]), (ps[1], ob[F:]))):
            o0 = (nr + j * Fc) * M
            torch.bmm(pp, part.transpose(1, 2), out=t[o0:o0 + Fc * M].view(Fc, M, n))
    return t.view(nr + 3 * Fc, M * n)


def _distances_from_spectra(o: torch.Tensor, factors: tuple[torch.Tensor, ...], A: int,
                            min_overlap: float, stacked: tuple[torch.Tensor, ...] | None = None) -> torch.Tensor:
    """Distances for every shift from object spectra o (A, n, (C + 2) R H): (A, M, n) float32 tensor
    (shift, prototype, object).

    ``factors`` = (Pn, Pd) of :func:`_prototype_spectra`.  The per-frequency products are batched matrix
    products (:func:`_cross_spectra`); the inverse transform is one matrix product (A, nr + 3 Fc) @ (nr + 3 Fc, M n)
    on their output as it lies.  ``stacked``: :func:`stack_complex` of (Pn, Pd), when the caller keeps them for
    several products.  The objects' o_re + o_im (:func:`object_sums`) are summed once for both products (the
    denominator's are the w block's columns of the numerator's).
    """
    pn, pd = factors
    sn, sd = (None, None) if stacked is None else stacked
    n, M, RH = o.shape[1], pn.shape[1], pd.shape[2]
    idft = _idft_of_partials(A)
    osum = object_sums(o) if spectrum_rows(A)[1] else None
    num = torch.mm(idft, _cross_spectra(pn, o, sn, osum=osum))
    den = torch.mm(idft, _cross_spectra(pd, o[:, :, RH:2 * RH], sd, osum=None if osum is None else osum[:, :, RH:2 * RH]))
    return distance_of_sums(num, den, min_overlap).view(A, M, n)


def distance_of_sums(num: torch.Tensor, den: torch.Tensor, min_overlap: float) -> torch.Tensor:
    """The distance from its sums (module docstring): num / (den + eps), num clamped at 0, inf where den <=
    ``min_overlap`` (the caller's C x its per-channel threshold); in place, into ``num`` (``den`` is changed too)."""
    unseen = den <= min_overlap
    d = num.clamp_min_(0.0).div_(den.add_(EPS))
    return d.masked_fill_(unseen, float("inf"))


def _distances_in_scratch(o: torch.Tensor, factors: tuple[torch.Tensor, ...], A: int, min_overlap: float,
                          stacked: tuple[torch.Tensor, ...] | None = None) -> torch.Tensor:
    """:func:`_distances_from_spectra` (the same operations, the same values) with its partial sums, distances and
    mask in the calling thread's reusable buffers (``cores.scratch``, inside ``cores.reused_scratch``): the result
    is valid until this thread's next call.  For the tilt search's coarse row blocks, whose temporaries (about 70 MB
    a block of 128 objects against its 960 copies x scales) were otherwise mapped and page-faulted afresh, block
    after block (``cores.large_blocks_mapped``)."""
    from ..cores import scratch
    pn, pd = factors
    sn, sd = (None, None) if stacked is None else stacked
    n, M, RH = o.shape[1], pn.shape[1], pd.shape[2]
    idft = _idft_of_partials(A)
    rows = idft.shape[1]
    Fc = spectrum_rows(A)[1]
    osum = object_sums(o, out=scratch("osum", (Fc, n, o.shape[2]))) if Fc else None
    num = torch.mm(idft, _cross_spectra(pn, o, sn, out=scratch("partials", (rows * M, n)), osum=osum),
                   out=scratch("num", (A, M * n)))
    den = torch.mm(idft, _cross_spectra(pd, o[:, :, RH:2 * RH], sd, out=scratch("partials", (rows * M, n)),
                                        osum=None if osum is None else osum[:, :, RH:2 * RH]),
                   out=scratch("den", (A, M * n)))
    unseen = torch.le(den, min_overlap, out=scratch("unseen", (A, M * n), torch.bool))
    d = num.clamp_min_(0.0).div_(den.add_(EPS))
    d.masked_fill_(unseen, float("inf"))
    return d.view(A, M, n)


def _first_min(t: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Minimum of t (L, ...) over its first axis and the first index holding it, as ``t.min(dim=0)``: the values
    by ``amin`` (a vectorised reduction; with indices, torch's reduction over the outer axis of a (36, 16,384)
    block took 2.1 ms instead of 0.07), the index by one comparison of every row with it, as bytes (1 where equal)
    times the row's rank L - s, whose greatest value over the rows (vectorised like the values) is the first row
    holding the minimum; none (a NaN minimum) gives index 0.  (36, 16,384): 0.9-1.2 ms instead of 1.7-2.6 ms for a
    masked fill per row, last row first; the same indices.)"""
    D = t.amin(dim=0)
    L = t.shape[0]
    if L > 255:  # ranks beyond a byte: one masked fill per row, last row first
        idx = torch.zeros(D.shape, dtype=torch.int64)
        for s in range(L - 1, -1, -1):
            idx.masked_fill_(t[s] == D, s)
        return D, idx
    rank = torch.arange(L, 0, -1, dtype=torch.uint8).view((L,) + (1,) * (t.dim() - 1))
    top = torch.eq(t, D).view(torch.uint8).mul_(rank).amax(dim=0).to(torch.int64)
    return D, torch.where(top > 0, L - top, 0)


def _best_pose_nska(d: torch.Tensor, scales: tuple[float, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """d (n, S, K, A) tensor (any strides; :func:`_distances_from_spectra` leaves the shifts outermost) -> D (n, K),
    yaw_deg (n, K), scale (n, K); same rule as :func:`_best_pose` (the first minimum in scale-major, then shift
    order).

    Nothing of size (n, S, K, A) is copied: the minimum over the shifts (values only, a fast reduction in any
    layout), the first scale holding the minimum, then the shifts of that scale alone (gathered, 1 / S of the
    distances) for the first shift holding it and its two neighbours.
    """
    n, S, K, A = d.shape
    ni, ki = torch.arange(n)[:, None], torch.arange(K)[None, :]
    if S == 1:
        row = d[:, 0]  # (n, K, A)
        si = torch.zeros((n, K), dtype=torch.int64)
        D, sh = _first_min(d.permute(3, 1, 2, 0)[:, 0])  # over the shifts, in their (A, K, n) order
        D, sh = D.transpose(0, 1), sh.transpose(0, 1)
    else:
        # reduced over the shifts in the (A, S, K, n) order: as a permuted view the reduction runs 30x slower
        _, si = d.permute(3, 1, 2, 0).amin(dim=0).permute(2, 0, 1).min(dim=1)  # (n, K): first scale with the least
        row = d[ni, si, ki]  # (n, K, A) at the best scale
        D, sh = row.min(dim=2)
    dm = row.gather(2, ((sh - 1) % A)[..., None])[..., 0]
    dp = row.gather(2, ((sh + 1) % A)[..., None])[..., 0]
    D, yaw = _refined_yaw(D, sh, dm, dp, A)
    return D, yaw, np.asarray(scales, np.float32)[si.numpy()]


def _refined_yaw(D: torch.Tensor, sh: torch.Tensor, dm: torch.Tensor, dp: torch.Tensor, A: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The least distances D, their first shifts sh and the distances dm, dp at the two circular neighbours
    (any one shape) -> D, yaw_deg float32: the shift refined by the parabola through the three (0 where D is
    not finite), in degrees of the A azimuth bins."""
    D, dm, dp = D.numpy(), dm.numpy(), dp.numpy()
    off = _parabolic_offset(dm.astype(np.float64), D.astype(np.float64), dp.astype(np.float64))
    off = np.where(np.isfinite(D), off, 0.0)
    yaw = np.mod((sh.numpy() + off) * (360.0 / A), 360.0)
    return D.astype(np.float32), yaw.astype(np.float32)


def _prepare(X, W, P, V, scales) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, tuple[float, ...]]:
    """Validate once at the boundary: float32 arrays of matching shapes and positive scales."""
    X, W, P, V = (np.asarray(a, dtype=np.float32) for a in (X, W, P, V))
    _check_arrays(X, W, P, V)
    return X, W, P, V, _check_scales(scales)


def pose_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, *,
                   scales: Sequence[float] = (1.0,), return_all: bool = False,
                   chunk_size: int = 1024, min_overlap: float = 1e-3) -> PoseMatch:
    """Best yaw and scale of every object against every prototype, by FFT correlation.

    X (N, C, R, A, H), W (N, R, A, H), P (K, C, R, A, H), V (K, R, A, H); see the module docstring
    for the distance.  Returns a :class:`PoseMatch` with D, yaw_deg, scale of shape (N, K)
    (and all_D (N, K, S, A) with ``return_all``).
    """
    X, W, P, V, scales = _prepare(X, W, P, V, scales)
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be >= 1, got {chunk_size}")
    return _pose_distances(X, W, PoseBank(P, V, scales), return_all=return_all,
                           chunk_size=chunk_size, min_overlap=min_overlap)


class PoseBank:
    """Prototypes scaled and transformed once, reused for many chunks of objects.

    P (K, C, R, A, H), V (K, R, A, H); ``scales`` the scale set.  Holds the conjugated spectra of
    the K * S scaled prototypes.
    """

    def __init__(self, P: np.ndarray, V: np.ndarray, scales: tuple[float, ...], run=None, factors=None):
        """``run(fn, items)``, when given, builds the bank a scale and a block of 64 scaled prototypes at a time
        (the same arithmetic; the tilt search spreads them over threads, ``searchpool.pooled``).  ``factors(dft)``, when
        given, builds the factors (Pn, Pd) of the scaled prototypes in the scale-major order of ``__init__`` instead
        (``tilts.TiltBank``: its column factors).

        Without ``run``, with torch at T > 1 threads (and not on one of the search pool's threads) the bank is built
        that way on the search's pool (``searchpool.pooled``, one torch thread each) rather than here on torch's T
        threads: its transforms are small products and elementwise ops, each of which woke torch's other thread and
        waited for it, and on a shared machine the waits cost more than the work.  Measured at load 7, 2 threads, CPU
        of the whole process: K = 32 at one scale 142 -> 16 ms, K = 64 x 5 scales 963 -> 141 ms, 256 x 3 1159 -> 427
        ms; the factors identical to the bit (K = 7, 8, 32, 64, 100, 256 at 1, 3, 5 scales)."""
        K, C, R, A, H = P.shape
        self.K, self.C, self.A, self.scales = K, C, A, scales
        S = len(scales)
        self.dft = _dft_matrix(A)
        if factors is not None:
            self.factors = factors(self.dft)
            return
        if run is None and pool_here() is not None:
            run = pooled
        if run is not None:
            self.factors = self._blocked_factors(P, V, run)
            return
        Ps, Vs = scale_prototypes(P, V, scales)
        # scale-major order (index s K + k), so that a window of neighbouring scales is a column slice
        self.factors = _prototype_spectra(torch.from_numpy(np.ascontiguousarray(Ps.swapaxes(0, 1)).reshape(S * K, C, R, A, H)),
                                          torch.from_numpy(np.ascontiguousarray(Vs.swapaxes(0, 1)).reshape(S * K, R, A, H)),
                                          self.dft)

    def _blocked_factors(self, P: np.ndarray, V: np.ndarray, run) -> tuple[torch.Tensor, torch.Tensor]:
        """The bank's factors built a scale (``scale_prototypes``) and a block of 64 scaled prototypes
        (``_prototype_spectra``) per item of ``run``; scale-major order as in ``__init__``."""
        K, C, R, A, H = P.shape
        S = len(self.scales)
        Ps = np.empty((S, K, C, R, A, H), np.float32)
        Vs = np.empty((S, K, R, A, H), np.float32)

        def scale(si: int) -> None:
            p, v = scale_prototypes(P, V, (self.scales[si],))
            Ps[si], Vs[si] = p[:, 0], v[:, 0]

        run(scale, range(S))
        Ps, Vs = torch.from_numpy(Ps.reshape(S * K, C, R, A, H)), torch.from_numpy(Vs.reshape(S * K, R, A, H))
        rows = self.dft.shape[0]
        pn = torch.empty((rows, S * K, (C + 2) * R * H), dtype=torch.float32)
        pd = torch.empty((rows, S * K, R * H), dtype=torch.float32)

        def spectra(m0: int) -> None:
            bn, bd = _prototype_spectra(Ps[m0:m0 + 64], Vs[m0:m0 + 64], self.dft)
            pn[:, m0:m0 + 64], pd[:, m0:m0 + 64] = bn, bd

        run(spectra, range(0, S * K, 64))
        return pn, pd

    def spectra(self, x: np.ndarray, w: np.ndarray, out: torch.Tensor | None = None) -> torch.Tensor:
        """Object spectra (A, n, (C + 2) R H) of x (n, C, R, A, H), w (n, R, A, H), reusable by callers; ``out``: a
        contiguous float32 tensor of that shape to write them into."""
        return _spectra_of(x, w, self.dft, out)

    def subset(self, keep: np.ndarray) -> "PoseBank":
        """The bank of prototypes ``keep`` (indices) only, sharing this bank's spectra (rows selected)."""
        keep = np.asarray(keep, np.int64)
        S = len(self.scales)
        rows = torch.from_numpy((np.arange(S)[:, None] * self.K + keep[None, :]).reshape(-1))  # scale-major s K + m
        out = object.__new__(PoseBank)
        out.K, out.C, out.A, out.scales, out.dft = len(keep), self.C, self.A, self.scales, self.dft
        out.factors = tuple(f.index_select(1, rows) for f in self.factors)
        return out

    def all_distances(self, x: np.ndarray, w: np.ndarray, min_overlap: float = 1e-3) -> np.ndarray:
        """x (n, C, R, A, H), w (n, R, A, H) -> (n, K, S, A) distances for every scale and shift."""
        d = _distances_from_spectra(self.spectra(x, w), self.factors, self.A, self.C * min_overlap)
        return d.view(self.A, len(self.scales), self.K, x.shape[0]).permute(3, 2, 1, 0).numpy()

    def match_spectra(self, o: torch.Tensor, min_overlap: float = 1e-3, return_all: bool = False,
                      scale_index: np.ndarray | None = None, window: int = 1, row_block: int | None = None,
                      run=None, reuse: bool = False) -> PoseMatch:
        """Best pose from object spectra o (A, n, (C + 2) R H) (see :meth:`spectra`).

        With ``scale_index`` (n,) (each object's current best scale, an index into the scales), only
        the 2 window + 1 neighbouring scales are searched for that object (the others count as inf);
        the product then costs (2 window + 1) / S of the full search.  The objects are taken a window of
        scales at a time (the window's prototype factors laid out for the products once,
        :func:`stack_complex`) and, with ``row_block``, in blocks of that many objects (bounds the per-shift
        distances' memory).  ``run(fn, items)``, when given, runs the blocks (``[fn(i) for i in items]`` by default;
        the tilt search spreads them over threads, ``searchpool.pooled``).  ``reuse``: each block's temporaries in its
        thread's reusable buffers (:func:`_distances_in_scratch`; the caller opens ``cores.reused_scratch``).

        Given neither ``run`` nor ``row_block``, with torch at T > 1 threads (and not on one of the search pool's
        threads) the objects are matched in ``MATCH_SHARES`` x T blocks on the search's pool, one torch thread each
        (``searchpool.pooled``), instead of one block whose products and transforms run on torch's T threads: each
        block's products are single-threaded kernels, which give the same values as the threaded ones on the whole
        chunk (the distances, yaws and scales of the bench's 4,096 objects x 32 prototypes identical to the bit), and
        the threads never wait for each other within a chunk.  Bench assignment data, 2 threads, load 11, median of
        4: 9.8 s wall / 1.90 s CPU -> 5.7 s / 1.02 s; see the commit for the bench row at lower load.
        """
        n, S, K, A = o.shape[1], len(self.scales), self.K, self.A
        span = 2 * window + 1
        if return_all:
            return self._match_all(o, min_overlap, scale_index, window)
        if run is None and row_block is None:
            pool = pool_here()
            threads = torch.get_num_threads()
            if pool is not None and n >= 2 * MATCH_MIN_BLOCK:
                row_block = max(MATCH_MIN_BLOCK, -(-n // (MATCH_SHARES * threads)))
                run = lambda fn, items: list(pool.map(fn, items))  # noqa: E731
        if scale_index is None or span >= S:
            windows = [(0, S, None)]
        else:
            lo_all = np.clip(np.asarray(scale_index) - window, 0, S - span)
            windows = [(int(lo), span, np.flatnonzero(lo_all == lo)) for lo in np.unique(lo_all)]
        D = np.empty((n, K), np.float32)
        yaw = np.empty((n, K), np.float32)
        sc = np.empty((n, K), np.float32)
        step = row_block or max(n, 1)
        for lo, sp, rows in windows:
            part = tuple(f[:, lo * K:(lo + sp) * K] for f in self.factors) if sp < S else self.factors
            stacked = None
            if spectrum_rows(A)[1]:
                stacked = self._kept_stacked() if sp == S and not reuse else self._stacked(part, reuse)
            m = n if rows is None else rows.size

            def block(r0: int) -> None:
                r1 = min(m, r0 + step)
                sel = slice(r0, r1) if rows is None else rows[r0:r1]
                if rows is None and (r0, r1) == (0, n):
                    og = o
                elif rows is None:
                    og = o[:, r0:r1]
                elif reuse:  # the block's objects gathered into this thread's reusable buffer
                    from ..cores import scratch
                    og = torch.index_select(o, 1, torch.from_numpy(rows[r0:r1]),
                                            out=scratch("rows", (o.shape[0], r1 - r0) + tuple(o.shape[2:])))
                else:
                    og = o.index_select(1, torch.from_numpy(rows[r0:r1]))
                dist = _distances_in_scratch if reuse else _distances_from_spectra
                d = dist(og, part, A, self.C * min_overlap, stacked).view(A, sp, K, r1 - r0)
                Db, yb, sb = _best_pose_nska(d.permute(3, 1, 2, 0), self.scales[lo:lo + sp])
                if sp < S:  # as the search over every scale with inf outside the window: no overlap -> scales[0]
                    sb = np.where(np.isfinite(Db), sb, np.float32(self.scales[0]))
                D[sel], yaw[sel], sc[sel] = Db, yb, sb

            (run or (lambda fn, items: [fn(i) for i in items]))(block, range(0, m, step))
        return PoseMatch(D, yaw, sc, None, tilt=np.zeros(D.shape, np.int64))

    def _kept_stacked(self) -> tuple[torch.Tensor, ...]:
        """:func:`stack_complex` of the whole bank's factors, laid out on the first call and kept when they take at most
        ``STACKED_KEEP_BYTES`` (a bank matched many times, as the label stage's, then pays for them once: for 52 views
        against 32 prototypes x 5 scales they were 1.5 ms of a 22 ms search, one thread); larger ones are laid out
        for every call, as before (a seeding bank of 512 objects x 5 scales would keep 0.27 GB)."""
        kept = getattr(self, "_stacked_full", None)   # banks made by ``subset`` start without one
        if kept is None:
            kept = self._stacked(self.factors, False)
            if sum(t.numel() for t in kept) * 4 <= STACKED_KEEP_BYTES:
                self._stacked_full = kept
        return kept

    @staticmethod
    def _stacked(part: tuple[torch.Tensor, ...], reuse: bool) -> tuple[torch.Tensor, ...]:
        """:func:`stack_complex` of each factor; with ``reuse`` in this thread's reusable buffers (``cores.scratch``)."""
        if not reuse:   # on the search's pool when torch runs T > 1 threads (as the bank's factors, :meth:`__init__`)
            return tuple(pooled(stack_complex, part))
        from ..cores import scratch
        Fc = spectrum_rows(part[0].shape[0])[1]
        return tuple(stack_complex(f, out=scratch(f"stacked{i}", (2, Fc) + tuple(f.shape[1:]))) for i, f in enumerate(part))

    def _match_all(self, o: torch.Tensor, min_overlap: float, scale_index: np.ndarray | None,
                   window: int) -> PoseMatch:
        """:meth:`match_spectra` with ``all_D`` (n, K, S, A) (inf outside each object's scale window)."""
        n, S, K, A = o.shape[1], len(self.scales), self.K, self.A
        span = 2 * window + 1
        if scale_index is None or span >= S:
            d = _distances_from_spectra(o, self.factors, A, self.C * min_overlap).view(A, S, K, n)
        else:
            d = torch.full((A, S, K, n), float("inf"))
            lo_all = np.clip(np.asarray(scale_index) - window, 0, S - span)
            for lo in np.unique(lo_all):
                rows = np.flatnonzero(lo_all == lo)
                part = tuple(f[:, lo * K:(lo + span) * K] for f in self.factors)  # scales lo..lo+span-1
                og = o if rows.size == n else o[:, torch.from_numpy(rows)]
                dd = _distances_from_spectra(og, part, A, self.C * min_overlap).view(A, span, K, rows.size)
                if rows.size == n:
                    d[:, lo:lo + span] = dd
                else:
                    d[:, lo:lo + span, :, torch.from_numpy(rows)] = dd
        d = d.permute(3, 1, 2, 0)  # (n, S, K, A) view
        D, yaw, sc = _best_pose_nska(d, self.scales)
        return PoseMatch(D, yaw, sc, d.permute(0, 2, 1, 3).numpy().copy(), tilt=np.zeros(D.shape, np.int64))

    def match(self, x: np.ndarray, w: np.ndarray, min_overlap: float = 1e-3,
              return_all: bool = False) -> PoseMatch:
        """Best pose of x (n, C, R, A, H), w (n, R, A, H) against every scaled prototype: (n, K) arrays."""
        return self.match_spectra(self.spectra(x, w), min_overlap, return_all)


def _pose_distances(X: np.ndarray, W: np.ndarray, bank: PoseBank, *, return_all: bool, chunk_size: int,
                    min_overlap: float) -> PoseMatch:
    parts = [bank.match(X[i:i + chunk_size], W[i:i + chunk_size], min_overlap, return_all)
             for i in range(0, X.shape[0], chunk_size)]
    if not parts:
        K = bank.K
        return PoseMatch(np.zeros((0, K), np.float32), np.zeros((0, K), np.float32), np.zeros((0, K), np.float32),
                         np.zeros((0, K, len(bank.scales), bank.A), np.float32) if return_all else None)
    cat = lambda name: np.concatenate([getattr(p, name) for p in parts])  # noqa: E731
    return PoseMatch(cat("D"), cat("yaw_deg"), cat("scale"), cat("all_D") if return_all else None)


# --- reference twins -----------------------------------------------------------------------

def _dense(x: np.ndarray, w: np.ndarray, P: np.ndarray, V: np.ndarray, min_overlap: float) -> np.ndarray:
    """Single-pose distance by matrix products over all cells: (n, K)."""
    n, C = x.shape[:2]
    xt = torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32)).reshape(n, C, -1)
    wt = torch.from_numpy(np.ascontiguousarray(w, dtype=np.float32)).reshape(n, -1)
    Pt = torch.from_numpy(np.ascontiguousarray(P, dtype=np.float32)).reshape(P.shape[0], C, -1)
    Vt = torch.from_numpy(np.ascontiguousarray(V, dtype=np.float32)).reshape(P.shape[0], -1)
    wx = wt[:, None] * xt
    obj = torch.cat([(wx * xt).sum(1), wt, wx.reshape(n, -1)], dim=1)
    vmu = Vt[:, None] * Pt
    pro = torch.cat([Vt, (vmu * Pt).sum(1), -2.0 * vmu.reshape(P.shape[0], -1)], dim=1)
    num = obj @ pro.T
    den = C * (wt @ Vt.T)
    d = num.clamp_min(0.0) / (den + EPS)
    return torch.where(den > C * min_overlap, d, torch.full_like(d, float("inf"))).numpy()


def dense_distances(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, *,
                    chunk_size: int = 1024, min_overlap: float = 1e-3) -> np.ndarray:
    """Pose-unaware distance (prototype as is, one pose): (N, K) float32.  Baseline for the bench.

    Threaded as :meth:`PoseBank.match_spectra` matches a chunk: with torch at T > 1 threads each chunk's objects
    in ``MATCH_SHARES`` x T blocks (of at least ``MATCH_MIN_BLOCK``) on the search's pool, one torch thread each,
    so that the bench compares the two searches run the same way."""
    X = np.asarray(X, dtype=np.float32)
    W = np.asarray(W, dtype=np.float32)
    _check_arrays(X, W, np.asarray(P), np.asarray(V))
    pool = pool_here()
    out = []
    for i in range(0, X.shape[0], chunk_size):
        n = min(chunk_size, X.shape[0] - i)
        if pool is None or n < 2 * MATCH_MIN_BLOCK:
            out.append(_dense(X[i:i + n], W[i:i + n], P, V, min_overlap))
            continue
        b = max(MATCH_MIN_BLOCK, -(-n // (MATCH_SHARES * torch.get_num_threads())))
        out += pool.map(lambda j: _dense(X[j:min(j + b, i + n)], W[j:min(j + b, i + n)], P, V, min_overlap),
                        range(i, i + n, b))
    return np.concatenate(out) if out else np.zeros((0, P.shape[0]), np.float32)


def pose_distances_naive(X: np.ndarray, W: np.ndarray, P: np.ndarray, V: np.ndarray, *,
                         scales: Sequence[float] = (1.0,), return_all: bool = False,
                         chunk_size: int = 1024, min_overlap: float = 1e-3) -> PoseMatch:
    """Slow reference twin of :func:`pose_distances`: rolls every scaled prototype for every shift."""
    X, W, P, V, scales = _prepare(X, W, P, V, scales)
    K, A = P.shape[0], P.shape[3]
    Ps, Vs = scale_prototypes(P, V, scales)
    allD = np.empty((X.shape[0], K, len(scales), A), np.float32)
    for si in range(len(scales)):
        for s in range(A):
            allD[:, :, si, s] = dense_distances(X, W, np.roll(Ps[:, si], s, axis=3), np.roll(Vs[:, si], s, axis=2),
                                                chunk_size=chunk_size, min_overlap=min_overlap)
    D, yaw, sc = _best_pose(allD, scales)
    return PoseMatch(D, yaw, sc, allD if return_all else None)
