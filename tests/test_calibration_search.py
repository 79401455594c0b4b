"""The single-view calibration with each held-out view's face found by a search (``[mine] calibrate_searched``,
``mine.pipeline.single_view_calibration(search=...)``).  Checked against the leave-one-out formula of the
calibration without a search (P_-i = (n V P - w_i x_i) / (n V - w_i), the definition of a weighted mean with one
member removed) and against what the search reported."""
from __future__ import annotations

import numpy as np

from protomine.ingest.sharded import open_store
from protomine.mine.library import read_library
from protomine.mine.pipeline import single_view_calibration
from protomine.mine.tilts import TiltBank, TiltGrid


def _world(tiny_world):
    lib = read_library(tiny_world["library"])
    st = open_store(tiny_world["store"])
    P = np.asarray(lib.prototypes["features"], np.float32)
    V = np.asarray(lib.prototypes["weights"], np.float32)
    return lib, st, P, V, np.asarray(lib.members["cluster"])


def _coarse_bank(lib, P, V, cfg):
    """The coarse tilt grid (N_side 1) and the prototypes' bank of copies on it."""
    grid = TiltGrid(nsides=(1,), radial_margin=float(cfg["volume"]["radial_margin"]),
                    height_margin=float(cfg["volume"]["height_margin"]))
    return grid, TiltBank(P, V, lib.prototypes["aspect"], tuple(lib.scales), grid)


def test_a_search_that_finds_every_view_upright_gives_the_mined_face_calibration(tiny_world):
    lib, st, P, V, labels = _world(tiny_world)
    cfg = tiny_world["cfg"]
    d0, k0, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), reliable=False)
    calls = []

    def upright(xs, ws, k):
        calls.append(k)
        return np.tile([0.0, 0.0, 1.0], (len(xs), 1)), np.ones(len(xs), bool)
    flags = np.zeros(len(st.single_object), bool)
    d1, k1, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), reliable=False, search=upright,
                                        upright_out=flags)
    assert calls and set(calls) <= set(range(len(P)))
    assert np.array_equal(np.isfinite(d0), np.isfinite(d1)) and np.array_equal(k0, k1)
    assert np.allclose(d0[np.isfinite(d0)], d1[np.isfinite(d1)], rtol=1e-5)
    assert flags[np.isfinite(d1)].all()


def test_views_the_search_finds_on_another_face_are_calibrated_against_the_copy_there(tiny_world):
    lib, st, P, V, labels = _world(tiny_world)
    cfg = tiny_world["cfg"]
    grid, bank = _coarse_bank(lib, P, V, cfg)
    side = grid.dirs[4]                      # a direction of the coarse grid, far from +z

    def alternate(xs, ws, k):                # every other view of a prototype "found" lying on that side
        up = np.tile([0.0, 0.0, 1.0], (len(xs), 1))
        up[1::2] = side
        return up, np.arange(len(xs)) % 2 == 0
    flags = np.ones(len(st.single_object), bool)
    d, _, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), reliable=False, bank=bank,
                                      search=alternate, upright_out=flags)
    d_up, _, _ = single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), reliable=False)
    fin = np.isfinite(d)
    assert (~flags[fin]).any() and flags[fin].any()
    # the views reported upright keep the mined-face distance; the others are measured against the tipped copy,
    # which fits an upright view worse (the copy covers another shape)
    assert np.allclose(d[fin & flags], d_up[fin & flags], rtol=1e-5)
    assert np.median(d[fin & ~flags]) > np.median(d_up[fin & ~flags])


def test_the_pooled_leave_one_out_prototypes_change_no_bit(tiny_world):
    # on T > 1 torch threads the groups' prototypes without their object are rebuilt on the tilt search's thread
    # pool (searchpool.pooled); on one thread one after another here: the serial run is the reference, and the pool
    # must give every distance and reliability cell to the bit (the determinism rule of DEVELOPERS.md)
    import torch
    lib, st, P, V, labels = _world(tiny_world)
    cfg = tiny_world["cfg"]
    grid, bank = _coarse_bank(lib, P, V, cfg)

    def alternate(xs, ws, k):                # every other view "found" on a coarse direction far from +z
        up = np.tile([0.0, 0.0, 1.0], (len(xs), 1))
        up[1::2] = grid.dirs[4 + k]
        return up, np.arange(len(xs)) % 2 == 0
    saved, out = torch.get_num_threads(), []
    try:
        for n in (1, 2):
            torch.set_num_threads(n)
            out.append(single_view_calibration(st, cfg, P, V, labels, tuple(lib.scales), bank=bank, search=alternate))
    finally:
        torch.set_num_threads(saved)
    (d1, k1, r1), (d2, k2, r2) = out
    assert np.isfinite(d1).sum() >= 4
    assert np.array_equal(d1, d2) and np.array_equal(k1, k2) and np.array_equal(r1, r2)
