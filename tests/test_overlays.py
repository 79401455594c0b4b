"""Overlay drawing: mask RLE decoding, label layout without overlaps, the picture's size.

References: COCO uncompressed RLE (cocodataset.org "Data format": column-major runs, first run of 0s),
worked by hand below; box overlap is plain interval arithmetic.
"""
from __future__ import annotations

import numpy as np

from protomine.label.overlays import UPSCALE, draw_frame, layout_labels, rle_to_mask
from protomine.records import mask_to_rle


def test_rle_to_mask_hand_example_and_round_trip():
    # [[0, 1], [1, 1]] column-major is 0, 1, 1, 1: runs [1, 3]
    np.testing.assert_array_equal(rle_to_mask({"size": [2, 2], "counts": [1, 3]}), [[False, True], [True, True]])
    m = np.random.default_rng(0).random((7, 5)) > 0.5
    np.testing.assert_array_equal(rle_to_mask(mask_to_rle(m)), m)


def _overlap(a, b):
    (ax, ay, aw, ah), (bx, by, bw, bh) = a, b
    return min(ax + aw, bx + bw) > max(ax, bx) and min(ay + ah, by + bh) > max(ay, by)


def test_labels_of_crowded_objects_do_not_overlap():
    # six objects whose bases project within a few pixels of each other: every label still gets a free place
    anchors = [(300.0 + 3 * i, 200.0 + 2 * i) for i in range(6)]
    sizes = [(90, 26)] * 6
    boxes = layout_labels(anchors, sizes, [150.0] * 6, 640, 480)
    rects = [(x, y, w, h) for (x, y), (w, h) in zip(boxes, sizes)]
    assert not any(_overlap(rects[i], rects[j]) for i in range(6) for j in range(i + 1, 6))
    assert all(0 <= x and x + w <= 640 and 0 <= y and y + h <= 480 for x, y, w, h in rects)


def test_draw_frame_upscales_and_draws_in_the_cluster_colour():
    rgb = np.full((40, 60, 3), 128, np.uint8)
    mask = np.zeros((40, 60), bool)
    mask[10:30, 20:40] = True
    rec = {"capture": "c", "frame": "0", "object": "c/1", "bbox": [20, 10, 40, 30], "segmentation": mask_to_rle(mask),
           "base_world": [0.0, 0.0, 1.0], "up": [0.0, -1.0, 0.0], "size_m": [0.05, 0.1], "cluster": 1, "name": "cup",
           "yaw_deg": 30.0, "symmetry": "none", "score": 0.5, "unknown": False}
    K = np.array([[50.0, 0, 29.5], [0, 50.0, 19.5], [0, 0, 1]])
    im = np.asarray(draw_frame(rgb, [rec], K, np.eye(4)))
    assert im.shape == (40 * UPSCALE, 60 * UPSCALE, 3)
    from protomine.drawing import cluster_colour
    # the mask's outline (its left edge, 2x) is drawn in cluster 1's colour
    assert tuple(im[30, 20 * UPSCALE]) == cluster_colour(1)
