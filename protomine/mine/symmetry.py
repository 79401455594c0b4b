"""Rotational symmetry of prototypes about the azimuth (up) axis, and the canonical yaw rule.

Conventions: prototypes P (K, C, R, A, H), weights V (K, R, A, H), azimuth axis 3 of P (2 of V);
``roll`` as in :mod:`protomine.mine.posesearch`; degrees in the public API.

Detection (asymmetry against the members' scatter)
--------------------------------------------------
A prototype is the observation-weighted mean of its aligned members, so even a perfectly symmetric
shape gives a prototype that differs slightly from its own rotation: the members scatter, and each cell
is the mean of a few of them.  The test therefore asks whether the prototype's asymmetry under a
candidate rotation is larger than that scatter can explain.  For a rotation by s bins (sub-bin shifts
by the Fourier shift theorem, exact for the sampled band-limited ring) and each height slab h::

    T_h(s) = sum_{c, r, a} om (P - roll(P, s))^2  /  sum_{c, r, a} om (u + roll(u, s)),
    om = V roll(V, s),      T(s) = max_h T_h(s)

where u (K, C, R, A, H) is the variance of each prototype cell's mean: the members' weighted variance
at that cell (floored by the prototype's pooled variance of that channel, because a cell seen by one
member shows no scatter) divided by the effective number of members there, (sum w)^2 / sum w^2
(:func:`mean_variance`).  The numerator is the engine's observation-weighted squared difference
D(P, roll(P, s)) restricted to one slab (up to the common 1 / (C sum om)); if P were exactly symmetric
and its cells independent means, E[numerator] = denominator, i.e. T_h ~ 1.  Slabs are tested one by one
because asymmetric parts are local in height (a jug's handle, a plane's tote): summed over the whole
volume their difference is diluted by the symmetric rest.  The maximum over H slabs, the members'
tendency to align their noise to the reference, and correlated neighbouring cells all push symmetric
shapes above 1: on the demo store (8 classes, 4 to 14 members per prototype) symmetric rotations measure
T <= 2.5 and the rotations of asymmetric shapes T >= 4 (jug: 4 to 5, hand plane at 180 degrees: 7.8).
That ratio is a significance: with many members or low noise even a negligible asymmetry becomes
significant, and on noisy sensors the members' alignment of their own noise makes symmetric shapes
exceed any fixed factor.  So a rotation must also change the prototype by a visible amount to break a
symmetry: the effect size

    E(s) = sum_{c, r, a, h >= h0} om (P - roll(P, s))^2  /  (2 sum_{c, r, a, h >= h0} V (P - m_h)^2)

is the fraction of the prototype's own variance (m_h: each channel's mean over slab h) that the
rotation moves; h0 = 1 leaves out the slab touching the support plane, which carries the plane's noise
and the segmentation edge (h0 = 0 when H <= 2).  For a handle on a jug E is about 0.15; for a symmetric
body under heavy depth noise (6 mm x z^2 extra) it stays below 0.1.

The rotation is *compatible* with the prototype when T(s) <= ``factor`` (default 3.5) or
E(s) <= ``tol`` (default 0.12): a symmetry is broken only by an asymmetry that is both significant and
large enough to matter.

- ``continuous`` (code 0) when every integer shift s = 1 .. A - 1 is compatible;
- otherwise ``n-fold`` (code n in 2..max_fold) for the largest n whose rotations k A / n, k = 1..n-1,
  are all compatible (n need not divide A: the shift is then sub-bin);
- otherwise ``none`` (code 1).

Unlike an energy ratio, a small asymmetric part on a big symmetric body is not drowned by the body:
only the differences count, and they are compared with the noise, not with the shape's variance.

Canonical yaw rule
------------------
Period = 360 / n degrees (360 for none; continuous has no period and yaw is reported as 0).  For
n-fold (including n = 1) take the lowest harmonic k compatible with the symmetry (k a multiple of n)
whose energy is at least 5 % of the strongest compatible harmonic, take the ring with the largest
|F_k| at that harmonic, and roll the prototype by -t bins with t = (-phase(F_k) A / (2 pi k)) mod (A / k),
which makes that phase zero.  Since object ~= roll(P, y) = roll(roll(P, -t), y + t), members' yaws
are then reported as ``(yaw + t * 360 / A) mod period``.

Public API
----------
- ``detect_symmetry(P, V, mean_var, *, factor=3.5, tol=0.12, max_fold=8) -> np.ndarray`` (K,) int codes
  (0 continuous, 1 none, n)
- ``asymmetry_ratio(P, V, mean_var, shift_bins) -> np.ndarray`` (K, M) T for M shifts
- ``effect_ratio(P, V, shift_bins) -> np.ndarray`` (K, M) E for M shifts
- ``mean_variance(s0, s1, s2, sw2) -> np.ndarray`` (K, C, R, A, H) variance of each cell's mean from
  the members' aligned moments
- ``canonical_shift_bins(P, V, symmetry) -> np.ndarray`` (K,) float roll t (bins) per prototype
- ``period_deg(symmetry) -> np.ndarray`` (K,) float (0 for continuous)
- ``wrap_yaw(yaw_deg, symmetry) -> np.ndarray`` yaw (N, K) or (N,) reduced modulo each prototype's period

Symmetry in 3-D (rotations that move up)
----------------------------------------
A cube-like box is also unchanged by quarter turns that tip it onto a side; a cylinder lying on its side by
a half turn about the vertical.  The rotations of a prototype's symmetry group G that fix its canonical up
+z are the about-up symmetries above (n-fold or continuous: the subgroup H).  The rest are found with the
tilt search itself, matching the prototype against its own tilted copies (``tilts.TiltBank``: every copy
re-normalised by its own footprint and height, exactly as an object lying that way is lifted):
:func:`tilt_symmetries` searches every up direction u of the HEALPix grid with N_side = ``TILT_NSIDE``
(192 directions, 14.7 degrees apart) more than ``MIN_TILT_DEG`` from +z, each with the FFT yaw search, and
refines the directions whose copy nearly matches (effect ratio below ``LOOSE`` x tol and lowest among its
neighbours) on finer grids (N_side = ``REFINE_NSIDES``, 7.3, 3.7 then 1.8 degrees) around them.  The rotation found,
g = Rz(yaw) tilt_matrix(u) (``rotations``: object = prototype turned by g), is a symmetry when the same
test as above passes on the prototype and its turned copy (T <= factor or E <= tol; the copy's cell noise
is the prototype's mean noise, since members' moments are gathered in the canonical frame only), the copy
covers at least ``MIN_OVERLAP`` of the prototype's observation weight (an underside nobody saw proves no
symmetry), and its footprint radius and height agree with the upright prototype's within ``SIZE_TOL``
(each copy is re-normalised by its own size, so the volumes alone cannot tell a flat tile from the same
tile on its edge).  Found
rotations that carry +z to the same direction (within ``SAME_DEG``) are one coset g H; one representative
is kept per coset (identity first), and the group is G = {g_i h : h in H} (:func:`group_elements`; a
continuous H is sampled every 10 degrees).

Poses modulo G (:func:`reduce_modulo_group`): a pose R (object <- prototype) and R g for any g in G show
the same object.  Of these the one whose up in the prototype frame, g^T R^T e_z, lies nearest the fixed
direction ``PREFERRED_UP`` (+z tipped slightly towards +x and +y, so that symmetric faces such as a box's
+x and -x sides never tie) is reported; the yaw about that face is then reduced by the face's own period
(``faces.reduce_rotation``).

- ``tilt_symmetries(bank, k, noise, *, factor, tol) -> (S, 3, 3)`` coset representatives (identity first)
- ``group_elements(reps, code) -> (G, 3, 3)``; ``reduce_modulo_group(R, group) -> (N, 3, 3)``
"""
from __future__ import annotations

