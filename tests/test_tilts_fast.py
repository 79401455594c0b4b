"""The tilt search's fast paths against twins computed from the definition (mine/tilts.py module docstring).

- Tilted copies and untilting: every cell centre is mapped through the copy's rotation and placement and the
  volume is read there by trilinear interpolation with ``scipy.ndimage.map_coordinates`` (order 1; scipy as
  the reference interpolator), the azimuth wrapped by padding, radial/height positions clamped to the first and
  last bin centres, 0 outside the grid's cylinder.  The fast path uses one ``torch`` ``grid_sample`` per block.
- The refinement's column spectra equal ``posesearch``'s own scaling and prototype spectra.
- The grouped refinement equals its definition: for each object's ``refine_top`` best (prototype, coarse tilt)
  pairs, the best over each later level's candidate directions at the pair's coarse scale, each candidate's
  distance by ``posesearch.pose_distances_naive`` (explicit rolls, no FFT) on that copy.
"""
from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy import ndimage

from protomine.mine import tilts
from protomine.mine.posesearch import (_dft_matrix, _distances_from_spectra, _prototype_spectra, pose_distances_naive,
                                      scale_prototypes)
from protomine.mine.tilts import TiltBank, TiltGrid, column_factors

SHAPE = (5, 16, 6)


def _protos(rng, K=2, C=2):
    P = np.abs(rng.normal(size=(K, C) + SHAPE)).astype(np.float32)
    P = ndimage.gaussian_filter(P, sigma=(0, 0, 0.7, 1.5, 0.7), mode="wrap").astype(np.float32)
    V = rng.uniform(0.2, 1.0, size=(K,) + SHAPE).astype(np.float32)
    return P, V


def _read(vol: np.ndarray, q: np.ndarray, rho_max: float, z_max: float) -> np.ndarray:
    """Trilinear reading of vol (..., R, A, H) at points q (N, 3) of its frame (grid extents rho_max, z_max)."""
    R, A, H = vol.shape[-3:]
    fi = np.hypot(q[:, 0], q[:, 1]) / rho_max * R - 0.5
    fj = np.mod(np.arctan2(q[:, 1], q[:, 0]), 2 * np.pi) / (2 * np.pi) * A - 0.5
    fk = q[:, 2] / z_max * H - 0.5
    inside = (fi <= R - 0.5) & (fk >= -0.5) & (fk <= H - 0.5)
    coords = np.stack([np.clip(fi, 0, R - 1), fj + 1.0, np.clip(fk, 0, H - 1)])
    flat = vol.reshape((-1, R, A, H))
    out = [ndimage.map_coordinates(np.concatenate([v[:, -1:], v, v[:, :1]], axis=1), coords, order=1) for v in flat]
    return np.stack(out).reshape(vol.shape[:-3] + (-1,)) * inside


def _outside(q: np.ndarray, rho_max: float, z_max: float) -> np.ndarray:
    """Points q (N, 3) beyond the last radial bin centre or the first/last height bin's outer edge."""
    R, _, H = SHAPE
    fi = np.hypot(q[:, 0], q[:, 1]) / rho_max * R - 0.5
    fk = q[:, 2] / z_max * H - 0.5
    return (fi > R - 0.5) | (fk < -0.5) | (fk > H - 0.5)


def _centres(rho_max: float, z_max: float) -> np.ndarray:
    R, A, H = SHAPE
    out = np.zeros((R, A, H, 3))
    for i in range(R):
        for j in range(A):
            for k in range(H):
                rho, phi = (i + 0.5) / R * rho_max, (j + 0.5) / A * 2 * np.pi
                out[i, j, k] = [rho * np.cos(phi), rho * np.sin(phi), (k + 0.5) / H * z_max]
    return out.reshape(-1, 3)


