"""Symmetry in 3-D: the rotation groups of solids found over the discrete rotation set, and poses reported
modulo them.  Volumes are built from the definition of the grid (DEVELOPERS.md: radial, azimuth, height bins
normalised by the footprint circle and the height; each cell's occupancy is the share of its volume inside
the solid, by supersampling), without the lifting code or the tilt resampler."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from protomine import rotations as rot
from protomine.ingest.proposals import min_enclosing_circle
from protomine.mine import symmetry as sym
from protomine.mine.faces import face_pose
from protomine.mine.tilts import TiltBank, TiltGrid, grid_aspect

GRID = (8, 36, 12)
MARGINS = (1.15, 1.10)
NOISE = 1e-3


def _inside(kind: str, x: np.ndarray) -> np.ndarray:
    """Points x (..., 3) about the solid's centre -> inside (...)."""
    if kind == "cube":
        return np.all(np.abs(x) <= 0.05, axis=-1)
    if kind == "square_prism":  # a square tile, half as thick as it is wide
        return np.all(np.abs(x) <= [0.05, 0.05, 0.025], axis=-1)
    if kind == "cylinder_lying":  # axis along x
        return (np.abs(x[..., 0]) <= 0.08) & (np.hypot(x[..., 1], x[..., 2]) <= 0.03)
    if kind == "cylinder":  # upright, axis along z
        return (np.abs(x[..., 2]) <= 0.05) & (np.hypot(x[..., 0], x[..., 1]) <= 0.03)
    # "ell": a bar with a post at one end (no rotational symmetry)
    return (np.all(np.abs(x - [0, 0, -0.03]) <= [0.06, 0.02, 0.015], axis=-1)
            | np.all(np.abs(x - [0.045, 0, 0.03]) <= [0.015, 0.02, 0.03], axis=-1))


def _volume(kind: str, sub: int = 4) -> tuple[np.ndarray, np.ndarray, float]:
    """Features (1, R, A, H) occupancy, weights (R, A, H) = 1 and the grid aspect of the solid resting on z = 0."""
    R, A, H = GRID
    pts = np.random.default_rng(0).uniform(-0.1, 0.1, (200000, 3))
    pts = pts[_inside(kind, pts)]
    zmin = pts[:, 2].min()
    c, radius = min_enclosing_circle(pts[:, :2])  # the footprint circle, as ingest measures objects
    height = pts[:, 2].max() - zmin
    rm, zm = MARGINS[0] * radius, MARGINS[1] * height
    f = (np.arange(sub) + 0.5) / sub
    i, j, k, a, b, e = np.meshgrid(np.arange(R), np.arange(A), np.arange(H), f, f, f, indexing="ij")
    rho, phi, z = (i + a) / R * rm, (j + b) / A * 2 * np.pi, (k + e) / H * zm + zmin
    q = np.stack([c[0] + rho * np.cos(phi), c[1] + rho * np.sin(phi), z], -1)
    occ = (_inside(kind, q) * rho).sum(axis=(3, 4, 5)) / rho.sum(axis=(3, 4, 5))  # volume share (rho dA)
    return occ[None].astype(np.float32), np.ones(GRID, np.float32), float(grid_aspect(radius, height, *MARGINS))


def _group(kind: str) -> tuple[np.ndarray, int]:
    P, V, aspect = _volume(kind)
    grid = TiltGrid(nsides=(1, 2, 4), radial_margin=MARGINS[0], height_margin=MARGINS[1])
    bank = TiltBank(P[None], V[None], np.array([aspect]), (1.0,), grid)
    code = int(sym.detect_symmetry(P[None], V[None], NOISE)[0])
    return sym.group_elements(sym.tilt_symmetries(bank, 0, NOISE, code), code), code