import numpy as np

from .. import rotations as rot

CONTINUOUS = 0
NONE = 1


def _ring_spectra(P: np.ndarray, V: np.ndarray) -> np.ndarray:
    """Completed, weighted ring spectra (K, C, R, F, H) complex for P (K, C, R, A, H), V (K, R, A, H)."""
    Vb = V[:, None].astype(np.float64)
    P = P.astype(np.float64)
    ring_w = Vb.sum(axis=3, keepdims=True)
    m = (Vb * P).sum(axis=3, keepdims=True) / np.maximum(ring_w, 1e-9)
    f = Vb * P + (1.0 - Vb) * m
    f = f * np.sqrt(Vb.mean(axis=3, keepdims=True))
    return np.fft.rfft(f, axis=3)


def _harmonic_energy(F: np.ndarray, A: int) -> np.ndarray:
    """(K, C, R, Fk, H) spectra -> (K, Fk) energies with Parseval weights."""
    c = np.full(F.shape[3], 2.0)
    c[0] = 1.0
    if A % 2 == 0:
        c[-1] = 1.0
    return (np.abs(F) ** 2).sum(axis=(1, 2, 4)) * c[None, :] / A


DEFAULT_FACTOR = 3.5


def mean_variance(s0: np.ndarray, s1: np.ndarray, s2: np.ndarray, sw2: np.ndarray, eps: float = 1e-9) -> np.ndarray:
    """Variance of each prototype cell's weighted mean, (K, C, R, A, H) float64.

    Members' aligned moments per prototype: s0 = sum w (K, R, A, H), s1 = sum w x (K, C, R, A, H),
    s2 = sum w x^2 (K, C, R, A, H), sw2 = sum w^2 (K, R, A, H).  The per-cell variance is floored by
    the prototype's s0-weighted mean variance of that channel (a cell seen by a single member shows no
    scatter, which does not mean it has none); cells nobody saw get the floor over one member.
    """
    s0 = np.asarray(s0, np.float64)[:, None]
    m = s1 / np.maximum(s0, eps)
    var = np.maximum(s2 / np.maximum(s0, eps) - m * m, 0.0)
    pooled = (s0 * var).sum(axis=(2, 3, 4), keepdims=True) / np.maximum(s0.sum(axis=(2, 3, 4), keepdims=True), eps)
    var = np.maximum(var, pooled)
    inv_neff = np.asarray(sw2, np.float64)[:, None] / np.maximum(s0 * s0, eps)  # 1 / effective member count
    return var * np.where(s0 > eps, np.minimum(inv_neff, 1.0), 1.0)