def test_tilted_copies_and_untilting_equal_the_twin():
    rng = np.random.default_rng(0)
    P, V = _protos(rng)
    # prototype 0 lies inside an empty margin (low surface evidence in its outer radial bin and top height bin,
    # as a lifted volume); prototype 1 fills its whole grid
    P[0, 0, -1] *= 0.1
    P[0, 0, :, :, -1] *= 0.1
    aspect = np.array([0.9, 1.4])
    bank = TiltBank(P, V, aspect, (1.0,), TiltGrid(nsides=(1, 2)))
    ks, ts = np.array([0, 1, 1, 0]), np.array([3, 5, 20, 40])
    Pc, Vc = bank.copies(ks, ts)
    a = rng.random((len(ks), 2) + SHAPE)
    un = bank.untilt_many(ks, ts, a)
    for m, (k, t) in enumerate(zip(ks, ts)):
        g = bank.geometry(k, t)
        # forward: copy cell q -> prototype point M^T (q + b) + c0, read in the prototype's grid (rho 1, z aspect)
        p = (_centres(g.rho_max, g.z_max) + g.base) @ g.M + g.c0
        v = _read(V[k], p, 1.0, aspect[k])
        wx = _read(V[k][None] * P[k], p, 1.0, aspect[k])
        ref = np.where(v > 1e-6, wx / np.maximum(v, 1e-6), 0.0)
        # outside the prototype's cylinder: the empty space of its margin, the weighted mean of its outer
        # radial bin and top height bin (each margin cell once), with their mean weight, when that mean's surface
        # evidence says empty (below 0.4, tilts.SURFACE_MIN); else unknown (weight 0, features 0)
        R, A, H = SHAPE
        cells = [(i, j, h) for i in range(R) for j in range(A) for h in range(H) if i == R - 1 or h == H - 1]
        wsum = sum(V[k][c] for c in cells)
        fill = np.array([sum(V[k][c] * P[k][ch][c] for c in cells) / wsum for ch in range(2)])
        empty = fill[0] < 0.4
        assert empty == (k == 0)
        out = _outside(p, 1.0, aspect[k])
        v = np.where(out, wsum / len(cells) if empty else 0.0, v)
        ref = np.where(out[None], fill[:, None] if empty else 0.0, ref)
        np.testing.assert_allclose(Vc[m].reshape(-1), v, atol=1e-5)
        np.testing.assert_allclose(Pc[m].reshape(2, -1), ref, atol=1e-4)
        # inverse: prototype cell p -> copy point M (p - c0) - b, read in the copy's grid
        q = (_centres(1.0, aspect[k]) - g.c0) @ g.M.T - g.base
        np.testing.assert_allclose(un[m].reshape(2, -1), _read(a[m], q, g.rho_max, g.z_max), atol=1e-9)
    # upright directions (the first of each level is +z) are the prototype itself
    Pu, Vu = bank.copies(np.array([1, 1]), np.array([0, 12]))
    np.testing.assert_array_equal(Pu[1], P[1]) and np.testing.assert_array_equal(Vu[0], V[1])


def test_column_factors_equal_posesearch_spectra():
    rng = np.random.default_rng(1)
    P, V = _protos(rng, K=5, C=3)
    for s in (0.87, 1.0, 1.15):
        Ps, Vs = scale_prototypes(P, V, (s,))
        ref = _prototype_spectra(torch.from_numpy(Ps[:, 0]), torch.from_numpy(Vs[:, 0]))
        got = column_factors(P, V, s, _dft_matrix(SHAPE[1]))
        # the same copies given one by one (each step stacks its own): the same tensors
        listed = column_factors(list(P), list(V), s, _dft_matrix(SHAPE[1]))
        for r, g, gl in zip(ref, got, listed):
            assert r.shape == g.shape
            np.testing.assert_allclose(g.numpy(), r.numpy(), atol=1e-4 * float(r.abs().max()))
            np.testing.assert_allclose(gl.numpy(), r.numpy(), atol=1e-4 * float(r.abs().max()))


def _naive_best(bank, x, w, k, tilts, scales):
    """The definition of a refinement step: prototype k's copies at ``tilts``, the naive distance (explicit rolls) of one
    object (x, w) on each; the least distance and its tilt."""
    Pc, Vc = bank.copies(np.full(len(tilts), k), np.asarray(tilts))
    m = pose_distances_naive(x[None], w[None], Pc, Vc, scales=scales)
    j = int(np.argmin(m.D[0]))
    return float(m.D[0, j]), int(tilts[j])


