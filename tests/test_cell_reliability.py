"""Per-cell reliability of single views (protomine.mine.reliability): inverse-variance cell weights.

References: inverse-variance weighting (common practice: the minimum-variance weights of independent
measurements are 1 / sigma^2); AUROC by scikit-learn's roc_auc_score; the naive twin of residual_sums is a
loop over views and cells written from the definition.
"""
from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from protomine.mine.posesearch import pose_distances
from protomine.mine.reliability import cell_reliability, reliable_distances, residual_sums

R, A, H, C = 4, 12, 4, 2


def _residual_sums_naive(x, w, p, v):
    num, den = np.zeros((R, H)), np.zeros((R, H))
    for i in range(x.shape[0]):
        for r in range(R):
            for a in range(A):
                for h in range(H):
                    om = w[i, r, a, h] * v[r, a, h]
                    num[r, h] += om * np.mean([(x[i, c, r, a, h] - p[c, r, a, h]) ** 2 for c in range(C)])
                    den[r, h] += om
    return num, den


def test_residual_sums_match_the_definition():
    rng = np.random.default_rng(0)
    x, w = rng.random((3, C, R, A, H)), rng.random((3, R, A, H))
    p, v = rng.random((C, R, A, H)), rng.random((R, A, H))
    for got, want in zip(residual_sums(x, w, p, v), _residual_sums_naive(x, w, p, v)):
        np.testing.assert_allclose(got, want, rtol=1e-10)


def test_reliability_is_inverse_variance_with_a_floor():
    # one prototype, two observed cells with spreads 1 and 4, one never observed
    num = np.array([[[1.0, 8.0, 0.0]]])
    den = np.array([[[1.0, 2.0, 0.0]]])
    lam = cell_reliability(num, den, floor=0.0)
    # inverse-variance weights 1 and 1/4, normalised to mean 1 over the observed cells: 1.6 and 0.4
    np.testing.assert_allclose(lam[0, 0], [1.6, 0.4, 1.0])
    with_floor = cell_reliability(num, den, floor=0.25)     # median spread 2.5, floor 0.625
    ratio = with_floor[0, 0, 0] / with_floor[0, 0, 1]
    np.testing.assert_allclose(ratio, (4 + 0.625) / (1 + 0.625))


def test_reliable_distance_at_a_pose_matches_the_definition():
    rng = np.random.default_rng(3)
    x, w = rng.random((2, C, R, A, H)), rng.random((2, R, A, H))
    P, V = rng.random((2, C, R, A, H)), rng.random((2, R, A, H))
    lam = rng.random((2, R, H)) + 0.5
    yaw = np.array([[30.0, 90.0], [0.0, 330.0]])          # whole bins (A = 12: 30 degrees each)
    got = reliable_distances(x, w, P, V, lam, yaw, np.ones((2, 2)))
    for i in range(2):
        for k in range(2):
            s = int(round(yaw[i, k] / 30.0))
            # object ~= prototype rolled by yaw: compare the object with the rolled prototype
            p, v = np.roll(P[k], s, axis=2), np.roll(V[k], s, axis=1)
            om = w[i] * v * lam[k][:, None, :]
            want = (om * ((x[i] - p) ** 2).mean(axis=0)).sum() / om.sum()
            np.testing.assert_allclose(got[i, k], want, rtol=1e-5)
    # without reliability it is the plain distance of the pose search at its best pose
    pm = pose_distances(x, w, P, V)
    whole = np.abs(pm.yaw_deg / 30.0 - np.round(pm.yaw_deg / 30.0)) < 1e-6
    plain = reliable_distances(x, w, P, V, None, np.round(pm.yaw_deg / 30.0) * 30.0, pm.scale)
    np.testing.assert_allclose(plain[whole], pm.D[whole], rtol=1e-4)


def test_reliability_weights_separate_unknown_views_that_sensor_noise_hides():
    """Known single views = prototype + strong noise on the outer ring of cells (a sensor's edge effects);
    unknown views = another shape, same noise.  Weights fitted on known views (not those tested) lift the
    known-vs-unknown AUROC well above the plain observation-weighted distance."""
    rng = np.random.default_rng(1)
    proto = rng.random((C, R, A, H)).astype(np.float32)
    other = np.clip(proto + rng.normal(0, 0.12, proto.shape), 0, 1).astype(np.float32)
    noisy = np.zeros((R, A, H), bool)
    noisy[-1] = True                                        # the rim
    noisy[:, :, -1] = True                                  # and the top layer

    def views(base, n):
        x = np.repeat(base[None], n, 0) + rng.normal(0, 0.02, (n, C, R, A, H))
        x += np.where(noisy, rng.normal(0, 0.5, (n, C, R, A, H)), 0.0)
        w = (rng.random((n, R, A, H)) < 0.6).astype(np.float32)     # partial views
        return x.astype(np.float32), w

    P, V = proto[None], np.ones((1, R, A, H), np.float32)
    xc, wc = views(proto, 30)
    lam = cell_reliability(*[a[None] for a in residual_sums(xc, wc, proto, V[0])])
    xk, wk = views(proto, 40)
    xu, wu = views(other, 40)
    X, W = np.concatenate([xk, xu]), np.concatenate([wk, wu])
    known = np.r_[np.ones(40), np.zeros(40)]
    pm = pose_distances(X, W, P, V)
    plain = pm.D[:, 0]
    robust = reliable_distances(X, W, P, V, lam, pm.yaw_deg, pm.scale)[:, 0]
    auc_plain, auc_robust = roc_auc_score(known, -plain), roc_auc_score(known, -robust)
    # measured: plain 0.66, weighted 1.00
    assert auc_plain < 0.85 and auc_robust > 0.95
    assert lam[0][noisy[:, 0, :]].max() < lam[0][~noisy[:, 0, :]].min()


def test_mined_library_carries_reliability_and_the_matcher_scores_with_it(tiny_world):
    from protomine.label.matcher import make_matcher
    from protomine.mine.library import read_library
    from protomine.ingest.sharded import open_store
    lib = read_library(tiny_world["library"])
    lam = lib.prototypes["cell_reliability"]
    V = lib.prototypes["weights"]
    assert lam.shape == (V.shape[0], V.shape[1], V.shape[3])
    assert np.all(lam > 0) and np.isfinite(lam).all()
    st = open_store(tiny_world["store"])
    vols = st.read_single_views(np.arange(min(4, len(st.single_object))))
    m = make_matcher(lib, tiny_world["cfg"])
    got = m.match(vols)
    X, W = m.features(vols)
    pm = pose_distances(X, W, m.P, m.V, scales=m.scales)
    Dr = reliable_distances(X, W, m.P, m.V, lam, pm.yaw_deg, pm.scale)
    np.testing.assert_allclose(got["score"], lib.score(Dr, np.arange(lib.n_clusters)[None, :], single_view=True), atol=1e-5)