def _fourier_roll(a: np.ndarray, s: float, axis: int) -> np.ndarray:
    """roll(a, s) along ``axis`` for a possibly fractional s (Fourier shift theorem, real output)."""
    return _roll_spectrum(np.fft.rfft(a, axis=axis), s, axis, a.shape[axis])


def _roll_spectrum(f: np.ndarray, s: float, axis: int, n: int) -> np.ndarray:
    """:func:`_fourier_roll` of the array of length n along ``axis`` whose rfft along it is ``f``."""
    k = np.fft.rfftfreq(n, 1.0 / n)
    shape = [1] * f.ndim
    shape[axis] = k.size
    phase = np.exp(-2j * np.pi * k * s / n).reshape(shape)
    return np.fft.irfft(f * phase, n=n, axis=axis)


def _turned(P: np.ndarray, V: np.ndarray, u: np.ndarray, shifts: np.ndarray):
    """For each shift of ``shifts`` (bins): P (K, C, R, A, H), V (K, R, A, H) and u (P's shape) rolled by it about
    up, (ps, vs, us): ``np.roll`` for a whole number of bins, else :func:`_fourier_roll` with vs clipped to [0, 1].
    The three transforms along the azimuth are taken once for all the fractional shifts (the same values as a
    transform per shift: one call on the same array)."""
    spectra = None
    for s in shifts:
        if float(s).is_integer():
            yield tuple(np.roll(a, int(s), axis=ax) for a, ax in ((P, 3), (V, 2), (u, 3)))
            continue
        if spectra is None:
            spectra = [np.fft.rfft(a, axis=ax) for a, ax in ((P, 3), (V, 2), (u, 3))]
        fp, fv, fu = spectra
        A = P.shape[3]
        yield _roll_spectrum(fp, s, 3, A), np.clip(_roll_spectrum(fv, s, 2, A), 0.0, 1.0), _roll_spectrum(fu, s, 3, A)