def _naive_coarse_pairs(bank, x, w, K, coarse, scales):
    """The first level by the definition: (distance, prototype, tilt, scale) of one object on every coarse copy."""
    pairs = []
    for k in range(K):
        Pc, Vc = bank.copies(np.full(len(coarse), k), coarse)
        m = pose_distances_naive(x[None], w[None], Pc, Vc, scales=scales)
        pairs += [(float(m.D[0, j]), k, int(coarse[j]), float(m.scale[0, j])) for j in range(len(coarse))]
    return pairs


@pytest.mark.parametrize("split,task_pairs", [(False, 8192), (True, 8192), (True, 1)])
def test_refinement_equals_its_definition(split, task_pairs, monkeypatch):
    # both ways of running a refinement group (one product against the union of its candidates, or one per
    # previous direction) must give the definition's poses, whether a pool task reduces a run of products or
    # each product alone (task_pairs 1)
    monkeypatch.setattr(tilts, "SPLIT_WASTE", 0.0 if split else np.inf)
    monkeypatch.setattr(tilts, "TASK_PAIRS", task_pairs)
    monkeypatch.setattr(tilts, "SPLIT_OVERHEAD", 0.0)
    rng = np.random.default_rng(2)
    P, V = _protos(rng, K=3)
    scales = (0.9, 1.0, 1.1)
    grid = TiltGrid(nsides=(1, 2, 4), refine_top=2)
    bank = TiltBank(P, V, np.array([1.0, 1.2, 0.8]), scales, grid)
    # objects: tilted, yawed copies of the prototypes with noise, half seen
    X, W = bank.copies(np.array([0, 1, 2, 0, 1, 2]), np.array([7, 30, 100, 150, 4, 0]))
    X = np.roll(X + 0.05 * rng.normal(size=X.shape).astype(np.float32), 5, axis=3)
    W = W * (np.arange(SHAPE[1]) < 10)[None, :, None]
    got = bank.match(X, W)
    # the definition, level by level, with the naive distance on each copy
    coarse = grid.level(0)
    n, K = len(X), len(P)
    for i in range(n):
        pairs = _naive_coarse_pairs(bank, X[i], W[i], K, coarse, scales)
        dk = {k: min(p for p in pairs if p[1] == k) for k in range(K)}  # coarse best per prototype
        for d, k, t, sc in sorted(pairs, key=lambda p: p[0])[:grid.refine_top]:
            for level in (1, 2):
                d2, t2 = _naive_best(bank, X[i], W[i], k, grid.candidates(level, t), (sc,))
                if d2 < d:
                    d, t = d2, t2
            if d < dk[k][0]:
                dk[k] = (d, k, t, sc)
        for k in range(K):
            np.testing.assert_allclose(got.D[i, k], dk[k][0], rtol=2e-4, atol=1e-6)
            assert got.scale[i, k] == np.float32(dk[k][3])
            # the tilt: the same direction (levels share their first direction, +z)
            assert np.allclose(grid.dirs[got.tilt[i, k]], grid.dirs[dk[k][2]]) or \
                abs(got.D[i, k] - dk[k][0]) < 1e-5, (i, k, got.tilt[i, k], dk[k][2])