def _match_groups(found: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """For every reference element its nearest found element's geodesic distance (degrees)."""
    return rot.geodesic_deg(ref[:, None], found[None]).min(axis=1)


@pytest.mark.parametrize("kind, name, order", [("cube", "O", 24), ("square_prism", "D4", 8)])
def test_rotation_group_of_box_shapes(kind, name, order):
    # reference: scipy.spatial.transform.Rotation.create_group -- the cube's rotation group O has 24 elements,
    # a square prism's D4 has 8 (common practice; both with their main axis along z, as the solids here:
    # scipy's D_n has its n-fold axis along z and 2-fold axes along x)
    G, code = _group(kind)
    ref = Rotation.create_group(name).as_matrix()
    assert code == 4
    assert len(G) == order == len(ref)
    # one found element within a few degrees of every element of the group (the finest search step is
    # 0.9 degrees, the yaw search's sub-bin step ~1 degree; measured: at most 2.5 degrees)
    assert _match_groups(G, ref).max() < 6.0
    assert _match_groups(ref, G).max() < 6.0


def test_cylinder_upright_has_a_flip_and_any_yaw():
    # a finite cylinder: every rotation about its axis and the half turns about any axis across it (D_inf)
    G, code = _group("cylinder")
    assert code == sym.CONTINUOUS
    ups = G[:, :, 2]  # images of +z: +z and -z only
    assert np.all(np.abs(ups[:, 2]) > np.cos(np.deg2rad(10.0)))
    assert (ups[:, 2] < 0).sum() == (ups[:, 2] > 0).sum()


def test_cylinder_lying_on_its_side_has_a_two_fold_flip_and_rolls():
    # axis along x: a half turn about z (the 2-fold about up), a half turn about y, and any roll about x
    G, code = _group("cylinder_lying")
    assert code == 2
    for R in (Rotation.from_euler("y", 180, degrees=True).as_matrix(), Rotation.from_euler("x", 90, degrees=True).as_matrix(),
              Rotation.from_euler("x", -45, degrees=True).as_matrix()):
        assert _match_groups(G, R[None])[0] < 20.0  # rolls about x are found on the 14.7-degree grid
    # no rotation tips the axis up: every element keeps x on the x axis
    assert np.all(np.abs(G[:, 0, 0]) > np.cos(np.deg2rad(10.0)))


def test_asymmetric_solid_has_only_the_identity():
    G, code = _group("ell")
    assert code == sym.NONE and len(G) == 1


def test_poses_are_reported_modulo_the_group():
    # a cube resting on any face, at any yaw: every pose reduces to one face and a yaw in [0, 90)
    # (the rotation group of a cube: scipy.spatial.transform.Rotation.create_group("O"))
    group = Rotation.create_group("O").as_matrix()
    rng = np.random.default_rng(3)
    base = Rotation.from_euler("zyx", [20, 5, 3], degrees=True).as_matrix()
    poses = np.stack([base @ group[i] for i in rng.permutation(24)])  # the same object, 24 equivalent poses
    face, R, yaw = face_pose(poses, np.array([[0.0, 0.0, 1.0]]), np.array([4]), group)
    assert np.all(face == 0)
    assert rot.geodesic_deg(R[:1], R).max() < 1e-6  # one pose for all
    assert 0.0 <= yaw[0] < 90.0
    # without the group the 24 poses stay 24 different rotations
    _, R0, _ = face_pose(poses, np.array([[0.0, 0.0, 1.0]]), np.array([4]))
    assert rot.geodesic_deg(R0[:1], R0).max() > 90.0


def test_library_stores_the_group_and_reads_libraries_without_it(tmp_path):
    from protomine.mine.library import Library, pad_quaternions, read_library, write_library
    # a square prism's D4 (scipy.spatial.transform.Rotation.create_group): +z is carried to +z and -z, so two
    # coset representatives (identity and one flip) times the 4-fold turns about up give back the 8 elements
    d4 = Rotation.create_group("D4").as_matrix()
    flip = d4[np.argmin(d4[:, 2, 2])]
    K, R, A, H = 2, 2, 8, 2
    protos = {"features": np.zeros((K, 1, R, A, H), np.float32), "weights": np.ones((K, R, A, H), np.float32),
              "volumes": np.zeros((K, 6, R, A, H), np.float32), "symmetry": np.array([4, 1]),
              "period_deg": np.array([90.0, 360.0]), "count": np.array([1, 1]),
              **{f: np.zeros((K, 2)) for f in ("size_median", "size_p10", "size_p90")},
              **{f: np.zeros(K) for f in ("fused_mu", "fused_sigma", "single_mu", "single_sigma")},
              "aspect": np.ones(K), "face_up": np.array([[[0.0, 0, 1]]] * K), "face_count": np.ones((K, 1), np.int64),
              "face_symmetry": np.array([[4], [1]]), "origin": ["mined"] * K, "name": [""] * K, "name_example": [""] * K,
              "symmetry_rotations": pad_quaternions([np.stack([np.eye(3), flip]), np.eye(3)[None]])}
    members = {"object": np.array(["a/1"], dtype=object), "cluster": np.array([0]), "rotation": np.array([[0.0, 0, 0, 1]]),
               **{f: np.zeros(1) for f in ("yaw_deg", "scale", "fit_scale", "distance", "score", "second_distance")},
               "second_cluster": np.array([1]), "face": np.array([0])}
    write_library(tmp_path / "lib.h5", Library(protos, members, {"config": "{}", "scales": "[1.0]"}))
    lib = read_library(tmp_path / "lib.h5")
    G = lib.symmetry_group(0)
    assert len(G) == 8 and _match_groups(G, d4).max() < 1e-6
    assert len(lib.symmetry_group(1)) == 1
    # a format-2 library mined before the dataset existed: no symmetry that moves up, the about-up ones kept
    del lib.prototypes["symmetry_rotations"]
    assert len(lib.symmetry_group(0)) == 4 and len(lib.symmetry_group(1)) == 1
