from __future__ import annotations

import numpy as np
from scipy import ndimage
from sklearn.cluster import KMeans
from sklearn.datasets import load_digits
from sklearn.metrics import normalized_mutual_info_score

from protomine.geometry import angle_diff_deg
from protomine.mine import symmetry as sym
from protomine.mine.choosek import choose_k
from protomine.mine.engine import ArraySource, PoseKMeans

A = 36


def _symmetric_prototypes(rng):
    """Three (C=2, R=4, A=36, H=3) prototypes: continuous, 4-fold, no symmetry."""
    C, R, H = 2, 4, 3
    phi = 2 * np.pi * np.arange(A) / A
    radial = rng.normal(size=(3, C, R, 1, H))
    P = np.repeat(radial, A, axis=3)
    amp = 1.5 + rng.random((C, R, 1, H))
    P[1] += amp * np.cos(4 * phi)[None, None, :, None]
    P[2] += amp * (np.cos(phi + 0.3) + 0.7 * np.sin(3 * phi))[None, None, :, None]
    return P.astype(np.float32)


def _objects(rng, P, n, noise=0.15):
    labels = rng.integers(0, len(P), n)
    shifts = rng.integers(0, A, n)
    X = np.stack([np.roll(P[k], s, axis=2) for k, s in zip(labels, shifts)])
    X = (X + noise * rng.normal(size=X.shape)).astype(np.float32)
    W = np.ones((n,) + X.shape[2:], np.float32)
    # partial views on half of the objects: a random half of the azimuth is unseen
    half = rng.random(n) < 0.5
    start = rng.integers(0, A, n)
    seen = (np.arange(A)[None, :] - start[:, None]) % A < A // 2
    W[half] *= seen[half][:, None, :, None]
    return X, W, labels, shifts * (360.0 / A)


def test_pose_aware_clustering_recovers_labels_yaw_and_symmetry():
    rng = np.random.default_rng(0)
    P = _symmetric_prototypes(rng)
    X, W, labels, yaw_true = _objects(rng, P, 240)
    model = PoseKMeans(n_clusters=3, n_init=2, random_state=0).fit(ArraySource(X, W))
    # NMI: scikit-learn reference implementation
    assert normalized_mutual_info_score(labels, model.labels_) > 0.99
    for k in range(3):
        found = np.bincount(model.labels_[labels == k]).argmax()
        period = sym.period_deg(model.symmetry_)[found]
        assert model.symmetry_[found] == (0, 4, 1)[k]
        members = labels == k
        if period == 0:
            assert np.all(model.yaw_deg_[members] == 0)
            continue
        # the estimated yaw equals the true yaw up to one constant offset (the canonical frame)
        diff = np.mod(model.yaw_deg_[members] - yaw_true[members], period)
        offset = np.angle(np.exp(2j * np.pi * diff / period).mean()) * period / (2 * np.pi)
        err = angle_diff_deg(diff, offset, period)
        # measured: median 0.03 / 0.07 deg, max 0.21 / 0.30 deg (10-degree bins, sub-bin refinement): bars ~3x
        assert np.median(err) < 0.2 and err.max() < 1.0


def test_detect_symmetry_on_exact_prototypes():
    P = _symmetric_prototypes(np.random.default_rng(5))
    V = np.ones((3,) + P.shape[2:], np.float32)
    noise = 0.01  # variance of each prototype cell's mean, as if averaged from noisy members
    np.testing.assert_array_equal(sym.detect_symmetry(P, V, noise), [0, 4, 1])
    # a 5-fold ring on 36 bins: 5 does not divide 36, still detected from the harmonics
    P5 = P[:1].copy()
    P5[0] += 2.0 * np.cos(5 * 2 * np.pi * np.arange(A) / A)[None, None, :, None]
    assert sym.detect_symmetry(P5, V[:1], noise)[0] == 5