@pytest.mark.parametrize("focused,margin,levels", [(True, 0.0, 0), (False, 0.3, 0), (True, 0.3, 0), (False, 0.0, 2)])
def test_pruned_refinement_equals_its_definition(focused, margin, levels):
    # the refinement restricted to a focus prototype per object (a pass with labels held), to the pairs within a
    # margin of the object's best so far, or to the first levels, against the definition as above (naive distances
    # by explicit rolls on each copy), with those rules applied level by level
    rng = np.random.default_rng(3)
    P, V = _protos(rng, K=3)
    scales = (0.9, 1.0, 1.1)
    grid = TiltGrid(nsides=(1, 2, 4), refine_top=3)
    bank = TiltBank(P, V, np.array([1.0, 1.2, 0.8]), scales, grid, refine_margin=margin)
    bank.levels = levels
    X, W = bank.copies(np.array([0, 1, 2, 0, 1, 2]), np.array([7, 30, 100, 150, 4, 0]))
    X = np.roll(X + 0.05 * rng.normal(size=X.shape).astype(np.float32), 5, axis=3)
    W = W * (np.arange(SHAPE[1]) < 10)[None, :, None]
    n, K = len(X), len(P)
    focus = np.array([1, 0, 2, 2, 1, 0]) if focused else None
    got = bank.match_spectra(bank.spectra(X, W), focus=focus)
    coarse = grid.level(0)
    for i in range(n):
        pairs = _naive_coarse_pairs(bank, X[i], W[i], K, coarse, scales)
        dk = {k: min(p for p in pairs if p[1] == k) for k in range(K)}
        top = [list(p) for p in sorted(pairs, key=lambda p: p[0])[:grid.refine_top]]
        live = [focus is None or p[1] == focus[i] for p in top]
        for level in range(1, levels or 3):
            ref = min([p[0] for p, a in zip(top, live) if a], default=np.inf)
            for p, a in zip(top, live):
                if a and (margin == 0 or p[0] <= ref * (1 + margin)):
                    d2, t2 = _naive_best(bank, X[i], W[i], p[1], grid.candidates(level, p[2]), (p[3],))
                    if d2 < p[0]:
                        p[0], p[2] = d2, t2
        for p in top:
            if p[0] < dk[p[1]][0]:
                dk[p[1]] = tuple(p)
        for k in range(K):
            np.testing.assert_allclose(got.D[i, k], dk[k][0], rtol=2e-4, atol=1e-6)


