"""Audit numbers: clustering scores, yaw alignment, label propagation (intervals: test_audit_intervals.py)."""
from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn import metrics as skm

from protomine.audit.metrics import (clustering_scores, contingency, hungarian_accuracy_score,
                                     inverse_purity_score, purity_score, symmetry_to_period_deg,
                                     yaw_error_deg, yaw_offset_deg)
from protomine.audit.uncertainty import propagation_accuracy


def _manning_example() -> tuple[np.ndarray, np.ndarray]:
    # Manning, Raghavan & Schutze, Introduction to Information Retrieval (2008), ch. 16, Figure 16.4:
    # cluster 1 = 5 x, 1 o; cluster 2 = 1 x, 4 o, 1 diamond; cluster 3 = 2 x, 3 diamond (17 points)
    clusters = np.repeat([1, 1, 2, 2, 2, 3, 3], [5, 1, 1, 4, 1, 2, 3])
    labels = np.repeat(["x", "o", "x", "o", "d", "x", "d"], [5, 1, 1, 4, 1, 2, 3])
    return clusters, labels


def test_manning_worked_example():
    c, l = _manning_example()
    s = clustering_scores(c, l)
    assert s["n"] == 17
    assert s["purity"] == pytest.approx(0.71, abs=0.005)       # Manning et al. 2008, ch. 16: purity ~ 0.71
    # NMI and RI are scikit-learn's values forwarded unchanged: these two lines check the wiring (the
    # arithmetic-mean normalisation Manning et al. use), not code of ours
    assert s["nmi"] == pytest.approx(0.36, abs=0.005)          # Manning et al. 2008, ch. 16: NMI ~ 0.36
    assert s["rand_index"] == pytest.approx(0.68, abs=0.005)   # Manning et al. 2008, ch. 16: RI ~ 0.68
    assert s["purity"] == pytest.approx(12 / 17)               # Manning et al. 2008: (5 + 4 + 3) / 17


def test_purity_and_inverse_purity_hand_worked():
    # hand-worked: clusters {a,a,b}, {b}, {c}: majorities 2 + 1 + 1 of 5 -> 0.8;
    # classes a {c0,c0}, b {c0,c1}, c {c2}: 2 + 1 + 1 of 5 -> 0.8; merging all: purity 2/5, inverse 1
    c = np.array([0, 0, 0, 1, 2])
    l = np.array(["a", "a", "b", "b", "c"])
    assert purity_score(c, l) == pytest.approx(0.8)
    assert inverse_purity_score(c, l) == pytest.approx(0.8)
    assert purity_score(np.zeros(5, int), l) == pytest.approx(0.4)
    assert inverse_purity_score(np.zeros(5, int), l) == pytest.approx(1.0)
    table, ids, names = contingency(c, l)
    assert table.tolist() == [[2, 1, 0], [0, 1, 0], [0, 0, 1]]
    assert ids.tolist() == [0, 1, 2] and names.tolist() == ["a", "b", "c"]


@pytest.mark.parametrize("seed", range(5))
def test_scores_equal_sklearn_on_random_labelings(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(20, 200))
    c = rng.integers(0, rng.integers(2, 9), n)
    l = rng.choice(list("abcdefg"), n)
    s = clustering_scores(c, l)
    # forwarded scikit-learn scores: a wiring check (argument order), not an outside check of our code
    assert s["nmi"] == pytest.approx(skm.normalized_mutual_info_score(l, c))
    assert s["ari"] == pytest.approx(skm.adjusted_rand_score(l, c))
    assert s["v_measure"] == pytest.approx(skm.v_measure_score(l, c))
    assert s["homogeneity"] == pytest.approx(skm.homogeneity_score(l, c))
    assert s["completeness"] == pytest.approx(skm.completeness_score(l, c))
    assert s["rand_index"] == pytest.approx(skm.rand_score(l, c))
    # purity vs sklearn's contingency matrix (independent of our helper)
    cm = skm.cluster.contingency_matrix(l, c)
    assert s["purity"] == pytest.approx(cm.max(axis=0).sum() / n)
    assert s["inverse_purity"] == pytest.approx(cm.max(axis=1).sum() / n)


def _hungarian_brute_force(c: np.ndarray, l: np.ndarray) -> float:
    """Best one-to-one cluster -> label map by trying every injection (small cases only)."""
    cs, ls = np.unique(c), np.unique(l)
    best = 0
    slots = list(ls) + [None] * len(cs)          # None = cluster left unmatched
    for perm in set(itertools.permutations(slots, len(cs))):
        used = [p for p in perm if p is not None]
        if len(used) != len(set(used)):
            continue
        mapping = dict(zip(cs, perm))
        best = max(best, sum(mapping[ci] == li for ci, li in zip(c, l)))
    return best / len(c)