def _mismatch(P: np.ndarray, V: np.ndarray, u: np.ndarray, ps: np.ndarray, vs: np.ndarray, us: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray]:
    """(T, E) per prototype of P (K, C, R, A, H), V (K, R, A, H) against turned copies ps, vs (same shapes)
    with cell noise u, us (broadcastable to P): T the largest per-slab ratio, E the effect ratio."""
    om = (V * vs)[:, None]
    d2 = om * (P - ps) ** 2
    num = d2.sum(axis=(1, 2, 3))  # (K, H): one ratio per height slab
    den = (om * (u + np.maximum(us, 0.0))).sum(axis=(1, 2, 3))
    T = (num / np.maximum(den, 1e-30)).max(axis=1)
    h0 = 1 if P.shape[4] > 2 else 0
    Vb = V[:, None, ..., h0:]
    Ph = P[..., h0:]
    m = (Vb * Ph).sum(axis=(2, 3), keepdims=True) / np.maximum(Vb.sum(axis=(2, 3), keepdims=True), 1e-12)
    var = 2.0 * (Vb * (Ph - m) ** 2).sum(axis=(1, 2, 3, 4))
    E = d2[..., h0:].sum(axis=(1, 2, 3, 4)) / np.maximum(var, 1e-30)
    return T, E


