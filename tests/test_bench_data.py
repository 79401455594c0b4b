"""The bench's synthetic volumes (protomine/mine/synthetic.py), its streamed row's files and the bench's CPU figures.

The posing is checked against a twin written from the definition in the module docstring (roll by a fractional
number of bins with linear interpolation between the two integer rolls, then linear resampling of the radius and
the height at (i + 0.5) / scale - 0.5, clamped to the grid), built with ``numpy.roll`` and ``numpy.interp``
(numpy's own shift and piecewise-linear interpolation), and against the per-object composition of
``posesearch.shift_volume`` and ``posesearch._resample_axis`` that generated the bench's data before the
vectorised posing, to the bit: the bench's seeded results (labels, NMI, ARI) stay what they were.
"""
from __future__ import annotations

import numpy as np
import pytest

from protomine.mine.synthetic import synthetic_objects, synthetic_prototypes


def _draws(seed: int, P: np.ndarray, n: int, noise: float, jitter: float):
    """The module's draws in its documented order: labels, yaws, scales, noise, view arcs, view heights."""
    rng = np.random.default_rng(seed)
    K, C, R, A, H = P.shape
    labels = rng.integers(0, K, n)
    yaw = rng.uniform(0, 360, n)
    scale = rng.uniform(1 - jitter, 1 + jitter, n) if jitter > 0 else np.ones(n)
    eps = noise * rng.standard_normal(size=(n, C, R, A, H), dtype=np.float32)
    start = rng.integers(0, A, n)
    top = rng.integers(H // 2, H + 1, n)
    return labels, yaw, scale, eps, start, top


def _resample_line(v: np.ndarray, s: float) -> np.ndarray:
    """out(i) = v((i + 0.5) / s - 0.5) by linear interpolation, positions clamped to [0, m - 1]."""
    m = len(v)
    return np.interp(np.clip((np.arange(m) + 0.5) / s - 0.5, 0, m - 1), np.arange(m), v)


def _posed_from_definition(p: np.ndarray, yaw: float, s: float) -> np.ndarray:
    A = p.shape[2]
    shift = yaw / (360.0 / A)
    f = int(np.floor(shift))
    t = shift - f
    x = (1 - t) * np.roll(p.astype(np.float64), f, axis=2) + t * np.roll(p.astype(np.float64), f + 1, axis=2)
    x = np.apply_along_axis(_resample_line, 1, x, s)
    return np.apply_along_axis(_resample_line, 3, x, s)


@pytest.mark.parametrize("n,jitter", [(24, 0.1), (5, 0.3), (6, 0.0)])
def test_synthetic_objects_pose_prototypes_as_defined(n, jitter):
    P = synthetic_prototypes(np.random.default_rng(5), 6)
    X, W, labels, yaw, scale = synthetic_objects(np.random.default_rng(11), P, n, scale_jitter=jitter)
    lab, yw, sc, eps, start, top = _draws(11, P, n, 0.3, jitter)
    assert np.array_equal(labels, lab) and np.array_equal(yaw, yw) and np.array_equal(scale, sc)
    assert X.dtype == np.float32 and X.shape == (n,) + P.shape[1:]
    for i in range(n):
        ref = _posed_from_definition(P[lab[i]], yw[i], sc[i]) + eps[i]
        np.testing.assert_allclose(X[i], ref, rtol=0, atol=2e-5)
        A, H = P.shape[3], P.shape[4]
        seen = ((np.arange(A) - start[i]) % A < A // 2)[None, :, None] & (np.arange(H) < top[i])[None, None, :]
        assert np.array_equal(W[i], np.broadcast_to(seen, W[i].shape).astype(np.float32))


def test_synthetic_objects_equal_the_per_object_posing_to_the_bit():
    from protomine.mine.posesearch import _resample_axis, shift_volume
    P = synthetic_prototypes(np.random.default_rng(0), 32)
    n = 300  # more than one block of the posing threads
    X = synthetic_objects(np.random.default_rng(3), P, n)[0]  # posed on the module's threads, block by block
    lab, yw, sc, eps, *_ = _draws(3, P, n, 0.3, 0.1)
    ref = shift_volume(P[lab], yw / (360.0 / P.shape[3]), axis=3)
    for i in range(n):
        m = np.ones((1, P.shape[2], 1, P.shape[4]), bool)
        x, _ = _resample_axis(ref[i:i + 1], m, sc[i], 2)
        ref[i:i + 1], _ = _resample_axis(x, m, sc[i], 4)
    ref += eps
    assert X.tobytes() == ref.astype(np.float32).tobytes()


def test_streamed_rows_files_hold_the_blocks_drawn_in_order(tmp_path):
    from protomine.scale.streamed import write_synthetic
    (xp, wp, lp), P = write_synthetic(tmp_path, 25, 4, seed=2, block=10)
    rng = np.random.default_rng(2)
    P_ref = synthetic_prototypes(rng, 4)
    blocks = [synthetic_objects(rng, P_ref, m) for m in (10, 10, 5)]
    assert np.array_equal(P, P_ref)
    # reference reader: numpy's np.load
    assert np.array_equal(np.load(xp), np.concatenate([b[0] for b in blocks]))
    assert np.array_equal(np.load(wp), np.concatenate([b[1] for b in blocks]))
    assert np.array_equal(np.load(lp), np.concatenate([b[2] for b in blocks]))


def test_bench_reports_cpu_percent_beside_each_wall_time():
    from protomine.bench import _run_row, _with_cpu_pct
    fig = _with_cpu_pct({"seconds": 2.0, "cpu_s": 3.0, "fft_s": 4.0, "fft_cpu_s": 1.0, "ratio_fft_dense_cpu": 1.5,
                         "sizes": [{"seconds": 1.0, "cpu_s": 0.5}], "lone_cpu_s": 1.0})
    # 100 CPU seconds / wall seconds, per cent of one core (common practice: what `time` and `top` report)
    assert fig["cpu_pct"] == 150.0 and fig["fft_cpu_pct"] == 25.0 and fig["sizes"][0]["cpu_pct"] == 50.0
    assert "lone_cpu_pct" not in fig and "ratio_fft_dense_cpu_pct" not in fig
    assert list(fig)[:3] == ["seconds", "cpu_s", "cpu_pct"]

    def spin(quick, seed):
        import time
        t0 = time.process_time()
        while time.process_time() - t0 < 0.2:
            pass
        return {}
    row = _run_row(spin, True, 0)
    assert 0.15 < row["row_cpu_s"] <= row["row_s"] * 2.5 and row["row_cpu_pct"] > 0


def test_ready_threads_counts_a_busy_thread_and_not_a_sleeping_one():
    """The kernel's /proc/<pid>/task/<tid>/schedstat: time on a CPU and time waiting in a run queue, in ns
    (Documentation/scheduler/sched-stats.rst, from memory): a spinning thread is one of them all along, at any load,
    a sleeping one neither."""
    import time

    from protomine.cores import ready_clock, ready_threads
    if not ready_clock():
        pytest.skip("no /proc/self/task/*/schedstat here")
    r0, t0 = ready_clock(), time.perf_counter()
    time.sleep(0.3)
    assert ready_threads(r0, time.perf_counter() - t0) < 0.3
    r0, t0 = ready_clock(), time.perf_counter()
    while time.perf_counter() - t0 < 0.3:
        pass
    assert 0.8 < ready_threads(r0, time.perf_counter() - t0) < 1.3
