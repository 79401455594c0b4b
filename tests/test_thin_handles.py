"""Thin parts that lie low over the table, without masks: a family of our own whose classes differ only in
their handles (a post with thin handles lying 5-15 mm over the table, across the 8 mm grouping margin), every
object touching another, 4 captures x 4 classes.  Each handle's readings stay with its post (the renderer's
masks as truth).  Mask-free mining within 0.05 NMI of mining with masks (scikit-learn's
normalized_mutual_info_score as reference): met with ``[ingest] crumb_grow`` on this draw and on the two other
draws that missed it before its contact voxels and second growth (generator seeds 7 and 9), not without it
(a strict expected failure, so it fails the day it passes; README "Importing captures you already have", the
paragraph after crumb_grow's)."""
from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import normalized_mutual_info_score

from protomine.capture import read_capture
from protomine.config import load_config
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.proposals import find_objects
from protomine.ingest.sharded import open_store
from protomine.mine.pipeline import mine_store
from protomine.scenes import shapes as S
from shape_family import matched_clusters, write_family_capture

# azimuths (deg) of the handles, each 7 cm long from the post's axis
HANDLES = {"one": (0,), "opposite": (0, 180), "square": (0, 90), "three": (0, 120, 240)}
HANDLE_R = 0.005     # handle radius: its top 1.5 cm over the table, its bottom 5 mm
HANDLE_Z = 0.010


def handled_post(kind: str) -> S.Shape:
    """A post (r 2.5 cm, 8 cm) with thin handles (r 5 mm) lying 5 mm over the table out to 7 cm."""
    parts = [S.cylinder(0.025, 0.08)]
    for az in HANDLES[kind]:
        a = np.deg2rad(az)
        parts.append(S.capsule((0.0, 0.0, HANDLE_Z), (0.07 * np.cos(a), 0.07 * np.sin(a), HANDLE_Z), HANDLE_R))
    return S.union(*parts)


def _capture(folder, kinds, rng):
    return write_family_capture(folder, {k: handled_post(k) for k in kinds}, kinds, rng, touching=True,
                                target_z=0.03, noisy=True)


def _cfg(grow: bool) -> dict:
    cfg = load_config("fast")
    cfg["ingest"]["crumb_grow"] = grow
    return cfg


def _draw(root, seed: int) -> dict:
    """Four captures of the family drawn with this seed under root: their folders and truth."""
    rng = np.random.default_rng(seed)
    truth, caps = {}, []
    for c in range(4):
        folder = root / f"cap{c}"
        truth[folder.name] = _capture(folder, list(HANDLES), rng)
        caps.append(folder)
    return {"root": root, "caps": caps, "truth": truth}


@pytest.fixture(scope="module")
def family(tmp_path_factory):
    return _draw(tmp_path_factory.mktemp("handles"), 10)


def _nmi(fam, use_masks, cfg, tag):
    """Objects in the store, objects matched to a truth base within 4 cm, NMI of the mined clusters against
    the truth classes with K = 4 given (choosing K is mining's, not the ingest's), K."""
    st = fam["root"] / f"o_{tag}.h5"
    if tag not in fam.setdefault("done", set()):
        ingest_captures(fam["caps"], st, cfg, seed=0, use_masks=use_masks)
        fam["done"].add(tag)
    cfg = {**cfg, "mine": {**cfg["mine"], "clusters": len(HANDLES)}}
    lib, _ = mine_store(st, fam["root"] / f"lib_{tag}" / "library.h5", cfg, seed=0)
    store = open_store(st)
    pred, lab = matched_clusters(store, lib, fam["truth"], 0.04)
    return len(store.objects["id"]), len(lab), normalized_mutual_info_score(lab, pred), lib.n_clusters


def _within_005(fam, grow):
    n_m, k_m, nmi_m, c_m = _nmi(fam, True, _cfg(False), "masked")     # masks: crumbs never run
    n_f, k_f, nmi_f, c_f = _nmi(fam, False, _cfg(grow), f"free_{grow}")
    print("grow", grow, "masked", n_m, k_m, round(nmi_m, 3), c_m, "mask-free", n_f, k_f, round(nmi_f, 3), c_f)
    assert n_f == n_m == k_f == k_m == 16
    assert nmi_f >= nmi_m - 0.05, (nmi_m, nmi_f)


def test_mask_free_mining_of_low_handles_within_005_nmi_of_masked_with_crumb_grow(family):
    """Measured: masked 1.000, mask-free with crumb_grow 1.000."""
    _within_005(family, True)


@pytest.mark.xfail(strict=True, reason="measured: masked NMI 1.000, mask-free without crumb_grow 0.620: handle "
                                       "crumbs taken by the nearest voxel, a touching neighbour's")
def test_mask_free_mining_of_low_handles_within_005_nmi_of_masked_without_crumb_grow(family):
    _within_005(family, False)


@pytest.mark.parametrize("grow", [
    pytest.param(False, id="crumb_grow off", marks=pytest.mark.xfail(
        strict=True, reason="measured: one post keeps 0.940 of its readings, 0.049 go to a touching neighbour")),
    pytest.param(True, id="crumb_grow on")])
def test_low_handles_stay_with_their_post(family, grow):
    """Every object's masked readings (those over the ingest's cut) go mostly to one mask-free proposal, which
    holds little of any other object: a handle lying on the table beside a touching neighbour is neither cut
    off nor given to the neighbour.  Expected answer by construction (the renderer's masks)."""
    cfg = _cfg(grow)
    for folder in family["caps"]:
        cap = read_capture(folder)
        free = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
        masked = find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals
        assert len(free.proposals) == len(masked) == 4, folder.name
        owner = {fd.id: np.full(fd.depth.size, -1) for fd in free.frames}
        for k, p in enumerate(free.proposals):
            for f, pix in p.pixels.items():
                owner[f][pix] = k
        for m in masked:
            got = np.concatenate([owner[f][pix] for f, pix in m.pixels.items()])
            share = np.bincount(got[got >= 0], minlength=len(free.proposals)) / len(got)
            assert share.max() >= 0.95, (folder.name, m.key, share)


@pytest.fixture(scope="module", params=[7, 9])
def other_draw(request, tmp_path_factory):
    return _draw(tmp_path_factory.mktemp(f"handles{request.param}"), request.param)


def test_mask_free_mining_of_low_handles_within_005_nmi_on_other_draws(other_draw):
    """Measured with crumb_grow, masked / mask-free NMI: seed 7 1.000 / 1.000 (a handle's tip touching a
    neighbour 0.078 away in chromaticity, behind a crease from its own handle: grown into across the crease by
    its own colour; before, 27 voxels went to the neighbour, 0.752), seed 9 0.832 / 0.810 (two posts' tops
    meeting flush, bridged by voxels holding readings of both: cut as contact voxels; before, a post split
    39/61% with half joined to its neighbour, 0.672)."""
    _within_005(other_draw, True)
