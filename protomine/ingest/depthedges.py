"""Depth readings that cannot be trusted as surface or free space: flying pixels at depth edges.

Depth sensors average the near and the far surface where a depth edge crosses a pixel (time of flight) or a
matching window (structured light, active stereo): the reading lies between the two surfaces, where there
is nothing ("flying pixels"; dropping readings that lie between a nearer and a farther neighbour is common
practice).  Such a reading is neither a surface point nor evidence that the space in front of it is empty,
so object proposals never take it (``proposals``) and lifting never carves through it (``volume``).

Two tests, either flags a reading:

- close: in the 3x3 square, a neighbour nearer and one farther by more than the tolerance (FLYING_TOL_M or
  FLYING_TOL_REL x depth).  A true edge pixel sits at one of the two depths and is kept.
- wide (``WIDE_WINDOW``, 0 = off): structured-light and active-stereo sensors match windows several pixels
  wide, so their mixed readings fill a ragged band along every depth edge, with dropouts and shadows in it:
  there the 3x3 square often holds other mixed readings or no reading on one side, and the close test misses
  them.  In the wider square a reading is flagged when it has a jump beyond the tolerance on both sides and
  fewer than ``WIDE_SUPPORT_BOTH`` neighbours within ``SUPPORT_REL`` x the tolerance of its own depth, or a
  jump on one side only, fewer than ``WIDE_SUPPORT_ONE`` such neighbours and at least ``WIDE_MISSING``
  neighbours without a reading (the band shows itself by its dropouts); either way only when none of its 8
  adjacent neighbours supports it.  A surface, even one seen at a grazing angle, continues through its pixel
  along the direction in which its depth does not change, so some of its neighbours lie at about its depth
  (support), which a mixed reading, drawn anywhere between the two surfaces, seldom has.  Measured on demo
  frames rendered with both depth models (the same frames, noise-free depth as truth): the close test alone
  catches 27% of the active-stereo readings off by more than the tolerance, both tests 64%; true readings
  flagged, gaussian depth: 0.28 and 0.32 per 1000.  Without the adjacent-support rule the wide test caught 75%
  but flagged the topmost readings of a sphere seen from 5 degrees above the table (its rim curves away from
  the pixel in every direction), 0.5 mm of the sphere's height.

A third, with ``[ingest] line_support`` > 0 only (:func:`line_unsupported`, run by ``proposals.load_frames``):
a reading on none of the 4 lines through two opposite neighbours of its 3x3 square within k x the frame's own
noise (``depth_noise``), which catches the mixed readings nearer than the tolerance to one of the two surfaces;
with ``[ingest] line_support_one_sided`` (on by default, as is line_support = 3) a reading that continues a surface
on one side (:func:`one_sided_support`, of its own mask when the capture has masks) is kept: true readings at
silhouettes, corners and thin parts, which the 4 centred lines reject (README "One-sided support").
"""
from __future__ import annotations

import numpy as np

FLYING_TOL_M = 0.015        # a flying pixel is this far (or FLYING_TOL_REL x depth) from both neighbours
FLYING_TOL_REL = 0.03
FLYING_WINDOW = 3           # the close test's neighbourhood side (pixels)
WIDE_WINDOW = 5             # the wide test's neighbourhood side (pixels); 0 = no wide test
SUPPORT_REL = 0.5           # a neighbour supports a reading within this x the tolerance of its depth
WIDE_SUPPORT_BOTH = 4       # wide test, jumps on both sides: flagged with fewer supporting neighbours than this
WIDE_SUPPORT_ONE = 3        # ... a jump on one side only: fewer supporting neighbours than this
WIDE_MISSING = 6            # ... and at least this many neighbours without a reading
WIDE_ADJACENT_SUPPORT = 1   # either way, fewer than this many of its 8 adjacent neighbours support it