@pytest.mark.parametrize("seed", range(8))
def test_hungarian_accuracy_equals_brute_force(seed):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(5, 30))
    c = rng.integers(0, rng.integers(1, 5), n)
    l = rng.choice(list("abcd")[: int(rng.integers(1, 5))], n)
    assert hungarian_accuracy_score(c, l) == pytest.approx(_hungarian_brute_force(c, l))


def test_hungarian_is_at_most_purity_and_one_to_one():
    # two clusters with the same majority: purity counts both, Hungarian only one of them
    c = np.array([0, 0, 1, 1])
    l = np.array(["a", "a", "a", "a"])
    assert purity_score(c, l) == 1.0
    assert hungarian_accuracy_score(c, l) == pytest.approx(0.5)


def test_bad_metric_input():
    with pytest.raises(ValueError, match="equal length"):
        purity_score([0, 1], ["a"])
    with pytest.raises(ValueError, match="at least one"):
        clustering_scores([], [])


# --- yaw -------------------------------------------------------------------------------------

def test_symmetry_periods():
    assert symmetry_to_period_deg(1) == 360.0
    assert symmetry_to_period_deg(4) == 90.0
    assert np.isinf(symmetry_to_period_deg(0))


def test_yaw_offset_recovered_across_wraparound():
    rng = np.random.default_rng(3)
    pred = rng.uniform(0, 360, 200)
    noise = rng.normal(0, 3, 200)
    truth = np.mod(pred + 355.0 + noise, 360)          # offset close to the 0/360 seam
    off = yaw_offset_deg(truth, pred, 360.0)
    assert min(abs(off - 355.0), 360 - abs(off - 355.0)) < 1.0
    err = yaw_error_deg(truth, pred, off, 360.0)
    # once the offset is removed, each error is that member's noise, up to the offset's own error (< 1 deg)
    assert np.abs(err - np.abs(noise)).max() < 1.0


def test_yaw_modulo_symmetry_period():
    # a 2-fold object: a prediction off by 180 degrees is as good as a correct one
    pred = np.array([10.0, 50.0, 100.0, 300.0])
    truth = np.mod(pred + 40.0 + np.array([0.0, 180.0, 0.0, 180.0]), 360)
    off = yaw_offset_deg(truth, pred, 180.0)
    assert off == pytest.approx(40.0, abs=1e-9)
    assert np.allclose(yaw_error_deg(truth, pred, off, 180.0), 0.0, atol=1e-9)
    assert np.allclose(yaw_error_deg(truth, pred, 40.0, 360.0), [0, 180, 0, 180])
    # continuous symmetry: no yaw is observable, so no error
    assert yaw_offset_deg(truth, pred, np.inf) == 0.0
    assert np.all(yaw_error_deg(truth, pred, 0.0, np.inf) == 0.0)


# --- label propagation -----------------------------------------------------------------------

def test_propagation_hand_worked_single_draw():
    # one cluster labelled a, a, b; one draw names it a with prob 2/3 (then 2 of 3 correct) or b with 1/3
    # (1 of 3 correct): expected accuracy 2/3 * 2/3 + 1/3 * 1/3 = 5/9 (hand-worked)
    c = np.zeros(3, int)
    l = np.array(["a", "a", "b"])
    out = propagation_accuracy(c, l, np.random.default_rng(0), draws=1, n_repeats=6000)
    assert out["mean"] == pytest.approx(5 / 9, abs=0.015)
    assert out["interval"] == (pytest.approx(1 / 3), pytest.approx(2 / 3))
    # three draws of three members: the whole cluster is seen, always named a
    out3 = propagation_accuracy(c, l, np.random.default_rng(0), draws=3, n_repeats=100)
    assert out3["mean"] == pytest.approx(2 / 3) and out3["ceiling"] == pytest.approx(2 / 3)
    out5 = propagation_accuracy(c, l, np.random.default_rng(0), draws=5, n_repeats=10)
    assert out5["short_clusters"] == [0]


def test_propagation_tie_is_broken_at_random():
    # two draws from {a, b}: always a tie, so the name is a or b half the time each
    c = np.zeros(2, int)
    l = np.array(["a", "b"])
    out = propagation_accuracy(c, l, np.random.default_rng(1), draws=2, n_repeats=4000)
    assert out["mean"] == pytest.approx(0.5)          # every outcome gives 1 of 2 correct
    names_a = propagation_accuracy(np.zeros(3, int), np.array(["a", "b", "a"]), np.random.default_rng(1),
                                   draws=2, n_repeats=6000)
    # draws {a,a} w.p. 1/3 -> a; {a,b} w.p. 2/3 -> tie -> a half the time: P(a) = 2/3, acc = 2/3*2/3 + 1/3*1/3
    assert names_a["mean"] == pytest.approx(5 / 9, abs=0.015)