def test_refinement_copies_kept_across_chunks_give_the_same_values():
    # a pass of several chunks keeps the refinement's copies for its later chunks (TiltBank.more_chunks): each chunk's
    # poses equal those of a fresh bank (whose copies are all built anew), to the bit
    rng = np.random.default_rng(4)
    P, V = _protos(rng, K=3)
    grid = TiltGrid(nsides=(1, 2, 4), refine_top=2)
    aspect = np.array([1.0, 1.2, 0.8])
    kept = TiltBank(P, V, aspect, (0.9, 1.0), grid)
    X, W = kept.copies(np.array([0, 1, 2, 0, 1, 2, 1, 0]), np.array([7, 30, 100, 150, 4, 0, 60, 200]))
    X = np.roll(X + 0.05 * rng.normal(size=X.shape).astype(np.float32), 3, axis=3)
    for c, more in ((slice(0, 4), True), (slice(4, 8), False)):
        kept.more_chunks(more)
        a = kept.match(X[c], W[c])
        assert kept.keep_refined == more
        assert more == any(t >= grid.offsets[1] for _, t in kept._copies)  # the later levels' copies kept or dropped
        b = TiltBank(P, V, aspect, (0.9, 1.0), grid).match(X[c], W[c])
        for name in ("D", "yaw_deg", "scale", "tilt"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


@pytest.mark.parametrize("piece, block, subset", [(64, 256, False), (1, 2, True)])
def test_aligned_sums_untilt_each_member_into_its_prototype(monkeypatch, piece, block, subset):
    """The engine's per-(prototype, tilt, scale) sums, untilted in one resampling, equal the sum of each member
    untilted on its own by the twin (the untilt is linear; yaw 0 and scale 1 leave members as they are); also
    when the members are added a few at a time and the groups untilted in pieces, and when only some of the
    spectra's columns are members."""
    from protomine.mine import engine
    from protomine.mine.engine import _AlignedSums
    monkeypatch.setattr(engine, "RESULT_PIECE", piece)
    monkeypatch.setattr(engine, "ADD_BLOCK", block)
    from protomine.mine.posesearch import _object_spectra
    rng = np.random.default_rng(3)
    P, V = _protos(rng)
    aspect = np.array([1.1, 0.8])
    grid = TiltGrid(nsides=(1, 2))
    bank = TiltBank(P, V, aspect, (1.0,), grid)
    n, C = 7, P.shape[1]
    x = rng.random((n, C) + SHAPE).astype(np.float32)
    w = rng.random((n,) + SHAPE).astype(np.float32)
    k = np.array([0, 1, 1, 0, 1, 0, 1])
    t = np.array([3, 3, 20, 0, 3, 33, 12])
    T = len(grid.dirs)
    sums = _AlignedSums(2, 1, SHAPE[1], (C + 2) * SHAPE[0] * SHAPE[2], T)
    spec = _object_spectra(torch.from_numpy(x), torch.from_numpy(w), _dft_matrix(SHAPE[1]))
    members = np.array([0, 1, 2, 4, 5, 6]) if subset else np.arange(n)
    sums.add(spec, np.zeros(len(members)), (k * T + t)[members], members if subset else None)
    got = sums.result((1.0,), (C + 2, SHAPE[0], SHAPE[2]), bank)
    ref = np.zeros_like(got)
    for i in members:
        blocks = np.concatenate([(w[i] * (x[i] ** 2).sum(0))[None], w[i][None], w[i][None] * x[i]])
        if grid.is_upright(t[i]):
            ref[k[i]] += blocks
            continue
        g = bank.geometry(k[i], t[i])
        q = (_centres(1.0, aspect[k[i]]) - g.c0) @ g.M.T - g.base
        ref[k[i]] += _read(blocks, q, g.rho_max, g.z_max).reshape(blocks.shape)
    np.testing.assert_allclose(got, ref, atol=1e-4)


def test_untilt_in_place_and_in_reused_scratch_equals_the_twin():
    """``untilt_many(..., in_place=True)`` inside ``cores.reused_scratch`` (the engine's untilt of a piece: its
    padded volumes and inputs in the thread's reusable buffers) writes into the given array and gives the values
    of the copying call outside any scope, to the bit, and those equal the twin's trilinear reading
    (scipy.ndimage.map_coordinates, as above); called twice, the second call reads the same buffers again."""
    from protomine import cores
    rng = np.random.default_rng(1)
    P, V = _protos(rng)
    aspect = np.array([0.9, 1.4])
    bank = TiltBank(P, V, aspect, (1.0,), TiltGrid(nsides=(1, 2)))
    ks, ts = np.array([0, 1, 1, 0, 1]), np.array([3, 0, 20, 40, 7])  # tilt 0 is +z: left as it is
    a = rng.random((len(ks), 2) + SHAPE)
    ref = bank.untilt_many(ks, ts, a)
    with cores.reused_scratch():
        for _ in range(2):
            b = a.copy()
            got = bank.untilt_many(ks, ts, b, in_place=True)
            assert got is b
            np.testing.assert_array_equal(got, ref)
    np.testing.assert_array_equal(ref[1], a[1])
    for m in (0, 2, 3, 4):
        g = bank.geometry(ks[m], ts[m])
        q = (_centres(1.0, aspect[ks[m]]) - g.c0) @ g.M.T - g.base
        np.testing.assert_allclose(ref[m].reshape(2, -1), _read(a[m], q, g.rho_max, g.z_max), atol=1e-9)


def test_coarse_search_in_reused_scratch_equals_fresh_buffers_and_naive_search():
    """The coarse level's row blocks with their temporaries in each thread's reusable buffers
    (``PoseBank.match_spectra(reuse=True)`` inside ``cores.reused_scratch``, as ``TiltBank.match_spectra`` runs it)
    give the fresh buffers' distances, yaws and scales to the bit, over every scale and over scale windows, and the
    distances equal ``posesearch.pose_distances_naive`` (explicit rolls, no FFT) on the bank's copies."""
    from protomine import cores
    rng = np.random.default_rng(2)
    P, V = _protos(rng, K=2, C=2)
    scales = (0.9, 1.0, 1.1)
    bank = TiltBank(P, V, np.array([0.9, 1.4]), scales, TiltGrid(nsides=(1,)))
    X = np.abs(rng.normal(size=(13, 2) + SHAPE)).astype(np.float32)
    W = rng.uniform(0.0, 1.0, size=(13,) + SHAPE).astype(np.float32)
    o = bank.spectra(X, W)
    full = None
    for si in (None, np.array([0, 1, 2, 2, 1, 0, 0, 1, 2, 2, 1, 0, 1])):
        fresh = bank.coarse.match_spectra(o, scale_index=si, window=0, row_block=4)
        with cores.reused_scratch():
            reused = bank.coarse.match_spectra(o, scale_index=si, window=0, row_block=4, reuse=True)
        for name in ("D", "yaw_deg", "scale"):
            np.testing.assert_array_equal(getattr(reused, name), getattr(fresh, name))
        full = fresh if full is None else full
    Pc, Vc = bank.copies(np.repeat([0, 1], bank.T0), np.tile(bank.grid.level(0), 2))
    naive = pose_distances_naive(X, W, Pc, Vc, scales=scales)
    np.testing.assert_allclose(full.D, naive.D, rtol=1e-4, atol=1e-5)


def _blas_threads() -> list[int]:
    """numpy's and scipy's BLAS pools' thread counts, as threadpoolctl (scikit-learn's thread-pool inspector) reports."""
    from threadpoolctl import threadpool_info
    return [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]


def test_copy_geometry_products_equal_on_one_and_two_blas_threads():
    """The copies' geometry (tilts.copy_geometries, _forward_xyz, inverse_points: numpy products that the tilt fit runs
    on one BLAS thread, cores.one_blas_thread) gives the same bits on OpenBLAS's pool of two threads."""
    from threadpoolctl import threadpool_limits
    rng = np.random.default_rng(3)
    P, V = _protos(rng, K=3)
    grid = TiltGrid()

    def run() -> list[np.ndarray]:
        out = []
        for k in range(len(P)):
            aspect = 0.6 + 0.3 * k
            gs = tilts.copy_geometries(SHAPE, aspect, grid.dirs, grid, tilts.solid_points(P[k, 0], V[k], aspect, grid))
            out.append(np.array([np.r_[g.rho_max, g.z_max, g.base, g.M.ravel()] for g in gs]))
            for b in range(0, len(gs), 32):
                out.append(tilts._forward_xyz(gs[b:b + 32], SHAPE))
                out.append(tilts.inverse_points(gs[b:b + 32], SHAPE, np.full(len(gs[b:b + 32]), aspect)))
        return out

    with threadpool_limits(limits=2, user_api="blas"):
        many = run()
    with threadpool_limits(limits=1, user_api="blas"):
        one = run()
    assert len(one) == len(many) > 3
    for a, b in zip(one, many):
        np.testing.assert_array_equal(a, b)


def test_tilt_fit_runs_numpy_blas_on_one_thread_with_the_same_result(monkeypatch):
    """Inside PoseKMeans.fit with a tilt grid numpy's BLAS runs one thread (its previous count again afterwards), and
    the fit equals the same fit on OpenBLAS's pool of two threads (every fitted array, to the bit)."""
    from threadpoolctl import threadpool_limits

    from protomine import cores
    from protomine.mine.engine import ArraySource, PoseKMeans
    from protomine.mine.synthetic import synthetic_prototypes
    from protomine.mine.tiltbench import tumbled_objects
    rng = np.random.default_rng(0)
    grid = TiltGrid(nsides=(1, 2))
    P = np.abs(synthetic_prototypes(rng, 3))
    X, W, asp, _ = tumbled_objects(rng, P, 24, grid)
    seen = []
    forward = tilts._forward_xyz

    def spy(gs, shape):
        if not seen:
            seen.append(_blas_threads())
        return forward(gs, shape)

    monkeypatch.setattr(tilts, "_forward_xyz", spy)
    names = ("prototypes_", "prototype_weights_", "labels_", "yaw_deg_", "scale_", "distance_", "tilt_", "rotation_")

    def fit():
        m = PoseKMeans(n_clusters=3, n_init=1, max_iter=2, random_state=0, tilts=grid, scales=(0.9, 1.0, 1.1))
        return m.fit(ArraySource(X, W, asp))

    with threadpool_limits(limits=2, user_api="blas"):
        fast = fit()
        assert seen and all(n == 1 for n in seen[0]), seen
        assert all(n == 2 for n in _blas_threads())  # set back after the fit
        monkeypatch.setattr(cores, "one_blas_thread", __import__("contextlib").nullcontext)
        seen.clear()
        twin = fit()
        assert seen and all(n == 2 for n in seen[0]), seen
    for name in names:
        np.testing.assert_array_equal(getattr(fast, name), getattr(twin, name), err_msg=name)


@pytest.mark.parametrize("shape, rho_max, z_max", [((5, 16, 6), 1.0, 0.73), ((5, 16, 6), 1.0, 1.91), ((3, 7, 4), 1.3, 0.5)])
def test_cell_points_equal_the_cylindrical_cell_centres(shape, rho_max, z_max):
    """The grid's cell centres (DEVELOPERS.md conventions: radial bin i at (i + 1/2) / R rho_max, azimuth bin j at
    (j + 1/2) 360 / A degrees from x, height bin k at (k + 1/2) / H z_max), one cell at a time with math's cos and sin,
    against :func:`tilts._cell_points` (its x, y kept per grid, only z computed per call): asked twice with
    different heights, so a kept x, y that depended on z_max would fail."""
    import math
    R, A, H = shape
    tilts._cell_points(R, A, H, rho_max, 2.5 * z_max)  # the kept x, y filled by another height first
    got = tilts._cell_points(R, A, H, rho_max, z_max)
    want = np.array([[(i + 0.5) / R * rho_max * math.cos((j + 0.5) / A * 2 * math.pi),
                      (i + 0.5) / R * rho_max * math.sin((j + 0.5) / A * 2 * math.pi), (k + 0.5) / H * z_max]
                     for i in range(R) for j in range(A) for k in range(H)])
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


def _series(f: np.ndarray, bins: int, at: np.ndarray) -> np.ndarray:
    """The Fourier series of samples f (A,) (numpy.fft.rfft) cut to the frequencies 0 .. bins, evaluated at the
    positions ``at`` (in samples): (1 / A) (F_0 + 2 Re sum_{k=1..bins} F_k exp(2 pi i k t / A))."""
    A = len(f)
    F = np.fft.rfft(f)[:bins + 1]
    k = np.arange(bins + 1)
    c = np.where(k == 0, 1.0, 2.0)
    return (c * F[None] * np.exp(2j * np.pi * k[None] * at[:, None] / A)).real.sum(axis=1) / A


def test_band_limited_screen_equals_the_truncated_correlation():
    # the screen ([mine] tilt_coarse_bins, tilts.band_limited): at each of its A' = 2 L + 1 shifts, the numerator and
    # the denominator of the documented distance (posesearch module docstring) computed by explicit rolls at every
    # integer shift, then their Fourier series over the shifts cut to the frequencies 0 .. L (numpy.fft.rfft; common
    # practice: a band-limited signal between its samples) and evaluated at shift s' A / A', divided
    rng = np.random.default_rng(5)
    P, V = _protos(rng, K=2)
    L, A = 3, SHAPE[1]
    grid = TiltGrid(nsides=(1, 2))
    bank = TiltBank(P, V, np.array([1.0, 1.2]), (1.0,), grid, coarse_bins=L)
    assert bank.coarse.A == 2 * L + 1
    X = np.abs(rng.normal(size=(3, 2) + SHAPE)).astype(np.float32)
    W = rng.uniform(0.1, 1.0, size=(3,) + SHAPE).astype(np.float32)
    o = bank.spectra(X, W).index_select(0, bank.band)
    d = _distances_from_spectra(o, bank.coarse.factors, 2 * L + 1, 0.0).numpy()  # (A', M, n)
    T0 = len(grid.level(0))
    Pc, Vc = bank.copies(np.repeat([0, 1], T0), np.tile(grid.level(0), 2))  # the bank's order, prototype-major
    at = np.arange(2 * L + 1) * A / (2 * L + 1)
    for m in range(len(Pc)):
        for i in range(len(X)):
            v = [np.roll(Vc[m], s, axis=1) for s in range(A)]
            num = np.array([np.sum(W[i] * v[s] * (X[i] - np.roll(Pc[m], s, axis=2)) ** 2) for s in range(A)])
            den = 2 * np.array([np.sum(W[i] * v[s]) for s in range(A)])
            np.testing.assert_allclose(d[:, m, i], _series(num, L, at) / _series(den, L, at), rtol=2e-4)


def test_screened_search_reports_the_exact_distance_of_its_pose():
    # with the screen, each object's distance to its nearest prototype is the definition's (explicit rolls) on the
    # copy at the reported tilt, a refined direction, at the reported scale: the screen only ranks the pairs
    rng = np.random.default_rng(2)
    P, V = _protos(rng, K=3)
    scales = (0.9, 1.0, 1.1)
    grid = TiltGrid(nsides=(1, 2, 4), refine_top=2)
    bank = TiltBank(P, V, np.array([1.0, 1.2, 0.8]), scales, grid, coarse_bins=3)
    X, W = bank.copies(np.array([0, 1, 2, 0, 1, 2]), np.array([7, 30, 100, 150, 4, 0]))
    X = np.roll(X + 0.05 * rng.normal(size=X.shape).astype(np.float32), 5, axis=3)
    W = W * (np.arange(SHAPE[1]) < 10)[None, :, None]
    got = bank.match(X, W)
    for i in range(len(X)):
        k = int(np.argmin(got.D[i]))
        t = int(got.tilt[i, k])
        assert t >= grid.offsets[1]
        d, _ = _naive_best(bank, X[i], W[i], k, [t], (float(got.scale[i, k]),))
        np.testing.assert_allclose(got.D[i, k], d, rtol=2e-4, atol=1e-6)
    # a band as wide as the spectra is no screen: the exact search
    assert TiltBank(P, V, np.ones(3), scales, grid, coarse_bins=8).band is None


def _scaled_twin(a: np.ndarray, sigma: float) -> np.ndarray:
    """a (B, R, A, H) resampled by ``sigma`` on the radial and height axes from the definition (engine, posesearch
    module docstrings): out(i) = a((i + 0.5) / sigma - 0.5) by linear interpolation (numpy's ``np.interp`` as the
    reference), positions below the first bin centre taking the first bin, cells whose position lies beyond the
    grid's outer edge (> n - 0.5) unknown (0)."""
    out = np.array(a, np.float64)
    for axis in (1, 3):
        n = out.shape[axis]
        pos = (np.arange(n) + 0.5) / sigma - 0.5
        out = np.apply_along_axis(lambda line: np.interp(np.clip(pos, 0, n - 1), np.arange(n), line), axis, out)
        keep = (pos <= n - 0.5).astype(np.float64)
        out *= keep.reshape([-1 if d == axis else 1 for d in range(4)])
    return out


def test_aligned_sums_of_the_update_leave_out_the_first_block_and_scale_each_member():
    """The passes' sums (``first`` = R H: the w |x|^2 block left out) hold, for each prototype, the sum over its
    members of [w, w x] resampled by 1 / the member's scale (np.interp twin, yaw 0, upright); they are the
    remaining channels of the sums over every block to the bit (each feature summed, transformed, resampled and
    untilted on its own), with members at several scales in one piece (a piece's groups of one scale resampled
    in one call)."""
    from protomine.mine.engine import _AlignedSums
    from protomine.mine.posesearch import _object_spectra
    rng = np.random.default_rng(5)
    R, A, H = SHAPE
    P, V = _protos(rng)
    grid = TiltGrid(nsides=(1, 2))
    scales = (0.8, 1.0, 1.25)
    bank = TiltBank(P, V, np.array([1.0, 1.2]), scales, grid)
    n, C = 9, P.shape[1]
    x = rng.random((n, C) + SHAPE).astype(np.float32)
    w = rng.random((n,) + SHAPE).astype(np.float32)
    k = np.array([0, 1, 1, 0, 1, 0, 1, 0, 0])
    si = np.array([0, 1, 2, 0, 0, 2, 1, 1, 2])
    T = len(grid.dirs)
    spec = _object_spectra(torch.from_numpy(x), torch.from_numpy(w), _dft_matrix(A))
    got = {}
    for first, B in ((0, C + 2), (R * H, C + 1)):
        sums = _AlignedSums(2, len(scales), A, B * R * H, T, first=first)
        sums.add(spec, np.zeros(n), (k * T) * len(scales) + si)
        got[first] = sums.result(scales, (B, R, H), bank)
    np.testing.assert_array_equal(got[R * H], got[0][:, 1:])
    ref = np.zeros_like(got[R * H])
    for i in range(n):
        blocks = np.concatenate([w[i][None], w[i][None] * x[i]])
        ref[k[i]] += _scaled_twin(blocks, 1.0 / scales[si[i]])
    np.testing.assert_allclose(got[R * H], ref, atol=1e-4)