def flying_pixels(depth: np.ndarray) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres (0 = none) flagged by the close or the wide test (module
    docstring); beyond the image the depth is mirrored (scipy.ndimage's ``mode='reflect'``)."""
    d = np.asarray(depth, np.float64)
    half = _half()
    return _flags(np.pad(d, half, mode="symmetric"), half, d.shape)   # numpy 'symmetric' = ndimage 'reflect'


def _half() -> int:
    return max(FLYING_WINDOW, WIDE_WINDOW) // 2


def _extremes(p: np.ndarray, half: int, shape: tuple[int, int], sizes: tuple[int, ...]) -> dict[int, tuple]:
    """Greatest and least reading in the s x s square about each pixel of the interior (shape) of the padded
    array p (border ``half``), for each odd size s in ``sizes``: {s: (hi, lo)}, NaN where the square holds no
    reading.  p holds NaN where there is no reading, which numpy's fmax / fmin skip.  Running extremes of
    shifted slices, along rows then columns; the s + 2 square's row extremes are two shifted s ones (their
    windows overlap), so the wide square costs one step more than the close one.  Exact: no rounding."""
    ph, pw = shape
    out = {}
    for fn, pos in ((np.fmax, 0), (np.fmin, 1)):
        for s, rows in _running(fn, p, 1, half, pw, sizes).items():
            out.setdefault(s, [None, None])[pos] = _running(fn, rows, 0, half, ph, (s,))[s]
    return {s: tuple(v) for s, v in out.items()}


def _running(fn, a: np.ndarray, axis: int, half: int, n: int, sizes: tuple[int, ...]) -> dict[int, np.ndarray]:
    """{s: running fn (fmax / fmin) over s consecutive entries of a along axis} for the n entries past the
    border ``half``, for each odd size s in ``sizes``."""
    def cut(x, lo, hi):
        return x[:, lo:hi] if axis == 1 else x[lo:hi]
    m, ext, out = a, half, {}                       # m: running extreme of size s over n + 2 ext entries
    for s in range(1, max(sizes) + 1, 2):
        if s == 3:
            m = fn(fn(cut(m, 0, -2), cut(m, 1, -1)), cut(m, 2, None))
            ext -= 1
        elif s > 3:
            m = fn(cut(m, 0, -2), cut(m, 2, None))
            ext -= 1
        if s in sizes:
            out[s] = cut(m, ext, ext + n)
    return out


def _flags(p: np.ndarray, half: int, shape: tuple[int, int], want: np.ndarray | None = None) -> np.ndarray:
    """Flags (shape) of the readings p[half:-half, half:-half] of a padded depth array p: both tests.  The wide
    test runs at the readings with a jump in the wide square and no supporting adjacent neighbour only (well
    under 1% of them; with ``want`` (shape) bool, only among those pixels: elsewhere the flags are the close
    test's only): their neighbours are gathered, the adjacent ones first."""
    ph, pw = shape
    pn = np.where(p > 0, p, np.nan)                  # no reading: NaN (fails every comparison, skipped by fmax)
    d = pn[half:half + ph, half:half + pw]
    tol = np.maximum(FLYING_TOL_M, FLYING_TOL_REL * d)
    sizes = (FLYING_WINDOW, WIDE_WINDOW) if WIDE_WINDOW else (FLYING_WINDOW,)
    ext = _extremes(pn, half, shape, sizes)
    hi, lo = ext[FLYING_WINDOW]
    flags = (d - lo > tol) & (hi - d > tol)          # the close test (NaN: no reading, false)
    if not WIDE_WINDOW:
        return flags
    hi, lo = ext[WIDE_WINDOW]
    cand = ((d - lo > tol) | (hi - d > tol)) & ~flags
    if want is not None:
        cand &= want
    c = np.flatnonzero(cand)
    if len(c) == 0:
        return flags
    width = pw + 2 * half
    at = (c // pw + half) * width + c % pw + half    # the candidates' flat indices into pn
    flat = pn.reshape(-1)
    dc, tc = d.reshape(-1)[c][:, None], tol.reshape(-1)[c][:, None]
    stc = SUPPORT_REL * tc
    adj = np.array([i * width + j for i in (-1, 0, 1) for j in (-1, 0, 1) if i or j])
    keep = _unsupported(flat, at, adj, dc[:, 0], stc[:, 0])   # a supported reading is never flagged: the rest are done
    c, at, dc, tc, stc = c[keep], at[keep], dc[keep], tc[keep], stc[keep]
    w = WIDE_WINDOW // 2
    off = np.array([i * width + j for i in range(-w, w + 1) for j in range(-w, w + 1) if i or j])
    q = flat[at[:, None] + off]                      # (n, window^2 - 1) neighbours, NaN without a reading
    diff = q - dc
    near = (diff < -tc).any(1)                       # dc - q > tc, exactly (IEEE subtraction is antisymmetric)
    far = (diff > tc).any(1)
    support = np.count_nonzero(np.abs(diff) <= stc, axis=1)
    missing = np.count_nonzero(np.isnan(q), axis=1)
    both = near & far & (support < WIDE_SUPPORT_BOTH)
    one = (near ^ far) & (support < WIDE_SUPPORT_ONE) & (missing >= WIDE_MISSING)
    flags.reshape(-1)[c[both | one]] = True
    return flags


def _unsupported(flat: np.ndarray, at: np.ndarray, adj: np.ndarray, dc: np.ndarray, stc: np.ndarray) -> np.ndarray:
    """(n,) bool: the candidates at flat indices ``at`` (n,) of ``flat`` with fewer than ``WIDE_ADJACENT_SUPPORT`` of
    their neighbours at offsets ``adj`` within ``stc`` of their reading ``dc`` (n,) (NaN neighbours support nothing).
    With the threshold 1 (a supported reading: at least one) the neighbours are tried one offset at a time among
    the candidates none has supported yet: almost every candidate (a pixel beside a true edge) is supported by its
    first or second neighbour (demo frames: 66 of 38,890 candidates unsupported), so most of the (n, 8) gather and
    its tests are never done.  The same candidates as counting all of them."""
    if WIDE_ADJACENT_SUPPORT != 1:
        return np.count_nonzero(np.abs(flat[at[:, None] + adj] - dc[:, None]) <= stc[:, None], axis=1) < WIDE_ADJACENT_SUPPORT
    left = np.arange(len(at))                        # candidates without a supporting neighbour so far
    for off in adj:
        left = left[~(np.abs(flat[at[left] + off] - dc[left]) <= stc[left])]
        if not len(left):
            break
    keep = np.zeros(len(at), bool)
    keep[left] = True
    return keep


def steady_depth(depth: np.ndarray) -> np.ndarray:
    """depth (H, W) with its flying pixels set to 0 (no reading)."""
    return np.where(flying_pixels(depth), 0.0, depth)


def steady_depth_at(depth: np.ndarray, r: np.ndarray, u: np.ndarray) -> np.ndarray:
    """``steady_depth(depth)[r, u]`` for pixels (r, u) (M,): the tests of :func:`flying_pixels` run on the
    patch the pixels span only (lifting asks for one object's few thousand cells), with a border of half the
    widest window (beyond the image mirrored as there), the wide test at those pixels only."""
    if len(r) == 0:
        return np.zeros(0, np.asarray(depth).dtype)
    h, w = depth.shape
    half = _half()
    r0, r1 = int(r.min()), int(r.max()) + 1
    u0, u1 = int(u.min()), int(u.max()) + 1
    a0, a1, b0, b1 = max(r0 - half, 0), min(r1 + half, h), max(u0 - half, 0), min(u1 + half, w)
    d = np.asarray(depth[a0:a1, b0:b1], np.float64)
    pad = ((a0 - (r0 - half), r1 + half - a1), (b0 - (u0 - half), u1 + half - b1))
    if any(p for side in pad for p in side):
        d = np.pad(d, pad, mode="symmetric")      # numpy's 'symmetric' is scipy.ndimage's 'reflect'
    ph, pw = r1 - r0, u1 - u0
    at = (np.asarray(r) - r0) * pw + (np.asarray(u) - u0)
    want = np.zeros(ph * pw, bool)
    want[at] = True
    flying = _flags(d, half, (ph, pw), want.reshape(ph, pw))
    steady = np.where(flying, 0.0, depth[r0:r1, u0:u1])
    return steady.reshape(-1).take(at)


# --- line support: a reading on a surface lies on the line through two opposite neighbours -------------------

LINE_DIRECTIONS = ((0, 1), (1, 0), (1, 1), (1, -1))   # (row, column) steps: the 4 lines through a pixel's 3x3 square
NOISE_BINS = 8              # depth bins (quantiles of the frame's readings) of the noise estimate
NOISE_TRIM = 90.0           # percentile of |second difference| per bin kept for the estimate (edges are the rest)


def second_differences(depth: np.ndarray) -> np.ndarray:
    """(4, H, W) z - (z_a + z_b) / 2 for each line (``LINE_DIRECTIONS``) through each pixel of depth (H, W) metres,
    z_a, z_b its two opposite neighbours on the line; NaN where one of the three has no reading (0) or lies
    beyond the image."""
    d = np.asarray(depth, np.float64)
    H, W = d.shape
    p = np.pad(np.where(d > 0, d, np.nan), 1, constant_values=np.nan)
    c = p[1:H + 1, 1:W + 1]
    out = np.empty((len(LINE_DIRECTIONS), H, W))
    for k, (dr, dc) in enumerate(LINE_DIRECTIONS):
        a = p[1 + dr:H + 1 + dr, 1 + dc:W + 1 + dc]
        b = p[1 - dr:H + 1 - dr, 1 - dc:W + 1 - dc]
        out[k] = c - 0.5 * (a + b)
    return out


def depth_noise(depth: np.ndarray, d2: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The frame's own depth noise as a function of depth, from the frame alone (no sensor model): the spread of
    the second differences along rows and columns (``second_differences``; on a plane or a gently curved surface
    they are noise, sqrt(1.5) x the depth's std for independent readings), per depth bin (``NOISE_BINS`` quantiles of
    the readings), as the std of a normal whose |x| below its ``NOISE_TRIM`` percentile has the mean that the bin's
    |second differences| below theirs have (depth edges and creases are the tail the trim leaves out).  Returns the
    bins' median depths (B,) and the second differences' std there (B,); empty arrays when the frame has too few
    readings.  Depth from quantised disparity (active stereo) makes the
    spread grow with z^2, gaussian axial noise more slowly: the bins follow either."""
    z = np.asarray(depth, np.float64)
    d2 = second_differences(z) if d2 is None else d2
    zz = np.concatenate([z[np.isfinite(d2[k])] for k in (0, 1)])
    aa = np.abs(np.concatenate([d2[k][np.isfinite(d2[k])] for k in (0, 1)]))
    if len(zz) < 50 * NOISE_BINS:
        return np.zeros(0), np.zeros(0)
    edges = np.quantile(zz, np.linspace(0.0, 1.0, NOISE_BINS + 1))
    b = np.clip(np.searchsorted(edges, zz, side="right") - 1, 0, NOISE_BINS - 1)
    at, spread = [], []
    for i in range(NOISE_BINS):
        a = aa[b == i]
        if len(a) < 50:
            continue
        a = a[a <= np.percentile(a, NOISE_TRIM)]
        at.append(float(np.median(zz[b == i])))
        spread.append(float(a.mean() / _TRIMMED_MEAN_ABS))
    return np.array(at), np.array(spread)


def _trimmed_mean_abs(p: float) -> float:
    """E[|x| given |x| below its p-quantile] for a standard normal x: 2 (phi(0) - phi(a)) / p, a = Phi^-1((1 + p) / 2)
    (the half-normal's truncated mean, hand-worked)."""
    from statistics import NormalDist
    a = NormalDist().inv_cdf((1 + p) / 2)
    return 2 * (NormalDist().pdf(0.0) - NormalDist().pdf(a)) / p


_TRIMMED_MEAN_ABS = _trimmed_mean_abs(NOISE_TRIM / 100)


def line_unsupported(depth: np.ndarray, fx: float, k: float, one_sided: bool = False,
                     labels: np.ndarray | None = None) -> np.ndarray:
    """(H, W) bool: readings of depth (H, W) metres that lie on no line through two opposite neighbours: for each of
    the 4 lines through the pixel's 3x3 square, |z - (z_a + z_b) / 2| > tol(z), or a reading missing on it.  A
    surface, even a slanted one seen at a grazing angle, continues through its pixel, so along some line its depth
    changes linearly (on the silhouette: along the silhouette); a mixed reading at a depth edge, drawn between the
    near and the far surface, fits a line only across the edge and only when it lies near halfway.  Asking the line
    to go on straight through a neighbour (4 or 5 readings) catches those too but drops more true readings beside
    active-stereo dropouts, and lost on demo frames (README "Which sensor effect it is").  tol(z) = k x the frame's
    own second-difference spread at depth z (``depth_noise``), at least half a pixel's footprint z / (2 fx) (the
    curvature of a smooth surface over one pixel).  k = 3: noise alone fails all 4 lines with a probability far
    below 1e-6.  fx: the image's focal length in pixels.

    one_sided: a reading that fails the 4 lines is kept when it continues the surface on ONE side
    (:func:`one_sided_support`): a true reading on a silhouette, a staircase outline, a corner or a crease has
    its own surface behind it along some direction, which the centred lines, half of them reaching across the
    edge, miss; a reading mixed between two surfaces lies on neither surface's continuation.  labels (H, W) int, the
    frame's object masks (0 = none) when the capture has them: only readings of the reading's own label support it
    (a mixed reading inside one object's mask that continues the touching or farther surface beside it would join
    the object a jump away from its surface; without masks a proposal groups it with that surface)."""
    z = np.asarray(depth, np.float64)
    d2 = second_differences(z)
    at, spread = depth_noise(z, d2)
    valid = z > 0
    zv = np.where(valid, z, 0.0)
    sig = np.interp(zv, at, spread) if len(at) else np.zeros_like(zv)
    tol = np.maximum(k * sig, 0.5 * zv / fx)
    with np.errstate(invalid="ignore"):
        fits = (np.abs(d2) <= tol[None]).any(0)      # NaN: no line there
    flags = valid & ~fits
    if one_sided:
        c = np.flatnonzero(flags)
        flags.reshape(-1)[c[one_sided_support(z, c, EXTRAPOLATION_SCALE * tol.reshape(-1)[c], labels)]] = False
    return flags


SIDE_DIRECTIONS = ((0, 1), (1, 0), (1, 1), (1, -1), (0, -1), (-1, 0), (-1, -1), (-1, 1))   # (row, column) steps
EXTRAPOLATION_SCALE = 2.0   # sqrt(6 / 1.5): std of z0 - 2 z1 + z2 over that of z0 - (z_a + z_b) / 2, independent readings


def one_sided_support(depth: np.ndarray, at: np.ndarray, tol: np.ndarray,
                      labels: np.ndarray | None = None) -> np.ndarray:
    """(n,) bool: the readings at flat indices ``at`` (n,) of depth (H, W) metres (0 = none) that continue a surface
    on one side: along some of the 8 directions (``SIDE_DIRECTIONS``), with z1, z2 the readings one and two steps
    away, |z0 - (2 z1 - z2)| <= tol (n,) (the straight line through z2 and z1, extrapolated one step).  The
    residual's noise is sqrt(6) x a reading's (1 + 4 + 1), against sqrt(1.5) for the centred second difference,
    and its curvature term (z'' h^2) twice the centred one's (z'' h^2 / 2): both ``EXTRAPOLATION_SCALE`` x.  No
    reading on the line, or beyond the image: no support.  labels (H, W) int or None: z1 and z2 must carry z0's."""
    z = np.asarray(depth, np.float64)
    H, W = z.shape
    p = np.pad(np.where(z > 0, z, np.nan), 2, constant_values=np.nan).reshape(-1)
    width = W + 4
    pos = (at // W + 2) * width + at % W + 2
    z0 = z.reshape(-1)[at]
    if labels is not None:
        lab = np.pad(np.asarray(labels).astype(np.int64), 2, constant_values=-1).reshape(-1)
        l0 = lab[pos]
    ok = np.zeros(len(at), bool)
    with np.errstate(invalid="ignore"):
        for dr, dc in SIDE_DIRECTIONS:
            step = dr * width + dc
            fit = np.abs(z0 - 2.0 * p[pos + step] + p[pos + 2 * step]) <= tol
            if labels is not None:
                fit &= (lab[pos + step] == l0) & (lab[pos + 2 * step] == l0)
            ok |= fit
    return ok
