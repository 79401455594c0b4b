from __future__ import annotations

import numpy as np
import pytest

from protomine.mine.posesearch import dense_distances, pose_distances, pose_distances_naive, shift_volume


def _random(rng, n=12, k=3, grid=(3, 5, 24, 4)):
    C, R, A, H = grid
    X = rng.normal(size=(n, C, R, A, H)).astype(np.float32)
    W = (rng.random((n, R, A, H)) * (rng.random((n, R, A, H)) > 0.4)).astype(np.float32)
    P = rng.normal(size=(k, C, R, A, H)).astype(np.float32)
    V = rng.random((k, R, A, H)).astype(np.float32)
    return X, W, P, V


@pytest.mark.parametrize("scales", [(1.0,), (0.85, 1.0, 1.2)])
def test_fft_matches_naive_twin(scales):
    X, W, P, V = _random(np.random.default_rng(1))
    fast = pose_distances(X, W, P, V, scales=scales, return_all=True, chunk_size=5)
    slow = pose_distances_naive(X, W, P, V, scales=scales, return_all=True)
    np.testing.assert_allclose(fast.all_D, slow.all_D, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(fast.D, slow.D, rtol=1e-4, atol=1e-5)
    np.testing.assert_array_equal(fast.scale, slow.scale)
    np.testing.assert_allclose(fast.yaw_deg, slow.yaw_deg, atol=1e-2)


@pytest.mark.parametrize("grid", [(2, 3, 15, 2), (1, 2, 8, 1)])
def test_fft_matches_naive_twin_odd_and_small_azimuth(grid):
    # an odd number of azimuth bins has no Nyquist bin; both transforms are matrix products whose rows
    # depend on the parity of A (reference: the explicit-roll twin, which never transforms)
    X, W, P, V = _random(np.random.default_rng(4), n=7, k=2, grid=grid)
    fast = pose_distances(X, W, P, V, scales=(0.9, 1.0), return_all=True, chunk_size=3)
    slow = pose_distances_naive(X, W, P, V, scales=(0.9, 1.0), return_all=True)
    np.testing.assert_allclose(fast.all_D, slow.all_D, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(fast.yaw_deg, slow.yaw_deg, atol=1e-2)


def test_rolled_prototype_found_at_its_yaw_with_zero_distance():
    rng = np.random.default_rng(2)
    _, _, P, V = _random(rng, k=2)
    A = P.shape[3]
    X, W = np.roll(P, 5, axis=3), np.roll(V, 5, axis=2)
    m = pose_distances(X, W, P, V)
    np.testing.assert_allclose(np.diag(m.yaw_deg), 5 * 360.0 / A, atol=1e-3)
    assert np.diag(m.D).max() < 1e-5


def test_sub_bin_refinement_recovers_fractional_shift():
    A = 36
    phi = 2 * np.pi * np.arange(A) / A
    proto = (np.cos(phi) + 0.5 * np.sin(2 * phi)).astype(np.float32)  # smooth ring
    P = np.broadcast_to(proto[None, None, None, :, None], (1, 1, 2, A, 1)).copy()
    V = np.ones((1, 2, A, 1), np.float32)
    for true_shift in (3.3, 10.7, 20.5):
        # the object is the continuous signal rotated by a fractional number of bins
        x = (np.cos(phi - true_shift * 2 * np.pi / A) + 0.5 * np.sin(2 * (phi - true_shift * 2 * np.pi / A)))
        X = np.broadcast_to(x.astype(np.float32)[None, None, None, :, None], (1, 1, 2, A, 1)).copy()
        m = pose_distances(X, V.copy(), P, V)
        assert abs(m.yaw_deg[0, 0] / (360.0 / A) - true_shift) < 0.2


def test_unobserved_cells_do_not_change_distance():
    rng = np.random.default_rng(3)
    X, W, P, V = _random(rng)
    W[:, :, :6] = 0.0
    a = pose_distances(X, W, P, V, scales=(0.9, 1.0))
    X2 = X.copy()
    X2[:, :, :, :6] = rng.normal(size=X2[:, :, :, :6].shape) * 100  # garbage where w = 0
    b = pose_distances(X2, W, P, V, scales=(0.9, 1.0))
    np.testing.assert_allclose(a.D, b.D, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(dense_distances(X, W, P, V), dense_distances(X2, W, P, V), rtol=1e-4, atol=1e-5)


def test_distance_formula_by_hand():
    # one cell observed by both (w v = 0.5 * 1), one channel differing by 2: D = 0.5 * 4 / (1 * 0.5)
    X = np.zeros((1, 1, 1, 4, 1), np.float32)
    X[0, 0, 0, 0, 0] = 2.0
    W = np.zeros((1, 1, 4, 1), np.float32)
    W[0, 0, 0, 0] = 0.5
    P = np.zeros((1, 1, 1, 4, 1), np.float32)
    V = np.ones((1, 1, 4, 1), np.float32)
    assert dense_distances(X, W, P, V)[0, 0] == pytest.approx(4.0, rel=1e-4)


def test_shift_volume_integer_equals_roll():
    a = np.random.default_rng(4).random((3, 2, 7, 10, 2))
    np.testing.assert_allclose(shift_volume(a, np.array([1, -3, 12]), axis=3)[1], np.roll(a[1], -3, axis=2))


@pytest.mark.parametrize("row_block", [None, 4])
def test_scale_window_search_matches_the_naive_twin_within_each_window(row_block):
    # the engine's intermediate passes search each object's previous best scale +-1 only: the best pose must be
    # the best over that window of the explicit-roll twin's distances (every scale and shift, no transform),
    # whatever the blocks of objects; an object whose window sees nothing reports inf at the first scale
    from protomine.mine.posesearch import PoseBank
    scales = (0.8, 0.9, 1.0, 1.12, 1.25)
    rng = np.random.default_rng(7)
    X, W, P, V = _random(rng, n=11, k=3)
    W[0] = 0.0  # never seen: no overlap at any scale
    sidx = rng.integers(0, len(scales), len(X))
    bank = PoseBank(P, V, scales)
    got = bank.match_spectra(bank.spectra(X, W), scale_index=sidx, row_block=row_block)
    ref = pose_distances_naive(X, W, P, V, scales=scales, return_all=True).all_D  # (N, K, S, A)
    lo = np.clip(sidx - 1, 0, len(scales) - 3)
    inside = (np.arange(len(scales))[None, :] >= lo[:, None]) & (np.arange(len(scales))[None, :] < lo[:, None] + 3)
    masked = np.where(inside[:, None, :, None], ref, np.inf)
    flat = masked.reshape(len(X), P.shape[0], -1)
    best = flat.min(axis=2)
    np.testing.assert_allclose(got.D[1:], best[1:], rtol=1e-4, atol=1e-5)
    si = np.argmin(flat, axis=2) // P.shape[3]
    np.testing.assert_array_equal(got.scale[1:], np.asarray(scales, np.float32)[si[1:]])
    assert np.all(np.isinf(got.D[0])) and np.all(got.scale[0] == np.float32(scales[0]))


@pytest.mark.parametrize("shape", [(36, 64), (36, 5, 7), (300, 9)])
def test_first_min_is_the_first_index_of_the_least(shape):
    # ties (small integers), inf rows and all-inf columns: the index is numpy.argmin's, the first occurrence of
    # the minimum (numpy's documented rule); a column whose minimum is NaN gets index 0 (the module's rule)
    import torch
    from protomine.mine.posesearch import _first_min
    rng = np.random.default_rng(11)
    t = rng.integers(0, 4, shape).astype(np.float32)
    t[rng.random(shape) < 0.2] = np.inf
    flat = t.reshape(shape[0], -1)
    flat[:, 0] = np.inf
    D, idx = _first_min(torch.from_numpy(t))
    np.testing.assert_array_equal(D.numpy(), t.min(axis=0))
    np.testing.assert_array_equal(idx.numpy(), np.argmin(t, axis=0))
    flat[3, 1] = np.nan
    D, idx = _first_min(torch.from_numpy(t))
    assert np.isnan(D.numpy().reshape(-1)[1]) and idx.numpy().reshape(-1)[1] == 0


@pytest.mark.parametrize("keep_bytes", [0, 1 << 30])
def test_bank_matched_again_keeps_its_answers(keep_bytes, monkeypatch):
    # a bank lays its factors out for Gauss's products once and keeps them when small (PoseBank._kept_stacked):
    # every call must still answer as the explicit-roll twin (reference: pose_distances_naive, which never
    # transforms), and the same bits as the first call, kept or not
    import protomine.mine.posesearch as ps
    monkeypatch.setattr(ps, "STACKED_KEEP_BYTES", keep_bytes)
    X, W, P, V = _random(np.random.default_rng(7), n=9, k=3)
    scales = (0.9, 1.0, 1.1)
    bank = ps.PoseBank(P, V, scales)
    first, again = bank.match(X, W), bank.match(X, W)
    assert (getattr(bank, "_stacked_full", None) is not None) == (keep_bytes > 0)
    slow = pose_distances_naive(X, W, P, V, scales=scales)
    for m in (first, again):
        np.testing.assert_allclose(m.D, slow.D, rtol=1e-4, atol=1e-5)
        np.testing.assert_array_equal(m.scale, slow.scale)
    np.testing.assert_array_equal(again.D, first.D)
    np.testing.assert_array_equal(again.yaw_deg, first.yaw_deg)


def test_bank_built_on_the_search_pool_equals_one_built_on_one_thread():
    # with torch at 2 threads a PoseBank builds its factors on the search pool's threads (one torch thread each):
    # the factors must be those of a bank built with torch at one thread, to the bit, and its search must agree
    # with the explicit-roll twin (reference: pose_distances_naive, which never transforms)
    import torch
    import protomine.mine.posesearch as ps
    from protomine import cores
    X, W, P, V = _random(np.random.default_rng(5), n=6, k=70)       # more than one block of 64 prototypes
    scales = (0.9, 1.0, 1.1)
    before = torch.get_num_threads()
    try:
        cores.set_torch_threads(1)
        one = ps.PoseBank(P, V, scales)
        cores.set_torch_threads(2)
        two = ps.PoseBank(P, V, scales)
        m = two.match(X, W)
    finally:
        cores.set_torch_threads(before)
    for a, b in zip(one.factors, two.factors):
        assert torch.equal(a, b)
    slow = pose_distances_naive(X, W, P, V, scales=scales)
    np.testing.assert_allclose(m.D, slow.D, rtol=1e-4, atol=1e-5)
    np.testing.assert_array_equal(m.scale, slow.scale)
