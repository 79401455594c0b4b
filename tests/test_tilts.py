"""The tilt search: solids turned onto other faces are found at their rotation and cluster with their upright
instances.  Volumes here are built from the definition of the grid (DEVELOPERS.md: radial, azimuth, height
bins normalised by the footprint circle and the height) by counting sample points per cell, without the
lifting code or the tilt resampler."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from sklearn.metrics import normalized_mutual_info_score

from protomine import rotations as rot
from protomine.ingest.proposals import min_enclosing_circle
from protomine.mine.engine import ArraySource, PoseKMeans
from protomine.mine.tilts import TiltBank, TiltGrid, grid_aspect

GRID = (6, 24, 8)
MARGINS = (1.15, 1.10)


def _solid(kind: str, rng: np.random.Generator, n: int = 6000) -> tuple[np.ndarray, np.ndarray]:
    """Points (n, 3) filling an asymmetric solid (base on z = 0) and a part label (n,) per point."""
    def box(lo, hi, m):
        return rng.uniform(lo, hi, (m, 3))
    if kind == "ell":  # a bar with a post at one end
        a = box([-0.06, -0.02, 0.0], [0.06, 0.02, 0.03], n // 2)
        b = box([0.03, -0.02, 0.03], [0.06, 0.02, 0.09], n // 2)
    else:  # "tee": a slab with a fin along +y, off centre
        a = box([-0.05, -0.05, 0.0], [0.05, 0.05, 0.02], n // 2)
        b = box([-0.01, -0.05, 0.02], [0.01, 0.02, 0.07], n // 2)
    return np.concatenate([a, b]), np.repeat([0, 1], [len(a), len(b)])


def _volume(points: np.ndarray, part: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Features (2, R, A, H) [occupancy, occupancy x part], weights (R, A, H) = 1 and the grid aspect of
    points resting on z = 0 (their own footprint circle and height define the grid)."""
    R, A, H = GRID
    p = points - [0, 0, points[:, 2].min()]
    # footprint: the smallest enclosing circle, as ingest measures objects (DEVELOPERS.md, object frame)
    c, radius = min_enclosing_circle(p[:, :2])
    xy = p[:, :2] - c
    height = p[:, 2].max()
    rho = np.linalg.norm(xy, axis=1) / (MARGINS[0] * radius)
    phi = np.mod(np.arctan2(xy[:, 1], xy[:, 0]), 2 * np.pi) / (2 * np.pi)
    z = p[:, 2] / (MARGINS[1] * height)
    idx = (np.minimum((rho * R).astype(int), R - 1), np.minimum((phi * A).astype(int), A - 1), np.minimum((z * H).astype(int), H - 1))
    cnt = np.zeros(GRID)
    np.add.at(cnt, idx, 1.0)
    lab = np.zeros(GRID)
    np.add.at(lab, idx, part.astype(float))
    occ = 1.0 - np.exp(-cnt / 4.0)
    X = np.stack([occ, occ * lab / np.maximum(cnt, 1)]).astype(np.float32)
    return X, np.ones(GRID, np.float32), float(grid_aspect(radius, height, *MARGINS))


def _posed(kind: str, R: np.ndarray, rng: np.random.Generator):
    pts, part = _solid(kind, rng)
    centre = 0.5 * (pts.min(0) + pts.max(0))
    return _volume((pts - centre) @ R.T, part)


def test_tilted_solid_is_found_at_its_rotation():
    rng = np.random.default_rng(0)
    P, V, aspect = _posed("ell", np.eye(3), rng)
    grid = TiltGrid(nsides=(1, 2, 4), radial_margin=MARGINS[0], height_margin=MARGINS[1])
    bank = TiltBank(P[None], V[None], np.array([aspect]), (0.9, 1.0, 1.1), grid)
    errs = []
    # lying on its side, standing on its post's end, upside down, and an arbitrary rotation
    for R in (Rotation.from_euler("xz", [90, 30], degrees=True).as_matrix(),
              Rotation.from_euler("yz", [-90, 200], degrees=True).as_matrix(),
              Rotation.from_euler("xz", [180, 75], degrees=True).as_matrix(),
              Rotation.from_euler("zyx", [20, 40, 10], degrees=True).as_matrix()):
        X, W, _ = _posed("ell", R, rng)
        m = bank.match(X[None], W[None])
        found = rot.tilt_yaw_to_matrix(grid.dirs[m.tilt[0, 0]], m.yaw_deg[0, 0])
        errs.append(float(rot.geodesic_deg(found, R)))
    # the grid's finest level has a 14.7 deg mean spacing (Gorski et al. 2005); the bound adds the
    # coarse grids' and the resampling's error.  Measured: errors of 5-14 deg.
    assert max(errs) < 25.0, errs