def _ratios(P: np.ndarray, V: np.ndarray, mean_var, shift_bins, which: tuple[bool, bool] = (True, True)
            ) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(T, E) (K, M) each, :func:`asymmetry_ratio` and :func:`effect_ratio` under each rotation of ``shift_bins``
    (M,), the rolled copies made once for both (``which``: the ones wanted, None for the other).  E reads the rolled
    copies without their lowest slab (H > 2): the roll is along the azimuth, so they hold the same values as the
    slabs above it rolled on their own (checked to the bit for the Fourier shifts)."""
    P = np.asarray(P, np.float64)
    V = np.asarray(V, np.float64)
    u = np.broadcast_to(np.asarray(mean_var, np.float64), P.shape)
    shifts = np.atleast_1d(np.asarray(shift_bins, np.float64))
    h0 = 1 if P.shape[4] > 2 else 0
    Ph, Vh = P[..., h0:], V[..., h0:]
    Vb = Vh[:, None]
    m = (Vb * Ph).sum(axis=(2, 3), keepdims=True) / np.maximum(Vb.sum(axis=(2, 3), keepdims=True), 1e-12)
    var = 2.0 * (Vb * (Ph - m) ** 2).sum(axis=(1, 2, 3, 4))                       # (K,)
    T = np.empty((P.shape[0], shifts.size)) if which[0] else None
    E = np.empty((P.shape[0], shifts.size)) if which[1] else None
    for j, (ps, vs, us) in enumerate(_turned(P, V, u, shifts)):
        if T is not None:
            om = (V * vs)[:, None]
            num = (om * (P - ps) ** 2).sum(axis=(1, 2, 3))  # (K, H): one ratio per height slab
            den = (om * (u + np.maximum(us, 0.0))).sum(axis=(1, 2, 3))
            T[:, j] = (num / np.maximum(den, 1e-30)).max(axis=1)
        if E is not None:
            E[:, j] = ((Vh * vs[..., h0:])[:, None] * (Ph - ps[..., h0:]) ** 2).sum(axis=(1, 2, 3, 4)) / np.maximum(var, 1e-30)
    return T, E


def asymmetry_ratio(P: np.ndarray, V: np.ndarray, mean_var: np.ndarray, shift_bins) -> np.ndarray:
    """T (K, M): prototype asymmetry under each rotation of ``shift_bins`` (M,) over its noise level
    (largest over height slabs).

    P (K, C, R, A, H), V (K, R, A, H), mean_var broadcastable to P (variance of each cell's mean,
    :func:`mean_variance`); see the module docstring for T.
    """
    return _ratios(P, V, mean_var, shift_bins, (True, False))[0]


def effect_ratio(P: np.ndarray, V: np.ndarray, shift_bins) -> np.ndarray:
    """E (K, M): fraction of each prototype's variance moved by each rotation of ``shift_bins`` (M,).

    P (K, C, R, A, H), V (K, R, A, H); see the module docstring (the lowest slab is left out when H > 2).
    """
    return _ratios(P, V, 0.0, shift_bins, (False, True))[1]


DEFAULT_TOL = 0.12


def detect_symmetry(P: np.ndarray, V: np.ndarray, mean_var: np.ndarray, *, factor: float = DEFAULT_FACTOR,
                    tol: float = DEFAULT_TOL, max_fold: int = 8, break_effect: float = 0.0) -> np.ndarray:
    """Symmetry code per prototype: 0 continuous, 1 none, n >= 2 n-fold.

    P (K, C, R, A, H), V (K, R, A, H), mean_var broadcastable to (K, C, R, A, H): variance of each
    prototype cell's mean (:func:`mean_variance`; a (K, 1, 1, 1, 1) array or a scalar for a known
    uniform noise level).  A rotation is compatible when its asymmetry ratio is <= ``factor`` or its
    effect ratio is <= ``tol``; with ``break_effect`` > 0 (``[mine] symmetry_break_effect``) a rotation whose effect
    ratio exceeds ``break_effect`` is not, whatever its asymmetry ratio: members turned the wrong way blur an
    asymmetric prototype and inflate its cells' scatter, so the ratio's test passes a jug's handle (the default
    demo seed 0: T 2.1, E 0.155 at the worst turn; symmetric classes on the five demos E <= 0.055).
    """
    P = np.asarray(P)
    V = np.asarray(V)
    if P.ndim != 5 or V.shape != P.shape[:1] + P.shape[2:]:
        raise ValueError(f"P must be (K, C, R, A, H) and V (K, R, A, H), got {P.shape} and {V.shape}")
    if not factor > 0:
        raise ValueError(f"factor must be > 0, got {factor}")
    if not break_effect >= 0:
        raise ValueError(f"break_effect must be >= 0, got {break_effect}")
    try:
        np.broadcast_shapes(np.shape(mean_var), P.shape)
    except ValueError:
        raise ValueError(f"mean_var must broadcast to {P.shape}, got {np.shape(mean_var)}") from None
    return _detect(P, V, mean_var, factor, tol, max_fold, break_effect)


def _detect(P: np.ndarray, V: np.ndarray, mean_var: np.ndarray, factor: float, tol: float, max_fold: int,
            break_effect: float = 0.0) -> np.ndarray:
    A = P.shape[3]
    folds = list(range(max_fold, 1, -1))
    # every shift needed once: integers 1..A-1 (continuous) and k A / n for each candidate n
    shifts = sorted({float(s) for s in range(1, A)} | {k * A / n for n in folds for k in range(1, n)})
    index = {s: j for j, s in enumerate(shifts)}
    T, E = _ratios(P, V, mean_var, shifts)  # one rolled copy per shift for both ratios
    ok = (T <= factor) | (E <= tol)  # (K, M)
    if break_effect > 0:
        ok &= E <= break_effect
    out = np.full(P.shape[0], NONE, dtype=np.int64)
    for i in range(P.shape[0]):
        if all(ok[i, index[float(s)]] for s in range(1, A)):
            out[i] = CONTINUOUS
            continue
        for n in folds:
            if all(ok[i, index[k * A / n]] for k in range(1, n)):
                out[i] = n
                break
    return out


def period_deg(symmetry: np.ndarray) -> np.ndarray:
    """Symmetry period in degrees per prototype (0 for continuous, 360 for none)."""
    s = np.asarray(symmetry)
    return np.where(s == CONTINUOUS, 0.0, 360.0 / np.maximum(s, 1))


def canonical_shift_bins(P: np.ndarray, V: np.ndarray, symmetry: np.ndarray) -> np.ndarray:
    """Roll t (bins) per prototype that makes its lowest strong compatible harmonic's phase zero.

    Rolling prototype k by -t[k] gives its canonical frame (see the module docstring); 0 for continuous.
    """
    P = np.asarray(P)
    A = P.shape[3]
    F = _ring_spectra(P, np.asarray(V))
    p = _harmonic_energy(F, A)
    t = np.zeros(P.shape[0])
    k_all = np.arange(p.shape[1])
    for i, n in enumerate(np.asarray(symmetry)):
        if n == CONTINUOUS:
            continue
        compatible = (k_all >= 1) & (k_all % n == 0)
        if not compatible.any() or p[i, compatible].max() <= 0:
            continue
        strong = compatible & (p[i] >= 0.05 * p[i, compatible].max())
        k = int(k_all[strong][0])
        ring = np.abs(F[i, :, :, k, :])
        c, r, h = np.unravel_index(np.argmax(ring), ring.shape)
        # roll(P, -t) multiplies F_k by exp(+2 pi i k t / A): phase zero at t = -phase A / (2 pi k)
        phase = np.angle(F[i, c, r, k, h])
        t[i] = np.mod(-phase * A / (2 * np.pi * k), A / k)
    return t


def wrap_yaw(yaw_deg: np.ndarray, symmetry: np.ndarray) -> np.ndarray:
    """Reduce yaws modulo each prototype's period: yaw (N, K) with symmetry (K,), or (N,) with (N,)."""
    per = period_deg(symmetry)
    yaw = np.asarray(yaw_deg, dtype=np.float64)
    safe = np.where(per > 0, per, 360.0)
    return np.where(per > 0, np.mod(yaw, safe), 0.0).astype(np.float32)