def test_propagation_pure_clusters_are_always_right():
    c = np.repeat([0, 1, 2], 4)
    l = np.repeat(["x", "y", "x"], 4)
    for d in (1, 3, 5):
        out = propagation_accuracy(c, l, np.random.default_rng(d), draws=d, n_repeats=50)
        assert out["mean"] == 1.0 and out["interval"] == (1.0, 1.0)


def test_truth_points_match_anywhere_along_the_object_axis():
    # a truth point may be given at an object's base, middle or top: all lie on its axis (hand-worked)
    from protomine.audit.truth import ObjectTable
    t = ObjectTable(["c/1", "c/2"], ["c", "c"], [[0.0, 0.0, 0.05], [1.0, 0.0, 0.05]], [[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    d = t.distance_to(np.array([0, 1]), np.array([0.0, 0.0, 0.0]))
    np.testing.assert_allclose(d, [0.0, 1.0])
    np.testing.assert_allclose(t.distance_to(np.array([0]), np.array([0.0, 0.0, 0.1])), [0.0], atol=1e-12)
    np.testing.assert_allclose(t.distance_to(np.array([0]), np.array([0.03, 0.04, 0.2])), [np.hypot(0.05, 0.1)])
    # without base centres the centre is used, as before
    c = ObjectTable(["c/1"], ["c"], [[0.0, 0.0, 0.05]])
    np.testing.assert_allclose(c.distance_to(np.array([0]), np.array([0.0, 0.0, 0.0])), [0.05])


def test_yaw_offset_ignores_a_flipped_member():
    # nine members 2 deg apart around an offset of 30, one misaligned by 120: the offset stays at 30 (the
    # plain circular mean, scipy.stats.circmean, moves to 35.8)
    pred = np.zeros(10)
    truth = np.array([22.0, 24, 26, 28, 30, 32, 34, 36, 38, 150.0])
    off = yaw_offset_deg(truth, pred, 360.0)
    assert off == pytest.approx(30.0, abs=1e-9)


def test_rotation_error_modulo_a_continuous_symmetry_is_exact():
    """Reference: scipy's Rotation (geodesic angle = magnitude of the relative rotation vector), minimised over
    a dense sweep of 0.01-degree turns about z.  A perfectly posed cylinder turned about its axis has error 0
    (the old 10-degree sampling read up to 5 degrees into it), and a tilt of t degrees stays t whatever the turn."""
    from scipy.spatial.transform import Rotation
    from protomine.audit.metrics import about_z_geodesic_deg, rotation_error_deg, rotation_offset
    rng = np.random.default_rng(5)
    A = Rotation.random(20, random_state=rng)
    B = Rotation.random(20, random_state=rng)
    sweep = Rotation.from_euler("z", np.arange(0.0, 360.0, 0.01)[:, None], degrees=True)
    want = np.array([np.min((a.inv() * (b * sweep)).magnitude()) for a, b in zip(A, B)])
    got = about_z_geodesic_deg(A.as_matrix(), B.as_matrix())
    np.testing.assert_allclose(got, np.rad2deg(want), atol=0.01)
    R_true = Rotation.random(6, random_state=rng)
    turned = R_true * Rotation.from_euler("z", rng.uniform(0, 360, (6, 1)), degrees=True)
    tipped = R_true * Rotation.from_euler("x", 7.0, degrees=True)
    I = np.eye(3)
    np.testing.assert_allclose(rotation_error_deg(turned.as_matrix(), R_true.as_matrix(), I, None), 0.0, atol=1e-5)
    np.testing.assert_allclose(rotation_error_deg(tipped.as_matrix(), R_true.as_matrix(), I, None), 7.0, atol=1e-5)
    O = rotation_offset(turned.as_matrix(), R_true.as_matrix(), None)
    np.testing.assert_allclose(rotation_error_deg(turned.as_matrix(), R_true.as_matrix(), O, None), 0.0, atol=1e-5)


def test_twist_about_an_axis_is_the_nearest_turn_about_it():
    """Reference: scipy's Rotation.  The twist of D about a (swing-twist decomposition D = S T) is the turn T about a
    that leaves the least swing S = D T^-1: a dense sweep of 0.01-degree turns, magnitude of D T^-1 minimised."""
    from scipy.spatial.transform import Rotation
    from protomine.audit.metrics import twist_deg
    rng = np.random.default_rng(11)
    D = Rotation.random(12, random_state=rng)
    a = rng.normal(size=(12, 3))
    a /= np.linalg.norm(a, axis=1, keepdims=True)
    sweep = np.arange(-180.0, 180.0, 0.01)
    want = np.array([sweep[np.argmin((d * Rotation.from_rotvec(-np.deg2rad(sweep)[:, None] * ax)).magnitude())]
                     for d, ax in zip(D, a)])
    got = twist_deg(D.as_matrix(), a)
    np.testing.assert_allclose(np.abs(np.mod(got - want + 180.0, 360.0) - 180.0), 0.0, atol=0.02)


def test_yaw_about_up_is_defined_on_every_resting_face():
    """Reference: scipy's Rotation builds the poses.  Members of one class rest on two faces in captures with random
    world frames; each prediction is the true pose with a known turn psi about up and a known tip beta about a
    horizontal axis, and one unknown frame offset O.  The yaw error about up is |psi| and the rotation error the
    magnitude of tip * turn, whatever the face; the older figure (one circular offset of yaw_deg per cluster, yaw_deg
    read about up from the resting face's tilted frame) counts the two faces' different offsets as errors."""
    from scipy.spatial.transform import Rotation
    from protomine.audit.metrics import rotation_error_deg, rotation_offset, yaw_about_up_error_deg
    from protomine.rotations import matrix_to_tilt_yaw
    rng = np.random.default_rng(3)
    n = 16
    faces = [Rotation.identity(), Rotation.from_euler("x", 90.0, degrees=True)]   # upright, lying on its side
    f = np.arange(n) % 2
    W = Rotation.random(n, random_state=rng)                                       # table frame (z up) -> world
    yaw_true = rng.uniform(0.0, 360.0, n)
    R_true = [W[i] * Rotation.from_euler("z", yaw_true[i], degrees=True) * faces[f[i]] for i in range(n)]
    up = W.apply([0.0, 0.0, 1.0])
    O = Rotation.random(random_state=rng)                                          # prototype frame <- class frame
    psi = rng.uniform(-8.0, 8.0, n)
    psi[:2] = [0.0, 0.0]                                                           # two exact members
    beta = rng.uniform(-5.0, 5.0, n)
    beta[:2] = [0.0, 0.0]
    h = np.cross(up, rng.normal(size=(n, 3)))
    h /= np.linalg.norm(h, axis=1, keepdims=True)
    delta = [Rotation.from_rotvec(np.deg2rad(beta[i]) * h[i]) * Rotation.from_rotvec(np.deg2rad(psi[i]) * up[i])
             for i in range(n)]
    R_pred = np.array([(delta[i].inv() * R_true[i] * O.inv()).as_matrix() for i in range(n)])
    Rt = np.array([r.as_matrix() for r in R_true])
    O_hat = rotation_offset(R_pred, Rt, np.eye(3)[None])
    np.testing.assert_allclose(O_hat, O.as_matrix(), atol=0.3)                     # the medoid: an exact member's
    yaw = yaw_about_up_error_deg(R_pred, Rt, O.as_matrix(), np.eye(3)[None], up)
    np.testing.assert_allclose(yaw, np.abs(psi), atol=1e-6)
    rotn = rotation_error_deg(R_pred, Rt, O.as_matrix(), np.eye(3)[None])
    np.testing.assert_allclose(rotn, np.rad2deg([d.magnitude() for d in delta]), atol=1e-6)
    # the older figure on the turns alone: yaw_deg about up in each capture's table frame (Rz(yaw) after the
    # face's shortest-arc tilt), one circular offset per cluster
    turned = [Rotation.from_rotvec(-np.deg2rad(psi[i]) * up[i]) * R_true[i] * O.inv() for i in range(n)]
    _, yaw_pred = matrix_to_tilt_yaw(np.array([(W[i].inv() * turned[i]).as_matrix() for i in range(n)]))
    old = yaw_error_deg(yaw_true, yaw_pred, yaw_offset_deg(yaw_true, yaw_pred), 360.0)
    for face in (0, 1):   # right within one face (its own offset: errors within the turns' spread) ...
        sel = f == face
        e = yaw_error_deg(yaw_true[sel], yaw_pred[sel], yaw_offset_deg(yaw_true[sel], yaw_pred[sel]), 360.0)
        assert np.max(e) <= np.ptp(psi[sel]) + 1e-6
    assert np.median(old) > 20.0   # ... but one offset for both faces reads the faces' offsets as errors
    # a continuous symmetry about the class's z: upright, a turn about up is no error; lying on its side it is
    turned = np.array([t.as_matrix() for t in turned])
    np.testing.assert_allclose(yaw_about_up_error_deg(turned, Rt, O.as_matrix(), None, up),
                               np.where(f == 0, 0.0, np.abs(psi)), atol=1e-6)