def test_identity_grid_is_the_yaw_only_search():
    rng = np.random.default_rng(1)
    P, V, aspect = _posed("tee", np.eye(3), rng)
    X, W, _ = _posed("tee", Rotation.from_euler("z", 50, degrees=True).as_matrix(), rng)
    from protomine.mine.posesearch import pose_distances
    from protomine.mine.tilts import tilt_pose_distances
    a = pose_distances(X[None], W[None], P[None], V[None])
    b = tilt_pose_distances(X[None], W[None], P[None], V[None], aspect=[aspect], grid=TiltGrid.identity())
    np.testing.assert_array_equal(a.D, b.D)
    np.testing.assert_array_equal(b.tilt, 0)


def test_mining_tumbled_solids_gives_one_cluster_per_class():
    rng = np.random.default_rng(2)
    faces = [np.eye(3), Rotation.from_euler("x", 90, degrees=True).as_matrix(),
             Rotation.from_euler("y", -90, degrees=True).as_matrix()]
    X, W, asp, lab, rots = [], [], [], [], []
    for i in range(36):
        kind = ("ell", "tee")[i % 2]
        R = Rotation.from_euler("z", rng.uniform(0, 360), degrees=True).as_matrix() @ faces[(i // 2) % 3]
        x, w, a = _posed(kind, R, rng)
        X.append(x), W.append(w), asp.append(a), lab.append(i % 2), rots.append(R)
    grid = TiltGrid(nsides=(1, 2, 4), radial_margin=MARGINS[0], height_margin=MARGINS[1])
    src = ArraySource(np.stack(X), np.stack(W), np.array(asp))
    model = PoseKMeans(n_clusters=2, n_init=2, random_state=0, tilts=grid, scales=(0.9, 1.0, 1.1)).fit(src)
    lab = np.array(lab)
    # NMI: scikit-learn reference implementation; a yaw-only search splits the faces (measured NMI below)
    nmi = normalized_mutual_info_score(lab, model.labels_)
    assert nmi > 0.9, nmi
    # rotation error after one offset per cluster (the canonical frame is arbitrary): R_i ~ Rhat_i O_k
    rots = np.stack(rots)
    for k in range(2):
        sel = np.flatnonzero(model.labels_ == k)
        rel = np.einsum("nji,njk->nik", model.rotation_[sel], rots[sel])  # Rhat^T R
        errs = np.array([np.median(rot.geodesic_deg(rel[j][None], rel)) for j in range(len(sel))])
        O = rel[np.argmin(errs)]  # the medoid offset
        e = rot.geodesic_deg(model.rotation_[sel] @ O, rots[sel])
        assert np.median(e) < 20.0, (k, np.median(e))


def test_mining_invented_prototypes_without_an_empty_margin():
    """The bench's tumbled objects (mine/tiltbench.py): invented smooth prototypes that fill their whole grid (no
    empty margin), tipped onto random up directions.  Their margin is not empty space, so a tilted copy's cells
    beyond the prototype's cylinder must stay unknown: taking the margin as empty space put almost every object
    in one cluster (measured below)."""
    from protomine.mine.synthetic import synthetic_prototypes
    from protomine.mine.tiltbench import tumbled_objects
    rng = np.random.default_rng(0)
    grid = TiltGrid(nsides=(1, 2))
    P = np.abs(synthetic_prototypes(rng, 4))
    X, W, asp, lab = tumbled_objects(rng, P, 80, grid)
    model = PoseKMeans(n_clusters=4, n_init=1, max_iter=6, random_state=0, tilts=grid).fit(ArraySource(X, W, asp))
    # NMI: scikit-learn reference implementation.  Measured 0.928 (cluster sizes 17 22 21 20 for 18 22 22 18);
    # with the margin taken as empty space 0.227 (sizes 5 68 4 3)
    nmi = normalized_mutual_info_score(lab, model.labels_)
    assert nmi > 0.8, nmi