# --- symmetry in 3-D -------------------------------------------------------------------------

TILT_NSIDE = 4          # HEALPix N_side of the directions tried (192, 14.7 degrees apart)
REFINE_NSIDES = (8, 16, 32)  # ... and of the refinements around a near match (7.3, 3.7, then 1.8 degrees apart)
MIN_OVERLAP = 0.5       # share of the prototype's observation weight its turned copy must cover
MIN_TILT_DEG = 30.0     # directions nearer +z than this belong to the about-up test
SAME_DEG = 20.0         # rotations carrying +z within this angle of each other are one coset
LOOSE = 3.0             # a direction is refined when its effect ratio is below LOOSE x tol
SIZE_TOL = np.log(1.15)  # ... and its turned copy's footprint radius and height agree within 15 %
MAX_CANDIDATES = 12     # directions refined at most (the best first)
PREFERRED_UP = np.array([2.0, 1.0, 3.0]) / np.sqrt(14.0)


def _self_match(P: np.ndarray, V: np.ndarray, Pc: np.ndarray, Vc: np.ndarray, noise: float
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Best yaw (M,) of the prototype P (C, R, A, H), V (R, A, H) against its copies Pc (M, ...), Vc, and the
    (T, E) of the copies turned by that yaw (object = copy rolled by yaw, ``posesearch``)."""
    from .posesearch import PoseBank, shift_volume
    m = PoseBank(Pc, Vc, (1.0,)).match(P[None], V[None])
    yaw = np.where(np.isfinite(m.D[0]), m.yaw_deg[0], 0.0).astype(np.float64)
    A = P.shape[2]
    qs = shift_volume(Pc.astype(np.float64), yaw / (360.0 / A), axis=3)
    ws = np.clip(shift_volume(Vc.astype(np.float64), yaw / (360.0 / A), axis=2), 0.0, 1.0)
    M = len(Pc)
    Pb = np.broadcast_to(P.astype(np.float64), (M,) + P.shape)
    Vb = np.broadcast_to(V.astype(np.float64), (M,) + V.shape)
    T, E = _mismatch(Pb, Vb, noise, qs, ws, noise)
    # the copy must show most of what the prototype shows: a flip onto cells nobody saw proves nothing
    overlap = (Vb * ws).sum(axis=(1, 2, 3)) / np.maximum(Vb.sum(axis=(1, 2, 3)), 1e-12)
    bad = ~np.isfinite(m.D[0]) | (overlap < MIN_OVERLAP)
    return yaw, np.where(bad, np.inf, T), np.where(bad, np.inf, E)


def tilt_symmetries(bank, k: int, noise: float, code: int, *, factor: float = DEFAULT_FACTOR, tol: float = DEFAULT_TOL,
                    nside: int = TILT_NSIDE) -> np.ndarray:
    """Coset representatives (S, 3, 3) of prototype k's symmetries that move +z (identity first; see the
    module docstring).  ``bank`` is a ``tilts.TiltBank`` over the canonical prototypes, ``noise`` the
    prototype's mean cell variance (the about-up test's noise level), ``code`` its about-up symmetry."""
    from .tilts import copy_geometry, solid_points
    P, V, a = np.asarray(bank.P[k]), np.asarray(bank.V[k]), float(bank.aspect[k])
    solid = solid_points(P[0], V, a, bank.grid)
    g0 = copy_geometry(P[0], V, a, np.array([0.0, 0.0, 1.0]), bank.grid, solid)

    def same_size(u: np.ndarray, slack: float = 1.0) -> bool:  # a symmetry keeps the footprint and the height
        g = copy_geometry(P[0], V, a, u, bank.grid, solid)
        return max(abs(np.log(g.rho_max / g0.rho_max)), abs(np.log(g.z_max / g0.z_max))) <= slack * SIZE_TOL

    dirs = rot.up_grid(nside)
    dirs = dirs[dirs[:, 2] < np.cos(np.deg2rad(MIN_TILT_DEG))]
    yaw, T, E = _self_match(P, V, *bank.copies_at(k, dirs, empty_outside=False), noise)
    # local minima of E among the directions within 1.5 grid spacings, below the loose bar
    near = rot.angle_between_deg(dirs[:, None], dirs[None]) <= 1.5 * rot.grid_spacing_deg(nside)
    cand = np.flatnonzero((E <= LOOSE * tol) & (E <= np.where(near, E[None], np.inf).min(axis=1)))
    found = []
    n = 36 if int(code) == CONTINUOUS else max(int(code), 1)
    h = rot.yaw_matrix(np.arange(n) * 360.0 / n)
    known = np.zeros((0, 3))  # ups u = g^T e_z of the group found so far (h g h' for about-up h, h')
    for c in cand[np.argsort(E[cand])][:MAX_CANDIDATES]:
        if (len(known) and rot.angle_between_deg(known, dirs[c][None]).min() < SAME_DEG) or not same_size(dirs[c], 2.0):
            continue
        best, radius = dirs[c], 0.75 * rot.grid_spacing_deg(nside)
        for fine_nside in REFINE_NSIDES:  # finer and finer directions around the best so far
            fine = rot.up_grid(fine_nside)
            ups = fine[rot.angle_between_deg(fine, best[None]) <= radius]
            ups = ups[ups[:, 2] < np.cos(np.deg2rad(MIN_TILT_DEG))]
            if not len(ups):
                break
            fy, fT, fE = _self_match(P, V, *bank.copies_at(k, ups, empty_outside=False), noise)
            j = int(np.argmin(fE))
            best, radius = ups[j], 1.0 * rot.grid_spacing_deg(fine_nside)
        else:
            if (fT[j] <= factor or fE[j] <= tol) and same_size(best):
                g = rot.tilt_yaw_to_matrix(best, fy[j])
                found.append(g)
                known = np.concatenate([known, h.transpose(0, 2, 1) @ g[2], h.transpose(0, 2, 1) @ g[:, 2]])
    if not found:
        return np.eye(3)[None]
    # the group holds h g for every about-up symmetry h: one representative per image of +z
    found = np.stack(found)
    gens = np.concatenate([np.eye(3)[None], found, np.swapaxes(found, 1, 2)])
    return coset_representatives((h[:, None] @ gens[None]).reshape(-1, 3, 3))  # identity first


def coset_representatives(group: np.ndarray) -> np.ndarray:
    """One element per image g e_z of +z (within ``SAME_DEG``), in the group's order (identity first)."""
    cos_same = np.cos(np.deg2rad(SAME_DEG))
    reps = []
    for g in np.asarray(group, np.float64):
        if all(float(g[:, 2] @ r[:, 2]) < cos_same for r in reps):
            reps.append(g)
    return np.stack(reps)