def test_break_effect_breaks_a_blurred_handle():
    """Hand-worked from the effect ratio's definition (mine.symmetry module docstring): one channel, two rings, three
    slabs; ring 1 is c everywhere (the symmetric body), ring 0 holds one bump b (the handle) in every slab.  Every
    turn moves 2 b^2 per slab, and a slab's variance about its mean m = (b + 36 c) / 72 is b^2 + 36 c^2 - 72 m^2, so
    E = b^2 / (b^2 + 36 c^2 - (b + 36 c)^2 / 72) = 0.2006 for b = 1, c = 0.5 at every turn.  A scatter so large that
    the significance test passes every turn reads it as continuous; break_effect below E makes it asymmetric, above
    E changes nothing."""
    P = np.zeros((1, 1, 2, A, 3), np.float32)
    P[0, 0, 1] = 0.5
    P[0, 0, 0, 7] = 1.0
    V = np.ones((1, 2, A, 3), np.float32)
    E = 1.0 / (1.0 + 36 * 0.25 - (1.0 + 18.0) ** 2 / 72)
    assert abs(sym.effect_ratio(P, V, [5.0])[0, 0] - E) < 1e-6
    noise = 1.0   # the members' scatter: T = 2 b^2 / (72 x 2 x noise) per slab, far below the factor
    assert sym.detect_symmetry(P, V, noise)[0] == sym.CONTINUOUS
    assert sym.detect_symmetry(P, V, noise, break_effect=0.15)[0] == sym.NONE
    assert sym.detect_symmetry(P, V, noise, break_effect=0.25)[0] == sym.CONTINUOUS
    # exactly symmetric prototypes keep their symmetry (E = 0 at their symmetries)
    Q = _symmetric_prototypes(np.random.default_rng(5))
    np.testing.assert_array_equal(sym.detect_symmetry(Q, np.ones((3,) + Q.shape[2:], np.float32), 0.01, break_effect=0.15),
                                  [0, 4, 1])


