"""``[mine] stretch_refine`` (``mine.stretchfit``): the stretch judged at a continuous scale, the vertex of the
parabola in ln scale through the distances one scale step below, at and above the search's scale."""
from __future__ import annotations

import numpy as np
from scipy import ndimage

from protomine.mine.posesearch import pose_distances
from protomine.mine.stretchfit import refined_scales, scale_step, vertex_offset
from protomine.mine.synthetic import SCALES, synthetic_prototypes


def test_vertex_offset_is_the_least_squares_parabola_vertex():
    """Three-point quadratic interpolation, checked against numpy.polyfit (a degree-2 least-squares fit through the
    three points is the interpolating parabola; its vertex -b / 2a), within one step; a curve without a minimum
    moves a whole step toward the lower side (common practice for sub-sample peak interpolation)."""
    rng = np.random.default_rng(3)
    h = 0.07
    for _ in range(200):
        d = rng.uniform(0.01, 0.05, 3)
        a, b, _c = np.polyfit([-h, 0.0, h], d, 2)
        got = float(vertex_offset(d[0], d[1], d[2], h))
        if a > 1e-12:
            assert got == np.clip(-b / (2 * a), -h, h) or abs(got - np.clip(-b / (2 * a), -h, h)) < 1e-9
        else:
            assert got == (h if d[0] > d[2] else -h)
    assert scale_step(SCALES) == np.log(1.15 / 0.87) / 4 and scale_step([1.0]) == 0.0


def _scaled(P: np.ndarray, s: float) -> np.ndarray:
    """P (C, R, A, H) scaled by s from the definition X(rho, z) = P(rho / s, z / s) at cell centres (index i covers
    [i, i + 1) / R), read with scipy.ndimage.map_coordinates (linear, edges repeated)."""
    C, R, A, H = P.shape
    ri = (np.arange(R) + 0.5) / s - 0.5
    hi = (np.arange(H) + 0.5) / s - 0.5
    rr, aa, hh = np.meshgrid(ri, np.arange(A, dtype=float), hi, indexing="ij")
    return np.stack([ndimage.map_coordinates(P[c], [rr, aa, hh], order=1, mode="nearest") for c in range(C)])


def test_refined_scale_moves_toward_the_true_scale_between_and_beyond_the_set():
    """A view that is its prototype scaled by a scale between two of the search's scales, or beyond the largest,
    built from the definition (scipy map_coordinates, not the search's resampling): the search keeps the nearest
    scale of the set; the refined scale lies nearer the true one, on its side.  The prototype the view is not of keeps
    the search's scale when it is not among the view's nearest (``stretchfit.WITHIN``)."""
    rng = np.random.default_rng(0)
    P = synthetic_prototypes(rng, 2, (3, 8, 36, 12))
    V = np.ones((2, 8, 36, 12), np.float32)
    for s_true in (1.035, 0.965, 1.22):
        X = _scaled(P[0], s_true)[None].astype(np.float32)
        W = np.ones((1, 8, 36, 12), np.float32)
        pm = pose_distances(X, W, P, V, scales=SCALES)
        D, yaw, sc = pm.D.astype(np.float64), pm.yaw_deg.astype(np.float64), pm.scale.astype(np.float64)
        assert np.argmin(D[0]) == 0 and D[0, 1] > 2.0 * D[0, 0]
        up = np.tile(np.array([0.0, 0.0, 1.0]), (1, 2, 1))
        got = refined_scales(P, V, None, X, W, D, up, sc, np.ones((1, 2), bool), SCALES)
        before, after = abs(np.log(sc[0, 0] / s_true)), abs(np.log(got[0, 0] / s_true))
        assert after < 0.5 * before, (s_true, sc[0, 0], got[0, 0])
        assert np.sign(np.log(got[0, 0] / sc[0, 0])) == np.sign(np.log(s_true / sc[0, 0]))
        assert got[0, 1] == sc[0, 1]