def group_elements(reps: np.ndarray, code: int) -> np.ndarray:
    """The group (G, 3, 3) {g h}: coset representatives reps (S, 3, 3) (rows of zeros = padding) times the
    about-up rotations h of the symmetry ``code`` (0 continuous: sampled every 10 degrees, 1 none, n n-fold)."""
    reps = np.asarray(reps, np.float64).reshape(-1, 3, 3)
    reps = reps[np.abs(reps).sum(axis=(1, 2)) > 0]
    n = 36 if int(code) == CONTINUOUS else max(int(code), 1)
    h = rot.yaw_matrix(np.arange(n) * 360.0 / n)
    return (reps[:, None] @ h[None]).reshape(-1, 3, 3)


def reduce_modulo_group(R: np.ndarray, group: np.ndarray) -> np.ndarray:
    """Of the poses R g (g in ``group`` (G, 3, 3)) of each rotation R (N, 3, 3) (object <- prototype), the one
    whose up in the prototype frame lies nearest ``PREFERRED_UP`` (see the module docstring)."""
    R = np.asarray(R, np.float64).reshape(-1, 3, 3)
    group = np.asarray(group, np.float64).reshape(-1, 3, 3)
    if len(group) <= 1 or not len(R):
        return R @ group[0] if len(group) else R
    up = R[:, 2, :]                                         # R^T e_z
    imgs = np.einsum("gji,nj->ngi", group, up)              # g^T up
    best = np.argmax(imgs @ PREFERRED_UP, axis=1)
    return R @ group[best]