def test_face_symmetries_pass_break_effect_to_a_face_copy():
    """faces.face_symmetries tests each face but the first on the prototype's copy resting on it; its break_effect
    reaches that test.  The copy here is the blurred handle above (hand-worked E = 0.2006 at every turn, a scatter so
    large that the significance test alone reads it continuous): continuous without break_effect, no symmetry with
    0.15 below E, continuous with 0.25 above; face 0 keeps the prototype's code either way."""
    from protomine.mine.faces import face_symmetries

    P = np.zeros((1, 1, 2, A, 3), np.float32)
    P[0, 0, 1] = 0.5
    P[0, 0, 0, 7] = 1.0
    V = np.ones((1, 2, A, 3), np.float32)

    class Bank:  # the copy on every face is the blurred handle
        def copy_at(self, k, up):
            return P[0], V[0]

    ups = [np.array([[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])]
    canonical = np.array([sym.NONE])
    assert face_symmetries(Bank(), ups, np.array([1.0]), canonical)[0].tolist() == [sym.NONE, sym.CONTINUOUS]
    assert face_symmetries(Bank(), ups, np.array([1.0]), canonical, break_effect=0.15)[0].tolist() == [sym.NONE, sym.NONE]
    assert face_symmetries(Bank(), ups, np.array([1.0]), canonical,
                           break_effect=0.25)[0].tolist() == [sym.NONE, sym.CONTINUOUS]


def test_canonical_frame_is_independent_of_the_prototype_roll():
    P = _symmetric_prototypes(np.random.default_rng(6))[2:]
    V = np.ones((1,) + P.shape[2:], np.float32)
    s = np.array([sym.NONE])
    t0 = sym.canonical_shift_bins(P, V, s)[0]
    t1 = sym.canonical_shift_bins(np.roll(P, 7, axis=3), V, s)[0]
    assert abs(np.mod(t1 - t0 - 7 + A / 2, A) - A / 2) < 1e-6


def test_choose_k_finds_true_k():
    rng = np.random.default_rng(1)
    C, R, H = 2, 4, 3
    P = ndimage.gaussian_filter(rng.normal(size=(4, C, R, A, H)), sigma=(0, 0, 0.5, 2, 0.5), mode="wrap")
    P = (P / P.std(axis=(1, 2, 3, 4), keepdims=True)).astype(np.float32)
    X, W, labels, _ = _objects(rng, P, 160, noise=0.2)
    k, table = choose_k(ArraySource(X, W), max_k=7, random_state=0, sample_size=160)
    assert k == 4, table


def test_same_random_state_same_result():
    rng = np.random.default_rng(2)
    P = _symmetric_prototypes(rng)
    X, W, _, _ = _objects(rng, P, 90, noise=0.5)
    a = PoseKMeans(n_clusters=3, n_init=2, random_state=7, chunk_size=32).fit(ArraySource(X, W))
    b = PoseKMeans(n_clusters=3, n_init=2, random_state=7, chunk_size=32).fit(ArraySource(X, W))
    np.testing.assert_array_equal(a.labels_, b.labels_)
    np.testing.assert_array_equal(a.prototypes_, b.prototypes_)
    np.testing.assert_array_equal(a.yaw_deg_, b.yaw_deg_)
    assert a.member_stats_["count"].sum() == 90


class _ReadCountingSource:
    """A source that is not in memory as far as the engine knows (not an ArraySource): the engine reads its next
    chunk ahead on another thread.  Records the chunks read."""

    def __init__(self, X, W):
        self.X, self.W, self.reads = X, W, []

    def __len__(self):
        return len(self.X)

    def read(self, i0, i1):
        self.reads.append((i0, i1))
        return self.X[i0:i1].copy(), self.W[i0:i1].copy()


def test_read_ahead_of_a_disk_source_gives_the_in_memory_fit():
    """Reading a source's chunks ahead on a thread changes nothing (determinism, common practice): the same labels,
    prototypes and yaws as the in-memory source, every pass re-reading its chunks (no spectra cache), each chunk
    read once per pass, in order."""
    rng = np.random.default_rng(4)
    P = _symmetric_prototypes(rng)
    X, W, _, _ = _objects(rng, P, 90, noise=0.5)
    kw = dict(n_clusters=3, n_init=1, random_state=3, chunk_size=16, cache_mb=0.0, max_iter=4)
    src = _ReadCountingSource(X, W)
    a = PoseKMeans(**kw).fit(ArraySource(X, W))
    b = PoseKMeans(**kw).fit(src)
    np.testing.assert_array_equal(a.labels_, b.labels_)
    np.testing.assert_array_equal(a.prototypes_, b.prototypes_)
    np.testing.assert_array_equal(a.yaw_deg_, b.yaw_deg_)
    chunks = [(i, min(90, i + 16)) for i in range(0, 90, 16)]
    # the subsample's read, every Lloyd pass and the final one: each chunk once per pass, in order
    assert src.reads == chunks * (b.n_iter_ + 2)


def _polar(images: np.ndarray, R: int = 8, radius: float = 6.0) -> np.ndarray:
    """(N, h, w) images -> (N, 1, R, A, 1) polar grids centred on each image's intensity centroid.

    The centroid turns with the image, so the grid of a rotated digit is the digit's grid rolled along
    azimuth, wherever the digit sits in its box (the image centre is only the box's centre).
    """
    rho = (np.arange(R) + 0.5) / R * radius
    phi = 2 * np.pi * np.arange(A) / A
    rr, pp = np.meshgrid(rho, phi, indexing="ij")
    out = []
    for im in images:
        cy, cx = ndimage.center_of_mass(im)
        # azimuth counter-clockwise as seen in the image (rows grow downwards)
        out.append(ndimage.map_coordinates(im, [cy - rr * np.sin(pp), cx + rr * np.cos(pp)], order=1, mode="constant"))
    return np.stack(out)[:, None, :, :, None].astype(np.float32)


def test_digits_rotated_pose_aware_beats_plain_kmeans():
    # External data: UCI optdigits (8 x 8, 0..16) as bundled with scikit-learn (sklearn.datasets.load_digits).
    digits = load_digits()
    rng = np.random.default_rng(0)
    angles = rng.uniform(0, 360, len(digits.images))
    # data preparation, fixed before looking at any score and the same for every image:
    # - pad by 2 pixels, then rotate the image itself (not the polar grid): optdigits fill their 8 x 8 box,
    #   and rotating inside the box (reshape=False) would cut the corners off, i.e. lose ink that a
    #   rotated photo of the digit would still show
    padded = np.pad(digits.images / 16.0, ((0, 0), (2, 2), (2, 2)))
    rotated = np.stack([ndimage.rotate(im, a, reshape=False, order=1, mode="constant")
                        for im, a in zip(padded, angles)])
    # - polar grid about the intensity centroid (see _polar), radius 6 px: covers the 8 x 8 box's corners
    #   (4 sqrt 2 = 5.7 px from its centre) whatever the rotation
    X = _polar(rotated)
    # - observation weight proportional to the cell's area (radius), so the centre is not over-counted
    W = np.broadcast_to(((np.arange(8) + 0.5) / 8)[None, :, None, None], (len(X), 8, A, 1)).astype(np.float32)
    # - each digit scaled to weighted RMS 1, so the distance compares shapes, not how dark or thick the
    #   writer's strokes are
    X /= np.sqrt((W[:, None] * X**2).sum(axis=(1, 2, 3, 4)) / W.sum(axis=(1, 2, 3)))[:, None, None, None, None]
    # n_init=4: with 2 restarts the lowest-cost partition is missed on some random_states
    model = PoseKMeans(n_clusters=10, n_init=4, random_state=0).fit(ArraySource(X, W))
    pose_nmi = normalized_mutual_info_score(digits.target, model.labels_)  # scikit-learn reference NMI
    # baseline: scikit-learn KMeans on the same rotated, padded images, each scaled to unit L2 norm
    flat = rotated.reshape(len(rotated), -1)
    plain = KMeans(n_clusters=10, n_init=4, random_state=0).fit(flat / np.linalg.norm(flat, axis=1, keepdims=True))
    plain_nmi = normalized_mutual_info_score(digits.target, plain.labels_)
    print(f"rotated digits NMI: pose-aware {pose_nmi:.3f}, plain k-means {plain_nmi:.3f}")
    # measured: pose-aware 0.705 (rotation seeds 0/1/2 x random_state 0/1/2: 0.675..0.737; 6 and 9 are
    # rotations of each other and cannot be told apart), plain k-means 0.15 (0.14..0.16).  The issue's
    # requirement: NMI >= 0.65 for the pose-aware engine while plain k-means stays near 0.1.
    assert pose_nmi >= 0.65
    assert plain_nmi < 0.25
    assert pose_nmi > plain_nmi + 0.4


def _body_with_part(rng, n, part_amp, noise=0.15):
    """n members of a yaw-symmetric body (large radial/height structure) with a small part at one azimuth."""
    C, R, H = 2, 4, 6
    body = np.repeat(3.0 * rng.normal(size=(C, R, 1, H)), A, axis=2)
    body[0, 3, 0:4, 4] += part_amp  # a "handle": 4 azimuth bins of one ring of one channel
    shifts = rng.integers(0, A, n)
    X = np.stack([np.roll(body, s, axis=2) for s in shifts])
    X = (X + noise * rng.normal(size=X.shape)).astype(np.float32)
    return X, np.ones((n, R, A, H), np.float32)


def test_small_asymmetric_part_on_symmetric_body_is_no_symmetry():
    rng = np.random.default_rng(8)
    X, W = _body_with_part(rng, 40, part_amp=1.0)
    model = PoseKMeans(n_clusters=1, n_init=1, random_state=0, symmetry_tol=0.0).fit(ArraySource(X, W))
    # the part carries ~1e-4 of the prototype's variance energy, which an energy-ratio test calls
    # "continuous"; against the members' scatter (noise 0.15 over 40 members) it is plain asymmetry
    assert model.symmetry_[0] == sym.NONE
    # with the default effect-size floor such a negligible part does not break the symmetry: the yaw
    # it would define is not worth reporting (members' yaws are then reported as 0)
    default = PoseKMeans(n_clusters=1, n_init=1, random_state=0).fit(ArraySource(X, W))
    assert default.symmetry_[0] == sym.CONTINUOUS
    # control: the same body without the part is continuous
    X0, W0 = _body_with_part(np.random.default_rng(8), 40, part_amp=0.0)
    assert PoseKMeans(n_clusters=1, n_init=1, random_state=0).fit(ArraySource(X0, W0)).symmetry_[0] == sym.CONTINUOUS


def test_heavy_noise_on_a_symmetric_body_stays_continuous():
    # few, very noisy members of a symmetric body must not produce a spurious asymmetry (the noisy
    # rendered demo, where depth noise is structured, is what needed the effect-size floor; see symmetry.py)
    X, W = _body_with_part(np.random.default_rng(3), 6, part_amp=0.0, noise=1.0)
    model = PoseKMeans(n_clusters=1, n_init=1, random_state=0).fit(ArraySource(X, W))
    assert model.symmetry_[0] == sym.CONTINUOUS


def test_lloyd_stops_when_an_assignment_comes_back(monkeypatch):
    # k-means passes that revisit an assignment only repeat the cycle from there (common practice: Lloyd's
    # iteration is a map on the finite set of assignments, so a repeat means a cycle, Lloyd 1982 from
    # memory); force a two-pass cycle with costs that never settle and count the passes run
    from protomine.mine import engine
    rng = np.random.default_rng(7)
    X, W, _, _ = _objects(rng, _symmetric_prototypes(rng), 12)
    real, calls = engine._assign_pass, []
    cycle = [np.arange(12) % 2, (np.arange(12) // 6) % 2]

    def cycling(*args, **kw):
        out = list(real(*args, **kw))
        if args[5] and args[6] > 0 and kw.get("forced") is None:  # Lloyd passes only (not seeding, not the final one)
            out[0] = cycle[len(calls) % 2]
            out[3] = out[3] * (1.0 + len(calls) % 2)   # cost alternates: the relative-change test never fires
            calls.append(1)
        return tuple(out)

    monkeypatch.setattr(engine, "_assign_pass", cycling)
    km = PoseKMeans(n_clusters=2, n_init=1, max_iter=30, random_state=0).fit(ArraySource(X, W))
    assert len(calls) == 3 and km.n_iter_ == 3, (len(calls), km.n_iter_)


def test_prototypes_fitted_at_one_free_weight_rescale_to_another():
    # prototypes are observation-weighted means of their aligned members (the engine's update, from the
    # definition of a weighted mean), and a mean is linear: fitting with the free-space channel (feature 1)
    # scaled by sqrt(a) and rescaling by sqrt(b / a) gives the prototypes fitted at sqrt(b) when the
    # assignments and poses agree (noise-free, well separated objects)
    from protomine.mine.pipeline import clustering_config, reweight_free
    rng = np.random.default_rng(3)
    X, W, labels, _ = _objects(rng, _symmetric_prototypes(rng), 24, noise=0.0)
    a, b = 0.05, 0.5
    fits = []
    for fw in (a, b):
        Xf = X.copy()
        Xf[:, 1] *= np.sqrt(fw)
        fits.append(PoseKMeans(n_clusters=3, n_init=2, random_state=0).fit(ArraySource(Xf, W)))
    cfg = {"mine": {"free_weight": b, "cluster_free_weight": a}}
    assert clustering_config(cfg)["mine"]["free_weight"] == a and cfg["mine"]["free_weight"] == b
    assert normalized_mutual_info_score(fits[0].labels_, fits[1].labels_) == 1.0
    assert reweight_free(fits[0], cfg)
    order = [int(np.bincount(fits[1].labels_[fits[0].labels_ == k]).argmax()) for k in range(3)]
    # up to the sub-bin yaw refinement, whose parabola moves a little with the channel weights (values are O(1);
    # without the rescaling feature 1 would be off by a factor sqrt(10))
    np.testing.assert_allclose(fits[0].prototypes_, fits[1].prototypes_[order], atol=0.02)
    assert not reweight_free(fits[1], {"mine": {"free_weight": b, "cluster_free_weight": b}})
