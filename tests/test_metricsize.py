"""Metric size in the label decision (``mine.metricsize``): a solid cylinder's resting extents against plane geometry."""
import numpy as np
import pytest

from protomine.mine.metricsize import member_metres, resting_extents, size_mismatch
from protomine.mine.tilts import TiltGrid

R, A, H = 16, 36, 24


def cylinder_volume(grid: TiltGrid, aspect: float) -> tuple[np.ndarray, np.ndarray]:
    """Features (1, R, A, H) and weights (R, A, H) of a solid upright cylinder filling its footprint and height on the
    scale-normalised grid (radius 1 / radial_margin, height aspect / height_margin, units of rho_max)."""
    rho = (np.arange(R) + 0.5) / R
    z = (np.arange(H) + 0.5) / H * aspect
    inside = (rho[:, None, None] <= 1.0 / grid.radial_margin) & (z[None, None, :] <= aspect / grid.height_margin)
    surf = np.broadcast_to(inside, (R, A, H)).astype(np.float32)
    return surf[None], np.ones((R, A, H), np.float32)


def test_cylinder_extents_upright_and_lying():
    # From memory (plane geometry): a cylinder of radius r and height h stands with footprint radius r and height h;
    # lying on its side its footprint is an h x 2r rectangle, whose smallest enclosing circle is the circumscribed one,
    # radius sqrt(h^2 + 4 r^2) / 2, and its height is 2r.  The grid's cell centres sit up to half a cell inside the
    # surface (grown back by half a cell): within one cell of the exact figures.
    grid = TiltGrid()
    r0, h0 = 0.04, 0.12
    aspect = grid.height_margin * h0 / (grid.radial_margin * r0)
    P, V = cylinder_volume(grid, aspect)
    unit = grid.radial_margin * r0                          # metres per unit of rho_max
    cell = max(1.0 / R, aspect / H) * unit
    r, h = resting_extents(P, V, aspect, grid, np.array([[0, 0, 1.0], [1.0, 0, 0]]))
    assert r[0] * unit == pytest.approx(r0, abs=cell)
    assert h[0] * unit == pytest.approx(h0, abs=cell)
    assert r[1] * unit == pytest.approx(np.hypot(h0, 2 * r0) / 2, abs=cell)
    assert h[1] * unit == pytest.approx(2 * r0, abs=cell)


def test_member_scale_and_mismatch():
    grid = TiltGrid()
    r0, h0 = 0.04, 0.12
    aspect = grid.height_margin * h0 / (grid.radial_margin * r0)
    P, V = cylinder_volume(grid, aspect)
    face_up = np.array([[[0, 0, 1.0], [1.0, 0, 0]]])
    # members: 1.0 x and 1.2 x standing, 1.1 x lying: the median scale is the 1.1 x instance's
    lying = np.array([np.hypot(h0, 2 * r0) / 2, 2 * r0])
    sizes = np.array([[r0, h0], [1.2 * r0, 1.2 * h0], 1.1 * lying])
    metres = member_metres(P[None], V[None], np.array([aspect]), grid, face_up, np.zeros(3, int), np.array([0, 0, 1]), sizes)
    unit = grid.radial_margin * r0
    cell = max(1.0 / R, aspect / H)
    assert metres[0] / unit == pytest.approx(1.1, abs=2 * cell)
    # a view the size of the median member (standing) against the prototype standing: no mismatch; twice as large in
    # both: 2 (ln 2)^2 more; a lying view of the median size matched lying: small (the half-cell growth only)
    up = np.array([[[0, 0, 1.0]], [[0, 0, 1.0]], [[1.0, 0, 0]]])
    r_s, h_s = resting_extents(P, V, aspect, grid, np.array([[0, 0, 1.0]]))
    views = np.array([[metres[0] * r_s[0], metres[0] * h_s[0]], [2 * metres[0] * r_s[0], 2 * metres[0] * h_s[0]],
                      1.1 * lying])
    m = size_mismatch(views, up, P[None], V[None], np.array([aspect]), grid, metres)
    assert m[0, 0] == pytest.approx(0.0, abs=1e-12)
    assert m[1, 0] == pytest.approx(2 * np.log(2.0) ** 2, rel=1e-9)
    assert m[2, 0] < 0.02
    # unknown sizes or no scale: no mismatch
    assert np.all(size_mismatch(np.full((3, 2), np.nan), up, P[None], V[None], np.array([aspect]), grid, metres) == 0)
    assert np.all(size_mismatch(views, up, P[None], V[None], np.array([aspect]), grid, np.array([np.nan])) == 0)
